"""engine: spark gives the windows and alerts DuckDB gives, on the Fernhill Broadcasting demo lake.

Spark runs in local mode (``local[2]``, Java 17); these tests are marked ``spark`` and run in CI
(pyspark is in the test extra). Counts and times must be equal; values equal up to float rounding,
since Spark sums in another order.
"""

from __future__ import annotations

import shutil
import textwrap
from pathlib import Path

import duckdb
import pytest

from toolkit.demo.run import catalogue_folder
from toolkit.config.project import load_project
from toolkit.engine.runner import run

pytestmark = pytest.mark.spark

SESSIONS = 300_000
SPARK = """\
engine: spark
spark_master: local[2]
spark_conf:
  spark.sql.shuffle.partitions: 4
  spark.driver.memory: 1g
  spark.sql.codegen.wholeStage: false
"""
PROJECT = """\
warehouse: warehouse.duckdb
checks: {checks}
{engine}sources:
  sessions:
    path: {lake}
    session_id: session_id
    event_time: ended_at
    exclude: is_bot OR regexp_matches(user_agent, '(?i)(bot|crawler|spider)')
"""
# A count-window check with a short max_wait, so many partial windows time out, and a quantile
# over count windows: both are paths the catalogue takes less often.
EXTRA = {
    "startup_by_title.yml": """\
        check: startup_by_title
        source: sessions
        where: startup_ms IS NOT NULL
        by: [site, title_id]
        measure: {kind: quantile, of: startup_ms, q: 0.75}
        window: {sessions: 40, max_wait: 3h}
        baseline: {method: rolling_percentile, q: 0.9, history: 20, min_history: 3, factor: 1.1}
        """,
}
# count windows with a split rate; count windows with a quantile and many timed-out partial windows;
# time windows with a quantile; time windows with a ratio of sums and an EWMA
INCREMENTAL = ("title_errors", "startup_by_title", "startup_time_by_device", "bitrate_by_cdn")
WINDOW_COLUMNS = ("check_name, key_text, split_value, window_number, key_window, window_start, window_end, sessions, "
                  "bad, history_windows, breach")
ALERT_COLUMNS = ("alert_id, check_name, severity, key_text, split_value, status, close_reason, opened_at, "
                 "breach_started_at, last_breach_at, closed_at, breach_windows, affected_sessions, fingerprint")


@pytest.fixture(scope="module")
def lake(fernhill_lake) -> Path:
    """The session's shared demo lake, read in place."""
    assert fernhill_lake.sessions == SESSIONS
    return fernhill_lake.path


@pytest.fixture(scope="module")
def checks(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("checks")
    for item in catalogue_folder().iterdir():
        if item.name.endswith(".yml"):
            shutil.copyfile(item, folder / item.name)
    for name, text in EXTRA.items():
        (folder / name).write_text(textwrap.dedent(text), encoding="utf-8")
    return folder


def project(folder: Path, lake: Path, checks: Path, engine: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "plimsoll.yml").write_text(PROJECT.format(checks=checks, engine=engine, lake=lake), encoding="utf-8")
    return folder / "plimsoll.yml"


@pytest.fixture(scope="module")
def duckdb_once(tmp_path_factory: pytest.TempPathFactory, lake: Path, checks: Path) -> Path:
    """The catalogue over the whole lake in one DuckDB run: the reference."""
    file = project(tmp_path_factory.mktemp("duckdb"), lake, checks)
    run(load_project(file))
    return file.parent / "warehouse.duckdb"


def compare(reference: Path, other: Path) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.execute(f"ATTACH '{reference}' AS ref (READ_ONLY)")
    con.execute(f"ATTACH '{other}' AS got (READ_ONLY)")
    return con


def differences(con: duckdb.DuckDBPyConnection, table: str, columns: str) -> list[tuple]:
    """Rows of either warehouse's table that the other lacks (as a multiset), on ``columns``, for
    the checks the second warehouse has."""
    wanted = "check_name IN (SELECT check_name FROM got.check_state)"
    if table == "alert_events":  # events name their alert, not its check
        wanted = f"alert_id IN (SELECT alert_id FROM ref.alerts WHERE {wanted})"
    ref = f"(SELECT * FROM ref.{table} WHERE {wanted})"
    return con.execute(
        f"(SELECT 'duckdb only' AS side, {columns} FROM {ref} EXCEPT ALL SELECT 'duckdb only', {columns} FROM got.{table}) "
        f"UNION ALL (SELECT 'spark only', {columns} FROM got.{table} EXCEPT ALL SELECT 'spark only', {columns} FROM {ref}) "
        "ORDER BY ALL LIMIT 20").fetchall()


def assert_same_results(con: duckdb.DuckDBPyConnection, min_windows: int = 10_000) -> None:
    counts = con.execute("SELECT (SELECT count(*) FROM ref.windows WHERE check_name IN (SELECT check_name FROM got.check_state)), "
                         "(SELECT count(*) FROM got.windows), (SELECT count(*) FROM got.alerts)").fetchone()
    assert counts[0] == counts[1] and counts[0] > min_windows, counts
    assert counts[2] > 0, "the demo lake at this size must raise alerts, or the comparison proves little"
    assert differences(con, "windows", WINDOW_COLUMNS) == []
    assert differences(con, "key_windows", "check_name, key_text, key_window, window_number, window_start, window_end, sessions, bad") == []
    assert differences(con, "alerts", ALERT_COLUMNS) == []
    assert differences(con, "alert_events", "alert_id, occurred_at, event, affected_sessions") == []
    assert differences(con, "carry", "check_name, key_text, event_time, session_id, is_bad, split_value, numerator, denominator, quantile_input") == []
    assert differences(con, "key_state", "check_name, key, last_window_number, last_end, windows") == []
    # values: equal up to float rounding (Spark adds in another order)
    worst = con.execute(
        """
        SELECT max(abs(r.value - g.value) / greatest(abs(r.value), 1e-12)),
               max(abs(r.threshold - g.threshold) / greatest(abs(r.threshold), 1e-12)),
               count(*) FILTER (WHERE (r.value IS NULL) <> (g.value IS NULL)
                                   OR (r.threshold IS NULL) <> (g.threshold IS NULL))
        FROM ref.windows AS r
        JOIN got.windows AS g USING (check_name, key_text, split_value, window_number)
        """).fetchone()
    assert worst[2] == 0, worst
    assert (worst[0] or 0) < 1e-9 and (worst[1] or 0) < 1e-9, worst


def test_spark_gives_duckdbs_windows_and_alerts(tmp_path: Path, lake: Path, checks: Path, duckdb_once: Path) -> None:
    file = project(tmp_path / "spark", lake, checks, SPARK)
    result = run(load_project(file))
    assert result.status == "ok" and result.files_read == 21
    con = compare(duckdb_once, file.parent / "warehouse.duckdb")
    assert_same_results(con)
    same_counts = "check_name, files_read, rows_read, invalid_rows, rows_excluded, rows_filtered, duplicate_rows, late_rows, windows_written, breach_windows, alerts_opened, alerts_closed, watermark"
    assert differences(con, "run_checks", same_counts) == []
    assert differences(con, "files_read", "check_name, path, size, rows") == []


def test_spark_in_two_runs_gives_one_duckdb_run(tmp_path: Path, lake: Path, checks: Path, duckdb_once: Path) -> None:
    """The first half of the days, then the rest: carried windows, key state and the watermark go
    through the warehouse into Spark and back, and the result is the one DuckDB run's."""
    partial = tmp_path / "lake"
    days = sorted(lake.iterdir())
    for day in days[: len(days) // 2]:
        shutil.copytree(day, partial / day.name)
    # one check per path through the window and measure stages, to keep the test short
    few = tmp_path / "checks"
    few.mkdir()
    for name in INCREMENTAL:
        shutil.copyfile(checks / f"{name}.yml", few / f"{name}.yml")
    file = project(tmp_path / "spark", partial, few, SPARK)
    first = run(load_project(file))
    for day in days[len(days) // 2:]:
        shutil.copytree(day, partial / day.name)
    second = run(load_project(file))
    assert (first.files_read, second.files_read) == (len(days) // 2, len(days) - len(days) // 2)
    assert_same_results(compare(duckdb_once, file.parent / "warehouse.duckdb"))


@pytest.mark.parametrize("values", [
    [3.5], [1.0, 2.0], [2.0, 2.0, 2.0], [1.0, 2.0, 2.0, 2.0, 10.0], [5.0, 1.0, None, 1.0, 9.0, 9.0, 9.0],
    [0.1 * i for i in range(37)],
])
def test_sparks_percentile_is_duckdbs_quantile_cont(values: list[float | None]) -> None:
    """The measure's translation, on ties and small n: exact, linearly interpolated, NULLs left out."""
    from toolkit.model import Engine
    from toolkit.engine.spark import session
    from toolkit.sql.spark import translate

    rows = ", ".join(f"({'NULL' if v is None else repr(v)}::DOUBLE)" for v in values)
    quantiles = ", ".join(f"quantile_cont(x, {q}) AS q{i}" for i, q in enumerate((0.01, 0.1, 0.25, 0.5, 0.9, 0.95, 0.99)))
    sql = f"SELECT {quantiles} FROM (VALUES {rows}) AS t(x)"
    expected = duckdb.sql(sql).fetchall()[0]
    spark = session(Engine("spark", "local[2]", (("spark.sql.shuffle.partitions", "4"), ("spark.driver.memory", "1g"),
                                                  ("spark.sql.codegen.wholeStage", "false"))))
    got = tuple(spark.sql(translate(sql)).collect()[0])
    assert got == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_a_spark_failure_names_the_stage_and_writes_nothing(tmp_path: Path) -> None:
    """Spark runs in ANSI mode: dividing by zero fails the run; the warehouse keeps only the failed run."""
    from conftest import FIXTURE_LAKE, write_project

    from toolkit.problems import DataError

    text = PROJECT.format(checks="checks/", engine=SPARK, lake=FIXTURE_LAKE).replace(
        "exclude: is_bot OR regexp_matches(user_agent, '(?i)(bot|crawler|spider)')",
        "exclude: is_bot OR 1 / (play_ms - play_ms) > 0")
    file = write_project(tmp_path, {"errors.yml": """\
        check: errors
        source: sessions
        by: [site]
        measure: {kind: rate, bad: error_code IS NOT NULL}
        window: {every: 1h}
        baseline: {method: p_chart, history: 10, min_history: 3}
        """}, project=text)
    with pytest.raises(DataError, match=r"source sessions, stage source \(Spark\): .*DIVIDE_BY_ZERO"):
        run(load_project(file))
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    assert con.execute("SELECT status FROM runs").fetchall() == [("failed",)]
    assert con.execute("SELECT (SELECT count(*) FROM windows) + (SELECT count(*) FROM files_read) "
                       "+ (SELECT count(*) FROM check_state)").fetchone() == (0,)


def test_a_java_error_is_named_by_its_own_message(tmp_path: Path) -> None:
    """A Java exception pyspark does not translate (here: a file system Spark has no connector for,
    as an executor's failure would be) is named by its class and message, not by Py4J's line
    'An error occurred while calling o42.parquet.'."""
    from toolkit.engine.spark import execute
    from toolkit.model import Engine
    from toolkit.problems import DataError
    from toolkit.sql.spark import SparkStatement

    engine = Engine("spark", "local[2]", (("spark.sql.shuffle.partitions", "4"), ("spark.driver.memory", "1g"),
                                          ("spark.sql.codegen.wholeStage", "false")))
    read = SparkStatement("", frozenset({"files"}), engine, "read", "lake_files", str(tmp_path))
    with pytest.raises(DataError) as caught:
        execute(duckdb.connect(), "source sessions", "source", read, {"files": ["s3://fernhill-lake/sessions/a.parquet"]})
    assert str(caught.value) == ('source sessions, stage source (Spark): org.apache.hadoop.fs.'
                                 'UnsupportedFileSystemException: No FileSystem for scheme "s3"')
