"""Executing compiled checks: one incremental run over the files each check has not read before.

A run opens one transaction on the warehouse, runs every selected check's compiled SQL in order,
records the files it read and its run record, and commits; any failure rolls all of it back and
leaves only a 'failed' run record behind.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import duckdb

from . import lake, warehouse
from .compiler import CompiledCheck, Statement, compile_check, compile_source
from .model import Check, Project
from .problems import DataError, PlimsollError, Problem, ProjectInvalid, engine_message

Progress = Callable[[str], None]


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


def run(project: Project, names: list[str] | None = None, full_refresh: bool = False,
        progress: Progress | None = None) -> RunResult:
    """One run of the selected checks; returns what it did, raises on failure after rolling back."""
    checks = select_checks(project, names)
    compiled = [compile_check(c) for c in checks]
    con = warehouse.connect(project)
    try:
        return _run(con, project, checks, compiled, full_refresh, progress or (lambda _: None))
    finally:
        con.close()


def _run(con: duckdb.DuckDBPyConnection, project: Project, checks: list[Check],
         compiled: list[CompiledCheck], full_refresh: bool, progress: Progress) -> RunResult:
    run_id = int(con.execute("SELECT coalesce(max(run_id), 0) + 1 FROM runs").fetchone()[0])
    started = _now()
    listings: dict[str, list[lake.LakeFile]] = {}
    result = RunResult(run_id, "ok")
    # what each source scan of this run read: the run record counts rows once per scan
    con.execute("CREATE OR REPLACE TEMP TABLE run_scans (rows_read BIGINT, rows_invalid BIGINT, "
                "duplicate_rows BIGINT, rows_excluded BIGINT)")
    con.execute("BEGIN TRANSACTION")
    try:
        if full_refresh:
            _forget(con, [c.name for c in checks])
        for group in _groups(con, checks, compiled, listings):
            new_files = group[0][2]
            if new_files:
                progress(f"source {group[0][0].source.name}: reading {len(new_files)} new files "
                         f"for {len(group)} checks")
                source_stage = compile_source([check for check, _, _ in group])
                params = _params(new_files, run_id, "")
                for statement in source_stage.once:
                    _execute(con, f"source {group[0][0].source.name}", "source", statement, params)
                con.execute("INSERT INTO run_scans SELECT rows_read, rows_invalid, duplicate_rows, "
                            "rows_excluded FROM lake_counts")
            for check, sql, files in group:
                result.checks.append(_run_check(con, check, sql, files, run_id))
                done = result.checks[-1]
                progress(f"check {check.name}: {done.files_read} files, {done.windows_written} windows, "
                         f"alerts opened {done.alerts_opened}, closed {done.alerts_closed}")
        _record(con, run_id, started, [c.name for c in checks], full_refresh, "ok", None)
        result.distinct_files = int(con.execute(
            "SELECT count(DISTINCT path) FROM files_read WHERE run_id = $r", {"r": run_id}).fetchone()[0])
        con.execute("COMMIT")
    except BaseException as err:
        con.execute("ROLLBACK")
        message = err.args[0] if isinstance(err, PlimsollError) and err.args else _engine_message(err)
        if isinstance(err, (KeyboardInterrupt, SystemExit)):
            raise
        con.execute("BEGIN TRANSACTION")
        _record(con, run_id, started, [c.name for c in checks], full_refresh, "failed", str(message))
        con.execute("COMMIT")
        if isinstance(err, PlimsollError):
            raise
        raise DataError(str(message)) from err
    return result


def _groups(con: duckdb.DuckDBPyConnection, checks: list[Check], compiled: list[CompiledCheck],
            listings: dict[str, list[lake.LakeFile]]) -> list[list[tuple[Check, CompiledCheck, list[lake.LakeFile]]]]:
    """Checks of one source with the same new files, so the files are read once for all of them."""
    groups: dict[tuple[str, tuple[str, ...]], list[tuple[Check, CompiledCheck, list[lake.LakeFile]]]] = {}
    for check, sql in zip(checks, compiled):
        if check.source.name not in listings:
            listings[check.source.name] = lake.list_source(check.source)
        seen = {row[0] for row in con.execute(
            "SELECT path FROM files_read WHERE check_name = $c", {"c": check.name}).fetchall()}
        new = [f for f in listings[check.source.name] if f.path not in seen]
        groups.setdefault((check.source.name, tuple(f.path for f in new)), []).append((check, sql, new))
    return list(groups.values())


def _params(files: list[lake.LakeFile], run_id: int, definition: str) -> dict[str, Any]:
    return {
        "files": [f.path for f in files],
        "manifest": [{"path": f.path, "size": f.size, "modified_at": f.modified_at} for f in files],
        "run_id": run_id,
        "definition": definition,
    }


def _run_check(con: duckdb.DuckDBPyConnection, check: Check, sql: CompiledCheck,
               new: list[lake.LakeFile], run_id: int) -> CheckResult:
    """A check's own stages, after its source stage has read ``new`` into ``lake_sessions``."""
    result = CheckResult(check.name, files_read=len(new))
    if not new:
        return result
    params = _params(new, run_id, sql.definition_hash)
    loop: list[tuple[str, Statement]] = []
    for stage in sql.stages[1:]:
        for statement in stage.once:
            _execute(con, f"check {check.name}", stage.name, statement, params)
        loop += [(stage.name, s) for s in stage.repeat]
        if stage.name == "breach" and loop:
            result.rounds = _settle(con, check, loop, params)
            loop = []
    con.execute("UPDATE run_checks SET rounds = $r WHERE run_id = $run AND check_name = $c",
                {"r": result.rounds, "run": run_id, "c": check.name})
    row = con.execute(
        "SELECT rows_read, windows_written, alerts_opened, alerts_closed FROM run_checks "
        "WHERE run_id = $run AND check_name = $c", {"run": run_id, "c": check.name}).fetchone()
    result.rows_read, result.windows_written, result.alerts_opened, result.alerts_closed = row
    return result


def _settle(con: duckdb.DuckDBPyConnection, check: Check, loop: list[tuple[str, Statement]],
            params: dict[str, Any]) -> int:
    """Repeat the verdict statements until no breach flag changes; the last one returns the count."""
    windows = int(con.execute("SELECT count(*) FROM judged").fetchone()[0])
    for rounds in range(1, windows + 2):
        changing = None
        for stage, statement in loop:
            changing = _execute(con, f"check {check.name}", stage, statement, params)
        if not changing or changing[0] == 0:
            return rounds
    raise DataError(f"check {check.name}: verdicts did not settle after {windows + 1} rounds")


def _execute(con: duckdb.DuckDBPyConnection, who: str, stage: str, statement: Statement,
             params: dict[str, Any]) -> tuple | None:
    wanted = {k: params[k] for k in statement.params}
    try:
        cursor = con.execute(statement.sql, wanted) if wanted else con.execute(statement.sql)
        return cursor.fetchone() if cursor.description else None
    except duckdb.Error as err:
        raise DataError(f"{who}, stage {stage}: {_engine_message(err)}") from err


def _forget(con: duckdb.DuckDBPyConnection, names: list[str]) -> None:
    """Full refresh: drop every trace of these checks so the lake is read again from the start."""
    con.execute("DELETE FROM alert_events WHERE alert_id IN "
                "(SELECT alert_id FROM alerts WHERE check_name IN (SELECT unnest($n)))", {"n": names})
    for table in ("alerts", "windows", "carry", "key_state", "check_state", "files_read"):
        con.execute(f"DELETE FROM {table} WHERE check_name IN (SELECT unnest($n))", {"n": names})


def _record(con: duckdb.DuckDBPyConnection, run_id: int, started: datetime, names: list[str],
            full_refresh: bool, status: str, error: str | None) -> None:
    con.execute(
        """
        INSERT INTO runs
        SELECT $run_id, $started, $finished, $status, $checks, $full_refresh,
               (SELECT count(DISTINCT path) FROM files_read WHERE run_id = $run_id),
               s.rows_read, s.rows_excluded, s.duplicate_rows, c.late_rows, s.rows_invalid,
               c.windows_written, c.alerts_opened, c.alerts_closed, $error
        FROM (SELECT coalesce(sum(rows_read), 0) AS rows_read, coalesce(sum(rows_excluded), 0) AS rows_excluded,
                     coalesce(sum(duplicate_rows), 0) AS duplicate_rows,
                     coalesce(sum(rows_invalid), 0) AS rows_invalid
              FROM run_scans) AS s,
             (SELECT coalesce(sum(late_rows), 0) AS late_rows, coalesce(sum(windows_written), 0) AS windows_written,
                     coalesce(sum(alerts_opened), 0) AS alerts_opened,
                     coalesce(sum(alerts_closed), 0) AS alerts_closed
              FROM run_checks WHERE run_id = $run_id) AS c
        """,
        {"run_id": run_id, "started": started, "finished": _now(), "status": status, "checks": names,
         "full_refresh": full_refresh, "error": error},
    )


def _now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def _engine_message(err: BaseException) -> str:
    return engine_message(err)
