"""Where in the attributes a window's bad sessions exceed what was expected (`plimsoll explain`).

The computation is the SQL of ``queries/explain.sql``: every combination of up to ``depth``
attributes is scored in one GROUPING SETS query against its own history; this module only picks
the best combination of each round, marks its rows explained, and asks again, so that the second
answer explains what the first left.
"""

from __future__ import annotations

import itertools
import math
import json
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from functools import lru_cache
from datetime import datetime
from typing import Any

import duckdb
from toolkit.config.expressions import unknown_column

from toolkit.engine import warehouse
from toolkit.lake import files as lake
from toolkit.lake import storage
from toolkit.model import Check, Project
from toolkit.problems import PlimsollError
from toolkit.sql.templates import Named, Statement, named

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
# An alert's causes: its latest breaching windows, at most this many (a long alert is explained by
# what it is now) ...
CAUSE_WINDOWS = 12
# ... against at most this many healthy windows of its series before its first breach: enough for
# each combination's own rate, and a bounded read of the lake in the run that explains it.
CAUSE_HISTORY = 36
# ... leaving out the healthy windows just before the first breach, which may already hold the
# problem's start (a release's first hours): a guard band of this many windows.
CAUSE_GAP = 3


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


# How a statement is executed: on its own (`plimsoll explain`), or by a run's one helper for every
# statement it executes (toolkit.engine.runner), which names what failed and is timed by the benchmark.
Executor = Callable[[duckdb.DuckDBPyConnection, Statement, dict[str, Any]], list[tuple]]


def _plain(con: duckdb.DuckDBPyConnection, statement: Statement, params: dict[str, Any]) -> list[tuple]:
    cursor = con.execute(statement.sql, statement.bound(params))
    return cursor.fetchall() if cursor.description else []


def _execute(con: duckdb.DuckDBPyConnection, sql: Named, name: str, params: dict[str, Any],
             run: Executor | None = None) -> list[tuple]:
    rows: list[tuple] = []
    for statement in sql[name]:
        rows = (run or _plain)(con, statement, params)
    return rows


def by_cutoff(check: Check) -> bool:
    """Whether the check's bad sessions are those beyond the breached threshold (a quantile, or a
    ratio that alerts when it falls), rather than its own bad sessions or numerator."""
    return check.measure.kind == "quantile" or (check.measure.kind == "ratio" and check.direction != "up")


def explain_rows(con: duckdb.DuckDBPyConnection, check: Check, files: list[str], window_start: datetime,
                 window_end: datetime, history: list[tuple[datetime, datetime]], attributes: tuple[str, ...],
                 key: dict[str, str | None] | None = None, split_value: str | None = None,
                 depth: int = DEPTH, top: int = TOP, spans: list[tuple[datetime, datetime]] | None = None,
                 cutoff: float | None = None, run: Executor | None = None) -> list[Cause]:
    """The ranked causes of one window of ``check``'s series ``key`` (or of several: ``spans``, the
    start and end of each, e.g. an alert's breaching windows), against its ``history`` (the start
    and end of earlier windows), reading ``files``. A quantile, or a ratio that alerts when it falls,
    counts the sessions beyond ``cutoff`` (the threshold breached) as its bad sessions."""
    if check.measure.kind not in ("rate", "ratio", "quantile"):
        raise ExplainError(f"check '{check.name}': explain needs a rate, ratio or quantile measure, "
                           f"not {check.measure.kind}")
    if by_cutoff(check) and cutoff is None:
        raise ExplainError(f"check '{check.name}': the window has no threshold to count the sessions beyond "
                           "(a window before the series had a baseline)")
    if not attributes:
        raise ExplainError(f"check '{check.name}': no attributes to explain by: give --by, or "
                           "'attributes' in the source or the check")
    explained = spans or [(window_start, window_end)]
    if check.baseline.method == "peers":
        history = []  # the peers in the same windows are the comparison
    sql = statements(check, attributes, depth)
    params: dict[str, Any] = {
        "files": files,
        "spans": [{"window_start": s, "window_end": e, "in_window": True} for s, e in explained]
                 + [{"window_start": s, "window_end": e, "in_window": False} for s, e in history],
        "key": key or {}, "split_value": split_value, "cutoff": cutoff,
        "read_from": min([*(s for s, _ in explained), *(s for s, _ in history)]),
        "read_until": max(e for _, e in explained),
    }
    _execute(con, sql, "explain.rows", params, run)
    (window_bad, window_weight, history_bad, history_weight, history_rows, window_rows), = _execute(
        con, sql, "explain.totals", params, run)
    if window_rows == 0:
        raise ExplainError(f"check '{check.name}': no sessions of the series in the window "
                           f"{window_start:%Y-%m-%d %H:%M:%S} to {window_end:%Y-%m-%d %H:%M:%S}")
    if check.baseline.method == "peers" and (history_rows == 0 or history_weight <= 0):
        raise ExplainError(f"check '{check.name}': the series has no peers with sessions in the window "
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
    first = _execute(con, sql, "explain.round", params, run)
    answers: list[tuple] = []
    candidates = first
    while candidates and len(answers) < top:
        chosen = refine(candidates)
        if 2 * chosen[4] <= SIGNIFICANT_2S or (excess > 0 and (chosen[1] - chosen[3]) < MIN_SHARE * excess):
            break
        answers.append(chosen)
        names = list(chosen[0])
        _execute(con, sql, "explain.mark", {**params, "names": names, "values": [chosen[0][n] for n in names]}, run)
        candidates = _execute(con, sql, "explain.round", params, run)
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
    _execute(con, sql, "explain.drop", {}, run)
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
            lift = c[1] / c[3] - 1 if c[3] > 0 else math.inf
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
    windows: int = 1
    peers_by: tuple[str, ...] = ()   # a peers check: compared with its peers in the same windows


    def as_json(self) -> list[dict[str, Any]]:
        return [c.as_json() for c in self.causes]


@lru_cache(maxsize=1)
def cause_statements() -> Named:
    """``queries/causes.sql``: which alerts a run explains, their windows, and storing the causes."""
    return named("causes.sql")


def cause_attributes(check: Check, by: tuple[str, ...] = ()) -> tuple[str, ...]:
    """The columns an explanation of ``check`` drills into: ``by``, else the check's (or its
    source's) attributes; never the series' own columns or its split."""
    return tuple(c for c in (by or check.attributes) if c not in check.by and c != check.measure.split)


def explainable(check: Check) -> bool:
    """Whether a run stores causes for ``check``'s alerts."""
    return check.measure.kind in ("rate", "ratio", "quantile") and bool(cause_attributes(check))


@dataclass(frozen=True)
class AlertWindows:
    """What explaining an alert reads: its series, its latest breaching windows, its history."""

    check_name: str | None  # None: a source alarm (no check, no windows)
    key: dict[str, str | None]
    key_text: str
    split_value: str | None
    threshold: float | None
    explained: list[tuple[datetime, datetime]]
    history: list[tuple[datetime, datetime]]


def alert_windows(con: duckdb.DuckDBPyConnection, alert_id: str, run: Executor | None = None) -> AlertWindows | None:
    """The windows explaining alert ``alert_id`` reads (None: no such alert)."""
    sql = cause_statements()
    found = _execute(con, sql, "causes.alert", {"alert_id": alert_id}, run)
    if not found:
        return None
    name, key, key_text, split_value, threshold = found[0]
    rows = _execute(con, sql, "causes.windows", {"alert_id": alert_id, "explained": CAUSE_WINDOWS,
                                                 "history": CAUSE_HISTORY, "gap": CAUSE_GAP}, run)
    return AlertWindows(name, dict(key), key_text, split_value, threshold,
                        [(r[2], r[3]) for r in rows if r[0]], [(r[2], r[3]) for r in rows if not r[0]])


def explain_windows(con: duckdb.DuckDBPyConnection, check: Check, found: AlertWindows, files: list[str],
                    by: tuple[str, ...] = (), top: int = TOP, run: Executor | None = None) -> list[Cause]:
    """The causes of an alert's windows (``found``), reading ``files`` on ``con``."""
    if not found.explained:
        raise ExplainError(f"check '{check.name}': the alert's breaching windows are no longer in the warehouse "
                           "(the check was rebuilt since)")
    first, last = found.explained[0], found.explained[-1]
    return explain_rows(con, check, files, first[0], last[1], found.history, cause_attributes(check, by),
                        found.key, found.split_value, top=top, spans=found.explained, cutoff=found.threshold,
                        run=run)


def store_causes(con: duckdb.DuckDBPyConnection, checks: list[Check], run_id: int,
                 files_of: Callable[[Check], list[str]], run: Executor | None = None) -> int:
    """In a run, inside its transaction: the causes of every alert of ``checks`` that this run
    opened or added breaching windows to, replacing what earlier runs stored; how many alerts.
    ``files_of`` gives the files a check has read (what its alerts are explained from)."""
    sql = cause_statements()
    by_name = {c.name: c for c in checks if explainable(c)}
    touched = _execute(con, sql, "causes.touched", {"run_id": run_id, "checks": sorted(by_name)}, run)
    for (alert_id,) in touched:
        found = alert_windows(con, alert_id, run)
        assert found is not None
        check = by_name[found.check_name]
        try:
            causes = explain_windows(con, check, found, files_of(check), run=run)
        except ExplainError:
            causes = []  # no healthy history yet, say: nothing to say
        rows = [{"rank": c.rank, "names": list(c.key), "values": list(c.key.values()), "key_text": key_text(c.key),
                 "bad": c.bad, "expected": c.expected, "sessions": c.sessions, "excess_share": c.excess_share,
                 "score": c.score, "significant": c.significant} for c in causes]
        _execute(con, sql, "causes.store", {"alert_id": alert_id, "causes": rows, "run_id": run_id,
                                            "windows": len(found.explained), "history_windows": len(found.history)},
                 run)
    return len(touched)


def key_text(key: dict[str, str | None]) -> str:
    """'cdn=birch, country=DE'."""
    return ", ".join(f"{k}={v if v is not None else '<null>'}" for k, v in key.items())

# one series' windows: its key as the lists of its `by` columns and their values, in `by` order
_SERIES_WINDOWS = """
SELECT key, key_text, split_value, window_number, window_start, window_end, breach, threshold
FROM windows
WHERE check_name = $check AND key = MAP($names, $values) AND split_value IS NOT DISTINCT FROM $split
ORDER BY window_number
"""


def _series_windows(con: duckdb.DuckDBPyConnection, check: Check, key: dict[str, str | None],
                    split_value: str | None) -> list[tuple]:
    return con.execute(_SERIES_WINDOWS, {"check": check.name, "names": list(check.by),
                                         "values": [key[c] for c in check.by], "split": split_value}).fetchall()


def explain_alert(project: Project, alert_id: str, by: tuple[str, ...] = (), top: int = TOP) -> Explanation:
    """The causes of alert ``alert_id``: its latest breaching windows (at most CAUSE_WINDOWS)
    against the healthy windows of its series before it opened (at most CAUSE_HISTORY), as a run
    stores them in alert_causes."""
    con = warehouse.open_for_reading(project)
    try:
        found = alert_windows(con, alert_id)
    finally:
        con.close()
    if found is None:
        raise ExplainError(f"no alert {alert_id} in {project.warehouse}")
    if found.check_name is None:
        raise ExplainError(f"alert {alert_id} is a source alarm ({found.key_text}), not a check's: it has no windows "
                           "or sessions to explain; `plimsoll alerts` says what it found")
    check = _check(project, found.check_name)
    attributes = _attributes(check, by)
    files = [f.where for f in lake.list_source(check.source)]
    with _lake_connection(check) as con:
        causes = explain_windows(con, check, found, files, attributes, top)
    start = found.explained[0][0]
    return Explanation(check.name, found.key_text, found.split_value, start, found.explained[-1][1], attributes,
                       len(found.history), causes, len(found.explained), _peers_by(check))


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


def _attributes(check: Check, by: tuple[str, ...]) -> tuple[str, ...]:
    unknown = [c for c in by or check.attributes if check.source.columns and c not in check.source.columns]
    if unknown:
        said = "; ".join(unknown_column(c, check.source.columns) for c in unknown)
        raise ExplainError(f"check '{check.name}': --by: {said} in source '{check.source.name}'")
    return cause_attributes(check, by)


def _explain(project: Project, check: Check, key: dict[str, str], key_text: str, split_value: str | None,
             start: datetime, end: datetime, number: int, windows: list[tuple], by: tuple[str, ...],
             top: int) -> Explanation:
    attributes = _attributes(check, by)
    history = [(w[4], w[5]) for w in windows if w[3] < number and w[6] is False][-(check.baseline.history or 1):]
    cutoff = next((w[7] for w in windows if w[3] == number), None)
    files = [f.where for f in lake.list_source(check.source)]
    with _lake_connection(check) as con:
        causes = explain_rows(con, check, files, start, end, history, attributes, key, split_value, top=top,
                              cutoff=cutoff)
    return Explanation(check.name, key_text, split_value, start, end, attributes, len(history), causes,
                       peers_by=_peers_by(check))


@contextmanager
def _lake_connection(check: Check) -> Iterator[duckdb.DuckDBPyConnection]:
    """A connection of its own that reads ``check``'s source (its object storage registered)."""
    con = duckdb.connect()
    try:
        if check.source.storage is not None:
            storage.register(con, check.source.storage)
        yield con
    finally:
        con.close()


def _peers_by(check: Check) -> tuple[str, ...]:
    return tuple(check.baseline.peers_by) if check.baseline.method == "peers" else ()


def explanation_table(found: Explanation) -> str:
    """What `plimsoll explain` prints: the window, then one line per cause."""
    head = (f"{found.check} {found.key_text or '(all sessions)'}"
            f"{' [' + found.split_value + ']' if found.split_value else ''}, "
            f"{'window' if found.windows == 1 else f'{found.windows} breaching windows'} "
            f"{found.window_start:%Y-%m-%d %H:%M:%S} to {found.window_end:%Y-%m-%d %H:%M:%S}, against "
            + (f"its peers (the series of the same {', '.join(found.peers_by)}, in the same windows)" if found.peers_by
               else f"{found.history_windows} earlier healthy windows")
            + f", by {', '.join(found.attributes)}")
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
    attributes = cause_attributes(check, by)
    if check.measure.kind not in ("rate", "ratio", "quantile") or not attributes:
        return ""
    return statements(check, attributes).text("explain.")


def after_checks_sql(check: Check) -> str:
    """What a run executes after its checks, for `plimsoll sql`: the causes of ``check``'s alerts
    (queries/causes.sql around the explain statements, also those of `plimsoll explain`), then
    the grouping of every alert into incidents (queries/incidents.sql)."""
    explaining = explain_sql(check)
    causes = cause_statements()
    text = causes.text("causes.touched", "causes.alert", "causes.windows")
    if explaining:
        text += "\n" + explaining
    else:
        text += ("\n-- (check '" + check.name + "' has no attributes to explain by: its alerts get no causes)\n")
    text += "\n" + causes.text("causes.store")
    return text + "\n" + named("incidents.sql").text("incidents.")


def explanation_json(found: Explanation) -> str:
    return json.dumps(found.as_json(), indent=2, ensure_ascii=False) + "\n"
