"""Malformed projects and checks: each is refused with file:line and a message that says what to fix.

Every case asserts the line number and the words of the message, and that validation wrote nothing.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
from click.testing import CliRunner

from toolkit.cli import main
from toolkit.problems import ProjectInvalid
from toolkit.config.fields import parse_duration
from toolkit.config.project import load_project

GOOD = """\
check: title_errors
about: A title fails.
source: sessions
by: [site, title_id]
measure:
  kind: rate
  bad: error_code IS NOT NULL
  split: error_code
window:
  sessions: 50
  max_wait: 3h
baseline:
  method: rolling_percentile
  q: 0.9
  history: 20
  min_history: 3
  factor: 1.5
  floor: 0.05
guard:
  min_sessions: 20
  min_bad: 3
severity: high
"""


def variant(old: str, new: str) -> str:
    assert old in GOOD, old
    return GOOD.replace(old, new, 1)


CUSUM = variant("  method: rolling_percentile\n  q: 0.9\n",
                "  method: cusum\n  shift: 1.5\n  in_control_sessions: 100000\n").replace("  factor: 1.5\n  floor: 0.05\n", "")

# (case id, check file text, expected line, expected words in the message)
CHECK_CASES = [
    ("yaml-syntax", GOOD.replace("by: [site, title_id]", "by: [site, title_id"), 5, "YAML syntax"),
    ("unknown-key-top", variant("severity: high", "severty: high"), 22, "unknown key 'severty' (did you mean 'severity'?)"),
    ("unknown-key-nested", variant("  factor: 1.5", "  facter: 1.5"), 17, "unknown key 'facter' in baseline (did you mean 'factor'?)"),
    ("missing-check-name", variant("check: title_errors\n", ""), 1, "missing key 'check'"),
    ("missing-measure-key", variant("  bad: error_code IS NOT NULL\n", ""), 5, "missing key 'bad' in measure"),
    ("missing-window", variant("window:\n  sessions: 50\n  max_wait: 3h\n", ""), 1, "missing key 'window'"),
    ("wrong-type-int", variant("  history: 20", "  history: twenty"), 15, "baseline.history: expected a whole number"),
    ("wrong-type-number", variant("  factor: 1.5", "  factor: [1, 2]"), 17, "baseline.factor: expected a number"),
    ("wrong-type-by", variant("by: [site, title_id]", "by: {site: 1}"), 4, "by: expected a list of column names"),
    ("fraction-range", variant("  q: 0.9", "  q: 90"), 14, "baseline.q: must be between 0 and 1"),
    ("bad-duration-unit", variant("  max_wait: 3h", "  max_wait: 3 days"), 11, "bad duration '3 days'"),
    ("bad-duration-word", variant("  max_wait: 3h", "  max_wait: soon"), 11, "bad duration 'soon'"),
    ("unknown-source", variant("source: sessions", "source: session"), 3, "unknown source 'session' (did you mean 'sessions'?)"),
    ("unknown-column-by", variant("by: [site, title_id]", "by: [site, titel_id]"), 4, "unknown column 'titel_id' (did you mean 'title_id'?)"),
    ("unknown-column-split", variant("  split: error_code", "  split: err_code"), 8, "unknown column 'err_code'"),
    ("unknown-column-expr", variant("  bad: error_code IS NOT NULL", "  bad: eror_code IS NOT NULL"), 7, "unknown column 'eror_code' (did you mean 'error_code'?)"),
    ("second-statement", variant("  bad: error_code IS NOT NULL", "  bad: \"error_code IS NOT NULL; DROP TABLE alerts\""), 7, "single expression"),
    ("subquery", variant("  bad: error_code IS NOT NULL", "  bad: error_code IN (SELECT alert_id FROM alerts)"), 7, "subqueries and table references are not allowed"),
    ("hidden-comment", variant("  bad: error_code IS NOT NULL", "  bad: \"error_code IS NOT NULL /* OR true */\""), 7, "comments are not allowed"),
    ("line-comment", variant("  bad: error_code IS NOT NULL", "  bad: \"error_code IS NULL -- x\""), 7, "comments are not allowed"),
    ("not-boolean", variant("  bad: error_code IS NOT NULL", "  bad: play_ms + 1"), 7, "must be true/false per session, but is BIGINT"),
    ("aggregate", variant("  bad: error_code IS NOT NULL", "  bad: count(*) > 1"), 7, "aggregate and window functions are not allowed"),
    ("clock", variant("  bad: error_code IS NOT NULL", "  bad: ended_at > now()"), 7, "now() is not allowed"),
    ("bad-sql", variant("  bad: error_code IS NOT NULL", "  bad: error_code IS"), 7, "not valid SQL"),
    ("where-unknown-column", variant("by: [site, title_id]", "where: titleid IS NOT NULL\nby: [site, title_id]"), 4, "where: unknown column 'titleid'"),
    ("bad-name", variant("check: title_errors", "check: Title-Errors"), 1, "is not a valid name"),
    ("bad-choice", variant("severity: high", "severity: urgent"), 22, "'urgent' is not one of high, medium, low"),
    ("bad-kind", variant("  kind: rate", "  kind: rat"), 6, "'rat' is not one of rate, ratio, quantile (did you mean 'rate'?)"),
    ("bad-method", variant("  method: rolling_percentile", "  method: rolling_mean"), 13, "is not one of rolling_percentile"),
    ("both-windows", variant("  max_wait: 3h", "  max_wait: 3h\n  every: 1h"), 12, "either 'sessions' (count window) or 'every'"),
    ("count-window-without-wait", variant("  max_wait: 3h\n", ""), 9, "missing key 'max_wait' in window"),
    ("min-history-above-history", variant("  min_history: 3", "  min_history: 30"), 16, "min_history (30) cannot exceed history (20)"),
    ("min-bad-on-ratio", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: ratio\n  numerator: rebuffer_ms\n  denominator: play_ms"), 21, "guard.min_bad applies to rate measures"),
    ("split-in-by", variant("  split: error_code", "  split: site"), 8, "'site' is already in 'by'"),
    ("p-chart-on-ratio", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: ratio\n  numerator: rebuffer_ms\n  denominator: play_ms").replace(
        "  method: rolling_percentile\n  q: 0.9\n", "  method: p_chart\n").replace(
        "  factor: 1.5\n  floor: 0.05\n", "").replace("  min_bad: 3\n", ""), 13,
        "baseline.method: p_chart applies to rate measures, not ratio"),
    ("confidence-on-quantile", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: quantile\n  of: startup_ms\n  q: 0.9").replace(
        "  floor: 0.05\n", "  floor: 0.05\n  confidence: 0.95\n").replace("  min_bad: 3\n", ""), 19,
        "baseline.confidence applies to rate measures"),
    ("ewma-lambda-range", variant(
        "  method: rolling_percentile\n  q: 0.9\n", "  method: ewma\n  lambda: 1.3\n").replace(
        "  factor: 1.5\n  floor: 0.05\n", ""), 14, "baseline.lambda: must be between 0 and 1"),
    ("cusum-on-ratio", CUSUM.replace(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: ratio\n  numerator: rebuffer_ms\n  denominator: play_ms").replace("  min_bad: 3\n", ""), 13,
        "baseline.method: cusum applies to rate measures, not ratio"),
    ("cusum-shift-not-above-1", CUSUM.replace("  shift: 1.5", "  shift: 1"), 14, "baseline.shift must be above 1"),
    ("cusum-sessions-positive", CUSUM.replace("  in_control_sessions: 100000", "  in_control_sessions: 0"), 15,
     "baseline.in_control_sessions: must be at least 1"),
    ("cusum-sessions-whole", CUSUM.replace("  in_control_sessions: 100000", "  in_control_sessions: 1.5e5"), 15,
     "baseline.in_control_sessions: expected a whole number"),
    ("cusum-missing-shift", CUSUM.replace("  shift: 1.5\n", ""), 12, "missing key 'shift' in baseline"),
    ("cusum-down", CUSUM.replace("severity: high", "severity: high\ndirection: down"), 13,
     "baseline.method: cusum detects a rise of the rate (direction: up), not a fall"),
    ("cusum-beyond-the-chain", CUSUM.replace("  shift: 1.5", "  shift: 1.05").replace(
        "  in_control_sessions: 100000", "  in_control_sessions: 1000000000000"), 15,
     "needs a decision interval above h = 200 for some p0; give a larger shift or fewer sessions"),
    ("duplicate-key", variant("severity: high", "severity: high\nseverity: low"), 23, "duplicate key 'severity'"),
    ("not-a-mapping", "- just\n- a list\n", 1, "must be a mapping"),
    ("quantile-needs-number", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: quantile\n  of: site\n  q: 0.9").replace("  min_bad: 3\n", ""), 7, "must be a number per session, but is VARCHAR"),
]


@pytest.mark.parametrize("text,line,words", [c[1:] for c in CHECK_CASES], ids=[c[0] for c in CHECK_CASES])
def test_malformed_check_is_refused_with_its_line(make_project, text: str, line: int, words: str) -> None:
    project = make_project({"title_errors.yml": text})
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    messages = [str(p) for p in caught.value.problems]
    expected_prefix = f"checks/title_errors.yml:{line}:"
    assert any(m.endswith(words) or words in m for m in messages if expected_prefix in m), messages
    assert not (project.parent / "warehouse.duckdb").exists()


def test_the_good_check_loads(make_project) -> None:
    project = load_project(make_project({"title_errors.yml": GOOD}))
    check = project.checks["title_errors"]
    assert check.by == ("site", "title_id") and check.measure.split == "error_code"
    assert check.measure.bad.sql == 'NOT "error_code" IS NULL'


def test_duplicate_check_names_name_both_files(make_project) -> None:
    project = make_project({"a.yml": GOOD, "b.yml": GOOD})
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    (problem,) = caught.value.problems
    folder = project.parent / "checks"
    assert str(problem) == f"{folder}/b.yml:1: duplicate check name 'title_errors' (also in {folder}/a.yml:1)"


def test_every_problem_is_reported_at_once(make_project) -> None:
    text = variant("severity: high", "severity: urgent").replace("  history: 20", "  history: x")
    with pytest.raises(ProjectInvalid) as caught:
        load_project(make_project({"title_errors.yml": text}))
    lines = sorted(p.line for p in caught.value.problems)
    assert lines == [15, 22]


PROJECT_CASES = [
    ("project-unknown-key", "warehouse: w.duckdb\nchecks: checks/\nwarehose: x\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 3, "unknown key 'warehose' (did you mean 'warehouse'?)"),
    ("project-missing-warehouse", "checks: checks/\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 1, "missing key 'warehouse'"),
    ("source-missing-event-time", "warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n", 3, "missing key 'event_time' in sources.sessions"),
    ("source-unknown-column", "warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: sessionid\n    event_time: ended_at\n", 5, "unknown column 'sessionid' (did you mean 'session_id'?)"),
    ("source-event-time-not-time", "warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: site\n", 6, "is VARCHAR, not a timestamp"),
    ("source-no-files", "warehouse: w.duckdb\nsources:\n  sessions:\n    path: nowhere/\n    session_id: session_id\n    event_time: ended_at\n", 4, "no Parquet files at 'nowhere/'"),
    ("source-bad-exclude", "warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n    exclude: is_bot; DROP TABLE runs\n", 7, "single expression"),
    ("engine-unknown", "warehouse: w.duckdb\nengine: flink\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 2, "'flink' is not one of duckdb, spark"),
    ("spark-master-without-spark", "warehouse: w.duckdb\nspark_master: local[2]\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 2, "spark_master applies to engine: spark (this project's engine is duckdb)"),
    ("spark-conf-without-spark", "warehouse: w.duckdb\nengine: duckdb\nspark_conf:\n  spark.executor.memory: 4g\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 3, "spark_conf applies to engine: spark"),
    ("spark-conf-not-spark-key", "warehouse: w.duckdb\nengine: spark\nspark_conf:\n  executor.memory: 4g\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 4, "spark_conf.executor.memory: Spark settings start with 'spark.'"),
    ("spark-conf-nested", "warehouse: w.duckdb\nengine: spark\nspark_conf:\n  spark.x: [1, 2]\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 4, "spark_conf.spark.x: expected one value, got a list"),
    ("spark-exclude-untranslatable", "warehouse: w.duckdb\nengine: spark\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n    exclude: jaccard(site, 'kids') > 0.9\n", 8, "sources.sessions.exclude: cannot run on engine spark:"),
    ("checks-folder-missing", "warehouse: w.duckdb\nchecks: elsewhere/\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n", 2, "checks folder 'elsewhere/' does not exist"),
]


@pytest.mark.parametrize("text,line,words", [c[1:] for c in PROJECT_CASES], ids=[c[0] for c in PROJECT_CASES])
def test_malformed_project_is_refused_with_its_line(make_project, text: str, line: int, words: str) -> None:
    from conftest import FIXTURE_LAKE

    project = make_project({}, project=text.format(lake=FIXTURE_LAKE))
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    messages = [str(p) for p in caught.value.problems]
    assert any(m.startswith(f"{project}:{line}:") and words in m for m in messages), messages


def test_validate_command_exits_2_with_file_and_line(make_project, tmp_path: Path) -> None:
    project = make_project({"title_errors.yml": variant("  history: 20", "  history: twenty")})
    result = CliRunner().invoke(main, ["validate", "-p", str(project)])
    assert result.exit_code == 2, result.output
    assert "title_errors.yml:15: baseline.history: expected a whole number" in result.output
    assert not (tmp_path / "warehouse.duckdb").exists()


def test_validate_command_accepts_a_good_project(make_project) -> None:
    project = make_project({"title_errors.yml": GOOD})
    result = CliRunner().invoke(main, ["validate", "-p", str(project)])
    assert result.exit_code == 0, result.output
    assert result.output.endswith(": 1 check, 1 source: ok\n")


@pytest.mark.parametrize("text,seconds", [("90m", 5400), ("2h", 7200), ("3d", 259200), ("1w", 604800),
                                          ("1h30m", 5400), ("45s", 45)])
def test_durations(text: str, seconds: int) -> None:
    assert parse_duration(text).total_seconds() == seconds


@pytest.mark.parametrize("text", ["", "3", "3 d", "h", "1.5h", "-2h", "3days", "2h1d"])
def test_bad_durations(text: str) -> None:
    with pytest.raises(ValueError, match="bad duration"):
        parse_duration(text)


def test_country_codes_that_look_like_booleans_stay_text(make_project) -> None:
    text = variant("where: ", "where: ") if "where: " in GOOD else GOOD
    text = text.replace("by: [site, title_id]", "where: country <> 'NO'\nby: [site, title_id]")
    project = load_project(make_project({"title_errors.yml": textwrap.dedent(text)}))
    assert project.checks["title_errors"].where.sql == "\"country\" <> 'NO'"


def test_source_columns_may_not_use_the_reserved_prefix(tmp_path: Path) -> None:
    import duckdb

    lake = tmp_path / "lake"
    lake.mkdir()
    duckdb.connect().execute(f"COPY (SELECT 's1' AS session_id, TIMESTAMP '2026-11-02' AS ended_at, 1 AS __file) "
                             f"TO '{lake / 'p.parquet'}' (FORMAT parquet)")
    project = tmp_path / "plimsoll.yml"
    project.write_text(f"warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n"
                       "    session_id: session_id\n    event_time: ended_at\n")
    (tmp_path / "checks").mkdir()
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    assert [str(p) for p in caught.value.problems] == [
        f"{project}:4: source 'sessions': column names starting with '__' are reserved for Plimsoll's own "
        "columns: __file"]


def test_a_check_expression_spark_cannot_run_is_refused_with_its_line(make_project) -> None:
    from conftest import PROJECT, FIXTURE_LAKE

    text = variant("  bad: error_code IS NOT NULL", "  bad: damerau_levenshtein(error_code, 'E1') < 2")
    project = make_project({"title_errors.yml": text}, project="engine: spark\n" + PROJECT.format(lake=FIXTURE_LAKE))
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    messages = [str(p) for p in caught.value.problems]
    assert any("checks/title_errors.yml:7: measure.bad: cannot run on engine spark:" in m for m in messages), messages


def test_engine_spark_without_pyspark_names_the_extra(make_project, monkeypatch: pytest.MonkeyPatch) -> None:
    import importlib.util

    from conftest import PROJECT, FIXTURE_LAKE

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "pyspark" else real(name, *a))
    project = make_project({"title_errors.yml": GOOD}, project="engine: spark\n" + PROJECT.format(lake=FIXTURE_LAKE))
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    (problem,) = caught.value.problems
    assert str(problem) == (f"{project}:1: engine: spark needs pyspark, which is not installed: "
                            "pip install 'plimsoll[spark]' (Java 17 or later must be on the machine)")


def test_engine_spark_loads_with_its_settings(make_project) -> None:
    from conftest import PROJECT, FIXTURE_LAKE

    text = "engine: spark\nspark_master: spark://lake-host:7077\nspark_conf:\n  spark.executor.memory: 4g\n  spark.sql.adaptive.enabled: true\n"
    project = load_project(make_project({"title_errors.yml": GOOD}, project=text + PROJECT.format(lake=FIXTURE_LAKE)))
    engine = project.checks["title_errors"].source.engine
    assert engine == project.engine
    assert (engine.name, engine.spark_master) == ("spark", "spark://lake-host:7077")
    assert engine.spark_conf == (("spark.executor.memory", "4g"), ("spark.sql.adaptive.enabled", "true"))


# Functions of the clock or of chance, as written in a check: two runs over the same files would
# count differently. (expression, the function as the message names it)
CLOCK_CASES = [
    ("ended_at < localtimestamp", "localtimestamp"),
    ("ended_at < current_localtimestamp()", "current_localtimestamp()"),
    ('ended_at < "now"()', "now()"),
    ("uuidv4() IS NOT NULL", "uuidv4()"),
    ("uuidv7() IS NOT NULL", "uuidv7()"),
    ("txid_current() > 0", "txid_current()"),
    ("random() < 0.5", "random()"),
    ("ended_at > now()", "now()"),
    ("CAST(ended_at AS DATE) = current_date", "current_date"),
    ("gen_random_uuid() IS NOT NULL", "gen_random_uuid()"),
    ("ended_at > current_timestamp - INTERVAL 1 DAY", "current_timestamp"),
    ("today() > DATE '2026-11-01'", "today()"),
    ("age(ended_at) < INTERVAL 1 DAY", "age()"),
]
CLOCK_WORDS = "is not allowed: decisions use data time, never the clock or chance; allowed functions are listed in"


@pytest.mark.parametrize("expression,shown", CLOCK_CASES, ids=[c[1] for c in CLOCK_CASES])
def test_the_clock_and_chance_are_refused_in_where_with_the_line(make_project, expression: str, shown: str) -> None:
    import json

    text = variant("by: [site, title_id]", f"where: {json.dumps(expression)}\nby: [site, title_id]")
    project = make_project({"title_errors.yml": text})
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    assert [str(p) for p in caught.value.problems] == [
        f"{project.parent}/checks/title_errors.yml:4: where: {shown} {CLOCK_WORDS} README.md under 'SQL expressions'"]
    assert not (project.parent / "warehouse.duckdb").exists()


# each kind of expression key, in a check file and in plimsoll.yml: (file, text, line, key)
CLOCK_KEY_CASES = [
    ("bad", "title_errors.yml", variant("  bad: error_code IS NOT NULL", "  bad: error_code IS NOT NULL AND random() < 0.5"),
     7, "measure.bad: random()"),
    ("numerator", "title_errors.yml", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: ratio\n  numerator: epoch_ms(ended_at) - epoch_ms(localtimestamp)\n  denominator: play_ms").replace(
        "  min_bad: 3\n", ""), 7, "measure.numerator: localtimestamp"),
    ("denominator", "title_errors.yml", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: ratio\n  numerator: play_ms\n  denominator: play_ms + txid_current()").replace(
        "  min_bad: 3\n", ""), 8, "measure.denominator: txid_current()"),
    ("of", "title_errors.yml", variant(
        "  kind: rate\n  bad: error_code IS NOT NULL\n  split: error_code",
        "  kind: quantile\n  of: startup_ms * uuidv7()::VARCHAR::INTEGER\n  q: 0.9").replace(
        "  min_bad: 3\n", ""), 7, "measure.of: uuidv7()"),
]


@pytest.mark.parametrize("name,file,text,line,words", CLOCK_KEY_CASES, ids=[c[0] for c in CLOCK_KEY_CASES])
def test_the_clock_and_chance_are_refused_in_every_expression_key(make_project, name: str, file: str, text: str,
                                                                   line: int, words: str) -> None:
    project = make_project({file: text})
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    assert [str(p) for p in caught.value.problems] == [
        f"{project.parent}/checks/{file}:{line}: {words} {CLOCK_WORDS} README.md under 'SQL expressions'"]


def test_the_clock_is_refused_in_a_source_exclude_with_the_line(make_project) -> None:
    from conftest import PROJECT, FIXTURE_LAKE

    text = PROJECT.format(lake=FIXTURE_LAKE).replace("exclude: is_bot", "exclude: is_bot OR ended_at > \"now\"()")
    project = make_project({"title_errors.yml": GOOD}, project=text)
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project)
    assert [str(p) for p in caught.value.problems] == [
        f"{project}:8: sources.sessions.exclude: now() {CLOCK_WORDS} README.md under 'SQL expressions'"]


def test_validate_command_names_the_clock_function_and_its_line(make_project) -> None:
    text = variant("by: [site, title_id]", "where: ended_at < localtimestamp\nby: [site, title_id]")
    project = make_project({"title_errors.yml": text})
    result = CliRunner().invoke(main, ["validate", "-p", str(project)])
    assert result.exit_code == 2, result.output
    assert result.output.strip().endswith(
        "checks/title_errors.yml:4: where: localtimestamp is not allowed: decisions use data time, never the "
        "clock or chance; allowed functions are listed in README.md under 'SQL expressions'")


def test_a_cusum_check_loads(make_project) -> None:
    check = load_project(make_project({"title_errors.yml": CUSUM})).checks["title_errors"]
    assert (check.baseline.method, check.baseline.shift, check.baseline.in_control_sessions) == ("cusum", 1.5, 100000)
