"""Identifiers reach SQL only through ``quote_ident`` (the templates' ``ident`` filter).

The templates in ``queries/`` quote every name with ``ident``; this scans the SQL the Python code
builds itself. Read from the source with ``ast``, every piece of SQL text made with an f-string, ``+``
or ``str.format`` (passed to ``execute``, ``executemany``, ``sql`` or ``query``, or starting like a
statement) may interpolate only:

- ``quote_ident(...)``, ``quote_literal(...)`` or ``interval(...)`` (``toolkit/sql/quoting.py``), or a
  number (``int(...)``, ``float(...)``, ``len(...)``);
- a constant: a literal, a module constant (``UPPER_CASE``), a name bound by a ``for`` over literals
  or over a module constant, or a local assigned only such values;
- SQL that was made safe before: a template's ``.render()`` (names through ``ident``) or an
  expression's ``.sql`` (a user expression as sqlglot regenerated its checked tree).

Values passed as bound parameters (``$name``) are not SQL text and are not scanned. What remains is
listed below with the reason it is safe; an exception no longer found fails too, so the list stays
true.
"""

from __future__ import annotations

import ast
import re
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
TOOLKIT = ROOT / "toolkit"
SQL_CALLS = {"execute", "executemany", "sql", "query"}
SQL_TEXT = re.compile(r"^\s*\(?\s*(SELECT|INSERT|UPDATE|DELETE|CREATE|DROP|ALTER|COPY|ATTACH|DETACH|SET|PRAGMA|"
                      r"DESCRIBE|WITH|CALL|EXPORT|IMPORT|LOAD|INSTALL|USE|SUMMARIZE|EXPLAIN|TRUNCATE|MERGE)\b", re.I)
QUOTING = {"quote_ident", "quote_literal", "interval"}
NUMBERS = {"int", "float", "len"}
CONSTANT_NAME = re.compile(r"^_?[A-Z][A-Z0-9_]*$")

# (file, function, interpolated expression): why it is safe
EXCEPTIONS = {
    ("toolkit/lake/files.py", "schema_table", "t"):
        "a column's type as DuckDB printed it when it read the files' schema (DESCRIBE), beside the column's "
        "name through quote_ident; a type, not a name",
}


def _name_of(func: ast.expr) -> str:
    return func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""


def _looks_like_sql(node: ast.expr) -> bool:
    """An f-string, a ``+`` chain or a ``.format`` whose text starts like a SQL statement."""
    if isinstance(node, ast.JoinedStr):
        first = node.values[0] if node.values else None
        return isinstance(first, ast.Constant) and bool(SQL_TEXT.match(first.value))
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add):
        return _looks_like_sql(node.left)
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return bool(SQL_TEXT.match(node.value))
    if isinstance(node, ast.Call) and _name_of(node.func) == "format" and isinstance(node.func, ast.Attribute):
        return _looks_like_sql(node.func.value)
    return False


def _is_built(node: ast.expr) -> bool:
    """Text put together at run time (not a plain literal)."""
    return (isinstance(node, ast.JoinedStr) or (isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add))
            or (isinstance(node, ast.Call) and _name_of(node.func) == "format"))


class Scope:
    """What each local name of one function (or the module) is bound to: assignments and for loops."""

    def __init__(self, body: ast.AST) -> None:
        self.values: dict[str, list[ast.expr]] = {}
        self.loops: dict[str, list[ast.expr]] = {}
        self.parameters: set[str] = set()
        if isinstance(body, (ast.FunctionDef, ast.AsyncFunctionDef)):
            args = body.args
            self.parameters = {a.arg for a in (*args.posonlyargs, *args.args, *args.kwonlyargs)}
        for node in _own_nodes(body):
            if isinstance(node, ast.Assign):
                for target in node.targets:
                    if isinstance(target, ast.Name):
                        self.values.setdefault(target.id, []).append(node.value)
            elif isinstance(node, (ast.AnnAssign, ast.AugAssign)) and isinstance(node.target, ast.Name):
                if node.value is not None:
                    self.values.setdefault(node.target.id, []).append(
                        node.value if isinstance(node, ast.AnnAssign) else ast.Name(id="<augmented>"))
            elif isinstance(node, (ast.For, ast.comprehension)) and isinstance(node.target, ast.Name):
                self.loops.setdefault(node.target.id, []).append(node.iter)


def _own_nodes(body: ast.AST):
    """The nodes of a function (or module) without those of the functions and classes inside it."""
    todo = list(ast.iter_child_nodes(body))
    while todo:
        node = todo.pop()
        yield node
        if not isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)):
            todo.extend(ast.iter_child_nodes(node))


def _constant_iterable(node: ast.expr) -> bool:
    if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
        return all(isinstance(e, ast.Constant) for e in node.elts)
    if isinstance(node, ast.Name):
        return bool(CONSTANT_NAME.match(node.id))
    if isinstance(node, ast.Attribute):
        return bool(CONSTANT_NAME.match(node.attr))
    return False


def unsafe_parts(node: ast.expr, scope: Scope, seen: frozenset[str] = frozenset()) -> list[ast.expr]:
    """The pieces of ``node`` that could put an unquoted name into SQL text."""
    if isinstance(node, ast.Constant):
        return []
    if isinstance(node, ast.JoinedStr):
        return [p for v in node.values if isinstance(v, ast.FormattedValue) for p in unsafe_parts(v.value, scope, seen)]
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add):
        return unsafe_parts(node.left, scope, seen) + unsafe_parts(node.right, scope, seen)
    if isinstance(node, ast.IfExp):
        return unsafe_parts(node.body, scope, seen) + unsafe_parts(node.orelse, scope, seen)
    if isinstance(node, ast.Call):
        name = _name_of(node.func)
        if name in QUOTING or name in NUMBERS or name == "render":
            return []
        if name == "join" and isinstance(node.func, ast.Attribute) and isinstance(node.func.value, ast.Constant):
            (items,) = node.args
            if _constant_iterable(items):
                return []
            if isinstance(items, (ast.GeneratorExp, ast.ListComp)):
                return unsafe_parts(items.elt, scope, seen)
            if isinstance(items, (ast.Tuple, ast.List)):
                return [p for e in items.elts for p in unsafe_parts(e, scope, seen)]
        if name == "format" and isinstance(node.func, ast.Attribute):
            return [p for a in (*node.args, *(k.value for k in node.keywords)) for p in unsafe_parts(a, scope, seen)]
        return [node]
    if isinstance(node, ast.Attribute):
        return [] if node.attr == "sql" or CONSTANT_NAME.match(node.attr) else [node]
    if isinstance(node, ast.Name):
        if CONSTANT_NAME.match(node.id):
            return []
        if node.id in seen or node.id in scope.parameters:
            return [node]
        loops, values = scope.loops.get(node.id, []), scope.values.get(node.id, [])
        if not loops and not values:
            return [node]
        if not all(_constant_iterable(i) for i in loops):
            return [node]
        return [p for v in values for p in unsafe_parts(v, scope, seen | {node.id})]
    return [node]


def findings(source: str, file: str) -> list[tuple[str, str, str, int]]:
    """(file, function, unsafe expression, line) for each unsafe piece of SQL text in ``source``."""
    tree = ast.parse(source)
    found = []
    bodies = [tree, *(n for n in ast.walk(tree) if isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef)))]
    for body in bodies:
        scope = Scope(body)
        function = getattr(body, "name", "<module>")
        texts: list[ast.expr] = []
        bound_values: set[int] = set()
        for node in _own_nodes(body):
            if isinstance(node, ast.Call) and _name_of(node.func) in SQL_CALLS and node.args:
                statement = node.args[0]
                if isinstance(statement, ast.Name):  # SQL text built into a local, then run
                    texts += [v for v in scope.values.get(statement.id, []) if _is_built(v)]
                elif _is_built(statement):
                    texts.append(statement)
                for later in (*node.args[1:], *(k.value for k in node.keywords)):
                    bound_values |= {id(n) for n in ast.walk(later)}
        for node in _own_nodes(body):
            if _is_built(node) and _looks_like_sql(node) and id(node) not in bound_values:
                texts.append(node)
        inner = {id(n) for t in texts for n in ast.walk(t) if n is not t}
        for text in texts:
            if id(text) in inner:
                continue  # part of a longer text, scanned with it
            for part in unsafe_parts(text, scope):
                found.append((file, function, ast.unparse(part), part.lineno))
    return sorted(set(found))


def scan_toolkit() -> list[tuple[str, str, str, int]]:
    return [f for path in sorted(TOOLKIT.rglob("*.py"))
            for f in findings(path.read_text(encoding="utf-8"), path.relative_to(ROOT).as_posix())]


def test_names_reach_sql_only_through_quote_ident_or_as_listed_exceptions() -> None:
    found = scan_toolkit()
    unexplained = [f"{file}:{line}: {function}: {{{expr}}}" for file, function, expr, line in found
                   if (file, function, expr) not in EXCEPTIONS]
    assert not unexplained, "SQL text with a value that is not quoted, bound or constant:\n" + "\n".join(unexplained)
    stale = set(EXCEPTIONS) - {(file, function, expr) for file, function, expr, _ in found}
    assert not stale, f"exceptions no longer found (remove them): {sorted(stale)}"


def scanned(code: str) -> list[str]:
    return [expr for _, _, expr, _ in findings(textwrap.dedent(code), "x.py")]


def test_the_scan_finds_a_name_spliced_into_sql() -> None:
    assert scanned("""
        def f(con, table, column):
            con.execute(f"SELECT {column} FROM {quote_ident(table)}")
    """) == ["column"]
    assert scanned("""
        def f(con, source):
            statement = "DELETE FROM " + source.table + " WHERE x = $x"
            con.execute(statement, {"x": source.name})
    """) == ["source.table"]
    assert scanned("""
        def f(con, name):
            cols = ", ".join(f"{c} INTEGER" for c in name.split())
            sql = f"CREATE TABLE t ({cols})"
            return sql
    """) == ["c"]
    assert scanned("""
        def f(con, names):
            con.sql("SELECT {} FROM t".format(names[0]))
    """) == ["names[0]"]


def test_the_scan_accepts_quoted_bound_and_constant_values() -> None:
    assert scanned("""
        TABLES = ("runs", "alerts")

        def f(con, table, n, expr):
            con.execute(f"SELECT * FROM {quote_ident(table)} LIMIT {int(n)}")
            con.execute(f"SELECT {expr.sql} FROM t WHERE x = $x", {"x": f"{table}"})
            for name in ("windows", "carry"):
                con.execute(f"DELETE FROM {name} WHERE check_name = $c", {"c": table})
            for name in TABLES:
                con.execute(f"DESCRIBE {name}")
            chosen = "status = 'open'"
            con.execute(f"UPDATE alerts SET status = 'closed' WHERE {chosen}")
            print(f"{table}: done")
    """) == []


def test_a_source_name_against_the_rules_is_one_problem_not_a_parser_error_for_its_expressions(make_project) -> None:
    # the binder's empty table of the source's columns is named after the source: unquoted, a name
    # with a '-' or a space made every expression of the source fail to parse as well
    from toolkit.config.project import load_project
    from toolkit.problems import ProjectInvalid

    from conftest import FIXTURE_LAKE

    for name in ("sessions-eu", "fernhill sessions", 'x"y'):
        project = make_project({}, f"warehouse: w.duckdb\nsources:\n  '{name}':\n    path: {FIXTURE_LAKE}\n"
                                   "    session_id: session_id\n    event_time: ended_at::TIMESTAMP\n"
                                   "    exclude: is_bot\n")
        try:
            load_project(project)
        except ProjectInvalid as err:
            problems = str(err).splitlines()
        else:
            raise AssertionError(f"source {name!r} was accepted")
        assert problems == [f"{project}:3: source name '{name}' is not valid: use [a-z][a-z0-9_]*"], problems
