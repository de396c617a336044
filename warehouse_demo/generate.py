"""Build the Fernhill Broadcasting demo lake and its labels.

Python only orchestrates: every row is computed by the DuckDB SQL in ``lake.sql`` from the seed, so
the same seed gives the same data on any machine and thread count. The lake is assembled in a
staging folder and moved into place at the end, so a failed build never leaves a partial lake.
"""

from __future__ import annotations

import csv
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import duckdb

from toolkit.problems import DataError
from toolkit.sqltext import quote_literal

SCRIPT = Path(__file__).with_name("lake.sql")
STEP_MARKER = re.compile(r"^-- step: *(.+?) *$", re.MULTILINE)
PARAMETER = re.compile(r"\$([A-Za-z_][A-Za-z0-9_]*)")
COMMENT = re.compile(r"--[^\n]*")
LABEL_FIELDS = ("kind", "check", "key", "start", "end", "note")
LABEL_KINDS = ("incident", "decoy")
TIME_FORMAT = "%Y-%m-%d %H:%M:%S"
# Below this the incidents are only a handful of sessions each and no longer clearly visible.
MIN_SESSIONS = 20_000
# Identifiers are bijections of 32-bit row and viewer numbers, so they stay unique up to here.
MAX_SESSIONS = 1_000_000_000
# The story (2026-11-02 to 2026-11-22) fills three weeks.
STORY_DAYS = 21


@dataclass(frozen=True)
class Label:
    """One labelled incident, or a decoy that no check may alert on.

    ``check`` names the check that must find the incident (``*`` for a decoy, which no check may
    alert on); an alert belongs to the label when every ``name=value`` pair of ``key`` is in the
    alert's key and it falls in the span from ``start`` to ``end`` (data time, naive UTC).
    """

    kind: str
    check: str
    key: str
    start: datetime
    end: datetime
    note: str

    def key_pairs(self) -> dict[str, str]:
        """The key as a mapping, e.g. ``{'cdn': 'birch', 'country': 'DE'}``."""
        return parse_key(self.key)


def parse_key(key: str) -> dict[str, str]:
    """Split ``'name=value, name=value'`` into a mapping; raise ValueError on a malformed pair."""
    pairs: dict[str, str] = {}
    for part in key.split(","):
        name, sep, value = part.strip().partition("=")
        if not sep or not name.strip() or not value.strip():
            raise ValueError(f"key pair {part.strip()!r} is not name=value")
        if name.strip() in pairs:
            raise ValueError(f"key names {name.strip()!r} twice")
        pairs[name.strip()] = value.strip()
    return pairs


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


def write_labels(path: Path, labels: list[Label]) -> None:
    """labels.csv: one row per label, ISO timestamps to the second."""
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out)
        writer.writerow(LABEL_FIELDS)
        for label in labels:
            writer.writerow(
                [
                    label.kind,
                    label.check,
                    label.key,
                    label.start.strftime(TIME_FORMAT),
                    label.end.strftime(TIME_FORMAT),
                    label.note,
                ]
            )


def read_labels(path: Path) -> list[Label]:
    """Read labels.csv back; any malformed row raises DataError naming the file and line."""
    path = Path(path)
    with open(path, newline="", encoding="utf-8") as src:
        reader = csv.reader(src)
        header = next(reader, None)
        if header is None or tuple(header) != LABEL_FIELDS:
            raise DataError(f"{path}:1: expected the header {','.join(LABEL_FIELDS)}, got {header}")
        return [_parse_label(path, reader.line_num, row) for row in reader]


def _parse_label(path: Path, line: int, row: list[str]) -> Label:
    if len(row) != len(LABEL_FIELDS):
        raise DataError(f"{path}:{line}: expected {len(LABEL_FIELDS)} fields, got {len(row)}")
    kind, check, key, start, end, note = row
    where = f"{path}:{line}"
    if kind not in LABEL_KINDS:
        raise DataError(f"{where}: kind must be one of {', '.join(LABEL_KINDS)}, got {kind!r}")
    if (kind == "decoy") != (check == "*"):
        raise DataError(f"{where}: a decoy has check '*' and an incident names its check")
    try:
        parse_key(key)
    except ValueError as exc:
        raise DataError(f"{where}: key: {exc}") from None
    times = []
    for column, text in (("start", start), ("end", end)):
        try:
            times.append(datetime.strptime(text, TIME_FORMAT))
        except ValueError:
            raise DataError(f"{where}: {column} {text!r} is not YYYY-MM-DD HH:MM:SS") from None
    if times[1] <= times[0]:
        raise DataError(f"{where}: end {end} is not after start {start}")
    return Label(kind, check, key, times[0], times[1], note)


def _move_into_place(built: Path, target: Path) -> None:
    """Replace ``target`` with ``built``; the old lake is removed only once the new one is there."""
    target.parent.mkdir(parents=True, exist_ok=True)
    retired = built.with_name("retired")
    if target.exists():
        os.replace(target, retired)
    os.replace(built, target)
    shutil.rmtree(retired, ignore_errors=True)
