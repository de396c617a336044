"""Executing compiled checks: one incremental run over the files each check has not read before.

A run opens one transaction on the warehouse, runs every selected check's compiled SQL in order,
records the files it read and its run record, and commits; any failure rolls all of it back and
leaves only a 'failed' run record behind.

The stages that touch every session (source, scan, window, measure) run on a second connection to
the warehouse, outside the transaction: DuckDB keeps every table a transaction replaces until it
commits, so on one connection a run would hold each check's copies of the sessions at once. That
connection reads the state the run started from (each check's own state changes only when the
check persists, after its stages there), and what the later stages need crosses to the
transaction as Arrow: a row per window, the partial windows, and the new sessions' id hashes,
streamed. A rebuild, which first deletes state inside the transaction, and the Spark engine
run every stage on the one connection.

The runner writes no SQL: besides the stages' statements it executes its own by name from
``queries/run.sql`` (:func:`_run_named`), and every statement passes :func:`_execute`. What it
executes for a check, ``plimsoll sql`` prints in the same order (:mod:`toolkit.sql.script`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import duckdb

from toolkit.lake import files as lake
from toolkit.lake import tables

from toolkit.engine import spark as spark_engine

from toolkit.engine import explain, warehouse
from toolkit.engine.alarms import SourceAlarm, record as record_alarms
from toolkit.sql.compiler import CompiledCheck, columns_read
from toolkit.sql.plans import check_plan, source_plan
from toolkit.sql.script import (AFTER_VERDICT, incident_statements, MOVED_AFTER, MOVED_AFTER_VERDICT, MOVED_BEFORE, STAGE_CONNECTION_STAGES,
                                STREAMED, created_table, run_statements, streams, writes_warehouse)
from toolkit.sql.templates import Stage, Statement
from toolkit.model import Check, Project, Source
from toolkit.problems import (ChecksChanged, DataError, PlimsollError, Problem, ProjectInvalid, WarehouseError,
                              engine_message)
from toolkit.sql.quoting import interval

Progress = Callable[[str], None]
Clock = Callable[[], datetime]  # the wall clock, naive UTC
# Called after each run with the warehouse connection (still held), the run's id and its result
# (None when it failed): its records are committed, ok or failed, and no other run can start yet.
AfterRun = Callable[[duckdb.DuckDBPyConnection, int, "RunResult | None"], None]

# The run's own statements (queries/run.sql) run as this stage: a failure among them is the
# warehouse's (a full disk, a lost file), reported as the engine says it, not as a check's.
RUN = "run"
MOVED_ROWS = "moved_rows"  # what a moved table's rows are registered as on the transaction's connection
DEFAULT_MAX_READ = 4 * 10**9  # bytes of Parquet per check and run: about 60M demo sessions
STREAM_BATCH = 1_000_000
# Alert A explains alert B (one incident, A its cause) when B's answers inside A's key carry at
# least this share of B's excess ...
INCIDENT_INSIDE = 0.5
# ... and its answers outside A's key at most this share: what lies outside is no longer the problem.
INCIDENT_OUTSIDE = 0.25


@dataclass
class CheckResult:
    check: str
    files_read: int = 0
    rows_read: int = 0
    windows_written: int = 0
    alerts_opened: int = 0
    alerts_closed: int = 0
    rounds: int = 0


@dataclass
class RunResult:
    run_id: int
    status: str
    checks: list[CheckResult] = field(default_factory=list)
    error: str | None = None

    distinct_files: int = 0
    changed_files: list[str] = field(default_factory=list)
    first_run_id: int | None = None   # when one call made several runs (a backlog): the first
    more: bool = False                # files were left for a next run (max_read_per_run)
    skipped: list[Problem] = field(default_factory=list)  # changed checks not run: each needs a rebuild
    warnings: list[str] = field(default_factory=list)     # what a scheduler's log should show
    # the sources' silent and lagging alerts: opened, still open or closed (wall clock; engine/alarms.py)
    alarms: list[SourceAlarm] = field(default_factory=list)

    @property
    def files_read(self) -> int:
        """Distinct files read by any check in this run."""
        return self.distinct_files

    @property
    def alerts_opened(self) -> int:
        return sum(c.alerts_opened for c in self.checks)


def select_checks(project: Project, names: list[str] | tuple[str, ...] | None) -> list[Check]:
    """The named checks (all when none are named); an unknown name is a project error."""
    if not names:
        return list(project.checks.values())
    unknown = [n for n in names if n not in project.checks]
    if unknown:
        raise ProjectInvalid([Problem(str(project.file.name), 0, f"no check named '{n}'") for n in unknown])
    return [project.checks[n] for n in names]


def run(project: Project, names: list[str] | None = None, rebuild: bool = False,
        progress: Progress | None = None, wait: float = 0.0, clock: Clock | None = None,
        after_run: AfterRun | None = None) -> RunResult:
    """Runs of the selected checks until they have read every file; returns what they did, raises
    on failure after rolling back the failing run.

    One run reads at most ``max_read_per_run`` of Parquet per check, so a long backlog (a first run
    over a year of lake) is read by several runs in turn, each committed on its own, in data-time
    order: memory and spill space stay bounded, and what the committed runs read is never read
    again. A check whose definition changed since its windows were computed is skipped (it needs a
    rebuild) while the others run; the result lists it. Waits up to ``wait`` seconds for another
    run to release the warehouse. After every run (failed or not) the tables analysts read are
    published as Parquet beside the warehouse, and ``after_run`` is called (to read its records
    before another process can take the warehouse).

    ``clock`` gives the wall clock (naive UTC; default the system's): the run record's times and the
    source alarms, the one decision it enters. Tests pass one that only pretends.
    """
    checks = select_checks(project, names)
    compiled = [check_plan(c) for c in checks]
    say = progress or (lambda _: None)
    budget = project.max_read_per_run or DEFAULT_MAX_READ
    con = warehouse.connect(project, wait=wait)
    done: list[RunResult] = []
    try:
        changed = {} if rebuild else _changed(con, checks, compiled)
        skipped = list(changed.values())
        if skipped and len(skipped) == len(checks):
            raise ChecksChanged(skipped)
        chosen = [(c, s) for c, s in zip(checks, compiled) if c.name not in changed]
        checks, compiled = [c for c, _ in chosen], [s for _, s in chosen]
        for problem in skipped:
            say(f"skipped: {problem}")
        while True:
            run_id = int(_run_named(con, "open.next_run_id", {})[0])
            with warehouse.claimed(project, run_id, [c.name for c in checks]):
                try:
                    result = _run(con, project, run_id, checks, compiled, rebuild and not done, say, budget,
                                  clock or _now)
                except PlimsollError:
                    _publish_quietly(con, project)
                    if after_run is not None:
                        after_run(con, run_id, None)
                    raise
                if after_run is not None:
                    after_run(con, run_id, result)
                _publish(con, project, run_id)
            done.append(result)
            if not result.more:
                outcome = _together(done)
                outcome.skipped = skipped
                return outcome
            say(f"run {run_id} read {_plural(result.files_read, 'file')}, up to max_read_per_run; "
                "the next run reads on from there")
    finally:
        con.close()


def _publish(con: duckdb.DuckDBPyConnection, project: Project, run_id: int) -> None:
    """Publish a committed run's tables; a failure says the run itself is safe."""
    try:
        warehouse.publish(con, project)
    except (duckdb.Error, OSError) as err:
        why = f"{err.strerror}: {err.filename}" if isinstance(err, OSError) and err.strerror else engine_message(err)
        raise WarehouseError(
            f"run {run_id} is committed, but the copies readers use while a run holds the warehouse could "
            f"not be written to {warehouse.snapshot_folder(project)}: {why}; the next run writes them again") from None


def _together(runs: list[RunResult]) -> RunResult:
    """The runs of one call as one result: the last run's id, every run's counts added up."""
    if len(runs) == 1:
        return runs[0]
    by_check: dict[str, CheckResult] = {}
    for result in runs:
        for c in result.checks:
            total = by_check.setdefault(c.check, CheckResult(c.check))
            for name in ("files_read", "rows_read", "windows_written", "alerts_opened", "alerts_closed", "rounds"):
                setattr(total, name, getattr(total, name) + getattr(c, name))
    return RunResult(runs[-1].run_id, runs[-1].status, list(by_check.values()),
                     distinct_files=sum(r.distinct_files for r in runs),
                     changed_files=[f for r in runs for f in r.changed_files], first_run_id=runs[0].run_id,
                     warnings=[w for r in runs for w in r.warnings], alarms=[a for r in runs for a in r.alarms])


def _run(con: duckdb.DuckDBPyConnection, project: Project, run_id: int, checks: list[Check],
         compiled: list[CompiledCheck], rebuild: bool, progress: Progress, budget: int,
         clock: Clock | None = None) -> RunResult:
    clock = clock or _now
    started = clock()
    listings: dict[str, list[lake.LakeFile]] = {}
    result = RunResult(run_id, "ok")
    record = {"run_id": run_id, "started": started, "checks": [c.name for c in checks], "rebuild": rebuild}
    _run_named(con, "begin.run_tables", {})
    stages = _stage_connection(con, project, compiled, rebuild)
    _run_named(con, "begin.transaction", {})
    try:
        _retire_removed(con, project, run_id, progress)
        if rebuild:
            _forget(con, checks, compiled, run_id)
        groups, result.more = _groups(con, checks, compiled, listings, budget, result.warnings)
        result.changed_files = _note_changes(con, run_id, checks, listings)
        for change in result.changed_files:
            progress(f"changed after it was read, not read again: {change}")
        for group in groups:
            new_files = group.files
            if new_files:
                source = group.checks[0][0].source
                readers = [check for check, _ in group.checks]
                progress(f"source {source.name}: reading {_plural(len(new_files), 'new file')} for "
                         f"{_plural(len(readers), 'check')}")
                lake.check_new_files(con, source, new_files, _needed_columns(source, readers), readers)
                source_stage = source_plan(readers)
                params = _params(project, new_files, run_id, "", readers[0].name, group.read_until, source)
                _run_stage(con, stages, f"source {source.name}", source_stage, params)
                _run_named(con, "source.count_scan", {})
                result.warnings += _impossible_times(con, source)
            for check, sql in group.checks:
                step = f"[{len(result.checks) + 1}/{len(checks)}] {check.name}"
                progress(f"{step} …")
                params = _params(project, new_files, run_id, sql.definition_hash, check.name, group.read_until,
                                 check.source)
                result.checks.append(_run_check(con, stages, check, sql, new_files, params))
                if check.name in group.versions:
                    _record_version(con, check, group.versions[check.name], run_id)
                done = result.checks[-1]
                progress(f"{step}: {_plural(done.files_read, 'file')}, {_plural(done.windows_written, 'window')}, "
                         f"{_plural(done.alerts_opened, 'alert')} opened, {done.alerts_closed} closed")
        result.alarms = _source_alarms(con, project, run_id, checks, started, listings, groups, progress)
        _causes_and_incidents(con, run_id, checks, listings, progress)
        _forget_ids(con, project, groups)
        repeats = _mostly_repeats(con)
        if repeats:
            result.warnings.append(repeats)
        _record(con, record, "ok", None, repeats, clock)
        result.distinct_files = int(_run_named(con, "end.files_read", {"run_id": run_id})[0])
        _run_named(con, "end.commit", {})
    except BaseException as err:
        _close(stages)
        stages = None
        message = err.args[0] if isinstance(err, PlimsollError) and err.args else _engine_message(err)
        try:
            _run_named(con, "end.roll_back", {})
        except duckdb.Error:
            pass
        if isinstance(err, (KeyboardInterrupt, SystemExit)):
            raise
        try:
            _run_named(con, "begin.transaction", {})
            _record(con, record, "failed", str(message), None, clock)
            _run_named(con, "end.commit", {})
        except duckdb.Error as record_err:
            raise WarehouseError(f"{message}; the run was rolled back, and its failure could not be recorded "
                                 f"either ({_engine_message(record_err)})") from err
        if isinstance(err, PlimsollError):
            raise
        raise DataError(str(message)) from err
    finally:
        _close(stages)
    return result


def _forget_ids(con: duckdb.DuckDBPyConnection, project: Project, groups: list[Group]) -> None:
    """The session ids each source that was read no longer needs, forgotten after its checks moved
    their watermarks (queries/run.sql, end.forget_ids)."""
    read = {group.checks[0][0].source.name: group.checks[0][0].source for group in groups if group.files}
    for name, source in sorted(read.items()):
        _run_named(con, "end.forget_ids", {
            "source": name, "horizon": source.dedup_horizon,
            "source_checks": sorted(c.name for c in project.checks.values() if c.source.name == name)})


def _source_alarms(con: duckdb.DuckDBPyConnection, project: Project, run_id: int, checks: list[Check],
                   now: datetime, listings: dict[str, list[lake.LakeFile]], groups: list[Group],
                   progress: Progress) -> list[SourceAlarm]:
    """After every check, before the incidents: the sources' silent and lagging alerts, judged at
    ``now`` (the run's clock reading as it began), in the run's transaction."""
    def through_the_runner(on: duckdb.DuckDBPyConnection, statement: Statement, params: dict[str, Any]) -> Any:
        return _execute(on, "source alarms", "alarms", statement, params, fetch="all")

    # a backlog holds back a source's reading: its watermark is where this run stopped, not the lake's
    held_back = {group.checks[0][0].source.name for group in groups if group.read_until is not None}
    # a table's current files include what compaction rewrote, which is no new data: what its
    # commits appended (the files its checks read now) is the evidence of arrival
    arrived = {name: files for name, files in listings.items() if not tables.is_table(project.sources[name])}
    for group in groups:
        source = group.checks[0][0].source
        if tables.is_table(source):
            arrived.setdefault(source.name, [])
            arrived[source.name] += [f for f in group.files if f not in arrived[source.name]]
    found = record_alarms(con, project, checks, run_id, now, arrived, held_back, through_the_runner)
    for alarm in found:
        progress(alarm.line)
    return found


def _causes_and_incidents(con: duckdb.DuckDBPyConnection, run_id: int, checks: list[Check],
                          listings: dict[str, list[lake.LakeFile]], progress: Progress) -> None:
    """After every check: the causes of the alerts this run opened or grew (read from the files
    each check has read), then every alert grouped into incidents afresh; in the run's transaction."""
    files: dict[str, list[str]] = {}

    def files_of(check: Check) -> list[str]:
        if check.name not in files and tables.is_table(check.source):
            # a table's files are rewritten by compaction: its current files hold what the check read
            files[check.name] = [f.where for f in listings.get(check.source.name, [])]
        if check.name not in files:
            read = {row[0] for row in _run_named(con, "begin.files_read_by", {"check": check.name}, fetch="all")}
            files[check.name] = [f.where for f in listings.get(check.source.name, []) if f.path in read]
        return files[check.name]

    def through_the_runner(on: duckdb.DuckDBPyConnection, statement: Statement, params: dict[str, Any]) -> Any:
        return _execute(on, "causes of the run's alerts", "causes", statement, params, fetch="all")

    explained = explain.store_causes(con, checks, run_id, files_of, through_the_runner)
    if explained:
        progress(f"causes: {_plural(explained, 'alert')} explained")
    for statement in incident_statements():
        _execute(con, "incidents", "incidents", statement,
                 {"run_id": run_id, "inside": INCIDENT_INSIDE, "outside": INCIDENT_OUTSIDE})


def _plural(n: int, noun: str) -> str:
    """'1 file', '2 files'."""
    return f"{n:,} {noun}{'' if n == 1 else 's'}"


def _impossible_times(con: duckdb.DuckDBPyConnection, source: Source) -> list[str]:
    """A warning per file that held sessions with an impossible event time (counted as invalid)."""
    rows = _run_named(con, "source.impossible_times", {}, fetch="all")
    return [f"source {source.name}: {path}: {_plural(n, 'session')} with an impossible event time (not finite, or "
            f"more than max_future {interval(source.max_future).removeprefix('INTERVAL ').lower()} after the file "
            "was written) counted as invalid" for path, n in rows]


# A run whose sessions were mostly repeats of sessions already counted: the lake was probably copied,
# moved or re-sent, which deserves more than a count in the run record.
REPEATS_SHARE = 0.5
REPEATS_MIN = 100


def _mostly_repeats(con: duckdb.DuckDBPyConnection) -> str | None:
    valid, repeats = _run_named(con, "end.repeats", {})
    if valid < REPEATS_MIN or repeats <= REPEATS_SHARE * valid:
        return None
    return (f"{repeats:,} of the {valid:,} sessions read ({100 * repeats / valid:.0f} %) repeat sessions already "
            "counted and were left out: was the lake copied, moved or sent again? Nothing was counted twice")


def _stage_connection(con: duckdb.DuckDBPyConnection, project: Project, compiled: list[CompiledCheck],
                      rebuild: bool) -> duckdb.DuckDBPyConnection | None:
    """The connection the per-session stages run on (outside the run's transaction), or None when
    they run inside it: a rebuild must see the state it deleted gone, and Spark's steps move
    rows to and from the warehouse's own connection."""
    on_spark = any(isinstance(statement, spark_engine.SparkStatement)
                   for sql in compiled for stage in sql.stages for statement in stage.once)
    if rebuild or on_spark:
        return None
    return warehouse.stage_connection(con, project)


def _close(stages: duckdb.DuckDBPyConnection | None) -> None:
    if stages is not None:
        stages.close()


def _run_stage(con: duckdb.DuckDBPyConnection, stages: duckdb.DuckDBPyConnection | None, who: str,
               stage: Stage, params: dict[str, Any]) -> int:
    """One stage: its statements, and its loop until it settles (returns the rounds it took, else 0).

    On the stage connection if there is one and the stage is one of its, with the warehouse's
    writes made in the transaction (from a stream of the stage connection's rows where the write
    reads them)."""
    if stages is not None and stage.name in AFTER_VERDICT and stage.loop is None:
        for statement in stage.once:
            if created_table(statement) == AFTER_VERDICT[stage.name]:
                # the sessions are on the stage connection: the verdicts go there, the result comes back
                for table in MOVED_BEFORE[stage.name]:
                    _move(con, stages, table)
                _execute(stages, who, stage.name, statement, params)
                for table in MOVED_AFTER_VERDICT[stage.name]:
                    _move(stages, con, table)
            else:
                _execute(con, who, stage.name, statement, params)
        return 0
    if stages is None or stage.name not in STAGE_CONNECTION_STAGES:
        for statement in stage.once:
            _execute(con, who, stage.name, statement, params)
        rounds = _settle(con, who, stage, params) if stage.loop is not None else 0
        for statement in stage.after:
            _execute(con, who, stage.name, statement, params)
        return rounds
    if stage.loop is not None or stage.after:
        raise ValueError(f"stage {stage.name}: a loop runs in the run's transaction, not on the stage connection")
    for statement in stage.once:
        if not writes_warehouse(statement):
            _execute(stages, who, stage.name, statement, params)
        elif streams(statement):
            _execute_streamed(con, stages, who, stage.name, statement, params)
        else:
            _execute(con, who, stage.name, statement, params)
    for table in MOVED_AFTER.get(stage.name, ()):
        _move(stages, con, table)
    return 0


def _execute_streamed(con: duckdb.DuckDBPyConnection, stages: duckdb.DuckDBPyConnection, who: str,
                      stage: str, statement: Statement, params: dict[str, Any]) -> None:
    """A write in the transaction that reads the stage connection's ``kept_ids`` as a stream.

    The stream is closed whatever the write read of it: a write that needs none of its rows stops
    early, and a stream left open would refuse every later query on the stage connection.
    """
    warehouse.finish_pending(stages)
    warehouse.finish_pending(con)
    _run_named(con, f"move.{STREAMED}.clear", {})
    reader = _run_named(stages, f"move.{STREAMED}.stream", {}, fetch="reader")
    con.register(STREAMED, reader)
    try:
        _execute(con, who, stage, statement, params)
    finally:
        # after a failed write the transaction is aborted and refuses even this: the write's own
        # error is the one to report, so these clean-ups never replace it
        for clean_up in (lambda: con.unregister(STREAMED), reader.close, lambda: warehouse.finish_pending(stages)):
            try:
                clean_up()
            except (duckdb.Error, OSError):
                pass


def _move(source: duckdb.DuckDBPyConnection, target: duckdb.DuckDBPyConnection, table: str) -> None:
    """A temp table of the stage connection, copied to the same name on the transaction's."""
    warehouse.finish_pending(source)
    warehouse.finish_pending(target)
    rows = _run_named(source, f"move.{table}.out", {}, fetch="arrow")
    target.register(MOVED_ROWS, rows)
    try:
        _run_named(target, f"move.{table}.in", {})
    finally:
        target.unregister(MOVED_ROWS)


def _needed_columns(source: Source, checks: list[Check]) -> list[str]:
    """Every source column the source stage reads for these checks."""
    names = [source.session_id, *source.time_columns, *(source.exclude.columns if source.exclude else ()),
             *([source.viewer_id] if source.viewer_id else []), *columns_read(checks)]
    return list(dict.fromkeys(names))


def _publish_quietly(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Publish after a failed run too (its run record says why), without hiding the failure."""
    try:
        warehouse.publish(con, project)
    except (duckdb.Error, OSError):
        pass


def _changed(con: duckdb.DuckDBPyConnection, checks: list[Check],
             compiled: list[CompiledCheck]) -> dict[str, Problem]:
    """Checks whose windows or baseline would now be computed differently: each needs a rebuild.

    Carrying on would mix windows of two definitions in one series' history, so such a check is
    not run (the others are) until it is rebuilt or the change undone.
    """
    stored = dict(_run_named(con, "open.stored_definitions", {}, fetch="all"))
    return {
        check.name: Problem(
            check.file, check.line,
            f"check {check.name} was not run: it has changed since its windows were computed (definition "
            f"{stored[check.name]} -> {sql.definition_hash}); run `plimsoll run --check {check.name} "
            "--rebuild` to rebuild it from the lake, or undo the change")
        for check, sql in zip(checks, compiled)
        if stored.get(check.name) not in (None, sql.definition_hash)
    }


def _retire_removed(con: duckdb.DuckDBPyConnection, project: Project, run_id: int, progress: Progress) -> None:
    """Checks gone from the project: their open alerts close as 'check removed', their state goes.

    Alerts and their events stay as history; windows and state are derived and would only
    mislead a check added later under the same name.
    """
    known = [row[0] for row in _run_named(con, "begin.known_checks", {}, fetch="all")]
    # a source gone from the project: its recorded column types and remembered ids go too, so a
    # source added later under the same name starts afresh
    _run_named(con, "begin.forget_removed_sources", {"sources": sorted(project.sources)})
    for name in (n for n in known if n not in project.checks):
        closed = _close_alerts(con, name, run_id, "check removed", None)
        progress(f"check {name}: no longer in the project; {closed} open alerts closed as 'check removed'")
        _run_named(con, "begin.drop_state", {"check": name})


def _close_alerts(con: duckdb.DuckDBPyConnection, name: str, run_id: int, reason: str,
                  keep_definition: str | None) -> int:
    """Close a check's open alerts (those of other definitions than ``keep_definition``) for ``reason``,
    at the check's watermark, the last data time it saw; how many closed."""
    params = {"check": name, "run_id": run_id, "reason": reason, "keep": keep_definition}
    return int(_run_named(con, "begin.close_alerts", params)[0])


def _note_changes(con: duckdb.DuckDBPyConnection, run_id: int, checks: list[Check],
                  listings: dict[str, list[lake.LakeFile]]) -> list[str]:
    """Files read before whose size or time now differ: recorded once and reported, never re-read.

    Re-reading would count the sessions it had already counted; ignoring it silently would hide
    that the lake was rewritten under the check.
    """
    noticed: list[str] = []
    for check in checks:
        listing = [{"path": f.path, "size": f.size, "modified_at": f.modified_at}
                   for f in listings[check.source.name]]
        if not listing:
            continue
        rows = _run_named(con, "begin.note_changed_files", {"run_id": run_id, "check": check.name, "listing": listing},
                          fetch="all")
        where = {f.path: f.where for f in listings[check.source.name]}
        noticed += [f"{where.get(path, path)} (check {check.name}: size {a} -> {b}, modified {ta} -> {tb})"
                    for path, a, b, ta, tb in sorted(rows)]
    return noticed


@dataclass
class Group:
    """Checks of one source that read the same new files together, the source stage run once.

    Checks share a reading only when they have read exactly the same files before: whether a
    session id is a repeat depends on what the check has counted, so each session id counts once
    per check whatever the order in which checks and files came."""

    checks: list[tuple[Check, CompiledCheck]]
    files: list[lake.LakeFile]
    read_until: datetime | None = None
    # a Delta or Iceberg source: how far each check will have read the table once the run commits
    versions: dict[str, tables.TableState] = field(default_factory=dict)


def _groups(con: duckdb.DuckDBPyConnection, checks: list[Check], compiled: list[CompiledCheck],
            listings: dict[str, list[lake.LakeFile]], budget: int, notes: list[str]) -> tuple[list[Group], bool]:
    """The run's groups, and whether any check has more new files than ``budget`` bytes of them
    (read by a next run).

    A check takes its new files up to ``budget``, and at least one. When they do not all fit, it
    takes them in data-time order (by each file's earliest event time), so the first of several
    runs never reads one partition's last day before another's first; ``read_until``, the
    earliest event time of the files it leaves, then bounds the run's watermark.

    A Delta or Iceberg source's candidates are what the commits after the check's recorded
    version added (:mod:`toolkit.lake.tables`); what those commits report goes to ``notes``."""
    history = dict(_run_named(con, "begin.read_histories", {}, fetch="all"))
    versions = {name: tables.TableState(int(version), snapshot, bool(complete))
                for name, version, snapshot, complete in _run_named(con, "begin.table_versions", {}, fetch="all")}
    found: dict[str, tables.TableListing] = {}
    groups: dict[tuple[str, tuple[str, ...], str | None], Group] = {}
    more = False
    for check, sql in zip(checks, compiled):
        source = check.source
        if tables.is_table(source):
            if source.name not in found:
                found[source.name] = tables.listing(source)
                listings[source.name] = found[source.name].active
            reading = found[source.name].since(versions.get(check.name))
            notes.extend(n for n in reading.notes if n not in notes)
            candidates = reading.files
        else:
            if source.name not in listings:
                listings[source.name] = lake.list_source(source)
            candidates = listings[source.name]
        seen = {row[0] for row in _run_named(con, "begin.files_read_by", {"check": check.name}, fetch="all")}
        new = sorted((f for f in candidates if f.path not in seen), key=lambda f: f.path)
        taken, read_until = new, None
        if sum(f.size for f in new) > budget and len(new) > 1:
            taken, read_until = _first_by_data_time(con, source, new, budget)
            more = more or len(taken) < len(new)
        key = (source.name, tuple(f.path for f in taken), history.get(check.name))
        group = groups.setdefault(key, Group([], sorted(taken, key=lambda f: f.path), read_until))
        group.checks.append((check, sql))
        if source.name in found:
            group.versions[check.name] = _read_to(found[source.name], versions.get(check.name), len(taken) == len(new))
    return list(groups.values()), more


def _read_to(table: tables.TableListing, before: tables.TableState | None, all_taken: bool) -> tables.TableState:
    """How far a check has read a table after this run: to the table's version when it took every
    file it had to read; else where it was, or, on its first read, the snapshot it began (in part)."""
    if all_taken:
        return table.state
    if before is None:
        return tables.TableState(table.version, table.snapshot_id, complete=False)
    return before


def _record_version(con: duckdb.DuckDBPyConnection, check: Check, state: tables.TableState, run_id: int) -> None:
    _run_named(con, "end.table_version", {"check": check.name, "source": check.source.name,
                                          "format": check.source.format, "version": state.version,
                                          "snapshot_id": state.snapshot_id, "complete": state.complete,
                                          "run_id": run_id})


def _first_by_data_time(con: duckdb.DuckDBPyConnection, source: Source, new: list[lake.LakeFile],
                        budget: int) -> tuple[list[lake.LakeFile], datetime | None]:
    """The files one run of a backlog reads (in order of their earliest sane event time, up to
    ``budget`` bytes, at least one), and the earliest event time among those it leaves."""
    firsts = lake.first_event_times(con, source, new)
    ordered = sorted(new, key=lambda f: (firsts.get(f.path) is None, firsts.get(f.path) or datetime.min, f.path))
    taken, size = [], 0
    for f in ordered:
        if taken and size + f.size > budget:
            break
        taken.append(f)
        size += f.size
    rest = [firsts[f.path] for f in ordered[len(taken):] if firsts.get(f.path) is not None]
    return taken, min(rest, default=None)


def _params(project: Project, files: list[lake.LakeFile], run_id: int, definition: str, reader: str,
            read_until: datetime | None, source: Source) -> dict[str, Any]:
    files = sorted(files, key=lambda f: f.path)  # the source stage names a file by its place here
    return {
        "files": [f.where for f in files],
        "paths": [f.path for f in files],
        "manifest": [{"path": f.path, "size": f.size, "modified_at": f.modified_at} for f in files],
        "run_id": run_id,
        "definition": definition,
        "reader": reader,
        "read_until": read_until,
        "source_checks": sorted(c.name for c in project.checks.values() if c.source.name == source.name),
    }


def _run_check(con: duckdb.DuckDBPyConnection, stages: duckdb.DuckDBPyConnection | None, check: Check,
               sql: CompiledCheck, new: list[lake.LakeFile], params: dict[str, Any]) -> CheckResult:
    """A check's own stages, after its source stage has read ``new`` into ``lake_sessions``."""
    result = CheckResult(check.name, files_read=len(new))
    if not new:
        return result
    started = time.monotonic()
    run_id = params["run_id"]
    for stage in sql.stages[1:]:
        result.rounds += _run_stage(con, stages, f"check {check.name}", stage, params)
    row = _run_named(con, "check.result", {"rounds": result.rounds, "run_id": run_id, "check": check.name,
                                           "seconds": round(time.monotonic() - started, 3)})
    result.rows_read, result.windows_written, result.alerts_opened, result.alerts_closed = row
    return result


def _settle(con: duckdb.DuckDBPyConnection, who: str, stage: Stage, params: dict[str, Any]) -> int:
    """A stage's loop: rounds until its stop condition returns 0; how many rounds it took.

    More rounds than the loop's limit allows is an error: verdicts that do not settle would
    otherwise keep the run going for ever."""
    loop = stage.loop
    assert loop is not None
    limit = int(_execute(con, who, stage.name, loop.limit, params)[0])
    changing = None
    for rounds in range(1, limit + 1):
        for statement in loop.rounds:
            _execute(con, who, stage.name, statement, params)
        changing = _execute(con, who, stage.name, loop.until, params)[0]
        if changing == 0:
            return rounds
    raise DataError(f"{who}, stage {stage.name}: the loop did not settle: {loop.until_name} was still {changing} "
                    f"after {limit} rounds, the most {loop.limit_name} allows")


def _execute(con: duckdb.DuckDBPyConnection, who: str, stage: str, statement: Statement,
             params: dict[str, Any], fetch: str = "row") -> Any:
    """Every statement a run executes passes here: a stage's, and the run's own (``stage`` RUN).

    ``fetch`` says what comes back: the first row (``row``), every row (``all``), the rows as an
    Arrow table (``arrow``) or as a stream of Arrow batches (``reader``: nothing else may run on
    ``con`` until the stream is closed). A stage's failure names the check and stage; one of the
    run's own statements fails as the engine says (a full disk, a lost file)."""
    if isinstance(statement, spark_engine.SparkStatement):  # `engine: spark`: a step on Spark
        return spark_engine.execute(con, who, stage, statement, params)
    wanted = statement.bound(params)
    try:
        if fetch == "arrow":
            return con.sql(statement.sql, params=wanted or None).to_arrow_table()
        if fetch == "reader":
            return con.sql(statement.sql, params=wanted or None).to_arrow_reader(STREAM_BATCH)
        cursor = con.execute(statement.sql, wanted) if wanted else con.execute(statement.sql)
        if fetch == "all":
            rows = cursor.fetchall() if cursor.description else []
        else:
            rows = cursor.fetchone() if cursor.description else None
        warehouse.finish_pending(con)
        return rows
    except duckdb.Error as err:
        if stage == RUN:
            raise
        raise DataError(f"{who}, stage {stage}: {_engine_message(err)}") from err


def _run_named(con: duckdb.DuckDBPyConnection, name: str, params: dict[str, Any], fetch: str = "row") -> Any:
    """One of the run's own statements (``queries/run.sql``), by name; what its last statement gives."""
    out = None
    for statement in run_statements()[name]:
        out = _execute(con, RUN, RUN, statement, params, fetch=fetch)
    return out


def _forget(con: duckdb.DuckDBPyConnection, checks: list[Check], compiled: list[CompiledCheck],
            run_id: int) -> None:
    """Rebuild: drop these checks' derived state so the lake is read again from the start.

    Alerts of the current definition are rebuilt exactly (same ids), so they go with their events;
    alerts of an earlier definition stay as history, the open ones closed as 'check changed'.
    """
    for check, sql in zip(checks, compiled):
        _close_alerts(con, check.name, run_id, "check changed", sql.definition_hash)
        _run_named(con, "begin.forget_rebuilt_alerts", {"check": check.name, "definition": sql.definition_hash})
        _run_named(con, "begin.drop_state", {"check": check.name})


def _record(con: duckdb.DuckDBPyConnection, record: dict[str, Any], status: str, error: str | None,
            warning: str | None, clock: Clock | None = None) -> None:
    """The run record: what every scan read (once per scan) and what every check wrote."""
    _run_named(con, "end.record", record | {"finished": (clock or _now)(), "status": status, "error": error,
                                            "warning": warning})


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def _engine_message(err: BaseException) -> str:
    return engine_message(err)
