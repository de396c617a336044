"""Bad data in the lake: each case gets one clear message naming the file and column, and the
warehouse keeps exactly what it had (a failed run leaves only its run record saying why).

Rows without a session id or event time are the one case that does not stop a run: they are
counted in `runs.invalid_rows` and skipped, because one bad beacon must not block every check.
Duplicate session ids, within a file, across files and across runs, are counted once and reported
in `runs.duplicate_rows`.
"""

from __future__ import annotations

import os
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import PLAIN_PROJECT, warehouse_contents, write_project, write_rows

from toolkit.cli import main
from toolkit.problems import DataError
from toolkit.config.project import load_project
from toolkit.engine.runner import run

SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN, startup_ms INTEGER"
CHECK = """\
check: site_failures
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {sessions: 4, max_wait: 1d}
baseline: {method: rolling_percentile, q: 0.5, history: 5, min_history: 2, factor: 2, floor: 0.2}
"""
QUANTILE = """\
check: site_startup
source: sessions
where: startup_ms IS NOT NULL
by: [site]
measure: {kind: quantile, of: startup_ms, q: 0.5}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 5, min_history: 2, factor: 2}
"""
T0 = datetime(2026, 11, 2)
# tables that name the lake's files (or count per run): they differ between two lake folders
PATHS = ("runs", "run_checks", "files_read", "source_columns", "session_ids")


def sessions(prefix: str, start: int, count: int, site: str = "news") -> list[tuple]:
    return [(f"{prefix}{i}", T0 + timedelta(minutes=start + i), site, i % 4 == 0, 900 + i)
            for i in range(count)]


def project_with(tmp_path: Path, first: list[tuple]) -> Path:
    """A project whose lake has one good file, already run once."""
    lake = tmp_path / "lake"
    write_rows(lake, SCHEMA, first, "a.parquet")
    project_file = write_project(tmp_path, {"site_failures.yml": CHECK, "site_startup.yml": QUANTILE},
                                 PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    return project_file


def refused(project_file: Path) -> tuple[str, dict, dict]:
    """Run again expecting a data error; the message and the warehouse before and after."""
    before = warehouse_contents(project_file.parent / "w.duckdb", skip=("runs",))
    with pytest.raises(DataError) as caught:
        run(load_project(project_file, check_schema=False))
    after = warehouse_contents(project_file.parent / "w.duckdb", skip=("runs",))
    con = duckdb.connect(str(project_file.parent / "w.duckdb"), read_only=True)
    last = con.execute("SELECT status, error FROM runs ORDER BY run_id DESC LIMIT 1").fetchone()
    con.close()
    assert last == ("failed", str(caught.value))
    return str(caught.value), before, after


def test_truncated_parquet_is_named_and_nothing_changes(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    good = write_rows(tmp_path / "spare", SCHEMA, sessions("b", 60, 40)) / "part.parquet"
    (tmp_path / "lake" / "b.parquet").write_bytes(good.read_bytes()[:-40])
    message, before, after = refused(project_file)
    assert message.startswith(f"{tmp_path / 'lake' / 'b.parquet'}: not a readable Parquet file")
    assert after == before


def test_a_file_that_is_not_parquet_at_all(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    (tmp_path / "lake" / "c.parquet").write_text("session_id,ended_at\ns1,2026-11-02\n")
    message, before, after = refused(project_file)
    assert f"{tmp_path / 'lake' / 'c.parquet'}: not a readable Parquet file" in message
    assert after == before


def test_the_cli_says_it_in_one_line_and_exits_1(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    (tmp_path / "lake" / "c.parquet").write_bytes(b"PAR1 not really")
    result = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert result.exit_code == 1
    *progress, last = result.output.strip().splitlines()
    assert all(" source sessions: reading" in line for line in progress)
    assert last.startswith(f"{tmp_path / 'lake' / 'c.parquet'}: not a readable Parquet file (")


def test_missing_column_is_named(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    rows = [(sid, t, site, ms) for sid, t, site, _, ms in sessions("b", 60, 40)]
    write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, startup_ms INTEGER",
               rows, "b.parquet")
    message, before, after = refused(project_file)
    # only the check that reads it is named: site_startup reads no 'failed'
    assert message == (f"{tmp_path / 'lake' / 'b.parquet'}: column 'failed' is missing; check site_failures "
                       "of source 'sessions' reads it")
    assert after == before


def test_column_of_another_type_is_named(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    rows = [(sid, t, site, bad, f"{ms} ms") for sid, t, site, bad, ms in sessions("b", 60, 40)]
    write_rows(tmp_path / "lake", SCHEMA.replace("startup_ms INTEGER", "startup_ms VARCHAR"), rows, "b.parquet")
    message, before, after = refused(project_file)
    assert message == (f"{tmp_path / 'lake' / 'b.parquet'}: column 'startup_ms' is VARCHAR, but source "
                       "'sessions' has it as INTEGER (first read in a.parquet)")
    assert after == before


def test_a_wider_number_type_is_accepted(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    write_rows(tmp_path / "lake", SCHEMA.replace("startup_ms INTEGER", "startup_ms BIGINT"),
               sessions("b", 60, 40), "b.parquet")
    assert run(load_project(project_file)).files_read == 1


def test_rows_without_id_or_time_are_counted_and_skipped(tmp_path: Path) -> None:
    good = sessions("a", 0, 40)
    broken = [(None, T0 + timedelta(minutes=5), "news", True, 1), ("x1", None, "news", True, 1)]
    clean = tmp_path / "clean"
    clean.mkdir()
    reference = project_with(clean, good)
    dirty = tmp_path / "dirty"
    dirty.mkdir()
    project_file = project_with(dirty, good + broken)
    con = duckdb.connect(str(dirty / "w.duckdb"), read_only=True)
    assert con.execute("SELECT invalid_rows, rows_read FROM runs").fetchall() == [(2, 42)]
    con.close()
    assert (warehouse_contents(project_file.parent / "w.duckdb", skip=PATHS)
            == warehouse_contents(reference.parent / "w.duckdb", skip=PATHS))


def test_duplicates_within_and_across_files_and_runs_count_once(tmp_path: Path) -> None:
    rows = sessions("a", 0, 80)
    once = tmp_path / "once"
    once.mkdir()
    project_with(once, rows)

    twice = tmp_path / "twice"
    twice.mkdir()
    first, second = rows[:40], rows[40:]
    # run 1: file a has the first half, one session twice; file b repeats two of file a's sessions
    project_file = project_with(twice, first + [first[3]])
    # run 2: the second half, plus sessions already read in run 1 (delivered again), plus a copy
    # of one new session in another file of the same run
    write_rows(twice / "lake", SCHEMA, second + first[:5], "b.parquet")
    write_rows(twice / "lake", SCHEMA, [second[0], first[10]], "c.parquet")
    run(load_project(project_file))
    con = duckdb.connect(str(twice / "w.duckdb"), read_only=True)
    assert con.execute("SELECT run_id, duplicate_rows FROM runs ORDER BY run_id").fetchall() == [(1, 1), (2, 7)]
    con.close()

    def windows(folder: Path) -> list[tuple]:
        con = duckdb.connect(str(folder / "w.duckdb"), read_only=True)
        try:
            return con.execute("SELECT check_name, key_text, window_start, window_end, sessions, bad, value "
                               "FROM windows ORDER BY ALL").fetchall()
        finally:
            con.close()

    assert windows(twice) == windows(once)
    assert sum(w[4] for w in windows(once) if w[0] == "site_failures") <= 80


def test_a_warehouse_with_hex_id_hashes_is_converted_and_still_finds_repeats(tmp_path: Path) -> None:
    # Warehouses written before id hashes were numbers keep md5 as 32 hex characters; the next
    # run converts them in place, and a session read then still counts as a repeat.
    rows = sessions("a", 0, 40)
    project_file = project_with(tmp_path, rows)
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("ALTER TABLE session_ids ALTER id_hash TYPE VARCHAR USING NULL")
    con.execute("DELETE FROM session_ids")
    # and, as then, paths in full and no layout number
    con.execute("INSERT INTO session_ids (source_name, id_hash, first_path) "
                "SELECT 'sessions', md5(session_id), $p FROM read_parquet($p)",
                {"p": str(tmp_path / "lake" / "a.parquet")})
    con.execute("UPDATE files_read SET path = $lake || '/' || path, source_name = NULL",
                {"lake": str(tmp_path / "lake")})
    con.execute("DELETE FROM schema_version")
    con.close()
    write_rows(tmp_path / "lake", SCHEMA, sessions("b", 100, 8) + rows[:3], "b.parquet")
    run(load_project(project_file))
    con = duckdb.connect(str(tmp_path / "w.duckdb"), read_only=True)
    assert con.execute("SELECT data_type FROM duckdb_columns() WHERE table_name = 'session_ids' "
                       "AND column_name = 'id_hash'").fetchone() == ("UHUGEINT",)
    assert con.execute("SELECT run_id, duplicate_rows FROM runs ORDER BY run_id").fetchall() == [(1, 0), (2, 3)]
    assert con.execute("SELECT count(*) FROM session_ids WHERE id_hash = md5_number('a7')").fetchone() == (1,)
    con.close()


def test_a_file_changed_after_reading_is_reported_once_and_not_read_again(tmp_path: Path) -> None:
    project_file = project_with(tmp_path, sessions("a", 0, 40))
    before = warehouse_contents(tmp_path / "w.duckdb", skip=("runs", "changed_files"))
    write_rows(tmp_path / "lake", SCHEMA, sessions("a", 0, 44), "a.parquet")      # rewritten, bigger
    stamp = datetime(2026, 11, 30, 12, 0).timestamp()
    os.utime(tmp_path / "lake" / "a.parquet", (stamp, stamp))

    result = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert result.exit_code == 0, result.output
    warning = [line for line in result.output.splitlines() if line.startswith("warning:")]
    assert len(warning) == 2                                     # once for each check that read it
    assert any(f"not read again: {tmp_path / 'lake' / 'a.parquet'} (check site_failures: size " in line
               for line in warning)
    assert warehouse_contents(tmp_path / "w.duckdb", skip=("runs", "changed_files")) == before

    again = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert "warning:" not in again.output                        # reported once, not every run
    con = duckdb.connect(str(tmp_path / "w.duckdb"), read_only=True)
    assert con.execute("SELECT run_id, changed_files FROM runs ORDER BY run_id").fetchall() == [
        (1, 0), (2, 1), (3, 0)]
    assert con.execute("SELECT count(*), count(DISTINCT check_name) FROM changed_files").fetchone() == (2, 2)
    con.close()
