"""Helpers shared by the golden tests and ``tests/golden/regenerate.py``."""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb

from conftest import write_project
from toolkit.sql.plans import check_plan
from toolkit.config.project import load_project
from toolkit.engine.runner import run

WINDOW_COLUMNS = ("key_text, split_value, window_number, window_start, window_end, sessions, bad, "
                  "round(value, 9) AS value, round(baseline, 9) AS baseline, history_windows, "
                  "round(threshold, 9) AS threshold, breach")
ALERT_COLUMNS = ("alert_id, key_text, split_value, status, close_reason, opened_at, last_breach_at, "
                 "closed_at, breach_windows, affected_sessions, round(affected_per_hour, 6) AS affected_per_hour, "
                 "round(peak_value, 9) AS peak_value, "
                 "round(threshold, 9) AS threshold, fingerprint")


def _project(check_file: Path, folder: Path) -> Path:
    project = write_project(folder, {})
    shutil.copyfile(check_file, folder / "checks" / check_file.name)
    return project


def compiled_sql(check_file: Path, folder: Path) -> str:
    project = load_project(_project(check_file, folder))
    return check_plan(project.checks[check_file.stem]).sql


def result_tables(check_file: Path, folder: Path) -> tuple[str, str]:
    """The windows and alerts of one run over the fixture lake, as CSV text."""
    project = load_project(_project(check_file, folder))
    run(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        windows = con.execute(
            f"SELECT {WINDOW_COLUMNS} FROM windows ORDER BY key_text, split_value NULLS FIRST, window_number").df()
        alerts = con.execute(f"SELECT {ALERT_COLUMNS} FROM alerts ORDER BY opened_at, key_text, split_value").df()
    finally:
        con.close()
    return windows.to_csv(index=False), alerts.to_csv(index=False)
