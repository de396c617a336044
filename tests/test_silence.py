"""Source alarms: a source that stops receiving files (`max_silence`), or whose newest data falls
behind the clock (`max_lag`), is an alert like any other, judged in wall-clock time.

Real Parquet files whose modification times are set by hand, a real DuckDB warehouse, and a
pretend wall clock passed to each run (`run(..., clock=...)`), so nothing sleeps. The lake's data
time follows the same timeline: the sessions of a file end shortly before it lands.
"""

from __future__ import annotations

import json
import re
import os
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

from conftest import write_project, write_rows, warehouse_query
from test_notify import Hook, hook  # noqa: F401 (hook is a fixture)
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine import runner, warehouse
from toolkit.engine.alarms import SourceAlarm
from toolkit.engine.runner import run
from toolkit.outputs.delivery import Clock, notify

T0 = datetime(2026, 11, 2, 3, 0)  # the wall clock's origin: the first file lands at T0 - 5 min
SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, source VARCHAR, site VARCHAR, error_code VARCHAR"
# One series per value of the lake's own `source` column, whose key reads like a source alarm's
# (source=sessions): the alarm must stay apart from it all the same.
CHECK = """\
check: errors
source: sessions
by: [source]
measure: {kind: rate, bad: error_code IS NOT NULL}
window: {sessions: 10, max_wait: 1d}
baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1}
guard: {min_sessions: 5, min_bad: 2}
lifecycle: {recover_after: 1, expire_after: 7d}
severity: low
"""
SOURCE = ("warehouse: w.duckdb\nsources:\n  sessions:\n    path: {lake}\n    session_id: session_id\n"
          "    event_time: ended_at\n")
WATCHED = "    max_silence: 30m\n    max_lag: 1h\n"


def minutes(n: float) -> datetime:
    return T0 + timedelta(minutes=n)


def land(lake: Path, name: str, first: datetime, count: int, at: datetime, bad_from: int | None = None) -> Path:
    """A file of ``count`` sessions a minute apart from ``first``, written (modified) at ``at``; from
    the ``bad_from``-th session on they fail."""
    rows = [(f"{name}-{i}", first + timedelta(minutes=i), "sessions", "news",
             "E42" if bad_from is not None and i >= bad_from else None) for i in range(count)]
    write_rows(lake, SCHEMA, rows, name=f"{name}.parquet")
    path = lake / f"{name}.parquet"
    stamp = (at - datetime(1970, 1, 1)).total_seconds()
    os.utime(path, (stamp, stamp))
    return path


def lake_project(folder: Path, keys: str = WATCHED, extra: str = "") -> Path:
    """The first file: an hour of sessions to T0 - 1 min, the last 10 minutes failing (the check's
    alert, key source=sessions), landed at T0 - 5 min."""
    lake = folder / "lake"
    land(lake, "a", minutes(-60), 60, minutes(-5), bad_from=52)
    return write_project(folder, {"errors.yml": CHECK}, SOURCE.format(lake=lake) + keys + extra)


def at(when: datetime):
    return lambda: when


def query(project, sql: str) -> list[tuple]:
    return warehouse_query(project, sql)


def alarms(project) -> list[tuple]:
    return query(project, "SELECT alarm, status, close_reason, opened_at, breach_started_at, last_breach_at, "
                          "closed_at, peak_value, threshold, last_file_at, last_run_id FROM alerts "
                          "WHERE alarm IS NOT NULL ORDER BY opened_at")


def alarm_events(project, alarm: str) -> list[tuple]:
    return query(project, "SELECT e.event, e.occurred_at, e.value, e.threshold, e.run_id FROM alert_events AS e "
                          f"JOIN alerts AS a USING (alert_id) WHERE a.alarm = '{alarm}' ORDER BY e.run_id, e.event")


def test_a_source_without_new_files_opens_one_silent_alert_that_closes_when_files_arrive(tmp_path: Path) -> None:
    project = load_project(lake_project(tmp_path, "    max_silence: 30m\n"))
    first = run(project, clock=at(minutes(10)))  # 15 min since the file landed
    assert first.alarms == [] and alarms(project) == []
    assert run(project, clock=at(minutes(24))).alarms == []  # 29 min: within max_silence

    opened = run(project, clock=at(minutes(40)))  # 45 min
    assert [a.line for a in opened.alarms] == [
        "source sessions: no new files for 45 min (max_silence 30m): alert opened"]
    assert opened.alarms == [SourceAlarm("sessions", "silent", "opened", 45 * 60.0, timedelta(minutes=30),
                                         minutes(-5), minutes(-1))]
    # opened when the silence passed max_silence; the silence began with the last file
    assert alarms(project) == [("silent", "open", None, minutes(25), minutes(-5), minutes(40), None, 2700.0,
                                1800.0, minutes(-5), opened.run_id)]

    # later runs find it still silent: the same alert, updated, no second alert and no event
    for later in (70, 95):
        still = run(project, clock=at(minutes(later)))
        assert [a.line for a in still.alarms] == [
            f"source sessions: no new files for {'1 h 15 min' if later == 70 else '1 h 40 min'} (max_silence 30m): "
            "alert still open"]
    assert alarms(project) == [("silent", "open", None, minutes(25), minutes(-5), minutes(95), None, 100 * 60.0,
                                1800.0, minutes(-5), still.run_id)]
    assert [e[0] for e in alarm_events(project, "silent")] == ["opened"]

    # a file lands at T0 + 100 min: the silence ended then, after 1 h 45 min
    land(tmp_path / "lake", "b", minutes(90), 9, minutes(100))
    flowing = run(project, clock=at(minutes(104)))
    assert [a.line for a in flowing.alarms] == [
        "source sessions: new files again after 1 h 45 min without one (max_silence 30m): alert closed"]
    assert alarms(project) == [("silent", "closed", "data flowing again", minutes(25), minutes(-5), minutes(95),
                                minutes(100), 105 * 60.0, 1800.0, minutes(100), flowing.run_id)]
    assert alarm_events(project, "silent") == [("opened", minutes(25), 2700.0, 1800.0, opened.run_id),
                                               ("closed", minutes(100), 105 * 60.0, 1800.0, flowing.run_id)]
    assert run(project, clock=at(minutes(110))).alarms == []

    # silent again: a new alert of the same source and alarm (another id, the same fingerprint)
    again = run(project, clock=at(minutes(140)))
    assert [a.action for a in again.alarms] == ["opened"]
    rows = query(project, "SELECT alert_id, fingerprint, status FROM alerts WHERE alarm = 'silent' ORDER BY opened_at")
    assert [r[2] for r in rows] == ["closed", "open"] and rows[0][0] != rows[1][0] and rows[0][1] == rows[1][1]


def test_a_file_arrives_when_written_or_when_first_found_if_that_is_earlier(tmp_path: Path,
                                                                            monkeypatch: pytest.MonkeyPatch) -> None:
    # a writer whose clock runs five hours ahead: its file counts as arrived when a run found it
    lake = tmp_path / "lake"
    land(lake, "a", minutes(-60), 60, minutes(300))
    project = load_project(write_project(tmp_path, {"errors.yml": CHECK},
                                         SOURCE.format(lake=lake) + "    max_silence: 30m\n"))
    assert run(project, clock=at(minutes(0))).alarms == []
    assert [a.line for a in run(project, clock=at(minutes(31))).alarms] == [
        "source sessions: no new files for 31 min (max_silence 30m): alert opened"]
    # a file listed but left unread for a next run (max_read_per_run) has arrived all the same
    land(lake, "b", minutes(0), 30, minutes(40))
    land(lake, "c", minutes(30), 10, minutes(41))
    backlog = load_project(write_project(tmp_path, {"errors.yml": CHECK},
                                         SOURCE.format(lake=lake) + "    max_silence: 30m\nmax_read_per_run: 1B\n"))
    runs = []
    original = runner._run

    def each_run(*args, **kw):
        runs.append(original(*args, **kw))
        return runs[-1]

    monkeypatch.setattr(runner, "_run", each_run)
    run(backlog, clock=at(minutes(45)))
    # the first run read b (the earlier data) and left c: c's arrival counts already
    assert len(runs) == 2 and runs[0].more
    assert runs[0].alarms == [SourceAlarm("sessions", "silent", "closed", 4 * 60.0, timedelta(minutes=30),
                                          minutes(41), minutes(29), "data flowing again", 40 * 60.0)]
    assert [a.line for a in runs[0].alarms] == [
        "source sessions: new files again after 40 min without one (max_silence 30m): alert closed"]


def test_a_source_whose_newest_data_lags_the_clock_opens_a_lagging_alert_until_it_catches_up(tmp_path: Path) -> None:
    project = load_project(lake_project(tmp_path, "    max_lag: 1h\n"))
    assert run(project, clock=at(minutes(40))).alarms == []  # the newest session ended at T0 - 1 min: 41 min
    lagging = run(project, clock=at(minutes(70)))
    assert [a.line for a in lagging.alarms] == [
        "source sessions: newest data (2026-11-02 02:59:00) 1 h 11 min behind the clock (max_lag 1h): alert opened"]
    assert alarms(project) == [("lagging", "open", None, minutes(59), minutes(-1), minutes(70), None, 71 * 60.0,
                                3600.0, minutes(-5), lagging.run_id)]
    assert [a.action for a in run(project, clock=at(minutes(80))).alarms] == ["continued"]

    land(tmp_path / "lake", "b", minutes(60), 25, minutes(86))  # sessions to T0 + 84 min
    caught_up = run(project, clock=at(minutes(90)))
    assert [a.line for a in caught_up.alarms] == [
        "source sessions: newest data (2026-11-02 04:24:00) 6 min behind the clock, within max_lag 1h: caught up, "
        "alert closed"]
    assert alarms(project) == [("lagging", "closed", "caught up", minutes(59), minutes(-1), minutes(80), minutes(90),
                                81 * 60.0, 3600.0, minutes(86), caught_up.run_id)]
    assert alarm_events(project, "lagging") == [("opened", minutes(59), 71 * 60.0, 3600.0, lagging.run_id),
                                                ("closed", minutes(90), 6 * 60.0, 3600.0, caught_up.run_id)]
    assert query(project, "SELECT newest_data_at FROM alerts WHERE alarm = 'lagging'") == [(minutes(84),)]


def test_a_backlog_holding_the_reading_back_is_not_a_lag(tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    land(lake, "a", minutes(-600), 60, minutes(-530))
    land(lake, "b", minutes(-60), 60, minutes(-1))
    project = load_project(write_project(tmp_path, {"errors.yml": CHECK}, SOURCE.format(lake=lake)
                                         + "    max_lag: 1h\nmax_read_per_run: 1B\n"))
    result = run(project, clock=at(minutes(5)))  # two runs: the first stops ten hours behind
    assert result.first_run_id == 1 and result.run_id == 2
    assert result.alarms == [] and alarms(project) == []


def test_windows_and_the_checks_alerts_are_the_same_with_and_without_the_alarms(tmp_path: Path) -> None:
    states = {}
    for name, keys in (("watched", WATCHED), ("plain", "")):
        project = load_project(lake_project(tmp_path / name, keys))
        for when in (40, 70):
            run(project, clock=at(minutes(when)))
        land(tmp_path / name / "lake", "b", minutes(60), 25, minutes(86), bad_from=20)
        run(project, clock=at(minutes(90)))
        states[name] = {table: query(project, f"SELECT * {wall_clock} FROM {table} ORDER BY ALL")
                        for table, wall_clock in (("windows", ""), ("key_windows", ""), ("key_state", ""),
                                                  ("carry", ""), ("check_state", ""),
                                                  ("run_checks", "EXCLUDE (seconds)"))}
        states[name]["alerts"] = query(project, "SELECT * FROM alerts WHERE alarm IS NULL ORDER BY ALL")
        states[name]["events"] = query(project, "SELECT e.* FROM alert_events AS e "
                                                "JOIN alerts USING (alert_id) WHERE alarm IS NULL ORDER BY ALL")
        states[name]["alarms"] = alarms(project)
    watched, plain = states["watched"], states["plain"]
    assert [a[:3] for a in watched.pop("alarms")] == [("silent", "closed", "data flowing again"),
                                                       ("lagging", "closed", "caught up")]
    assert plain.pop("alarms") == []
    assert watched == plain
    assert len(watched["windows"]) == 8 and watched["alerts"] and watched["carry"]


def test_a_source_alarm_is_an_incident_of_its_own_and_shown_like_any_alert(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path)
    project = load_project(project_file)
    run(project, clock=at(minutes(70)))  # silent for 75 min, 71 min behind, and the check's alert open
    alerts = query(project, "SELECT coalesce(alarm, check_name), key_text, incident_id FROM alerts ORDER BY 1")
    assert [a[:2] for a in alerts] == [("errors", "source=sessions"), ("lagging", "source=sessions"),
                                       ("silent", "source=sessions")]
    # the check's series has the alarms' key, and their spans overlap, but it is no source alarm:
    # its own incident; the silence and the lag are one, the silence its cause
    assert alerts[0][2] != alerts[1][2] == alerts[2][2]
    assert query(project, "SELECT cause_check, cause_alarm, alerts FROM incidents ORDER BY opened_at") == [
        ("errors", None, 1), (None, "silent", 2)]

    listing = CliRunner().invoke(main, ["alerts", "--status", "open", "-p", str(project_file)])
    assert listing.exit_code == 0, listing.output
    rows = listing.output.splitlines()
    assert rows[2].split()[:4] == ["open", "high", "(lagging)", "source=sessions"]
    # worst and threshold: how far behind at most, and max_lag, as durations
    assert re.search(r"\(lagging\)\s+source=sessions\s+1 h 11 min\s+1 h 00 min\s+2026-11-02 ", rows[2]), rows[2]
    assert rows[3] == ("  └ source=sessions: newest data 2026-11-02 02:59:00 (data time), more than max_lag behind "
                       "the clock since 2026-11-02 03:59:00 UTC, at most 1 h 11 min (max_lag 1h)")
    assert rows[4].split()[:4] == ["open", "high", "(silent)", "source=sessions"]
    assert rows[5] == ("  └ source=sessions: no new file since 2026-11-02 02:55:00 UTC, 1 h 15 min at the last run "
                       "(max_silence 30m)")
    assert rows[6].split()[:3] == ["open", "low", "errors"]
    data = json.loads(CliRunner().invoke(main, ["alerts", "--json", "-p", str(project_file)]).output)
    silent = next(a for a in data if a["alarm"] == "silent")
    assert {k: silent[k] for k in ("check_name", "key", "source_name", "opened_at", "last_file_at",
                                   "newest_data_at", "peak_value", "threshold", "breach_windows",
                                   "affected_sessions")} == {
        "check_name": None, "key": {"source": "sessions"}, "source_name": "sessions",
        "opened_at": "2026-11-02 03:25:00", "last_file_at": "2026-11-02 02:55:00",
        "newest_data_at": "2026-11-02 02:59:00", "peak_value": 4500.0, "threshold": 1800.0,
        "breach_windows": None, "affected_sessions": None}
    incidents = CliRunner().invoke(main, ["incidents", "-p", str(project_file)]).output
    assert "(silent) source=sessions" in incidents and "errors source=sessions" in incidents

    report = CliRunner().invoke(main, ["report", "--out", str(tmp_path / "r.html"), "-p", str(project_file)])
    assert report.exit_code == 0, report.output
    page = (tmp_path / "r.html").read_text()
    assert "(silent): source=sessions" in page and "(lagging): source=sessions" in page
    assert "What the source alarm found" in page and "A source alarm has no windows" in page

    silent_id = next(a["alert_id"] for a in data if a["alarm"] == "silent")
    explained = CliRunner().invoke(main, ["explain", silent_id, "-p", str(project_file)])
    assert explained.exit_code == 1 and explained.output == (
        f"alert {silent_id} is a source alarm (source=sessions), not a check's: it has no windows or sessions to "
        "explain; `plimsoll alerts` says what it found\n")


def test_the_run_summary_says_so(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    project_file = lake_project(tmp_path, "    max_silence: 30m\n")
    monkeypatch.setattr(runner, "_now", at(minutes(52)))  # the command's wall clock
    result = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert result.exit_code == 0, result.output
    assert result.stdout.splitlines()[-2:] == [
        "run 1: 1 new file, 6 windows, 1 alert opened, 0 closed",
        "source sessions: no new files for 57 min (max_silence 30m): alert opened"]
    assert query(load_project(project_file), "SELECT started_at, finished_at FROM runs") == [(minutes(52), minutes(52))]


def test_an_alarm_no_longer_watched_closes(tmp_path: Path) -> None:
    # a second source over the same lake, with a check of its own, stays when the first goes
    spare = ("  spare:\n    path: {lake}\n    session_id: session_id\n    event_time: ended_at\n"
             .format(lake=tmp_path / "lake"))
    project_file = lake_project(tmp_path, WATCHED + spare)
    (tmp_path / "checks" / "spare.yml").write_text(CHECK.replace("check: errors", "check: spare_errors")
                                                   .replace("source: sessions", "source: spare"))
    text = project_file.read_text()
    run(load_project(project_file), clock=at(minutes(70)))
    project_file.write_text(text.replace("    max_lag: 1h\n", ""))
    quiet = run(load_project(project_file), clock=at(minutes(75)))
    assert [a.line for a in quiet.alarms] == [
        "source sessions: lagging alert closed: max_lag is no longer set for it",
        "source sessions: no new files for 1 h 20 min (max_silence 30m): alert still open"]
    # the source goes, with its check
    project_file.write_text(text.replace(SOURCE.format(lake=tmp_path / "lake").split("sources:\n")[1] + WATCHED, ""))
    (tmp_path / "checks" / "errors.yml").unlink()
    gone = run(load_project(project_file), clock=at(minutes(80)))
    assert [a.line for a in gone.alarms] == [
        "source sessions: silent alert closed: the source is no longer in the project"]
    project = load_project(project_file)
    assert [a[:3] for a in alarms(project)] == [("silent", "closed", "source removed"),
                                                ("lagging", "closed", "limit removed")]
    assert query(project, "SELECT e.event, e.occurred_at FROM alert_events AS e JOIN alerts AS a USING (alert_id) "
                          "WHERE a.alarm IS NOT NULL AND e.event = 'closed' ORDER BY 2") == [
        ("closed", minutes(75)), ("closed", minutes(80))]


def test_notify_delivers_a_source_alarm_once(tmp_path: Path, hook: Hook) -> None:
    project = load_project(lake_project(tmp_path, "    max_silence: 30m\n",
                                        f"webhooks:\n  - name: on-call\n    url: {hook.url}\n    timeout: 1s\n"))

    class Pretend(Clock):
        def __init__(self, when: datetime) -> None:
            self.when = when

        def now(self) -> datetime:
            return self.when

    run(project, clock=at(minutes(40)))
    notify(project, clock=Pretend(minutes(41)))
    sent = [json.loads(r.body) for r in hook.accepted]
    (opened,) = [b for b in sent if b.get("alarm")]
    assert [b["check"] for b in sent if "alarm" not in b] == ["errors"]  # the check's alert, as before
    (alert_id, fingerprint), = query(project, "SELECT alert_id, fingerprint FROM alerts WHERE alarm = 'silent'")
    assert opened == {
        "idempotency_key": opened["idempotency_key"], "event": "opened", "occurred_at": "2026-11-02T03:25:00Z",
        "check": None, "alarm": "silent", "source": "sessions", "severity": "high", "alert_id": alert_id,
        "fingerprint": fingerprint, "key": {"source": "sessions"}, "key_text": "source=sessions",
        "opened_at": "2026-11-02T03:25:00Z", "closed_at": None, "close_reason": None,
        "duration_seconds": 2700, "limit_seconds": 1800, "last_file_at": "2026-11-02T02:55:00Z",
        "newest_data_at": "2026-11-02T02:59:00Z", "incident_id": opened["incident_id"], "run_id": 1,
        "sender": opened["sender"],
        "summary": "high opened: source sessions silent: no new file for 45 min (max_silence 30 min)"}
    assert isinstance(opened["duration_seconds"], int)  # whole seconds
    assert b"a-1" not in hook.accepted[-1].body  # no session id

    # still silent: the runs update the alert, and nothing more is sent
    run(project, clock=at(minutes(70)))
    again = notify(project, clock=Pretend(minutes(71)))
    assert again.queued == 0 and len(hook.accepted) == len(sent)

    land(tmp_path / "lake", "b", minutes(90), 9, minutes(100))
    run(project, clock=at(minutes(104)))
    notify(project, clock=Pretend(minutes(105)))
    notify(project, clock=Pretend(minutes(106)))
    later = [json.loads(r.body) for r in hook.accepted[len(sent):]]
    closed = [b for b in later if b.get("alarm")]
    assert [(b["event"], b["occurred_at"], b["close_reason"], b["duration_seconds"], b["last_file_at"])
            for b in closed] == [("closed", "2026-11-02T04:40:00Z", "data flowing again", 6300,
                                  "2026-11-02T04:40:00Z")]
    keys = [r.key for r in hook.accepted]
    assert len(keys) == len(set(keys))


def test_a_webhooks_first_pass_measures_an_alarms_age_by_the_clock(tmp_path: Path, hook: Hook) -> None:
    # the lake's data time is a day behind the clock: the alarm's wall-clock events are aged against
    # the clock, and do not make the check's events, in data time, look a day old
    lake, day = tmp_path / "lake", 24 * 60
    land(lake, "a", minutes(-60 - day), 60, minutes(-5), bad_from=52)
    project = load_project(write_project(tmp_path, {"errors.yml": CHECK}, SOURCE.format(lake=lake)
                                         + f"    max_silence: 30m\nwebhooks:\n  - name: late\n    url: {hook.url}\n"
                                           "    catch_up: 2h\n"))
    run(project, clock=at(minutes(40)))
    land(lake, "b", minutes(60 - day), 25, minutes(100))  # healthy: the check's alert recovers
    run(project, clock=at(minutes(104)))

    class Pretend(Clock):
        def now(self) -> datetime:
            return minutes(160)

    notify(project, clock=Pretend())
    sent = [json.loads(r.body) for r in hook.accepted]
    assert [(b.get("alarm"), b["event"], b["occurred_at"]) for b in sent] == [
        (None, "opened", "2026-11-01T02:59:00Z"), (None, "closed", "2026-11-01T04:09:00Z"),
        ("silent", "closed", "2026-11-02T04:40:00Z")]
    # the alarm's opening, closed since and older than catch_up by the clock, is history
    assert query(project, "SELECT event, status, skip_reason FROM outbox ORDER BY seq") == [
        ("opened", "delivered", None), ("closed", "delivered", None), ("opened", "skipped", "catch_up"),
        ("closed", "delivered", None)]


@pytest.mark.parametrize(("line", "message"), [
    ("    max_silence: soon\n", "sources.sessions.max_silence: bad duration 'soon': write a number and a unit, "
                                "e.g. 90m, 2h, 3d, 1w"),
    ("    max_silence: 30\n", "sources.sessions.max_silence: bad duration 30: write a number and a unit, "
                              "e.g. 90m, 2h, 3d, 1w"),
    ("    max_lag: 0s\n", "sources.sessions.max_lag must be longer than 0s"),
    ("    alarm_severity: urgent\n", "sources.sessions.alarm_severity: 'urgent' is not one of high, medium, low"),
    ("    max_silnce: 30m\n", "unknown key 'max_silnce' in sources.sessions (did you mean 'max_silence'?)"),
])
def test_a_bad_alarm_key_is_one_line_naming_the_file_and_key(tmp_path: Path, line: str, message: str) -> None:
    project_file = lake_project(tmp_path, line)
    result = CliRunner().invoke(main, ["validate", "-p", str(project_file)])
    assert result.exit_code == 2
    assert result.output == f"{project_file}:7: {message}\n"
    ran = CliRunner().invoke(main, ["run", "-p", str(project_file)])
    assert ran.exit_code == 2 and ran.output == result.output and not (tmp_path / "w.duckdb").exists()


def test_a_replay_judges_no_alarm(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path)
    keep = tmp_path / "kept"
    result = CliRunner().invoke(main, ["backtest", "errors", "--from", "2026-11-02 02:00", "--to", "2026-11-02 03:00",
                                       "--keep", str(keep), "-p", str(project_file)])
    assert result.exit_code == 0, result.output
    con = duckdb.connect(str(keep / "baseline" / "warehouse.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM alerts WHERE alarm IS NOT NULL").fetchone()[0] == 0
        assert con.execute("SELECT count(*) FROM alerts").fetchone()[0] == 1
    finally:
        con.close()


def test_a_layout_5_file_gets_the_alarm_columns_and_runs_on(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path, "")
    run(load_project(project_file), clock=at(minutes(10)))
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    for table, column in (("alerts", "alarm"), ("alerts", "source_name"), ("alerts", "last_file_at"),
                          ("alerts", "newest_data_at"), ("alert_events", "last_file_at"),
                          ("alert_events", "newest_data_at"), ("incidents", "cause_alarm")):
        con.execute(f"ALTER TABLE {table} DROP COLUMN {column}")
    con.execute("UPDATE schema_version SET version = 5")
    before = con.execute("SELECT * FROM alerts ORDER BY alert_id").fetchall()
    con.close()
    project_file.write_text(project_file.read_text() + "    max_silence: 30m\n")
    result = run(load_project(project_file), clock=at(minutes(40)))
    assert [a.action for a in result.alarms] == ["opened"]
    con = duckdb.connect(str(tmp_path / "w.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(warehouse.SCHEMA_VERSION,)]
        # the earlier alert is a check's: its row as it was, the new columns NULL
        assert con.execute("SELECT * EXCLUDE (alarm, source_name, last_file_at, newest_data_at) FROM alerts "
                           "WHERE alarm IS NULL ORDER BY alert_id").fetchall() == before
        assert con.execute("SELECT alarm, source_name FROM alerts WHERE alarm IS NOT NULL").fetchall() == [
            ("silent", "sessions")]
    finally:
        con.close()
