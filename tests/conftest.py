"""Shared fixtures: temp projects over the small committed lake in tests/fixtures/lake."""

from __future__ import annotations

import textwrap
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


WALL_CLOCK = {"runs": ("started_at", "finished_at")}


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
    """The installed ``plimsoll`` command, for tests that need a real process.

    Not ``python -m toolkit.cli``: run from the repository, that imports the source tree, whose
    layout is not the installed package's (the templates are installed as ``toolkit.queries``).
    """
    import sys

    return [str(Path(sys.executable).with_name("plimsoll")), *args]
