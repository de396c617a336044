"""Breaking runs on purpose: killed at random moments, run twice at once, read while writing.

design.md's promise: a run that fails or is killed leaves the warehouse exactly as before it, and
the next run then produces exactly what an uninterrupted run would have. One writer at a time; a
reader is never blocked (it reads the Parquet copies the last run published).
"""

from __future__ import annotations

import json
import os
import random
import re
import shutil
import signal
import subprocess
import threading
import time
from pathlib import Path

import pytest
from conftest import plimsoll_command, warehouse_contents

from toolkit.engine import warehouse
from toolkit.demo.run import write_project
from toolkit.config.project import load_project
from toolkit.engine.runner import run

KILLS = 24


@pytest.fixture(scope="module")
def demo_lake(small_fernhill_lake) -> Path:
    """The session's small Fernhill lake (40,000 sessions, 21 day partitions): small, because every
    kill is followed by a rerun. ``project_over`` copies the days a test reads."""
    return small_fernhill_lake.path


def project_over(folder: Path, lake: Path, days: slice) -> Path:
    """The demo project in ``folder``, its lake holding the chosen day partitions of ``lake``."""
    folder.mkdir(parents=True, exist_ok=True)
    project = write_project(folder)
    for day in sorted(lake.iterdir())[days]:
        shutil.copytree(day, folder / "lake" / "sessions" / day.name, dirs_exist_ok=True)
    return project


STATE = ("warehouse.duckdb", "warehouse.duckdb.wal", "warehouse.duckdb.run", "warehouse_tables")


def copy_state(source: Path, target: Path) -> None:
    """Replace the warehouse, its log, claim and published copies in ``target`` by ``source``'s."""
    target.mkdir(exist_ok=True)
    for item in STATE:
        old = target / item
        if old.is_dir():
            shutil.rmtree(old)
        elif old.exists():
            old.unlink()
        new = source / item
        if new.is_dir():
            shutil.copytree(new, old)
        elif new.exists():
            shutil.copy2(new, old)


def plimsoll(*args: str) -> list[str]:
    return plimsoll_command(*args)


def test_killed_runs_leave_the_warehouse_as_before(tmp_path: Path, demo_lake: Path) -> None:
    """SIGKILL a real `plimsoll run` at 24 seeded moments; each time the warehouse is as before the
    run (or, if the kill came after the commit, as after it), and a rerun equals an uninterrupted run."""
    work = tmp_path / "work"
    project_file = project_over(work, demo_lake, slice(0, 12))
    run(load_project(project_file))
    project_over(work, demo_lake, slice(12, None))
    before_dir = tmp_path / "before"
    copy_state(work, before_dir)
    before = warehouse_contents(work / "warehouse.duckdb")

    started = time.perf_counter()
    subprocess.run(plimsoll("run", "-p", str(project_file)), check=True, capture_output=True)
    seconds = time.perf_counter() - started
    after = warehouse_contents(work / "warehouse.duckdb")
    assert after["runs"] != before["runs"] and after["windows"] != before["windows"]

    rng = random.Random(20261202)
    outcomes: list[tuple[float, str, int]] = []
    for _ in range(KILLS):
        copy_state(before_dir, work)
        delay = rng.uniform(0.0, seconds * 1.05)
        child = subprocess.Popen(plimsoll("run", "-p", str(project_file)),
                                 stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        time.sleep(delay)
        child.send_signal(signal.SIGKILL)
        _, log = child.communicate()
        checks_done = sum(1 for line in log.splitlines() if re.search(r"\[\d+/\d+\] \w+: ", line))
        state = warehouse_contents(work / "warehouse.duckdb")
        if state == before:
            outcomes.append((delay, "before", checks_done))
            run(load_project(project_file))
            rerun = warehouse_contents(work / "warehouse.duckdb")
            assert rerun == after, f"rerun after a kill at {delay:.2f} s differs"
        else:
            assert state == after, f"kill at {delay:.2f} s left a warehouse that is neither before nor after"
            outcomes.append((delay, "after", checks_done))
    interrupted = [o for o in outcomes if o[1] == "before"]
    assert len(interrupted) >= KILLS // 2, outcomes
    # the kills fell in different places: before any check finished, between checks, near the end
    assert len({done for _, _, done in interrupted}) >= 3, outcomes


def hold_the_warehouse(project_file: Path) -> tuple[threading.Thread, threading.Event, threading.Event]:
    """A real run in a thread, paused inside its transaction until ``release`` is set."""
    holding, release = threading.Event(), threading.Event()

    def pause(message: str) -> None:
        if re.match(r"\[\d+/\d+\] \w+: ", message) and not holding.is_set():
            holding.set()
            assert release.wait(120)

    worker = threading.Thread(target=run, args=(load_project(project_file),), kwargs={"progress": pause})
    worker.start()
    assert holding.wait(120)
    return worker, holding, release


def test_second_run_names_the_first_and_readers_see_the_last_published_run(tmp_path: Path,
                                                                          demo_lake: Path) -> None:
    work = tmp_path / "work"
    project_file = project_over(work, demo_lake, slice(0, 10))
    run(load_project(project_file))
    project_over(work, demo_lake, slice(10, None))
    published = subprocess.run(plimsoll("alerts", "-p", str(project_file), "--json"),
                               check=True, capture_output=True, text=True).stdout
    before = warehouse_contents(work / "warehouse.duckdb")

    worker, _, release = hold_the_warehouse(project_file)
    try:
        second = subprocess.run(plimsoll("run", "-p", str(project_file), "--wait", "0.5"),
                                capture_output=True, text=True)
        reader = subprocess.run(plimsoll("alerts", "-p", str(project_file), "--json"),
                                capture_output=True, text=True)
    finally:
        release.set()
        worker.join()
    assert second.returncode == 1
    assert f"in use by run 2 (pid {os.getpid()} on " in second.stderr
    assert "after waiting 0.5 s" in second.stderr
    assert reader.returncode == 0, reader.stderr
    assert json.loads(reader.stdout) == json.loads(published)

    after = warehouse_contents(work / "warehouse.duckdb")
    assert [r[0] for r in after["runs"]] == [1, 2]           # the refused run wrote nothing
    assert after["windows"] != before["windows"]
    assert not warehouse.claim_path(load_project(project_file)).exists()


def test_two_concurrent_runs_equal_one(tmp_path: Path, demo_lake: Path) -> None:
    """Two real processes start together; one waits for the other; together they equal one run."""
    alone = project_over(tmp_path / "alone", demo_lake, slice(None))
    run(load_project(alone))
    expected = warehouse_contents(tmp_path / "alone" / "warehouse.duckdb")

    project_file = project_over(tmp_path / "work", demo_lake, slice(None))
    children = [subprocess.Popen(plimsoll("run", "-p", str(project_file), "--wait", "120"),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                for _ in range(2)]
    outputs = [child.communicate(timeout=300) for child in children]
    assert [c.returncode for c in children] == [0, 0], outputs
    assert sorted("21 new files" in out for out, _ in outputs) == [False, True], outputs
    got = warehouse_contents(tmp_path / "work" / "warehouse.duckdb")
    assert len(got["runs"]) == 2
    for table in warehouse.TABLES:
        # run records differ (two runs), and these tables name files of another lake folder
        if table not in ("runs", "run_checks", "files_read", "source_columns", "session_ids"):
            assert got[table] == expected[table], table
