"""Binding a check's columns and expressions to its source's Parquet schema: each expression is
checked (:mod:`toolkit.config.expressions`), then bound by DuckDB against an empty table of the
source's columns to the type its key needs."""

from __future__ import annotations

import re

import duckdb

from toolkit.config.expressions import ExpressionError, parse_expression, unknown_column
from toolkit.config.fields import PLAIN_NAME, Section
from toolkit.config.yamlsource import dotted
from toolkit.lake import files as lake
from toolkit.model import Expr, Source
from toolkit.sql.quoting import quote_ident


NUMERIC = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|UHUGEINT|FLOAT|"
    r"DOUBLE|DECIMAL(\(\d+,\s*\d+\))?)$"
)


# every timestamp type Parquet writers produce, as DuckDB names them (with and without a time zone)
TIMES = re.compile(r"^(TIMESTAMP(_S|_MS|_NS)?|TIMESTAMPTZ(_NS)?|TIMESTAMP(_NS)? WITH TIME ZONE|DATE)$")


class Binder:
    """Checks expressions and columns against a source's schema, using DuckDB to bind types."""

    def __init__(self, con: duckdb.DuckDBPyConnection, source: Source):
        self.con, self.source = con, source
        self.table = lake.schema_table(con, source.name, source.columns) if source.columns else None

    def column(self, section: Section, name: str | None, key: str) -> str | None:
        if name is None or not self.source.columns:
            return name
        if name not in self.source.columns:
            section.error((*section.path, key), f"{dotted((*section.path, key))}: "
                          f"{unknown_column(name, self.source.columns)} in source '{self.source.name}'")
            return None
        return name

    def expr(self, section: Section, text: str | None, key: str, want: str) -> Expr | None:
        if text is None:
            return None
        path = (*section.path, key)
        try:
            parsed = parse_expression(text, self.source.columns or None)
        except ExpressionError as err:
            section.error(path, f"{dotted(path)}: {err}")
            return None
        if self.source.engine.name == "spark":
            from toolkit.sql.spark import TranslationError, spark_expression

            try:
                spark_expression(parsed.sql)
            except TranslationError as err:
                section.error(path, f"{dotted(path)}: cannot run on engine spark: {err}")
                return None
        if self.table is None:
            return parsed
        try:
            row = self.con.execute(f"DESCRIBE SELECT {parsed.sql} AS v FROM {quote_ident(self.table)}").fetchone()
        except duckdb.Error as err:
            first = str(err).strip().splitlines()[0]
            section.error(path, f"{dotted(path)}: DuckDB cannot use this expression: {first}")
            return None
        kind = str(row[1]) if row else "?"
        if want == "boolean" and kind != "BOOLEAN":
            section.error(path, f"{dotted(path)}: must be true/false per session, but is {kind}")
            return None
        if want == "number" and not NUMERIC.match(kind):
            section.error(path, f"{dotted(path)}: must be a number per session, but is {kind}")
            return None
        if want == "time" and not TIMES.match(kind):
            section.error(path, f"{dotted(path)}: must give a timestamp per session, but is {kind}; "
                          "turn epoch numbers or text into one, e.g. epoch_ms(ended_ms) or ended_iso::TIMESTAMP")
            return None
        return parsed

    def time(self, section: Section, text: str | None) -> Expr | None:
        """The event time: a timestamp column as it is, or an expression giving a timestamp."""
        if text is None:
            return None
        if text in self.source.columns or (not self.source.columns and PLAIN_NAME.match(text)):
            kind = self.source.columns.get(text)
            if kind is not None and not TIMES.match(kind):
                section.error((*section.path, "event_time"),
                              f"{dotted((*section.path, 'event_time'))}: column '{text}' is {kind}, not a "
                              "timestamp; give an expression that makes one, e.g. epoch_ms(" + text + ")")
                return None
            return Expr(text=text, sql=quote_ident(text), columns=(text,))
        return self.expr(section, text, "event_time", "time")
