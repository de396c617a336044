"""Where in the attributes a window's bad sessions exceed what was expected (`plimsoll explain`).

The computation is the SQL of ``queries/explain.sql``: every combination of up to ``depth``
attributes is scored in one GROUPING SETS query against its own history; this module only picks
the best combination of each round, marks its rows explained, and asks again, so that the second
answer explains what the first left.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import duckdb

from toolkit.model import Check
from toolkit.sql.templates import Named, named

# The weight of the prior that shrinks a combination's own historical rate toward the series', in
# rows of the history (sessions, for a rate): a combination seen in a handful of rows is expected to
# fail like the series, one seen in thousands like itself.
PRIOR_ROWS = 5
# A finer combination (one attribute value more) replaces a coarser one when what lies outside it
# has at most this share of its relative excess (X/F − 1).
FINER_REST = 0.05
# An answer must hold at least this share of the window's excess.
MIN_SHARE = 0.05
# 2·S above the 99.9 % point of chi-square with one degree of freedom: the likelihood-ratio test of
# "this combination fails at its expected rate" (the scan statistic is half its log-likelihood ratio).
SIGNIFICANT_2S = 10.828
# How many of a round's best combinations the SQL returns for the coarser-is-better comparison.
CANDIDATES = 200
DEPTH = 3
TOP = 5


class ExplainError(ValueError):
    """A window that cannot be explained, said in one line."""


@dataclass(frozen=True)
class Cause:
    """One combination of attribute values, in the order the rounds chose them."""

    rank: int
    key: dict[str, str | None]
    bad: float              # bad sessions (Σ numerator, for a ratio) of the combination in the window
    expected: float         # what its historical rate gives on its weight in the window
    sessions: float         # its sessions (Σ denominator, for a ratio) in the window
    excess_share: float | None   # (bad − expected) ÷ the window's whole excess
    score: float            # the expectation-based Poisson scan statistic
    significant: bool       # 2·score beyond the chi-square(1) 99.9 % point

    def as_json(self) -> dict[str, Any]:
        return {"rank": self.rank, "key": self.key, "bad": self.bad, "expected": self.expected,
                "sessions": self.sessions, "excess_share": self.excess_share, "score": self.score,
                "significant": self.significant}


def statements(check: Check, attributes: tuple[str, ...], depth: int = DEPTH) -> Named:
    """The explain SQL of ``check`` over ``attributes``, combinations of up to ``depth`` of them."""
    sets = [s for size in range(1, min(depth, len(attributes)) + 1)
            for s in itertools.combinations(range(len(attributes)), size)]
    return named("explain.sql", check=check, source=check.source, attributes=attributes, depth=depth,
                 sets=sets, prior=PRIOR_ROWS, candidates=CANDIDATES)


def _execute(con: duckdb.DuckDBPyConnection, sql: Named, name: str, params: dict[str, Any]) -> list[tuple]:
    rows: list[tuple] = []
    for statement in sql[name]:
        rows = con.execute(statement.sql, statement.bound(params)).fetchall()
    return rows


def explain_rows(con: duckdb.DuckDBPyConnection, check: Check, files: list[str], window_start: datetime,
                 window_end: datetime, history: list[tuple[datetime, datetime]], attributes: tuple[str, ...],
                 key: dict[str, str | None] | None = None, split_value: str | None = None,
                 depth: int = DEPTH, top: int = TOP) -> list[Cause]:
    """The ranked causes of one window of ``check``'s series ``key``, against its ``history``
    (the start and end of earlier windows), reading ``files``."""
    if check.measure.kind not in ("rate", "ratio"):
        raise ExplainError(f"check '{check.name}': explain needs a rate or ratio measure, "
                           f"not {check.measure.kind}")
    if not attributes:
        raise ExplainError(f"check '{check.name}': no attributes to explain by: give --by, or "
                           "'attributes' in the source or the check")
    sql = statements(check, attributes, depth)
    params: dict[str, Any] = {
        "files": files, "window_start": window_start, "window_end": window_end,
        "history": [{"window_start": s, "window_end": e} for s, e in history],
        "key": key or {}, "split_value": split_value,
    }
    _execute(con, sql, "explain.rows", params)
    (window_bad, window_weight, history_bad, history_weight, history_rows, window_rows), = _execute(
        con, sql, "explain.totals", params)
    if window_rows == 0:
        raise ExplainError(f"check '{check.name}': no sessions of the series in the window "
                           f"{window_start:%Y-%m-%d %H:%M:%S} to {window_end:%Y-%m-%d %H:%M:%S}")
    if history_rows == 0 or history_weight <= 0:
        raise ExplainError(f"check '{check.name}': the series has no healthy history before "
                           f"{window_start:%Y-%m-%d %H:%M:%S} to compare the window with")
    excess = window_bad - window_weight * history_bad / history_weight

    def cause(candidate: tuple, significant: bool, rank: int) -> Cause:
        combination, bad, weight, expected, score = candidate
        return Cause(rank=rank, key=dict(combination), bad=bad, expected=expected, sessions=weight,
                     excess_share=(bad - expected) / excess if excess > 0 else None, score=score,
                     significant=significant)

    # the answers: round after round, the best combination of what is left, while it is significant
    first = _execute(con, sql, "explain.round", params)
    answers: list[tuple] = []
    candidates = first
    while candidates and len(answers) < top:
        chosen = refine(candidates)
        if 2 * chosen[4] <= SIGNIFICANT_2S or (excess > 0 and (chosen[1] - chosen[3]) < MIN_SHARE * excess):
            break
        answers.append(chosen)
        names = list(chosen[0])
        _execute(con, sql, "explain.mark", {**params, "names": names, "values": [chosen[0][n] for n in names]})
        candidates = _execute(con, sql, "explain.round", params)
    answers = merged(answers, first)
    causes = [cause(c, True, i + 1) for i, c in enumerate(answers)]
    # then the other combinations of the whole window, best first, each refined, as less likely causes
    chosen_keys = [dict(c[0]) for c in answers]
    pool = list(first)
    while pool and len(causes) < top:
        candidate = refine(pool)
        pool = [c for c in pool if c[0] != candidate[0] and c[0] != pool[0][0]]
        if dict(candidate[0]) in chosen_keys:
            continue
        chosen_keys.append(dict(candidate[0]))
        causes.append(cause(candidate, False, len(causes) + 1))
    con.execute("DROP TABLE IF EXISTS explain_rows")
    return causes


def merged(answers: list[tuple], first: list[tuple]) -> list[tuple]:
    """Answers that are parts of one coarser combination, as that combination: a later answer
    coarser than an earlier one (the earlier was a part of it, and the rest of it was still the
    problem), or two answers that differ in the value of one attribute only (the problem is in the
    others). The coarser combination's figures are those of the whole window (``first``)."""
    figures = {tuple(sorted(c[0].items())): c for c in first}
    answers = list(answers)
    changed = True
    while changed:
        changed = False
        for i, j in itertools.combinations(range(len(answers)), 2):
            a, b = set(answers[i][0].items()), set(answers[j][0].items())
            if b < a:
                parent = b
            elif answers[i][0].keys() == answers[j][0].keys() and len(a - b) == 1:
                parent = a & b
            else:
                continue
            found = figures.get(tuple(sorted(parent)))
            if found is None or not parent:
                continue
            answers[i] = found
            del answers[j]
            changed = True
            break
    return answers


def refine(candidates: list[tuple]) -> tuple:
    """The best-scoring candidate, made finer while the rest of it is no longer the problem: a finer
    combination (one attribute value more) replaces it when what lies outside the finer one fails at
    close to its expected rate (its relative excess X/F − 1 at most FINER_REST of the finer one's)."""
    current = candidates[0]
    while True:
        items = set(current[0].items())
        finer = []
        for c in candidates:
            if len(c[0]) != len(current[0]) + 1 or not items < set(c[0].items()):
                continue
            rest_bad, rest_expected = current[1] - c[1], current[3] - c[3]
            lift = c[1] / c[3] - 1
            rest_lift = rest_bad / rest_expected - 1 if rest_expected > 0 else 0.0
            if rest_lift <= FINER_REST * lift:
                finer.append(c)
        if not finer:
            return current
        current = max(finer, key=lambda c: c[4])


def finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None
