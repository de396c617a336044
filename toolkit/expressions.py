"""Parsing and checking the SQL expressions users write in checks.

An expression is accepted only if it parses as exactly one SQL expression, contains no comment, no
subquery, no table reference, no aggregate or window function and no function that reads the clock or
a random source, and names only columns of its source. What reaches a template is the SQL that
sqlglot regenerates from the checked tree, with every identifier quoted: never the text as typed.
"""

from __future__ import annotations

import difflib

import sqlglot
from sqlglot import exp
from sqlglot.dialects.duckdb import DuckDB
from sqlglot.errors import ParseError, TokenError

from .model import Expr

# Functions whose result depends on when or how often a run happens: decisions must use data time.
_VOLATILE = {
    "now", "current_timestamp", "current_date", "current_time", "get_current_timestamp",
    "get_current_time", "today", "random", "uuid", "gen_random_uuid", "setseed", "nextval",
    "currval", "current_setting", "getenv", "transaction_timestamp", "epoch_ms_now",
}
_VOLATILE_NODES = (
    exp.CurrentDate, exp.CurrentTime, exp.CurrentTimestamp, exp.Rand, exp.Uuid,
)


class ExpressionError(ValueError):
    """Why an expression was refused, in words a user can act on."""


def parse_expression(text: str, columns: dict[str, str] | None) -> Expr:
    """Check ``text`` as one expression over ``columns`` and return it with regenerated SQL.

    ``columns=None`` skips the column check (commands that only read the warehouse)."""
    if not isinstance(text, str) or not text.strip():
        raise ExpressionError("expected a SQL expression, got nothing")
    _refuse_comments(text)
    try:
        trees = [t for t in sqlglot.parse(text, read="duckdb") if t is not None]
    except (ParseError, TokenError) as err:
        raise ExpressionError(f"not valid SQL: {_first_line(err)}") from None
    if len(trees) != 1:
        raise ExpressionError("must be a single expression; found more than one statement")
    tree = trees[0]
    _refuse_shapes(tree)
    used = _check_columns(tree, columns)
    sql = tree.sql(dialect="duckdb", identify=True)
    return Expr(text=text.strip(), sql=sql, columns=tuple(used))


def _refuse_comments(text: str) -> None:
    try:
        tokens = DuckDB().tokenize(text)
    except TokenError as err:
        raise ExpressionError(f"not valid SQL: {_first_line(err)}") from None
    if any(token.comments for token in tokens):
        raise ExpressionError("comments are not allowed inside expressions")


def _refuse_shapes(tree: exp.Expression) -> None:
    if isinstance(tree, exp.Alias):
        raise ExpressionError(f"not valid SQL: unexpected text after '{tree.this.sql()}'")
    if not isinstance(tree, exp.Condition) or isinstance(tree, (exp.Query, exp.Subquery)):
        kind = type(tree).__name__.upper()
        raise ExpressionError(f"must be an expression over the source's columns, not a statement ({kind})")
    for node in tree.walk():
        if isinstance(node, (exp.Query, exp.Subquery, exp.Table, exp.Exists)):
            raise ExpressionError("subqueries and table references are not allowed")
        if isinstance(node, (exp.Window, exp.AggFunc)):
            raise ExpressionError(
                "aggregate and window functions are not allowed: the measure aggregates for you"
            )
        if isinstance(node, exp.Placeholder) or isinstance(node, exp.Parameter):
            raise ExpressionError("parameters are not allowed in expressions")
        if isinstance(node, _VOLATILE_NODES) or (
            isinstance(node, exp.Func) and _function_name(node) in _VOLATILE
        ):
            raise ExpressionError(
                f"{_function_name(node)}() is not allowed: decisions use data time, never the clock"
            )
        if isinstance(node, exp.Column) and node.table:
            raise ExpressionError(f"write column '{node.name}' without a table name")
        if isinstance(node, exp.Star):
            raise ExpressionError("'*' is not allowed: name the columns")


def _function_name(node: exp.Expression) -> str:
    if isinstance(node, exp.Anonymous):
        return str(node.this).lower()
    if isinstance(node, exp.Func):
        return node.sql_name().lower()
    return type(node).__name__.lower()


def _check_columns(tree: exp.Expression, columns: dict[str, str] | None) -> list[str]:
    used: list[str] = []
    if columns is None:
        return sorted({c.name for c in tree.find_all(exp.Column)})
    by_lower = {name.lower(): name for name in columns}
    lambda_args = {
        arg.name for node in tree.find_all(exp.Lambda) for arg in node.expressions
    }
    for column in tree.find_all(exp.Column):
        name = column.name
        if name in lambda_args:
            continue
        if name not in columns:
            if name.lower() in by_lower:
                name = by_lower[name.lower()]
            else:
                raise ExpressionError(unknown_column(column.name, columns))
        if name not in used:
            used.append(name)
    return used


def unknown_column(name: str, columns: dict[str, str] | list[str]) -> str:
    """The message for a column the source does not have, with the closest names it does have."""
    close = difflib.get_close_matches(name, list(columns), n=1, cutoff=0.6)
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    return f"unknown column '{name}'{hint}"


def _first_line(err: Exception) -> str:
    return str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
