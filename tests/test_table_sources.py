"""Delta Lake and Iceberg sources are read exactly once by table version.

A table's files are appended, compacted (the same rows rewritten into new files), deleted from and
vacuumed by its writers. Plimsoll reads what each commit after the last version read added, so the
windows and alerts of a table source equal those of the same sessions arriving as loose Parquet
files, whatever the commits between two runs and however many runs were skipped; a run killed with
SIGKILL changes nothing, and the rerun reads what it would have read.

The sessions are the shared 300,000-session Fernhill lake's (21 days, cut into four batches of
days), through three catalogue checks: time windows of a rate and of a quantile, and count windows.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import plimsoll_command, warehouse_contents
from table_lake import DeltaLake, IcebergLake, day_batches

from toolkit.config.project import load_project
from toolkit.demo.run import PROJECT_YML
from toolkit.engine.runner import run
from toolkit.problems import ProjectInvalid

CHECKS = ("site_errors.yml", "startup_time_by_device.yml", "title_errors.yml")
CATALOGUE = Path(__file__).parent.parent / "checks"
DELETED = "site = 'kids'"


@pytest.fixture(scope="module")
def batches(fernhill_lake) -> list[pa.Table]:
    """The shared lake's sessions in four batches of consecutive days."""
    return day_batches(fernhill_lake.days(), (6, 11, 16))


def write_project(folder: Path, source: str, top: str = "", checks: tuple[str, ...] = CHECKS) -> Path:
    """The demo project's source, read from ``source`` (its format and where), with the ``checks``."""
    folder.mkdir(parents=True, exist_ok=True)
    text = PROJECT_YML.replace("    path: lake/sessions/\n", source)
    (folder / "plimsoll.yml").write_text(text + top, encoding="utf-8")
    (folder / "checks").mkdir(exist_ok=True)
    for name in checks:
        shutil.copyfile(CATALOGUE / name, folder / "checks" / name)
    return folder / "plimsoll.yml"


def results(project: Path) -> dict[str, list[tuple]]:
    """What analysts read: the windows and the alerts, without run ids."""
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    try:
        return {
            "windows": con.execute("SELECT check_name, key_text, split_value, window_start, window_end, sessions, "
                                   "bad, value, threshold, breach FROM windows ORDER BY ALL").fetchall(),
            "alerts": con.execute("SELECT alert_id, check_name, key_text, status, close_reason, opened_at, closed_at, "
                                  "breach_windows, affected_sessions, peak_value FROM alerts ORDER BY ALL").fetchall(),
        }
    finally:
        con.close()


class Plain:
    """The reference: the same sessions as loose Parquet files, one per batch."""

    def __init__(self, folder: Path):
        self.lake = folder / "lake"
        self.lake.mkdir(parents=True)
        self.count = 0

    def source(self) -> str:
        return f"    path: {self.lake}/\n"

    def append(self, batch: pa.Table) -> None:
        pq.write_table(batch, self.lake / f"batch-{self.count}.parquet")
        self.count += 1


def table_of(fmt: str, folder: Path):
    return DeltaLake(folder / "delta") if fmt == "delta" else IcebergLake(folder / "iceberg")


def project_of(fmt: str, folder: Path, table) -> Path:
    return write_project(folder, table.source(), table.catalog_yml() if fmt == "iceberg" else "")


def run_project(project: Path) -> list[str]:
    """One `plimsoll run` through the API; its warnings."""
    return run(load_project(project)).warnings


def without_kids(batch: pa.Table) -> pa.Table:
    import pyarrow.compute as pc

    return batch.filter(pc.invert(pc.equal(batch["site"], "kids")))


class Twins:
    """A table source and its reference, the same sessions as loose Parquet files, each a project;
    a batch appended to one is appended to the other, and a run runs both."""

    def __init__(self, fmt: str, folder: Path):
        self.table = table_of(fmt, folder / "table")
        self.project = project_of(fmt, folder / "table", self.table)
        self.plain = Plain(folder / "plain")
        self.reference = write_project(folder / "plain", self.plain.source())

    def append(self, batch: pa.Table, reference: pa.Table | None = None) -> None:
        self.table.append(batch)
        self.plain.append(batch if reference is None else reference)

    def run(self) -> list[str]:
        """A run of each; the table's warnings."""
        warnings = run_project(self.project)
        run_project(self.reference)
        return warnings

    def same(self) -> bool:
        return results(self.project) == results(self.reference)


@pytest.mark.parametrize("fmt", ["delta", "iceberg"])
def test_append_append_compact_append_delete_append_gives_what_loose_files_give(
        fmt: str, batches: list[pa.Table], tmp_path: Path) -> None:
    twins = Twins(fmt, tmp_path)
    twins.append(batches[0])
    twins.run()
    twins.append(batches[1])
    twins.table.compact()       # no run between the append and the compaction: it was skipped
    twins.run()
    twins.append(batches[2])
    twins.run()
    twins.table.delete(DELETED)  # sessions already counted: not un-counted
    twins.append(batches[3])     # and the run after the delete skipped
    warnings = twins.run()
    assert any("not un-counted" in w for w in warnings), warnings
    assert not any("was the lake copied" in w for w in warnings), warnings
    assert run_project(twins.project) == []   # nothing new, nothing reported twice

    con = duckdb.connect(str(twins.project.parent / "warehouse.duckdb"), read_only=True)
    read = con.execute("SELECT run_id, rows_read FROM runs ORDER BY run_id").fetchall()
    versions = con.execute("SELECT DISTINCT table_version, complete FROM table_versions").fetchall()
    con.close()
    # each run read the sessions its commits appended, the compaction nothing; a Delta delete of
    # counted sessions writes files of counted sessions only, which are not read; pyiceberg's delete
    # is an overwrite (which may add rows): its files are read, their sessions known by their ids
    assert [rows for _, rows in read[:3]] == [batches[0].num_rows, batches[1].num_rows, batches[2].num_rows]
    assert read[3][1] == batches[3].num_rows if fmt == "delta" else read[3][1] > batches[3].num_rows
    assert versions == [(twins.table.version(), True)]

    got, want = results(twins.project), results(twins.reference)
    assert len(want["windows"]) > 1000 and len(want["alerts"]) >= 1
    assert got == want


@pytest.mark.parametrize("compacted", [False, True], ids=["appended", "appended-and-compacted"])
@pytest.mark.parametrize("fmt", ["delta", "iceberg"])
def test_sessions_deleted_before_any_run_read_them_are_never_counted(
        fmt: str, compacted: bool, batches: list[pa.Table], tmp_path: Path) -> None:
    """Deleted from their own files, or from the files a compaction wrote them into."""
    twins = Twins(fmt, tmp_path)
    twins.append(batches[0])
    twins.run()
    twins.append(batches[1], reference=without_kids(batches[1]))
    if compacted:
        twins.table.compact()
    twins.table.delete(DELETED)   # batch 1's kids sessions go before any run read them
    twins.run()
    assert twins.same()


@pytest.mark.parametrize("fmt", ["delta", "iceberg"])
def test_files_compacted_and_vacuumed_before_they_were_read_are_read_through_their_compaction(
        fmt: str, batches: list[pa.Table], tmp_path: Path) -> None:
    twins = Twins(fmt, tmp_path)
    twins.append(batches[0])
    twins.run()
    twins.append(batches[1])
    twins.table.compact()
    twins.table.vacuum()          # batch 1's own files are gone before any run read them
    warnings = twins.run()
    assert any("removed from storage before Plimsoll read them" in w for w in warnings), warnings
    assert twins.same()


def test_a_check_added_later_reads_the_table_as_it_is_now(batches: list[pa.Table], tmp_path: Path) -> None:
    """Its first read is the table's current files, compacted or not, not the commits since the table began."""
    table = DeltaLake(tmp_path / "table" / "delta")
    project = project_of("delta", tmp_path / "table", table)
    (project.parent / "checks" / "title_errors.yml").unlink()
    for batch in batches[:2]:
        table.append(batch)
    run_project(project)
    table.compact()
    table.append(batches[2])
    shutil.copyfile(CATALOGUE / "title_errors.yml", project.parent / "checks" / "title_errors.yml")
    run_project(project)

    plain = Plain(tmp_path / "plain")
    reference = write_project(tmp_path / "plain", plain.source())
    (reference.parent / "checks" / "title_errors.yml").unlink()
    for batch in batches[:2]:
        plain.append(batch)
    run_project(reference)
    plain.append(batches[2])
    shutil.copyfile(CATALOGUE / "title_errors.yml", reference.parent / "checks" / "title_errors.yml")
    run_project(reference)
    assert results(project) == results(reference)


def test_a_backlog_of_a_table_is_read_in_several_runs_and_gives_what_one_run_gives(
        batches: list[pa.Table], tmp_path: Path) -> None:
    """max_read_per_run cuts a first read of the table's snapshot; the runs after finish it."""
    table = DeltaLake(tmp_path / "whole" / "delta")
    for batch in batches:
        table.append(batch)
    whole = project_of("delta", tmp_path / "whole", table)
    run_project(whole)
    parts = write_project(tmp_path / "parts", table.source(), "max_read_per_run: 1MB\n")
    result = run(load_project(parts))
    assert result.first_run_id is not None and result.run_id > result.first_run_id   # several runs
    assert results(parts) == results(whole)


@pytest.mark.parametrize("fmt", ["delta", "iceberg"])
def test_a_run_killed_with_sigkill_changes_nothing_and_the_rerun_reads_what_it_would_have(
        fmt: str, batches: list[pa.Table], tmp_path: Path) -> None:
    table = table_of(fmt, tmp_path / "table")
    project = project_of(fmt, tmp_path / "table", table)
    table.append(batches[0])
    run_project(project)
    table.append(batches[1])
    table.compact()
    before = warehouse_contents(project.parent / "warehouse.duckdb")

    env = dict(os.environ, PYTHONUNBUFFERED="1")
    child = subprocess.Popen([*plimsoll_command(), "run", "-p", str(project)], stderr=subprocess.PIPE,
                             stdout=subprocess.DEVNULL, text=True, env=env, start_new_session=True)
    seen = []
    try:
        for line in child.stderr:
            seen.append(line)
            if "[1/3]" in line:   # the sessions are read and the first check is under way
                break
        os.killpg(child.pid, signal.SIGKILL)
    finally:
        child.wait(timeout=60)
        child.stderr.close()
    assert child.returncode == -signal.SIGKILL, seen
    assert warehouse_contents(project.parent / "warehouse.duckdb") == before

    run_project(project)
    # what the same sessions give read without a kill: the first batch, then the second
    assert results(project) == _uninterrupted(batches, tmp_path / "control")


def _uninterrupted(batches: list[pa.Table], folder: Path) -> dict[str, list[tuple]]:
    plain = Plain(folder)
    reference = write_project(folder, plain.source())
    plain.append(batches[0])
    run_project(reference)
    plain.append(batches[1])
    run_project(reference)
    return results(reference)


def test_a_table_source_needs_its_package_and_its_catalog(tmp_path: Path, batches: list[pa.Table]) -> None:
    table = DeltaLake(tmp_path / "delta")
    table.append(batches[0].slice(0, 1000))
    bad = write_project(tmp_path / "p1", "    format: iceberg\n    table: fernhill.sessions\n")
    with pytest.raises(ProjectInvalid, match="format: iceberg needs iceberg_catalog"):
        load_project(bad)
    bad = write_project(tmp_path / "p2", f"    format: delta\n    path: {tmp_path / 'nowhere'}\n")
    with pytest.raises(ProjectInvalid, match="cannot read the delta table"):
        load_project(bad)
    bad = write_project(tmp_path / "p3", f"    format: delta\n    path: {table.path}\n    table: x.y\n")
    with pytest.raises(ProjectInvalid, match="table applies to format: iceberg"):
        load_project(bad)
    good = write_project(tmp_path / "p4", table.source())
    assert load_project(good).sources["sessions"].format == "delta"


def test_an_iceberg_rest_catalog_that_does_not_answer_is_one_line_naming_the_source(tmp_path: Path) -> None:
    """An http(s) uri is a REST catalog; one that cannot be reached fails validation in one line."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    project = write_project(tmp_path, "    format: iceberg\n    table: fernhill.sessions\n",
                            f"iceberg_catalog:\n  uri: http://127.0.0.1:{port}\n")
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    (line,) = str(caught.value).splitlines()
    assert "source 'sessions'" in line and "fernhill.sessions" in line and f"127.0.0.1:{port}" in line, line


def test_a_commit_that_changes_a_columns_kind_of_type_is_named_as_in_a_parquet_lake(
        batches: list[pa.Table], tmp_path: Path) -> None:
    """Schema evolution follows the Parquet sources' rules: a column a check reads keeps its kind of type."""
    from deltalake import write_deltalake

    from toolkit.problems import DataError

    table = DeltaLake(tmp_path / "delta")
    first = batches[0].slice(0, 20_000)
    table.append(first)
    project = write_project(tmp_path, table.source())
    run_project(project)
    # a writer replaces the table with the sessions' site as a number
    renumbered = first.set_column(first.schema.get_field_index("site"), "site",
                                  pa.array(range(first.num_rows), pa.int64()))
    write_deltalake(str(table.path), renumbered, mode="overwrite", schema_mode="overwrite")
    before = warehouse_contents(project.parent / "warehouse.duckdb")
    with pytest.raises(DataError, match=r"column 'site' is BIGINT, but source 'sessions' has it as VARCHAR"):
        run(_load_runnable(project))
    after = warehouse_contents(project.parent / "warehouse.duckdb", skip=("runs", "run_checks"))
    assert after == {k: v for k, v in before.items() if k not in ("runs", "run_checks")}


def _load_runnable(project: Path):
    """The project as a run loads it (validation reads the table's current schema, now all numbers)."""
    try:
        return load_project(project)
    except ProjectInvalid as err:
        pytest.fail(f"the project should still load: {err}")


def test_an_iceberg_table_rolled_back_reads_on_from_its_current_snapshot(batches: list[pa.Table],
                                                                         tmp_path: Path) -> None:
    """A rollback leaves the snapshot read last out of the table's history: sessions counted stay
    counted, the run says so, and what is appended after is read once."""
    twins = Twins("iceberg", tmp_path)
    for batch in batches[:2]:
        twins.append(batch)
        twins.run()
    twins.table.roll_back_to(twins.table._table().current_snapshot().parent_snapshot_id)
    warnings = run_project(twins.project)
    assert any("no longer in the table's history" in w for w in warnings), warnings
    twins.append(batches[2])
    assert twins.run() == []
    assert twins.same()


SPARK = ("engine: spark\nspark_master: local[2]\nspark_conf:\n  spark.sql.shuffle.partitions: 4\n"
         "  spark.driver.memory: 1g\n")


@pytest.mark.spark
def test_a_delta_source_through_engine_spark_gives_what_duckdb_gives(batches: list[pa.Table], tmp_path: Path) -> None:
    """The files a table's commits added are the files Spark reads: the same windows, appended and
    compacted, as DuckDB's."""
    table = DeltaLake(tmp_path / "delta")
    on_spark = write_project(tmp_path / "spark", table.source(), SPARK, checks=("site_errors.yml",))
    on_duckdb = write_project(tmp_path / "duckdb", table.source(), checks=("site_errors.yml",))
    for project in (on_spark, on_duckdb):   # the viewer sketch is DuckDB's alone
        text = project.read_text(encoding="utf-8")
        project.write_text(text.replace("    viewer_id: viewer_id\n", ""), encoding="utf-8")
    table.append(batches[0])
    for project in (on_spark, on_duckdb):
        run_project(project)
    table.append(batches[1])
    table.compact()
    for project in (on_spark, on_duckdb):
        run_project(project)
    spark, duck = results(on_spark), results(on_duckdb)
    assert len(duck["windows"]) > 100
    assert [w[:7] + w[9:] for w in spark["windows"]] == [w[:7] + w[9:] for w in duck["windows"]]
    assert [a[:9] for a in spark["alerts"]] == [a[:9] for a in duck["alerts"]]


def test_a_compaction_is_no_new_data_for_a_silent_table(batches: list[pa.Table], tmp_path: Path) -> None:
    """max_silence on a table: files a compaction rewrote are not data arriving; an append is."""
    from datetime import datetime, timedelta, timezone

    # the runs' pretend clock starts an hour before the real one: the table's files carry the real
    # time they were written, and a file counts as arrived no later than the run that found it
    start = datetime.now(timezone.utc).replace(tzinfo=None) - timedelta(hours=1)

    def at(minutes: int):
        return lambda: start + timedelta(minutes=minutes)

    table = DeltaLake(tmp_path / "delta")
    table.append(batches[0].slice(0, 5_000))
    table.append(batches[0].slice(5_000, 5_000))
    project = write_project(tmp_path, table.source() + "    max_silence: 30m\n", checks=("site_errors.yml",))
    assert run(load_project(project), clock=at(5)).alarms == []
    silent = run(load_project(project), clock=at(45)).alarms
    assert [(a.alarm, a.action) for a in silent] == [("silent", "opened")]
    table.compact()
    still = run(load_project(project), clock=at(50)).alarms
    assert [(a.alarm, a.action) for a in still] == [("silent", "continued")]
    table.append(batches[0].slice(10_000, 5_000))   # written now: an hour after the start
    flowing = run(load_project(project), clock=at(75)).alarms
    assert [(a.alarm, a.action, a.close_reason) for a in flowing] == [("silent", "closed", "data flowing again")]


def test_run_json_gives_each_checks_table_version_and_the_source_alarms(batches: list[pa.Table],
                                                                         tmp_path: Path) -> None:
    import json

    table = DeltaLake(tmp_path / "delta")
    table.append(batches[0].slice(0, 5_000))
    project = write_project(tmp_path, table.source() + "    max_silence: 1d\n", checks=("site_errors.yml",))
    table.append(batches[0].slice(5_000, 5_000))
    done = subprocess.run([*plimsoll_command(), "run", "-p", str(project), "--json"], capture_output=True,
                          text=True)
    assert done.returncode == 0, done.stderr
    (only,) = json.loads(done.stdout)["runs"]
    assert [c["table_version"] for c in only["checks"]] == [table.version()]
    assert only["alarms"] == []


@pytest.mark.parametrize("fmt", ["delta", "iceberg"])
def test_a_table_source_without_its_package_is_one_line_naming_the_extra(
        fmt: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Not installed: one line for the source, none for the checks that read it."""
    from toolkit.lake import tables

    monkeypatch.setattr(tables, "available", lambda _fmt: False)
    source = (f"    format: delta\n    path: {tmp_path / 'delta'}\n" if fmt == "delta"
              else "    format: iceberg\n    table: fernhill.sessions\n")
    top = f"iceberg_catalog:\n  uri: sqlite:///{tmp_path / 'catalog.db'}\n" if fmt == "iceberg" else ""
    with pytest.raises(ProjectInvalid) as caught:
        load_project(write_project(tmp_path, source, top))
    (line,) = str(caught.value).splitlines()
    assert f"pip install 'plimsoll[{fmt}]'" in line, line
