"""`plimsoll alerts` over a warehouse built from a small known lake: the exact table and JSON."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

from known_lake import HOSTILE, known_project
from oracle import key_value
from toolkit.cli import main
from toolkit.outputs.listings import alerts_table


def invoke(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


@pytest.fixture
def project(tmp_path: Path) -> Path:
    project = known_project(tmp_path)
    result = invoke("run", "-p", str(project))
    assert result.exit_code == 0, result.output
    return project


TABLE = """\
status              severity  check         key                                              split  worst  threshold  opened            windows  affected  viewers  excess  per hour  incident
------------------  --------  ------------  -----------------------------------------------  -----  -----  ---------  ----------------  -------  --------  -------  ------  --------  ----------------
open                high      title_errors  site=kids, title_id="<script>alert(1)</script>"         80 %   10 %       2026-11-02 00:59  1        8         -        8       53        f7c009627d636618
closed (recovered)  high      title_errors  site=kids, title_id=t-1                                 70 %   10 %       2026-11-02 00:49  2        13        -        13      41        a1cdb43977ad8f1e
"""


def test_alerts_table_is_exact(project: Path) -> None:
    # each alert is its own incident (one check, two titles: neither explains the other); the lake
    # has no attributes, so no alert has causes and no line below it (tests/test_incidents_output.py)
    result = invoke("alerts", "-p", str(project))
    assert result.exit_code == 0, result.output
    assert result.output == TABLE


def test_alerts_table_filters(project: Path) -> None:
    def keys(*args: str) -> list[str]:
        lines = invoke("alerts", *args, "-p", str(project)).output.splitlines()
        return [line.split("title_errors")[1].split("  ")[1] for line in lines[2:]]

    assert keys("--status", "open") == [f"site=kids, title_id={key_value(HOSTILE)}"]
    assert keys("--status", "closed") == ["site=kids, title_id=t-1"]
    assert keys("--since", "2026-11-02 00:50:00") == [f"site=kids, title_id={key_value(HOSTILE)}"]
    assert keys("--check", "title_errors", "--status", "all") == [f"site=kids, title_id={key_value(HOSTILE)}",
                                                                  "site=kids, title_id=t-1"]
    other = CliRunner().invoke(main, ["alerts", "--check", "no_such_check", "-p", str(project)])
    assert other.exit_code == 2 and other.output.endswith(
        "--check: no check named 'no_such_check'; the checks are: title_errors\n")


def incident_of(alert_id: str) -> str:
    """The id of the incident whose earliest alert is ``alert_id`` (queries/incidents.sql)."""
    return hashlib.md5(f"incident {alert_id}".encode()).hexdigest()[:16]


def test_alerts_json_is_exact(project: Path) -> None:
    result = invoke("alerts", "--json", "-p", str(project))
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    con = duckdb.connect(str(project.parent / "w.duckdb"), read_only=True)
    ids = dict(con.execute("SELECT key_text, alert_id FROM alerts").fetchall())
    prints = dict(con.execute("SELECT key_text, fingerprint FROM alerts").fetchall())
    con.close()
    hostile_key = f"site=kids, title_id={key_value(HOSTILE)}"
    assert data == [
        {
            "alert_id": ids[hostile_key], "status": "open", "severity": "high", "check_name": "title_errors",
            "key": {"site": "kids", "title_id": HOSTILE}, "key_text": hostile_key, "split_value": None,
            "opened_at": "2026-11-02 00:59:01", "breach_started_at": "2026-11-02 00:50:01",
            "last_breach_at": "2026-11-02 00:59:01", "closed_at": None, "close_reason": None,
            "breach_windows": 1, "affected_sessions": 8, "affected_per_hour": pytest.approx(8 / (9 / 60)),
            # no viewer_id in the source; every bad session is beyond a baseline rate of 0
            "affected_viewers": None, "excess_sessions": 8.0,
            "peak_value": 0.8, "threshold": 0.1, "fingerprint": prints[hostile_key],
            "incident_id": incident_of(ids[hostile_key]),
            # a check's alert: no source alarm's fields
            "alarm": None, "source_name": None, "last_file_at": None, "newest_data_at": None,
            "causes": [],  # no attributes: nothing to explain by
        },
        {
            "alert_id": ids["site=kids, title_id=t-1"], "status": "closed", "severity": "high",
            "check_name": "title_errors", "key": {"site": "kids", "title_id": "t-1"},
            "key_text": "site=kids, title_id=t-1", "split_value": None,
            "opened_at": "2026-11-02 00:49:00", "breach_started_at": "2026-11-02 00:40:00",
            "last_breach_at": "2026-11-02 00:59:00", "closed_at": "2026-11-02 01:09:00",
            "close_reason": "recovered", "breach_windows": 2, "affected_sessions": 13,
            "affected_viewers": None, "excess_sessions": 13.0,
            "affected_per_hour": pytest.approx(13 / (19 / 60)), "peak_value": 0.7, "threshold": 0.1,
            "fingerprint": prints["site=kids, title_id=t-1"],
            "incident_id": incident_of(ids["site=kids, title_id=t-1"]),
            "alarm": None, "source_name": None, "last_file_at": None, "newest_data_at": None, "causes": [],
        },
    ]
    assert len(set(ids.values())) == 2 and all(len(f) == 16 for f in prints.values())
    opened = json.loads(invoke("alerts", "--json", "--status", "open", "-p", str(project)).output)
    assert [a["key_text"] for a in opened] == [hostile_key]
    assert json.loads(invoke("alerts", "--json", "--since", "2026-11-03", "-p", str(project)).output) == []


def test_alerts_table_shows_control_characters_as_escapes() -> None:
    from datetime import datetime

    alert = {"status": "open", "close_reason": None, "severity": "low", "check_name": "c",
             "key_text": "site=a\x1b[2J\nfake line", "split_value": "E\r1", "opened_at": datetime(2026, 11, 2),
             "breach_windows": 1, "affected_sessions": 1234, "affected_per_hour": 10.0}
    lines = alerts_table([alert]).splitlines()
    assert len(lines) == 3 and "\x1b" not in lines[2]
    assert "site=a\\x1b[2J\\x0afake line" in lines[2] and "E\\x0d1" in lines[2] and "1,234" in lines[2]
