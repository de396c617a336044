"""The wheel carries everything a user needs: templates, catalogue and demo, outside the source tree.

Builds the wheel, unpacks it into a temp folder, and runs `plimsoll demo` from another folder with
only that copy of the package importable (its dependencies come from the test environment).
"""

from __future__ import annotations

import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).parent.parent


@pytest.mark.slow
def test_wheel_holds_templates_catalogue_and_demo(tmp_path: Path) -> None:
    build = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", str(ROOT), "--no-deps", "--no-build-isolation",
         "-w", str(tmp_path / "dist"), "-q"],
        capture_output=True, text=True,
    )
    assert build.returncode == 0, build.stderr
    (wheel,) = (tmp_path / "dist").glob("plimsoll-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    for needed in ("toolkit/queries/scan.sql", "toolkit/queries/warehouse.sql",
                   "toolkit/checks/title_errors.yml", "toolkit/warehouse_demo/lake.sql",
                   "toolkit/outputs/templates/report.html", "toolkit/queries/report.sql", "toolkit/queries/outbox.sql"):
        assert needed in names, needed
    assert not any(n.startswith(("queries/", "checks/", "tests/")) for n in names)

    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    env = {**os.environ, "PYTHONPATH": str(site)}
    where = subprocess.run([sys.executable, "-c", "import toolkit; print(toolkit.__file__)"],
                           cwd=elsewhere, env=env, capture_output=True, text=True)
    assert where.stdout.strip().startswith(str(site)), where.stdout + where.stderr
    demo = subprocess.run(
        [sys.executable, "-m", "toolkit.cli", "demo", "--workdir", "demo", "--sessions", "60000"],
        cwd=elsewhere, env=env, capture_output=True, text=True,
    )
    assert demo.returncode == 0, demo.stdout + demo.stderr
    assert "Fernhill Broadcasting demo" in demo.stdout
    assert (elsewhere / "demo" / "warehouse.duckdb").is_file()
    assert (elsewhere / "demo" / "checks" / "title_errors.yml").is_file()
