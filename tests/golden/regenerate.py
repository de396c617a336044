"""Rewrite the golden files after a deliberate change to the compiled SQL or its results.

    python tests/golden/regenerate.py

For each ``*.yml`` check here: ``NAME.sql`` is what ``plimsoll sql`` prints, and ``NAME.csv`` the
windows (and ``NAME.alerts.csv`` the alerts) a run gives over ``tests/fixtures/lake``. Read the diff
before committing it: the golden files are the review of a change to the SQL.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).parent
sys.path.insert(0, str(HERE.parent))

from golden_cases import compiled_sql, result_tables  # noqa: E402


def main() -> None:
    for check_file in sorted(HERE.glob("*.yml")):
        with tempfile.TemporaryDirectory() as tmp:
            (HERE / f"{check_file.stem}.sql").write_text(compiled_sql(check_file, Path(tmp)))
        with tempfile.TemporaryDirectory() as tmp:
            windows, alerts = result_tables(check_file, Path(tmp))
        (HERE / f"{check_file.stem}.csv").write_text(windows)
        (HERE / f"{check_file.stem}.alerts.csv").write_text(alerts)
        print(f"regenerated {check_file.stem}")


if __name__ == "__main__":
    main()
