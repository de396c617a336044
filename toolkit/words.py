"""The words people read: an alert or incident said in one line, its figures in the measure's unit and
rounded for reading, for the listings, the notifications (a payload's ``summary``, a template's
variables, a mail) and the report.

A rate reads as a percentage; a ratio or quantile in the unit its check declares (``measure.unit``:
``ms``, ``kbps``, or ``%`` for a fraction shown as a percentage), else as a plain number. A CUSUM's
threshold is its decision interval on the statistic's scale, so it is said as such. Lines carry keys
and counts, never a session or viewer identifier.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from toolkit.model import Project


@dataclass(frozen=True)
class Reading:
    """How a check's figures read: its measure kind, its unit, its baseline method and direction."""

    kind: str | None = None      # rate | ratio | quantile; None: a check no longer in the project
    unit: str | None = None
    method: str | None = None
    direction: str = "up"


def readings(project: Project | None) -> dict[str, Reading]:
    """Each check of the project by name: how its figures read."""
    if project is None:
        return {}
    return {name: Reading(c.measure.kind, c.measure.unit, c.baseline.method, c.direction)
            for name, c in project.checks.items()}


def number_text(value: float | int | None) -> str:
    """A number rounded for reading: whole numbers with thousands separators from 100 on, three
    significant digits below (``3,226``, ``32.3``, ``3.23``, ``0.0123``), trailing zeros dropped;
    '-' for none, NaN or infinity."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if isinstance(value, int) or float(value).is_integer() and abs(value) < 1e15:
        return f"{int(value):,}"
    size = abs(value)
    if size >= 100:  # halves up, as people round (Python's round() goes to even)
        return f"{int(math.copysign(math.floor(size + 0.5), value)):,}"
    digits = 2 - math.floor(math.log10(size)) if size > 0 else 0
    text = f"{value:.{max(0, digits)}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def readable_number(value: float) -> float:
    """A computed value without binary noise: 3226.1180000000004 is 3226.118 (twelve significant
    digits keep every digit a measure can mean)."""
    return float(f"{value:.12g}") if math.isfinite(value) else value


def measure_text(value: float | None, reading: Reading) -> str:
    """A window's value in its measure's unit: ``3.2 %`` for a rate, ``2,310 ms`` for a quantile whose
    check declares ``unit: ms``, ``0.81`` for a ratio without a unit."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if reading.kind == "rate" or reading.unit == "%":
        return f"{number_text(100 * value)} %"
    return f"{number_text(value)} {reading.unit}" if reading.unit else number_text(value)


def against_text(value: float | None, threshold: float | None, reading: Reading) -> str:
    """'60 % against a threshold of 10 %'; a CUSUM's threshold is on its statistic's scale."""
    shown = measure_text(value, reading)
    if threshold is None or (isinstance(threshold, float) and not math.isfinite(threshold)):
        return f"{shown}, no threshold"
    if reading.method == "cusum":
        return f"{shown}, its CUSUM beyond the decision interval h = {number_text(threshold)}"
    return f"{shown} against a threshold of {measure_text(threshold, reading)}"


def affected_text(sessions: int | None, viewers: int | None) -> str:
    """'6 sessions and 4 viewers affected'; viewers only where the source counts them."""
    said = plural(sessions or 0, "session")
    if viewers is not None:
        said += f" and {plural(viewers, 'viewer')}"
    return f"{said} affected"


def plural(n: int | float, noun: str) -> str:
    """'1 session', '2 sessions', '1,024 viewers'."""
    count = round(n)
    return f"{count:,} {noun}{'' if count == 1 else 's'}"


def series_text(check: str | None, key_text: str | None, split_value: str | None) -> str:
    """'title_errors site=kids, title_id=t-1 [DRM-LICENSE]'; '(all sessions)' for a check without 'by'.
    Control characters in the key are escaped: a key cannot add a line to what people read."""
    text = f"{check or '?'} {key_text or '(all sessions)'}"
    return printable(text + (f" [{split_value}]" if split_value is not None else ""))


def printable(text: str) -> str:
    """``text`` with control characters (newlines, terminal escapes) written as ``\\x..`` escapes."""
    return "".join(ch if ch.isprintable() else f"\\x{ord(ch):02x}" if ord(ch) < 256 else f"\\u{ord(ch):04x}"
                   for ch in text)


EVENT_WORDS = {"opened": "opened", "reopened": "reopened", "updated": "grew", "closed": "closed"}


def event_line(payload: dict[str, Any], reading: Reading) -> str:
    """One line for an alert event's payload (the default body of ``plimsoll notify``)."""
    if payload.get("alarm"):
        return alarm_event_line(payload)
    head = f"{payload.get('severity')} {EVENT_WORDS.get(payload.get('event'), payload.get('event'))}"
    if payload.get("event") == "closed" and payload.get("close_reason"):
        head += f" ({payload['close_reason']})"
    series = series_text(payload.get("check"), payload.get("key_text"), payload.get("split_value"))
    said = f"{head}: {series}: "
    if payload.get("value") is None and payload.get("event") == "closed":
        said += "no window for its expire_after" if payload.get("close_reason") == "expired" else "no value"
    else:
        said += against_text(payload.get("value"), payload.get("threshold"), reading)
    said += f"; {affected_text(payload.get('affected_sessions'), payload.get('affected_viewers'))}"
    windows = payload.get("breach_windows")
    if windows is not None:
        said += f" in {plural(windows, 'breaching window')}"
    return said


def alarm_event_line(payload: dict[str, Any]) -> str:
    """'high opened: source sessions silent: no new file for 47 min (max_silence 30m)'."""
    limit = payload.get("limit_seconds")
    key = "max_silence" if payload.get("alarm") == "silent" else "max_lag"
    limit_text = spoken(limit)
    seconds = payload.get("duration_seconds")
    how_long = spoken(seconds) if seconds is not None else "?"
    what = f"no new file for {how_long}" if payload.get("alarm") == "silent" else f"newest data {how_long} behind the clock"
    head = f"{payload.get('severity')} {EVENT_WORDS.get(payload.get('event'), payload.get('event'))}"
    if payload.get("event") == "closed" and payload.get("close_reason"):
        head += f" ({payload['close_reason']})"
    return f"{head}: source {printable(str(payload.get('source')))} {payload.get('alarm')}: {what} ({key} {limit_text})"


def spoken(seconds: float | None) -> str:
    """A wall-clock stretch for people: '45 s', '47 min', '2 h 05 min', '3 d 04 h'."""
    if seconds is None:
        return "?"
    whole = max(0, int(seconds))
    if whole < 60:
        return f"{whole} s"
    minutes, hours, days = whole // 60, whole // 3600, whole // 86400
    if whole < 3600:
        return f"{minutes} min"
    if whole < 86400:
        return f"{hours} h {minutes % 60:02d} min"
    return f"{days} d {hours % 24:02d} h"


def incident_event_line(payload: dict[str, Any], reading: Reading, value: float | None = None,
                        threshold: float | None = None) -> str:
    """One line for an incident event's payload: its cause's series, how many alerts, the impact."""
    cause = payload.get("cause") or {}
    event = payload.get("event")
    head = f"{payload.get('severity')} incident {EVENT_WORDS.get(event, event)}"
    if payload.get("status") == "merged":
        head += f" (merged into {printable(str(payload.get('merged_into')))})"
    series = printable(f"({cause['alarm']}) {cause.get('key_text')}") if cause.get("alarm") else \
        series_text(cause.get("check"), cause.get("key_text"), cause.get("split_value"))
    said = f"{head}: cause {series}"
    if value is not None:
        said += f": at worst {against_text(value, threshold, reading)}"
    said += f"; {plural(payload.get('alerts') or 0, 'alert')}; "
    said += affected_text(payload.get("affected_sessions"), payload.get("affected_viewers"))
    return said
