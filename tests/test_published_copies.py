"""The Parquet copies a run publishes beside the warehouse for readers: after any sequence of runs
(new files, nothing new, a rebuild, a removed check) they hold exactly the warehouse's tables; the
`windows` copy grows by a part per run instead of being written whole; a reader while a run holds
the warehouse sees the previous run's tables."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import duckdb
import pytest

from conftest import FIXTURE_LAKE, PROJECT, _normal, write_project
from toolkit.config.project import load_project
from toolkit.engine import warehouse
from toolkit.engine.runner import run
from toolkit.sql.script import PUBLISHED

GOLDEN = Path(__file__).parent / "golden"
# a reader in its own process: every published table as open_for_reading gives it, as sorted reprs
READER = """
import json, sys
from conftest import _normal
from toolkit.config.project import load_project
from toolkit.engine import warehouse
from toolkit.sql.script import PUBLISHED
con = warehouse.open_for_reading(load_project(sys.argv[1]))
assert con.execute("SELECT count(*) FROM duckdb_views() WHERE view_name = 'windows'").fetchone()[0] == 1
print(json.dumps({t: [repr(r) for r in sorted((_normal(r) for r in con.execute(f"SELECT * FROM {t}").fetchall()), key=repr)]
                  for t in PUBLISHED}))
"""
CHECKS = ("title_decode_errors.yml", "site_failures_p_chart.yml")
HOURS = 12  # the fixture lake's two days cut into this many files, each landing before its own run


def cut_lake(lake: Path) -> list[Path]:
    """The fixture lake as HOURS files (4-hour slices of its two days), written to a spare folder."""
    spare = lake.parent / "slices"
    spare.mkdir(parents=True)
    con = duckdb.connect()
    out = []
    for i in range(HOURS):
        path = spare / f"slice-{i:02d}.parquet"
        con.execute(
            f"COPY (SELECT * FROM read_parquet('{FIXTURE_LAKE}/*/*.parquet') "
            f"WHERE (datediff('hour', TIMESTAMP '2026-11-02', ended_at) // 4) = {i} ORDER BY ended_at) "
            f"TO '{path}' (FORMAT parquet)")
        out.append(path)
    con.close()
    return out


def land(lake: Path, piece: Path) -> None:
    lake.mkdir(exist_ok=True)
    os.link(piece, lake / piece.name)


def project_file(tmp_path: Path, checks: tuple[str, ...] = CHECKS) -> Path:
    lake = tmp_path / "lake"
    for old in (tmp_path / "checks").glob("*.yml") if (tmp_path / "checks").exists() else ():
        old.unlink()
    return write_project(tmp_path, {name: (GOLDEN / name).read_text() for name in checks},
                         project=PROJECT.format(lake=lake))


def rows(con: duckdb.DuckDBPyConnection, sql: str) -> list[tuple]:
    return sorted((_normal(r) for r in con.execute(sql).fetchall()), key=repr)


def published_equals_warehouse(tmp_path: Path) -> None:
    """Every published table, read as a reader reads it, against the warehouse's table."""
    project = load_project(tmp_path / "plimsoll.yml")
    folder = warehouse.snapshot_folder(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        for table in PUBLISHED:
            copy = rows(con, f"SELECT * FROM read_parquet('{warehouse.published_glob(folder, table)}')")
            assert copy == rows(con, f"SELECT * FROM {table}"), table
    finally:
        con.close()


def windows_parts(tmp_path: Path) -> dict[str, int]:
    """The files of the published windows copy: name -> inode (a part kept is the same file)."""
    folder = tmp_path / "warehouse_tables" / "windows"
    return {p.name: p.stat().st_ino for p in folder.glob("*.parquet")}


@pytest.fixture
def slices(tmp_path: Path) -> list[Path]:
    return cut_lake(tmp_path / "lake")


def test_copies_equal_the_warehouse_after_runs_a_rebuild_and_a_removed_check(
        tmp_path: Path, slices: list[Path], monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(warehouse, "MERGE_PARTS", 3)  # merges after a few runs, not eight
    project_file(tmp_path)
    seen_parts: list[dict[str, int]] = []
    for piece in slices[:9]:
        land(tmp_path / "lake", piece)
        run(load_project(tmp_path / "plimsoll.yml"))
        published_equals_warehouse(tmp_path)
        seen_parts.append(windows_parts(tmp_path))
    # each run added a part and kept the others as they were (the same files), merging three parts of
    # one level into one of the next: never the whole table written again
    for before, after in zip(seen_parts, seen_parts[1:]):
        kept = set(before) & set(after)
        assert kept and all(before[name] == after[name] for name in kept)
        assert len(set(after) - set(before)) <= 1
    assert any(name.endswith("-01.parquet") for name in seen_parts[-1])  # three runs' parts merged
    assert len(seen_parts[-1]) <= 1 + 2 * 2  # the whole first run, and at most two parts per level

    run(load_project(tmp_path / "plimsoll.yml"))  # nothing new
    published_equals_warehouse(tmp_path)
    assert windows_parts(tmp_path) == seen_parts[-1]

    land(tmp_path / "lake", slices[9])
    run(load_project(tmp_path / "plimsoll.yml"), ["site_failures_p_chart"], rebuild=True)
    published_equals_warehouse(tmp_path)
    rebuilt = windows_parts(tmp_path)
    assert len(rebuilt) == 1 and not set(rebuilt) & set(seen_parts[-1])  # written whole again

    land(tmp_path / "lake", slices[10])
    project_file(tmp_path, CHECKS[:1])  # site_failures_p_chart removed: its windows go
    run(load_project(tmp_path / "plimsoll.yml"))
    published_equals_warehouse(tmp_path)
    con = duckdb.connect()
    checks = con.execute(f"SELECT DISTINCT check_name FROM '{tmp_path}/warehouse_tables/windows/*.parquet'").fetchall()
    assert checks == [("title_decode_errors",)]
    # pandas reads the folder as the README shows (the copy's bookkeeping file is hidden from it)
    import pandas as pd

    assert len(pd.read_parquet(tmp_path / "warehouse_tables" / "windows")) == con.execute(
        f"SELECT count(*) FROM '{tmp_path}/warehouse_tables/windows/*.parquet'").fetchone()[0] > 0
    # only the latest copy and the one before it are kept beside the link
    assert len(list((tmp_path / "warehouse_tables").glob(".windows-*"))) == 2


def test_a_copy_of_an_earlier_release_is_replaced(tmp_path: Path, slices: list[Path]) -> None:
    project_file(tmp_path)
    land(tmp_path / "lake", slices[0])
    run(load_project(tmp_path / "plimsoll.yml"))
    folder = tmp_path / "warehouse_tables"
    # as an earlier release left it: one windows.parquet, and the folder gone
    (folder / "windows").unlink()
    for copy in folder.glob(".windows-*"):
        for f in copy.iterdir():
            f.unlink()
        copy.rmdir()
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"))
    con.execute(f"COPY windows TO '{folder / 'windows.parquet'}' (FORMAT parquet)")
    con.close()
    land(tmp_path / "lake", slices[1])
    run(load_project(tmp_path / "plimsoll.yml"))
    assert not (folder / "windows.parquet").exists()
    published_equals_warehouse(tmp_path)


def test_a_reader_during_a_run_sees_the_previous_runs_tables(tmp_path: Path, slices: list[Path]) -> None:
    project_file(tmp_path)
    for piece in slices[:3]:
        land(tmp_path / "lake", piece)
        run(load_project(tmp_path / "plimsoll.yml"))
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    before = {table: rows(con, f"SELECT * FROM {table}") for table in PUBLISHED}
    con.close()
    land(tmp_path / "lake", slices[3])

    holding, release = threading.Event(), threading.Event()

    def pause(line: str) -> None:
        if "title_decode_errors: " in line and not holding.is_set():  # the check's stages are done
            holding.set()
            assert release.wait(120)

    project = load_project(tmp_path / "plimsoll.yml")
    worker = threading.Thread(target=run, args=(project,), kwargs={"progress": pause})
    worker.start()
    try:
        assert holding.wait(120)
        # another process (this one's DuckDB holds the file): the warehouse is held, so the copies
        reader = subprocess.run([sys.executable, "-c", READER, str(tmp_path / "plimsoll.yml")],
                                capture_output=True, text=True, cwd=Path(__file__).parent, check=True)
        seen = json.loads(reader.stdout)
    finally:
        release.set()
        worker.join()
    assert seen == {table: [repr(r) for r in found] for table, found in before.items()}
    published_equals_warehouse(tmp_path)
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    assert rows(con, "SELECT * FROM windows") != before["windows"]
    con.close()
