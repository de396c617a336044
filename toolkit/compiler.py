"""Compiling a check into the SQL a run executes, stage by stage, from the templates in ``queries/``.

The compiler only returns text; :mod:`toolkit.runner` only executes what it returns, and
``plimsoll compile`` prints the same text. A stage's statements after a ``-- @repeat`` line form the
loop that settles breach verdicts (see ``baseline.sql``).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from statistics import NormalDist
from importlib.resources import files
from pathlib import Path

import duckdb
import jinja2

from .model import Check
from .sqltext import interval, quote_ident, quote_literal

STAGES = ("source", "scan", "window", "measure", "baseline", "breach", "lifecycle", "persist")
CHECK_STAGES = STAGES[1:]
REPEAT_MARK = "-- @repeat"


@dataclass(frozen=True)
class Statement:
    """One SQL statement and the named parameters (``$files`` …) it takes."""

    sql: str
    params: frozenset[str]


@dataclass(frozen=True)
class Stage:
    """One template's SQL: statements run once, then statements repeated until verdicts settle."""

    name: str
    text: str
    once: tuple[Statement, ...]
    repeat: tuple[Statement, ...] = ()


@dataclass(frozen=True)
class CompiledCheck:
    """All the SQL of one check, in order, with a hash that changes when the computation does."""

    check: str
    stages: tuple[Stage, ...]
    definition_hash: str = field(default="")

    @property
    def sql(self) -> str:
        """The whole script as ``plimsoll compile`` shows it."""
        header = (
            f"-- Plimsoll check {self.check}: compiled SQL, executed by `plimsoll run` as shown.\n"
            "-- Parameters: $files (where the new Parquet files are read from), $paths (their names\n"
            "-- relative to the source's path), $manifest (names, sizes and times), $run_id, $reader (the\n"
            "-- check whose earlier files decide repeats), $read_until (a backlog read in several runs:\n"
            "-- the earliest event time left for the next runs, else NULL), $source_checks (the checks of\n"
            "-- the source), $definition (hash of the SQL up to the breach stage). Statements after\n"
            "-- '@repeat' run until no breach flag changes.\n"
        )
        return header + "\n".join(stage.text.rstrip() + "\n" for stage in self.stages)


def template_folder() -> Path:
    """The installed templates (``toolkit.queries``), whichever way the package was installed."""
    return Path(str(files("toolkit.queries")))


def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(template_folder())),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        autoescape=False,
    )
    env.filters["ident"] = quote_ident
    env.filters["literal"] = quote_literal
    env.filters["interval"] = interval
    env.globals["z_for"] = z_for
    return env


def z_for(confidence: float) -> float:
    """The normal quantile for a two-sided interval at ``confidence`` (0.95 -> 1.959964)."""
    return round(NormalDist().inv_cdf(1 - (1 - confidence) / 2), 9)


def wilson_sql(end: str, x: str, n: str, z: str) -> str:
    """The Wilson score bound (``end`` 'lower' or 'upper') as the SQL the breach stage inlines."""
    macros = _env().get_template("macros.sql").module
    return str(getattr(macros, f"wilson_{end}")(x, n, z))


_ENV: jinja2.Environment | None = None


def _env() -> jinja2.Environment:
    global _ENV
    if _ENV is None:
        _ENV = environment()
    return _ENV


def columns_read(checks: list[Check]) -> list[str]:
    """The source columns a set of checks reads, in first-use order (the scan projects only these)."""
    seen: list[str] = []
    for check in checks:
        m = check.measure
        exprs = [e for e in (check.where, m.bad, m.numerator, m.denominator, m.of) if e is not None]
        names = [*check.by, *([m.split] if m.split else []), *(c for e in exprs for c in e.columns)]
        for name in names:
            if name not in seen:
                seen.append(name)
    return seen


def compile_source(checks: list[Check]) -> Stage:
    """The shared first stage: read the new files of one source once for all of ``checks``."""
    sources = {c.source.name for c in checks}
    if len(sources) != 1:
        raise ValueError(f"one source at a time, not {sorted(sources)}")
    return _on_engine(checks[0], (_source_stage(checks),), columns_read(checks))[0]


def _source_stage(checks: list[Check]) -> Stage:
    text = _env().get_template("source.sql").render(source=checks[0].source, columns=columns_read(checks))
    return _stage("source", text)


def compile_check(check: Check) -> CompiledCheck:
    """Render every stage template for ``check`` (its source stage reading only its own columns)."""
    context = {
        "check": check,
        "source": check.source,
        "measure": check.measure,
        "window": check.window,
        "baseline": check.baseline,
        "guard": check.guard,
        "lifecycle": check.lifecycle,
    }
    stages = (_source_stage([check]),) + tuple(
        _stage(name, _env().get_template(f"{name}.sql").render(context)) for name in CHECK_STAGES
    )
    computed = _on_engine(check, stages, columns_read([check]))
    return CompiledCheck(check.name, computed, definition_hash(stages))


def _on_engine(check: Check, stages: tuple[Stage, ...], columns: list[str]) -> tuple[Stage, ...]:
    """With ``engine: spark`` the stages that touch every session become Spark SQL (toolkit.spark_sql);
    the definition hash stays DuckDB's, so switching engines keeps a check's state."""
    if check.source.engine.name != "spark":
        return stages
    from .spark_sql import SPARK_STAGES, mark_reuse, spark_stage

    return mark_reuse(tuple(spark_stage(check, s, columns) if s.name in SPARK_STAGES else s for s in stages))


def definition_hash(stages: tuple[Stage, ...]) -> str:
    """A hash of the DuckDB SQL that forms the check's windows and verdicts (stages source to breach).

    When it changes, windows already stored no longer match what the check computes, so the
    runner asks for a full refresh. The life cycle and severity may change without one: they only
    shape alerts from now on.
    """
    computing = [s.text for s in stages if s.name not in ("lifecycle", "persist")]
    return hashlib.sha256("\n".join(computing).encode()).hexdigest()[:16]


def _stage(name: str, text: str) -> Stage:
    text = "\n".join(line.rstrip() for line in text.splitlines()).strip("\n") + "\n"
    lines = text.splitlines(keepends=True)
    mark = next((i for i, line in enumerate(lines) if line.lstrip().startswith(REPEAT_MARK)), None)
    once_text = "".join(lines if mark is None else lines[:mark])
    repeat_text = "" if mark is None else "".join(lines[mark:])
    return Stage(name, text, _statements(once_text), _statements(repeat_text))


def _statements(sql: str) -> tuple[Statement, ...]:
    """Split on statement boundaries with DuckDB's own parser (literals may hold semicolons)."""
    if not sql.strip():
        return ()
    parts = _parser().extract_statements(sql)
    return tuple(Statement(p.query.strip(), frozenset(p.named_parameters)) for p in parts if p.query.strip())


def statement_kind(sql: str) -> str:
    """What a statement does, as DuckDB's parser names it: 'CREATE', 'INSERT', 'SELECT', …"""
    parts = _parser().extract_statements(sql)
    return parts[0].type.name if parts else ""


_PARSER: duckdb.DuckDBPyConnection | None = None


def _parser() -> duckdb.DuckDBPyConnection:
    """One in-memory connection, used only to split statements (it never runs them)."""
    global _PARSER
    if _PARSER is None:
        _PARSER = duckdb.connect()
    return _PARSER
