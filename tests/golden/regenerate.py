"""Rewrite every expected file of the golden tests after a deliberate change to the compiled SQL,
its results or its Spark translation.

    python tests/golden/regenerate.py

For each case of ``cases.toml`` (a folder here): ``<piece>.sql`` for each piece of what ``plimsoll
sql`` prints (each stage, and ``script``: the rest, with a marker where each stage goes) where the
case differs from the case it is ``like`` (the others are removed, so nothing is repeated), ``spark/<stage>.sql`` for the stages it lists under
``spark``, and ``windows.csv`` and ``alerts.csv`` from one run over ``tests/fixtures/lake``; then
the Spark side of each pair in ``tests/spark_translation/``. Read the diff before committing it:
the golden files are the review of a change to the SQL.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).parent
sys.path.insert(0, str(HERE.parent))

import golden_cases  # noqa: E402
import spark_pairs  # noqa: E402


def _write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if not path.exists() or path.read_text() != text:
        path.write_text(text)
        print(f"  wrote {path.relative_to(HERE.parent)}")


def _remove_other_sql(folder: Path, keep: list[str]) -> None:
    for path in sorted(folder.glob("*.sql")):
        if path.stem not in keep:
            path.unlink()
            print(f"  removed {path.relative_to(HERE.parent)}")


def main() -> None:
    pieces: dict[str, dict[str, str]] = {}
    for case in golden_cases.cases().values():
        print(f"case {case.name}" + (f" (like {case.like})" if case.like else ""))
        with tempfile.TemporaryDirectory() as tmp:
            pieces[case.name] = golden_cases.script_pieces(case.check_file, Path(tmp))
        own = golden_cases.pinned(case, pieces)
        for piece in own:
            _write(case.folder / f"{piece}.sql", pieces[case.name][piece])
        _remove_other_sql(case.folder, own)
        if case.spark:
            with tempfile.TemporaryDirectory() as tmp:
                spark = golden_cases.spark_stages(case.check_file, Path(tmp))
            for stage in case.spark:
                _write(case.folder / "spark" / f"{stage}.sql", spark[stage])
        if (case.folder / "spark").is_dir():
            _remove_other_sql(case.folder / "spark", list(case.spark))
        with tempfile.TemporaryDirectory() as tmp:
            windows, alerts = golden_cases.result_tables(case.check_file, Path(tmp))
        _write(case.folder / "windows.csv", windows)
        _write(case.folder / "alerts.csv", alerts)
    print("spark translation pairs")
    for pair_file in spark_pairs.pair_files():
        _write(pair_file, spark_pairs.regenerated(pair_file))


if __name__ == "__main__":
    main()
