"""The warehouse file: opening it, creating its tables, and the settings every connection gets."""

from __future__ import annotations

from pathlib import Path

import duckdb

from . import storage
from .compiler import template_folder
from .model import Project
from .problems import DataError, RunLocked

TABLES = ("runs", "run_checks", "files_read", "check_state", "key_state", "carry", "windows",
          "alerts", "alert_events")


def connect(project: Project, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """Open (and on first use create) the warehouse, with UTC time and the project's limits."""
    path = Path(project.warehouse)
    if read_only and not path.exists():
        raise FileNotFoundError(f"{path}: no warehouse yet; run `plimsoll run` first")
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        con = duckdb.connect(str(path), read_only=read_only)
    except duckdb.IOException as err:
        if "lock" in str(err).lower():
            raise RunLocked(f"{path}: the warehouse is in use by another process ({_holder(err)})") from None
        raise
    con.execute("SET TimeZone = 'UTC'")
    if project.memory_limit:
        con.execute(f"SET memory_limit = '{_setting(project.memory_limit)}'")
    if project.threads:
        con.execute(f"SET threads = {int(project.threads)}")
    if project.remote and not read_only:
        try:
            storage.register(con, project.storage)
        except storage.StorageError as err:
            con.close()
            raise DataError(f"{project.file.name}: storage: {err}") from None
    if not read_only:
        ensure_schema(con)
    return con


def ensure_schema(con: duckdb.DuckDBPyConnection) -> None:
    con.execute((template_folder() / "warehouse.sql").read_text(encoding="utf-8"))


def _setting(text: str) -> str:
    if not all(ch.isalnum() or ch in ". " for ch in text):
        raise ValueError(f"memory_limit {text!r}: expected a size such as 2GB")
    return text


def _holder(err: Exception) -> str:
    text = str(err)
    marker = "PID"
    return text[text.index(marker):].split(")")[0].strip() if marker in text else "lock held"
