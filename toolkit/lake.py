"""Finding a source's Parquet files and reading their schema.

A run is incremental by file: it needs each file's path, size and modification time, so listing is
done here rather than by a glob inside the SQL.
"""

from __future__ import annotations

import glob as globlib
import os
from dataclasses import dataclass
from datetime import datetime, timezone

import duckdb

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


def list_files(path: str) -> list[LakeFile]:
    """Every ``.parquet`` file under a folder (recursively, for hive partitions) or matching a glob."""
    if path.startswith(("s3://", "gs://", "http://", "https://")):
        raise DataError(f"{path}: object-storage lakes are not supported by this version")
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
