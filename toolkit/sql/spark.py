"""The stages that touch every session, as Spark SQL: DuckDB's statements translated by sqlglot,
and Spark's own where the engines differ (``queries/spark/*.sql``).

With ``engine: spark`` the source, scan, window and measure stages run on Spark; the baseline,
breach, life-cycle and persist stages run on the warehouse as with DuckDB. A Spark stage template
is a list of directives, one statement each, that say where each of DuckDB's statements runs:

``-- @translate NAME``  DuckDB's statement that creates NAME, translated to Spark SQL
``-- @spark NAME``      the statement below (DuckDB syntax, translated) replaces or adds NAME on Spark
``-- @duckdb [NAME]``   the statement below runs on the warehouse connection (NAME: instead of Spark)
``-- @read NAME``       Spark reads the run's new files (``$files``) as the view NAME
``-- @to-spark NAME``   the DuckDB query below; its rows become the Spark view NAME
``-- @to-duckdb NAME``  the Spark query below; its rows become the DuckDB relation NAME

Every statement of DuckDB's stage must be named by one of the first three, so a statement added to
a DuckDB template cannot silently go missing on Spark. In Spark a series key stays a STRUCT (or
'' without ``by``): Spark cannot group or join on MAPs, so the warehouse's MAP keys become STRUCTs
on the way in and MAPs again on the way out, in DuckDB SQL.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, replace

import sqlglot
from sqlglot import exp, transforms
from sqlglot.dialects.spark import Spark
from sqlglot.errors import ErrorLevel, SqlglotError

from toolkit.sql.templates import Stage, Statement, shared, statements
from toolkit.model import Check, Engine

SPARK_STAGES = ("source", "scan", "window", "measure")
_DIRECTIVE = re.compile(r"^-- @(translate|spark|duckdb|read|to-spark|to-duckdb)\b *(\w+)? *$", re.MULTILINE)
_CREATES = re.compile(r"CREATE\s+OR\s+REPLACE\s+TEMP(?:ORARY)?\s+(?:TABLE|VIEW)\s+(\w+)", re.IGNORECASE)
_LABEL = {
    "spark": "on Spark",
    "duckdb": "on DuckDB (the warehouse)",
    "read": "on Spark: the new files ($files) as view {name}: Parquet, hive partitions, columns merged by name",
    "to-spark": "DuckDB rows -> Spark view {name}",
    "to-duckdb": "Spark rows -> DuckDB relation {name}",
}


class TranslationError(ValueError):
    """SQL that has no faithful Spark SQL form."""


@dataclass(frozen=True)
class SparkStatement(Statement):
    """One step of a Spark stage: Spark SQL, a read of the new files, or rows moved between engines.

    ``action`` is ``spark``, ``read``, ``to-spark`` or ``to-duckdb``; ``sql`` is what runs (DuckDB
    SQL for ``to-spark``), ``name`` the view or relation it makes, ``base`` the folder below which
    a read finds hive partitions. The runner hands these to :mod:`toolkit.engine.spark`.
    """

    engine: Engine
    action: str
    name: str | None = None
    base: str | None = None
    keep: bool = True


class _Generator(Spark.Generator):  # type: ignore[name-defined,misc]
    """Spark's generator, keeping what Spark 4 runs as DuckDB does and fixing what differs."""

    TRANSFORMS = {
        **Spark.Generator.TRANSFORMS,
        # Spark 4 has QUALIFY; rewriting it into a subquery would add a column to `SELECT *`
        exp.Select: transforms.preprocess(
            [transforms.eliminate_distinct_on, transforms.unnest_to_explode, transforms.any_to_exists]
        ),
        # quantile_cont is exact with linear interpolation; so is Spark's percentile (not
        # percentile_approx, and not percentile_cont, which Spark only takes WITHIN GROUP)
        exp.PercentileCont: lambda self, e: self.func("PERCENTILE", e.this, e.expression),
        # DuckDB's make_timestamp(µs) is a naive timestamp; timestamp_micros is Spark's local one
        exp.UnixToTime: lambda self, e: f"CAST({_micros_sql(self, e)} AS TIMESTAMP_NTZ)",
    }


def _micros_sql(gen: _Generator, e: exp.UnixToTime) -> str:
    scale = e.args.get("scale")
    if scale is None or int(scale.this) != 6:
        unit = {"0": "seconds (to_timestamp)", "3": "milliseconds (epoch_ms)"}.get(str(scale.this) if scale else "0",
                                                                              "that unit")
        raise TranslationError(f"a timestamp from epoch {unit} has no Spark translation here; "
                               "write make_timestamp(epoch microseconds), e.g. make_timestamp(ended_ms * 1000)")
    return gen.func("TIMESTAMP_MICROS", e.this)


class SparkTarget(Spark):
    """The Spark SQL Plimsoll writes: Spark's dialect with the generator above."""

    Generator = _Generator


# DuckDB functions sqlglot passes through by name, and their Spark names
# hash: a 64-bit hash in both (Spark's own HASH has 32 bits)
_RENAMED = {"epoch_us": "UNIX_MICROS", "url_decode": "URL_DECODE", "hash": "XXHASH64"}
_SPARK_OWN = {"ARRAYS_OVERLAP"}  # Spark functions the rewrites below write by name


def translate(sql: str) -> str:
    """One DuckDB statement or expression as Spark SQL; a DuckDB temp table becomes a temp view."""
    try:
        tree = sqlglot.parse_one(sql, read="duckdb")
    except SqlglotError as err:
        raise TranslationError(f"cannot parse: {_first_line(err)}") from None
    tree = tree.transform(_to_spark_node)
    for node in tree.find_all(exp.Anonymous):
        if node.name not in _RENAMED.values() and node.name not in _SPARK_OWN:
            raise TranslationError(f"{node.name}() has no known Spark SQL translation")
    if isinstance(tree, exp.Create):
        tree.set("kind", "VIEW")
        tree.set("replace", True)
    try:
        return tree.sql(dialect=SparkTarget, pretty=True, unsupported_level=ErrorLevel.RAISE)
    except SqlglotError as err:
        raise TranslationError(_first_line(err)) from None


# The source stage's read_parquet($files) is the view the read step makes, and DuckDB's `filename`
# is the file Spark reports, as a URL (file:/a%20b/…) decoded back to the path the run listed.
FILES_VIEW = "lake_files"
SPARK_FILE = "__spark_file"
_FILE_PATH = f"url_decode(replace(regexp_replace({SPARK_FILE}, '^file:', ''), '+', '%2B'))"


def _to_spark_node(node: exp.Expression) -> exp.Expression:
    if isinstance(node, exp.Table) and isinstance(node.this, exp.ReadParquet):
        return exp.to_table(FILES_VIEW)
    if isinstance(node, exp.Column) and not node.table and node.this.name == "filename" \
            and not node.this.args.get("quoted"):
        return sqlglot.parse_one(_FILE_PATH, read="duckdb").transform(_to_spark_node)
    if isinstance(node, exp.Anonymous) and node.name.lower() == "isfinite" and len(node.expressions) == 1:
        # Spark has no isfinite: x - x is 0 for a finite number, NaN for NaN and ±infinity
        x = node.expressions[0]
        return exp.paren(exp.EQ(this=exp.paren(exp.Sub(this=x.copy(), expression=x.copy())),
                                expression=exp.Literal.number(0)))
    if isinstance(node, exp.IsInf):
        # Spark has no isinf: a number is infinite when its absolute value equals infinity
        return exp.paren(exp.EQ(this=exp.Abs(this=node.this.copy()),
                                expression=exp.cast(exp.Literal.string("Infinity"), "DOUBLE")))
    if isinstance(node, exp.RegexpFullMatch):
        # Spark's RLIKE finds a match anywhere: anchor the whole pattern
        anchored = exp.Concat(expressions=[exp.Literal.string("^(?:"), node.expression.copy(), exp.Literal.string(")$")])
        return exp.RegexpLike(this=node.this.copy(), expression=anchored)
    if isinstance(node, exp.ArrayOverlaps):
        return exp.Anonymous(this="ARRAYS_OVERLAP", expressions=[node.this.copy(), node.expression.copy()])
    if isinstance(node, exp.DateBin):
        raise TranslationError("time_bucket() has no Spark SQL translation; write the bucket with arithmetic "
                               "on epoch_us()")
    if isinstance(node, exp.Anonymous) and node.name.lower() in _RENAMED:
        return exp.Anonymous(this=_RENAMED[node.name.lower()], expressions=node.expressions)
    if isinstance(node, exp.ToMap):
        return _struct_key(node)
    if isinstance(node, exp.Map) and _empty_map(node):
        return exp.Literal.string("")
    return node


def _struct_key(node: exp.ToMap) -> exp.Expression:
    """A key's ``MAP {'c': struct_extract(k, 'c'), ...}`` is ``k`` itself: Spark keeps the STRUCT."""
    entries = node.this.expressions if isinstance(node.this, exp.Struct) else []
    sources = {e.expression.this.sql() for e in entries
               if isinstance(e, exp.PropertyEQ) and isinstance(e.expression, exp.StructExtract)
               and e.expression.expression.name == e.this.name}
    if len(sources) != 1 or len(entries) == 0 or len(entries) != sum(
            isinstance(e, exp.PropertyEQ) for e in entries):
        raise TranslationError(f"a MAP other than a series key: {node.sql(dialect='duckdb')}")
    return entries[0].expression.this.copy()


def _empty_map(node: exp.Map) -> bool:
    keys, values = node.args.get("keys"), node.args.get("values")
    return all(isinstance(v, exp.Cast) and isinstance(v.this, exp.Array) and not v.this.expressions
               for v in (keys, values))


def spark_expression(sql: str) -> str:
    """A user's (already checked) DuckDB expression in Spark SQL, or TranslationError saying why."""
    return translate(sql)


def spark_stage(check: Check, duck: Stage, columns: list[str] | None = None) -> Stage:
    """The Spark form of one of DuckDB's stages for ``check`` (for the source stage: its columns)."""
    context = _context(check, columns)
    plan = shared().get_template(f"spark/{duck.name}.sql").render(context)
    creates = {_created(s.sql): s for s in duck.once}
    statements, named = [], set()
    for action, name, body in _directives(plan):
        if action == "translate":
            if name not in creates:
                raise TranslationError(f"spark/{duck.name}.sql: DuckDB's {duck.name} stage has no statement {name}")
            statements.append(_spark(check, "spark", translate(creates[name].sql), creates[name].params, name))
        elif action == "spark":
            statements.append(_spark(check, "spark", translate(body), _params(body), name))
        elif action == "to-duckdb":
            statements.append(_spark(check, "to-duckdb", translate(body), _params(body), name))
        elif action == "to-spark":
            statements.append(_spark(check, "to-spark", body, _params(body), name))
        elif action == "duckdb" and name in creates and not body:  # DuckDB's own statement, as it is
            statements.append(creates[name])
        elif action == "read":
            statements.append(_spark(check, "read", "", frozenset({"files"}), name, _base(check.source.path)))
        else:
            statements.append(_duckdb_statement(body))
        named.add(name)
    missing = [n for n in creates if n not in named]
    if missing:
        raise TranslationError(f"spark/{duck.name}.sql does not say where DuckDB's {', '.join(missing)} runs")
    preamble = plan[:_DIRECTIVE.search(plan).start()].strip() if _DIRECTIVE.search(plan) else ""
    text = "\n\n".join([preamble, *(_shown(s) for s in statements)]).strip() + "\n"
    return Stage(duck.name, text, tuple(statements))


def mark_reuse(stages: tuple[Stage, ...]) -> tuple[Stage, ...]:
    """Materialize a check's Spark view only where two later steps read it; a view read once is
    computed inside the step that reads it (each Spark job costs more than the rows it moves).
    The source stage's views are read by every check of the run and are always kept."""
    steps = [s for stage in stages if stage.name != "source" for s in stage.once]
    out = []
    for stage in stages:
        once = []
        for statement in stage.once:
            if isinstance(statement, SparkStatement) and statement.action == "spark" and stage.name != "source":
                later = steps[steps.index(statement) + 1:]
                readers = sum(bool(re.search(rf"\b{statement.name}\b", s.sql)) for s in later)
                statement = replace(statement, keep=readers > 1)
            once.append(statement)
        out.append(replace(stage, once=tuple(once)))
    return tuple(out)


def _context(check: Check, columns: list[str] | None) -> dict[str, object]:
    return {
        "check": check, "source": check.source, "measure": check.measure, "window": check.window,
        "baseline": check.baseline, "columns": columns or [],
    }


def _directives(plan: str) -> list[tuple[str, str | None, str]]:
    marks = list(_DIRECTIVE.finditer(plan))
    out = []
    for mark, after in zip(marks, [*marks[1:], None]):
        body = plan[mark.end():after.start() if after else len(plan)].strip()
        body = body[:-1].rstrip() if body.endswith(";") else body
        if mark.group(1) in ("translate", "read") and not _only_comments(body):
            raise TranslationError(f"@{mark.group(1)} {mark.group(2)} takes no statement of its own")
        out.append((mark.group(1), mark.group(2), body))
    return out


def _only_comments(body: str) -> bool:
    return all(not line.strip() or line.lstrip().startswith("--") for line in body.splitlines())


def _created(sql: str) -> str | None:
    match = _CREATES.search(re.sub(r"--[^\n]*", "", sql))
    return match.group(1) if match else None


def _params(sql: str) -> frozenset[str]:
    return frozenset(re.findall(r"\$([A-Za-z_]\w*)", re.sub(r"'[^']*'", "", sql)))


def _spark(check: Check, action: str, sql: str, params: frozenset[str], name: str | None,
           base: str | None = None) -> SparkStatement:
    return SparkStatement(sql, params, check.source.engine, action, name, base)


def _duckdb_statement(body: str) -> Statement:
    (statement,) = statements(body)
    return statement


def _base(path: str) -> str:
    """The folder below which hive partitions are found: the path up to its first wildcard."""
    parts = re.split(r"[*?\[]", path, maxsplit=1)
    head = parts[0] if len(parts) > 1 else path
    if len(parts) > 1 or os.path.isfile(head):
        head = os.path.dirname(head)
    return os.path.abspath(head)


def _shown(statement: Statement) -> str:
    """A statement as ``plimsoll sql`` prints it, with where it runs on the line above."""
    if isinstance(statement, SparkStatement):
        label = _LABEL[statement.action].format(name=statement.name)
        return f"-- [{label}]\n{statement.sql.strip()};" if statement.sql else f"-- [{label}]"
    return f"-- [{_LABEL['duckdb']}]\n{statement.sql.strip()};"


def _first_line(err: Exception) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__
