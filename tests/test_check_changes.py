"""Editing, removing and rebuilding checks: history is never silently rewritten or dropped.

- A check whose windows or baseline would now be computed differently is not run on top of its
  old windows (the others are), naming the file and the command that rebuilds it.
- `--rebuild` rebuilds from the lake: with an unchanged check it gives exactly the
  incremental history; after a change, the old definition's alerts stay (closed as
  'check changed' if they were open), marked with the old definition hash.
- A check removed from the project closes its open alerts as 'check removed'.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import FIXTURE_LAKE, PROJECT, warehouse_contents, write_project

from toolkit.cli import main
from toolkit.problems import ProjectInvalid
from toolkit.config.project import load_project
from toolkit.engine.runner import run

GOLDEN = Path(__file__).parent / "golden"
CHECKS = ("title_decode_errors.yml", "startup_p90_by_site.yml")
DAYS = sorted(p.name for p in FIXTURE_LAKE.iterdir())
# results only: which run wrote a row differs between incremental and rebuilt histories
RESULTS = {"windows": "check_name, key_text, split_value, window_number, window_start, window_end, sessions, bad, "
                      "value, threshold, breach",
           "alerts": "alert_id, check_name, key_text, split_value, status, close_reason, opened_at, "
                     "last_breach_at, closed_at, breach_windows, affected_sessions, peak_value, threshold, "
                     "definition_hash",
           "alert_events": "alert_id, occurred_at, event, value, threshold, affected_sessions"}


def project(folder: Path, days: list[str]) -> Path:
    lake = folder / "lake"
    for day in days:
        shutil.copytree(FIXTURE_LAKE / day, lake / day, dirs_exist_ok=True)
    checks = {name: (GOLDEN / name).read_text() for name in CHECKS}
    return write_project(folder, checks, PROJECT.format(lake=lake))


def results(warehouse_file: Path) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(warehouse_file), read_only=True)
    try:
        return {t: con.execute(f"SELECT {cols} FROM {t} ORDER BY ALL").fetchall() for t, cols in RESULTS.items()}
    finally:
        con.close()


def edit(project_file: Path, name: str, old: str, new: str) -> None:
    path = project_file.parent / "checks" / name
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new))


@pytest.fixture
def two_runs(tmp_path: Path) -> Path:
    """The two fixture days read in two runs; title_decode_errors ends with open alerts."""
    project_file = project(tmp_path, DAYS[:1])
    run(load_project(project_file))
    project(tmp_path, DAYS)
    run(load_project(project_file))
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    assert con.execute("SELECT count(*) FROM alerts WHERE status = 'open'").fetchone()[0] > 0
    con.close()
    return project_file


def test_full_refresh_equals_the_incremental_history(two_runs: Path) -> None:
    incremental = results(two_runs.parent / "warehouse.duckdb")
    result = run(load_project(two_runs), rebuild=True)
    assert result.files_read == len(DAYS)
    assert results(two_runs.parent / "warehouse.duckdb") == incremental


def test_a_changed_baseline_is_not_run_and_says_how_to_rebuild(two_runs: Path) -> None:
    before = warehouse_contents(two_runs.parent / "warehouse.duckdb", skip=("runs",))
    edit(two_runs, "title_decode_errors.yml", "factor: 1.5", "factor: 2.5")
    # alone, it refuses to run at all, writing nothing
    with pytest.raises(ProjectInvalid) as caught:
        run(load_project(two_runs), ["title_decode_errors"])
    (problem,) = caught.value.problems
    assert problem.file.endswith("checks/title_decode_errors.yml") and problem.line == 1
    assert "check title_decode_errors was not run: it has changed since its windows were computed" in problem.message
    assert "plimsoll run --check title_decode_errors --rebuild" in problem.message
    assert warehouse_contents(two_runs.parent / "warehouse.duckdb", skip=("runs",)) == before

    # with the others, they run and it is skipped, named with the command that rebuilds it
    result = run(load_project(two_runs))
    assert [c.check for c in result.checks] == ["startup_p90_by_site"] and result.skipped == [problem]
    cli = CliRunner().invoke(main, ["run", "-p", str(two_runs)])
    assert cli.exit_code == 2 and "--rebuild" in cli.output and "1 changed check not run" in cli.output
    assert warehouse_contents(two_runs.parent / "warehouse.duckdb", skip=("runs",)) == before


def test_editing_one_check_does_not_stop_the_others(tmp_path: Path) -> None:
    edited = project(tmp_path / "edited", DAYS[:1])
    assert CliRunner().invoke(main, ["run", "-p", str(edited)]).exit_code == 0
    edit(edited, "title_decode_errors.yml", "factor: 1.5", "factor: 2.5")
    shutil.copytree(FIXTURE_LAKE / DAYS[1], tmp_path / "edited" / "lake" / DAYS[1])  # the next day lands
    cli = CliRunner().invoke(main, ["run", "-p", str(edited)])
    assert cli.exit_code == 2, cli.output
    assert "startup_p90_by_site: 1 file," in cli.output and "1 changed check not run" in cli.output
    assert cli.output.splitlines()[-1].endswith(
        "check title_decode_errors was not run: it has changed since its windows were computed (definition "
        f"{cli.output.split('(definition ')[1].split(')')[0]}); run `plimsoll run --check title_decode_errors "
        "--rebuild` to rebuild it from the lake, or undo the change")
    # the unchanged check carried on exactly as if nothing had been edited
    plain = project(tmp_path / "plain", DAYS)
    run(load_project(plain))
    startup = {"windows": "check_name = 'startup_p90_by_site'", "alerts": "check_name = 'startup_p90_by_site'"}

    def of_startup(folder: Path) -> dict[str, list[tuple]]:
        con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
        try:
            return {t: con.execute(f"SELECT {RESULTS[t]} FROM {t} WHERE {w} ORDER BY ALL").fetchall()
                    for t, w in startup.items()}
        finally:
            con.close()

    assert of_startup(tmp_path / "edited") == of_startup(tmp_path / "plain")
    assert len(of_startup(tmp_path / "plain")["windows"]) > 20


def test_severity_and_life_cycle_may_change_without_a_rebuild(two_runs: Path) -> None:
    edit(two_runs, "title_decode_errors.yml", "severity: high", "severity: low")
    edit(two_runs, "title_decode_errors.yml", "recover_after: 2", "recover_after: 3")
    assert run(load_project(two_runs)).status == "ok"


def test_rebuild_after_a_change_keeps_the_old_alerts_as_history(two_runs: Path, tmp_path: Path) -> None:
    warehouse_file = two_runs.parent / "warehouse.duckdb"
    con = duckdb.connect(str(warehouse_file), read_only=True)
    old = con.execute("SELECT alert_id, status, definition_hash FROM alerts "
                      "WHERE check_name = 'title_decode_errors' ORDER BY ALL").fetchall()
    con.close()
    edit(two_runs, "title_decode_errors.yml", "factor: 1.5", "factor: 1.6")
    run(load_project(two_runs), ["title_decode_errors"], rebuild=True)

    con = duckdb.connect(str(warehouse_file), read_only=True)
    kept = con.execute("SELECT alert_id, status, close_reason, definition_hash FROM alerts "
                       "WHERE alert_id IN (SELECT unnest($ids)) ORDER BY ALL", {"ids": [a[0] for a in old]}).fetchall()
    closing = con.execute("SELECT count(*) FROM alert_events WHERE event = 'closed' AND run_id = 3 "
                          "AND alert_id IN (SELECT unnest($ids))", {"ids": [a[0] for a in old]}).fetchone()[0]
    hashes = con.execute("SELECT DISTINCT definition_hash FROM check_state "
                         "WHERE check_name = 'title_decode_errors'").fetchall()
    con.close()
    assert [(a, d) for a, _, _, d in kept] == [(a, d) for a, _, d in old]          # all kept, old hash
    was_open = {a for a, status, _ in old if status == "open"}
    assert was_open and {a for a, status, reason, _ in kept if reason == "check changed"} == was_open
    assert all(status == "closed" for _, status, _, _ in kept)
    assert closing == len(was_open)
    assert hashes != [(old[0][2],)]

    # the rebuilt check equals the changed check run from scratch
    fresh = project(tmp_path / "fresh", DAYS)
    edit(fresh, "title_decode_errors.yml", "factor: 1.5", "factor: 1.6")
    run(load_project(fresh))
    mine, theirs = results(warehouse_file), results(tmp_path / "fresh" / "warehouse.duckdb")
    assert mine["windows"] == theirs["windows"]
    new_alerts = [a for a in mine["alerts"] if a[1] == "title_decode_errors" and a[0] not in {x[0] for x in old}]
    assert new_alerts == [a for a in theirs["alerts"] if a[1] == "title_decode_errors"]


def test_removing_a_check_closes_its_open_alerts_with_that_reason(two_runs: Path) -> None:
    warehouse_file = two_runs.parent / "warehouse.duckdb"
    (two_runs.parent / "checks" / "title_decode_errors.yml").unlink()
    result = run(load_project(two_runs))
    con = duckdb.connect(str(warehouse_file), read_only=True)
    statuses = con.execute("SELECT status, close_reason, count(*) FROM alerts WHERE check_name = "
                           "'title_decode_errors' GROUP BY ALL ORDER BY ALL").fetchall()
    events = con.execute("SELECT count(*) FROM alert_events WHERE run_id = $r AND event = 'closed'",
                         {"r": result.run_id}).fetchone()[0]
    state = con.execute("SELECT (SELECT count(*) FROM windows WHERE check_name = 'title_decode_errors'), "
                        "(SELECT count(*) FROM check_state WHERE check_name = 'title_decode_errors'), "
                        "alerts_closed FROM runs WHERE run_id = $r", {"r": result.run_id}).fetchone()
    con.close()
    assert ("open", None) not in {(s, r) for s, r, _ in statuses}
    removed = sum(n for s, r, n in statuses if r == "check removed")
    assert removed > 0 and events == removed
    assert state == (0, 0, removed)
