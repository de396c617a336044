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
from .problems import DataError
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
