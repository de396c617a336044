"""The Spark SQL a check compiles to with ``engine: spark``: translated, complete, shown by `plimsoll sql`.

Each rewrite of the translation is a pair in ``tests/spark_translation/``: a DuckDB statement and the
exact Spark SQL it becomes, or the message it is refused with. Whole stages of golden cases are
compared with their committed Spark SQL (``tests/golden/<case>/spark/``). All of these are rewritten
by ``python tests/golden/regenerate.py``. These need no Spark: they check the text;
``tests/test_spark.py`` runs it.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from click.testing import CliRunner

import golden_cases
import spark_pairs
from toolkit.cli import main
from toolkit.sql.plans import check_plan
from toolkit.sql.templates import Stage
from toolkit.config.project import load_project
from toolkit.sql.spark import SPARK_STAGES, SparkStatement, TranslationError, spark_stage

CASES = golden_cases.cases()
PAIRS = spark_pairs.pair_files()


@pytest.mark.parametrize("pair_file", PAIRS, ids=lambda p: p.stem)
def test_each_rewrite_gives_its_exact_spark_sql(pair_file: Path) -> None:
    pair = spark_pairs.read(pair_file)
    outcome, text = spark_pairs.outcome(pair.duckdb)
    assert (outcome, text) == (pair.outcome, pair.expected), golden_cases.diff(
        f"{pair.outcome}\n{pair.expected}\n", f"{outcome}\n{text}\n", pair_file, "translated now")


def test_the_pairs_are_refusals_and_translations() -> None:
    outcomes = [spark_pairs.read(p).outcome for p in PAIRS]
    assert outcomes.count(spark_pairs.REFUSED) >= 3 and outcomes.count(spark_pairs.SPARK) >= 9


SPARK_PINS = [(c, s) for c in CASES for s in CASES[c].spark]


@pytest.mark.parametrize("case,stage", SPARK_PINS)
def test_a_golden_stage_on_spark_is_its_committed_spark_sql(case: str, stage: str) -> None:
    path = CASES[case].folder / "spark" / f"{stage}.sql"
    expected = path.read_text()
    actual = golden_cases.compiled_spark(case)[stage]
    assert actual == expected, golden_cases.diff(expected, actual, path)


def test_plimsoll_sql_prints_the_spark_stages_as_committed(tmp_path: Path) -> None:
    case = CASES[SPARK_PINS[0][0]]
    project = golden_cases.case_project(case.check_file, tmp_path, golden_cases.SPARK_PROJECT)
    result = CliRunner().invoke(main, ["sql", case.check_name, "-p", str(project)])
    assert result.exit_code == 0, result.output
    for stage in case.spark:
        assert (case.folder / "spark" / f"{stage}.sql").read_text() in result.output


@pytest.mark.parametrize("case", CASES)
def test_every_golden_case_compiles_to_spark(case: str) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        project = load_project(golden_cases.case_project(CASES[case].check_file, Path(tmp), golden_cases.SPARK_PROJECT))
        compiled = check_plan(project.checks[CASES[case].check_name])
    with tempfile.TemporaryDirectory() as tmp:
        duck = check_plan(load_project(golden_cases.case_project(CASES[case].check_file, Path(tmp))
                                       ).checks[CASES[case].check_name])
    on_spark = {stage.name for stage in compiled.stages if any(isinstance(s, SparkStatement) for s in stage.once)}
    # the impact of a ratio or quantile reads the sessions again, where they are
    again = {"impact"} if project.checks[CASES[case].check_name].measure.kind != "rate" else set()
    assert on_spark == set(SPARK_STAGES) | again
    # the verdicts, the life cycle and persisting stay DuckDB's own statements, unchanged
    assert [s.text for s in compiled.stages if s.name not in on_spark] == \
        [s.text for s in duck.stages if s.name not in on_spark]
    assert compiled.definition_hash == duck.definition_hash


def test_a_duckdb_statement_no_directive_names_is_refused(tmp_path: Path) -> None:
    case = CASES["rate"]
    project = load_project(golden_cases.case_project(case.check_file, tmp_path / "spark", golden_cases.SPARK_PROJECT))
    check = project.checks[case.check_name]
    duck = check_plan(load_project(golden_cases.case_project(case.check_file, tmp_path / "duck")).checks[case.check_name])
    scan = next(s for s in duck.stages if s.name == "scan")
    extra = Stage("scan", scan.text, scan.once + (scan.once[0].__class__(
        "CREATE OR REPLACE TEMP TABLE arrivals_by_site AS SELECT 1", frozenset()),))
    with pytest.raises(TranslationError, match="does not say where DuckDB's arrivals_by_site runs"):
        spark_stage(check, extra)
