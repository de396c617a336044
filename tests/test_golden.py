"""Golden SQL: each check in tests/golden compiles to its committed .sql, and running it over the
committed fixture lake gives the committed windows and alerts. Regenerate with
``python tests/golden/regenerate.py`` and review the diff.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from golden_cases import compiled_sql, result_tables

GOLDEN = Path(__file__).parent / "golden"
CASES = sorted(p.stem for p in GOLDEN.glob("*.yml"))


@pytest.mark.parametrize("name", CASES)
def test_compiled_sql_matches_golden(name: str, tmp_path: Path) -> None:
    expected = (GOLDEN / f"{name}.sql").read_text()
    assert compiled_sql(GOLDEN / f"{name}.yml", tmp_path) == expected


@pytest.mark.parametrize("name", CASES)
def test_golden_sql_gives_golden_rows(name: str, tmp_path: Path) -> None:
    windows, alerts = result_tables(GOLDEN / f"{name}.yml", tmp_path)
    assert windows == (GOLDEN / f"{name}.csv").read_text()
    assert alerts == (GOLDEN / f"{name}.alerts.csv").read_text()


def test_golden_cases_cover_every_measure_and_window_kind() -> None:
    text = "".join((GOLDEN / f"{n}.yml").read_text() for n in CASES)
    for words in ("kind: rate", "kind: ratio", "kind: quantile", "split:", "sessions:", "every:", "direction: down"):
        assert words in text
