"""The Spark SQL a check compiles to with ``engine: spark``: translated, complete, shown by `plimsoll sql`.

These need no Spark: they check the text. ``tests/test_spark.py`` runs it.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from conftest import FIXTURE_LAKE, PROJECT, write_project
from toolkit.cli import main
from toolkit.sql.plans import check_plan
from toolkit.sql.templates import Stage
from toolkit.config.project import load_project
from toolkit.sql.spark import SparkStatement, TranslationError, spark_stage, translate

GOLDEN = Path(__file__).parent / "golden"


def spark_project(folder: Path, check_file: Path) -> Path:
    project = write_project(folder, {}, project="engine: spark\nspark_master: local[2]\n" + PROJECT.format(lake=FIXTURE_LAKE))
    shutil.copyfile(check_file, folder / "checks" / check_file.name)
    return project


@pytest.mark.parametrize("check_file", sorted(GOLDEN.glob("*.yml")), ids=lambda p: p.stem)
def test_every_golden_check_compiles_to_spark(tmp_path: Path, check_file: Path) -> None:
    project = load_project(spark_project(tmp_path, check_file))
    compiled = check_plan(project.checks[check_file.stem])
    spark = [s for stage in compiled.stages for s in stage.once if isinstance(s, SparkStatement)]
    assert {stage.name for stage in compiled.stages if any(isinstance(s, SparkStatement) for s in stage.once)} == {
        "source", "scan", "window", "measure"}
    # the verdicts, the life cycle and persisting stay DuckDB's own statements, unchanged
    duck = check_plan(load_project(write_project(tmp_path / "duck", {check_file.name: check_file.read_text()})
                                      ).checks[check_file.stem])
    assert [s.text for s in compiled.stages[4:]] == [s.text for s in duck.stages[4:]]
    assert compiled.definition_hash == duck.definition_hash
    code = [re.sub(r"/\*.*?\*/", "", s.sql, flags=re.DOTALL).lower() for s in spark]
    assert all("read_parquet" not in c and "quantile_cont" not in c for c in code)


def test_quantiles_use_sparks_exact_percentile(tmp_path: Path) -> None:
    project = load_project(spark_project(tmp_path, GOLDEN / "startup_p90_by_site.yml"))
    text = check_plan(project.checks["startup_p90_by_site"]).sql
    assert "PERCENTILE(quantile_input, 0.9) AS value" in text
    assert "PERCENTILE_APPROX" not in text.upper() and "APPROX_PERCENTILE" not in text.upper()


def test_compile_shows_where_each_step_runs(tmp_path: Path) -> None:
    project = spark_project(tmp_path, GOLDEN / "title_decode_errors.yml")
    result = CliRunner().invoke(main, ["sql", "title_decode_errors", "-p", str(project)])
    assert result.exit_code == 0, result.output
    for words in ("-- [on Spark]", "-- [on DuckDB (the warehouse)]", "DuckDB rows -> Spark view carry",
                  "Spark rows -> DuckDB relation spark_new_windows", "CREATE OR REPLACE TEMPORARY VIEW pooled",
                  "WITH RECURSIVE walk", "RANGE BETWEEN UNBOUNDED PRECEDING AND 21600000000 FOLLOWING"):
        assert words in result.output, words


def test_a_duckdb_statement_no_directive_names_is_refused(tmp_path: Path) -> None:
    project = load_project(spark_project(tmp_path, GOLDEN / "title_decode_errors.yml"))
    check = project.checks["title_decode_errors"]
    duck = check_plan(load_project(write_project(tmp_path / "duck", {
        "title_decode_errors.yml": (GOLDEN / "title_decode_errors.yml").read_text()})).checks["title_decode_errors"])
    scan = duck.stages[1]
    extra = Stage("scan", scan.text, scan.once + (scan.once[0].__class__(
        "CREATE OR REPLACE TEMP TABLE arrivals_by_site AS SELECT 1", frozenset()),))
    with pytest.raises(TranslationError, match="does not say where DuckDB's arrivals_by_site runs"):
        spark_stage(check, extra)


@pytest.mark.parametrize("duckdb_sql,spark_sql", [
    ("SELECT quantile_cont(x, 0.25) FROM t", "PERCENTILE(x, 0.25)"),
    ("SELECT make_timestamp(epoch_us(t) // 60000000 * 60000000)",
     "CAST(TIMESTAMP_MICROS(UNIX_MICROS(t) DIV 60000000 * 60000000) AS TIMESTAMP_NTZ)"),
    ("SELECT x FROM t QUALIFY row_number() OVER (ORDER BY x) = 1", "QUALIFY"),
    ("SELECT MAP {'site': struct_extract(key, 'site')} AS key FROM t", "SELECT\n  key AS key"),
    ("SELECT map([]::VARCHAR[], []::VARCHAR[]) AS key", "SELECT\n  '' AS key"),
    ("SELECT filename AS f FROM read_parquet($files, filename = true)", "FROM lake_files"),
])
def test_translation(duckdb_sql: str, spark_sql: str) -> None:
    assert spark_sql in translate(duckdb_sql)


def test_a_map_other_than_a_series_key_is_not_translated() -> None:
    with pytest.raises(TranslationError, match="a MAP other than a series key"):
        translate("SELECT MAP {'a': b} AS m")
