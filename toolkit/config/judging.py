"""Windows that can never judge anything, or only after a very long time: said when a project is
validated, with the time to a series' first verdict spelt out.

A series' first verdict needs ``min_history`` earlier windows with a verdict of history, then the
window judged; each window has to close first. A time window closes ``every`` (plus ``lateness``)
after it starts. A count window closes when full or ``max_wait`` after its first session, whichever
comes first; how fast it fills depends on the traffic, which validation estimates from the lake's
Parquet footers (its rows over the span of its event times: the whole source's rate, so a series,
which gets a part of it, fills no faster). A window whose sessions can never reach
``guard.min_sessions`` never gets a verdict. These are warnings: the project is valid, exit 0.
"""

from __future__ import annotations

from datetime import timedelta

import duckdb

from toolkit.lake.files import list_source
from toolkit.model import Check, Project
from toolkit.problems import PlimsollError, Problem, display_path
from toolkit.words import plural

LONG = timedelta(days=30)     # a first verdict later than this after a series starts is worth a word
FOOTERS = 500                 # the newest files whose footers the traffic is estimated from


def judging_warnings(project: Project) -> list[Problem]:
    """A warning per check whose windows never judge, or first judge more than ``LONG`` after a
    series starts."""
    rates: dict[str, float | None] = {}
    found = []
    for check in project.checks.values():
        source = check.source
        if source.name not in rates:
            rates[source.name] = _sessions_per_second(source)
        message = _warning(check, rates[source.name])
        if message:
            found.append(Problem(display_path(check.file), check.line, f"warning: {message}"))
    return found


def _warning(check: Check, rate: float | None) -> str | None:
    window, guard, baseline = check.window, check.guard, check.baseline
    windows = (baseline.min_history or 0) + 1   # the history, then the window judged
    history = f"{baseline.min_history} earlier windows (baseline.min_history), then the window judged" \
        if baseline.min_history else "the window judged"
    if window.every is not None:
        first = windows * window.every + window.lateness
        if first > LONG:
            return (f"window: a series' first verdict comes {spoken_span(first)} of data after its first session at "
                    f"the earliest ({plural(windows, 'window')} of {spoken_span(window.every)}: {history}); its alerts "
                    "wait as long")
        return None
    size, wait = window.sessions or 0, window.max_wait or timedelta(0)
    if guard.min_sessions > size:
        return (f"guard.min_sessions: {guard.min_sessions:,} sessions is more than a window holds "
                f"(window.sessions {size:,}): no window can ever get a verdict")
    if rate is None or rate <= 0:
        return None
    fill = timedelta(seconds=size / rate)
    if fill > wait and rate * wait.total_seconds() < guard.min_sessions:
        return (f"window: {size:,} sessions take about {spoken_span(fill)} of the whole source's traffic "
                f"({rate * 86400:,.0f} sessions a day in the lake), so each window closes at max_wait "
                f"({spoken_span(wait)}) with fewer than guard.min_sessions ({guard.min_sessions:,}) sessions: "
                "no window can ever get a verdict")
    each = min(fill, wait)
    first = windows * each
    if fill > wait:
        return (f"window.sessions: {size:,} sessions are never reached: at the lake's {rate * 86400:,.0f} sessions a "
                f"day (the whole source's; a series gets a part) a window would fill in about {spoken_span(fill)}, so "
                f"every window closes at max_wait ({spoken_span(wait)}) with what it has; a series' first verdict comes "
                f"{spoken_span(first)} of data after its first session at the earliest ({plural(windows, 'window')}: "
                f"{history})")
    if first > LONG:
        return (f"window: a series' first verdict comes {spoken_span(first)} of data after its first session at the "
                f"earliest ({plural(windows, 'window')} of {size:,} sessions, each closing after "
                f"{spoken_span(each)} at the lake's {rate * 86400:,.0f} sessions a day, or at max_wait: {history}); "
                "its alerts wait as long")
    return None


def spoken_span(delta: timedelta) -> str:
    """'750 days', '2 days 6 h', '5 h 30 min': a span of data time for people."""
    seconds = int(delta.total_seconds())
    days, hours, minutes = seconds // 86400, seconds % 86400 // 3600, seconds % 3600 // 60
    if days >= 10:
        return f"{days:,} days"
    if days:
        return f"{days} day{'s' if days != 1 else ''}" + (f" {hours} h" if hours else "")
    if hours:
        return f"{hours} h" + (f" {minutes} min" if minutes else "")
    return f"{minutes} min" if minutes else f"{seconds} s"


def _sessions_per_second(source) -> float | None:
    """The source's rows per second of event time, from its newest files' Parquet footers (row counts
    and the event-time column's statistics); None where that cannot be known (a computed event time,
    a table source, object storage, files without statistics)."""
    if source.format != "parquet" or source.path.startswith("s3://") or source.time is not None \
            and source.time.columns != (source.event_time,):
        return None
    try:
        files = sorted(f.where for f in list_source(source))[-FOOTERS:]
    except (OSError, ValueError, PlimsollError):
        return None
    if not files:
        return None
    con = duckdb.connect()
    try:
        rows, first, last = con.execute(
            "SELECT sum(row_group_num_rows), min(try_cast(stats_min_value AS TIMESTAMP)), "
            "max(try_cast(stats_max_value AS TIMESTAMP)) FROM parquet_metadata($files) WHERE path_in_schema = $column",
            {"files": files, "column": source.event_time}).fetchone()
    except duckdb.Error:
        return None
    finally:
        con.close()
    if not rows or first is None or last is None or last <= first:
        return None
    return rows / (last - first).total_seconds()
