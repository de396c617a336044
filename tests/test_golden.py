"""Golden SQL, stage by stage: for each case of ``tests/golden/cases.toml``, ``plimsoll sql`` prints its
committed SQL (one file per stage and ``script.sql`` around them, the pieces it shares with the case
it is like left to that case), and one run of it over the committed fixture lake gives its committed
windows and alerts. Regenerate with ``python tests/golden/regenerate.py`` and review the diff.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest
from click.testing import CliRunner

import golden_cases
from golden_cases import GOLDEN, PIECES
from toolkit.cli import main

CASES = golden_cases.cases()


@pytest.mark.parametrize("case,piece", [(c, p) for c in CASES for p in PIECES])
def test_each_stage_compiles_to_its_golden_file(case: str, piece: str) -> None:
    path = golden_cases.expected_file(CASES[case], piece)
    expected = path.read_text()
    actual = golden_cases.compiled(case)[piece]
    assert actual == expected, golden_cases.diff(expected, actual, path)


@pytest.mark.parametrize("case", CASES)
def test_a_case_folder_holds_only_the_stages_where_it_differs(case: str) -> None:
    # so a reviewer reads each stage once, where a case changes it
    parent = CASES[case].like or case
    pieces = {parent: golden_cases.compiled(parent), case: golden_cases.compiled(case)}
    held = sorted(p.stem for p in CASES[case].folder.glob("*.sql"))
    assert held == sorted(golden_cases.pinned(CASES[case], pieces))
    expected = {"check.yml", "windows.csv", "alerts.csv", *(f"{p}.sql" for p in held)} | (
        {"spark"} if CASES[case].spark else set())
    assert {p.name for p in CASES[case].folder.iterdir()} == expected
    if CASES[case].spark:
        assert sorted(p.name for p in (CASES[case].folder / "spark").iterdir()) == sorted(
            f"{s}.sql" for s in CASES[case].spark)


@pytest.mark.parametrize("case", CASES)
def test_plimsoll_sql_prints_the_case_files_put_together(case: str, tmp_path: Path) -> None:
    project = golden_cases.case_project(CASES[case].check_file, tmp_path)
    result = CliRunner().invoke(main, ["sql", CASES[case].check_name, "-p", str(project)])
    assert result.exit_code == 0, result.output
    files = {piece: golden_cases.expected_file(CASES[case], piece).read_text() for piece in PIECES}
    expected = golden_cases.assemble(files)
    assert result.output == expected, golden_cases.diff(expected, result.output, CASES[case].folder,
                                                        "plimsoll sql prints now")


@pytest.mark.parametrize("case", CASES)
def test_a_case_is_named_golden_so_its_stages_can_be_shared(case: str) -> None:
    assert CASES[case].check_name == "golden"


@pytest.mark.parametrize("case", CASES)
def test_each_case_gives_its_golden_rows(case: str, tmp_path: Path) -> None:
    windows, alerts = golden_cases.result_tables(CASES[case].check_file, tmp_path)
    for name, actual in (("windows.csv", windows), ("alerts.csv", alerts)):
        path = CASES[case].folder / name
        expected = path.read_text()
        assert actual == expected, golden_cases.diff(expected, actual, path)


def test_the_cases_cover_every_measure_window_baseline_and_gate() -> None:
    text = "".join(c.check_file.read_text() for c in CASES.values())
    for words in ("kind: rate", "kind: ratio", "kind: quantile", "split:", "sessions:", "every:", "lateness:",
                  "direction: down", "by: []", "where:", "floor:", "min_bad:", "method: rolling_percentile",
                  "method: p_chart", "confidence:", "method: ewma"):
        assert words in text, words


def rows(case: str, name: str) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO((GOLDEN / case / name).read_text())))


@pytest.mark.parametrize("case", CASES)
def test_each_case_has_windows_with_a_verdict_and_a_breach(case: str) -> None:
    # rows without a breach would pin nothing of the verdicts or the life cycle
    windows = rows(case, "windows.csv")
    assert any(w["threshold"] for w in windows)
    assert any(w["breach"] == "True" for w in windows)
    assert rows(case, "alerts.csv")


def test_the_ewma_case_smooths_and_breaches_on_its_statistic() -> None:
    windows = rows("ewma", "windows.csv")
    assert all(w["statistic"] for w in windows)
    assert any(w["statistic"] != w["value"] for w in windows)      # smoothed, not the value again
    # a window whose own value is under its limit breaches because its statistic is over it
    assert any(w["breach"] == "True" and float(w["value"]) <= float(w["threshold"]) < float(w["statistic"])
               for w in windows)
