"""Checks that join a project with history catch up, and a session counts once per check.

A check added to a project that has run for weeks, or left behind by `plimsoll run --check OTHER`,
reads the files the others have read while they carry on with the new ones; what it ends with is
what it would have if it had been there from the start. These run the installed `plimsoll` command
over a demo lake of 300,000 sessions, the size at which a new check's first run used to stop every
later run. And when a lake's old files are deleted and their sessions sent again, each check still
counts each session once, whatever the order in which checks were added.
"""

from __future__ import annotations

import shutil
import subprocess
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from conftest import PLAIN_PROJECT, plimsoll_command, write_project, write_rows

from toolkit.checks import __file__ as catalogue_init
from toolkit.config.project import load_project
from toolkit.engine.runner import run

CATALOGUE = Path(catalogue_init).parent
CHECKS = ("site_errors.yml", "title_errors.yml")
PROJECT = """\
warehouse: warehouse.duckdb
checks: checks/
sources:
  sessions:
    path: lake/
    session_id: session_id
    event_time: ended_at
    exclude: is_bot
"""
RESULTS = {
    "windows": "check_name, key_text, split_value, window_number, window_start, window_end, sessions, bad, value, "
               "threshold, breach",
    "alerts": "alert_id, check_name, key_text, split_value, status, close_reason, opened_at, closed_at, "
              "breach_windows, affected_sessions, peak_value",
    "alert_events": "alert_id, event, occurred_at, value, affected_sessions",
    "carry": "check_name, key_text, event_time, session_id",
}


@pytest.fixture(scope="module")
def days(fernhill_lake) -> list[Path]:
    """Three weeks of Fernhill's demo lake, 300,000 sessions, a folder per day (the session's
    shared lake: ``project`` copies the days it needs)."""
    assert fernhill_lake.sessions == 300_000
    found = fernhill_lake.days()
    assert len(found) == 21
    return found


def project(folder: Path, days: list[Path], checks: tuple[str, ...], extra: str = "") -> Path:
    """A project over the given day folders, with the given catalogue checks."""
    for day in days:
        if not (folder / "lake" / day.name).exists():
            shutil.copytree(day, folder / "lake" / day.name)
    (folder / "checks").mkdir(parents=True, exist_ok=True)
    for name in checks:
        shutil.copy(CATALOGUE / name, folder / "checks" / name)
    (folder / "plimsoll.yml").write_text(PROJECT + extra)
    return folder / "plimsoll.yml"


def plimsoll(project_file: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(plimsoll_command(*args, "-p", str(project_file)), capture_output=True, text=True,
                          timeout=600)


def results(folder: Path) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
    try:
        return {t: con.execute(f"SELECT {cols} FROM {t} ORDER BY ALL").fetchall() for t, cols in RESULTS.items()}
    finally:
        con.close()


@pytest.fixture(scope="module")
def from_the_start(days: list[Path], tmp_path_factory: pytest.TempPathFactory) -> dict[str, list[tuple]]:
    """Both checks over all three weeks in one run: what catching up must arrive at."""
    folder = tmp_path_factory.mktemp("start")
    done = plimsoll(project(folder, days, CHECKS), "run")
    assert done.returncode == 0, done.stderr
    found = results(folder)
    assert len([w for w in found["windows"] if w[0] == "title_errors"]) > 10_000
    return found


def test_a_check_added_after_two_weeks_catches_up_while_the_other_carries_on(
        days: list[Path], from_the_start: dict, tmp_path: Path) -> None:
    first = plimsoll(project(tmp_path, days[:14], CHECKS[:1]), "run")
    assert first.returncode == 0, first.stderr
    # a week later: seven more days have landed, and title_errors is added
    added = plimsoll(project(tmp_path, days, CHECKS), "run")
    assert added.returncode == 0, added.stderr
    assert "title_errors: 21 files" in added.stderr and "site_errors: 7 files" in added.stderr
    assert results(tmp_path) == from_the_start
    # and the runs after it work as before
    again = plimsoll(tmp_path / "plimsoll.yml", "run")
    assert again.returncode == 0 and again.stdout.startswith("run 3: 0 new files"), again.stdout + again.stderr


def test_a_check_left_behind_by_run_check_catches_up_in_the_next_plain_run(
        days: list[Path], from_the_start: dict, tmp_path: Path) -> None:
    project_file = project(tmp_path, days, CHECKS)
    only = plimsoll(project_file, "run", "--check", "site_errors")
    assert only.returncode == 0, only.stderr
    plain = plimsoll(project_file, "run")
    assert plain.returncode == 0, plain.stderr
    assert results(tmp_path) == from_the_start


def test_a_check_catches_up_in_turns_when_its_backlog_exceeds_max_read_per_run(
        days: list[Path], from_the_start: dict, tmp_path: Path) -> None:
    first = plimsoll(project(tmp_path, days[:14], CHECKS[:1], "max_read_per_run: 6MB\n"), "run")
    assert first.returncode == 0, first.stderr
    added = plimsoll(project(tmp_path, days, CHECKS, "max_read_per_run: 6MB\n"), "run")
    assert added.returncode == 0, added.stderr
    assert added.stdout.startswith("runs "), added.stdout      # several runs in turn
    assert results(tmp_path) == from_the_start


# ----------------------------------------------------------------------------------------------
# A session counts once per check, whatever the order of checks and files

SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN"
OLDER = """\
check: site_failures
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {sessions: 10, max_wait: 1d}
baseline: {method: rolling_percentile, q: 0.5, history: 5, min_history: 2, factor: 2, floor: 0.3}
"""
NEWER = OLDER.replace("check: site_failures", "check: a_new_check")


def sessions(prefix: str, hour: int, count: int, bad_every: int = 5) -> list[tuple]:
    start = datetime(2026, 11, 2) + timedelta(hours=hour)
    return [(f"{prefix}{i}", start + timedelta(minutes=i), "news", i % bad_every == 0) for i in range(count)]


def windows_of(project_file: Path, check: str) -> list[tuple]:
    con = duckdb.connect(str(project_file.parent / "w.duckdb"), read_only=True)
    try:
        return con.execute("SELECT window_number, window_start, window_end, sessions, bad, breach FROM windows "
                           "WHERE check_name = $c ORDER BY window_number", {"c": check}).fetchall()
    finally:
        con.close()


def duplicates_of(project_file: Path, check: str) -> int:
    con = duckdb.connect(str(project_file.parent / "w.duckdb"), read_only=True)
    try:
        return con.execute("SELECT sum(duplicate_rows) FROM run_checks WHERE check_name = $c",
                           {"c": check}).fetchone()[0]
    finally:
        con.close()


def test_sessions_sent_again_after_their_file_was_deleted_count_once_for_the_older_check(tmp_path: Path) -> None:
    # site_failures reads a.parquet; the lake's retention deletes it; b.parquet then brings ten of
    # its sessions again with forty new ones, and a new check (first in order) is added
    first = sessions("s", 0, 40)
    again = first[:10] + sessions("t", 1, 40)
    lake = tmp_path / "lake"
    write_rows(lake, SCHEMA, first, "a.parquet")
    project_file = write_project(tmp_path, {"site_failures.yml": OLDER}, PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    (lake / "a.parquet").unlink()
    write_rows(lake, SCHEMA, again, "b.parquet")
    write_project(tmp_path, {"site_failures.yml": OLDER, "a_new_check.yml": NEWER}, PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))

    # what the older check would have counted had the ten never been sent again
    clean = tmp_path / "clean"
    write_rows(clean / "lake", SCHEMA, first, "a.parquet")
    clean_file = write_project(clean, {"site_failures.yml": OLDER}, PLAIN_PROJECT.format(lake=clean / "lake"))
    run(load_project(clean_file))
    write_rows(clean / "lake", SCHEMA, sessions("t", 1, 40), "b.parquet")
    run(load_project(clean_file))

    assert duplicates_of(project_file, "site_failures") == 10
    assert windows_of(project_file, "site_failures") == windows_of(clean_file, "site_failures")
    # the new check never saw a.parquet: for it, the ten are new sessions
    assert duplicates_of(project_file, "a_new_check") == 0
    assert sum(w[3] for w in windows_of(project_file, "a_new_check")) == 50


def test_a_session_counts_once_per_check_whatever_the_order_of_checks_and_files(tmp_path: Path) -> None:
    # the same sessions reach two checks in different orders; each counts every id once
    a, b, c = sessions("s", 0, 30), sessions("s", 0, 30)[10:] + sessions("u", 1, 30), sessions("u", 1, 30)
    lake = tmp_path / "lake"
    write_rows(lake, SCHEMA, a, "1.parquet")
    project_file = write_project(tmp_path, {"site_failures.yml": OLDER}, PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    write_rows(lake, SCHEMA, b, "2.parquet")
    write_project(tmp_path, {"site_failures.yml": OLDER, "a_new_check.yml": NEWER}, PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    (lake / "1.parquet").unlink()
    write_rows(lake, SCHEMA, c + a[:5], "3.parquet")
    run(load_project(project_file))
    assert duplicates_of(project_file, "site_failures") == 20 + 35
    assert duplicates_of(project_file, "a_new_check") == 20 + 35
    assert sum(w[3] for w in windows_of(project_file, "site_failures")) == 60
    assert windows_of(project_file, "a_new_check") == windows_of(project_file, "site_failures")
