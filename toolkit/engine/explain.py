"""Where in the attributes a window's bad sessions exceed what was expected (`plimsoll explain`).

The computation is the SQL of ``queries/explain.sql``: every combination of up to ``depth``
attributes is scored in one GROUPING SETS query against its own history; this module only picks
the best combination of each round, marks its rows explained, and asks again, so that the second
answer explains what the first left.
"""

from __future__ import annotations

import itertools
import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import duckdb

from toolkit.engine import warehouse
from toolkit.lake import files as lake
from toolkit.lake import storage
from toolkit.model import Check, Project
from toolkit.problems import PlimsollError
from toolkit.sql.templates import Named, named

# The weight of the prior that shrinks a combination's own historical rate toward the series', in
# rows of the history (sessions, for a rate): a combination seen in a handful of rows is expected to
# fail like the series, one seen in thousands like itself.
PRIOR_ROWS = 5
# A finer combination (one attribute value more) replaces a coarser one when what lies outside it
# has at most this share of its relative excess (X/F − 1).
FINER_REST = 0.05
# ... and when it holds at least this share of the coarser one's excess: a handful of sessions with
# an expected count near zero has a huge lift, but says nothing of where the problem is.
FINER_HOLDS = 0.5
# An answer must hold at least this share of the window's excess.
MIN_SHARE = 0.05
# 2·S above the 99.9 % point of chi-square with one degree of freedom: the likelihood-ratio test of
# "this combination fails at its expected rate" (the scan statistic is half its log-likelihood ratio).
SIGNIFICANT_2S = 10.828
# How many of a round's best combinations the SQL returns for the coarser-is-better comparison.
CANDIDATES = 200
DEPTH = 3
TOP = 5


class ExplainError(PlimsollError):
    """A window that cannot be explained, said in one line (exit 1)."""


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
        "spans": [{"window_start": window_start, "window_end": window_end, "in_window": True}]
                 + [{"window_start": s, "window_end": e, "in_window": False} for s, e in history],
        "key": key or {}, "split_value": split_value,
        "read_from": min([window_start, *(s for s, _ in history)]),
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
    combination (one attribute value more) replaces it when it holds at least FINER_HOLDS of its
    excess and what lies outside it fails at close to its expected rate (its relative excess X/F − 1
    at most FINER_REST of the finer one's)."""
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
            holds = c[1] - c[3] >= FINER_HOLDS * (current[1] - current[3])
            if holds and rest_lift <= FINER_REST * lift:
                finer.append(c)
        if not finer:
            return current
        current = max(finer, key=lambda c: c[4])


@dataclass(frozen=True)
class Explanation:
    """The causes of one window of one series."""

    check: str
    key_text: str
    split_value: str | None
    window_start: datetime
    window_end: datetime
    attributes: tuple[str, ...]
    history_windows: int
    causes: list[Cause]

    def as_json(self) -> list[dict[str, Any]]:
        return [c.as_json() for c in self.causes]


_ALERT = """
SELECT a.check_name, a.key, a.key_text, a.split_value, w.window_number, w.window_start, w.window_end
FROM alerts AS a
LEFT JOIN windows AS w
    ON w.check_name = a.check_name AND w.key = a.key AND w.split_value IS NOT DISTINCT FROM a.split_value
   AND w.window_end = a.opened_at AND w.breach
WHERE a.alert_id = $alert_id
"""

# one series' windows: its key as the lists of its `by` columns and their values, in `by` order
_SERIES_WINDOWS = """
SELECT key, key_text, split_value, window_number, window_start, window_end, breach
FROM windows
WHERE check_name = $check AND key = MAP($names, $values) AND split_value IS NOT DISTINCT FROM $split
ORDER BY window_number
"""


def _series_windows(con: duckdb.DuckDBPyConnection, check: Check, key: dict[str, str | None],
                    split_value: str | None) -> list[tuple]:
    return con.execute(_SERIES_WINDOWS, {"check": check.name, "names": list(check.by),
                                         "values": [key[c] for c in check.by], "split": split_value}).fetchall()


def explain_alert(project: Project, alert_id: str, by: tuple[str, ...] = (), top: int = TOP) -> Explanation:
    """The causes of the window that opened alert ``alert_id``."""
    con = warehouse.open_for_reading(project)
    try:
        found = con.execute(_ALERT, {"alert_id": alert_id}).fetchone()
        if found is None:
            raise ExplainError(f"no alert {alert_id} in {project.warehouse}")
        name, key, key_text, split_value, number, start, end = found
        check = _check(project, name)
        if number is None:
            raise ExplainError(f"alert {alert_id}: its opening window is no longer in the warehouse "
                               f"(check '{name}' was rebuilt since)")
        windows = _series_windows(con, check, key, split_value)
    finally:
        con.close()
    return _explain(project, check, key, key_text, split_value, start, end, number, windows, by, top)


def explain_at(project: Project, check_name: str, at: datetime, key: dict[str, str] | None = None,
               by: tuple[str, ...] = (), top: int = TOP) -> Explanation:
    """The causes of the window of ``check_name``'s series ``key`` that holds data time ``at``
    (closed, or for a time window still open)."""
    check = _check(project, check_name)
    key = key or {}
    if set(key) != set(check.by):
        wanted = ", ".join(f"{c}=…" for c in check.by) or "none (the check has no 'by')"
        raise ExplainError(f"check '{check_name}': --key must give every 'by' column: {wanted}")
    con = warehouse.open_for_reading(project)
    try:
        windows = _series_windows(con, check, key, None)
    finally:
        con.close()
    text = ", ".join(f"{c}={key[c]}" for c in check.by)
    if check.window.sessions is not None:
        holding = [w for w in windows if w[4] <= at <= w[5]]
        if not holding:
            raise ExplainError(f"check '{check_name}': no closed window of {text or 'the series'} holds "
                               f"{at:%Y-%m-%d %H:%M:%S} (a count window is explained once it has closed)")
        number, start, end = holding[0][3], holding[0][4], holding[0][5]
    else:
        width = check.window.every
        epoch = datetime(1970, 1, 1)
        number = (at - epoch) // width
        start = epoch + number * width
        end = start + width
    return _explain(project, check, key, text, None, start, end, number, windows, by, top)


def parse_key(text: str) -> dict[str, str]:
    """``COL=VALUE,...`` as a dict; a part without '=' is one line naming it."""
    key: dict[str, str] = {}
    for part in (p for p in text.split(",") if p.strip()):
        column, sep, value = part.partition("=")
        if not sep:
            raise ExplainError(f"--key: '{part}' is not COLUMN=VALUE")
        key[column.strip()] = value.strip()
    return key


def _check(project: Project, name: str) -> Check:
    check = project.checks.get(name)
    if check is None:
        raise ExplainError(f"no check '{name}' in {project.file}")
    return check


def _explain(project: Project, check: Check, key: dict[str, str], key_text: str, split_value: str | None,
             start: datetime, end: datetime, number: int, windows: list[tuple], by: tuple[str, ...],
             top: int) -> Explanation:
    attributes = tuple(by) or check.attributes
    unknown = [c for c in attributes if check.source.columns and c not in check.source.columns]
    if unknown:
        raise ExplainError(f"check '{check.name}': --by: no column {', '.join(unknown)} in source "
                           f"'{check.source.name}'")
    attributes = tuple(c for c in attributes if c not in check.by and c != check.measure.split)
    history = [(w[4], w[5]) for w in windows if w[3] < number and w[6] is False][-check.baseline.history:]
    files = [f.where for f in lake.list_source(check.source)]
    con = duckdb.connect()
    try:
        if check.source.storage is not None:
            storage.register(con, check.source.storage)
        causes = explain_rows(con, check, files, start, end, history, attributes, key, split_value, top=top)
    finally:
        con.close()
    return Explanation(check.name, key_text, split_value, start, end, attributes, len(history), causes)


def explanation_table(found: Explanation) -> str:
    """What `plimsoll explain` prints: the window, then one line per cause."""
    head = (f"{found.check} {found.key_text or '(all sessions)'}"
            f"{' [' + found.split_value + ']' if found.split_value else ''}, window "
            f"{found.window_start:%Y-%m-%d %H:%M:%S} to {found.window_end:%Y-%m-%d %H:%M:%S}, against "
            f"{found.history_windows} earlier healthy windows, by {', '.join(found.attributes)}")
    if not found.causes:
        return head + "\nno combination has more bad sessions than expected\n"
    rows = [("rank", "where", "bad", "expected", "share of excess", "score", "answer")]
    for c in found.causes:
        where = ", ".join(f"{k}={v if v is not None else '<null>'}" for k, v in c.key.items())
        share = f"{100 * c.excess_share:.0f} %" if c.excess_share is not None else "-"
        rows.append((str(c.rank), where, f"{c.bad:,.0f}", f"{c.expected:,.1f}", share, f"{c.score:,.1f}",
                     "yes" if c.significant else ""))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(v.ljust(w) if i in (1, 6) else v.rjust(w) for i, (v, w) in enumerate(zip(r, widths))).rstrip()
             for r in rows]
    return (head + "\n" + "\n".join(lines) + "\n"
            "answer: significant once the answers above it are set aside; the other rows are the next best "
            "combinations of the whole window\n")


def explain_sql(check: Check, by: tuple[str, ...] = ()) -> str:
    """The statements `plimsoll explain` runs for ``check``, for `plimsoll sql`."""
    attributes = tuple(c for c in (by or check.attributes) if c not in check.by and c != check.measure.split)
    if check.measure.kind not in ("rate", "ratio") or not attributes:
        return ""
    return statements(check, attributes).text("explain.")


def explanation_json(found: Explanation) -> str:
    return json.dumps(found.as_json(), indent=2, ensure_ascii=False) + "\n"
