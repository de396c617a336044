"""The test suite's own machinery: the shared demo lakes stay as built, and `python -m pytest` at the
root of a checkout works with Plimsoll installed as CI installs it (not editable).
"""

from __future__ import annotations

import os
import shutil
import site
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
# what a checkout holds that a build or a test run adds, not the project's own files
NOT_SOURCE = shutil.ignore_patterns(".git", ".venv", "build", "dist", "*.egg-info", "__pycache__", ".pytest_cache",
                                    ".hypothesis", "plimsoll-demo", "*.duckdb", "*.duckdb.wal")

pytest_plugins = ["pytester"]


def test_a_test_that_changes_a_shared_lake_fails_and_the_next_reads_it_as_built(pytester: pytest.Pytester) -> None:
    pytester.makeconftest((Path(__file__).parent / "conftest.py").read_text(encoding="utf-8"))
    pytester.makepyfile(test_lake="""
        def test_writes_into_the_lake(fernhill_lake_of):
            lake = fernhill_lake_of(20_000, 1)
            (lake.days()[0] / "extra.parquet").write_bytes(b"not a copy")

        def test_reads_the_lake_after_it(fernhill_lake_of):
            lake = fernhill_lake_of(20_000, 1)
            assert not list(lake.path.glob("*/extra.parquet"))
            assert len(lake.days()) == 21
    """)
    result = pytester.runpytest_subprocess("-p", "no:cacheprovider")
    result.assert_outcomes(passed=2, errors=1)
    result.stdout.fnmatch_lines(["*ERROR at teardown of test_writes_into_the_lake*",
                                 "*changed the shared demo lake *fernhill-20000-seed-1*: shared lakes are read-only*"])


def test_python_m_pytest_at_the_root_works_with_a_non_editable_install(tmp_path: Path) -> None:
    """A venv with Plimsoll installed from a copy of this checkout (`pip install .`, not editable),
    its dependencies taken from this test's environment; then `python -m pytest` at the copy's root,
    which imports the checkout's `toolkit` (the current folder comes first on `sys.path`), whose
    templates, catalogue and demo sit beside it rather than inside, while `plimsoll` processes run
    the installed copy."""
    checkout = tmp_path / "checkout"
    shutil.copytree(ROOT, checkout, ignore=NOT_SOURCE)
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    python = venv / "bin" / "python"
    (packages,) = Path(venv / "lib").glob("python3*/site-packages")
    # only the dependencies: a .pth file in this environment's site-packages (an editable install's
    # finder among them) is not run from here
    (packages / "dependencies.pth").write_text("\n".join(site.getsitepackages()) + "\n", encoding="utf-8")
    install = subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps",
                              "--no-build-isolation", "-q", str(checkout)], capture_output=True, text=True, timeout=300)
    assert install.returncode == 0, install.stdout + install.stderr
    assert (venv / "bin" / "plimsoll").is_file()

    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    where = subprocess.run(
        [str(python), "-c", "import toolkit.queries, toolkit.checks, toolkit.warehouse_demo as d; "
                            "print(toolkit.__file__, toolkit.queries.__file__, toolkit.checks.__file__, d.__file__)"],
        cwd=checkout, env=env, capture_output=True, text=True, timeout=60)
    assert where.returncode == 0, where.stderr
    assert where.stdout.split() == [str(checkout / "toolkit" / "__init__.py"), str(checkout / "queries" / "__init__.py"),
                                    str(checkout / "checks" / "__init__.py"),
                                    str(checkout / "warehouse_demo" / "__init__.py")]
    installed = subprocess.run([str(python), "-c", "import toolkit.queries; print(toolkit.queries.__file__)"],
                               cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60)
    assert installed.stdout.strip().startswith(str(packages)), installed.stdout + installed.stderr

    tests = ["tests/test_golden.py",  # the templates of queries/, compiled and run
             "tests/test_expressions.py::test_the_catalogue_validates_over_a_demo_lake",  # catalogue, demo lake
             "tests/test_hostile_yaml.py::test_a_hostile_project_file_is_one_line_with_its_line_from_the_real_command",
             "tests/test_cli.py"]
    run = subprocess.run([str(python), "-m", "pytest", *tests, "-p", "no:cacheprovider", "-q", "--durations=0"],
                         cwd=checkout, env=env, capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stdout[-4000:] + run.stderr[-2000:]
    assert " passed" in run.stdout and " failed" not in run.stdout and " error" not in run.stdout
