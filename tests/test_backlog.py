"""A backlog larger than max_read_per_run is read by several runs in turn, each committed.

One `plimsoll run` over a year of lake must not need a year's worth of memory or spill space; it
reads the files in path order, at most max_read_per_run of Parquet per check and run, and commits
each run. What they produce together is what one run over everything produces.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import FIXTURE_LAKE, PROJECT, warehouse_contents, write_project

from toolkit.cli import main
from toolkit.problems import ProjectInvalid
from toolkit.project import load_project
from toolkit.runner import run

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
            "windows": con.execute("SELECT check_name, key_text, split_value, seq, window_start, window_end, "
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
