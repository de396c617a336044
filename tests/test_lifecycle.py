"""Alert life cycle corner cases over real Parquet and DuckDB files."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import duckdb

from conftest import PLAIN_PROJECT, write_project, write_rows
from toolkit.config.project import load_project
from toolkit.engine.runner import run

CHECK = """\
check: ties
source: sessions
by: []
measure: {kind: quantile, of: startup_ms, q: 0.5}
window: {sessions: 1, max_wait: 10m}
baseline: {method: rolling_percentile, q: 0.9, history: 3, min_history: 1, factor: 1.5}
guard: {min_sessions: 0}
lifecycle: {recover_after: 1, expire_after: 1h, reopen_within: 0s}
"""


def test_two_alerts_opened_at_the_same_data_time_get_different_ids(tmp_path: Path) -> None:
    # Count windows of one session whose event times tie: the series breaches, recovers and breaches
    # again within the same second, so two alerts open at the same opened_at.
    start = datetime(2026, 11, 2)
    rows = [("a", 0, 1000), ("b", 1, 1000), ("c", 3, 9000), ("d", 3, 1000), ("e", 3, 9000)]
    lake = write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, startup_ms INTEGER",
                      [(sid, start + timedelta(minutes=m), ms) for sid, m, ms in rows])
    project = load_project(write_project(tmp_path, {"ties.yml": CHECK}, PLAIN_PROJECT.format(lake=lake)))
    run(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    alerts = con.execute("SELECT alert_id, opened_at, status FROM alerts ORDER BY status").fetchall()
    assert len(alerts) == 2 and alerts[0][1] == alerts[1][1]
    assert alerts[0][0] != alerts[1][0]
    per_alert = con.execute("SELECT alert_id, count(*) FILTER (WHERE event = 'opened') FROM alert_events "
                            "GROUP BY alert_id").fetchall()
    assert sorted(n for _, n in per_alert) == [1, 1]


FLAPPING = """\
check: flapping
source: sessions
measure: {kind: rate, bad: failed}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 3, min_history: 1, floor: 0.3}
guard: {min_sessions: 5}
lifecycle: {recover_after: 2, expire_after: 1d}
"""

# sessions per hour and how many of them failed: history, a breach, two healthy hours (recovered at
# 04:00), a breach at 04:00-05:00 (within 6 h: reopened), two healthy hours (recovered again at 07:00),
# a quiet hour of 3 sessions at 09:00 that cannot count, a breach at 14:00 (7 h after: a new alert)
# and an hour at 16:00 that closes the 14:00 window.
HOURS = {0: (10, 0), 1: (10, 5), 2: (10, 0), 3: (10, 0), 4: (10, 5), 5: (10, 0), 6: (10, 0), 9: (3, 0),
         14: (10, 5), 15: (10, 5), 16: (10, 0)}


def flapping_rows(hours: dict[int, tuple[int, int]]) -> list[tuple]:
    start = datetime(2026, 11, 2)
    return [(f"s-{h}-{i}", start + timedelta(hours=h, minutes=i), i < bad)
            for h, (n, bad) in hours.items() for i in range(n)]


def flapping_outcome(project) -> tuple[list[tuple], list[tuple]]:
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        alerts = con.execute("SELECT alert_id, opened_at, status, close_reason, closed_at, breach_windows, "
                             "affected_sessions FROM alerts ORDER BY opened_at").fetchall()
        events = con.execute("SELECT alert_id, event, occurred_at, affected_sessions FROM alert_events "
                             "ORDER BY occurred_at, event").fetchall()
    finally:
        con.close()
    return alerts, events


def test_a_breach_soon_after_a_recovery_reopens_that_alert(tmp_path: Path) -> None:
    lake = write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN",
                      flapping_rows(HOURS))
    project = load_project(write_project(tmp_path, {"flapping.yml": FLAPPING}, PLAIN_PROJECT.format(lake=lake)))
    run(project)
    alerts, events = flapping_outcome(project)
    day = datetime(2026, 11, 2)
    first, second = alerts
    assert first[1:] == (day + timedelta(hours=2), "closed", "recovered", day + timedelta(hours=7), 2, 10)
    assert second[1:] == (day + timedelta(hours=15), "open", None, None, 2, 10)
    assert [(e[0] == first[0], e[1], e[2].hour, e[3]) for e in events] == [
        (True, "opened", 2, 5), (True, "closed", 4, 5), (True, "reopened", 5, 10), (True, "closed", 7, 10),
        (False, "opened", 15, 5), (False, "updated", 16, 10)]


def test_a_reopening_in_a_later_run_gives_what_one_run_gives(tmp_path: Path) -> None:
    # one file per hour, one run per file: the recovery is in the warehouse when the reopening breach
    # arrives, and the quiet hour comes in a run of its own
    single = tmp_path / "single"
    lake = write_rows(single / "lake", "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN", flapping_rows(HOURS))
    one = load_project(write_project(single, {"flapping.yml": FLAPPING}, PLAIN_PROJECT.format(lake=lake)))
    run(one)
    split = tmp_path / "split"
    lake = split / "lake"
    many = None
    for hour, counts in HOURS.items():
        write_rows(lake, "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN", flapping_rows({hour: counts}),
                   name=f"hour-{hour:02d}.parquet")
        many = many or load_project(write_project(split, {"flapping.yml": FLAPPING}, PLAIN_PROJECT.format(lake=lake)))
        assert run(many).status == "ok"
    assert flapping_outcome(many) == flapping_outcome(one)


def test_a_window_with_too_few_sessions_does_not_count_toward_recovery(tmp_path: Path) -> None:
    # breach at 01:00, then three hours of 3 sessions (under min_sessions 5: no verdict), then one
    # healthy hour: with recover_after 2 the alert is still open, and its quiet hours are not history
    hours = {0: (10, 0), 1: (10, 5), 2: (3, 0), 3: (3, 0), 4: (3, 0), 5: (10, 0), 6: (10, 5)}
    check = FLAPPING.replace("expire_after: 1d}", "expire_after: 1d, reopen_within: 0s}")
    lake = write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN", flapping_rows(hours))
    project = load_project(write_project(tmp_path, {"flapping.yml": check}, PLAIN_PROJECT.format(lake=lake)))
    run(project)
    alerts, _ = flapping_outcome(project)
    assert [(a[2], a[5]) for a in alerts] == [("open", 1)]
    con = duckdb.connect(str(project.warehouse), read_only=True)
    verdicts = con.execute("SELECT hour(window_start), breach, history_windows FROM windows ORDER BY window_start"
                           ).fetchall()
    con.close()
    assert verdicts == [(0, False, 0), (1, True, 1), (2, None, 1), (3, None, 1), (4, None, 1), (5, False, 1)]
