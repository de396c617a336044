"""The paper cuts a first-time user hit: each one as the user met it, through the command line.

Times written as in `backtest` (`YYYY-MM-DD HH:MM`) in `alerts`, `report` and labels files; a bare
`0` as a duration; `--check` naming no check; `-p` naming a folder, and a missing project file
naming the folder searched; plurals; windows that can never judge anything warned at validate time;
`notify` on a project without a warehouse.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from conftest import PLAIN_PROJECT, write_project
from known_lake import CHECK, known_project
from toolkit.backtest.labels import read_labels
from toolkit.cli import main
from toolkit.config.fields import parse_duration
from toolkit.config.project import load_project
from toolkit.problems import DataError


def invoke(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


@pytest.fixture
def ran(tmp_path: Path) -> Path:
    project = known_project(tmp_path)
    assert invoke("run", "-p", str(project)).exit_code == 0
    return project


def test_alerts_and_report_take_a_time_without_seconds(ran: Path, tmp_path: Path) -> None:
    every = invoke("alerts", "-p", str(ran), "--json")
    later = invoke("alerts", "-p", str(ran), "--since", "2026-11-02 00:55", "--json")
    assert later.exit_code == 0, later.output
    assert 0 < later.output.count('"alert_id"') < every.output.count('"alert_id"')
    page = invoke("report", "-p", str(ran), "--out", str(tmp_path / "r.html"), "--since", "2026-11-02 00:55")
    assert page.exit_code == 0, page.output
    assert ": 1 alert (1 open), 1 incident, " in page.output


def test_a_labels_file_takes_the_times_backtest_takes(tmp_path: Path) -> None:
    labels = tmp_path / "labels.csv"
    labels.write_text("kind,check,key,start,end,note\n"
                      "incident,title_errors,site=kids,2026-11-02 00:40,2026-11-02 01:00,minutes\n"
                      "incident,title_errors,site=kids,2026-11-03,2026-11-04,days\n", encoding="utf-8")
    found = read_labels(labels)
    assert [(lb.start.isoformat(sep=" "), lb.end.isoformat(sep=" ")) for lb in found] == [
        ("2026-11-02 00:40:00", "2026-11-02 01:00:00"), ("2026-11-03 00:00:00", "2026-11-04 00:00:00")]
    labels.write_text("kind,check,key,start,end,note\nincident,c,site=kids,2026-11-02T00,2026-11-03,x\n",
                      encoding="utf-8")
    with pytest.raises(DataError, match=r"labels.csv:2: start '2026-11-02T00' is not YYYY-MM-DD, YYYY-MM-DD HH:MM"):
        read_labels(labels)


def test_a_bare_zero_is_a_duration(make_project) -> None:
    assert parse_duration(0).total_seconds() == 0 and parse_duration("0").total_seconds() == 0
    with pytest.raises(ValueError):
        parse_duration(False)
    text = CHECK.replace("window: {sessions: 10, max_wait: 1d}", "window: {every: 1h, lateness: 0}")
    project = load_project(make_project({"c.yml": text}))
    assert project.checks["title_errors"].window.lateness.total_seconds() == 0


def test_alerts_for_a_check_no_one_has_exit_2_naming_the_checks(ran: Path, tmp_path: Path) -> None:
    result = invoke("alerts", "-p", str(ran), "--check", "title_eror")
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [
        "plimsoll.yml: --check: no check named 'title_eror' (did you mean 'title_errors'?); the checks are: "
        "title_errors"] or result.output.strip().endswith(
        "--check: no check named 'title_eror' (did you mean 'title_errors'?); the checks are: title_errors")
    page = invoke("report", "-p", str(ran), "--out", str(tmp_path / "r.html"), "--check", "nope")
    assert page.exit_code == 2 and "no check named 'nope'" in page.output
    assert not (tmp_path / "r.html").exists()
    # a check that is known has no alerts: that is no mistake
    quiet = invoke("alerts", "-p", str(ran), "--check", "title_errors", "--status", "open", "--since", "2030-01-01")
    assert quiet.exit_code == 0 and quiet.output == "no alerts\n"


def test_a_check_removed_from_the_project_is_still_known_by_its_alerts(ran: Path) -> None:
    (ran.parent / "checks" / "title_errors.yml").unlink()
    result = invoke("alerts", "-p", str(ran), "--check", "title_errors")
    assert result.exit_code == 0, result.output
    assert "title_errors" in result.output


def test_p_takes_the_folder_holding_the_project_file(ran: Path) -> None:
    result = invoke("alerts", "-p", str(ran.parent))
    assert result.exit_code == 0, result.output
    assert "title_errors" in result.output
    checked = invoke("validate", "-p", str(ran.parent))
    assert checked.exit_code == 0 and checked.output.endswith(": 1 check, 1 source: ok\n")


def test_a_missing_project_file_names_the_folder_searched(tmp_path: Path) -> None:
    empty = tmp_path / "empty"
    empty.mkdir()
    result = invoke("validate", "-p", str(empty))
    assert result.exit_code == 2
    assert result.output.strip() == f"{empty}: no plimsoll.yml in this folder ({empty})"
    missing = invoke("run", "-p", str(tmp_path / "nowhere" / "plimsoll.yml"))
    assert missing.exit_code == 2
    assert f"project file not found: the folder {tmp_path / 'nowhere'} does not exist" in missing.output
    named = invoke("alerts", "-p", str(empty / "fernhill.yml"))
    assert f"project file not found: no fernhill.yml in {empty}" in named.output
    assert not list(empty.iterdir())


def test_notify_without_a_warehouse_says_so_and_creates_nothing(tmp_path: Path) -> None:
    project = known_project(tmp_path, "webhooks:\n  - url: http://127.0.0.1:9/hook\n")
    before = sorted(p.name for p in tmp_path.iterdir())
    result = invoke("notify", "-p", str(project))
    assert result.exit_code == 1
    assert result.output.strip() == (f"{tmp_path / 'w.duckdb'}: no warehouse yet, so no events to send; "
                                     "run `plimsoll run` first")
    assert sorted(p.name for p in tmp_path.iterdir()) == before   # no warehouse, no lock file


def test_windows_that_judge_nothing_for_long_are_warned_at_validate_time(tmp_path: Path) -> None:
    monthly = CHECK.replace("window: {sessions: 10, max_wait: 1d}", "window: {every: 30d}").replace(
        "history: 10, min_history: 3", "history: 30, min_history: 24")
    project = known_project(tmp_path, checks={"title_errors.yml": monthly})
    result = invoke("validate", "-p", str(project))
    assert result.exit_code == 0, result.output
    warning, ok = result.output.splitlines()
    assert warning.endswith("checks/title_errors.yml:1: warning: window: a series' first verdict comes 750 days of "
                            "data after its first session at the earliest (25 windows of 30 days: 24 earlier windows "
                            "(baseline.min_history), then the window judged); its alerts wait as long")
    assert ok.endswith(": 1 check, 1 source: ok")


def test_a_count_window_the_traffic_never_fills_is_warned_with_its_time(tmp_path: Path) -> None:
    huge = CHECK.replace("window: {sessions: 10, max_wait: 1d}", "window: {sessions: 10000000, max_wait: 1d}")
    project = known_project(tmp_path, checks={"title_errors.yml": huge})
    result = invoke("validate", "-p", str(project))
    assert result.exit_code == 0, result.output
    # the known lake: 140 sessions over 79 minutes of event time
    assert "warning: window.sessions: 10,000,000 sessions are never reached: at the lake's 2,552 sessions a day" \
        in result.output
    assert "every window closes at max_wait (1 day) with what it has; a series' first verdict comes 4 days of data " \
           "after its first session at the earliest (4 windows: 3 earlier windows (baseline.min_history), then the " \
           "window judged)" in result.output
    never = huge.replace("guard: {min_sessions: 5, min_bad: 2}", "guard: {min_sessions: 9000, min_bad: 2}")
    (tmp_path / "checks" / "title_errors.yml").write_text(never, encoding="utf-8")
    result = invoke("validate", "-p", str(project))
    assert "with fewer than guard.min_sessions (9,000) sessions: no window can ever get a verdict" in result.output
    small = CHECK.replace("guard: {min_sessions: 5, min_bad: 2}", "guard: {min_sessions: 50, min_bad: 2}")
    (tmp_path / "checks" / "title_errors.yml").write_text(small, encoding="utf-8")
    result = invoke("validate", "-p", str(project))
    assert ("warning: guard.min_sessions: 50 sessions is more than a window holds (window.sessions 10): no window "
            "can ever get a verdict") in result.output


def test_the_catalogues_windows_judge_within_a_day_or_two_on_a_plain_lake(tmp_path: Path) -> None:
    result = invoke("validate", "-p", str(known_project(tmp_path)))
    assert result.exit_code == 0 and "warning" not in result.output


def test_a_misspelt_column_in_by_peers_by_and_explain_by_gets_a_suggestion(make_project, ran: Path) -> None:
    from toolkit.problems import ProjectInvalid

    explained = invoke("explain", "title_errors", "--at", "2026-11-02 00:45", "--key", "site=kids,title_id=t-1",
                       "--by", "titel_id", "-p", str(ran))
    assert explained.exit_code != 0
    assert "--by: unknown column 'titel_id' (did you mean 'title_id'?) in source 'sessions'" in explained.output
    text = CHECK.replace("by: [site, title_id]", "by: [site, titel_id]")
    with pytest.raises(ProjectInvalid, match=r"by: unknown column 'titel_id' \(did you mean 'title_id'\?\)"):
        load_project(make_project({"c.yml": text}))
    # a list written without its brackets is one name holding a comma: say so, not 'did you mean'
    text = CHECK.replace("by: [site, title_id]", "by: site, title_id")
    with pytest.raises(ProjectInvalid, match=r"c.yml:4: by: 'site, title_id' reads as one column name; write a "
                                             r"list: \[site, title_id\]"):
        load_project(make_project({"c.yml": text}))
    peers = CHECK.replace("window: {sessions: 10, max_wait: 1d}", "window: {every: 1h}").replace(
        "baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1}",
        "baseline: {method: peers, peers_by: [sites]}")
    with pytest.raises(ProjectInvalid, match=r"baseline.peers_by: 'sites' \(did you mean 'site'\?\) not in 'by'"):
        load_project(make_project({"c.yml": peers}))


def test_notify_without_a_warehouse_or_anywhere_to_send_says_there_is_nothing_to_send(tmp_path: Path) -> None:
    project = known_project(tmp_path)
    result = invoke("notify", "-p", str(project))
    assert (result.exit_code, result.output) == (0, "notify: no webhooks or email in the project file; nothing to send\n")
    assert not (tmp_path / "w.duckdb").exists() and not list(tmp_path.glob("*.lock"))
