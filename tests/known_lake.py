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
