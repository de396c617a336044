"""A lake whose problems give the shapes of incidents, read file by file as a lake fills.

Thirty-four hours of sessions (600 an hour, failing 2 % of the time) on two sites, three CDNs in two
countries and three player versions, one of them a hostile string (every output must show it as
text). Two checks: CDN by country (hourly windows) and site (half-hour windows). Problems:
  · hours 16-17, and again hour 22: sessions through cdn 'birch' in 'DE' fail 6 times in 10. At
    16:30 both sites alert first (two incidents); then the CDN alert opens and explains both: one
    incident (updated: alerts joined, its cause changed), the other closed as 'merged'. It closes
    after recovering, reopens at hour 22 and closes again.
  · hours 31-33 (the end): sessions of the hostile player through cdn 'cedar' in 'FR' fail 2 times
    in 5: an open incident whose cause, the CDN in its country, lies in the hostile player; a
    site alert opened half an hour later joins it, its own incident closed as 'merged'.
The files: one per hour, hour 16 in two halves, and a run after each (``built``, once per test
session, keeping the warehouse after every run: ``at`` gives a project as it was after any of them).
"""

from __future__ import annotations

import random
import shutil
from datetime import datetime, timedelta
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from conftest import write_project

START = datetime(2026, 11, 2)
HOURS = 34
SEED = 5
HOSTILE_PLAYER = "<img src=x onerror=alert(2)>"
CDN_BAD = (16, 17, 22)
PLAYER_BAD = (31, 32, 33)
COLUMNS = ("session_id", "ended_at", "site", "cdn", "country", "player", "failed")

PROJECT = """\
warehouse: warehouse.duckdb
sources:
  sessions:
    path: {lake}
    session_id: session_id
    event_time: ended_at
    attributes: [site, cdn, country, player]
"""
COMMON = """\
measure: {kind: rate, bad: failed}
baseline: {method: p_chart, sigmas: 3, history: 24, min_history: 6}
guard: {min_sessions: 20, min_bad: 5}
lifecycle: {recover_after: 2}
"""
CHECKS = {
    "cdn_country.yml": "check: cdn_country\nsource: sessions\nby: [cdn, country]\nseverity: high\n"
                       "window: {every: 1h}\n" + COMMON,
    "site.yml": "check: site\nsource: sessions\nby: [site]\nseverity: medium\nwindow: {every: 30m}\n" + COMMON,
}


def sessions(seed: int = SEED) -> list[tuple]:
    rnd = random.Random(seed)
    rows = []
    for hour in range(HOURS):
        for i in range(600):
            site, cdn = rnd.choice(["news", "sport"]), rnd.choice(["alder", "birch", "cedar"])
            country, player = rnd.choice(["DE", "FR"]), rnd.choice(["7.1", "7.2", HOSTILE_PLAYER])
            p = 0.02
            if hour in CDN_BAD and (cdn, country) == ("birch", "DE"):
                p = 0.6
            if hour in PLAYER_BAD and (cdn, country, player) == ("cedar", "FR", HOSTILE_PLAYER):
                p = 0.4
            rows.append((f"s-{hour}-{i}", START + timedelta(hours=hour, seconds=6 * i + 1), site, cdn, country,
                         player, rnd.random() < p))
    return rows


def files() -> list[tuple[str, datetime, datetime]]:
    """(name, from, until) of each file, in the order they land: an hour each, hour 16 in halves."""
    out = []
    for hour in range(HOURS):
        at = START + timedelta(hours=hour)
        if hour == 16:
            out += [(f"hour={hour:02d}a.parquet", at, at + timedelta(minutes=30)),
                    (f"hour={hour:02d}b.parquet", at + timedelta(minutes=30), at + timedelta(hours=1))]
        else:
            out.append((f"hour={hour:02d}.parquet", at, at + timedelta(hours=1)))
    return out


def write_file(lake: Path, name: str, rows: list[tuple]) -> None:
    lake.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table({c: [r[i] for r in rows] for i, c in enumerate(COLUMNS)}), lake / name)


def project_in(folder: Path, extra_project: str = "") -> Path:
    """The project file over the (empty) lake in ``folder``."""
    (folder / "lake").mkdir(parents=True, exist_ok=True)
    return write_project(folder, dict(CHECKS), PROJECT.format(lake=folder / "lake") + extra_project)


def land(folder: Path, upto: int, after_each=None, start: int = 0) -> None:
    """Write files ``start`` .. ``upto`` - 1 into the lake, calling ``after_each(i)`` after each."""
    rows = sessions()
    for i, (name, lo, hi) in enumerate(files()[start:upto], start):
        write_file(folder / "lake", name, [r for r in rows if lo <= r[1] < hi])
        if after_each is not None:
            after_each(i)


_BUILT: dict[str, Path] = {}


def built(tmp_path_factory) -> Path:
    """The project folder after a run per file, built once per test session; ``snapshots/N.duckdb``
    holds the warehouse as it was after the run of file N (counting from 0), ``snapshots/N_tables``
    the copy of its tables that run published."""
    from toolkit.config.project import load_project
    from toolkit.engine.runner import run

    if "folder" not in _BUILT:
        folder = tmp_path_factory.mktemp("incident_lake")
        project = project_in(folder)
        (folder / "snapshots").mkdir()

        def after(i: int) -> None:
            assert run(load_project(project)).status == "ok"
            shutil.copyfile(folder / "warehouse.duckdb", folder / "snapshots" / f"{i}.duckdb")
            if (folder / "warehouse_tables").exists():  # the copy a run publishes for readers
                shutil.copytree(folder / "warehouse_tables", folder / "snapshots" / f"{i}_tables")

        land(folder, len(files()), after)
        _BUILT["folder"] = folder
    return _BUILT["folder"]


def at(tmp_path_factory, to: Path, step: int | None = None, extra_project: str = "") -> Path:
    """A project in ``to`` as the built one was after the run of file ``step`` (None: the last),
    with the files landed until then; its project file, with ``extra_project`` appended."""
    folder = built(tmp_path_factory)
    last = len(files()) - 1 if step is None else step
    project = project_in(to, extra_project)
    for name, _, _ in files()[:last + 1]:
        shutil.copyfile(folder / "lake" / name, to / "lake" / name)
    shutil.copyfile(folder / "snapshots" / f"{last}.duckdb", to / "warehouse.duckdb")
    if (folder / "snapshots" / f"{last}_tables").exists():
        shutil.copytree(folder / "snapshots" / f"{last}_tables", to / "warehouse_tables")
    return project
