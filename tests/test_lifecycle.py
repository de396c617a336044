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
lifecycle: {recover_after: 1, expire_after: 1h}
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
