"""Parsing and checking the SQL expressions users write in checks.

An expression is accepted only if it parses as exactly one SQL expression, contains no comment, no
subquery, no table reference, no aggregate or window function, calls only the deterministic
functions of :data:`ALLOWED_FUNCTIONS`, and names only columns of its source. What reaches a
template is the SQL that sqlglot regenerates from the checked tree, with every identifier quoted:
never the text as typed.

Two parsers look at every expression. sqlglot parses it and regenerates it; DuckDB then parses both
the text as written and the regenerated SQL (``json_serialize_sql``), and every node of DuckDB's own
tree must be of a kind listed here: each function call on the allow-list, each column reference a
column of the source. DuckDB's tree is the one that runs, so a word DuckDB would bind to the clock
(``localtimestamp``, ``current_date``) is caught even where sqlglot sees something else.
"""

from __future__ import annotations

import difflib
import functools
import json
import threading
from typing import Any

import duckdb
import sqlglot
from sqlglot import exp
from sqlglot.dialects.duckdb import DuckDB
from sqlglot.errors import ParseError, TokenError

from toolkit.model import Expr
from toolkit.sql.quoting import quote_ident

# Every function an expression may call, by the name DuckDB's parser gives it (lower case; operators
# by their symbol: DuckDB parses `a + b` as a call of `+`, `x LIKE 'a%'` as `~~`). Each one returns
# the same value for the same row in every run. An allow-list, not a list of what to refuse: a
# function that is not here is refused, whatever DuckDB's catalogue says of it (it calls `age(ts)`
# consistent, yet `age` of one timestamp counts from today). tests/test_expressions.py holds the list
# against DuckDB's catalogue and the README's list against this one.
ALLOWED_FUNCTIONS: frozenset[str] = frozenset({
    # arithmetic, text and bit operators
    "+", "-", "*", "/", "//", "%", "**", "^", "||", "&", "|", "~", "<<", ">>", "@",
    # LIKE, NOT LIKE, ILIKE, NOT ILIKE, GLOB, ^@ (starts with)
    "~~", "!~~", "~~*", "!~~*", "~~~", "^@",
    # conditions
    "if", "nullif",
    # numbers
    "abs", "sign", "round", "floor", "ceil", "ceiling", "trunc", "sqrt", "cbrt", "exp", "ln", "log",
    "log2", "log10", "pow", "power", "greatest", "least", "isnan", "isinf", "isfinite",
    # text
    "lower", "upper", "lcase", "ucase", "length", "len", "strlen", "trim", "ltrim", "rtrim",
    "substring", "substr", "left", "right", "concat", "concat_ws", "replace", "reverse", "lpad", "rpad",
    "split_part", "string_split", "str_split", "starts_with", "ends_with", "prefix", "suffix",
    "contains", "strpos", "instr", "position", "regexp_matches", "regexp_full_match",
    "regexp_extract", "regexp_replace", "levenshtein", "damerau_levenshtein", "hamming", "jaccard",
    "jaro_similarity", "jaro_winkler_similarity",
    # times: making them from epoch numbers or text, and taking them apart
    "epoch", "epoch_ms", "epoch_us", "epoch_ns", "make_timestamp", "make_date", "make_time",
    "to_timestamp", "strptime", "try_strptime", "strftime", "date_part", "datepart", "date_trunc",
    "datetrunc", "date_diff", "datediff", "date_sub", "datesub", "time_bucket", "last_day", "year",
    "quarter", "month", "week", "day", "dayofweek", "isodow", "dayofyear", "dayname", "monthname",
    "hour", "minute", "second", "millisecond",
    # intervals (INTERVAL 1 DAY is parsed as to_days(1))
    "to_years", "to_months", "to_weeks", "to_days", "to_hours", "to_minutes", "to_seconds",
    "to_milliseconds", "to_microseconds",
    # lists and structs, lambdas included
    "list_value", "list_contains", "array_contains", "list_has_any", "list_has_all", "list_extract",
    "array_extract", "array_length", "list_transform", "list_filter", "struct_pack", "struct_extract",
})

# Where a user reads the list: named in every refusal.
LISTED_IN = "README.md under 'SQL expressions'"
_CLOCK = "decisions use data time, never the clock or chance"

# Kinds of node in DuckDB's parse tree an expression may contain (anything else is refused).
_NODE_CLASSES = frozenset({
    "BETWEEN", "CASE", "CAST", "COLLATE", "COLUMN_REF", "COMPARISON", "CONJUNCTION", "CONSTANT",
    "FUNCTION", "LAMBDA", "OPERATOR", "TYPE",
})
_OPERATORS = frozenset({
    "OPERATOR_NOT", "OPERATOR_IS_NULL", "OPERATOR_IS_NOT_NULL", "COMPARE_IN", "COMPARE_NOT_IN",
    "OPERATOR_COALESCE", "OPERATOR_NULLIF", "OPERATOR_TRY", "ARRAY_EXTRACT", "ARRAY_SLICE",
    "STRUCT_EXTRACT", "ARRAY_CONSTRUCTOR",
})
# Functions DuckDB's catalogue does not mark as reading the clock although they can (for messages).
_CLOCK_DESPITE_CATALOGUE = frozenset({"age"})


class ExpressionError(ValueError):
    """Why an expression was refused, in words a user can act on."""


def parse_expression(text: str, columns: dict[str, str] | None) -> Expr:
    """Check ``text`` as one expression over ``columns`` and return it with regenerated SQL.

    ``columns=None`` skips the column check (commands that only read the warehouse); words DuckDB
    would bind to the clock are refused all the same."""
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
    # As written, so that a refusal names the function the user typed (sqlglot renames some, e.g.
    # gen_random_uuid() to uuid()). Skipped when DuckDB reads the text as more than one expression;
    # the regenerated SQL below is what runs, and it is checked in full.
    written = _duckdb_tree(text.strip(), strict=False)
    if written is not None:
        _check_tree(written, columns, unknown_columns=False, found=[])
    used = _check_columns(tree, columns)
    sql = tree.sql(dialect="duckdb", identify=True)
    # As it will run: authoritative. A column DuckDB reads that sqlglot took for something else (a
    # source column named current_date, written bare) is read too: left out of the columns a run
    # projects, DuckDB would bind the word to the clock instead.
    found: list[str] = []
    _check_tree(_duckdb_tree(sql, strict=True), columns, unknown_columns=True, found=found)
    used += [name for name in dict.fromkeys(found) if name not in used]
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
        if isinstance(node, exp.Column) and node.table:
            raise ExpressionError(f"write column '{node.name}' without a table name")
        if isinstance(node, exp.Star):
            raise ExpressionError("'*' is not allowed: name the columns")


# ── DuckDB's parse tree ──────────────────────────────────────────────────────────────────────────

_lock = threading.Lock()


@functools.lru_cache(maxsize=1)
def _connection() -> duckdb.DuckDBPyConnection:
    """An in-memory connection, without tables, for parsing, probing bare words and the catalogue."""
    return duckdb.connect(":memory:")


def _duckdb_tree(sql: str, strict: bool) -> dict[str, Any] | None:
    """DuckDB's parse tree of ``SELECT <sql>``: the one select-list expression.

    Not strict: None when DuckDB reads the text as anything but one plain expression."""
    try:
        with _lock:
            serialized = _connection().execute("SELECT json_serialize_sql($1)",
                                               ["SELECT " + sql]).fetchone()[0]
        parsed = json.loads(serialized)
    except (duckdb.Error, ValueError, TypeError) as err:
        if not strict:
            return None
        raise ExpressionError(f"not valid SQL: {_first_line(err)}") from None
    if parsed.get("error"):
        if not strict:
            return None
        message = str(parsed.get("error_message") or "").strip()
        first = message.splitlines()[0] if message else "DuckDB cannot parse it"
        raise ExpressionError(f"not valid SQL: {first}")
    statements = parsed.get("statements") or []
    node = statements[0].get("node", {}) if len(statements) == 1 else {}
    plain = (
        node.get("type") == "SELECT_NODE" and len(node.get("select_list") or []) == 1
        and (node.get("from_table") or {}).get("type") == "EMPTY"
        and not any(node.get(k) for k in ("where_clause", "having", "qualify", "sample", "modifiers",
                                           "group_expressions", "group_sets"))
        and not (node.get("cte_map") or {}).get("map")
    )
    if not plain:
        if not strict:
            return None
        raise ExpressionError("must be a single expression over the source's columns")
    return node["select_list"][0]


def _check_tree(node: Any, columns: dict[str, str] | None, unknown_columns: bool, found: list[str],
                lambdas: frozenset[str] = frozenset()) -> None:
    """Walk DuckDB's tree: every node of an allowed kind, every call allowed, every column known
    (the source columns it reads are added to ``found``)."""
    if isinstance(node, list):
        for item in node:
            _check_tree(item, columns, unknown_columns, found, lambdas)
        return
    if not isinstance(node, dict):
        return
    kind = node.get("class")
    if kind is None:
        for value in node.values():
            _check_tree(value, columns, unknown_columns, found, lambdas)
        return
    if kind not in _NODE_CLASSES:
        raise ExpressionError(_node_refusal(kind, node))
    if kind == "COLUMN_REF":
        _check_column_ref(node, columns, unknown_columns, found, lambdas)
        return
    if kind == "LAMBDA":
        params = frozenset(name.lower() for name in _lambda_params(node.get("lhs")))
        _check_tree(node.get("expr"), columns, unknown_columns, found, lambdas | params)
        return
    if kind == "FUNCTION":
        _check_function(node)
    if kind == "OPERATOR" and node.get("type") not in _OPERATORS:
        raise ExpressionError(f"{str(node.get('type')).lower()} is not allowed in expressions")
    for value in node.values():
        _check_tree(value, columns, unknown_columns, found, lambdas)


def _node_refusal(kind: str, node: dict[str, Any]) -> str:
    if kind == "SUBQUERY":
        return "subqueries and table references are not allowed"
    if kind == "WINDOW":
        return "aggregate and window functions are not allowed: the measure aggregates for you"
    if kind == "STAR":
        return "'*' is not allowed: name the columns"
    if kind == "PARAMETER":
        return "parameters are not allowed in expressions"
    return f"{kind.lower().replace('_', ' ')} is not allowed in expressions"


def _check_function(node: dict[str, Any]) -> None:
    name = str(node.get("function_name", "")).lower()
    shown = name if node.get("is_operator") else f"{name}()"
    if node.get("schema") or node.get("catalog"):
        raise ExpressionError(f"write {shown} without a schema name")
    if node.get("filter") is not None or node.get("distinct") or (node.get("order_bys") or {}).get("orders"):
        raise ExpressionError(f"{shown} with DISTINCT, ORDER BY or FILTER is not allowed: that makes it an "
                              "aggregate, and the measure aggregates for you")
    if name not in ALLOWED_FUNCTIONS:
        raise ExpressionError(_refusal(name, shown))


def _refusal(name: str, shown: str) -> str:
    """Why a function that is not on the list is refused, from DuckDB's catalogue of it."""
    kinds = _catalogue().get(name, set())
    if any(t in ("aggregate", "window") for t, _ in kinds):
        why = "it is an aggregate or window function, and the measure aggregates for you"
    elif name in _CLOCK_DESPITE_CATALOGUE or any(clock for _, clock in kinds):
        why = _CLOCK
    elif kinds:
        why = "it is not among the functions a check may use"
    else:
        why = "DuckDB has no such function, and it is not among the functions a check may use"
    return f"{shown} is not allowed: {why}; allowed functions are listed in {LISTED_IN}"


def _check_column_ref(node: dict[str, Any], columns: dict[str, str] | None, unknown_columns: bool,
                      found: list[str], lambdas: frozenset[str]) -> None:
    names = [str(n) for n in node.get("column_names") or []]
    if len(names) != 1:
        raise ExpressionError(f"write column '{names[-1] if names else ''}' without a table name")
    name = names[0]
    if name.lower() in lambdas:
        return
    by_lower = {c.lower(): c for c in columns or ()}
    if name.lower() in by_lower:
        found.append(name if name in by_lower.values() else by_lower[name.lower()])
        return
    if _binds_without_a_table(name):
        raise ExpressionError(f"{name.lower()} is not allowed: {_CLOCK}; "
                              f"allowed functions are listed in {LISTED_IN}")
    if columns is not None and unknown_columns:
        raise ExpressionError(unknown_column(name, columns))


def _lambda_params(lhs: Any) -> list[str]:
    """The parameter names of a lambda: one COLUMN_REF, or a row() of them."""
    if not isinstance(lhs, dict):
        return []
    if lhs.get("class") == "COLUMN_REF":
        return [str(n) for n in lhs.get("column_names") or []][-1:]
    if lhs.get("class") == "FUNCTION" and str(lhs.get("function_name")).lower() == "row":
        return [p for arg in lhs.get("arguments") or [] for p in _lambda_params(arg.get("expression"))]
    raise ExpressionError("a lambda's parameters must be plain names")


@functools.lru_cache(maxsize=256)
def _binds_without_a_table(name: str) -> bool:
    """Whether DuckDB gives this bare word a value with no table at all (``current_date``,
    ``localtimestamp``): then it is no column but a function of the moment the query runs."""
    try:
        with _lock:
            _connection().execute(f"DESCRIBE SELECT {quote_ident(name)}").fetchall()
        return True
    except (duckdb.Error, ValueError):
        return False


@functools.lru_cache(maxsize=1)
def _catalogue() -> dict[str, set[tuple[str, bool]]]:
    """Each DuckDB function name with its kinds, and whether one of its forms changes from run to
    run (for refusal messages only). Forms over times with a time zone read only the TimeZone
    setting, which runs fix to UTC: they are no reason to call a function one of the clock."""
    with _lock:
        rows = _connection().execute(
            "SELECT DISTINCT lower(function_name), function_type, stability IN ('VOLATILE', "
            "'CONSISTENT_WITHIN_QUERY') AND NOT list_has_any(parameter_types, ['TIMESTAMP WITH TIME ZONE', "
            "'TIMESTAMPTZ_NS', 'TIME WITH TIME ZONE']) FROM duckdb_functions()"
        ).fetchall()
    found: dict[str, set[tuple[str, bool]]] = {}
    for name, kind, clock in rows:
        found.setdefault(name, set()).add((kind, bool(clock)))
    return found


# ── columns ──────────────────────────────────────────────────────────────────────────────────────


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
