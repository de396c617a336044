"""The bottom of the SQL layer: the template environment, statements and stages, and splitting SQL
text into statements with DuckDB's own parser.

Everything that renders or runs SQL from ``queries/`` starts here: the compiler (a check's plan),
the Spark translation, the warehouse's own statements, delivery and the report. It imports nothing
of Plimsoll's above :mod:`toolkit.sql.quoting`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from importlib.resources import files
from pathlib import Path
from statistics import NormalDist
from typing import Any

import duckdb
import jinja2

from toolkit.sql.quoting import interval, quote_ident, quote_literal

# Directives a stage template may hold, each a line of its own (the Spark plans have theirs, see
# toolkit.sql.spark):
#   -- @statement NAME    names the one statement below it, which runs only where a directive names it
#   -- @loop until NAME = 0, at most LIMIT rounds
#                         the statements from here to `-- @end` are one round, repeated: LIMIT, a
#                         named statement before the loop, gives the most rounds allowed; NAME, the
#                         round's last statement, runs at the end of each round, and the loop stops
#                         when it returns 0 (more rounds than LIMIT is an error)
#   -- @end               the end of the loop
_DIRECTIVE = re.compile(r"^-- @(statement|loop|end)\b(.*)$", re.MULTILINE)
_STATEMENT_NAME = re.compile(r"^ ([a-z][a-z0-9_]*(?:\.[a-z][a-z0-9_]*)*)$")
_LOOP = re.compile(r"^ until ([a-z][a-z0-9_]*) = 0, at most ([a-z][a-z0-9_]*) rounds$")


class TemplateError(ValueError):
    """A template whose directives do not make sense: a fault in ``queries/``, not in a project."""


@dataclass(frozen=True)
class Statement:
    """One SQL statement and the named parameters (``$files`` …) it takes."""

    sql: str
    params: frozenset[str]

    def bound(self, params: dict[str, Any]) -> dict[str, Any]:
        """The values of the parameters this statement takes, from ``params``."""
        missing = sorted(self.params - params.keys())
        if missing:
            raise KeyError(f"no value for ${', $'.join(missing)} in {self.sql[:60]!r}")
        return {name: params[name] for name in self.params}


@dataclass(frozen=True)
class Named:
    """A template of named statements: each ``-- @statement NAME`` section holds one or more
    statements, which the code that rendered it executes by name (the run's own bookkeeping, the
    lake's checks of new files, the warehouse's layout and copies). Names may be dotted, the first
    part saying when a statement runs (``begin.transaction``)."""

    template: str
    sections: tuple[tuple[str, str, tuple[Statement, ...]], ...]  # (name, its text, its statements)

    def __getitem__(self, name: str) -> tuple[Statement, ...]:
        for found, _, statements_ in self.sections:
            if found == name:
                return statements_
        raise KeyError(f"{self.template} has no statement named {name}")

    def text(self, *names: str) -> str:
        """The sections of ``names`` (a name ending in '.' stands for every section it begins), as
        written in the template, each with its directive line, for ``plimsoll sql``."""
        chosen = [text for n in names for name, text, _ in self.sections
                  if name == n or (n.endswith(".") and name.startswith(n))]
        if not chosen:
            raise KeyError(f"{self.template} has no statement named {', '.join(names)}")
        return "\n".join(chosen)


def named(template: str, **context: Any) -> Named:
    """A template of ``queries/`` rendered with ``context`` and read as named statements."""
    return read_named(template, render(template, **context))


def read_named(template: str, text: str) -> Named:
    """Rendered SQL read as named statements. Text before the first ``-- @statement`` line is the
    template's own preamble; comment lines at the end of a section introduce the next one and are
    left out of it."""
    text = tidy(text)
    sections: list[tuple[str, str, tuple[Statement, ...]]] = []
    for directive, argument, body in _parts(text):
        if directive == "":
            if statements(body):
                raise TemplateError(f"{template}: statements before the first '-- @statement NAME'")
            continue
        found = _STATEMENT_NAME.match(argument)
        if directive != "statement" or not found:
            raise TemplateError(f"{template}: '-- @{directive}{argument}': only '-- @statement NAME' is read here")
        body = _without_trailing_comments(body)
        found_statements = statements(body)
        if not found_statements:
            raise TemplateError(f"{template}: '-- @statement {found.group(1)}' holds no statement")
        if any(name == found.group(1) for name, _, _ in sections):
            raise TemplateError(f"{template}: two statements named {found.group(1)}")
        sections.append((found.group(1), f"-- @statement {found.group(1)}\n{body.strip(chr(10))}\n", found_statements))
    return Named(template, tuple(sections))


def _without_trailing_comments(body: str) -> str:
    lines = body.rstrip("\n").split("\n")
    while lines and (not lines[-1].strip() or lines[-1].lstrip().startswith("--")):
        lines.pop()
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class Loop:
    """Statements repeated round after round until a named query returns 0 (``-- @loop``)."""

    rounds: tuple[Statement, ...]  # one round
    until: Statement               # run after each round: the loop stops when it returns 0
    limit: Statement               # run before the first round: the most rounds allowed
    until_name: str
    limit_name: str


@dataclass(frozen=True)
class Stage:
    """One template's SQL: statements run once, then (in the verdict stage) a loop of rounds, then
    statements run once after it."""

    name: str
    text: str
    once: tuple[Statement, ...]
    loop: Loop | None = None
    after: tuple[Statement, ...] = ()


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


def tidy(text: str) -> str:
    """Rendered SQL without trailing spaces or blank lines at either end."""
    return "\n".join(line.rstrip() for line in text.splitlines()).strip("\n") + "\n"


def stage(name: str, text: str) -> Stage:
    """A rendered template as a stage: its statements, and the loop its directives describe.

    The loop's limit is a named statement before ``-- @loop``; its stop condition is the named
    statement that ends the round, just before ``-- @end``. Anything else is a fault in the template.
    """
    text = tidy(text)
    once: list[Statement] = []
    rounds: list[Statement] = []
    after: list[Statement] = []
    named: dict[str, Statement] = {}
    until = limit = ""
    state = "before"  # -> "round" (after @loop) -> "closing" (after the stop condition) -> "after" (@end)
    for directive, argument, body in _parts(text):
        if directive == "":
            once.extend(statements(body))
        elif directive == "statement":
            found = _STATEMENT_NAME.match(argument)
            if not found:
                raise TemplateError(f"{name}: '-- @statement{argument}': expected '-- @statement NAME'")
            named[found.group(1)] = _one(name, found.group(1), body)
            if state == "round" and found.group(1) == until:
                state = "closing"
            elif state != "before":
                raise TemplateError(f"{name}: '-- @statement {found.group(1)}' after the loop began: only its "
                                    f"stop condition ({until}) is named there, as the round's last statement")
        elif directive == "loop":
            found = _LOOP.match(argument)
            if not found:
                raise TemplateError(f"{name}: '-- @loop{argument}': expected "
                                    "'-- @loop until NAME = 0, at most LIMIT rounds'")
            if state != "before":
                raise TemplateError(f"{name}: one loop per stage")
            until, limit = found.group(1), found.group(2)
            if limit not in named:
                raise TemplateError(f"{name}: the loop's limit '{limit}' must be a '-- @statement {limit}' before it")
            rounds.extend(statements(body))
            state = "round"
        else:  # end
            if state != "closing" or argument.strip():
                raise TemplateError(f"{name}: '-- @end' must follow the loop's stop condition "
                                    f"('-- @statement {until or 'NAME'}', the round's last statement)")
            after.extend(statements(body))
            state = "after"
    if state in ("round", "closing"):
        raise TemplateError(f"{name}: '-- @loop' without '-- @end'")
    unused = sorted(set(named) - {until, limit})
    if unused:
        raise TemplateError(f"{name}: named statements that no loop uses: {', '.join(unused)}")
    if state == "before":
        return Stage(name, text, tuple(once))
    return Stage(name, text, tuple(once), Loop(tuple(rounds), named[until], named[limit], until, limit), tuple(after))


def _parts(text: str) -> list[tuple[str, str, str]]:
    """The text as (directive, its argument, the text up to the next directive); the text before
    the first directive comes as ('', '', text)."""
    marks = list(_DIRECTIVE.finditer(text))
    out = [("", "", text[:marks[0].start()] if marks else text)]
    for mark, following in zip(marks, [*marks[1:], None]):
        out.append((mark.group(1), mark.group(2), text[mark.end():following.start() if following else len(text)]))
    return out


def _one(where: str, name: str, body: str) -> Statement:
    found = statements(body)
    if len(found) != 1:
        raise TemplateError(f"{where}: '-- @statement {name}' holds {len(found)} statements; a named statement is one")
    return found[0]


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
