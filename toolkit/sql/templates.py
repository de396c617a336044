"""The bottom of the SQL layer: the template environment, statements and stages, and splitting SQL
text into statements with DuckDB's own parser.

Everything that renders or runs SQL from ``queries/`` starts here: the compiler (a check's plan),
the Spark translation, the warehouse's own statements, delivery and the report. It imports nothing
of Plimsoll's above :mod:`toolkit.sql.quoting`.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib.resources import files
from pathlib import Path
from statistics import NormalDist
from typing import Any

import duckdb
import jinja2

from toolkit.sql.quoting import interval, quote_ident, quote_literal

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


def template_folder() -> Path:
    """The installed templates (``toolkit.queries``), whichever way the package was installed."""
    return Path(str(files("toolkit.queries")))


def environment() -> jinja2.Environment:
    """A new environment over ``queries/``: undefined names are errors, every name passes through
    the ``ident`` filter and every constant through ``literal``."""
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


_ENV: jinja2.Environment | None = None


def shared() -> jinja2.Environment:
    """The one environment the library renders with (templates are read once)."""
    global _ENV
    if _ENV is None:
        _ENV = environment()
    return _ENV


def render(name: str, **context: Any) -> str:
    """A template of ``queries/`` rendered with ``context``."""
    return shared().get_template(name).render(context)


def z_for(confidence: float) -> float:
    """The normal quantile for a two-sided interval at ``confidence`` (0.95 -> 1.959964)."""
    return round(NormalDist().inv_cdf(1 - (1 - confidence) / 2), 9)


def wilson_sql(end: str, x: str, n: str, z: str) -> str:
    """The Wilson score bound (``end`` 'lower' or 'upper') as the SQL the breach stage inlines."""
    macros = shared().get_template("macros.sql").module
    return str(getattr(macros, f"wilson_{end}")(x, n, z))


def stage(name: str, text: str) -> Stage:
    """A rendered template as a stage: its statements, those after a ``-- @repeat`` line apart."""
    text = "\n".join(line.rstrip() for line in text.splitlines()).strip("\n") + "\n"
    lines = text.splitlines(keepends=True)
    mark = next((i for i, line in enumerate(lines) if line.lstrip().startswith(REPEAT_MARK)), None)
    once_text = "".join(lines if mark is None else lines[:mark])
    repeat_text = "" if mark is None else "".join(lines[mark:])
    return Stage(name, text, statements(once_text), statements(repeat_text))


def statements(sql: str) -> tuple[Statement, ...]:
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
