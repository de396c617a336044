"""What a warehouse remembers of the lake: files by their name within the source, session ids for a
horizon in data time.

- Moving the project, or mounting the lake elsewhere, reads nothing twice and loses nothing.
- A run whose sessions are mostly repeats says so loudly, in its summary and its run record.
- The session-id memory stays bounded over a long series of incremental runs, and a session sent
  again is counted once: within the horizon as a repeat, beyond it as late.
"""

from __future__ import annotations

import shutil
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
from click.testing import CliRunner
from conftest import PLAIN_PROJECT, write_project, write_rows

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run

T0 = datetime(2026, 11, 2)
SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN"
DAILY = """\
check: site_days
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {every: 6h}
baseline: {method: rolling_percentile, q: 0.5, history: 12, min_history: 3, factor: 2, floor: 0.3}
"""
RELATIVE = ("warehouse: w.duckdb\nsources:\n  sessions:\n    path: lake/\n    session_id: session_id\n"
            "    event_time: ended_at\n")


def day(n: int, per_day: int = 200, prefix: str = "s") -> list[tuple]:
    return [(f"{prefix}{n}-{i}", T0 + timedelta(days=n, seconds=i * 86400 // per_day), "news", i % 10 == 0)
            for i in range(per_day)]


def query(warehouse_file: Path, sql: str) -> list[tuple]:
    con = duckdb.connect(str(warehouse_file), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_moving_the_project_and_its_lake_reads_nothing_twice(tmp_path: Path) -> None:
    before = tmp_path / "before"
    for n in range(3):
        write_rows(before / "lake" / f"day={n}", SCHEMA, day(n))
    write_project(before, {"d.yml": DAILY}, RELATIVE)
    run(load_project(before / "plimsoll.yml"))
    after = tmp_path / "elsewhere" / "after"
    shutil.move(before, after)
    write_rows(after / "lake" / "day=3", SCHEMA, day(3))
    result = CliRunner().invoke(main, ["run", "-p", str(after / "plimsoll.yml")])
    assert result.exit_code == 0, result.output
    assert "run 2: 1 new file, 4 windows" in result.output and "WARNING" not in result.output
    assert query(after / "w.duckdb", "SELECT run_id, files_read, rows_read, duplicate_rows FROM runs ORDER BY run_id") == [
        (1, 3, 600, 0), (2, 1, 200, 0)]


def test_a_run_that_reads_mostly_repeats_says_so_loudly(tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    write_rows(lake, SCHEMA, day(0) + day(1), "a.parquet")
    project_file = write_project(tmp_path, {"d.yml": DAILY}, PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    # the same sessions land again under another name (a copy, a re-sent day)
    shutil.copy(lake / "a.parquet", lake / "a-copy.parquet")
    result = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert result.exit_code == 0, result.output
    expected = ("400 of the 400 sessions read (100 %) repeat sessions already counted and were left out: was the "
                "lake copied, moved or sent again? Nothing was counted twice")
    assert f"warning: {expected}" in result.output
    assert result.output.splitlines()[-1] == "run 2: 1 new file, 0 windows, 0 alerts opened, 0 closed; WARNING: 1 (see above)"
    assert query(tmp_path / "w.duckdb", "SELECT warning FROM runs ORDER BY run_id") == [(None,), (expected,)]


def test_the_session_id_memory_stays_bounded_over_a_month_of_daily_runs(tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    project_file = write_project(tmp_path, {"d.yml": DAILY}, PLAIN_PROJECT.format(lake=lake))
    remembered = []
    for n in range(30):
        write_rows(lake, SCHEMA, day(n), f"day-{n:02d}.parquet")
        run(load_project(project_file))
        remembered.append(query(tmp_path / "w.duckdb", "SELECT count(*) FROM session_ids")[0][0])
    # dedup_horizon 3d: what lies within three days behind the data read, forgotten by the run that
    # moved the watermark past it (from the last session of day n-3 on)
    assert max(remembered) == 3 * 200 + 1 and remembered[-1] == remembered[10]
    assert query(tmp_path / "w.duckdb", "SELECT min(event_time) FROM session_ids") == [(day(26)[-1][1],)]

    # a session sent again within the horizon is a repeat; one sent again beyond it is late; neither counts twice
    write_rows(lake, SCHEMA, day(30) + day(28)[:7] + day(20)[:5], "day-30.parquet")
    run(load_project(project_file))
    assert query(tmp_path / "w.duckdb", "SELECT duplicate_rows, late_rows FROM runs ORDER BY run_id DESC LIMIT 1") == [(7, 5)]
    # every session of days 0-29 once, and day 30's first three quarters (its last is still open)
    assert query(tmp_path / "w.duckdb", "SELECT sum(sessions) FROM windows") == [(30 * 200 + 150,)]


def test_ids_beyond_the_horizon_are_forgotten_by_the_run_that_read_them(tmp_path: Path) -> None:
    # a first run over ten days keeps only the ids within dedup_horizon of the data it read, not ten
    # days of them until a next run
    lake = tmp_path / "lake"
    project_file = write_project(tmp_path, {"d.yml": DAILY}, PLAIN_PROJECT.format(lake=lake))
    for n in range(10):
        write_rows(lake, SCHEMA, day(n), f"day-{n:02d}.parquet")
    run(load_project(project_file))
    assert query(tmp_path / "w.duckdb", "SELECT count(*), min(event_time) FROM session_ids") == [
        (3 * 200 + 1, day(6)[-1][1])]
    # and still none counted twice: day 8 again is a repeat, day 2 again is late
    write_rows(lake, SCHEMA, day(10) + day(8)[:6] + day(2)[:4], "day-10.parquet")
    run(load_project(project_file))
    assert query(tmp_path / "w.duckdb", "SELECT duplicate_rows, late_rows FROM runs ORDER BY run_id DESC LIMIT 1") == [(6, 4)]
