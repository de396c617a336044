"""A small, fully known lake and project: two series of one title check, whose alerts are known.

``kids / t-1`` breaches in its 5th and 6th windows and recovers in the 7th (one closed alert);
``kids / <script>alert(1)</script>`` breaches in its last window (one open alert). The second title is
hostile on purpose: every output must show it as text.
"""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import datetime, timedelta
from pathlib import Path

from conftest import PLAIN_PROJECT, write_project, write_rows

START = datetime(2026, 11, 2)
HOSTILE = "<script>alert(1)</script>"
SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, title_id VARCHAR, error_code VARCHAR"
# bad sessions per window of 10, per series
SERIES = {
    "t-1": [0, 0, 0, 0, 6, 7, 0, 0],
    HOSTILE: [0, 0, 0, 1, 0, 8],
}

CHECK = """\
check: title_errors
about: One title fails far more often than its own history.
source: sessions
by: [site, title_id]
measure: {kind: rate, bad: error_code IS NOT NULL}
window: {sessions: 10, max_wait: 1d}
baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1}
guard: {min_sessions: 5, min_bad: 2}
lifecycle: {recover_after: 1, expire_after: 7d}
severity: high
"""


def session_rows(series: dict[str, list[int]] = SERIES) -> list[tuple]:
    """One session a minute per title; in window w, the first ``bad[w]`` sessions fail with E42."""
    rows = []
    for t, (title, bad) in enumerate(series.items()):
        for w, n_bad in enumerate(bad):
            for i in range(10):
                minute = w * 10 + i
                rows.append((f"s-{t}-{minute}", START + timedelta(minutes=minute, seconds=t), "kids", title,
                             "E42" if i < n_bad else None))
    return rows


def known_project(folder: Path, extra_project: str = "", checks: dict[str, str] | None = None) -> Path:
    """The project file over the known lake in ``folder`` (``extra_project`` appended to plimsoll.yml)."""
    lake = write_rows(folder / "lake", SCHEMA, session_rows())
    return write_project(folder, checks or {"title_errors.yml": CHECK}, PLAIN_PROJECT.format(lake=lake) + extra_project)


@contextmanager
def warehouse_held(path: Path) -> Iterator[subprocess.Popen]:
    """Another process holding the DuckDB file open for writing, as a run does, until the block ends."""
    holder = subprocess.Popen([sys.executable, "-c", "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); "
                               "print('ready', flush=True); time.sleep(60)", str(path)],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "ready"
        yield holder
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()


# Causes and incidents written by hand over the known lake's two alerts, as a run of layout 5 fills
# them: the closed alert of t-1 is the cause of a closed incident and its excess lies in
# cdn=birch, country=DE (a second, non-significant row below it); the open hostile alert is the cause
# of an open incident whose excess lies in a hostile player version.
HOSTILE_PLAYER = "<img src=x onerror=alert(2)>"


def fill_incidents(warehouse_file: Path) -> dict[str, str]:
    """Fill alert_causes, incidents, incident_events and alerts.incident_id; the alert ids by title."""
    import duckdb

    con = duckdb.connect(str(warehouse_file))
    try:
        ids = dict(con.execute("SELECT key['title_id'], alert_id FROM alerts").fetchall())
        closed, hostile = ids["t-1"], ids[HOSTILE]
        con.execute("UPDATE alerts SET incident_id = 'inc-closed' WHERE alert_id = $a", {"a": closed})
        con.execute("UPDATE alerts SET incident_id = 'inc-open' WHERE alert_id = $a", {"a": hostile})
        con.execute(
            """
            INSERT INTO alert_causes VALUES
            ($closed, 1, MAP {'cdn': 'birch', 'country': 'DE'}, 'cdn=birch, country=DE', 11, 1.5, 12, 0.81,
             20.5, true, 2, 4, 1),
            ($closed, 2, MAP {'device_family': 'tv'}, 'device_family=tv', 4, 2.0, 7, 0.2, 1.1, false, 2, 4, 1),
            ($hostile, 1, MAP {'player_version': $player}, 'player_version=' || $player, 7, 0.5, 8, 0.9,
             12.25, true, 1, 4, 1)
            """,
            {"closed": closed, "hostile": hostile, "player": HOSTILE_PLAYER},
        )
        con.execute(
            """
            INSERT INTO incidents
            SELECT 'inc-' || CASE WHEN a.status = 'open' THEN 'open' ELSE 'closed' END, a.status, a.opened_at,
                   a.closed_at, a.alert_id, a.check_name, a.key, a.key_text, a.split_value, a.severity, 1,
                   [a.alert_id], a.affected_sessions, a.affected_viewers, a.excess_sessions, 1, 1
            FROM alerts AS a
            """
        )
        con.execute(
            """
            INSERT INTO incident_events
            SELECT incident_id, 1, opened_at, 'opened', 'open', cause_alert_id, 1, alert_ids, affected_sessions,
                   affected_viewers
            FROM incidents
            UNION ALL
            SELECT incident_id, 1, closed_at, 'closed', 'closed', cause_alert_id, 1, alert_ids, affected_sessions,
                   affected_viewers
            FROM incidents WHERE status = 'closed'
            """
        )
    finally:
        con.close()
    return {"closed": closed, "hostile": hostile}
