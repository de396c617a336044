"""The warehouse file: opening it, creating its tables, the settings every connection gets, the one
writer at a time, and the Parquet copies that readers use while a run holds the file.

DuckDB lets one process write a database file and refuses every other process, readers included,
while it does. So a run announces itself in a small file beside the warehouse (who, since when), and
after each run the tables analysts read are published as Parquet beside it, each written to a temp
name and renamed, so a reader never sees half a file and never waits for a run. The windows table,
which grows with every run, is published as a folder of parts to which each run adds its own rows.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import duckdb

from toolkit.lake import storage
from toolkit.sql.script import PUBLISHED, connection_statements, layout_statements, publish_statements
from toolkit.sql.templates import Named, render, statements, template_folder
from toolkit.model import Project
from toolkit.problems import DataError, RunLocked, WarehouseError, engine_message

TABLES = ("runs", "run_checks", "files_read", "changed_files", "source_columns", "session_ids",
          "check_state", "key_state", "carry", "key_windows", "windows", "alerts", "alert_events",
          "alert_causes", "incidents", "incident_events", "table_versions", "series_state", "schema_version")
# The layout this release writes (the schema_version table): 2 names files relative to their
# source, 3 renames columns (CHANGELOG.md), 4 adds the impact columns (queries/migrate_4.sql), 5
# adds causes and incidents (new tables and alerts.incident_id; the next run fills them), 6 the
# table versions Delta and Iceberg sources are read by, and source alarms (columns of alerts,
# alert_events and incidents); nothing to fill. 7: what the baselines read per series
# (series_state, key_state.recent), filled from the stored windows (queries/migrate_7.sql). 8: no
# table changed; the verdict SQL did (its loop settles on the windows' place in the history).
SCHEMA_VERSION = 8
POLL_SECONDS = 0.25
# A run's temp tables live until its one transaction commits, so without a limit its memory grows
# with checks x sessions; at this limit DuckDB spills to disk instead. The limit bounds DuckDB's
# buffer pool; the process peaks about 650 MiB above it (measured on the first run of the 11-check
# demo catalogue over 30 days of a 20M-session lake: 2,240 MiB at 1600MB, 2,028 MiB at this
# limit), so a run stays within 2 GiB.
DEFAULT_MEMORY_LIMIT = "1400MB"


def connect(project: Project, read_only: bool = False, wait: float = 0.0) -> duckdb.DuckDBPyConnection:
    """Open (and on first use create) the warehouse, with UTC time and the project's limits.

    While another process holds the file, retry for up to ``wait`` seconds, then raise
    :class:`RunLocked` naming the run that holds it.
    """
    path = Path(project.warehouse)
    if read_only and not path.exists():
        raise FileNotFoundError(f"{path}: no warehouse yet; run `plimsoll run` first")
    if path.is_dir():
        raise WarehouseError(f"{path}: is a folder; `warehouse:` in {project.file.name} must name a file, "
                             "e.g. warehouse.duckdb")
    if path.exists() and not path.is_file():
        raise WarehouseError(f"{path}: is not a regular file (a device or a pipe); `warehouse:` in "
                             f"{project.file.name} must name a file, e.g. warehouse.duckdb")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise WarehouseError(f"{path.parent}: cannot make the warehouse's folder: {err.strerror or err}") from None
    deadline = time.monotonic() + max(wait, 0.0)
    while True:
        try:
            con = duckdb.connect(str(path), read_only=read_only)
            break
        except duckdb.Error as err:
            if "lock" not in str(err).lower():
                raise WarehouseError(f"{path}: cannot open the warehouse{' for reading' if read_only else ''}: "
                                     f"{_reason(err)}") from None
            if time.monotonic() >= deadline:
                waited = f" after waiting {wait:g} s" if wait > 0 else ""
                raise RunLocked(f"{path}: in use by {holder(project, err)}{waited}; "
                                "try again later or pass --wait SECONDS") from None
            time.sleep(POLL_SECONDS)
    settings = connection_statements()
    _execute(con, settings, "connection.time_zone")
    _execute(con, settings, "connection.memory_limit",
             {"limit": _setting(project.memory_limit or DEFAULT_MEMORY_LIMIT)})
    if project.threads:
        _execute(con, settings, "connection.threads", {"threads": int(project.threads)})
    if project.remote and not read_only:
        try:
            storage.register(con, project.storage)
        except storage.StorageError as err:
            con.close()
            raise DataError(f"{project.file.name}: storage: {err}") from None
    if not read_only:
        try:
            ensure_schema(con)
            migrate(con, project)
        except BaseException:
            con.close()
            raise
    return con


def finish_pending(con: duckdb.DuckDBPyConnection) -> None:
    """Finish a result only partly fetched (a CREATE's count, one row of a SELECT): DuckDB 2 wants
    that before the connection runs anything else."""
    finish = getattr(con, "complete", None)
    if finish is not None:
        finish()


def stage_connection(con: duckdb.DuckDBPyConnection, project: Project) -> duckdb.DuckDBPyConnection:
    """A second connection to the same warehouse, with the same settings, for the stages a run
    runs outside its transaction (see toolkit.engine.runner)."""
    stages = con.cursor()
    _execute(stages, connection_statements(), "connection.time_zone")
    if project.remote:
        storage.register(stages, project.storage)
    return stages


def ensure_schema(con: duckdb.DuckDBPyConnection) -> None:
    con.execute((template_folder() / "warehouse.sql").read_text(encoding="utf-8"))
    _number_id_hashes(con)


def migrate(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Bring a warehouse written by an earlier release to this release's layout, in one transaction;
    refuse one written by a later release (its tables may mean something this one does not know)."""
    layout = layout_statements()
    row = _execute(con, layout, "layout.version")
    version = row[0] if row and row[0] is not None else None
    if version is not None and version > SCHEMA_VERSION:
        raise WarehouseError(f"{project.warehouse}: written by a newer Plimsoll (warehouse layout {version}; "
                             f"this one reads layout {SCHEMA_VERSION} and earlier); upgrade plimsoll")
    if version == SCHEMA_VERSION:
        return
    _execute(con, layout, "layout.begin")
    try:
        if _execute(con, layout, "layout.in_use")[0]:
            # a new file is made in this release's layout; an old one is brought to it step by step
            for number, step in _MIGRATIONS:
                if (version or 1) < number:
                    step(con, project)
            _adopt_definitions(con, project)
        _execute(con, layout, "layout.record", {"version": SCHEMA_VERSION})
        _execute(con, layout, "layout.commit")
    except BaseException:
        _execute(con, layout, "layout.roll_back")
        raise


# (table, old name, new name) of the columns layout 3 renamed; CHANGELOG.md lists them for readers
RENAMED_IN_3 = (
    ("runs", "full_refresh", "rebuild"),
    ("run_checks", "rows_invalid", "invalid_rows"),  # one name for one count, as in runs and files_read
    ("windows", "seq", "window_number"),
    ("key_windows", "seq", "window_number"),
    ("key_state", "last_seq", "last_window_number"),
    ("carry", "num", "numerator"),
    ("carry", "den", "denominator"),
    ("carry", "x", "quantile_input"),
)


def _layout_3(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 2 to 3: the columns renamed so their names say what they hold."""
    present = set(_execute(con, layout_statements(), "layout.columns", fetch="all"))
    renamed = [(t, old, new) for t, old, new in RENAMED_IN_3 if (t, old) in present]
    _run_template(con, "migrate_3.sql", {}, renamed=renamed)


def _layout_4(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 3 to 4: the impact columns filled from the stored windows where they can be (rate
    checks' breaching windows and their alerts; see queries/migrate_4.sql)."""
    rates = [c for c in project.checks.values() if c.measure.kind == "rate"]
    _run_template(con, "migrate_4.sql", {"up_checks": [c.name for c in rates if c.direction == "up"],
                                         "down_checks": [c.name for c in rates if c.direction != "up"]})


def _layout_2(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 1 to 2: file paths relative to their source's path, files_read's source named, and
    remembered session ids given a data time (the source's watermark, so they are kept for a
    whole dedup_horizon from now)."""
    sources = [{"source_name": s.name, "base": s.base} for s in project.sources.values()]
    checks = [{"check_name": c.name, "source_name": c.source.name} for c in project.checks.values()]
    _run_template(con, "migrate_2.sql", {"sources": sources, "checks": checks})


def _run_template(con: duckdb.DuckDBPyConnection, name: str, params: dict[str, object], **context: object) -> None:
    for statement in statements(render(name, **context)):
        con.execute(statement.sql, {k: params[k] for k in statement.params})


# each layout and the step that brings a file of the layout before it there
def _layout_5(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 4 to 5: the causes and incidents tables are new (queries/warehouse.sql made them).
    Nothing is filled after the fact: an earlier alert gets its causes when it next grows, and every
    run groups the alerts into incidents afresh."""


def _layout_6(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 5 to 6: table_versions and the source alarms' columns are new (queries/warehouse.sql
    made them; the alarms' columns NULL: every earlier alert is a check's). Until then every source
    was Parquet, read by listing, and no source was watched, so nothing is filled after the fact."""


def _layout_7(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 6 to 7: each check's series_state and its keys' recent windows made from its stored
    windows (queries/migrate_7.sql), as its runs would have kept them, so the next run's baselines
    read them instead of the windows. A check no longer in the project is retired by the next run.
    The count-window and verdict SQL also changed (series sorted by number and event time, only
    the windows a breach can move judged again): `_adopt_definitions` takes each unchanged check's
    new definition hash instead of asking for a rebuild of every check."""
    for check in project.checks.values():
        _run_template(con, "migrate_7.sql", {}, check=check)


def _layout_8(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Layout 7 to 8: no table changed. The verdict loop now stops when no window moves into or out
    of a series' history (a flag moving between breach and no verdict changes no baseline), which
    gives the same verdicts in fewer rounds; its SQL text, so every check's definition hash, changed,
    and `_adopt_definitions` takes the new hashes instead of asking for a rebuild of every check."""


_MIGRATIONS = ((2, _layout_2), (3, _layout_3), (4, _layout_4), (5, _layout_5), (6, _layout_6), (7, _layout_7),
               (8, _layout_8))


def _adopt_definitions(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """After an upgrade: a check's definition hash covers its compiled SQL, which a new release
    writes differently for unchanged checks; their windows stay valid, so the hash each check has
    now is taken as the stored one (with its open alerts'), rather than asking for a rebuild of
    every check. (So edit checks before or after an upgrade, not in the same step.)"""
    from toolkit.sql.compiler import compile_check

    layout = layout_statements()
    for check in project.checks.values():
        stored = _execute(con, layout, "layout.stored_definition", {"check": check.name})
        if not stored:
            continue
        now = compile_check(check).definition_hash
        _execute(con, layout, "layout.adopt_definition", {"now": now, "check": check.name, "old": stored[0]})


def _number_id_hashes(con: duckdb.DuckDBPyConnection) -> None:
    """A warehouse from before id hashes were numbers keeps its hex hashes, converted in place.

    Hex and number are the same md5, so nothing read before is read again or lost.
    """
    layout = layout_statements()
    kind = _execute(con, layout, "layout.id_hash_type")
    if kind and kind[0] == "VARCHAR":
        _execute(con, layout, "layout.id_hashes_as_numbers")


def claim_path(project: Project) -> Path:
    """The file that names the run holding the warehouse (``warehouse.duckdb.run``)."""
    return Path(f"{project.warehouse}.run")


@contextmanager
def claimed(project: Project, run_id: int, checks: list[str]) -> Iterator[None]:
    """Say who holds the warehouse for the length of a run, so a second run can name it.

    Only written while DuckDB's own lock is held, so two runs never race for it; a file left by a
    killed run is harmless, because it is only read when the lock is actually taken.
    """
    path = claim_path(project)
    body = {"run_id": run_id, "pid": os.getpid(), "host": socket.gethostname(),
            "started_at": _utc_now().isoformat(timespec="seconds"), "checks": checks}
    _write_atomically(path, json.dumps(body).encode())
    try:
        yield
    finally:
        path.unlink(missing_ok=True)


def holder(project: Project, err: Exception | None = None) -> str:
    """Who holds the warehouse, in words: the run named by its claim file, else DuckDB's PID."""
    try:
        body = json.loads(claim_path(project).read_text(encoding="utf-8"))
        return (f"run {body['run_id']} (pid {body['pid']} on {body['host']}, "
                f"started {body['started_at']} UTC)")
    except (OSError, ValueError, KeyError):
        text = str(err or "")
        return f"another process ({text[text.index('PID'):].split(')')[0]})" if "PID" in text else "another process"


def snapshot_folder(project: Project) -> Path:
    """Where the published Parquet copies live: ``warehouse_tables/`` beside ``warehouse.duckdb``."""
    path = Path(project.warehouse)
    return path.with_name(f"{path.stem}_tables")


def publish(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Copy the tables analysts read to Parquet beside the warehouse: each small table's file replaced
    whole, and ``windows`` as a folder of parts to which a run adds its own rows (:func:`_publish_parts`)."""
    folder = snapshot_folder(project)
    folder.mkdir(parents=True, exist_ok=True)
    copies = publish_statements()
    for table in PUBLISHED:
        if table in PARTED:
            _publish_parts(con, folder, copies, table)
            continue
        final = folder / f"{table}.parquet"
        temp = folder / f".{table}.parquet.{os.getpid()}.tmp"
        _execute(con, copies, f"publish.{table}", {"path": str(temp)})
        os.replace(temp, final)


# Tables published as a folder of parts (``windows/``), each run adding a part of its own rows; the
# others, small, are copied whole after every run.
PARTED = ("windows",)
# This many parts of one level are merged into one part of the next: a copy of n runs holds at most
# (MERGE_PARTS - 1) parts per level, about log(n) / log(MERGE_PARTS) levels, and each row is written
# again once per level.
MERGE_PARTS = 8
BASE_LEVEL = 99  # a part copying the whole table: never merged, replaced only by another whole copy


@dataclass(frozen=True, order=True)
class Part:
    """One file of a parted copy: the rows of runs ``first`` to ``last``, made at ``level`` (0: one
    run's part; n + 1: MERGE_PARTS parts of level n merged; BASE_LEVEL: the whole table)."""

    first: int
    last: int
    level: int

    @property
    def name(self) -> str:
        return f"part-{self.first:010d}-{self.last:010d}-{self.level:02d}.parquet"

    @staticmethod
    def parse(name: str) -> "Part | None":
        match = re.fullmatch(r"part-(\d{10})-(\d{10})-(\d{2})\.parquet", name)
        return Part(*(int(g) for g in match.groups())) if match else None


def _publish_parts(con: duckdb.DuckDBPyConnection, folder: Path, copies: Named, table: str) -> None:
    """Publish ``table`` as a folder of parts, ``folder/table``: a link to the folder of the latest
    copy (``.table-N``), replaced in one rename, so a reader that lists the folder sees one copy
    whole, the previous or the new one, and never half a file.

    A new copy is the previous one's parts (hard links) plus a part of the rows of the runs since; a
    run that took rows away (fewer rows of those runs than the copy holds: a rebuild, a removed check
    or source), a new layout or new columns make it whole again. The copy before the latest is kept
    for a reader that listed it just before the link moved; older ones are deleted."""
    link = folder / table
    current = _current_copy(link)
    parts = sorted(p for p in (Part.parse(f.name) for f in current.iterdir()) if p) if current else []
    about = _read_json(current / COPY_LAYOUT) if current else None
    through = max((p.last for p in parts), default=0)
    rows_now, rows_through, last_run, layout, columns = _execute(
        con, copies, f"publish.{table}.published", {"through": through})
    whole = (not parts or about is None or about.get("layout") != layout or about.get("columns") != columns
             or about.get("rows") != rows_through)
    if not whole and (last_run is None or last_run <= through):
        return  # nothing new since the copy was made
    number = int(current.name.rsplit("-", 1)[1]) + 1 if current else 1
    new = folder / f".{table}-{number}"
    if new.exists():
        shutil.rmtree(new)  # a copy a failed publish left half made
    new.mkdir()
    if whole:
        part = Part(0, int(last_run or 0), BASE_LEVEL)
        _execute(con, copies, f"publish.{table}.whole", {"path": str(new / part.name)})
        parts = [part]
    else:
        for part in parts:
            _link_or_copy(current / part.name, new / part.name)
        part = Part(through + 1, int(last_run), 0)
        _execute(con, copies, f"publish.{table}.runs", {"path": str(new / part.name), "after": through,
                                                       "through": part.last})
        parts = _merged(con, copies, table, new, [*parts, part])
    (new / COPY_LAYOUT).write_text(json.dumps({"layout": layout, "columns": columns, "rows": rows_now}),
                                   encoding="utf-8")
    pointer = folder / f".{table}.link.{os.getpid()}.tmp"
    pointer.unlink(missing_ok=True)
    os.symlink(new.name, pointer)
    if link.exists() and not link.is_symlink():
        _remove(link)  # a copy of an earlier release: one file, or a folder
    os.replace(pointer, link)
    (folder / f"{table}.parquet").unlink(missing_ok=True)  # the single file earlier releases wrote
    _forget_old_copies(folder, table, keep={new.name, current.name if current else new.name})


COPY_LAYOUT = ".layout.json"  # hidden, in each copy's folder: the warehouse layout, columns and rows it was made from


def _merged(con: duckdb.DuckDBPyConnection, copies: Named, table: str, folder: Path, parts: list[Part]) -> list[Part]:
    """``parts`` after merging each run of MERGE_PARTS parts of one level at the end into one part of
    the next level, as often as that happens (a counter in base MERGE_PARTS)."""
    while len(parts) >= MERGE_PARTS:
        tail = parts[-MERGE_PARTS:]
        level = tail[0].level
        if level == BASE_LEVEL or any(p.level != level for p in tail):
            break
        merged = Part(tail[0].first, tail[-1].last, level + 1)
        _execute(con, copies, f"publish.{table}.merge",
                 {"path": str(folder / merged.name), "parts": [str(folder / p.name) for p in tail]})
        for p in tail:
            (folder / p.name).unlink()
        parts = [*parts[:-MERGE_PARTS], merged]
    return parts


def _link_or_copy(source: Path, target: Path) -> None:
    """A part kept from the previous copy: the same file (a hard link), or a copy of it where the
    file system has no hard links."""
    try:
        os.link(source, target)
    except OSError:
        shutil.copy2(source, target)


def _current_copy(link: Path) -> Path | None:
    """The folder ``link`` points to, if it is one of our copies."""
    if not link.is_symlink():
        return None
    target = link.parent / os.readlink(link)
    if not target.is_dir() or not re.fullmatch(rf"\.{re.escape(link.name)}-\d+", target.name):
        return None
    return target


def _forget_old_copies(folder: Path, table: str, keep: set[str]) -> None:
    for old in folder.glob(f".{table}-*"):
        if old.name not in keep and old.is_dir() and not old.is_symlink():
            shutil.rmtree(old, ignore_errors=True)


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    else:
        path.unlink()


def _read_json(path: Path) -> dict[str, object] | None:
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return value if isinstance(value, dict) else None


def published_path(folder: Path, table: str) -> Path:
    """Where readers find ``table``'s copy: ``table.parquet``, or a parted table's folder of parts."""
    return folder / table if table in PARTED else folder / f"{table}.parquet"


def published_glob(folder: Path, table: str) -> str:
    """What to read for ``table``'s copy: its file, or every part in its folder."""
    return str(folder / table / "*.parquet") if table in PARTED else str(folder / f"{table}.parquet")


def open_for_reading(project: Project) -> duckdb.DuckDBPyConnection:
    """A connection in which the published tables can be queried, whether or not a run is writing.

    The warehouse itself when it is free; otherwise an in-memory database whose views read the
    Parquet copies of the last successful run.
    """
    try:
        return connect(project, read_only=True)
    except RunLocked:
        folder = snapshot_folder(project)
        missing = [t for t in PUBLISHED if not published_path(folder, t).exists()]
        if missing:
            raise RunLocked(f"{project.warehouse}: in use by {holder(project)}, and no published copy "
                            f"of it in {folder} yet") from None
        con = duckdb.connect()
        _execute(con, connection_statements(), "connection.time_zone")
        views = publish_statements(tuple((table, published_glob(folder, table)) for table in PUBLISHED))
        for table in PUBLISHED:
            _execute(con, views, f"read.{table}")
        return con


def _execute(con: duckdb.DuckDBPyConnection, named: Named, name: str, params: dict[str, object] | None = None,
             fetch: str = "row") -> object:
    """One of the warehouse's named statements (settings, layout, copies): what its last statement gives."""
    out = None
    for statement in named[name]:
        cursor = con.execute(statement.sql, statement.bound(params or {}))
        out = (cursor.fetchall() if fetch == "all" else cursor.fetchone()) if cursor.description else None
        finish_pending(con)
    return out


def _write_atomically(path: Path, data: bytes) -> None:
    temp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    temp.write_bytes(data)
    os.replace(temp, path)


def _reason(err: BaseException) -> str:
    """DuckDB's message without its class prefix, e.g. 'Read-only file system'."""
    text = engine_message(err)
    return text.split(": ", 1)[1] if text.startswith(("IO Error: ", "Permission Error: ")) else text


def _setting(text: str) -> str:
    if not all(ch.isalnum() or ch in ". " for ch in text):
        raise ValueError(f"memory_limit {text!r}: expected a size such as 2GB")
    return text


def _utc_now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)
