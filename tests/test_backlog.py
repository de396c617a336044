"""A backlog larger than max_read_per_run is read by several runs in turn, each committed.

One `plimsoll run` over a year of lake must not need a year's worth of memory or spill space; it
reads the files in data-time order (each file's earliest event time), at most max_read_per_run of
Parquet per check and run, and commits each run. What they produce together is what one run over
everything produces, whatever the folder layout.
"""

from __future__ import annotations

from datetime import date, datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import FIXTURE_LAKE, PROJECT, warehouse_contents, write_project, write_rows

from toolkit.cli import main
from toolkit.problems import ProjectInvalid
from toolkit.config.project import load_project
from toolkit.engine.runner import run

GOLDEN = Path(__file__).parent / "golden"
CHECKS = {name: (GOLDEN / name).read_text() for name in ("title_decode_errors.yml", "startup_p90_by_site.yml")}


@pytest.fixture(scope="module")
def lake(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The fixture lake cut into a file per six hours, so that a backlog has several files."""
    folder = tmp_path_factory.mktemp("lake")
    con = duckdb.connect()
    rows = f"read_parquet('{FIXTURE_LAKE}/**/*.parquet', hive_partitioning = false)"
    quarters = con.execute(f"SELECT DISTINCT date_trunc('day', ended_at) + INTERVAL 6 HOUR * (hour(ended_at) // 6) "
                           f"FROM {rows} WHERE ended_at IS NOT NULL ORDER BY 1").fetchall()
    for (start,) in quarters:
        out = folder / f"day={start:%Y-%m-%d}" / f"part-{start:%H}.parquet"
        out.parent.mkdir(exist_ok=True)
        con.execute(f"COPY (SELECT * FROM {rows} WHERE ended_at >= $s AND ended_at < $s + INTERVAL 6 HOUR) "
                    f"TO '{out}' (FORMAT parquet)", {"s": start})
    con.close()
    return folder


def project(folder: Path, lake: Path, limit: str | None) -> Path:
    text = PROJECT.format(lake=lake) + (f"max_read_per_run: {limit}\n" if limit else "")
    return write_project(folder, CHECKS, text)


def contents(folder: Path) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
    try:
        return {
            "windows": con.execute("SELECT check_name, key_text, split_value, window_number, window_start, window_end, "
                                   "sessions, bad, value, threshold, breach FROM windows ORDER BY ALL").fetchall(),
            "alerts": con.execute("SELECT alert_id, status, close_reason, opened_at, closed_at, breach_windows, "
                                  "affected_sessions, peak_value FROM alerts ORDER BY ALL").fetchall(),
            "events": con.execute("SELECT alert_id, event, occurred_at, value FROM alert_events "
                                  "ORDER BY ALL").fetchall(),
            "runs": con.execute("SELECT run_id, status, files_read, rows_read FROM runs ORDER BY run_id").fetchall(),
        }
    finally:
        con.close()


def test_a_small_limit_reads_the_backlog_in_runs_that_add_up_to_one(tmp_path: Path, lake: Path) -> None:
    files = sorted(lake.rglob("*.parquet"))
    assert len(files) >= 3
    whole, parts = tmp_path / "whole", tmp_path / "parts"
    run(load_project(project(whole, lake, None)))
    # a limit below any one file: each run reads one file (at least one, or it would never finish)
    result = CliRunner().invoke(main, ["run", "-p", str(project(parts, lake, "1KB"))], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    assert f"runs 1-{len(files)}: {len(files)} new files" in result.output
    one, many = contents(whole), contents(parts)
    assert [r[2] for r in many["runs"]] == [1] * len(files)
    assert sum(r[3] for r in many["runs"]) == one["runs"][0][3]
    assert many["windows"] == one["windows"] and many["alerts"] == one["alerts"]
    assert many["events"] == one["events"] and len(one["windows"]) > 10
    # and nothing is left to read
    again = CliRunner().invoke(main, ["run", "-p", str(project(parts, lake, "1KB"))], catch_exceptions=False)
    assert "0 new files" in again.output


def test_a_limit_above_the_lake_is_one_run(tmp_path: Path, lake: Path) -> None:
    run(load_project(project(tmp_path, lake, "4GB")))
    assert len(contents(tmp_path)["runs"]) == 1
    assert warehouse_contents(tmp_path / "warehouse.duckdb")["runs"]


@pytest.mark.parametrize("value", ["lots", "0GB", "-1MB", "4 parsecs"])
def test_a_limit_that_is_not_a_size_is_named(tmp_path: Path, lake: Path, value: str) -> None:
    with pytest.raises(ProjectInvalid, match=f"plimsoll.yml:9: max_read_per_run '{value}': expected a size"):
        load_project(project(tmp_path, lake, value))


# ----------------------------------------------------------------------------------------------
# A backlog in a hive layout whose paths do not sort by time

SITES_SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN"
SITE_HOURS = """\
check: site_hours
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {every: 1h, lateness: 30m}
baseline: {method: p_chart, sigmas: 3, history: 48, min_history: 12}
guard: {min_sessions: 20, min_bad: 5}
"""
SITE_COUNTS = """\
check: site_counts
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {sessions: 40, max_wait: 3h}
baseline: {method: rolling_percentile, q: 0.9, history: 30, min_history: 5, factor: 2, floor: 0.1}
guard: {min_sessions: 20, min_bad: 5}
"""
SITES_PROJECT = ("warehouse: warehouse.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n"
                 "    event_time: ended_at\n")


def site_lake(lake: Path) -> None:
    """site=a/day=…/ and site=b/day=…/ for six days, a session a minute per site; site b fails at
    2 % except for six hours of day 5, when it fails at 40 %. Path order reads all of a first."""
    start = datetime(2026, 11, 2)
    for site in ("a", "b"):
        for day in range(6):
            rows = []
            for minute in range(24 * 60):
                at = start + timedelta(days=day, minutes=minute, seconds=7 if site == "b" else 3)
                incident = site == "b" and day == 4 and 10 * 60 <= minute < 16 * 60
                rows.append((f"{site}-{day}-{minute}", at, minute % (3 if incident else 50) == 0))
            write_rows(lake / f"site={site}" / f"day={start + timedelta(days=day):%Y-%m-%d}", SITES_SCHEMA, rows)


def test_a_backlog_in_runs_reads_in_data_time_order_not_path_order(tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    site_lake(lake)
    checks = {"site_hours.yml": SITE_HOURS, "site_counts.yml": SITE_COUNTS}
    whole = write_project(tmp_path / "whole", checks, SITES_PROJECT.format(lake=lake))
    parts = write_project(tmp_path / "parts", checks, SITES_PROJECT.format(lake=lake) + "max_read_per_run: 30KB\n")
    assert run(load_project(whole)).first_run_id is None
    result = CliRunner().invoke(main, ["run", "-p", str(parts)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    one, many = contents(whole.parent), contents(parts.parent)
    assert len(many["runs"]) > 3
    # the site b incident is found, once, by both checks, whichever way the lake was read
    assert sorted((a[3].date(), a[1]) for a in one["alerts"]) == [(date(2026, 11, 6), "closed")] * 2
    assert many["windows"] == one["windows"] and many["alerts"] == one["alerts"]
    assert many["events"] == one["events"]
    con = duckdb.connect(str(parts.parent / "warehouse.duckdb"), read_only=True)
    assert con.execute("SELECT sum(late_rows) FROM runs").fetchone() == (0,)
    con.close()


def test_a_rebuild_of_a_backlog_reads_it_again_in_runs_and_gives_the_same_history(tmp_path: Path,
                                                                                  lake: Path) -> None:
    # The rebuild's first run reads in its transaction (its deletes must be seen), the runs after
    # it on their stage connection: the first must not leave them a name they cannot take.
    files = sorted(lake.rglob("*.parquet"))
    project_file = project(tmp_path, lake, "1KB")
    run(load_project(project_file))
    before = contents(tmp_path)
    result = CliRunner().invoke(main, ["run", "--rebuild", "-p", str(project_file)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    n = len(files)
    assert f"runs {n + 1}-{2 * n}: {n} new files" in result.output
    after = contents(tmp_path)
    assert after["windows"] == before["windows"] and after["alerts"] == before["alerts"]
    assert after["events"] == before["events"] and len(after["windows"]) > 10
