"""The warehouse records its layout: a file of an earlier layout is converted in place by the next
command that writes it, and one of a later layout is refused with one line."""

from __future__ import annotations

import duckdb
from click.testing import CliRunner
from conftest import warehouse_contents
from known_lake import known_project

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine import warehouse
from toolkit.engine.runner import run


def test_a_layout_2_file_has_its_columns_renamed_and_runs_on(tmp_path) -> None:
    project = load_project(known_project(tmp_path))
    run(project)
    con = duckdb.connect(str(project.warehouse))
    con.execute("ALTER TABLE runs RENAME COLUMN rebuild TO full_refresh")  # as layout 2 named it
    con.execute("UPDATE schema_version SET version = 2")
    con.close()
    before = warehouse_contents(project.warehouse, skip=("runs", "schema_version"))
    result = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    con = duckdb.connect(str(project.warehouse), read_only=True)
    columns = [r[0] for r in con.execute("DESCRIBE runs").fetchall()]
    assert "rebuild" in columns and "full_refresh" not in columns
    assert con.execute("SELECT version FROM schema_version").fetchall() == [(warehouse.SCHEMA_VERSION,)]
    assert con.execute("SELECT run_id, rebuild FROM runs ORDER BY run_id").fetchall() == [(1, False), (2, False)]
    con.close()
    assert warehouse_contents(project.warehouse, skip=("runs", "schema_version")) == before


def test_a_file_of_a_later_layout_is_refused_with_one_line(tmp_path) -> None:
    project = load_project(known_project(tmp_path))
    run(project)
    con = duckdb.connect(str(project.warehouse))
    con.execute("UPDATE schema_version SET version = 99")
    con.close()
    result = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert result.exit_code == 1
    assert result.output == (f"{project.warehouse}: written by a newer Plimsoll (warehouse layout 99; this one "
                             f"reads layout {warehouse.SCHEMA_VERSION} and earlier); upgrade plimsoll\n")
