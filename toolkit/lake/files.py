"""Finding a source's Parquet files and reading their schema.

A run is incremental by file: it needs each file's path, size and modification time, so listing is
done here rather than by a glob inside the SQL. Local folders and globs are listed with the
operating system; ``s3://`` URLs through :mod:`toolkit.lake.storage` (size and LastModified).
"""

from __future__ import annotations

import glob as globlib
import os
import re
from dataclasses import dataclass
from datetime import datetime, timezone

import duckdb

from toolkit.lake import storage
from toolkit.model import Check, Source, Storage
from toolkit.problems import DataError, engine_message
from toolkit.sql.compiler import columns_read
from toolkit.sql.quoting import quote_ident
from toolkit.sql.script import lake_statements
from toolkit.sql.templates import Named


@dataclass(frozen=True, order=True)
class LakeFile:
    """One Parquet file as seen when listed: its name in the warehouse (``path``: relative to the
    source's base, see :func:`base_of`), size and modification time, and where it is read from."""

    path: str
    size: int
    modified_at: datetime
    location: str = ""

    @property
    def where(self) -> str:
        """The absolute path or URL the engines read."""
        return self.location or self.path


def is_pattern(path: str) -> bool:
    """A glob, unless a file or folder of exactly that name exists (lake folders may hold '[')."""
    if not any(ch in path for ch in "*?["):
        return False
    return storage.is_remote(path) or not os.path.exists(path)


def base_of(path: str) -> str:
    """What a source's files are named relative to in the warehouse: its folder or object prefix,
    a glob's fixed part before the first wildcard, or a single file's folder. Recording names
    relative to it lets a project or its lake move without every file looking new."""
    if storage.is_remote(path):
        head = re.split(r"[*?\[]", path, maxsplit=1)[0]
        return head.rstrip("/") if head.endswith("/") else head.rsplit("/", 1)[0]
    if os.path.isdir(path):
        return os.path.abspath(path)
    if is_pattern(path):
        head = re.split(r"[*?\[]", path, maxsplit=1)[0]
        return os.path.abspath(head if head.endswith(os.sep) else os.path.dirname(head))
    return os.path.abspath(os.path.dirname(path))


def relative_to(base: str, location: str) -> str:
    """``location``'s name below ``base`` (with '/' separators); the location itself when it is
    not below it."""
    prefix = base.rstrip("/") + "/"
    location_posix = location.replace(os.sep, "/") if not storage.is_remote(location) else location
    prefix = prefix.replace(os.sep, "/") if not storage.is_remote(base) else prefix
    return location_posix[len(prefix):] if location_posix.startswith(prefix) else location


def list_source(source: Source) -> list[LakeFile]:
    """The source's files now, named relative to its base; an object store that cannot be listed
    is one line naming the source."""
    try:
        found = list_files(source.path, source.storage)
    except storage.StorageError as err:
        raise DataError(f"source '{source.name}': {source.path}: {err}") from None
    base = source.base or base_of(source.path)
    return [LakeFile(relative_to(base, f.path), f.size, f.modified_at, f.path) for f in found]


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
    ("time", ("TIMESTAMP", "TIMESTAMP_NS", "TIMESTAMP_MS", "TIMESTAMP_S", "TIMESTAMP WITH TIME ZONE",
              "TIMESTAMPTZ", "TIMESTAMPTZ_NS", "TIMESTAMP_NS WITH TIME ZONE", "DATE")),
    ("boolean", ("BOOLEAN",)),
)


def type_family(duckdb_type: str) -> str:
    """The kind of a column's type (``DECIMAL(9,2)`` and ``BIGINT`` are both numbers)."""
    base = duckdb_type.split("(")[0].strip().upper()
    return next((name for name, members in _FAMILIES if base in members), base)


def hive_columns(path: str) -> set[str]:
    """Partition columns named by the folders of a hive-partitioned path (``day=2026-11-02``)."""
    return set(hive_values(path))


def hive_values(path: str) -> dict[str, str]:
    """The ``column=value`` folders of a path, as DuckDB's hive partitioning reads them."""
    found: dict[str, str] = {}
    for part in path.replace("\\", "/").split("/")[:-1]:
        if "=" in part:
            key, value = part.split("=", 1)
            found[key] = value
    return found


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
    footers = lake_statements(None)
    try:
        rows = _execute(con, footers, "lake.footers", {"files": paths})
    except duckdb.Error:
        for path in paths:
            try:
                _execute(con, footers, "lake.footer", {"files": [path]})
            except duckdb.Error as err:
                detail = engine_message(err)
                raise DataError(f"{path}: not a readable Parquet file ({detail})") from None
        raise
    found: dict[str, dict[str, str]] = {p: {} for p in paths}
    for path, name, kind in rows:
        found.setdefault(path, {}).setdefault(name, kind)
    return found


def readable_footers(paths: list[str], settings: Storage | None = None) -> dict[str, dict[str, str]]:
    """Each readable file's top-level columns and types (footers only); unreadable files left out."""
    with duckdb.connect() as con:
        if any(storage.is_remote(p) for p in paths):
            storage.register(con, settings)
        try:
            return _file_columns(con, paths)
        except (DataError, duckdb.Error):
            pass
        found: dict[str, dict[str, str]] = {}
        for path in paths:
            try:
                found.update(_file_columns(con, [path]))
            except (DataError, duckdb.Error):
                continue
        return found


def agreeing_files(footers: dict[str, dict[str, str]]) -> list[str]:
    """The files whose every column has the kind of type most files give it (ties: the first file's).

    One file that turned a number into text must not change what the whole source looks like; the
    run that reads it names it instead.
    """
    votes: dict[str, dict[str, int]] = {}
    first: dict[str, str] = {}
    for path in sorted(footers):
        for name, kind in footers[path].items():
            family = type_family(kind)
            votes.setdefault(name, {}).setdefault(family, 0)
            votes[name][family] += 1
            first.setdefault(name, family)
    chosen = {name: max(counts, key=lambda f: (counts[f], f == first[name])) for name, counts in votes.items()}
    return [path for path in sorted(footers)
            if all(type_family(kind) == chosen[name] for name, kind in footers[path].items())]


def check_new_files(con: duckdb.DuckDBPyConnection, source: Source, files: list[LakeFile],
                    needed: list[str], readers: list[Check]) -> None:
    """Refuse new files that lack a column the checks read, hold one of another kind of type, or
    sit in a partition folder that contradicts their own column.

    Without this, reading many files by name would quietly fill a missing column with NULL, widen
    a mistyped one to text, or re-attribute sessions to the folder's value. Types are compared
    with those recorded in ``source_columns`` (the types validation found in most of the source's
    files, recorded when a run first reads the column), so one odd file is named whatever its order.
    """
    recorded = lake_statements(source)
    known = {name: (kind, first) for name, kind, first in _execute(con, recorded, "lake.known_columns",
                                                                    {"source": source.name})}
    named = {f.where: f for f in files}
    times = set(source.time_columns)
    for location, columns in sorted(file_columns(list(named), source.storage).items()):
        partitions = hive_values(location)
        _check_partitions(location, partitions, columns, times, needed, source.storage)
        for name in needed:
            if name in partitions:
                continue
            if name not in columns:
                raise DataError(f"{location}: column '{name}' is missing; {_who_reads(source, readers, name)}")
            if name not in known:
                kind = source.columns.get(name) or columns[name]
                known[name] = (kind, named[location].path)
                _execute(con, recorded, "lake.record_column",
                         {"source": source.name, "column": name, "type": kind, "path": named[location].path})
            if type_family(columns[name]) != type_family(known[name][0]):
                raise DataError(f"{location}: column '{name}' is {columns[name]}, but source '{source.name}' "
                                f"has it as {known[name][0]} (first read in {known[name][1]})")


def _who_reads(source: Source, readers: list[Check], name: str) -> str:
    """Who needs a column: the source itself (its session id, event time, exclude or viewer id), or
    the checks that read it, and only those."""
    own = [what for what, columns in (("session_id", (source.session_id,)), ("event_time", source.time_columns),
                                      ("exclude", source.exclude.columns if source.exclude else ()),
                                      ("viewer_id", (source.viewer_id,) if source.viewer_id else ()))
           if name in columns]
    if own:
        return f"source '{source.name}' reads it for its {' and '.join(own)}"
    checks = [c.name for c in readers if name in columns_read([c])]
    return f"check{'s' if len(checks) != 1 else ''} {', '.join(checks)} of source '{source.name}' read{'s' if len(checks) == 1 else ''} it"


def _check_partitions(location: str, partitions: dict[str, str], columns: dict[str, str], times: set[str],
                      needed: list[str], settings: Storage | None) -> None:
    """A partition folder may not name the event-time column, nor say otherwise than the file's own
    column: DuckDB would take the folder's value and silently move the file's sessions."""
    for key, value in partitions.items():
        if key in times:
            raise DataError(f"{location}: partition folder '{key}={value}' is named after the event-time "
                            f"column '{key}', which would replace every session's time with the folder's "
                            "value; name the folder after another column (e.g. day=...)")
        if key not in columns or key not in needed:
            continue
        if not re.fullmatch(r"[A-Z0-9_(), ]+", columns[key]):
            raise DataError(f"{location}: column '{key}' has a type Plimsoll cannot compare: {columns[key]}")
        check = lake_statements(None, {"column": key, "type": columns[key]})
        with duckdb.connect() as con:
            if storage.is_remote(location):
                storage.register(con, settings)
            (row,) = _execute(con, check, "lake.partition", {"files": [location], "value": value})
        if row[0]:
            raise DataError(f"{location}: partition folder '{key}={value}' contradicts the file's own column "
                            f"'{key}' ({row[0]} sessions say '{row[1]}'); fix the file or the folder, "
                            "so no session is counted under the wrong value")


def first_event_times(con: duckdb.DuckDBPyConnection, source: Source, files: list[LakeFile]) -> dict[str, datetime]:
    """Each file's earliest sane event time (finite, no later than max_future after the file was
    written), for reading a backlog in data-time order; a file without one is left out."""
    if not files:
        return {}
    limits = [f.modified_at + source.max_future for f in files]
    rows = _execute(con, lake_statements(source), "lake.first_event_times",
                    {"files": [f.where for f in files], "limits": limits})
    return {files[index].path: first for index, first in rows}


def _execute(con: duckdb.DuckDBPyConnection, named: Named, name: str, params: dict[str, object]) -> list[tuple]:
    """One of the lake's named statements (``queries/lake.sql``): every row it gives."""
    (statement,) = named[name]
    return con.execute(statement.sql, statement.bound(params)).fetchall()
