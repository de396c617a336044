"""Build the Fernhill Broadcasting demo lake and its labels.

Python only orchestrates: every row is computed by the DuckDB SQL in ``lake.sql`` from the seed, so
the same seed gives the same data on any machine and thread count. The lake is assembled in a
staging folder and moved into place at the end, so a failed build never leaves a partial lake.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from pathlib import Path

import duckdb

# the labels file format lives with the matching that reads it; re-exported for the demo's users
from toolkit.backtest.labels import LABEL_FIELDS, Label, parse_key, read_labels, write_labels  # noqa: F401
from toolkit.sql.quoting import quote_literal

SCRIPT = Path(__file__).with_name("lake.sql")
STEP_MARKER = re.compile(r"^-- step: *(.+?) *$", re.MULTILINE)
PARAMETER = re.compile(r"\$([A-Za-z_][A-Za-z0-9_]*)")
COMMENT = re.compile(r"--[^\n]*")
# Below this the incidents are only a handful of sessions each and no longer clearly visible.
MIN_SESSIONS = 20_000
# Identifiers are bijections of 32-bit row and viewer numbers, so they stay unique up to here.
MAX_SESSIONS = 1_000_000_000
# The story (2026-11-02 to 2026-11-22) fills three weeks.
STORY_DAYS = 21


def build_lake(workdir: Path, sessions: int = 2_000_000, seed: int = 7, days: int = STORY_DAYS) -> list[Label]:
    """Writes workdir/lake/sessions/day=YYYY-MM-DD/*.parquet and workdir/labels.csv; returns labels.

    ``sessions`` is the total row count (within 1 %), crawlers and incidents included; the
    incidents scale with it. ``days`` from 2026-11-02: the story needs the default three weeks;
    more days are ordinary traffic after it (the benchmark uses 31). An existing lake and labels
    file in ``workdir`` are replaced.
    """
    _check_arguments(sessions, seed)
    if isinstance(days, bool) or not isinstance(days, int) or days < STORY_DAYS:
        raise ValueError(f"days must be an integer of at least {STORY_DAYS}: {days!r}")
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=".demo-build-", dir=workdir))
    try:
        with duckdb.connect(":memory:") as con:
            con.execute("SET enable_progress_bar = false")
            con.execute(f"SET temp_directory = {quote_literal(str(staging / 'spill'))}")
            run_script(con, {"seed": seed, "sessions": sessions, "days": days})
            write_sessions(con, staging / "sessions")
            labels = fetch_labels(con)
        write_labels(staging / "labels.csv", labels)
        _move_into_place(staging / "sessions", workdir / "lake" / "sessions")
        os.replace(staging / "labels.csv", workdir / "labels.csv")
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return labels


def _check_arguments(sessions: int, seed: int) -> None:
    if (isinstance(sessions, bool) or not isinstance(sessions, int)
            or not MIN_SESSIONS <= sessions <= MAX_SESSIONS):
        raise ValueError(
            f"sessions must be an integer from {MIN_SESSIONS:,} to {MAX_SESSIONS:,}: {sessions!r}"
        )
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**63:
        raise ValueError(f"seed must be a non-negative 64-bit integer: {seed!r}")


def script_steps(text: str) -> list[tuple[str, str]]:
    """Split lake.sql into (step name, statement) pairs on its ``-- step:`` lines."""
    marks = list(STEP_MARKER.finditer(text))
    steps = []
    for mark, following in zip(marks, marks[1:] + [None]):
        end = following.start() if following else len(text)
        steps.append((mark.group(1), text[mark.end() : end].strip()))
    return steps


def run_script(con: duckdb.DuckDBPyConnection, parameters: dict[str, object]) -> None:
    """Run every step of lake.sql, binding to each only the parameters it mentions."""
    parameters = {"days": STORY_DAYS, **parameters}
    for name, statement in script_steps(SCRIPT.read_text(encoding="utf-8")):
        mentioned = PARAMETER.findall(COMMENT.sub("", statement))
        used = {p: parameters[p] for p in mentioned if p in parameters}
        try:
            con.execute(statement, used)
        except duckdb.Error as exc:
            raise RuntimeError(f"{SCRIPT.name}, step {name!r}: {exc}") from exc


def write_sessions(con: duckdb.DuckDBPyConnection, target: Path) -> None:
    """Write the sorted sessions table as hive partitions ``day=YYYY-MM-DD``.

    A partitioned COPY run on several threads interleaves their rows within a file, so this one
    statement runs on a single thread to keep every file in ended_at order.
    """
    threads = con.execute("SELECT current_setting('threads')").fetchone()[0]
    con.execute("SET threads = 1")
    try:
        con.execute(
            f"COPY (SELECT * FROM sessions) TO {quote_literal(str(target))}"
            " (FORMAT parquet, PARTITION_BY (day))"
        )
    finally:
        con.execute(f"SET threads = {int(threads)}")


def fetch_labels(con: duckdb.DuckDBPyConnection) -> list[Label]:
    """The labels table written by lake.sql, as Label values."""
    rows = con.execute(
        "SELECT kind, check_name, key, start_at, end_at, note FROM labels"
        " ORDER BY start_at, check_name"
    ).fetchall()
    return [Label(*row) for row in rows]


def _move_into_place(built: Path, target: Path) -> None:
    """Replace ``target`` with ``built``; the old lake is removed only once the new one is there."""
    target.parent.mkdir(parents=True, exist_ok=True)
    retired = built.with_name("retired")
    if target.exists():
        os.replace(target, retired)
    os.replace(built, target)
    shutil.rmtree(retired, ignore_errors=True)
