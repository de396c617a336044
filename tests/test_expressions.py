"""Check expressions call only deterministic functions: the allow-list in toolkit/expressions.py.

The list is held against DuckDB's own catalogue (each function exists and gives the same value for
the same row in every run), against every expression real checks use (the catalogue, the golden
checks, the README), and against the README's list of it, so none of them can drift apart.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import duckdb
import pytest

from toolkit.config.expressions import ALLOWED_FUNCTIONS, ExpressionError, parse_expression
from toolkit.config.project import load_project

ROOT = Path(__file__).parent.parent
# The committed fixture lake's columns (tests/fixtures/make_fixtures.py).
COLUMNS = {"session_id": "VARCHAR", "ended_at": "TIMESTAMP", "site": "VARCHAR", "title_id": "VARCHAR",
           "cdn": "VARCHAR", "country": "VARCHAR", "device_family": "VARCHAR", "is_bot": "BOOLEAN",
           "user_agent": "VARCHAR", "error_code": "VARCHAR", "startup_ms": "INTEGER", "play_ms": "BIGINT",
           "rebuffer_ms": "BIGINT", "day": "DATE", "started_ms": "BIGINT", "ended_text": "VARCHAR"}
# Argument types whose functions read the session's TimeZone setting: DuckDB calls those overloads
# CONSISTENT_WITHIN_QUERY. Every connection a run uses sets TimeZone to UTC (tested below), so for
# Plimsoll they too give the same value in every run.
ZONED = ("TIMESTAMP WITH TIME ZONE", "TIMESTAMPTZ_NS", "TIME WITH TIME ZONE")


def test_every_allowed_function_exists_in_duckdb_and_is_consistent() -> None:
    con = duckdb.connect()
    rows = con.execute(
        "SELECT function_name, function_type, stability, parameters, parameter_types, macro_definition, "
        "has_side_effects FROM duckdb_functions() WHERE list_contains($1, function_name)",
        [sorted(ALLOWED_FUNCTIONS)],
    ).fetchall()
    missing = ALLOWED_FUNCTIONS - {r[0] for r in rows}
    assert not missing, f"not DuckDB functions: {sorted(missing)}"
    for name, kind, stability, parameters, types, definition, side_effects in rows:
        assert kind in ("scalar", "macro"), (name, kind)
        assert not side_effects, name
        if kind == "scalar":
            zoned = any(t in ZONED for t in types)
            assert stability == "CONSISTENT" or (zoned and stability == "CONSISTENT_WITHIN_QUERY"), \
                (name, types, stability)
        else:
            # a macro is as deterministic as its body: the body must pass the same check
            parse_expression(definition, {p: "ANY" for p in parameters})


def test_the_allow_list_refuses_what_duckdb_wrongly_calls_consistent() -> None:
    # age() of one timestamp counts from today, yet DuckDB's catalogue calls it CONSISTENT
    stability = duckdb.connect().execute(
        "SELECT stability FROM duckdb_functions() WHERE function_name = 'age' "
        "AND parameter_types = ['TIMESTAMP']").fetchone()[0]
    assert stability == "CONSISTENT"
    with pytest.raises(ExpressionError, match=r"^age\(\) is not allowed: decisions use data time"):
        parse_expression("age(ended_at) < INTERVAL 1 DAY", COLUMNS)


def test_every_connection_a_run_uses_reads_time_in_utc(make_project) -> None:
    from toolkit.engine import warehouse

    project = load_project(make_project({}))
    con = warehouse.connect(project)
    try:
        stages = warehouse.stage_connection(con, project)
        for connection in (con, stages):
            assert connection.execute("SELECT current_setting('TimeZone')").fetchone()[0] == "UTC"
    finally:
        con.close()


# Deterministic expressions a data engineer writes, the forms event_time will need included
# (epoch milliseconds or ISO text turned into a timestamp): all accepted.
ACCEPTED = [
    "is_bot OR regexp_matches(user_agent, '(?i)(bot|crawler|spider)')",
    "coalesce(error_code, '') <> '' AND lower(site) = 'kids'",
    "CASE WHEN play_ms > 0 THEN rebuffer_ms / play_ms ELSE 0 END > 0.1",
    "greatest(play_ms, rebuffer_ms) - least(play_ms, 0) > abs(round(startup_ms / 1000.0, 2))",
    "epoch_ms(started_ms) < ended_at",
    "make_timestamp(started_ms * 1000) < ended_at",
    "to_timestamp(started_ms / 1000) IS NOT NULL",
    "strptime(ended_text, '%Y-%m-%dT%H:%M:%S') < ended_at",
    "try_strptime(ended_text, '%Y-%m-%d %H:%M:%S') IS NULL",
    "ended_text::TIMESTAMP < ended_at",
    "CAST(ended_text AS TIMESTAMP) < ended_at AND TRY_CAST(ended_text AS DATE) = day",
    "date_part('hour', ended_at) BETWEEN 8 AND 20",
    "extract(dow FROM ended_at) IN (0, 6) OR hour(ended_at) = 3",
    "date_trunc('hour', ended_at) = ended_at - INTERVAL 5 MINUTE",
    "strftime(ended_at, '%Y-%m') = '2026-11'",
    "site ILIKE 'kid%' AND site NOT LIKE 'x%' OR site GLOB 'n*' OR site SIMILAR TO 'm.*'",
    "starts_with(title_id, 't-') AND ends_with(title_id, '7') AND contains(user_agent, 'TV')",
    "split_part(user_agent, '/', 1) = 'Player' AND length(trim(site)) > 2",
    "nullif(play_ms, 0) IS NOT NULL AND if(is_bot, 1, 0) = 0",
    "play_ms // 1000 % 60 = 0 AND play_ms ** 2 > 0",
    "site || '/' || cdn = 'kids/birch'",
    "country IN ('DE', 'FR') AND country IS DISTINCT FROM 'NO'",
    "list_contains(['DE', 'FR'], upper(country))",
    "len(list_filter(string_split(user_agent, ' '), x -> x = 'bot')) > 0",
    "list_contains(list_transform(['de', 'fr'], c -> upper(c)), country)",
]


@pytest.mark.parametrize("expression", ACCEPTED)
def test_deterministic_expressions_are_accepted(expression: str) -> None:
    parsed = parse_expression(expression, COLUMNS)
    row = ", ".join(f"NULL::{kind} AS {name}" for name, kind in COLUMNS.items())
    assert duckdb.connect().execute(f"DESCRIBE SELECT {parsed.sql} FROM (SELECT {row})").fetchone()[1] == "BOOLEAN"


REFUSED = [
    ("md5(site) = 'x'", "md5() is not allowed: it is not among the functions a check may use; "
                        "allowed functions are listed in README.md under 'SQL expressions'"),
    # a function DuckDB marks CONSISTENT_WITHIN_QUERY only over times with a time zone is not one of the clock
    ("century(ended_at) = 21", "century() is not allowed: it is not among the functions a check may use"),
    ("mad(play_ms) > 0", "mad() is not allowed: it is an aggregate or window function, and the measure "
                         "aggregates for you"),
    ("lower(site ORDER BY site) = 'a'", "lower() with DISTINCT, ORDER BY or FILTER is not allowed"),
    ("main.lower(site) = 'a'", "write lower() without a schema name"),
    ('"current_date" > day', "current_date is not allowed: decisions use data time, never the clock or chance"),
    ("current_setting('TimeZone') = 'UTC'", "current_setting() is not allowed: decisions use data time"),
    ("CURRENT_USER = 'x'", "current_user is not allowed"),
    ("setseed(0.5) IS NULL", "setseed() is not allowed: decisions use data time, never the clock or chance"),
    ("nextval('s') > 1", "nextval() is not allowed: decisions use data time, never the clock or chance"),
    ("list_transform([1], x -> random()) = [1]", "random() is not allowed"),
    ("list_filter([1], x -> x > sitex) = [1]", "unknown column 'sitex' (did you mean 'site'?)"),
    # the refusals that came before the allow-list still stand
    ("site IN (SELECT site FROM alerts)", "subqueries and table references are not allowed"),
    ("count(*) > 1", "aggregate and window functions are not allowed"),
    ("row_number() OVER () = 1", "aggregate and window functions are not allowed"),
    ("site = ?", "parameters are not allowed"),
    ("site = $1", "parameters are not allowed"),
    ("s.site = 'x'", "write column 'site' without a table name"),
    ("COLUMNS(*) IS NULL", "'*' is not allowed"),
    ("site = 'x' /* or not */", "comments are not allowed"),
]


@pytest.mark.parametrize("expression,words", REFUSED, ids=[r[0] for r in REFUSED])
def test_other_functions_and_shapes_are_refused(expression: str, words: str) -> None:
    with pytest.raises(ExpressionError) as caught:
        parse_expression(expression, COLUMNS)
    assert str(caught.value).startswith(words), str(caught.value)


def test_clock_words_are_refused_without_a_schema_too() -> None:
    # commands that only read the warehouse load the project without the lake's schema
    with pytest.raises(ExpressionError, match="^localtimestamp is not allowed"):
        parse_expression("ended_at < localtimestamp", None)
    assert parse_expression("ended_at < epoch_ms(started_ms)", None).columns == ("ended_at", "started_ms")


@pytest.mark.parametrize("expression", ['"current_date" < day', "current_date < day", "CURRENT_DATE < day"])
def test_a_source_column_named_like_a_clock_word_is_a_column_a_run_reads(expression: str) -> None:
    # a run projects Expr.columns from the lake; a column left out there would leave DuckDB to bind
    # the word to the clock
    parsed = parse_expression(expression, COLUMNS | {"current_date": "DATE"})
    assert sorted(parsed.columns) == ["current_date", "day"]
    assert duckdb.connect().execute(f"SELECT {parsed.sql} FROM (SELECT DATE '2000-01-01' AS current_date, "
                                    "DATE '2000-01-02' AS day)").fetchone() == (True,)


def _expressions_in(text: str) -> list[str]:
    keys = r"^\s*(?:where|bad|numerator|denominator|of|exclude):\s*(.+?)\s*$"
    found = []
    for raw in re.findall(keys, text, flags=re.MULTILINE):
        found.append(raw[1:-1] if raw[:1] == raw[-1:] and raw[:1] in "\"'" else raw)
    return found


def test_every_expression_of_the_catalogue_the_golden_checks_and_the_readme_is_allowed() -> None:
    files = [*sorted((ROOT / "checks").glob("*.yml")), *sorted((ROOT / "tests" / "golden").glob("*.yml"))]
    expressions = [e for f in files for e in _expressions_in(f.read_text(encoding="utf-8"))]
    readme = _expressions_in((ROOT / "README.md").read_text(encoding="utf-8"))
    assert len(expressions) >= 18 and len(readme) >= 2
    for expression in expressions + readme:
        parse_expression(expression, None)


def test_the_catalogue_validates_over_a_demo_lake(tmp_path: Path, small_fernhill_lake) -> None:
    project = load_project(small_fernhill_lake.project(tmp_path))
    assert sorted(project.checks) == sorted(p.stem for p in (ROOT / "checks").glob("*.yml"))


@pytest.mark.parametrize("check_file", sorted((ROOT / "tests" / "golden").glob("*.yml")), ids=lambda p: p.stem)
def test_the_golden_checks_validate(check_file: Path, make_project) -> None:
    project_file = make_project({})
    shutil.copyfile(check_file, project_file.parent / "checks" / check_file.name)
    assert check_file.stem in load_project(project_file).checks


def test_the_readme_lists_exactly_the_allowed_functions() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("### SQL expressions", 1)[1].split("\n#", 1)[0]
    listed = section.split("Functions:", 1)[1].strip().split("\n\n", 1)[0]
    named = set(re.findall(r"`([a-z_0-9]+)`", listed))
    assert named == {f for f in ALLOWED_FUNCTIONS if re.fullmatch(r"[a-z_0-9]+", f)}
