"""The pairs of ``tests/spark_translation/``: a DuckDB statement and the exact Spark SQL it becomes.

Each file is one pair::

    -- What the rewrite does and why (comment lines).
    -- duckdb:
    SELECT quantile_cont(x, 0.25) AS q FROM t
    -- spark:
    SELECT
      PERCENTILE(x, 0.25) AS q
    FROM t

or, for a statement that must not be translated, ``-- refused:`` and the one-line message. Used by
``tests/test_spark_sql.py``; ``tests/golden/regenerate.py`` rewrites the part after the second marker.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from toolkit.sql.spark import TranslationError, translate

FOLDER = Path(__file__).parent / "spark_translation"
DUCKDB, SPARK, REFUSED = "-- duckdb:", "-- spark:", "-- refused:"


@dataclass(frozen=True)
class Pair:
    path: Path
    about: str          # the comment lines before the DuckDB statement
    duckdb: str
    outcome: str        # SPARK or REFUSED
    expected: str       # the Spark SQL, or the refusal's message


def pair_files() -> list[Path]:
    return sorted(FOLDER.glob("*.sql"))


def read(path: Path) -> Pair:
    lines = path.read_text().splitlines()
    try:
        start = lines.index(DUCKDB)
        end = next(i for i, line in enumerate(lines) if line in (SPARK, REFUSED) and i > start)
    except (ValueError, StopIteration):
        raise ValueError(f"{path}: needs a '{DUCKDB}' line, then a '{SPARK}' or '{REFUSED}' line") from None
    about = "\n".join(lines[:start])
    if not about or not all(line.startswith("-- ") for line in lines[:start]):
        raise ValueError(f"{path}: say what the rewrite does in comment lines before '{DUCKDB}'")
    return Pair(path, about, "\n".join(lines[start + 1:end]).strip(), lines[end], "\n".join(lines[end + 1:]).strip())


def outcome(duckdb_sql: str) -> tuple[str, str]:
    """What the translation gives now: (SPARK, its Spark SQL) or (REFUSED, its message)."""
    try:
        return SPARK, translate(duckdb_sql)
    except TranslationError as err:
        return REFUSED, str(err)


def regenerated(path: Path) -> str:
    """The pair file with its second half rewritten from what the translation gives now."""
    pair = read(path)
    marker, text = outcome(pair.duckdb)
    return f"{pair.about}\n{DUCKDB}\n{pair.duckdb}\n{marker}\n{text}\n"
