"""Batch invariance: the same sessions read in one run or in many, split into files and runs any
way at all, give identical windows, alerts and events when no session is late; sessions delivered
again in a later file are counted once. With late sessions, the documented behaviour holds: a
session for a time window that has already closed is counted in `runs.late_rows` and changes
nothing.
"""

from __future__ import annotations

import os
import tempfile
from datetime import timedelta
from pathlib import Path

import duckdb
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_oracle import (
    ALERT_FIELDS,
    EVENT_FIELDS,
    WINDOW_FIELDS,
    differences,
    fetch,
    multi_run_cases,
    run_plimsoll,
    steady_rows,
    write_files,
    write_project,
)

from toolkit.config.project import load_project
from toolkit.engine.runner import run

EXAMPLES = int(os.environ.get("PLIMSOLL_BATCH_EXAMPLES", "6"))
CASES = multi_run_cases()
ROWS = sorted(steady_rows(files=1), key=lambda r: (r["ended_at"], r["session_id"]))
SINGLE = None


def single_run() -> dict:
    global SINGLE
    if SINGLE is None:
        SINGLE = run_plimsoll(CASES, ROWS)
    return SINGLE


@st.composite
def batches(draw) -> tuple[list[list[dict]], list[int], list[int]]:
    """Files cut at distinct event times (so nothing is late), grouped into consecutive runs, and
    some sessions copied into a later file."""
    times = sorted({r["ended_at"] for r in ROWS})
    cuts = sorted(draw(st.sets(st.integers(1, len(times) - 1), min_size=1, max_size=6)))
    edges = [times[0], *(times[c] for c in cuts), times[-1] + timedelta(seconds=1)]
    files = [[r for r in ROWS if lo <= r["ended_at"] < hi] for lo, hi in zip(edges, edges[1:])]
    runs = sorted(draw(st.sets(st.integers(1, len(files) - 1), max_size=len(files) - 1))) if len(files) > 1 else []
    copies = draw(st.lists(st.integers(0, len(ROWS) - 1), max_size=5, unique=True))
    return files, runs, copies


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches())
def test_any_split_into_files_and_runs_equals_one_run(split) -> None:
    files, run_starts, copies = split
    expected = single_run()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        project_file = write_project(folder, CASES)
        position = {id(r): i for i, part in enumerate(files) for r in part}
        groups = [files[a:b] for a, b in zip([0, *run_starts], [*run_starts, len(files)])]
        written = 0
        for group in groups:
            for part in group:
                name = f"part-{written:03d}.parquet"
                rows = [r | {"_file": name} for r in part]
                # a copy of an earlier session, delivered again in this file: counted once
                rows += [ROWS[i] | {"_file": name} for i in copies if position[id(ROWS[i])] < written]
                write_files(folder, rows)
                written += 1
            assert run(load_project(project_file)).status == "ok"
        got = {c.name: fetch(project_file, c.name) for c in CASES}
        con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
        duplicates = con.execute("SELECT sum(duplicate_rows) FROM runs").fetchone()[0]
        con.close()
    assert duplicates == sum(1 for i in copies for f in range(len(files)) if position[id(ROWS[i])] < f)
    for case in CASES:
        one, many = expected[case.name], got[case.name]
        assert many["late_rows"] == 0
        problems = (differences(many["windows"], one["windows"], WINDOW_FIELDS, "windows")
                    + differences(many["alerts"], one["alerts"], ALERT_FIELDS, "alerts")
                    + differences(many["events"], one["events"], EVENT_FIELDS, "alert_events"))
        assert not problems, f"{case.name}, files {[len(f) for f in files]}, runs at {run_starts}: {problems}"


def test_a_late_session_is_counted_and_changes_nothing() -> None:
    late_case = [c for c in CASES if c.name == "time_ratio"]
    expected = run_plimsoll(late_case, ROWS)["time_ratio"]
    cut = len(ROWS) * 2 // 3
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        project_file = write_project(folder, late_case)
        early, rest = ROWS[:cut], ROWS[cut:]
        # one session of the first hour, held back: it arrives after its window has closed
        held = next(r for r in early if r["site"] == "kids" and r["rebuffer_ms"] is not None)
        write_files(folder, [r | {"_file": "a.parquet"} for r in early if r is not held])
        run(load_project(project_file))
        write_files(folder, [r | {"_file": "b.parquet"} for r in [*rest, held]])
        run(load_project(project_file))
        got = fetch(project_file, "time_ratio")
        con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
        late = con.execute("SELECT late_rows FROM runs ORDER BY run_id").fetchall()
        con.close()
    assert late == [(0,), (1,)]
    window = next(w for w in expected["windows"]
                  if w["key_text"] == "site=kids" and w["window_start"] <= held["ended_at"] < w["window_end"])
    changed = next(w for w in got["windows"] if w["key_text"] == "site=kids" and w["window_number"] == window["window_number"])
    assert changed["sessions"] == window["sessions"] - 1         # the late one never joined its window
