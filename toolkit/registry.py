"""Measure kinds and baseline methods, each defined once as data.

The same rows drive validation (which keys a kind takes), the compiler (which template macro renders
it), ``plimsoll keys`` and the README's reference, so adding a method is adding a row and a macro.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Key:
    """One YAML key: its type, whether it is required, its default, and what it means."""

    name: str
    type: str  # text | name | int | number | fraction | bool | duration | expr | column | columns | choice | mapping | list
    doc: str
    required: bool = False
    default: Any = None
    choices: tuple[str, ...] = ()
    minimum: float | None = None


@dataclass(frozen=True)
class Kind:
    """A measure kind or a baseline method: its keys, its macro in the stage template, its meaning."""

    name: str
    description: str
    keys: tuple[Key, ...]
    rate_only: bool = False


MEASURES: dict[str, Kind] = {
    k.name: k
    for k in (
        Kind(
            "rate",
            "share of the window's sessions that are bad: bad ÷ sessions",
            (
                Key("bad", "expr", "SQL boolean over source columns: which sessions count as bad", True),
                Key("split", "column", "one series per value of this column among bad sessions"),
            ),
        ),
        Kind(
            "ratio",
            "ratio of sums over the window's sessions: Σ numerator ÷ Σ denominator",
            (
                Key("numerator", "expr", "SQL numeric expression summed over sessions", True),
                Key("denominator", "expr", "SQL numeric expression summed over sessions", True),
            ),
        ),
        Kind(
            "quantile",
            "quantile_cont of a per-session value over the window (NULL values left out)",
            (
                Key("of", "expr", "SQL numeric expression per session", True),
                Key("q", "fraction", "the quantile, between 0 and 1", True),
            ),
        ),
    )
}

_HISTORY = (
    Key("history", "int", "how many earlier non-breaching windows of the series", True, minimum=1),
    Key("min_history", "int", "fewer earlier windows than this: no verdict yet", True, minimum=1),
)

_CONFIDENCE = Key(
    "confidence", "fraction",
    "rate: breach only if this window's Wilson score bound at this confidence is beyond the threshold",
)

BASELINES: dict[str, Kind] = {
    k.name: k
    for k in (
        Kind(
            "rolling_percentile",
            "threshold = max(floor, factor × quantile_cont(q) of the series' earlier window values)",
            (
                Key("q", "fraction", "quantile of earlier windows' values", True),
                *_HISTORY,
                Key("factor", "number", "multiplier on the quantile (below 1 for direction down)", False, 1.0, minimum=0),
                Key("floor", "number", "up: the threshold is never below this; down: never above it"),
                _CONFIDENCE,
            ),
        ),
        Kind(
            "p_chart",
            "threshold = p̄ ± sigmas × √(p̄(1−p̄)/n): p̄ pooled over earlier windows (Σbad ÷ Σsessions), "
            "n this window's sessions (NIST/SEMATECH e-Handbook §6.3.3.2)",
            (
                Key("sigmas", "number", "how many standard errors from p̄ the limit lies", False, 3.0, minimum=0),
                *_HISTORY,
                _CONFIDENCE,
            ),
            rate_only=True,
        ),
        Kind(
            "ewma",
            "EWMA chart (NIST/SEMATECH e-Handbook §6.3.2.4): z = λ·value + (1−λ)·z of the previous "
            "window; threshold = target ± sigmas × s × √(λ/(2−λ)), target and s the mean and standard "
            "deviation of earlier windows unless given",
            (
                Key("lambda", "fraction", "λ, the weight of the newest window in the moving average", True),
                Key("sigmas", "number", "how many standard deviations of the EWMA the limit lies", False, 3.0, minimum=0),
                *_HISTORY,
                Key("target", "number", "the series' known mean (default: mean of earlier windows)"),
                Key("sigma", "number", "the known standard deviation of one window's value "
                    "(default: of earlier windows)", minimum=0),
            ),
        ),
    )
}

SEVERITIES = ("high", "medium", "low")
DIRECTIONS = ("up", "down")
