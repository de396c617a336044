"""The verdict stage is one template whose loop is written in it: `-- @loop until NAME = 0, at most
LIMIT rounds` … `-- @end`, with the stop condition and the limit as named statements. The runner
repeats the round the template describes, records how many rounds it took, and stops with one line
when the loop does not settle within its limit."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import duckdb
import pytest
from click.testing import CliRunner
from conftest import write_project

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine import runner
from toolkit.sql.plans import check_plan
from toolkit.sql.templates import Statement, TemplateError, stage

GOLDEN = Path(__file__).parent / "golden"
CHECK = "title_decode_errors"  # a split rate check over the fixture lake that breaches (tests/golden)


@pytest.fixture
def project(make_project) -> Path:
    return make_project({f"{CHECK}.yml": (GOLDEN / f"{CHECK}.yml").read_text()})


def test_the_verdict_stage_holds_its_loop(project: Path) -> None:
    compiled = check_plan(load_project(project).checks[CHECK])
    verdict = next(s for s in compiled.stages if s.name == "verdict")
    assert [s.name for s in compiled.stages] == ["source", "scan", "window", "measure", "verdict", "impact",
                                                  "lifecycle", "persist"]
    assert verdict.loop is not None and verdict.after == ()
    assert (verdict.loop.until_name, verdict.loop.limit_name) == ("still_changing", "round_limit")
    assert verdict.loop.until.sql.endswith("SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;")
    made = [s.sql.split("CREATE OR REPLACE TEMP TABLE ")[1].split()[0] for s in verdict.loop.rounds
            if "CREATE OR REPLACE TEMP TABLE" in s.sql]
    assert made == ["baselines", "round_verdicts"]
    assert "CREATE OR REPLACE TEMP TABLE judged" in verdict.once[-1].sql
    # no other stage loops, and `plimsoll sql` shows the loop as the runner reads it
    assert [s.name for s in compiled.stages if s.loop is not None] == ["verdict"]
    shown = CliRunner().invoke(main, ["sql", CHECK, "-p", str(project)]).output
    assert "-- @loop until still_changing = 0, at most round_limit rounds\n" in shown
    assert "\n-- @end\n" in shown


def test_the_rounds_run_are_the_rounds_recorded(project: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ran: list[str] = []
    original = runner._execute

    def counting(con: Any, who: str, stage_name: str, statement: Statement, params: dict, **kw: Any) -> Any:
        if stage_name == "verdict":
            ran.append(statement.sql)
        return original(con, who, stage_name, statement, params, **kw)

    monkeypatch.setattr(runner, "_execute", counting)
    result = runner.run(load_project(project))
    stop = [sql for sql in ran if sql.endswith("AS still_changing FROM judged;")]
    limit = [sql for sql in ran if "AS round_limit" in sql]
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    try:
        recorded = con.execute("SELECT rounds FROM run_checks").fetchall()
        breaches = con.execute("SELECT count(*) FROM windows WHERE breach").fetchone()[0]
    finally:
        con.close()
    # the limit once before the loop; the stop condition once at the end of every round
    assert len(limit) == 1 and recorded == [(len(stop),)] == [(result.checks[0].rounds,)]
    # a breach changes the history of the windows after it, so it takes a round more than one
    assert breaches > 0 and len(stop) >= 2


def test_a_loop_that_does_not_settle_stops_the_run_with_one_line(project: Path,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    original = runner.check_plan

    def never_settling(check: Any) -> Any:
        compiled = original(check)
        stages = []
        for s in compiled.stages:
            if s.loop is not None:  # a stop condition that never reaches 0, within a limit of 3 rounds
                s = replace(s, loop=replace(s.loop, until=Statement("SELECT 1 AS still_changing", frozenset()),
                                            limit=Statement("SELECT 3 AS round_limit", frozenset())))
            stages.append(s)
        return replace(compiled, stages=tuple(stages))

    monkeypatch.setattr(runner, "check_plan", never_settling)
    result = CliRunner().invoke(main, ["run", "-p", str(project)])
    assert result.exit_code == 1
    assert result.output.splitlines()[-1] == (
        f"check {CHECK}, stage verdict: the loop did not settle: still_changing was still 1 after 3 rounds, "
        "the most round_limit allows")
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT status FROM runs").fetchall() == [("failed",)]
        assert con.execute("SELECT count(*) FROM windows").fetchone() == (0,)
    finally:
        con.close()


LIMIT = "-- @statement most\nSELECT 5;\n"
ROUND = "UPDATE t SET x = x + 1;\n"
STOP = "-- @statement left\nSELECT 0;\n"


def test_a_stage_reads_once_loop_and_after() -> None:
    read = stage("s", f"CREATE TABLE t AS SELECT 1 AS x;\n{LIMIT}-- @loop until left = 0, at most most rounds\n"
                      f"{ROUND}{STOP}-- @end\nSELECT x FROM t;\n")
    assert [s.sql for s in read.once] == ["CREATE TABLE t AS SELECT 1 AS x;"]
    assert [s.sql for s in read.loop.rounds] == ["UPDATE t SET x = x + 1;"]
    assert read.loop.until.sql == "-- @statement left\nSELECT 0;".split("\n", 1)[1]
    assert read.loop.limit.sql == "SELECT 5;"
    assert [s.sql for s in read.after] == ["SELECT x FROM t;"]
    plain = stage("p", "SELECT 1;\nSELECT 2;\n")
    assert plain.loop is None and len(plain.once) == 2


@pytest.mark.parametrize(("text", "message"), [
    (f"{LIMIT}-- @loop until left = 0, at most most rounds\n{ROUND}{STOP}",
     "s: '-- @loop' without '-- @end'"),
    (f"{LIMIT}-- @loop until left = 0, at most most rounds\n{STOP}{ROUND}-- @end\n",
     "s: '-- @statement left' holds 2 statements; a named statement is one"),
    (f"-- @loop until left = 0, at most most rounds\n{ROUND}{STOP}-- @end\n{LIMIT}",
     "s: the loop's limit 'most' must be a '-- @statement most' before it"),
    (f"{LIMIT}-- @loop until gone = 0, at most most rounds\n{ROUND}{STOP}-- @end\n",
     "s: '-- @statement left' after the loop began: only its stop condition (gone) is named there, as the "
     "round's last statement"),
    (f"{LIMIT}-- @loop until left = 0\n{ROUND}{STOP}-- @end\n",
     "s: '-- @loop until left = 0': expected '-- @loop until NAME = 0, at most LIMIT rounds'"),
    (f"{ROUND}-- @end\n", "s: '-- @end' must follow the loop's stop condition ('-- @statement NAME', the round's "
                          "last statement)"),
    (f"{LIMIT}{ROUND}", "s: '-- @statement most' holds 2 statements; a named statement is one"),
    (f"{LIMIT}", "s: named statements that no loop uses: most"),
    (f"{LIMIT}-- @loop until left = 0, at most most rounds\n{ROUND}{STOP}-- @end\n"
     f"-- @loop until left = 0, at most most rounds\n{ROUND}{STOP}-- @end\n", "s: one loop per stage"),
])
def test_directives_that_make_no_sense_are_refused(text: str, message: str) -> None:
    with pytest.raises(TemplateError) as refused:
        stage("s", text)
    assert str(refused.value) == message


def test_a_long_run_of_breaches_settles_in_a_few_rounds(tmp_path: Path) -> None:
    """One series, 50 quiet windows then 50 at ten times the rate. With history 30 and the 90th
    percentile, a round that counts a breach as history lets only the next three or four windows
    breach, so a round per few windows would take about 15 rounds; a round's guess (a window after
    the first change at least as high as a breach found is taken as one) settles it in two, and
    the verdicts are those the definition gives: every high window a breach, no quiet one."""
    from datetime import datetime, timedelta

    start, rows = datetime(2026, 11, 2), []
    for w in range(100):
        errors = 10 if w >= 50 else 1 + w % 2
        for i in range(20):
            rows.append({"session_id": f"s{w:03d}-{i:02d}", "ended_at": start + timedelta(minutes=20 * w + i),
                         "is_bot": False, "error_code": "E1" if i < errors else None})
    check = """\
        check: steady_then_broken
        source: sessions
        measure:
          kind: rate
          bad: error_code IS NOT NULL
        window:
          sessions: 20
          max_wait: 1d
        baseline:
          method: rolling_percentile
          q: 0.9
          history: 30
          min_history: 4
          factor: 2.0
          floor: 0.05
        guard:
          min_sessions: 20
          min_bad: 3
        """
    result, verdicts = _run_one_series(tmp_path, rows, "steady_then_broken", check)
    assert [w for w, b in sorted(verdicts.items()) if b] == list(range(50, 100))
    assert [w for w, b in sorted(verdicts.items()) if b is False] == list(range(50))
    assert result.checks[0].rounds <= 3


def test_windows_too_small_to_judge_inside_a_run_of_breaches_do_not_add_rounds(tmp_path: Path) -> None:
    """One series of hourly windows: 50 quiet hours, then 40 hours in which full hours (20 sessions,
    half failing) alternate with nearly empty ones (4 sessions, all failing: too few to judge). The
    guess takes the empty hours, higher than any breach, for breaches; a round then finds them
    without a verdict. Both are kept out of the history, so that changes no baseline and must not
    start another round: the loop compares each window's place in the history, not its flag. (It
    compared flags before, and undid one guessed hour per round: 21 rounds here.)"""
    from datetime import datetime, timedelta

    start, rows = datetime(2026, 11, 2), []
    for hour in range(90):
        high, full = hour >= 50, hour < 50 or hour % 2 == 0
        sessions = 20 if full else 4
        errors = (10 if full else 4) if high else hour % 2
        for i in range(sessions):
            rows.append({"session_id": f"s{hour:03d}-{i:02d}", "ended_at": start + timedelta(hours=hour, minutes=2 * i + 1),
                         "is_bot": False, "error_code": "E1" if i < errors else None})
    check = """\
        check: broken_with_gaps
        source: sessions
        measure:
          kind: rate
          bad: error_code IS NOT NULL
        window:
          every: 1h
        baseline:
          method: p_chart
          sigmas: 3
          history: 24
          min_history: 4
        guard:
          min_sessions: 10
          min_bad: 3
        """
    result, verdicts = _run_one_series(tmp_path, rows, "broken_with_gaps", check)
    assert [h for h, b in sorted(verdicts.items()) if b] == list(range(50, 90, 2))
    assert [h for h, b in sorted(verdicts.items()) if b is None] == list(range(51, 89, 2))  # the last hour is still open
    assert result.checks[0].rounds <= 3, result.checks[0].rounds


def _run_one_series(tmp_path: Path, rows: list[dict[str, Any]], name: str, check: str) -> tuple[Any, dict[int, Any]]:
    """One run of ``check`` over ``rows`` as a lake of one file: the run's result, and each window's
    breach flag by its place in the series (0 for the first window)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    lake = tmp_path / "lake"
    lake.mkdir()
    pq.write_table(pa.Table.from_pylist(rows), lake / "part-0.parquet")
    project = write_project(tmp_path / "p", {f"{name}.yml": check}, lake=lake)
    result = runner.run(load_project(project))
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    try:
        return result, dict(con.execute("SELECT window_number - min(window_number) OVER (), breach FROM windows").fetchall())
    finally:
        con.close()
