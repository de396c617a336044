"""The warehouse records its layout: a file of an earlier layout is converted in place by the next
command that writes it, and one of a later layout is refused with one line."""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import FIXTURE_LAKE, warehouse_contents, write_project
from known_lake import known_project

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine import warehouse
from toolkit.engine.runner import run


def test_a_layout_2_file_has_its_columns_renamed_and_runs_on(tmp_path) -> None:
    project = load_project(known_project(tmp_path))
    run(project)
    con = duckdb.connect(str(project.warehouse))
    con.execute("ALTER TABLE runs RENAME COLUMN rebuild TO full_refresh")  # as layout 2 named it
    con.execute("UPDATE schema_version SET version = 2")
    con.close()
    before = warehouse_contents(project.warehouse, skip=("runs", "schema_version"))
    result = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    con = duckdb.connect(str(project.warehouse), read_only=True)
    columns = [r[0] for r in con.execute("DESCRIBE runs").fetchall()]
    assert "rebuild" in columns and "full_refresh" not in columns
    assert con.execute("SELECT version FROM schema_version").fetchall() == [(warehouse.SCHEMA_VERSION,)]
    assert con.execute("SELECT run_id, rebuild FROM runs ORDER BY run_id").fetchall() == [(1, False), (2, False)]
    con.close()
    assert warehouse_contents(project.warehouse, skip=("runs", "schema_version")) == before


GOLDEN = Path(__file__).parent / "golden"
# (table, layout 2's name, layout 3's) of every renamed column, as CHANGELOG.md lists them
LAYOUT_2_NAMES = (
    ("runs", "full_refresh", "rebuild"),
    ("run_checks", "rows_invalid", "invalid_rows"),
    ("windows", "seq", "window_number"),
    ("key_windows", "seq", "window_number"),
    ("key_state", "last_seq", "last_window_number"),
    ("carry", "num", "numerator"),
    ("carry", "den", "denominator"),
    ("carry", "x", "quantile_input"),
)
# tables whose rows a run derives from the lake: a converted file must go on to the same rows as a
# file that was never converted (run ids and wall-clock times aside)
DERIVED = {
    "windows": "check_name, key_text, split_value, window_number, key_window, window_start, window_end, sessions, "
               "bad, round(value, 12), round(statistic, 12), round(baseline, 12), history_windows, "
               "round(threshold, 12), breach",
    "key_windows": "check_name, key_text, key_window, window_number, window_start, window_end, sessions, bad",
    "key_state": "check_name, key, last_window_number, last_end, windows",
    "carry": "check_name, key_text, event_time, session_id, is_bad, split_value, numerator, denominator, "
             "quantile_input",
    "alerts": "alert_id, check_name, key_text, split_value, status, close_reason, opened_at, last_breach_at, "
              "closed_at, breach_windows, affected_sessions, round(peak_value, 12), round(threshold, 12), "
              "healthy_streak",
    "alert_events": "alert_id, occurred_at, event, round(value, 12), round(threshold, 12), affected_sessions",
}


def _golden_project(folder: Path, days: list[str]) -> Path:
    """Every golden check (a rate with a split, a ratio, a quantile; count and time windows) over
    the fixture lake's files of ``days``."""
    for day in days:
        shutil.copytree(FIXTURE_LAKE / f"day={day}", folder / "lake" / f"day={day}")
    checks = {p.name: p.read_text() for p in sorted(GOLDEN.glob("*.yml"))}
    return write_project(folder, checks, lake=folder / "lake")


def _rows(warehouse_file: Path) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(warehouse_file), read_only=True)
    try:
        return {t: con.execute(f"SELECT {c} FROM {t} ORDER BY ALL").fetchall() for t, c in DERIVED.items()}
    finally:
        con.close()


def test_a_layout_2_file_with_the_old_column_names_keeps_its_data_and_runs_on(tmp_path) -> None:
    # A warehouse as layout 2 wrote it: one day read, partial windows carried, under the old names.
    old = _golden_project(tmp_path / "old", ["2026-11-02"])
    assert CliRunner().invoke(main, ["run", "-p", str(old)]).exit_code == 0
    con = duckdb.connect(str(old.parent / "warehouse.duckdb"))
    for table, was, now in LAYOUT_2_NAMES:
        con.execute(f"ALTER TABLE {table} RENAME COLUMN {now} TO {was}")
    con.execute("UPDATE schema_version SET version = 2")
    # what it holds under those names: quantile inputs and ratio parts carried, windows numbered
    assert min(con.execute("SELECT count(x), count(num), count(den) FROM carry").fetchone()) > 0
    assert con.execute("SELECT count(seq) FROM windows").fetchone()[0] > 0
    runs_before = con.execute("SELECT run_id, rows_read, invalid_rows, full_refresh FROM runs").fetchall()
    checks_before = con.execute("SELECT check_name, rows_invalid, rows_read FROM run_checks ORDER BY ALL").fetchall()
    con.close()

    # The next day lands; the first run converts the file and reads on from what it holds.
    shutil.copytree(FIXTURE_LAKE / "day=2026-11-03", old.parent / "lake" / "day=2026-11-03")
    result = CliRunner().invoke(main, ["run", "-p", str(old)])
    assert result.exit_code == 0, result.output

    con = duckdb.connect(str(old.parent / "warehouse.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(warehouse.SCHEMA_VERSION,)]
        for table, was, now in LAYOUT_2_NAMES:
            columns = [r[0] for r in con.execute(f"DESCRIBE {table}").fetchall()]
            assert now in columns and was not in columns, (table, columns)
        assert con.execute("SELECT run_id, rows_read, invalid_rows, rebuild FROM runs WHERE run_id = 1").fetchall() \
            == runs_before
        assert con.execute("SELECT check_name, invalid_rows, rows_read FROM run_checks WHERE run_id = 1 "
                           "ORDER BY ALL").fetchall() == checks_before
    finally:
        con.close()

    # ... to exactly what a file that read both days in one run holds: the carried sessions kept
    # their inputs and the windows their numbers through the renames
    fresh = _golden_project(tmp_path / "fresh", ["2026-11-02", "2026-11-03"])
    assert CliRunner().invoke(main, ["run", "-p", str(fresh)]).exit_code == 0
    converted, expected = _rows(old.parent / "warehouse.duckdb"), _rows(fresh.parent / "warehouse.duckdb")
    for table in DERIVED:
        assert converted[table] == expected[table], table
    assert len(converted["windows"]) > 100 and converted["carry"]


def test_a_file_of_a_later_layout_is_refused_with_one_line(tmp_path) -> None:
    project = load_project(known_project(tmp_path))
    run(project)
    con = duckdb.connect(str(project.warehouse))
    con.execute("UPDATE schema_version SET version = 99")
    con.close()
    result = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert result.exit_code == 1
    assert result.output == (f"{project.warehouse}: written by a newer Plimsoll (warehouse layout 99; this one "
                             f"reads layout {warehouse.SCHEMA_VERSION} and earlier); upgrade plimsoll\n")


@pytest.mark.parametrize("layout", [6, 7])
def test_an_earlier_layout_takes_the_rewritten_sql_without_a_rebuild(tmp_path, layout) -> None:
    """Layouts 7 and 8 rewrote the count-window and verdict SQL: a check unchanged in its file
    compiles to a new definition hash. The upgrade adopts it, so no check stops for a rebuild."""
    project = load_project(known_project(tmp_path))
    run(project)
    con = duckdb.connect(str(project.warehouse))
    now = dict(con.execute("SELECT check_name, definition_hash FROM check_state").fetchall())
    # as the previous release's SQL hashed them
    con.execute("UPDATE check_state SET definition_hash = 'earlier' || check_name")
    con.execute("UPDATE alerts SET definition_hash = 'earlier' || check_name WHERE check_name IS NOT NULL")
    con.execute("UPDATE schema_version SET version = $v", {"v": layout})
    con.close()
    before = warehouse_contents(project.warehouse, skip=("runs", "run_checks", "schema_version", "check_state",
                                                         "alerts", "alert_events"))
    result = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    assert "--rebuild" not in result.output
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(warehouse.SCHEMA_VERSION,)] == [(8,)]
        assert dict(con.execute("SELECT check_name, definition_hash FROM check_state").fetchall()) == now
        # open alerts carry on under the new hash (closed ones keep theirs, as history)
        assert con.execute("SELECT count(*) FROM alerts WHERE status = 'open' AND definition_hash LIKE 'earlier%'"
                           ).fetchone() == (0,)
    finally:
        con.close()
    assert warehouse_contents(project.warehouse, skip=("runs", "run_checks", "schema_version", "check_state",
                                                       "alerts", "alert_events")) == before
