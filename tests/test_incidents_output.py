"""Causes and incidents in the outputs: `plimsoll alerts` and `plimsoll incidents` over the known lake's
warehouse, with its causes and incidents written by hand as a run of layout 5 writes them."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from known_lake import HOSTILE, HOSTILE_PLAYER, fill_incidents, known_project, warehouse_held
from oracle import key_value
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.outputs.listings import incidents_table, list_alerts, list_incidents


def invoke(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


@pytest.fixture
def project(tmp_path: Path) -> Path:
    project = known_project(tmp_path)
    assert invoke("run", "-p", str(project)).exit_code == 0
    return project


@pytest.fixture
def filled(project: Path) -> tuple[Path, dict[str, str]]:
    return project, fill_incidents(load_project(project).warehouse)


HOSTILE_KEY = f"site=kids, title_id={key_value(HOSTILE)}"


def test_alerts_show_their_incident_and_where_their_excess_lies(filled) -> None:
    project, ids = filled
    lines = invoke("alerts", "-p", str(project)).output.splitlines()
    assert lines[0].split()[-1] == "incident"
    assert lines[2].split()[-1] == "inc-open" and lines[4].split()[-1] == "inc-closed"
    assert lines[3] == f"  └ {HOSTILE_KEY}: 7 failing sessions, 90 % of the excess in player_version={HOSTILE_PLAYER}"
    # only the significant cause is told, by rank; the other row is in --json
    assert lines[5] == "  └ site=kids, title_id=t-1: 11 failing sessions, 81 % of the excess in cdn=birch, country=DE"
    assert len(lines) == 6


def test_an_alert_without_causes_or_incident_shows_neither(project: Path) -> None:
    lines = invoke("alerts", "-p", str(project)).output.splitlines()
    assert len(lines) == 4 and all(line.split()[-1] == "-" for line in lines[2:])
    data = json.loads(invoke("alerts", "--json", "-p", str(project)).output)
    assert [(a["incident_id"], a["causes"]) for a in data] == [(None, []), (None, [])]


def test_alerts_json_carries_the_incident_and_every_cause(filled) -> None:
    project, ids = filled
    data = {a["alert_id"]: a for a in json.loads(invoke("alerts", "--json", "-p", str(project)).output)}
    closed = data[ids["closed"]]
    assert closed["incident_id"] == "inc-closed"
    assert closed["causes"] == [
        {"rank": 1, "key": {"cdn": "birch", "country": "DE"}, "bad": 11.0, "expected": 1.5, "excess_share": 0.81,
         "score": 20.5, "significant": True},
        {"rank": 2, "key": {"device_family": "tv"}, "bad": 4.0, "expected": 2.0, "excess_share": 0.2, "score": 1.1,
         "significant": False},
    ]
    assert data[ids["hostile"]]["causes"][0]["key"] == {"player_version": HOSTILE_PLAYER}


def test_the_latest_runs_causes_are_the_alerts(filled) -> None:
    import duckdb

    project, ids = filled
    con = duckdb.connect(str(load_project(project).warehouse))
    con.execute("INSERT INTO alert_causes VALUES ($a, 1, MAP {'cdn': 'oak'}, 'cdn=oak', 30, 3, 40, 0.95, 50, true,"
                " 3, 4, 2)", {"a": ids["closed"]})
    con.close()
    (closed,) = [a for a in list_alerts(load_project(project)) if a["alert_id"] == ids["closed"]]
    assert [c["key_text"] for c in closed["causes"]] == ["cdn=oak"]


def test_incidents_table(filled) -> None:
    project, ids = filled
    result = invoke("incidents", "-p", str(project))
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0].split() == ["incident", "status", "severity", "opened", "closed", "cause", "alerts", "affected",
                                "viewers"]
    assert lines[2].split()[:4] == ["inc-open", "open", "high", "2026-11-02"]
    assert f"title_errors {HOSTILE_KEY}" in lines[2] and lines[2].split()[-3:] == ["1", "8", "-"]
    assert lines[3].startswith(f"  └ {HOSTILE_KEY}: 7 failing sessions, 90 % of the excess in player_version=")
    assert lines[4].split()[:6] == ["inc-closed", "closed", "high", "2026-11-02", "00:49", "2026-11-02"]
    assert "title_errors site=kids, title_id=t-1" in lines[4] and lines[4].split()[-3:] == ["1", "13", "-"]
    assert lines[5].endswith("81 % of the excess in cdn=birch, country=DE")
    only_open = invoke("incidents", "--status", "open", "-p", str(project)).output.splitlines()
    assert [line.split()[0] for line in only_open[2:] if not line.startswith(" ")] == ["inc-open"]
    only_closed = invoke("incidents", "--status", "closed", "-p", str(project)).output.splitlines()
    assert [line.split()[0] for line in only_closed[2:] if not line.startswith(" ")] == ["inc-closed"]


def test_incidents_json(filled) -> None:
    project, ids = filled
    data = json.loads(invoke("incidents", "--json", "-p", str(project)).output)
    assert [i["incident_id"] for i in data] == ["inc-open", "inc-closed"]  # newest first
    closed = data[1]
    assert closed == {
        "incident_id": "inc-closed", "status": "closed", "severity": "high",
        "opened_at": "2026-11-02 00:49:00", "closed_at": "2026-11-02 01:09:00",
        "cause": {"check": "title_errors", "key": {"site": "kids", "title_id": "t-1"},
                  "key_text": "site=kids, title_id=t-1", "split_value": None, "alert_id": ids["closed"]},
        "alerts": 1, "alert_ids": [ids["closed"]], "affected_sessions": 13, "affected_viewers": None,
        "excess_sessions": 13.0,
        "causes": [{"rank": 1, "key": {"cdn": "birch", "country": "DE"}, "bad": 11.0, "expected": 1.5,
                    "excess_share": 0.81, "score": 20.5, "significant": True}],
        "first_run_id": 1, "last_run_id": 1,
    }
    assert data[0]["cause"]["key"] == {"site": "kids", "title_id": HOSTILE}
    assert json.loads(invoke("incidents", "--json", "--status", "closed", "-p", str(project)).output) == [closed]


def test_no_incidents_and_bad_status(project: Path) -> None:
    result = invoke("incidents", "-p", str(project))
    assert (result.exit_code, result.output) == (0, "no incidents\n")
    assert json.loads(invoke("incidents", "--json", "-p", str(project)).output) == []
    bad = CliRunner().invoke(main, ["incidents", "--status", "shut", "-p", str(project)])
    assert bad.exit_code == 2 and "Traceback" not in bad.output
    assert "Invalid value for '--status': 'shut' is not one of 'open', 'closed', 'all'." in bad.output


def test_incidents_before_any_run_say_so(tmp_path: Path) -> None:
    project = known_project(tmp_path)
    result = CliRunner().invoke(main, ["incidents", "-p", str(project)])
    assert result.exit_code == 1 and result.output.strip().endswith("no warehouse yet; run `plimsoll run` first")


def test_incidents_read_the_published_copies_while_a_run_holds_the_warehouse(filled, tmp_path: Path) -> None:
    project, _ = filled
    # publish the hand-filled tables as a run would, then hold the file as a run does
    from toolkit.engine import warehouse

    p = load_project(project)
    con = warehouse.connect(p)
    warehouse.publish(con, p)
    con.close()
    with warehouse_held(p.warehouse):
        result = invoke("incidents", "--status", "open", "-p", str(project))
        assert result.exit_code == 0, result.output
        assert "inc-open" in result.output and "inc-closed" not in result.output
        assert [i["incident_id"] for i in list_incidents(p)] == ["inc-open", "inc-closed"]


def test_incident_table_shows_control_characters_as_escapes() -> None:
    from datetime import datetime

    incident = {"incident_id": "i\x1b[2J", "status": "open", "severity": "low", "opened_at": datetime(2026, 11, 2),
                "closed_at": None, "cause_check": "c", "cause_key_text": "site=a\nfake", "cause_split_value": None,
                "alerts": 2, "affected_sessions": 5, "affected_viewers": None,
                "causes": [{"significant": True, "bad": 3.0, "excess_share": None, "key_text": "cdn=x\r"}]}
    lines = incidents_table([incident]).splitlines()
    assert len(lines) == 4 and not any("\x1b" in line or "\r" in line for line in lines)
    assert lines[3] == "  └ site=a\\x0afake: 3 failing sessions in cdn=x\\x0d"


def test_a_warehouse_of_layout_4_is_read_without_incidents(project: Path, tmp_path: Path) -> None:
    import duckdb

    con = duckdb.connect(str(load_project(project).warehouse))
    for table in ("alert_causes", "incidents", "incident_events"):
        con.execute(f"DROP TABLE {table}")
    con.execute("ALTER TABLE alerts DROP COLUMN incident_id")
    con.execute("UPDATE schema_version SET version = 4")
    con.close()
    listed = invoke("alerts", "-p", str(project))
    assert listed.exit_code == 0 and len(listed.output.splitlines()) == 4
    assert [a["causes"] for a in json.loads(invoke("alerts", "--json", "-p", str(project)).output)] == [[], []]
    assert invoke("incidents", "-p", str(project)).output == "no incidents\n"
    report = invoke("report", "--out", str(tmp_path / "r.html"), "-p", str(project))
    assert report.exit_code == 0 and ", 0 incidents, " in report.output
