"""Running the Spark stages (``engine: spark``): one Spark session per engine setting, and the steps
of a Spark stage as :mod:`toolkit.sql.spark` compiled them.

Spark SQL statements run as written; a statement that creates a view is materialized at once (a
local checkpoint), as DuckDB materializes its temp tables, so every later statement reads the same
rows and Spark's plans do not grow stage after stage. Rows cross between the engines as Arrow
through the driver: the warehouse's state for one check into Spark, and the windows (a row per
window, not per session) back. Nothing here computes: the SQL does.
"""

from __future__ import annotations

from typing import Any

import duckdb

from toolkit.model import Engine
from toolkit.engine.warehouse import finish_pending
from toolkit.problems import DataError
from toolkit.sql.spark import FILES_VIEW, SPARK_FILE, SparkStatement

__all__ = ["SparkStatement", "execute", "session", "stop"]

INSTALL_HINT = "pip install 'plimsoll[spark]'"
DEFAULT_MASTER = "local[*]"
# What the translated SQL relies on: data time in UTC, and TIMESTAMP meaning a naive timestamp, as
# DuckDB's TIMESTAMP is. These win over `spark_conf`.
FIXED_CONF = (
    ("spark.sql.session.timeZone", "UTC"),
    ("spark.sql.timestampType", "TIMESTAMP_NTZ"),
    ("spark.ui.showConsoleProgress", "false"),
)

_SESSIONS: dict[Engine, Any] = {}


def session(engine: Engine) -> Any:
    """The Spark session for ``engine``, started on first use and kept for the process.

    A process holds one Spark context, and Spark hands a new builder the running one whatever its
    master: a project on another master or with other settings (a backtest, a test) would run in
    the session of the one before it, on a local JVM instead of the cluster or the reverse. So the
    session of another engine setting is stopped first.
    """
    if engine in _SESSIONS:
        return _SESSIONS[engine]
    stop()
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise DataError(f"engine: spark needs pyspark, which is not installed: {INSTALL_HINT}") from None
    builder = SparkSession.builder.appName("plimsoll").master(engine.spark_master or DEFAULT_MASTER)
    for key, value in (*engine.spark_conf, *FIXED_CONF):
        builder = builder.config(key, value)
    try:
        spark = builder.getOrCreate()
    except Exception as err:  # the JVM failed to start: no Java, a bad master URL, …
        raise DataError(f"Spark at {engine.spark_master or DEFAULT_MASTER} did not start: {_first_line(err)}") from err
    spark.sparkContext.setLogLevel("FATAL")
    _SESSIONS[engine] = spark
    return spark


def stop() -> None:
    """Stop the Spark session this process started, if any."""
    while _SESSIONS:
        _, spark = _SESSIONS.popitem()
        spark.stop()


def execute(con: duckdb.DuckDBPyConnection, who: str, stage: str, statement: SparkStatement,
            params: dict[str, Any]) -> None:
    """Run one step of a Spark stage; any failure is a DataError naming the check and stage."""
    spark = session(statement.engine)
    try:
        _STEPS[statement.action](spark, con, statement, params)
    except DataError:
        raise
    except Exception as err:
        raise DataError(f"{who}, stage {stage} (Spark): {_first_line(err)}") from err


def _read(spark: Any, con: duckdb.DuckDBPyConnection, statement: SparkStatement, params: dict[str, Any]) -> None:
    """The run's new files as one view: hive partitions below the source's folder, union by name."""
    from pyspark.sql import functions as F

    frame = (spark.read.option("mergeSchema", "true").option("basePath", statement.base)
             .parquet(*params["files"]))
    frame.select("*", F.col("_metadata.file_path").alias(SPARK_FILE)).createOrReplaceTempView(
        statement.name or FILES_VIEW)


def _spark_sql(spark: Any, con: duckdb.DuckDBPyConnection, statement: SparkStatement,
               params: dict[str, Any]) -> None:
    spark.sql(statement.sql)
    if statement.name and statement.keep:
        spark.table(statement.name).localCheckpoint(eager=True).createOrReplaceTempView(statement.name)


def _to_spark(spark: Any, con: duckdb.DuckDBPyConnection, statement: SparkStatement,
              params: dict[str, Any]) -> None:
    """DuckDB rows (the warehouse's state for one check) as a Spark view."""
    import pyarrow as pa

    wanted = {k: params[k] for k in statement.params}
    finish_pending(con)
    table = con.sql(statement.sql, params=wanted).to_arrow_table()
    if table.num_rows == 0:  # Spark cannot take an Arrow table without a batch
        table = pa.Table.from_batches([pa.RecordBatch.from_pylist([], schema=table.schema)])
    spark.createDataFrame(table).localCheckpoint(eager=True).createOrReplaceTempView(statement.name)


def _to_duckdb(spark: Any, con: duckdb.DuckDBPyConnection, statement: SparkStatement,
               params: dict[str, Any]) -> None:
    """Spark rows as an Arrow relation the next DuckDB statement reads."""
    rows = spark.sql(statement.sql).toArrow()
    finish_pending(con)
    con.register(statement.name, rows)


_STEPS = {"read": _read, "spark": _spark_sql, "to-spark": _to_spark, "to-duckdb": _to_duckdb}


# How Py4J begins the message of a Java exception that pyspark does not turn into one of its own
# (a file system, an executor's failure): its first line names only the method called
_PY4J_CALL = "An error occurred while calling "


def _first_line(err: BaseException) -> str:
    lines = [line.strip() for line in str(err).strip().splitlines() if line.strip()]
    if not lines:
        return type(err).__name__
    if lines[0].startswith(_PY4J_CALL) and len(lines) > 1:
        return lines[1].removeprefix(":").strip()  # the Java exception and its message
    return lines[0]
