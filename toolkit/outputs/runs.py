"""What `plimsoll run --json` prints for an orchestrator: every run one call made, each check's
figures in it, and how the call ended, as one JSON document.

The figures are the warehouse's own run records (``runs`` and ``run_checks``), read on the run's
connection right after each run commits, failed or not: another process (a second scheduled run
waiting with ``--wait``) cannot take the warehouse in between, so what is printed is what each run
recorded. The warnings a run prints (files changed after they were read, impossible event times, a
lake of mostly repeats) are in the document too, since a scheduler may keep stdout and drop stderr.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import duckdb

from toolkit.config.project import load_project
from toolkit.engine import runner
from toolkit.model import Project
from toolkit.problems import ChecksChanged, PlimsollError, Problem

RUN_FIELDS = ("run_id", "status", "started_at", "finished_at", "seconds", "checks_run", "rebuild", "files_read",
              "rows_read", "rows_excluded", "duplicate_rows", "late_rows", "invalid_rows", "nonfinite_values",
              "changed_files", "windows_written", "alerts_opened", "alerts_closed", "error", "warning")
CHECK_FIELDS = ("check", "files_read", "rows_read", "rows_excluded", "rows_filtered", "invalid_rows",
                "duplicate_rows", "late_rows", "beyond_horizon", "nonfinite_values", "windows_written",
                "breach_windows", "alerts_opened", "alerts_closed", "watermark", "rounds", "seconds",
                "table_version")
RUN_RECORD = """
SELECT run_id, status, started_at, finished_at, epoch(finished_at - started_at) AS seconds,
       checks AS checks_run, rebuild, files_read, rows_read, rows_excluded, duplicate_rows, late_rows,
       invalid_rows, nonfinite_values, changed_files, windows_written, alerts_opened, alerts_closed, error, warning
FROM runs
WHERE run_id = $run_id
"""
# Every check the run was to run, in its order: one that had no new file has no run_checks row and
# read nothing; its watermark is where its state is.
CHECK_RECORDS = """
SELECT c.check_name AS "check", coalesce(r.files_read, 0), coalesce(r.rows_read, 0),
       coalesce(r.rows_excluded, 0), coalesce(r.rows_filtered, 0), coalesce(r.invalid_rows, 0),
       coalesce(r.duplicate_rows, 0), coalesce(r.late_rows, 0), coalesce(r.beyond_horizon, 0),
       coalesce(r.nonfinite_values, 0), coalesce(r.windows_written, 0), coalesce(r.breach_windows, 0),
       coalesce(r.alerts_opened, 0), coalesce(r.alerts_closed, 0), coalesce(r.watermark, s.watermark),
       coalesce(r.rounds, 0), coalesce(r.seconds, 0),
       v.table_version  -- a Delta or Iceberg source: the version the check has read up to
FROM (SELECT unnest(checks) AS check_name, generate_subscripts(checks, 1) AS place
      FROM runs WHERE run_id = $run_id) AS c
LEFT JOIN run_checks AS r ON r.run_id = $run_id AND r.check_name = c.check_name
LEFT JOIN check_state AS s ON s.check_name = c.check_name
LEFT JOIN table_versions AS v ON v.check_name = c.check_name
ORDER BY c.place
"""


@dataclass
class RunRecords:
    """How one call of ``plimsoll run`` ended (``exit_code`` and ``error`` as the command gives
    them), every run it made with its checks, and the changed checks it left out."""

    exit_code: int = 0
    error: str | None = None
    runs: list[dict[str, Any]] = field(default_factory=list)
    skipped_checks: list[dict[str, Any]] = field(default_factory=list)
    result: runner.RunResult | None = None  # the runner's own summary, when it finished

    def lines(self) -> list[str]:
        """What the command prints on stderr besides progress, as ``plimsoll run`` does without
        ``--json``: each warning, each changed check left out, the error."""
        out = [f"warning: {w}" for r in self.runs for w in r["warnings"]]
        out += [str(Problem(s["file"], s["line"], s["message"])) for s in self.skipped_checks]
        if self.error is not None and not self.skipped_checks:  # a changed check's line is its error
            out.append(self.error)
        return out


def run_with_records(project_file: Path, names: list[str] | None = None, rebuild: bool = False,
                     progress: runner.Progress | None = None, wait: float = 0.0) -> RunRecords:
    """Load the project and run it as ``plimsoll run`` does, keeping each run's records.

    Never raises a Plimsoll error: a bad project, a warehouse held by another run, a run that
    failed are in ``exit_code`` and ``error``, beside the records of the runs that were made (a
    failed run's record says why it failed; in a backlog, the runs before it stay committed).
    """
    records = RunRecords()

    def after_run(con: duckdb.DuckDBPyConnection, run_id: int, result: runner.RunResult | None) -> None:
        records.runs.append(read_run(con, run_id, result))

    project: Project | None = None
    try:
        project = load_project(project_file)
        records.result = runner.run(project, names, rebuild, progress, wait=wait, after_run=after_run)
    except PlimsollError as err:
        records.exit_code, records.error = err.exit_code, str(err) or type(err).__name__
        if isinstance(err, ChecksChanged) and project is not None:
            records.skipped_checks = [_skipped(project, p) for p in err.problems]
        failed = records.runs[-1] if records.runs else None
        if failed is not None and failed["status"] != "ok" and failed["error"] is None:
            failed["error"] = records.error  # its record could not be written or read
        return records
    except FileNotFoundError as err:
        records.exit_code, records.error = 1, str(err)
        return records
    records.skipped_checks = [_skipped(project, p) for p in records.result.skipped]
    records.exit_code = 2 if records.skipped_checks else 0
    return records


def read_run(con: duckdb.DuckDBPyConnection, run_id: int, result: runner.RunResult | None) -> dict[str, Any]:
    """One run's record and its checks' records, as committed (``result``: the runner's own, for
    the warnings it printed; None for a failed run)."""
    try:
        row = con.execute(RUN_RECORD, {"run_id": run_id}).fetchone()
        checks = con.execute(CHECK_RECORDS, {"run_id": run_id}).fetchall() if row and row[1] == "ok" else []
    except duckdb.Error:  # the run failed and even its record could not be written: its id is known
        row, checks = None, []
    record: dict[str, Any] = dict.fromkeys(RUN_FIELDS)
    record.update(run_id=run_id, status="ok" if result is not None else "failed")
    if row is not None:
        record.update(zip(RUN_FIELDS, row))
    warning = record.pop("warning")
    if result is not None:
        warnings = [f"lake file changed after it was read; not read again: {c}" for c in result.changed_files]
        warnings += result.warnings
    else:
        warnings = [warning] if warning else []
    record["warnings"] = warnings
    record["checks"] = [dict(zip(CHECK_FIELDS, c)) for c in checks]
    record["watermarks"] = {c["check"]: c["watermark"] for c in record["checks"]}
    # the sources' silent and lagging alerts this run opened, kept open or closed (wall clock)
    record["alarms"] = [{"source": a.source, "alarm": a.alarm, "action": a.action, "seconds": a.seconds,
                         "limit_seconds": a.limit.total_seconds() if a.limit is not None else None,
                         "last_file_at": a.last_file_at, "newest_data_at": a.newest_data_at,
                         "close_reason": a.close_reason, "line": a.line}
                        for a in (result.alarms if result is not None else [])]
    return record


def _skipped(project: Project, problem: Problem) -> dict[str, Any]:
    """A changed check left out of the run: its name, file and line, and what to do."""
    names = [c.name for c in project.checks.values() if (c.file, c.line) == (problem.file, problem.line)]
    return {"check": names[0] if names else None, "file": problem.file, "line": problem.line,
            "message": problem.message}


def records_json(records: RunRecords) -> str:
    """The document: ``exit_code``, ``error``, ``skipped_checks`` and ``runs``, oldest run first.
    Times are UTC as ``YYYY-MM-DD HH:MM:SS[.ffffff]``: ``started_at`` and ``finished_at`` wall
    clock, watermarks data time."""

    def encode(value: Any) -> Any:
        if isinstance(value, datetime):
            return value.isoformat(sep=" ")
        if isinstance(value, float):
            return round(value, 3)
        if isinstance(value, dict):
            return {k: encode(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [encode(v) for v in value]
        return value

    document = {"exit_code": records.exit_code, "error": records.error,
                "skipped_checks": records.skipped_checks, "runs": records.runs}
    return json.dumps(encode(document), indent=2, ensure_ascii=False, allow_nan=False)
