"""Finding a source's Parquet files and reading their schema.

A run is incremental by file: it needs each file's path, size and modification time, so listing is
done here rather than by a glob inside the SQL. Local folders and globs are listed with the
operating system; ``s3://`` URLs through :mod:`toolkit.storage` (size and LastModified).
"""

from __future__ import annotations

import glob as globlib
import os
from dataclasses import dataclass
from datetime import datetime, timezone

import duckdb

from . import storage
from .model import Source, Storage
from .problems import DataError, engine_message
from .sqltext import quote_ident


@dataclass(frozen=True, order=True)
class LakeFile:
    """One Parquet file as seen when listed."""

    path: str
    size: int
    modified_at: datetime


def is_pattern(path: str) -> bool:
    return any(ch in path for ch in "*?[")


def list_source(source: Source) -> list[LakeFile]:
    """The source's files now; an object store that cannot be listed is one line naming the source."""
    try:
        return list_files(source.path, source.storage)
    except storage.StorageError as err:
        raise DataError(f"source '{source.name}': {source.path}: {err}") from None


def list_files(path: str, settings: Storage | None = None) -> list[LakeFile]:
    """Every ``.parquet`` file under a folder or prefix (recursively, for hive partitions), matching
    a glob, or the one file named; raises :class:`storage.StorageError` if the store cannot answer."""
    if storage.is_remote(path):
        return [LakeFile(url, size, modified.astimezone(timezone.utc).replace(tzinfo=None))
                for url, size, modified, _etag in storage.list_objects(path, settings)]
    scheme = storage.unsupported_scheme(path)
    if scheme:
        raise DataError(f"{path}: {scheme} lakes are not supported; use a local path or s3://")
    if is_pattern(path):
        names = sorted(p for p in globlib.glob(path, recursive=True) if os.path.isfile(p))
    elif os.path.isdir(path):
        names = sorted(
            os.path.join(folder, name)
            for folder, dirs, files in os.walk(path)
            for name in files
            if name.endswith(".parquet") and not name.startswith((".", "_"))
        )
    elif os.path.isfile(path):
        names = [path]
    else:
        names = []
    out = []
    for name in names:
        st = os.stat(name)
        stamp = datetime.fromtimestamp(st.st_mtime, tz=timezone.utc).replace(tzinfo=None)
        out.append(LakeFile(os.path.abspath(name), st.st_size, stamp))
    return out


def read_schema(con: duckdb.DuckDBPyConnection, files: list[str]) -> dict[str, str]:
    """Column name -> DuckDB type over all files (union by name), with hive partition columns."""
    if not files:
        return {}
    rows = con.execute(
        "DESCRIBE SELECT * FROM read_parquet($files, hive_partitioning = true, union_by_name = true)",
        {"files": files},
    ).fetchall()
    return {row[0]: row[1] for row in rows}


def schema_table(con: duckdb.DuckDBPyConnection, name: str, columns: dict[str, str]) -> str:
    """An empty temp table with the source's columns, for binding expressions at validate time."""
    table = f"schema_of_{name}"
    cols = ", ".join(f"{quote_ident(c)} {t}" for c, t in columns.items())
    con.execute(f"CREATE OR REPLACE TEMP TABLE {quote_ident(table)} ({cols})")
    return table


# Type families: a column may widen (INTEGER to BIGINT, FLOAT to DOUBLE) between files, not change kind.
_FAMILIES = (
    ("number", ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
                "UINTEGER", "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "DECIMAL")),
    ("text", ("VARCHAR",)),
    ("time", ("TIMESTAMP", "TIMESTAMP_NS", "TIMESTAMP_MS", "TIMESTAMP_S", "TIMESTAMP WITH TIME ZONE", "DATE")),
    ("boolean", ("BOOLEAN",)),
)


def type_family(duckdb_type: str) -> str:
    """The kind of a column's type (``DECIMAL(9,2)`` and ``BIGINT`` are both numbers)."""
    base = duckdb_type.split("(")[0].strip().upper()
    return next((name for name, members in _FAMILIES if base in members), base)


def hive_columns(path: str) -> set[str]:
    """Partition columns named by the folders of a hive-partitioned path (``day=2026-11-02``)."""
    return {part.split("=", 1)[0] for part in path.replace("\\", "/").split("/")[:-1] if "=" in part}


def file_columns(paths: list[str], settings: Storage | None = None) -> dict[str, dict[str, str]]:
    """Each file's top-level columns and DuckDB types, read from the Parquet footers only.

    A file that is not readable Parquet (truncated, corrupt, not Parquet at all) is named. Read on
    a connection of its own, so a failure never aborts the run's transaction.
    """
    with duckdb.connect() as con:
        if any(storage.is_remote(p) for p in paths):
            storage.register(con, settings)
        return _file_columns(con, paths)


def _file_columns(con: duckdb.DuckDBPyConnection, paths: list[str]) -> dict[str, dict[str, str]]:
    try:
        rows = con.execute(
            "SELECT file_name, name, duckdb_type FROM parquet_schema($files) "
            "WHERE duckdb_type IS NOT NULL", {"files": paths}).fetchall()
    except duckdb.Error:
        for path in paths:
            try:
                con.execute("SELECT 1 FROM parquet_schema($f) LIMIT 1", {"f": [path]}).fetchall()
            except duckdb.Error as err:
                detail = engine_message(err)
                raise DataError(f"{path}: not a readable Parquet file ({detail})") from None
        raise
    found: dict[str, dict[str, str]] = {p: {} for p in paths}
    for path, name, kind in rows:
        found.setdefault(path, {}).setdefault(name, kind)
    return found


def check_new_files(con: duckdb.DuckDBPyConnection, source_name: str, paths: list[str],
                    needed: list[str], readers: list[str], settings: Storage | None = None) -> None:
    """Refuse new files that lack a column the checks read, or hold one of another kind of type.

    Without this, reading many files by name would quietly fill a missing column with NULL and
    widen a mistyped one to text. Types are compared with the first file that had the column, as
    recorded in ``source_columns``; this run's first file sets them for new columns.
    """
    known = {name: (kind, first) for name, kind, first in con.execute(
        "SELECT column_name, column_type, first_path FROM source_columns WHERE source_name = $s",
        {"s": source_name}).fetchall()}
    who = ", ".join(readers)
    for path, columns in sorted(file_columns(paths, settings).items()):
        partitions = hive_columns(path)
        for name in needed:
            if name in partitions:
                continue
            if name not in columns:
                raise DataError(f"{path}: column '{name}' is missing; source '{source_name}' needs it "
                                f"for {who}")
            if name not in known:
                known[name] = (columns[name], path)
                con.execute("INSERT INTO source_columns VALUES ($s, $c, $t, $p)",
                            {"s": source_name, "c": name, "t": columns[name], "p": path})
            elif type_family(columns[name]) != type_family(known[name][0]):
                raise DataError(f"{path}: column '{name}' is {columns[name]}, but source '{source_name}' "
                                f"had it as {known[name][0]} (in {known[name][1]})")
