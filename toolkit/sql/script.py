"""A run's own statements, and the whole script a run executes for one check, as ``plimsoll sql``
prints it.

Around the stages of its checks a run executes statements of its own: its number and transaction,
checks that are gone or rebuilt, which files are new, the tables that cross between its two
connections, what each check did, its record and the published copies. They are named statements
of ``queries/run.sql`` (and ``lake.sql``, ``connection.sql``, ``publish.sql``), executed by name by
:mod:`toolkit.engine.runner`; :func:`script` puts them where a run executes them, between the
check's stages.
"""

from __future__ import annotations

from functools import lru_cache
import re

from toolkit.model import Source
from toolkit.sql.spark import SparkStatement
from toolkit.sql.templates import Named, Stage, Statement, named, statement_kind

# Stages that run on the stage connection (outside the run's transaction, except with --rebuild or
# on Spark); the tables each leaves for the transaction's stages and run record, moved once it has
# run; and the relation the source stage's write to the warehouse streams from.
STAGE_CONNECTION_STAGES = ("source", "scan", "window", "measure")
MOVED_AFTER = {
    "source": ("lake_counts", "lake_file_rows"),
    "measure": ("watermarks", "scan_counts", "carry_next", "window_counts", "new_key_windows", "new_windows"),
}
# The impact stage reads the sessions again after the verdict, where they are: its statement that
# makes AFTER_VERDICT's table runs on the stage connection, with the breaching windows moved there
# before it and its table moved back after it; the rest of the stage runs in the transaction.
AFTER_VERDICT = {"impact": "affected_registers"}
MOVED_BEFORE = {"impact": ("breaching",)}
MOVED_AFTER_VERDICT = {"impact": ("affected_registers",)}
STREAMED = "kept_ids"
# The tables analysts read, published as Parquet beside the warehouse after every run.
PUBLISHED = ("alerts", "alert_events", "windows", "runs", "alert_causes", "incidents", "incident_events")
# How the partition check of lake.sql is shown: it is rendered per file, with the column and its type
PARTITION_SHOWN = {"column": "COLUMN", "type": "TYPE"}


def writes_warehouse(statement: Statement) -> bool:
    """A statement that changes stored rows: it must run inside the run's transaction."""
    return statement_kind(statement.sql) in ("INSERT", "UPDATE", "DELETE", "MERGE_INTO", "COPY")


def created_table(statement: Statement) -> str | None:
    """The table a ``CREATE OR REPLACE TEMP TABLE`` statement makes, else None."""
    found = re.search(r"CREATE\s+OR\s+REPLACE\s+TEMP(?:ORARY)?\s+TABLE\s+(\w+)", statement.sql, re.IGNORECASE)
    return found.group(1) if found else None


def streams(statement: Statement) -> bool:
    """A write to the warehouse that reads the stage connection's rows as a stream (``kept_ids``)."""
    return writes_warehouse(statement) and re.search(rf"\b{STREAMED}\b", statement.sql) is not None


@lru_cache(maxsize=1)
def run_statements() -> Named:
    """``queries/run.sql``: the run's own statements."""
    moved = {**MOVED_AFTER, **{f"{stage} before": t for stage, t in MOVED_BEFORE.items()}, **MOVED_AFTER_VERDICT}
    return named("run.sql", moved=moved, streamed=STREAMED)


@lru_cache(maxsize=1)
def connection_statements() -> Named:
    """``queries/connection.sql``: every connection's settings."""
    return named("connection.sql")


def lake_statements(source: Source | None, partition: dict[str, str] | None = None) -> Named:
    """``queries/lake.sql``: with ``source``, its first event times; with ``partition`` (a column
    and its type in a file), the check of one partition folder."""
    return named("lake.sql", source=source, partition=partition)


def publish_statements(copies: tuple[tuple[str, str], ...] = ()) -> Named:
    """``queries/publish.sql``: writing the copies, and (``copies``: table, file) reading them."""
    return named("publish.sql", tables=PUBLISHED, copies=copies)


@lru_cache(maxsize=1)
def incident_statements() -> tuple[Statement, ...]:
    """``queries/incidents.sql``: grouping every alert into incidents, at the end of each run."""
    return tuple(statement for _, _, statements_ in named("incidents.sql").sections for statement in statements_)


@lru_cache(maxsize=1)
def alarm_statements() -> Named:
    """``queries/alarms.sql``: the source alarms (silent, lagging) a run judges after its checks."""
    return named("alarms.sql")


def layout_statements() -> Named:
    """``queries/layout.sql``: the warehouse's layout and its conversion."""
    return named("layout.sql")


def script(source: Source, stages: tuple[Stage, ...]) -> str:
    """Every statement a run executes for one check, in order, headed by when it runs: the run's
    start, the source's new files and its stage, the check's stages with the tables that cross
    between connections, the check's record, the run's end and the published copies."""
    run = run_statements()
    lake = lake_statements(source, PARTITION_SHOWN)
    # the per-session stages on a connection of their own: not on Spark (nor with --rebuild)
    apart = not any(isinstance(s, SparkStatement) for stage in stages for s in stage.once)
    parts = [
        _heading("the run begins", "(not with --rebuild) the definitions the checks' windows were computed "
                 "with; then the run's number"),
        run.text("open."),
        _heading("the run's transaction", "its bookkeeping tables, then everything to the commit in one "
                 "transaction" + ("; the per-session stages run on a second connection (not with --rebuild), "
                                  "set up first" if apart else "")),
        run.text("begin.run_tables"),
        *([connection_statements().text("connection.time_zone")] if apart else []),
        run.text("begin.transaction", "begin.known_checks", "begin.forget_removed_sources"),
        _note("for each check no longer in the project: begin.close_alerts ('check removed') and "
              "begin.drop_state; then with --rebuild, for each selected check: begin.close_alerts ('check "
              "changed', for alerts of earlier definitions), begin.forget_rebuilt_alerts and begin.drop_state"),
        run.text("begin.close_alerts", "begin.forget_rebuilt_alerts", "begin.drop_state"),
        _note("which files are new for each check"),
        run.text("begin.read_histories", "begin.table_versions", "begin.files_read_by"),
        *([_note("a Delta table: its commits after the version the check read (on a connection of their own)"),
           lake.text("lake.delta_added", "lake.delta_changes")] if source.format == "delta" else []),
        _note("a backlog larger than max_read_per_run: the new files in data-time order"),
        lake.text("lake.first_event_times"),
        run.text("begin.note_changed_files"),
        _heading(f"source {source.name}: its new files", "read once for every check that read the same "
                 "files before; first their footers (on a connection of their own), the types the checks "
                 "read, and (per file in a folder named after a column the checks read: COLUMN, of TYPE) "
                 "partition folders that contradict their files"),
        lake.text("lake.known_columns", "lake.footers", "lake.footer", "lake.partition", "lake.record_column"),
        _stage_text(stages[0], apart, run),
        run.text("source."),
    ]
    parts += [_stage_text(stage, apart, run) for stage in stages[1:]]
    parts += [
        _heading("the check's record", "how many rounds its verdicts took, and what it did"),
        run.text("check."),
        *([run.text("end.table_version")] if source.format in ("delta", "iceberg") else []),
        _heading(RUN_ENDS, "its record, and the commit"),
        run.text("end.forget_ids", "end.repeats", "end.record", "end.files_read", "end.commit"),
        _note("a run that fails rolls back, then writes its 'failed' record alone: begin.transaction, "
              "end.record, end.commit"),
        run.text("end.roll_back"),
        _heading("after the run", "the tables analysts read, published as Parquet beside the warehouse"),
        publish_statements().text("publish."),
    ]
    return "\n".join(part.rstrip("\n") + "\n" for part in parts)


def _stage_text(stage: Stage, apart: bool, run: Named) -> str:
    """A stage as the run executes it: with the stage connection, the source stage's write to the
    warehouse reads a stream of that connection's rows, and the tables the transaction's stages read
    are moved after the stage."""
    text = stage.text
    if not apart:
        return text
    streamed = [s for s in stage.once if streams(s)]
    if stage.name in STAGE_CONNECTION_STAGES and streamed:
        at = text.index(streamed[-1].sql)
        text = text[:at] + _note(f"The statements above ran on the stage connection. The INSERT below runs in the "
                                 f"run's transaction, on the warehouse's own connection, reading {STREAMED} from the "
                                 "stage connection as a stream of batches:") \
            + run.text(f"move.{STREAMED}.clear", f"move.{STREAMED}.stream") + "\n" + text[at:]
    session_table = AFTER_VERDICT.get(stage.name)
    session_part = [s for s in stage.once if created_table(s) == session_table] if session_table else []
    if session_part:
        start = text.index(session_part[0].sql)
        end = text.index(session_part[-1].sql) + len(session_part[-1].sql) + 1
        text = (text[:start] + _note("The breaching windows, moved to the stage connection, where the sessions are:")
                + run.text(*(f"move.{table}." for table in MOVED_BEFORE[stage.name])) + "\n"
                + _note("On the stage connection:") + text[start:end] + "\n"
                + _note("Moved back to the run's transaction, where the rest of the stage runs:")
                + run.text(*(f"move.{table}." for table in MOVED_AFTER_VERDICT[stage.name])) + "\n" + text[end:].lstrip("\n"))
    moved = MOVED_AFTER.get(stage.name, ())
    if moved:
        text = text.rstrip("\n") + "\n\n" + _note(
            "The tables the transaction's stages read, moved there from the stage connection:") + run.text(
            *(f"move.{table}." for table in moved))
    return text


RUN_ENDS = "the run ends"


def with_after_checks(script_text: str, after_checks: str, source: Source | None = None) -> str:
    """A check's script with what the run executes after every check and before it ends (the
    alarms of ``source`` when it has any, the causes of the alerts it opened or grew, and the
    incidents), in its place."""
    at = script_text.index(f"-- ══ {RUN_ENDS} ")
    part = alarms_text(source) if source is not None else ""
    part += _heading("after every check: causes and incidents", "the causes of each alert the run opened or "
                    "added breaching windows to (for each: causes.alert, causes.windows, then the explain "
                    "statements, explain.round and explain.mark in turns, and causes.store); then every alert "
                    "grouped into incidents") + after_checks.rstrip("\n") + "\n"
    return script_text[:at] + part + script_text[at:]


def alarms_text(source: Source) -> str:
    """What a run executes for ``source``'s alarms, for `plimsoll sql`: nothing but the retiring of
    alarms no longer watched when it has neither max_silence nor max_lag."""
    alarms = alarm_statements()
    watched = [name for name, limit in (("max_silence", source.max_silence), ("max_lag", source.max_lag)) if limit]
    if not watched:
        return (_heading("after every check: source alarms", "open alarms of sources no longer watched close "
                         f"(source {source.name} has no max_silence or max_lag)") + alarms.text("alarms.retire") + "\n")
    return (_heading("after every check: source alarms", "open alarms of sources no longer watched close; then "
                     f"source {source.name}'s {' and '.join(watched)}, judged in wall-clock time (not in a backtest)")
            + alarms.text("alarms.") + "\n")


def _heading(title: str, what: str) -> str:
    lines = [f"-- ══ {title} " + "═" * max(3, 92 - len(title) - 7)]
    lines += _wrapped(what)
    return "\n".join(lines) + "\n"


def _note(text: str) -> str:
    return "\n".join(_wrapped(text)) + "\n"


def _wrapped(text: str, width: int = 100) -> list[str]:
    lines, line = [], "--"
    for word in text.split():
        if len(line) + 1 + len(word) > width:
            lines.append(line)
            line = "--"
        line += " " + word
    return [*lines, line]
