"""Shared fixtures: temp projects over the small committed lake in tests/fixtures/lake, and the
Fernhill demo lake, built once per session and shared read-only."""

from __future__ import annotations

import json
import os
import sys
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import pytest

FIXTURE_LAKE = Path(__file__).parent / "fixtures" / "lake"

PROJECT = """\
warehouse: warehouse.duckdb
checks: checks/
sources:
  sessions:
    path: {lake}
    session_id: session_id
    event_time: ended_at
    exclude: is_bot
"""


def write_project(folder: Path, checks: dict[str, str], project: str | None = None,
                  lake: Path = FIXTURE_LAKE) -> Path:
    """A project in ``folder`` with the given check files (name -> YAML text)."""
    (folder / "checks").mkdir(parents=True, exist_ok=True)
    text = project if project is not None else PROJECT.format(lake=lake)
    (folder / "plimsoll.yml").write_text(textwrap.dedent(text), encoding="utf-8")
    for name, body in checks.items():
        (folder / "checks" / name).write_text(textwrap.dedent(body), encoding="utf-8")
    return folder / "plimsoll.yml"


@pytest.fixture
def make_project(tmp_path: Path):
    def make(checks: dict[str, str], project: str | None = None, lake: Path = FIXTURE_LAKE) -> Path:
        return write_project(tmp_path, checks, project, lake)

    return make


# ── The Fernhill demo lake, built once per test session ────────────────────────────────────────────
#
# Building a lake takes seconds; what a test does over it takes longer the larger it is. So there are
# two shared lakes, and one test module with sizes of its own:
#
# - ``fernhill_lake``: 300,000 sessions, seed 11. "A few hundred thousand sessions": the size at which
#   a check added to a project with history used to stop every later run (test_catch_up), and what
#   the other end-to-end tests over the demo read (test_run_memory, test_warehouse_errors,
#   test_spark, test_demo_lake).
# - ``small_fernhill_lake``: 40,000 sessions, seed 3. For tests that run over the lake many times
#   (test_durability kills 24 runs and reruns each: its time grows with the lake) or need only the
#   demo's schema and story (test_metrics, test_expressions).
# - test_backtest asks ``fernhill_lake_of(400_000, seed=7)``: its scaled catalogue setting is tuned
#   to that lake (at 300,000 sessions, seed 11, the title incident is too small for it to find); its
#   slow test asks for the full demo, ``fernhill_lake_of(2_000_000, seed=7)``, as `plimsoll demo`
#   builds it.
#
# A shared lake is read in place and never changed: a test that must change files copies them first
# (as test_catch_up and test_durability copy the day folders they let land one by one). After every
# test each lake built so far is compared with what was built (every file's name, size and
# modification time): a test that changed one fails, and the lake is built again so the tests after
# it read the real thing. (File permissions could not say it: the tests may run as root.)

SHARED_LAKE = (300_000, 11)
SMALL_LAKE = (40_000, 3)


def _fingerprint(folder: Path) -> list[tuple[str, int, int]]:
    """Every file and folder under ``folder``: its relative name, size and modification time."""
    found = []
    for where, folders, files in os.walk(folder):
        for name in folders + files:
            stat = os.stat(os.path.join(where, name))
            found.append((os.path.relpath(os.path.join(where, name), folder), stat.st_size, stat.st_mtime_ns))
    return sorted(found)


@dataclass(frozen=True)
class DemoLake:
    """A Fernhill Broadcasting demo lake as ``build_lake`` wrote it: ``lake/sessions/day=…/`` and
    ``labels.csv`` in ``folder``. Shared by the session: read it where it is, copy what you change."""

    folder: Path
    sessions: int
    seed: int
    labels: tuple = ()
    built: list = field(default_factory=list, compare=False, repr=False)

    @property
    def path(self) -> Path:
        """The sessions folder: a source's ``path``, one ``day=YYYY-MM-DD`` folder per day."""
        return self.folder / "lake" / "sessions"

    @property
    def labels_file(self) -> Path:
        return self.folder / "labels.csv"

    def days(self) -> list[Path]:
        return sorted(self.path.iterdir())

    def project(self, folder: Path, extra: str = "") -> Path:
        """`plimsoll demo`'s project (the whole catalogue) in ``folder``, reading this lake in place;
        ``extra`` is appended to its plimsoll.yml."""
        from toolkit.demo.run import write_project

        folder.mkdir(parents=True, exist_ok=True)
        project_file = write_project(folder)
        text = project_file.read_text(encoding="utf-8")
        assert "    path: lake/sessions/\n" in text, text
        text = text.replace("    path: lake/sessions/\n", f"    path: {json.dumps(str(self.path) + '/')}\n")
        project_file.write_text(text + extra, encoding="utf-8")
        return project_file


_LAKES: dict[tuple[int, int], DemoLake] = {}


def _build(root: Path, sessions: int, seed: int) -> DemoLake:
    from toolkit.warehouse_demo.generate import build_lake

    labels = build_lake(root, sessions=sessions, seed=seed)
    lake = DemoLake(root, sessions, seed, tuple(labels))
    lake.built[:] = _fingerprint(root)
    return lake


@pytest.fixture(scope="session")
def fernhill_lake_of(tmp_path_factory: pytest.TempPathFactory):
    """``fernhill_lake_of(sessions, seed)``: that demo lake, built the first time it is asked for."""

    def lake_of(sessions: int, seed: int) -> DemoLake:
        if (sessions, seed) not in _LAKES:
            root = tmp_path_factory.mktemp(f"fernhill-{sessions}-seed-{seed}", numbered=False)
            _LAKES[sessions, seed] = _build(root, sessions, seed)
        return _LAKES[sessions, seed]

    return lake_of


@pytest.fixture(scope="session")
def fernhill_lake(fernhill_lake_of) -> DemoLake:
    """The shared demo lake: 300,000 sessions, seed 11 (see above)."""
    return fernhill_lake_of(*SHARED_LAKE)


@pytest.fixture(scope="session")
def small_fernhill_lake(fernhill_lake_of) -> DemoLake:
    """The small shared demo lake: 40,000 sessions, seed 3 (see above)."""
    return fernhill_lake_of(*SMALL_LAKE)


@pytest.fixture(autouse=True)
def _shared_lakes_stay_as_built():
    """Fail the test that changed a shared demo lake, and build that lake again for the others."""
    yield
    changed = [lake for lake in _LAKES.values() if _fingerprint(lake.folder) != lake.built]
    for lake in changed:
        _build(lake.folder, lake.sessions, lake.seed)
        lake.built[:] = _fingerprint(lake.folder)
    if changed:
        pytest.fail("changed the shared demo lake " + ", ".join(str(lake.folder) for lake in changed)
                    + ": shared lakes are read-only; copy what a test changes",
                    pytrace=False)


# A project over a test's own lake: no exclude, only the session id and event time named.
PLAIN_PROJECT = ("warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n"
                 "    session_id: session_id\n    event_time: ended_at\n")


def write_rows(lake: Path, schema: str, rows: list[tuple], name: str = "part.parquet") -> Path:
    """Rows of ``schema`` (a column list as in CREATE TABLE) as one Parquet file in ``lake``."""
    import duckdb

    lake.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    con.execute(f"CREATE TABLE t ({schema})")
    if rows:
        con.executemany(f"INSERT INTO t VALUES ({', '.join('?' * len(rows[0]))})", rows)
    con.execute(f"COPY t TO '{lake / name}' (FORMAT parquet)")
    con.close()
    return lake


WALL_CLOCK = {"runs": ("started_at", "finished_at"), "run_checks": ("seconds",)}


def _normal(value):
    """Floats to 12 significant digits (parallel sums may differ in the last bit), maps as items."""
    if isinstance(value, float):
        return float(f"{value:.12g}")
    if isinstance(value, dict):
        return tuple(sorted((k, _normal(v)) for k, v in value.items()))
    if isinstance(value, (list, tuple)):
        return tuple(_normal(v) for v in value)
    return value


def warehouse_contents(warehouse_file: Path, skip: tuple[str, ...] = ()) -> dict[str, list[tuple]]:
    """Every warehouse table's rows, sorted, without wall-clock columns: for comparing states."""
    import duckdb

    from toolkit.engine import warehouse

    con = duckdb.connect(str(warehouse_file), read_only=True)
    try:
        out = {}
        for table in (t for t in warehouse.TABLES if t not in skip):
            names = [r[0] for r in con.execute(f"DESCRIBE {table}").fetchall()]
            keep = [n for n in names if n not in WALL_CLOCK.get(table, ())]
            rows = con.execute(f"SELECT {', '.join(keep)} FROM {table}").fetchall()
            out[table] = sorted((_normal(r) for r in rows), key=repr)
        return out
    finally:
        con.close()


def plimsoll_command(*args: str) -> list[str]:
    """The installed ``plimsoll`` command (the console script beside this Python), for tests that
    need a real process: what a user or a scheduler runs, its entry point included."""
    return [str(Path(sys.executable).with_name("plimsoll")), *args]


def warehouse_query(project, sql: str) -> list[tuple]:
    """Every row of ``sql`` over a loaded project's warehouse, opened read-only for the query."""
    import duckdb

    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()
