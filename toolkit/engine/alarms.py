"""Source alarms: alerts about a source itself rather than about a check's series.

A source with ``max_silence`` gets a 'silent' alert when no new file has arrived for that long; one
with ``max_lag`` a 'lagging' alert when the newest data time read from it is that far behind the
clock. This is the one place the wall clock enters a decision (a window, a baseline or a check's
alert never reads it): every run judges the sources of the checks it ran, after them and before the
incidents, in its transaction, with the statements of ``queries/alarms.sql`` passed through the
runner's own helper. A replay (a backtest: the source has ``until``) judges nothing, since the lake
it reads is not the lake now.

The alerts live in ``alerts`` like every other, with ``check_name`` NULL (an alarm is no check),
``alarm`` naming it and ``key`` ``{source: NAME}``; what a run found is returned as
:class:`SourceAlarm` for its summary.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import duckdb

from toolkit.config.fields import duration_text
from toolkit.lake.files import LakeFile
from toolkit.model import Check, Project
from toolkit.sql.script import alarm_statements
from toolkit.sql.templates import Statement
from toolkit.words import spoken

# runs one statement on a connection, giving every row (the runner's helper, so it is timed and named)
Executor = Callable[[duckdb.DuckDBPyConnection, Statement, dict[str, Any]], Any]
LIMIT_KEYS = {"silent": "max_silence", "lagging": "max_lag"}
RETIRED = {"source removed": "the source is no longer in the project",
           "limit removed": "{key} is no longer set for it"}


@dataclass(frozen=True)
class SourceAlarm:
    """What a run did with one alarm of one source."""

    source: str
    alarm: str                            # 'silent' | 'lagging'
    action: str                           # 'opened' | 'continued' (still open) | 'closed'
    seconds: float | None = None          # how long silent, or how far behind the clock, at the run
    limit: timedelta | None = None        # max_silence or max_lag
    last_file_at: datetime | None = None  # wall clock: when the newest file arrived
    newest_data_at: datetime | None = None  # data time: the newest sane event time read
    close_reason: str | None = None       # 'data flowing again' | 'caught up' | 'limit raised' | 'source removed' | 'limit removed'
    lasted: float | None = None           # a silence that ended: how long no file arrived

    @property
    def line(self) -> str:
        """The run's summary line, e.g. 'source sessions: no new files for 47 min (max_silence 30m):
        alert opened'."""
        key = LIMIT_KEYS[self.alarm]
        head = f"source {self.source}: "
        if self.close_reason in RETIRED:
            return f"{head}{self.alarm} alert closed: {RETIRED[self.close_reason].format(key=key)}"
        limit = f"{key} {duration_text(self.limit)}" if self.limit is not None else key
        if self.alarm == "silent":
            state = f"no new files for {spoken(self.seconds)}"
        else:
            newest = f" ({self.newest_data_at:%Y-%m-%d %H:%M:%S})" if self.newest_data_at else ""
            state = f"newest data{newest} {spoken(self.seconds)} behind the clock"
        if self.action == "opened":
            return f"{head}{state} ({limit}): alert opened"
        if self.action == "continued":
            return f"{head}{state} ({limit}): alert still open"
        if self.close_reason == "data flowing again":
            return f"{head}new files again after {spoken(self.lasted)} without one ({limit}): alert closed"
        if self.close_reason == "caught up":
            return f"{head}{state}, within {limit}: caught up, alert closed"
        return f"{head}{state}, within {limit}: alert closed ({self.close_reason})"


def watched(check: Check) -> bool:
    """Whether a run of ``check`` judges its source's alarms: a limit set, and not a replay."""
    source = check.source
    return source.until is None and (source.max_silence is not None or source.max_lag is not None)


def record(con: duckdb.DuckDBPyConnection, project: Project, checks: list[Check], run_id: int, now: datetime,
           listings: dict[str, list[LakeFile]], held_back: set[str], run: Executor) -> list[SourceAlarm]:
    """In a run, inside its transaction, after its checks: open alarms no longer watched closed, then
    each watched source of ``checks`` judged at ``now`` (its listing in ``listings``; the lag of a
    source in ``held_back``, whose reading a backlog holds back, is not judged). What changed, and
    what is still open, for the run's summary."""
    statements = alarm_statements()

    def named(name: str, params: dict[str, Any]) -> Any:
        out = None
        for statement in statements[name]:
            out = run(con, statement, params)
        return out

    sources = list(project.sources.values())
    retired = named("alarms.retire", {
        "sources": sorted(project.sources), "run_id": run_id, "now": now,
        "silent_sources": sorted(s.name for s in sources if s.max_silence is not None),
        "lagging_sources": sorted(s.name for s in sources if s.max_lag is not None),
    })
    found = [SourceAlarm(source, alarm, "closed", close_reason=reason) for source, alarm, reason in retired]
    judged = {check.source.name: check.source for check in checks if watched(check)}
    for name, source in sorted(judged.items()):
        params = {
            "source": name, "run_id": run_id, "now": now, "severity": source.alarm_severity,
            "listing": [{"path": f.path, "modified_at": f.modified_at} for f in listings.get(name, [])],
            "checks": sorted(c.name for c in project.checks.values() if c.source.name == name),
            "max_silence": _seconds(source.max_silence), "max_lag": _seconds(source.max_lag),
            "lag_judged": name not in held_back,
        }
        for step in ("alarms.arrivals", "alarms.verdicts", "alarms.record"):
            named(step, params)
        for alarm, action, seconds, _limit, last_file_at, newest_data_at, reason, _closed, lasted in named(
                "alarms.summary", params):
            limit = source.max_silence if alarm == "silent" else source.max_lag
            found.append(SourceAlarm(name, alarm, action, seconds, limit, last_file_at, newest_data_at,
                                     reason if action == "closed" else None, lasted))
    return found


def _seconds(delta: timedelta | None) -> int | None:
    return None if delta is None else int(delta.total_seconds())
