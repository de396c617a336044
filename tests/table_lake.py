"""Delta Lake and Iceberg tables of Fernhill demo sessions, changed as a lake's writers change them:
appended, compacted, deleted from, vacuumed. For ``tests/test_table_sources.py``.

Each table is written by the format's own library (``deltalake``, ``pyiceberg`` over a SQLite
catalog), offline, in a test's folder. Compaction is what maintenance jobs do: Delta's OPTIMIZE
(``dataChange: false``), and for Iceberg a ``replace`` snapshot that swaps the data files for one
holding the same rows (pyiceberg has no compaction of its own, so it is committed here through its
snapshot producer with the ``replace`` operation).
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

ICEBERG_TABLE = "fernhill.sessions"


def day_batches(days: list[Path], cuts: tuple[int, ...]) -> list[pa.Table]:
    """The sessions of the day folders, cut into consecutive batches at the day indexes ``cuts``."""
    edges = (0, *cuts, len(days))
    out = []
    for start, end in zip(edges, edges[1:]):
        files = sorted(f for day in days[start:end] for f in day.glob("*.parquet"))
        out.append(pa.concat_tables([pq.read_table(f) for f in files]).combine_chunks())
    return out


class DeltaLake:
    """A Delta table at ``path``, changed through deltalake."""

    def __init__(self, path: Path):
        self.path = path

    def source(self) -> str:
        return f"    format: delta\n    path: {self.path}\n"

    def append(self, batch: pa.Table) -> None:
        from deltalake import write_deltalake

        write_deltalake(str(self.path), batch, mode="append")

    def compact(self) -> None:
        from deltalake import DeltaTable

        DeltaTable(str(self.path)).optimize.compact()

    def delete(self, predicate: str) -> None:
        from deltalake import DeltaTable

        DeltaTable(str(self.path)).delete(predicate)

    def vacuum(self) -> None:
        """Remove every file the table no longer holds, at once."""
        from deltalake import DeltaTable

        DeltaTable(str(self.path)).vacuum(retention_hours=0, enforce_retention_duration=False, dry_run=False)

    def version(self) -> int:
        from deltalake import DeltaTable

        return DeltaTable(str(self.path)).version()


class IcebergLake:
    """An Iceberg table in a SQLite catalog in ``folder``, changed through pyiceberg."""

    def __init__(self, folder: Path):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)

    def catalog_yml(self) -> str:
        return (f"iceberg_catalog:\n  uri: sqlite:///{self.folder / 'catalog.db'}\n"
                f"  warehouse: {self.folder / 'warehouse'}\n")

    def source(self) -> str:
        return f"    format: iceberg\n    table: {ICEBERG_TABLE}\n"

    def _catalog(self):
        from pyiceberg.catalog.sql import SqlCatalog

        return SqlCatalog("plimsoll", uri=f"sqlite:///{self.folder / 'catalog.db'}",
                          warehouse=f"file://{self.folder / 'warehouse'}")

    def _table(self, batch: pa.Table | None = None):
        catalog = self._catalog()
        if not catalog.table_exists(ICEBERG_TABLE):
            catalog.create_namespace_if_not_exists("fernhill")
            return catalog.create_table(ICEBERG_TABLE, schema=batch.schema)
        return catalog.load_table(ICEBERG_TABLE)

    def append(self, batch: pa.Table) -> None:
        self._table(batch).append(batch)

    def compact(self) -> None:
        """One ``replace`` snapshot: every data file swapped for one file of the same rows."""
        from pyiceberg.io.pyarrow import _dataframe_to_data_files
        from pyiceberg.table.snapshots import Operation
        from pyiceberg.table.update.snapshot import _OverwriteFiles

        class Rewrite(_OverwriteFiles):
            """pyiceberg totals the summary of append, overwrite and delete only: total it as an
            overwrite, then say what it is (the totals are the same: no rows change)."""

            def _summary(self, snapshot_properties=None):
                self._operation = Operation.OVERWRITE
                try:
                    summary = super()._summary(snapshot_properties or {})
                finally:
                    self._operation = Operation.REPLACE
                return Summary(Operation.REPLACE, **summary.additional_properties)

        from pyiceberg.table.snapshots import Summary

        table = self._table()
        rows = table.scan().to_arrow()
        old = [task.file for task in table.scan().plan_files()]
        with table.transaction() as tx:
            rewrite = Rewrite(operation=Operation.REPLACE, transaction=tx, io=table.io)
            with rewrite as commit:
                for data_file in old:
                    commit.delete_data_file(data_file)
                for data_file in _dataframe_to_data_files(tx.table_metadata, rows, table.io):
                    commit.append_data_file(data_file)

    def delete(self, predicate: str) -> None:
        self._table().delete(predicate)

    def vacuum(self) -> None:
        """Remove from storage every data file the current snapshot does not hold."""
        table = self._table()
        held = {task.file.file_path.removeprefix("file://") for task in table.scan().plan_files()}
        for data in (self.folder / "warehouse").rglob("*.parquet"):
            if str(data) not in held:
                data.unlink()

    def snapshot_id(self) -> int:
        return self._table().current_snapshot().snapshot_id

    def roll_back_to(self, snapshot_id: int) -> None:
        self._table().manage_snapshots().rollback_to_snapshot(snapshot_id).commit()

    def version(self) -> int:
        return self._table().current_snapshot().sequence_number
