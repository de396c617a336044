"""Delta Lake and Apache Iceberg sources: which data files a check reads next, by table version.

A folder of loose Parquet files is read incrementally by listing (:mod:`toolkit.lake.files`). A
table format says instead, commit by commit, which files were added and removed and why, so a check
of a table source records the table version it has read (``table_versions``, in the run's
transaction) and next reads what the commits after it added:

- **appends** (Delta ``add`` actions with ``dataChange: true``; Iceberg ``append`` snapshots) are
  read;
- **compaction** (Delta ``OPTIMIZE``, files rewritten with ``dataChange: false``; Iceberg
  ``replace`` snapshots) reads nothing: the rows are the same. A file appended after the last
  version read and compacted before this run is read from its own file, which the table keeps until
  it is vacuumed (expired); if it is already gone, the files that compaction wrote in its place are
  read, and the sessions in them that were counted before are recognised by their ids;
- **deletes, updates, merges and overwrites** (data-changing removes; Iceberg ``overwrite`` and
  ``delete`` snapshots) are reported. Sessions already counted are not un-counted: windows are
  closed history. The files such a commit writes are read, so rows a merge inserts count; rows it
  only rewrote were counted before and are recognised by their session ids (the source's
  ``dedup_horizon``). A file appended and then deleted before any run read it is not read.

A check reading a table for the first time reads the table's current files (its snapshot), not
its whole history. Every data file is named relative to the table's root, and the run's file ledger
(``files_read``) still holds each file read, so a run repeated after a crash reads nothing twice.
"""

from __future__ import annotations

import os
import re
import urllib.parse
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import duckdb

from toolkit.lake import storage
from toolkit.lake.files import LakeFile
from toolkit.model import Catalog, Source, Storage
from toolkit.problems import DataError, engine_message
from toolkit.sql.script import lake_statements

FORMATS = ("parquet", "delta", "iceberg")
DELTA_HINT = "format: delta needs the deltalake package: pip install 'plimsoll[delta]'"
ICEBERG_HINT = "format: iceberg needs pyiceberg: pip install 'plimsoll[iceberg]'"


@dataclass(frozen=True)
class TableState:
    """What a check has read of a table: every commit up to ``version`` (a Delta version, an
    Iceberg snapshot's sequence number), or, while ``complete`` is false, the snapshot at
    ``version`` only in part (a backlog read by several runs)."""

    version: int
    snapshot_id: int | None = None
    complete: bool = True


@dataclass
class Reading:
    """The files a check reads next, and what the commits it passes say."""

    files: list[LakeFile]
    notes: list[str] = field(default_factory=list)


@dataclass
class TableListing:
    """A table as one run sees it: its current version and files, and how to read on from a state."""

    source: Source
    version: int
    snapshot_id: int | None
    active: list[LakeFile]
    root: str = ""                 # the folder or URL the table's files lie under
    _commits: Any = None           # the format's reader of commits after a version
    _cache: dict[Any, Reading] = field(default_factory=dict)

    @property
    def state(self) -> TableState:
        return TableState(self.version, self.snapshot_id, True)

    def since(self, state: TableState | None) -> Reading:
        """The files a check at ``state`` reads: the snapshot's on its first read, then every file
        the commits after its version added and still hold (see the module's rules)."""
        key = None if state is None else (state.version, state.snapshot_id, state.complete)
        if key not in self._cache:
            self._cache[key] = self._since(state)
        return self._cache[key]

    def _since(self, state: TableState | None) -> Reading:
        if state is None:
            return Reading(list(self.active))
        if state.version > self.version and self.source.format == "delta":
            # Delta versions only grow (a restore is a new version): the table was made afresh.
            # (An Iceberg rollback leaves a snapshot out of the current history instead: see there.)
            raise DataError(f"source '{self.source.name}': the table is at version {self.version}, but Plimsoll "
                            f"has read it up to version {state.version}: was it made afresh? "
                            "Rebuild its checks (plimsoll run --rebuild) to read it afresh")
        reading = self._commits(state)
        if not state.complete:
            # a first read left part of its snapshot for the next runs: that snapshot's files too
            snapshot = self._commits.snapshot(state)
            known = {f.path for f in reading.files}
            reading = Reading(reading.files + [f for f in snapshot if f.path not in known], reading.notes)
        return reading


def is_table(source: Source) -> bool:
    return source.format in ("delta", "iceberg")


def available(fmt: str) -> bool:
    """Whether the package reading ``fmt`` tables is installed."""
    import importlib.util

    return importlib.util.find_spec({"delta": "deltalake", "iceberg": "pyiceberg"}[fmt]) is not None


def listing(source: Source) -> TableListing:
    """The table now; a table that cannot be opened is one line naming the source."""
    try:
        if source.format == "delta":
            return _delta_listing(source)
        if source.format == "iceberg":
            return _iceberg_listing(source)
    except DataError:
        raise
    except ImportError as err:
        raise DataError(f"source '{source.name}': {err}") from None
    except Exception as err:  # the formats' own errors have no common base
        raise DataError(f"source '{source.name}': cannot read the {source.format} table at {where(source)}: "
                        f"{_first_line(err)}") from None
    raise ValueError(source.format)


def where(source: Source) -> str:
    if source.format == "iceberg" and source.table:
        uri = re.sub(r"//[^/@]*@", "//", source.catalog.uri) if source.catalog else "(none)"  # no user:password
        return f"{source.table} in the catalog at {uri}"
    return source.path


def _first_line(err: BaseException) -> str:
    text = str(err).strip().splitlines()
    return text[0] if text else type(err).__name__


# ── Delta Lake ──────────────────────────────────────────────────────────────────────────────────

def delta_storage_options(settings: Storage | None) -> dict[str, str]:
    """The object-store settings delta-rs takes, from the project's ``storage`` (for s3:// tables)."""
    settings = settings or Storage()
    options: dict[str, str] = {}
    point = storage.endpoint(settings)
    if point:
        options["AWS_ENDPOINT_URL"] = point
        if point.startswith("http://"):
            options["AWS_ALLOW_HTTP"] = "true"
    region = settings.region or os.environ.get("AWS_DEFAULT_REGION") or os.environ.get("AWS_REGION")
    if region:
        options["AWS_REGION"] = region
    if settings.access_key_env:
        options["AWS_ACCESS_KEY_ID"] = os.environ.get(settings.access_key_env, "")
        options["AWS_SECRET_ACCESS_KEY"] = os.environ.get(settings.secret_key_env or "", "")
    if settings.session_token_env:
        options["AWS_SESSION_TOKEN"] = os.environ.get(settings.session_token_env, "")
    if settings.profile:
        options["AWS_PROFILE"] = settings.profile
    if settings.anonymous:
        options["AWS_SKIP_SIGNATURE"] = "true"
    if settings.addressing_style == "virtual":
        options["AWS_VIRTUAL_HOSTED_STYLE_REQUEST"] = "true"
    return options


def _delta_table(source: Source, version: int | None = None) -> Any:
    try:
        from deltalake import DeltaTable
    except ImportError:
        raise DataError(f"source '{source.name}': {DELTA_HINT}") from None
    options = delta_storage_options(source.storage) if storage.is_remote(source.path) else None
    table = DeltaTable(source.path, version=version, storage_options=options)
    mapping = (table.metadata().configuration or {}).get("delta.columnMapping.mode", "none")
    if mapping != "none":
        raise DataError(f"source '{source.name}': the Delta table at {source.path} maps its column names "
                        f"(delta.columnMapping.mode = {mapping}); its files' columns are not the table's, "
                        "so Plimsoll cannot read them")
    return table


def _delta_files(source: Source, table: Any) -> list[LakeFile]:
    """The table's current data files (its snapshot at ``table``'s version)."""
    import pyarrow

    actions = pyarrow.table(table.get_add_actions(flatten=True)).to_pydict()
    root = source.path.rstrip("/")
    out = []
    for path, size, modified in zip(actions["path"], actions["size_bytes"], actions["modification_time"]):
        name = urllib.parse.unquote(path)
        out.append(LakeFile(name, int(size), _naive(modified), f"{root}/{name}"))
    return sorted(out)


def _delta_listing(source: Source) -> TableListing:
    table = _delta_table(source)
    version, active = int(table.version()), _delta_files(source, table)
    return TableListing(source, version, None, active, source.path.rstrip("/"), _DeltaCommits(source, version, active))


@dataclass
class _DeltaCommits:
    """The Delta commit log after a version, read by DuckDB from ``_delta_log/<version>.json``."""

    source: Source
    version: int
    active: list[LakeFile]   # the table's current files (the listing's)

    def __call__(self, state: TableState) -> Reading:
        if state.version >= self.version:
            return Reading([])
        root = self.source.path.rstrip("/")
        logs = [f"{root}/_delta_log/{v:020d}.json" for v in range(state.version + 1, self.version + 1)]
        named = lake_statements(self.source)
        with duckdb.connect() as con:
            if storage.is_remote(root):
                storage.register(con, self.source.storage)
            try:
                (added,) = named["lake.delta_added"]
                rows = con.execute(added.sql, added.bound({"logs": logs})).fetchall()
                (changes,) = named["lake.delta_changes"]
                changed = con.execute(changes.sql, changes.bound({"logs": logs})).fetchall()
            except duckdb.Error as err:
                raise DataError(f"source '{self.source.name}': cannot read the Delta log after version "
                                f"{state.version} ({engine_message(err)}); if the log was cleaned up, rebuild "
                                "the source's checks (plimsoll run --rebuild)") from None
        if any(row[5] for row in changed):
            return self._through_compaction(state, changed)
        rewrites = _counted_rewrites(changed) if state.complete else set()
        files, missing = [], []
        vectors = [path for path, *_, vector, _held in rows if vector and path not in rewrites]
        for path, size, modified_ms, version, _vector, still_held in rows:
            if path in rewrites:
                continue
            name = urllib.parse.unquote(path)
            lake_file = LakeFile(name, int(size), _from_ms(modified_ms), f"{root}/{name}")
            if still_held or _exists(lake_file.where, self.source.storage):
                files.append(lake_file)
            else:
                missing.append((name, version))
        notes = [_change_note(self.source, version, operation, removed, written or [], rewrites)
                 for version, operation, removed, written, *_ in changed]
        if vectors:
            notes.append(f"source {self.source.name}: {len(vectors)} file(s) read carry a deletion vector (first: "
                         f"{urllib.parse.unquote(vectors[0])}); Plimsoll reads them whole, so rows it deletes count")
        if missing:
            files += _stand_ins(self.source, missing, files, notes, self.active)
        return Reading(sorted(files), notes)

    def snapshot(self, state: TableState) -> list[LakeFile]:
        return _delta_files(self.source, _delta_table(self.source, state.version))

    def _through_compaction(self, state: TableState, changed: list[tuple]) -> Reading:
        """A delete or rewrite of files that a compaction after the version read wrote: the files
        compacted into them may hold rows it deleted, so the table's current files are read instead
        (every one the check has not read), the sessions counted before recognised by their ids."""
        (version, operation, *_), *_ = [row for row in changed if row[5]]
        notes = [_change_note(self.source, v, op, removed, written or [], set()) for v, op, removed, written, *_ in
                 changed]
        notes.append(f"source {self.source.name}: Delta version {version} ({operation}) changed files a compaction "
                     f"after version {state.version} had written: the table's current files are read in place of "
                     "the files compacted into them, so no row it deleted is counted; sessions counted before are "
                     "recognised by their ids")
        return Reading(list(self.active), notes)


def _stand_ins(source: Source, missing: list[tuple[str, int]], files: list[LakeFile],
               notes: list[str], active: list[LakeFile]) -> list[LakeFile]:
    """Appended files compacted and vacuumed before any run read them: the current files that
    compaction wrote since, read in their place (sessions counted before are known by their ids)."""
    known = {f.path for f in files}
    current = [f for f in active if f.path not in known]
    notes.append(f"source {source.name}: {len(missing)} appended file(s) were compacted and removed from storage "
                 f"before Plimsoll read them (first: {missing[0][0]}, version {missing[0][1]}); the table's "
                 "current files were read in their place, repeats of counted sessions recognised by their ids. "
                 "Keep files longer than the time between runs (the table's vacuum retention)")
    return current


# Delta operations that write no row that was not in the files they remove: their files hold only
# sessions already counted when every file they removed was counted
REWRITING_ONLY = ("DELETE", "UPDATE")


def _counted_rewrites(changed: list[tuple]) -> set[str]:
    """The files (log paths) that deletes and updates after the version a check read in full wrote
    in place of files the check had counted: none of their rows is new, so they are not read.

    A file that existed at that version was counted; one a commit after it added was counted only if
    it is itself such a rewrite (a delete of a delete). A merge or an overwrite may bring new rows:
    its files are read, the rows it only rewrote recognised by their session ids."""
    counted: set[str] = set()
    for _version, operation, _removed, written, removed_since, _compacted in changed:
        if operation in REWRITING_ONLY and set(removed_since or []) <= counted:
            counted |= set(written or [])
    return counted


def _change_note(source: Source, version: int, operation: str | None, removed: int, written: list[str],
                 rewrites: set[str]) -> str:
    what = operation or "a commit"
    head = (f"source {source.name}: Delta version {version} ({what}) removed {removed} file(s) of data and wrote "
            f"{len(written)}: sessions counted before are not un-counted")
    if written and set(written) <= rewrites:
        return head + "; the files it wrote hold only sessions already counted and are not read"
    if not written:
        return head
    return (head + "; the files it wrote are read, and the rows it only rewrote are recognised by their session "
            "ids and counted in no window again (the run counts them as duplicate rows, or as late rows when "
            "older than dedup_horizon)")


# ── Apache Iceberg ──────────────────────────────────────────────────────────────────────────────

def catalog(settings: Catalog) -> Any:
    """The project's Iceberg catalog: SQL (a SQLAlchemy URL such as sqlite:///catalog.db) or REST."""
    try:
        from pyiceberg.catalog import load_catalog
    except ImportError:
        raise DataError(ICEBERG_HINT) from None
    properties = dict(settings.properties)
    properties["uri"] = settings.uri
    properties.setdefault("type", "rest" if settings.uri.startswith(("http://", "https://")) else "sql")
    if settings.warehouse:
        properties["warehouse"] = settings.warehouse
    return load_catalog(settings.name, **properties)


def _iceberg_table(source: Source) -> Any:
    if source.catalog is None:
        raise DataError(f"source '{source.name}': format: iceberg needs iceberg_catalog in plimsoll.yml")
    return catalog(source.catalog).load_table(source.table)


def _iceberg_location(path: str) -> str:
    return path[len("file://"):] if path.startswith("file://") else path


def _iceberg_file(root: str, data_file: Any, committed_ms: int) -> LakeFile:
    location = _iceberg_location(data_file.file_path)
    prefix = root.rstrip("/") + "/"
    name = location[len(prefix):] if location.startswith(prefix) else location
    return LakeFile(name, int(data_file.file_size_in_bytes), _from_ms(committed_ms), location)


def _iceberg_snapshot_files(table: Any, snapshot: Any) -> list[LakeFile]:
    if snapshot is None:
        return []
    root = _iceberg_location(table.location())
    out = []
    for task in table.scan(snapshot_id=snapshot.snapshot_id).plan_files():
        out.append(_iceberg_file(root, task.file, snapshot.timestamp_ms))
    return sorted(out)


def _iceberg_listing(source: Source) -> TableListing:
    table = _iceberg_table(source)
    current = table.current_snapshot()
    version = int(current.sequence_number) if current is not None else 0
    snapshot_id = int(current.snapshot_id) if current is not None else None
    active = _iceberg_snapshot_files(table, current)
    return TableListing(source, version, snapshot_id, active, _iceberg_location(table.location()).rstrip("/"),
                        _IcebergCommits(source, table, active))


@dataclass
class _IcebergCommits:
    """The snapshots after one a check read, along the current snapshot's ancestry, by their manifests."""

    source: Source
    table: Any
    active: list[LakeFile]   # the current snapshot's files (the listing's)

    def _ancestry(self) -> list[Any]:
        chain, snapshot = [], self.table.current_snapshot()
        while snapshot is not None:
            chain.append(snapshot)
            parent = snapshot.parent_snapshot_id
            snapshot = self.table.snapshot_by_id(parent) if parent is not None else None
        return list(reversed(chain))

    def __call__(self, state: TableState) -> Reading:
        from pyiceberg.manifest import DataFileContent, ManifestEntryStatus

        chain = self._ancestry()
        ids = [int(s.snapshot_id) for s in chain]
        notes: list[str] = []
        if state.snapshot_id is not None and state.snapshot_id not in ids:
            notes.append(f"source {self.source.name}: snapshot {state.snapshot_id}, read last, is no longer in the "
                         "table's history (rolled back or expired): the current snapshot's files not read before "
                         "are read, repeats of counted sessions recognised by their ids")
            return Reading(list(self.active), notes)
        after = chain[ids.index(state.snapshot_id) + 1:] if state.snapshot_id is not None else \
            [s for s in chain if s.sequence_number > state.version]
        root = _iceberg_location(self.table.location())
        added: dict[str, tuple[LakeFile, int]] = {}
        deleted_by_change: set[str] = set()
        compacted: set[str] = set()      # what replace snapshots after the one read wrote
        through: Any = None              # a change of data to one of those: the snapshot that made it
        for snapshot in after:
            operation = str(snapshot.summary.operation.value if snapshot.summary else "append")
            rewrite = operation == "replace"
            removed = written = 0
            for manifest in snapshot.manifests(self.table.io):
                if manifest.added_snapshot_id != snapshot.snapshot_id:
                    continue  # written by an earlier snapshot: holds nothing this one added or removed
                for entry in manifest.fetch_manifest_entry(self.table.io, discard_deleted=False):
                    if entry.snapshot_id != snapshot.snapshot_id:
                        continue
                    data_file = entry.data_file
                    if data_file.content != DataFileContent.DATA:
                        if entry.status == ManifestEntryStatus.ADDED:
                            notes.append(f"source {self.source.name}: Iceberg snapshot {snapshot.snapshot_id} "
                                         f"({operation}) wrote a delete file; rows it deletes are not un-counted "
                                         "and, in files not read yet, are read")
                        continue
                    path = _iceberg_location(data_file.file_path)
                    if entry.status == ManifestEntryStatus.ADDED:
                        written += 1
                        if rewrite:
                            compacted.add(path)
                        if not rewrite:
                            added[path] = (_iceberg_file(root, data_file, snapshot.timestamp_ms),
                                           int(snapshot.sequence_number))
                    elif entry.status == ManifestEntryStatus.DELETED:
                        removed += 1
                        if not rewrite:
                            deleted_by_change.add(path)
                            if path in compacted and through is None:
                                through = snapshot
            if removed and not rewrite:
                notes.append(f"source {self.source.name}: Iceberg snapshot {snapshot.snapshot_id} ({operation}) "
                             f"removed {removed} file(s) of data and wrote {written}, which are read: sessions "
                             "counted before are not un-counted, and the rows it rewrote are recognised by their "
                             "session ids and counted in no window again (the run counts them as duplicate rows, "
                             "or as late rows when older than dedup_horizon)")
        if through is not None:
            # the files compacted into what it changed may hold rows it deleted: read the table's
            # current files instead (those the check has not read), counted sessions known by id
            notes.append(f"source {self.source.name}: Iceberg snapshot {through.snapshot_id} changed files a "
                         f"compaction after snapshot {state.snapshot_id} had written: the table's current files "
                         "are read in place of the files compacted into them, so no row it deleted is counted; "
                         "sessions counted before are recognised by their ids")
            return Reading(list(self.active), notes)
        files, missing = [], []
        for path, (lake_file, sequence) in added.items():
            if path in deleted_by_change:
                continue  # appended, then deleted or overwritten before any run read it
            if _exists(lake_file.where, self.source.storage):
                files.append(lake_file)
            else:
                missing.append((lake_file.path, sequence))
        if missing:
            known = {f.path for f in files}
            files += [f for f in self.active if f.path not in known]
            notes.append(f"source {self.source.name}: {len(missing)} appended file(s) were rewritten and removed "
                         f"from storage before Plimsoll read them (first: {missing[0][0]}); the table's current "
                         "files were read in their place, repeats of counted sessions recognised by their ids")
        return Reading(sorted(files), notes)

    def snapshot(self, state: TableState) -> list[LakeFile]:
        snapshot = self.table.snapshot_by_id(state.snapshot_id) if state.snapshot_id is not None else None
        return _iceberg_snapshot_files(self.table, snapshot)


# ── shared ──────────────────────────────────────────────────────────────────────────────────────

def _exists(location: str, settings: Storage | None) -> bool:
    if storage.is_remote(location):
        try:
            return bool(storage.filesystem(settings).exists(location[len("s3://"):]))
        except Exception:  # an unreachable store: let the read say why
            return True
    return os.path.exists(location)


def _from_ms(ms: int | None) -> datetime:
    if ms is None:
        return datetime(1970, 1, 1)
    return datetime.fromtimestamp(int(ms) / 1000, tz=timezone.utc).replace(tzinfo=None)


def _naive(value: Any) -> datetime:
    if isinstance(value, datetime):
        return value.astimezone(timezone.utc).replace(tzinfo=None) if value.tzinfo else value
    return _from_ms(value)
