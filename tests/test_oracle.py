"""Property tests: Plimsoll's SQL against the independent oracle in ``oracle.py``.

Each example generates a small session table (a few keys, NULL keys, tied event times, duplicate
session ids, NULL flags and numbers), writes it as Parquet with a project and one check, runs
Plimsoll through its Python API and compares the warehouse's windows, alerts and alert events with
what the oracle computes from the same rows.
"""

from __future__ import annotations


import math
import os
import tempfile
from dataclasses import dataclass, replace
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st

import oracle
from toolkit.config.fields import parse_duration
from toolkit.config.project import load_project
from toolkit.engine.runner import run

BASE = datetime(2024, 3, 1)
SCHEMA = pa.schema([
    ("session_id", pa.string()),
    ("ended_at", pa.timestamp("us")),
    ("site", pa.string()),
    ("tier", pa.int32()),
    ("is_bot", pa.bool_()),
    ("failed", pa.bool_()),
    ("error_code", pa.string()),
    ("startup_ms", pa.float64()),
    ("play_ms", pa.float64()),
    ("rebuffer_ms", pa.float64()),
])
COLUMNS = [f.name for f in SCHEMA]
# Each example is one Plimsoll run (about a second); raise this for a deeper search.
EXAMPLES = int(os.environ.get("PLIMSOLL_ORACLE_EXAMPLES", "8"))
SETTINGS = settings(max_examples=EXAMPLES, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])


def _null(fn):
    """Lift a Python function so that a NULL input gives NULL, as SQL operators do."""
    def lifted(*args):
        return None if any(a is None for a in args) else fn(*args)
    return lifted


@dataclass(frozen=True)
class Sql:
    """A SQL expression and the same expression over a Python row (None for NULL)."""

    text: str
    py: Any


BAD = (
    Sql("failed", lambda r: r["failed"]),
    Sql("error_code IS NOT NULL", lambda r: r["error_code"] is not None),
    Sql("startup_ms > 3000", lambda r: _null(lambda x: x > 3000)(r["startup_ms"])),
)
WHERE = (
    None,
    Sql("site <> 'news'", lambda r: _null(lambda s: s != "news")(r["site"])),
    Sql("tier IS NOT NULL", lambda r: r["tier"] is not None),
)
EXCLUDE = (None, Sql("is_bot", lambda r: r["is_bot"]))
NUMERATOR = Sql("rebuffer_ms", lambda r: r["rebuffer_ms"])
DENOMINATOR = Sql("play_ms + rebuffer_ms", lambda r: _null(lambda p, b: p + b)(r["play_ms"], r["rebuffer_ms"]))
QUANTILE_OF = (
    Sql("startup_ms", lambda r: r["startup_ms"]),
    Sql("startup_ms / 1000.0", lambda r: _null(lambda x: x / 1000.0)(r["startup_ms"])),
)
FLOORS = {"rate": (0.05, 0.3, 0.6), "ratio": (0.05, 0.2, 0.5), "quantile": (0.5, 1.5, 800.0, 2500.0)}


# ----------------------------------------------------------------------------------------------
# generated data


@st.composite
def tables(draw, hot_burst: bool | None = None, max_rows: int = 90) -> list[dict[str, Any]]:
    """Session rows with NULLs, tied times, gaps, duplicate ids (also at the same time in another
    file), and one burst during which sessions are 'hot' (more bad, slower, more rebuffering) or,
    for a dip, 'cool' while the rest is hot; so that breaches, recoveries and expiries happen."""
    n = draw(st.integers(1, max_rows))
    hot_burst = draw(st.booleans()) if hot_burst is None else hot_burst
    burst_at = draw(st.integers(0, n))
    burst_len = draw(st.integers(0, n // 2))
    minute = draw(st.integers(0, 30))
    rows = []
    for i in range(n):
        minute += draw(st.sampled_from([0, 0, 1, 1, 2, 3, 5, 8, 75]))
        hot = (burst_at <= i < burst_at + burst_len) == hot_burst
        failed = draw(st.sampled_from([True, True, True, False, None] if hot else [False] * 7 + [True, None]))
        rows.append({
            "session_id": None if draw(st.integers(0, 40)) == 0 else f"s{i:03d}",
            "ended_at": None if draw(st.integers(0, 50)) == 0 else BASE + timedelta(minutes=minute),
            "site": draw(st.sampled_from(["kids", "kids", "news", None])),
            "tier": draw(st.sampled_from([1, 1, 2, None])),
            "is_bot": draw(st.sampled_from([False] * 6 + [True, None])),
            "failed": failed,
            "error_code": draw(st.sampled_from(["E1", "E2", "E2", None] if failed else [None] * 6 + ["E3"])),
            "startup_ms": draw(st.one_of(st.none(), st.integers(2500, 8000) if hot else st.integers(100, 2000)))
            if i % 7 else None,
            "play_ms": draw(st.sampled_from([None, 0.0, 20000.0, 60000.0, 60000.0])),
            "rebuffer_ms": draw(st.sampled_from([None, 0.0, 4000.0, 9000.0] if hot else [None, 0.0, 0.0, 0.0, 300.0])),
            "_file": f"part-{draw(st.integers(0, 2))}.parquet",
        })
        if rows[-1]["startup_ms"] is not None:
            rows[-1]["startup_ms"] = float(rows[-1]["startup_ms"])
    dups = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(-20, 20), st.integers(0, 2),
                                   st.sampled_from([False, True, None])), max_size=5))
    taken = {(r["session_id"], r["ended_at"], r["_file"]) for r in rows}
    for src, delta, file, failed in dups:
        base = rows[src]
        if base["session_id"] is None or base["ended_at"] is None:
            continue
        copy = {**base, "ended_at": base["ended_at"] + timedelta(minutes=delta),
                "_file": f"part-{file}.parquet", "failed": failed}
        mark = (copy["session_id"], copy["ended_at"], copy["_file"])
        if mark in taken:
            continue
        taken.add(mark)
        rows.append(copy)
    return rows


# ----------------------------------------------------------------------------------------------
# generated checks


@dataclass(frozen=True)
class Case:
    """One check both as the YAML a user writes and as the oracle's description of it."""

    spec: dict[str, Any]
    check: oracle.OracleCheck
    exclude: str | None = None      # the source's exclude expression the check was made for

    @property
    def name(self) -> str:
        return self.check.name


# ewma's known target and spread, per measure kind (the quantile's in ms and in seconds)
TARGETS = {"rate": (0.1, 0.3), "ratio": (0.02, 0.1), "quantile": (1.5, 1500.0)}
SIGMAS = {"rate": (0.05, 0.2), "ratio": (0.01, 0.05), "quantile": (0.8, 800.0)}


@st.composite
def baselines(draw, kind: str, direction: str, method: str | None = None,
              confidence: bool | None = None, by: tuple[str, ...] = ()) -> tuple[dict[str, Any], dict[str, Any]]:
    """A baseline section of a check file and the oracle's fields for it."""
    methods = ["rolling_percentile", "p_chart", "ewma"] if kind == "rate" else ["rolling_percentile", "ewma"]
    method = draw(st.sampled_from(methods)) if method is None else method
    if method == "peers":
        peers_by = draw(st.sampled_from([by[:1], by[1:]]))
        min_peers = draw(st.sampled_from([2, 2, 3]))
        sigmas = draw(st.sampled_from([0.5, 1.0, 2.0, 3.0]))
        spec = {"method": method, "peers_by": list(peers_by), "min_peers": min_peers, "sigmas": sigmas}
        return spec, {"method": method, "peers_by": peers_by, "min_peers": min_peers, "sigmas": sigmas}
    # an EWMA whose spread comes from history needs two earlier windows for a standard deviation
    history = draw(st.integers(2 if method == "ewma" else 1, 5))
    min_history = draw(st.integers(1, history))
    spec: dict[str, Any] = {"method": method, "history": history, "min_history": min_history}
    fields: dict[str, Any] = {"method": method, "history": history, "min_history": min_history}
    if method == "cusum":
        # short in-control run lengths, so that a few dozen sessions can signal
        shift = draw(st.sampled_from([1.5, 3.0]))
        sessions = draw(st.sampled_from([30, 300]))
        spec.update(shift=shift, in_control_sessions=sessions)
        fields.update(shift=shift, in_control_sessions=sessions)
        return spec, fields
    if method == "rolling_percentile":
        factor = draw(st.sampled_from([1.0, 1.25, 1.5] if direction == "up" else [1.0, 0.8, 0.5]))
        base_q = draw(st.sampled_from([0.5, 0.75, 0.9]))
        floor = draw(st.one_of(st.none(), st.sampled_from(FLOORS[kind])))
        spec.update(q=base_q, factor=factor)
        fields.update(base_q=base_q, factor=factor, floor=floor)
        if floor is not None:
            spec["floor"] = floor
    else:
        # a p-chart limit on small windows meets a window's rate exactly for whole sigmas more often
        # (1 of 2 against p̄ = 0.5 at 1 sigma): rounding would decide those, so the oracle skips them
        sigmas = draw(st.sampled_from([1.5, 2.5, 3.0] if method == "p_chart" else [0.5, 1.0, 2.0, 3.0]))
        spec["sigmas"] = fields["sigmas"] = sigmas
    if method == "ewma":
        lam = draw(st.sampled_from([0.2, 0.4, 0.7]))
        spec["lambda"] = fields["lam"] = lam
        for key, known in (("target", TARGETS[kind]), ("sigma", SIGMAS[kind])):
            value = draw(st.one_of(st.none(), st.sampled_from(known)))
            if value is not None:
                spec[key] = fields[key] = value
    elif kind == "rate":
        use = draw(st.booleans()) if confidence is None else confidence
        if use:
            level = draw(st.sampled_from([0.8, 0.95, 0.99]))
            spec["confidence"] = fields["confidence"] = level
    return spec, fields


@st.composite
def cases(draw, kind: str, window: str, split: bool | None = None, name: str = "probe",
          method: str | None = None, confidence: bool | None = None, sessions: tuple[int, int] = (1, 6)) -> Case:
    """A check of ``kind`` and ``window`` (count windows of ``sessions`` sessions at most and
    least), its other keys drawn; ``method`` and ``confidence`` fix its baseline's."""
    by = draw(st.sampled_from([(), ("site",), ("site", "tier"), ("tier",)] if method != "peers"
                              else [("site", "tier"), ("tier", "site")]))
    direction = "up" if method == "cusum" else draw(st.sampled_from(["up", "down"]))
    measure: dict[str, Any] = {"kind": kind}
    fields: dict[str, Any] = {"kind": kind}
    if kind == "rate":
        bad = draw(st.sampled_from(BAD))
        measure["bad"], fields["bad"] = bad.text, bad.py
        use_split = draw(st.booleans()) if split is None else split
        if use_split:
            column = draw(st.sampled_from([c for c in ("error_code", "tier") if c not in by]))
            measure["split"], fields["split"] = column, column
    elif kind == "ratio":
        measure.update(numerator=NUMERATOR.text, denominator=DENOMINATOR.text)
        fields.update(numerator=NUMERATOR.py, denominator=DENOMINATOR.py)
    else:
        of = draw(st.sampled_from(QUANTILE_OF))
        q = draw(st.sampled_from([0.5, 0.9, 0.25]))
        measure.update(of=of.text, q=q)
        fields.update(of=of.py, q=q)
    if window == "count":
        n = draw(st.integers(*sessions))
        wait = draw(st.sampled_from(["10m", "30m", "1h", "3h"]))
        win: dict[str, Any] = {"sessions": n, "max_wait": wait}
        fields.update(sessions=n, max_wait=parse_duration(wait))
    else:
        every = draw(st.sampled_from(["15m", "30m", "1h"]))
        late = draw(st.sampled_from(["0s", "10m", "45m"]))
        win = {"every": every, "lateness": late}
        fields.update(every=parse_duration(every), lateness=parse_duration(late))
    baseline, baseline_fields = draw(baselines(kind, direction, method, confidence, by))
    fields.update(baseline_fields)
    guard = {"min_sessions": draw(st.integers(0, 4))}
    if kind == "rate":
        # an EWMA breaches on windows after the bad ones too, which a high min_bad would mostly block
        guard["min_bad"] = draw(st.integers(0, 1 if baseline["method"] == "ewma" else 2))
    recover = draw(st.integers(1, 3))
    expire = draw(st.sampled_from(["20m", "1h", "3h", "1d"]))
    reopen = draw(st.sampled_from(["0s", "20m", "1h", "6h"]))
    where = draw(st.sampled_from(WHERE))
    exclude = draw(st.sampled_from(EXCLUDE))
    spec = {"check": name, "source": "sessions", "by": list(by), "measure": measure,
            "direction": direction, "window": win, "baseline": baseline, "guard": guard,
            "lifecycle": {"recover_after": recover, "expire_after": expire, "reopen_within": reopen},
            "severity": "high"}
    if where is not None:
        spec["where"] = where.text
    check = oracle.OracleCheck(
        name=name, by=by, direction=direction, min_sessions=guard["min_sessions"],
        min_bad=guard.get("min_bad", 0), recover_after=recover, expire_after=parse_duration(expire),
        reopen_within=parse_duration(reopen),
        where=where.py if where else None, exclude=exclude.py if exclude else None, severity="high",
        **fields)
    return Case(spec, check, exclude.text if exclude else None)


# ----------------------------------------------------------------------------------------------
# running Plimsoll


def write_project(folder: Path, cases_: list[Case]) -> Path:
    """plimsoll.yml (one source, the cases' exclude) and one check file per case."""
    excludes = {c.exclude for c in cases_}
    assert len(excludes) == 1, "the cases of one project share their source"
    source: dict[str, Any] = {"path": "lake/", "session_id": "session_id", "event_time": "ended_at"}
    if excludes != {None}:
        source["exclude"] = excludes.pop()
    (folder / "lake").mkdir(exist_ok=True)
    (folder / "checks").mkdir(exist_ok=True)
    (folder / "plimsoll.yml").write_text(yaml.safe_dump(
        {"warehouse": "warehouse.duckdb", "checks": "checks/", "sources": {"sessions": source}}))
    for case in cases_:
        (folder / "checks" / f"{case.name}.yml").write_text(yaml.safe_dump(case.spec, sort_keys=False))
    return folder / "plimsoll.yml"


def write_files(folder: Path, rows: list[dict[str, Any]]) -> None:
    by_file: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        by_file.setdefault(r["_file"], []).append({c: r[c] for c in COLUMNS})
    for name, part in sorted(by_file.items()):
        pq.write_table(pa.Table.from_pylist(part, schema=SCHEMA), folder / "lake" / name)


WINDOW_FIELDS = ("key_text", "split_value", "window_number", "window_start", "window_end", "sessions", "bad",
                 "value", "statistic", "baseline", "history_windows", "threshold", "breach")
ALERT_FIELDS = ("alert_id", "fingerprint", "severity", "key_text", "split_value", "status",
                "close_reason", "opened_at", "last_breach_at", "closed_at", "breach_windows",
                "affected_sessions", "peak_value", "threshold", "healthy_streak")
EVENT_FIELDS = ("alert_id", "event", "occurred_at", "value", "threshold", "affected_sessions")


def fetch(project_file: Path, name: str) -> dict[str, Any]:
    """What the warehouse holds for one check."""
    project = load_project(project_file)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        def rows(sql: str, names: tuple[str, ...]) -> list[dict[str, Any]]:
            return [dict(zip(names, r)) for r in con.execute(sql, {"c": name}).fetchall()]
        windows = rows(f"SELECT {', '.join(WINDOW_FIELDS)} FROM windows WHERE check_name = $c", WINDOW_FIELDS)
        alerts = rows(f"SELECT {', '.join(ALERT_FIELDS)} FROM alerts WHERE check_name = $c", ALERT_FIELDS)
        events = rows("SELECT alert_id, event, occurred_at, value, threshold, affected_sessions "
                      "FROM alert_events WHERE alert_id IN (SELECT alert_id FROM alerts WHERE check_name = $c)",
                      EVENT_FIELDS)
        mark = con.execute("SELECT watermark FROM check_state WHERE check_name = $c", {"c": name}).fetchall()
        definition = con.execute("SELECT any_value(definition_hash) FROM check_state WHERE check_name = $c",
                                 {"c": name}).fetchone()[0]
        late = con.execute("SELECT coalesce(sum(late_rows), 0) FROM run_checks WHERE check_name = $c",
                           {"c": name}).fetchone()
    finally:
        con.close()
    windows.sort(key=oracle.window_order)
    alerts.sort(key=oracle.alert_order)
    events.sort(key=oracle.event_order)
    return {"windows": windows, "alerts": alerts, "events": events,
            "watermark": [m[0] for m in mark], "late_rows": late[0], "definition": definition or ""}


def run_plimsoll(cases_: list[Case], rows: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """One run over all rows as Parquet; the warehouse's content per check."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        project_file = write_project(folder, cases_)
        write_files(folder, rows)
        result = run(load_project(project_file))
        assert result.status == "ok"
        return {c.name: fetch(project_file, c.name) for c in cases_}


# ----------------------------------------------------------------------------------------------
# comparing


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, float) or isinstance(b, float):
        if a is None or b is None:
            return a is b
        return a == pytest.approx(b, rel=1e-9, abs=1e-12)
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    return a == b


def oracle_key(r: dict) -> tuple:
    return tuple(r.get(f) for f in ("key_text", "split_value", "window_number", "opened_at", "event", "occurred_at"))


def differences(actual: list[dict], expected: list[dict], fields: tuple[str, ...], what: str) -> list[str]:
    """The first differing row, and every row only one side has."""
    out = []
    if len(actual) != len(expected):
        out.append(f"{what}: {len(actual)} rows in the warehouse, {len(expected)} expected")
        only = {oracle_key(a) for a in actual} ^ {oracle_key(e) for e in expected}
        out.append(f"{what}: rows only on one side: {sorted(only, key=str)[:8]}")
    for i, (a, e) in enumerate(zip(actual, expected)):
        wrong = [f for f in fields if f in e and not _same(a[f], e[f])]
        if wrong:
            out.append(f"{what}[{i}] differs in {wrong}:\n    sql:      {[a[f] for f in fields]}\n"
                       f"    expected: {[e.get(f) for f in fields]}")
            break
    return out


def expected_alerts(result: oracle.Result) -> list[dict]:
    out = []
    for a in result.alerts:
        a = dict(a)
        if a["status"] != "open":
            a.pop("healthy_streak")    # only an open alert's streak is defined
        out.append(a)
    return out


def expected_events(result: oracle.Result) -> list[dict]:
    return [e if e["event"] != "closed" else {k: e[k] for k in ("alert_id", "event", "occurred_at")}
            for e in result.events]


def mismatches(actual: dict[str, Any], result: oracle.Result) -> list[str]:
    problems = []
    if actual["watermark"] != [result.watermark]:
        problems.append(f"watermark: sql {actual['watermark']}, oracle {result.watermark}")
    problems += differences(actual["windows"], result.windows, WINDOW_FIELDS, "windows")
    problems += differences(actual["alerts"], expected_alerts(result), ALERT_FIELDS, "alerts")
    problems += differences(actual["events"], expected_events(result), EVENT_FIELDS, "alert_events")
    return problems


def report(problems: list[str], case: Case, rows: list[dict]) -> str:
    shown = "\n".join(f"  {r}" for r in sorted(rows, key=lambda r: (r["ended_at"] is None, r["ended_at"] or BASE)))
    spec = yaml.safe_dump(case.spec, sort_keys=False)
    return (f"SQL and oracle disagree on check {case.name}:\n" + "\n".join(problems)
            + f"\nexclude: {case.exclude}\ncheck:\n{spec}rows:\n{shown}")


def check_against_oracle(cases_: list[Case], rows: list[dict]) -> None:
    results = {c.name: oracle.run_check(c.check, rows) for c in cases_}
    assume(not any(r.ambiguous for r in results.values()))
    assume(any(r.windows for r in results.values()))
    for case, r in zip(cases_, results.values()):
        event(f"breaches: {'some' if any(w['breach'] for w in r.windows) else 'none'}")
        if case.check.confidence is not None:
            ungated = oracle.run_check(replace(case.check, confidence=None), rows)
            held = sum(bool(a["breach"]) and not b["breach"] for a, b in zip(ungated.windows, r.windows))
            event(f"windows the confidence gate held back: {'some' if held else 'none'}")
        if case.check.method == "cusum":
            # S above the window's own bad count holds evidence carried from the windows before
            event(f"breaches on evidence carried from earlier windows: "
                  f"{'some' if any(w['breach'] and w['statistic'] > w['bad'] for w in r.windows) else 'none'}")
        if case.check.method == "ewma":
            up = case.check.direction == "up"
            alone = [w for w in r.windows if w["breach"] and (w["value"] <= w["threshold"] if up
                                                             else w["value"] >= w["threshold"])]
            event(f"breaches the window's own value would not make: {'some' if alone else 'none'}")
        event(f"alerts closed: {sorted({a['close_reason'] for a in r.alerts if a['close_reason']})}")
        event(f"alerts open: {'some' if any(a['status'] == 'open' for a in r.alerts) else 'none'}")
        event(f"alerts reopened: {'some' if any(e['event'] == 'reopened' for e in r.events) else 'none'}")
        event(f"windows without a verdict: {'some' if any(w['breach'] is None for w in r.windows) else 'none'}")
    actual = run_plimsoll(cases_, rows)
    for case in cases_:
        # alert ids carry the compiled definition's hash, which only the toolkit can compute
        labelled = replace(case.check, definition=actual[case.name]["definition"])
        problems = mismatches(actual[case.name], oracle.run_check(labelled, rows))
        if problems:
            pytest.fail(report(problems, case, rows))


def burst_rows(data: st.DataObject, case: Case, max_rows: int = 90) -> list[dict]:
    """Rows whose burst mostly goes the way the check looks (up: hot burst, down: a cool dip)."""
    polarity = data.draw(st.sampled_from([True, True, True, False]))
    return data.draw(tables(hot_burst=(case.check.direction == "up") == polarity, max_rows=max_rows))


# ----------------------------------------------------------------------------------------------
# the oracle itself, on examples worked by hand from the semantics


def _row(sid: str | None, minute: int | None, **values: Any) -> dict[str, Any]:
    r = {c: None for c in COLUMNS} | {"failed": False, "_file": "part-0.parquet"}
    r |= {"session_id": sid, "ended_at": None if minute is None else BASE + timedelta(minutes=minute)}
    return r | values


def _check(**fields: Any) -> oracle.OracleCheck:
    base = {"name": "probe", "by": (), "kind": "rate", "bad": BAD[0].py, "sessions": 3,
            "max_wait": timedelta(minutes=10), "min_history": 1, "history": 3, "base_q": 0.5}
    return oracle.OracleCheck(**(base | fields))


def _at(minute: int) -> datetime:
    return BASE + timedelta(minutes=minute)


def test_oracle_count_windows_by_hand() -> None:
    rows = [_row("a", 0), _row("b", 1, failed=True), _row("c", 2), _row("d", 3, failed=None),
            _row("e", 20), _row("f", 21)]
    got = oracle.run_check(_check(), rows).windows
    # [0,1,2] is full; [3] times out (20 > 3+10 and W=21 > 13); [20,21] waits (W=21 <= 30).
    assert [(w["window_number"], w["window_start"], w["window_end"], w["sessions"], w["bad"]) for w in got] == [
        (1, _at(0), _at(2), 3, 1), (2, _at(3), _at(3), 1, 0)]
    # An excluded session still moves the watermark: now [20,21] times out too.
    got = oracle.run_check(_check(exclude=EXCLUDE[1].py), rows + [_row("g", 31, is_bot=True)]).windows
    assert [(w["window_number"], w["window_start"], w["sessions"]) for w in got] == [(1, _at(0), 3), (2, _at(3), 1),
                                                                          (3, _at(20), 2)]
    # Rows without id or time are skipped (the timeless one does not move the watermark).
    got = oracle.run_check(_check(), rows + [_row(None, 40), _row("h", None)])
    assert got.watermark == _at(40) and [w["sessions"] for w in got.windows] == [3, 1, 2]


def test_oracle_duplicates_and_ties_by_hand() -> None:
    rows = [_row("a", 5, failed=True), _row("a", 3), _row("b", 4, failed=True, _file="part-1.parquet"),
            _row("b", 4, _file="part-0.parquet"), _row("c", 4), _row("d", 9)]
    got = oracle.run_check(_check(sessions=4), rows).windows
    # a at 3 (earlier time wins), b from part-0 (same time: file name), ties ordered by id.
    assert [(w["sessions"], w["bad"], w["window_start"], w["window_end"]) for w in got] == [(4, 0, _at(3), _at(9))]


def test_oracle_time_windows_by_hand() -> None:
    rows = [_row("a", 5), _row("b", 50, failed=True), _row("c", 70), _row("d", 120)]
    check = _check(sessions=None, max_wait=None, every=timedelta(hours=1), lateness=timedelta(minutes=10))
    got = oracle.run_check(check, rows).windows
    k = int((BASE - datetime(1970, 1, 1)).total_seconds()) // 3600
    # [00:00, 01:00) closes (02:00 > 01:10); [01:00, 02:00) waits until after 02:10.
    assert [(w["window_number"], w["window_start"], w["window_end"], w["sessions"], w["value"]) for w in got] == [
        (k, _at(0), _at(60), 2, 0.5)]


def test_oracle_split_rate_by_hand() -> None:
    rows = [_row("a", 0, failed=True, error_code="E1"), _row("b", 1), _row("c", 2, failed=True, error_code="E2"),
            _row("d", 3), _row("e", 4, failed=True), _row("f", 5, failed=True, error_code="E2")]
    got = oracle.run_check(_check(sessions=2, split="error_code"), rows).windows
    assert [(w["split_value"], w["window_number"], w["bad"], w["value"]) for w in got] == [
        (None, 3, 1, 0.5), ("E1", 1, 1, 0.5), ("E1", 2, 0, 0.0), ("E1", 3, 0, 0.0),
        ("E2", 2, 1, 0.5), ("E2", 3, 1, 0.5)]
    # A split value first seen in key window n starts with n-1 quiet windows of history at 0.
    assert [(w["split_value"], w["window_number"], w["history_windows"], w["threshold"], w["breach"]) for w in got] == [
        (None, 3, 2, 0.0, True), ("E1", 1, 0, None, False), ("E1", 2, 1, 0.5, False),
        ("E1", 3, 2, 0.25, False), ("E2", 2, 1, 0.0, True), ("E2", 3, 1, 0.0, True)]


def test_oracle_baseline_and_guard_by_hand() -> None:
    series = [{"value": v, "sessions": 10, "bad": 1, "exact": True} for v in (0.125, 0.25, 0.375, 1.0, 0.125)]
    check = _check(history=3, min_history=2, factor=2.0, base_q=0.5)
    oracle.judge(check, series)
    assert [w["threshold"] for w in series] == [None, None, 0.375, 0.5, 0.5]
    assert [w["breach"] for w in series] == [False, False, False, True, False]
    assert [w["history_windows"] for w in series] == [0, 1, 2, 3, 3]
    for w in series:
        w.pop("breach")
    oracle.judge(replace(check, floor=0.6), series)
    assert [w["threshold"] for w in series] == [None, None, 0.6, 0.6, 0.6]
    oracle.judge(replace(check, min_bad=2), series)
    assert not any(w["breach"] for w in series)
    oracle.judge(replace(check, direction="down", factor=0.5, floor=0.1), series)
    assert [w["threshold"] for w in series] == [None, None, 0.09375, 0.1, 0.1]
    assert not any(w["breach"] for w in series)


def test_oracle_p_chart_nist_wafer_example() -> None:
    # NIST/SEMATECH e-Handbook §6.3.3.2: 30 wafers of 50 chips, 347 defective in all (the fractions
    # as tests/test_statistics.py transcribes them): p̄ = 0.231333, UCL = 0.410239; the LCL computed
    # by hand, 347/1500 − 3·√(p̄(1−p̄)/50) = 0.0524275 (the handbook's .0524, from memory).
    from test_statistics import WAFER_FRACTIONS

    hist = [oracle.Earlier(f, 50, round(f * 50)) for f in WAFER_FRACTIONS]
    check = _check(method="p_chart", sigmas=3.0, history=30, min_history=30)
    baseline, ucl, _ = oracle.limits(check, hist, 50)
    assert baseline == pytest.approx(0.231333, abs=5e-7) and ucl == pytest.approx(0.410239, abs=5e-7)
    _, lcl, _ = oracle.limits(replace(check, direction="down"), hist, 50)
    assert lcl == pytest.approx(0.0524275, abs=5e-8)
    # p̄ pools counts: 1 of 10 and 9 of 90 is 0.1, as is their mean; 1 of 10 and 0 of 90 is 0.01, not 0.05
    assert oracle.limits(check, [oracle.Earlier(0.1, 10, 1), oracle.Earlier(0.0, 90, 0)], 50)[0] == 0.01
    assert oracle.limits(check, hist[:29], 50)[1] is None


def test_oracle_ewma_nist_example() -> None:
    # NIST/SEMATECH e-Handbook §6.3.2.4 (as tests/test_statistics.py transcribes it): target 50,
    # s = 2.0539, λ = 0.3, 3 sigmas; the EWMA to two decimals, UCL 52.5884 and LCL 47.4115 (to 1e-3).
    from test_statistics import EWMA_DATA, EWMA_VALUES

    check = _check(kind="ratio", method="ewma", lam=0.3, sigmas=3.0, target=50.0, sigma=2.0539,
                   history=30, min_history=1)
    series = [{"value": x, "sessions": 1, "bad": None, "exact": True} for x in EWMA_DATA]
    oracle.judge(check, series)
    assert [round(w["statistic"], 2) for w in series] == pytest.approx(EWMA_VALUES, abs=0.006)
    assert series[0]["threshold"] is None and all(w["threshold"] == pytest.approx(52.5884, abs=1e-3)
                                                  for w in series[1:])
    assert not any(w["breach"] for w in series)
    oracle.judge(replace(check, direction="down"), series)
    assert all(w["threshold"] == pytest.approx(47.4115, abs=1e-3) for w in series[1:])
    # without a target the series starts at its first value, and the limits come from history
    oracle.judge(replace(check, target=None, sigma=None, min_history=2), series)
    assert series[0]["statistic"] == 52.0
    assert series[2]["baseline"] == 49.5 and series[2]["threshold"] == pytest.approx(
        49.5 + 3 * 3.5355339 * math.sqrt(0.3 / 1.7), abs=1e-6)       # s of 52 and 47 = 3.5355339


def test_oracle_cusum_step_nist_example() -> None:
    # NIST/SEMATECH e-Handbook §6.3.2.3, tabular CUSUM (transcribed): target 325, k = 0.3175,
    # h = 4.1959; the upper sum first exceeds h at observation 14, observations 14–20 signal,
    # S_hi(20) ≈ 19.04. One observation per step, reference value target + k.
    data = [324.925, 324.675, 324.725, 324.350, 325.350, 325.225, 324.125, 324.525, 325.225, 324.600,
            324.625, 325.150, 328.325, 327.250, 327.825, 328.500, 326.675, 327.775, 326.875, 328.350]
    h, s, sums = 4.1959, 0.0, []
    for x in data:
        s = oracle.cusum_step(s, x, 1, 325 + 0.3175, None)
        sums.append(s)
    assert [i + 1 for i, v in enumerate(sums) if v > h] == list(range(14, 21))
    assert sums[-1] == pytest.approx(19.04, abs=0.01)
    # with the ceiling at 2h the same observations signal, and S stays at most 2h
    s, capped = 0.0, []
    for x in data:
        s = oracle.cusum_step(s, x, 1, 325 + 0.3175, 2 * h)
        capped.append(s)
    assert [i + 1 for i, v in enumerate(capped) if v > h] == list(range(14, 21))
    assert max(capped) == 2 * h


def test_oracle_cusum_by_hand() -> None:
    # 10 windows of 20 sessions, 1 bad each (p₀ = 5 %), then 4 windows of 8 bad: S rises by
    # 8 − 20γ a window; a shift of 2 and 2,000 sessions between false alarms
    check = _check(method="cusum", shift=2.0, in_control_sessions=2000, history=10, min_history=3)
    series = [{"value": b / 20, "sessions": 20, "bad": b, "exact": True} for b in [1] * 10 + [8] * 4]
    oracle.judge(check, series)
    gamma, h = oracle.cusum_design(check, 0.05)
    assert 0.05 < gamma < 0.1 and h > 0
    assert [w["statistic"] for w in series[:10]] == [0.0] * 10           # 1 bad < 20γ: S stays 0
    assert series[10]["statistic"] == pytest.approx(8 - 20 * gamma)
    assert series[11]["statistic"] == pytest.approx(min(2 * h, 2 * (8 - 20 * gamma)))
    first = next(i for i, w in enumerate(series) if w["breach"])
    assert series[first]["statistic"] > h >= series[first - 1]["statistic"]
    assert all(w["baseline"] == pytest.approx(0.05) for w in series[10:])  # breaches are not history
    assert series[-1]["statistic"] == pytest.approx(2 * h)                # the ceiling


def test_oracle_ewma_breaches_on_its_statistic() -> None:
    check = _check(kind="ratio", method="ewma", lam=0.5, sigmas=1.0, target=0.0, sigma=1.0, min_history=1)
    series = [{"value": v, "sessions": 1, "bad": None, "exact": True} for v in (0.0, 4.0, 0.0, None, 0.0)]
    oracle.judge(check, series)
    # limit 0 + 1 · 1 · √(0.5/1.5) = 0.57735; z = 0, 2, 1, 1 (no value: kept), 0.5
    assert [w["statistic"] for w in series] == [0.0, 2.0, 1.0, 1.0, 0.5]
    assert [w["breach"] for w in series] == [False, True, True, None, False]   # no value: no verdict


# Wilson (1927) score interval, as tests/test_statistics.py takes it from Newcombe (1998) Table I
# and statsmodels.
@pytest.mark.parametrize("x,n,confidence,lower,upper", [
    (81, 263, 0.95, 0.2553, 0.3662), (15, 148, 0.95, 0.0624, 0.1605), (0, 20, 0.95, 0.0, 0.1611),
    (8, 10, 0.95, 0.490162, 0.943318), (10, 10, 0.95, 0.722467, 1.0), (12, 30, 0.99, 0.208841, 0.627381)])
def test_oracle_wilson_bounds(x: int, n: int, confidence: float, lower: float, upper: float) -> None:
    places = 4 if lower in (0.2553, 0.0624, 0.0) else 6
    assert oracle.wilson(x, n, confidence, "lower") == pytest.approx(lower, abs=0.5 * 10 ** -places)
    assert oracle.wilson(x, n, confidence, "upper") == pytest.approx(upper, abs=0.5 * 10 ** -places)


def test_oracle_confidence_gate_by_hand() -> None:
    # 3 of 40 (7.5 %) clears a 5 % threshold, but its lower Wilson bound at 95 % (2.6 %) does not;
    # 40 of 400 (10 %, bound 7.4 %) does.
    check = _check(history=3, min_history=3, base_q=0.5, floor=0.05, confidence=0.95)
    for n, bad, breach in ((40, 3, None), (400, 40, True)):
        series = [{"value": 0.0, "sessions": n, "bad": 0, "exact": True} for _ in range(3)]
        series.append({"value": bad / n, "sessions": n, "bad": bad, "exact": True})
        oracle.judge(check, series)
        assert [w["breach"] for w in series] == [False, False, False, breach]
        oracle.judge(replace(check, confidence=None), series)
        assert series[-1]["breach"] is True


def test_oracle_quantile_is_quantile_cont() -> None:
    assert oracle.quantile([4.0, 1.0, 3.0, 2.0], 0.9) == (pytest.approx(3.7), False)
    assert oracle.quantile([2.0, 2.0], 0.3) == (2.0, True)
    assert oracle.quantile([], 0.5) == (None, True)


def test_oracle_lifecycle_by_hand() -> None:
    def win(hour: int, breach: bool, threshold: float | None = 0.5, value: float = 0.9, bad: int = 3) -> dict:
        return {"window_start": BASE + timedelta(hours=hour - 1), "window_end": BASE + timedelta(hours=hour),
                "breach": breach, "threshold": threshold, "value": value, "bad": bad, "sessions": 10,
                "window_number": hour}
    series = [win(1, True, value=0.7), win(2, False), win(3, True, value=0.9, bad=4), win(4, False),
              win(5, None), win(6, False), win(7, True), win(10, False), win(11, True)]
    check = _check(recover_after=2, expire_after=timedelta(hours=2), reopen_within=timedelta(0))
    ident = {"key_text": "", "split_value": None, "_by": (), "_values": ()}
    alerts, events = oracle.lifecycle(check, series, BASE + timedelta(hours=14), ident)
    got = [(a["opened_at"].hour, a["closed_at"].hour, a["close_reason"], a["breach_windows"],
            a["affected_sessions"], a["peak_value"]) for a in alerts]
    # 1: breaches at 1h and 3h, healthy at 4h, no verdict at 5h, healthy at 6h: recovered at 6h.
    # 2: opened at 7h; nothing until 10h > 7h + 2h: expired at 9h. 3: opened 11h, expired 13h < W.
    assert got == [(1, 6, "recovered", 2, 7, 0.9), (7, 9, "expired", 1, 3, 0.9), (11, 13, "expired", 1, 3, 0.9)]
    assert [e["event"] for e in events] == ["opened", "updated", "closed"] * 1 + ["opened", "closed"] * 2
    alerts, _ = oracle.lifecycle(check, series, BASE + timedelta(hours=13), ident)
    assert alerts[-1]["status"] == "open" and alerts[-1]["healthy_streak"] == 0


def test_oracle_reopens_a_recent_recovery_by_hand() -> None:
    def win(hour: int, breach: bool | None, value: float = 0.9, bad: int = 3) -> dict:
        return {"window_start": BASE + timedelta(hours=hour - 1), "window_end": BASE + timedelta(hours=hour),
                "breach": breach, "threshold": 0.5, "value": value, "bad": bad, "sessions": 10,
                "window_number": hour}
    # recovered at 3h; the breach of window 5h (starting 4h) is within 2h: reopened, counts go on;
    # recovered again at 7h; the breach of window 10h starts 9h, 2h after: a new alert
    series = [win(1, True), win(2, False), win(3, False), win(5, True, value=0.95, bad=5), win(6, False),
              win(7, False), win(10, True)]
    check = _check(recover_after=2, expire_after=timedelta(days=1), reopen_within=timedelta(hours=2))
    ident = {"key_text": "", "split_value": None, "_by": (), "_values": ()}
    alerts, events = oracle.lifecycle(check, series, BASE + timedelta(hours=11), ident)
    got = [(a["opened_at"].hour, a["status"], a["closed_at"] and a["closed_at"].hour, a["breach_windows"],
            a["affected_sessions"], a["peak_value"]) for a in alerts]
    assert got == [(1, "closed", 7, 2, 8, 0.95), (10, "open", None, 1, 3, 0.9)]
    assert [(e["event"], e["occurred_at"].hour) for e in events] == [
        ("opened", 1), ("closed", 3), ("reopened", 5), ("closed", 7), ("opened", 10)]
    assert events[2]["affected_sessions"] == 8


# ----------------------------------------------------------------------------------------------
# the properties


@SETTINGS
@given(data=st.data())
def test_count_windows_rate(data: st.DataObject) -> None:
    case = data.draw(cases("rate", "count", split=False, method="rolling_percentile", confidence=False))
    check_against_oracle([case], burst_rows(data, case))


@SETTINGS
@given(data=st.data())
def test_count_windows_split_rate(data: st.DataObject) -> None:
    case = data.draw(cases("rate", "count", split=True, method="rolling_percentile", confidence=False))
    check_against_oracle([case], burst_rows(data, case))


@SETTINGS
@given(data=st.data())
def test_time_windows_quantile(data: st.DataObject) -> None:
    case = data.draw(cases("quantile", "time", method="rolling_percentile", confidence=False))
    check_against_oracle([case], burst_rows(data, case))


@SETTINGS
@given(data=st.data())
def test_time_windows_ratio(data: st.DataObject) -> None:
    case = data.draw(cases("ratio", "time", method="rolling_percentile", confidence=False))
    check_against_oracle([case], burst_rows(data, case))


@SETTINGS
@given(data=st.data())
def test_p_chart(data: st.DataObject) -> None:
    # windows of a few sessions have limits too wide to cross: more sessions, larger windows
    window = data.draw(st.sampled_from(["count", "time"]))
    case = data.draw(cases("rate", window, method="p_chart", confidence=False, sessions=(4, 12)))
    check_against_oracle([case], burst_rows(data, case, max_rows=160))


@SETTINGS
@given(data=st.data())
def test_ewma(data: st.DataObject) -> None:
    kind = data.draw(st.sampled_from(["rate", "ratio", "quantile"]))
    window = data.draw(st.sampled_from(["count", "time"]))
    case = data.draw(cases(kind, window, method="ewma"))
    check_against_oracle([case], burst_rows(data, case))


@SETTINGS
@given(data=st.data())
def test_cusum(data: st.DataObject) -> None:
    window = data.draw(st.sampled_from(["count", "time"]))
    case = data.draw(cases("rate", window, method="cusum", sessions=(4, 12)))
    check_against_oracle([case], burst_rows(data, case, max_rows=160))


# the gate decides a verdict in about one example of six (a window over its threshold whose Wilson
# bound is not): twice the examples
@settings(SETTINGS, max_examples=2 * EXAMPLES)
@given(data=st.data())
def test_confidence_gate(data: st.DataObject) -> None:
    window = data.draw(st.sampled_from(["count", "time"]))
    method = data.draw(st.sampled_from(["rolling_percentile", "p_chart"]))
    case = data.draw(cases("rate", window, method=method, confidence=True, sessions=(4, 12)))
    check_against_oracle([case], burst_rows(data, case, max_rows=160))


@SETTINGS
@given(data=st.data())
def test_peers(data: st.DataObject) -> None:
    # each (site, tier) series against the others of its site or of its tier, hour by hour; more
    # sessions, so that a window has peers with a few sessions each
    kind = data.draw(st.sampled_from(["rate", "ratio", "quantile"]))
    case = data.draw(cases(kind, "time", method="peers"))
    check_against_oracle([case], peer_rows(data, case))


def peer_rows(data: st.DataObject, case: Case) -> list[dict]:
    """Up to 600 rows, six times as dense as ``tables`` gives, in which the sessions of one site or one tier
    go the way the check looks (up: more failures, slower, more rebuffering; down: the opposite)
    for a stretch, so that one series leaves its peers; tiers 1, 2, 4 and 5."""
    rows = data.draw(tables(hot_burst=data.draw(st.booleans()), max_rows=600))
    column = data.draw(st.sampled_from(["site", "tier"]))
    value = data.draw(st.sampled_from(sorted({r[column] for r in rows}, key=str)))
    value = value if column == "site" or value is None else value + 3 * data.draw(st.integers(0, 1))
    times = sorted(r["ended_at"] for r in rows if r["ended_at"] is not None)
    start = data.draw(st.sampled_from(times)) if times else BASE
    length = timedelta(minutes=data.draw(st.sampled_from([60, 180, 600])))
    up = case.check.direction == "up"
    out = []
    for i, r in enumerate(rows):
        # six tiers rather than three, so that a series has more peers
        r = dict(r, tier=(r["tier"] + 3 * (i % 2) if r["tier"] is not None else None))
        if r["ended_at"] is not None:
            if r[column] == value and start <= r["ended_at"] < start + length:
                r["failed"] = up if r["failed"] is not None else None
                if r["startup_ms"] is not None:
                    r["startup_ms"] = r["startup_ms"] + 3000.0 if up else r["startup_ms"] / 4
                if r["rebuffer_ms"] is not None:
                    r["rebuffer_ms"] = 9000.0 if up else 0.0
            r["ended_at"] = BASE + (r["ended_at"] - BASE) / 6
        out.append(r)
    return out


@SETTINGS
@given(data=st.data())
def test_any_measure_any_window(data: st.DataObject) -> None:
    kind = data.draw(st.sampled_from(["rate", "ratio", "quantile"]))
    window = data.draw(st.sampled_from(["count", "time"]))
    case = data.draw(cases(kind, window))
    check_against_oracle([case], burst_rows(data, case))


# ----------------------------------------------------------------------------------------------
# several runs, files arriving one by one, nothing late: the same as one run


def steady_rows(files: int = 3) -> list[dict]:
    """Three keys over 9 hours, file i holding the i-th time slice, with an error burst for
    site=kids, a startup dip for site=news and a quiet hour for the NULL site."""
    rows = []
    count = 360
    for i in range(count):
        minute = int(i * 1.5)
        site = ("kids", "news", None)[i % 3]
        if site is None and 300 <= minute < 380:
            continue
        burst = site == "kids" and 200 <= minute < 320
        bad = (i % 9 == 0) or (burst and i % 2 == 0)
        rows.append({
            "session_id": f"s{i:04d}",
            "ended_at": BASE + timedelta(minutes=minute),
            "site": site, "tier": 1 + i % 2, "is_bot": (i % 17 == 0) if i % 23 else None,
            "failed": bad, "error_code": ("E1" if burst else "E2") if bad else None,
            "startup_ms": float(800 + (i * 37) % 900 + (2500 if burst and i % 4 else 0)
                                - (600 if site == "news" and 150 <= minute < 250 else 0)),
            "play_ms": float(60000 - (i * 53) % 20000),
            "rebuffer_ms": float((i * 29) % 700 + (9000 if burst else 0)) if i % 11 else None,
            "_file": f"part-{i * files // count:02d}.parquet",
        })
    return rows


def _multi_case(name: str, by: list[str], measure: dict, window: dict, guard: dict, fields: dict,
                where: Sql | None = None, direction: str = "up", floor: float | None = None,
                factor: float = 1.3, baseline: dict | None = None) -> Case:
    """A check of the multi-run test; ``baseline`` (YAML keys) replaces the rolling percentile."""
    if baseline is None:
        baseline = {"method": "rolling_percentile", "q": 0.9, "history": 4, "min_history": 2, "factor": factor}
        if floor is not None:
            baseline["floor"] = floor
        method = {"base_q": 0.9, "factor": factor, "floor": floor}
    else:
        names = {"lambda": "lam", "q": "base_q"}
        method = {names.get(k, k): v for k, v in baseline.items()}
    spec = {"check": name, "source": "sessions", "by": by, "measure": measure, "direction": direction,
            "window": window, "baseline": {"history": 4, "min_history": 2, **baseline}, "guard": guard,
            "lifecycle": {"recover_after": 2, "expire_after": "1h"}, "severity": "high"}
    if where is not None:
        spec["where"] = where.text
    check = oracle.OracleCheck(
        name=name, by=tuple(by), direction=direction, history=4, min_history=2,
        min_sessions=guard.get("min_sessions", 1), min_bad=guard.get("min_bad", 0),
        recover_after=2, expire_after=timedelta(hours=1), where=where.py if where else None,
        exclude=EXCLUDE[1].py, severity="high", **method, **fields)
    return Case(spec, check, EXCLUDE[1].text)


def multi_run_cases() -> list[Case]:
    return [
        _multi_case(
            "count_rate_split", ["site"], {"kind": "rate", "bad": BAD[0].text, "split": "error_code"},
            {"sessions": 6, "max_wait": "40m"}, {"min_sessions": 3, "min_bad": 1},
            {"kind": "rate", "bad": BAD[0].py, "split": "error_code", "sessions": 6,
             "max_wait": timedelta(minutes=40)}, where=WHERE[2]),
        _multi_case(
            "count_rate", ["site", "tier"], {"kind": "rate", "bad": BAD[1].text},
            {"sessions": 5, "max_wait": "1h"}, {"min_sessions": 2},
            {"kind": "rate", "bad": BAD[1].py, "sessions": 5, "max_wait": timedelta(hours=1)}),
        _multi_case(
            "time_quantile", ["site"], {"kind": "quantile", "of": QUANTILE_OF[0].text, "q": 0.9},
            {"every": "20m", "lateness": "5m"}, {"min_sessions": 2},
            {"kind": "quantile", "of": QUANTILE_OF[0].py, "q": 0.9, "every": timedelta(minutes=20),
             "lateness": timedelta(minutes=5)}),
        _multi_case(
            "time_quantile_down", ["site"], {"kind": "quantile", "of": QUANTILE_OF[0].text, "q": 0.5},
            {"every": "30m"}, {},
            {"kind": "quantile", "of": QUANTILE_OF[0].py, "q": 0.5, "every": timedelta(minutes=30)},
            direction="down", factor=0.8, floor=1500.0),
        _multi_case(
            "time_ratio", ["site"], {"kind": "ratio", "numerator": NUMERATOR.text, "denominator": DENOMINATOR.text},
            {"every": "30m", "lateness": "10m"}, {"min_sessions": 5},
            {"kind": "ratio", "numerator": NUMERATOR.py, "denominator": DENOMINATOR.py,
             "every": timedelta(minutes=30), "lateness": timedelta(minutes=10)}, floor=0.02),
        _multi_case(
            "count_p_chart_split", ["site"], {"kind": "rate", "bad": BAD[0].text, "split": "error_code"},
            {"sessions": 6, "max_wait": "40m"}, {"min_sessions": 3, "min_bad": 1},
            {"kind": "rate", "bad": BAD[0].py, "split": "error_code", "sessions": 6,
             "max_wait": timedelta(minutes=40)}, baseline={"method": "p_chart", "sigmas": 2.0}),
        _multi_case(
            "time_p_chart_confidence", ["site"], {"kind": "rate", "bad": BAD[0].text},
            {"every": "1h"}, {"min_sessions": 3},
            {"kind": "rate", "bad": BAD[0].py, "every": timedelta(hours=1)},
            baseline={"method": "p_chart", "sigmas": 0.5, "confidence": 0.8}),   # the gate holds back 3 of 4
        # the statistic carried from run to run: the runs must continue each series' EWMA
        _multi_case(
            "count_ewma", ["site"], {"kind": "rate", "bad": BAD[0].text},
            {"sessions": 6, "max_wait": "40m"}, {"min_sessions": 3},
            {"kind": "rate", "bad": BAD[0].py, "sessions": 6, "max_wait": timedelta(minutes=40)},
            baseline={"method": "ewma", "lambda": 0.3, "sigmas": 2.0}),
        _multi_case(
            "time_ewma_known_down", ["site"], {"kind": "quantile", "of": QUANTILE_OF[0].text, "q": 0.5},
            {"every": "30m"}, {},
            {"kind": "quantile", "of": QUANTILE_OF[0].py, "q": 0.5, "every": timedelta(minutes=30)},
            direction="down", baseline={"method": "ewma", "lambda": 0.5, "sigmas": 1.0, "target": 1250.0,
                                        "sigma": 300.0}),
        # the CUSUM's statistic carried from run to run, and capped at 2h after the burst
        _multi_case(
            "count_cusum", ["tier"], {"kind": "rate", "bad": BAD[0].text},
            {"sessions": 6, "max_wait": "40m"}, {"min_sessions": 3},
            {"kind": "rate", "bad": BAD[0].py, "sessions": 6, "max_wait": timedelta(minutes=40)},
            baseline={"method": "cusum", "shift": 2.0, "in_control_sessions": 50}),
    ]


def test_runs_file_by_file_equal_one_run() -> None:
    cases_ = multi_run_cases()
    rows = steady_rows()
    files = sorted({r["_file"] for r in rows})
    assert len(files) == 3
    for early, late in zip(files, files[1:]):   # nothing arrives late
        assert max(r["ended_at"] for r in rows if r["_file"] == early) < \
            min(r["ended_at"] for r in rows if r["_file"] == late)
    single = run_plimsoll(cases_, rows)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        project_file = write_project(folder, cases_)
        for name in files:
            write_files(folder, [r for r in rows if r["_file"] == name])
            result = run(load_project(project_file))
            assert result.status == "ok" and [c.files_read for c in result.checks] == [1] * len(cases_)
        several = {c.name: fetch(project_file, c.name) for c in cases_}
    for case in cases_:
        one, many = single[case.name], several[case.name]
        expected = oracle.run_check(replace(case.check, definition=one["definition"]), rows)
        assert not expected.ambiguous
        problems = mismatches(one, expected)
        assert not problems, report(problems, case, rows)
        assert any(w["breach"] for w in one["windows"]), f"{case.name}: the case must breach"
        assert any(a["status"] == "closed" for a in one["alerts"]), f"{case.name}: an alert must close"
        assert many["late_rows"] == 0
        problems = (differences(many["windows"], one["windows"], WINDOW_FIELDS, "windows")
                    + differences(many["alerts"], one["alerts"], ALERT_FIELDS, "alerts")
                    + differences(many["events"], one["events"], EVENT_FIELDS, "alert_events"))
        assert not problems, f"{case.name}: several runs differ from one:\n" + "\n".join(problems)
        assert many["watermark"] == one["watermark"]
