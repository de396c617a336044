"""`plimsoll sql CHECK` prints exactly the statements a run executes for the check, in order: the
check's stages and, around them, the run's own statements (queries/run.sql, lake.sql,
connection.sql, publish.sql).

Every statement DuckDB is given during a run is recorded on the connections themselves (the
warehouse's, its cursor for the per-session stages, and the lake's own for Parquet footers), so a
statement written inline anywhere in the code is caught, not only one that passes the runner's
helper. Parameters are bound apart from the text, so the texts must match exactly."""

from __future__ import annotations

import shutil
import types
from pathlib import Path
from typing import Any

import duckdb
import pytest
from click.testing import CliRunner
from conftest import FIXTURE_LAKE, PROJECT, write_project

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine import runner, warehouse
from toolkit.engine.runner import run
from toolkit.lake import files
from toolkit.sql.script import run_statements
from toolkit.sql.templates import TemplateError, read_named

GOLDEN = Path(__file__).parent / "golden"
CASES = sorted(p.stem for p in GOLDEN.glob("*.yml"))  # every measure kind, count and time windows


class Recording:
    """A DuckDB connection that notes the text of every statement run on it, and on its cursors."""

    def __init__(self, con: duckdb.DuckDBPyConnection, seen: list[str]) -> None:
        self._con, self._seen = con, seen

    def execute(self, sql: str, *args: Any, **kw: Any) -> Any:
        self._seen.append(sql)
        return self._con.execute(sql, *args, **kw)

    def sql(self, sql: str, *args: Any, **kw: Any) -> Any:
        self._seen.append(sql)
        return self._con.sql(sql, *args, **kw)

    query = sql

    def executemany(self, sql: str, *args: Any, **kw: Any) -> Any:
        self._seen.append(sql)
        return self._con.executemany(sql, *args, **kw)

    def cursor(self) -> Recording:
        return Recording(self._con.cursor(), self._seen)

    def __enter__(self) -> Recording:
        return self

    def __exit__(self, *exc: object) -> None:
        self._con.close()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._con, name)


@pytest.fixture
def recorded(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The texts of every statement run from here on, on the warehouse once it is open (opening it
    is every command's, see the script's header) and on the lake's own connections."""
    seen: list[str] = []
    opened = warehouse.connect
    monkeypatch.setattr(warehouse, "connect", lambda *a, **kw: Recording(opened(*a, **kw), seen))
    lake_duckdb = types.SimpleNamespace(connect=lambda *a, **kw: Recording(duckdb.connect(*a, **kw), seen),
                                        Error=duckdb.Error, DuckDBPyConnection=duckdb.DuckDBPyConnection)
    monkeypatch.setattr(files, "duckdb", lake_duckdb)
    return seen


def shown(project_file: Path, check: str) -> str:
    result = CliRunner().invoke(main, ["sql", check, "-p", str(project_file)])
    assert result.exit_code == 0, result.output
    return result.output


def assert_shown_in_order(seen: list[str], script: str) -> None:
    """Each statement of one call of ``run`` is in the script, and each run of the call (a backlog
    makes several) goes through the script in order but for the verdict loop, whose rounds go back
    to its start."""
    missing = [sql for sql in dict.fromkeys(seen) if sql not in script]
    assert missing == [], f"{len(missing)} statements run but not shown, the first:\n{missing[0]}"
    loop = (script.index("-- @loop until "), script.index("\n-- @end\n"))
    next_run = script.index(run_statements()["open.next_run_id"][0].sql)  # a backlog's next run
    places = [script.index(sql) for sql in seen]
    back = [(a, b) for a, b in zip(places, places[1:])
            if b < a and not loop[0] <= b < a <= loop[1] and b != next_run]
    assert back == [], [(script[a:a + 100], script[b:b + 100]) for a, b in back]


def run_recorded(recorded: list[str], project_file: Path, **kw: Any) -> tuple[Any, list[str]]:
    """One call of ``run`` (the project loaded first), and the statements it executed."""
    project = load_project(project_file)
    start = len(recorded)
    result = run(project, **kw)
    return result, recorded[start:]


@pytest.mark.parametrize("name", CASES)
def test_every_statement_a_run_executes_is_in_plimsoll_sql_in_order(name: str, tmp_path: Path,
                                                                     recorded: list[str]) -> None:
    lake = tmp_path / "lake"
    shutil.copytree(FIXTURE_LAKE, lake)
    # a backlog read one file per run (its files ordered by their first event time), then a rebuild
    # (every stage in the transaction), then a day rewritten after it was read
    project_file = write_project(tmp_path, {f"{name}.yml": (GOLDEN / f"{name}.yml").read_text()},
                                 project=PROJECT.format(lake=lake) + "max_read_per_run: 1KB\n")
    first, backlog = run_recorded(recorded, project_file)
    assert (first.first_run_id, first.run_id) == (1, 2)
    _, rebuilt = run_recorded(recorded, project_file, rebuild=True)
    rewritten = next(lake.rglob("*.parquet"))
    rewritten.write_bytes(rewritten.read_bytes())  # a new modification time: noticed, not read again
    (lake / "day=2026-11-04").mkdir()
    shutil.copyfile(next((FIXTURE_LAKE / "day=2026-11-03").glob("*.parquet")), lake / "day=2026-11-04" / "p.parquet")
    last, noticed = run_recorded(recorded, project_file)
    assert last.changed_files and last.files_read == 1

    script = shown(project_file, name)
    for seen in (backlog, rebuilt, noticed):
        assert_shown_in_order(seen, script)
    # the runs went through every part of the script: a backlog, a rebuild, a changed file, the
    # tables moved between connections, the stream of ids, the published copies
    sections = {part.split("\n", 1)[0]: part for part in script.split("-- @statement ")[1:]}
    ran = backlog + rebuilt + noticed
    for name_ in ("lake.first_event_times", "lake.footers", "lake.known_columns", "lake.record_column",
                  "begin.close_alerts", "begin.forget_rebuilt_alerts", "begin.drop_state", "begin.note_changed_files",
                  "move.new_windows.out", "move.new_windows.in", "move.kept_ids.clear", "move.kept_ids.stream",
                  "check.result", "end.record", "publish.runs", "connection.time_zone", "round_limit",
                  "still_changing"):
        assert any(sql in sections[name_] for sql in ran), name_
    assert len(ran) > 150


def test_a_removed_check_is_retired_by_statements_the_script_shows(tmp_path: Path, recorded: list[str]) -> None:
    project_file = write_project(tmp_path, {"a.yml": (GOLDEN / "title_decode_errors.yml").read_text()})
    run(load_project(project_file))
    (tmp_path / "checks" / "a.yml").unlink()
    write_project(tmp_path, {"b.yml": (GOLDEN / "startup_p90_by_site.yml").read_text()})
    _, retiring = run_recorded(recorded, project_file)
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM alerts WHERE close_reason = 'check removed'").fetchone()[0] > 0
    finally:
        con.close()
    assert any("UPDATE alerts\nSET status = 'closed'" in sql for sql in retiring)
    assert_shown_in_order(retiring, shown(project_file, "startup_p90_by_site"))


def test_the_runners_statements_all_pass_its_one_helper(tmp_path: Path, recorded: list[str],
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    # what the runner executes, it executes through runner._execute (which the benchmark times and
    # the memory tests sample): the recorded texts outside it are the lake's and the warehouse's own
    helped: list[str] = []
    original = runner._execute

    def noting(con: Any, who: str, stage: str, statement: Any, params: dict, **kw: Any) -> Any:
        helped.append(statement.sql)
        return original(con, who, stage, statement, params, **kw)

    monkeypatch.setattr(runner, "_execute", noting)
    project_file = write_project(tmp_path, {"a.yml": (GOLDEN / "title_decode_errors.yml").read_text()})
    run(load_project(project_file))
    outside = [sql for sql in recorded if sql not in helped]
    assert outside and all(any(mark in sql for mark in ("parquet_schema(", "source_columns", "COPY (",
                                                                   "FROM duckdb_columns() WHERE database_name"))
                           or sql == "SET TimeZone = 'UTC';" for sql in outside), outside


@pytest.mark.parametrize(("text", "message"), [
    ("SELECT 1;\n-- @statement a.b\nSELECT 2;\n", "t.sql: statements before the first '-- @statement NAME'"),
    ("-- @statement a\nSELECT 1;\n-- @statement a\nSELECT 2;\n", "t.sql: two statements named a"),
    ("-- @statement a\n-- nothing but a comment\n", "t.sql: '-- @statement a' holds no statement"),
    ("-- @statement A\nSELECT 1;\n", "t.sql: '-- @statement A': only '-- @statement NAME' is read here"),
    ("-- @loop until a = 0, at most b rounds\nSELECT 1;\n",
     "t.sql: '-- @loop until a = 0, at most b rounds': only '-- @statement NAME' is read here"),
])
def test_a_template_of_named_statements_that_makes_no_sense_is_refused(text: str, message: str) -> None:
    with pytest.raises(TemplateError) as refused:
        read_named("t.sql", text)
    assert str(refused.value) == message


def test_named_statements_keep_their_order_and_leave_the_next_heading_out() -> None:
    read = read_named("t.sql", "-- about\n-- @statement a.one\n-- what it does\nSELECT 1;\n\n-- ══ later ══\n"
                               "-- @statement a.two\nSELECT 2;\nSELECT 3;\n")
    assert [s.sql for s in read["a.one"]] == ["-- what it does\nSELECT 1;"]
    assert [s.sql for s in read["a.two"]] == ["SELECT 2;", "SELECT 3;"]
    assert read.text("a.two", "a.one") == ("-- @statement a.two\nSELECT 2;\nSELECT 3;\n\n"
                                           "-- @statement a.one\n-- what it does\nSELECT 1;\n")
    assert read.text("a.") == read.text("a.one", "a.two")
    with pytest.raises(KeyError):
        read["a.three"]


def test_a_runs_source_alarms_are_statements_the_script_shows(tmp_path: Path, recorded: list[str]) -> None:
    # max_silence and max_lag on the source: after the checks, the alarms are judged (queries/alarms.sql)
    from datetime import datetime, timedelta

    project_file = write_project(tmp_path, {"a.yml": (GOLDEN / "title_decode_errors.yml").read_text()},
                                 project=PROJECT.format(lake=FIXTURE_LAKE) + "    max_silence: 30m\n    max_lag: 1h\n")
    _, judged = run_recorded(recorded, project_file, clock=lambda: datetime(2030, 1, 1))
    _, again = run_recorded(recorded, project_file, clock=lambda: datetime(2030, 1, 1) + timedelta(hours=1))
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT alarm, status FROM alerts WHERE alarm IS NOT NULL ORDER BY 1").fetchall() == [
            ("lagging", "open"), ("silent", "open")]
    finally:
        con.close()
    script = shown(project_file, "title_decode_errors")
    for seen in (judged, again):
        assert_shown_in_order(seen, script)
    sections = {part.split("\n", 1)[0]: part for part in script.split("-- @statement ")[1:]}
    for name in ("alarms.retire", "alarms.arrivals", "alarms.verdicts", "alarms.record", "alarms.summary"):
        assert any(sql in sections[name] for sql in judged), name
