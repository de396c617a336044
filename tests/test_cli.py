"""The command line over a temp project on the fixture lake: every command, its help, exits and output.

The README's account of the commands and the YAML keys is tested in test_docs.py."""

from __future__ import annotations

import json
import re
from pathlib import Path

import click
import duckdb
import pytest
from click.testing import CliRunner

from toolkit.cli import main

GOLDEN = Path(__file__).parent / "golden"


@pytest.fixture
def project(make_project) -> Path:
    return make_project({"startup.yml": (GOLDEN / "startup_p90_by_site.yml").read_text()})


def invoke(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


@pytest.mark.parametrize("name", sorted(main.commands))
def test_every_command_has_help_with_a_one_line_summary(name: str) -> None:
    command = main.commands[name]
    result = CliRunner().invoke(main, [name, "--help"], prog_name="plimsoll", terminal_width=80)
    assert result.exit_code == 0, result.output
    assert result.output.startswith(f"Usage: plimsoll {name} ")
    first = (command.help or "").strip().split("\n\n")[0]
    assert first and "\n" not in first and first.endswith("."), f"{name}: the help's first paragraph is one sentence"
    assert f"\n  {first}\n" in result.output
    # `plimsoll --help` lists it whole, not cut short with '...' (README's list of commands shows it too)
    listing = CliRunner().invoke(main, ["--help"], terminal_width=80).output
    assert re.search(rf"^  {name} +{re.escape(first)}$", listing, re.M), listing
    undocumented = [p.name for p in command.params if isinstance(p, click.Option) and not p.help]
    assert not undocumented, f"{name}: options without help: {undocumented}"


def test_the_command_list_is_the_commands() -> None:
    listing = invoke("--help").output
    assert re.findall(r"^  ([a-z]+)  ", listing.split("Commands:")[1], re.M) == sorted(main.commands)


def test_demo_refuses_a_size_or_seed_the_generator_cannot_build_in_one_line(tmp_path: Path) -> None:
    for option, value in (("--sessions", "15000"), ("--sessions", "1000000001"), ("--seed", "-1")):
        result = CliRunner().invoke(main, ["demo", "--workdir", str(tmp_path / "demo"), option, value])
        assert result.exit_code == 2, (result.output, result.exception)  # a usage error, not a traceback
        assert f"Invalid value for '{option}'" in result.output
        assert not (tmp_path / "demo").exists()


def test_compile_prints_the_stages(project: Path) -> None:
    result = invoke("sql", "startup_p90_by_site", "-p", str(project))
    assert result.exit_code == 0, result.output
    stages = re.findall(r"stage (\d) · (\w+)", result.output)
    assert [s[1] for s in stages] == ["source", "scan", "window", "measure", "verdict", "lifecycle", "persist"]
    assert "quantile_cont(quantile_input, 0.9)" in result.output


def test_compile_unknown_check_exits_2(project: Path) -> None:
    result = invoke("sql", "nope", "-p", str(project))
    assert result.exit_code == 2
    assert "no check named 'nope'" in result.output


def test_run_then_run_again_adds_nothing(project: Path) -> None:
    first = invoke("run", "-p", str(project))
    assert first.exit_code == 0, first.output
    assert "run 1: 2 new files" in first.output
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    before = {t: con.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("windows", "alerts", "alert_events")}
    con.close()
    second = invoke("run", "-p", str(project))
    assert second.exit_code == 0, second.output
    assert "run 2: 0 new files, 0 windows, 0 alerts opened" in second.output
    con = duckdb.connect(str(project.parent / "warehouse.duckdb"), read_only=True)
    after = {t: con.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("windows", "alerts", "alert_events")}
    runs = con.execute("SELECT run_id, status, files_read FROM runs ORDER BY run_id").fetchall()
    assert after == before and before["windows"] > 0
    assert runs == [(1, "ok", 2), (2, "ok", 0)]


def test_alerts_table_and_json(project: Path) -> None:
    invoke("run", "-p", str(project))
    table = invoke("alerts", "-p", str(project))
    assert table.exit_code == 0, table.output
    assert table.output.splitlines()[0].split() == ["status", "severity", "check", "key", "split", "worst", "threshold", "opened",
                                                    "windows", "affected", "viewers", "excess", "per", "hour", "incident"]
    assert "site=kids" in table.output
    data = json.loads(invoke("alerts", "--json", "-p", str(project)).output)
    assert {a["check_name"] for a in data} == {"startup_p90_by_site"}
    assert all(set(a) >= {"alert_id", "status", "key_text", "opened_at", "affected_sessions", "affected_viewers",
                          "excess_sessions"} for a in data)
    assert "session_id" not in json.dumps(data)
    opened = json.loads(invoke("alerts", "--json", "--status", "open", "-p", str(project)).output)
    assert all(a["status"] == "open" for a in opened)


def test_alerts_before_any_run_says_so(project: Path) -> None:
    result = invoke("alerts", "-p", str(project))
    assert result.exit_code == 1
    assert "no warehouse yet" in result.output


def test_run_on_broken_project_exits_2_and_writes_nothing(make_project, tmp_path: Path) -> None:
    text = (GOLDEN / "startup_p90_by_site.yml").read_text().replace("q: 0.9", "q: 9")
    project = make_project({"startup.yml": text})
    result = invoke("run", "-p", str(project))
    assert result.exit_code == 2
    assert "startup.yml:" in result.output and "must be between 0 and 1" in result.output
    assert not (tmp_path / "warehouse.duckdb").exists()


@pytest.mark.parametrize("baseline,words", [
    ("{method: p_chart, sigmas: 3, history: 10, min_history: 3, confidence: 0.95}",
     ["p̄ + 3.0 × √(p̄ (1 − p̄) / n)", "Wilson score interval", "z = 1.95996"]),
    ("{method: ewma, lambda: 0.3, history: 10, min_history: 3}",
     ["0.3 × value + 0.7 × z", "√(λ / (2 − λ))"]),
    ("{method: rolling_percentile, q: 0.9, history: 10, min_history: 3, factor: 2, floor: 0.05}",
     ["threshold = greatest(0.05, 2.0 × baseline)"]),
])
def test_compile_shows_each_methods_formula(make_project, baseline: str, words: list[str]) -> None:
    check = (GOLDEN / "site_failures_p_chart.yml").read_text()
    check = check[:check.index("baseline:")] + f"baseline: {baseline}\n" + check[check.index("guard:"):]
    project = make_project({"c.yml": check})
    result = invoke("sql", "site_failures_p_chart", "-p", str(project))
    assert result.exit_code == 0, result.output
    for w in words:
        assert w in result.output, w
