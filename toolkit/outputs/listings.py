"""Reading results back for people and scripts: alert and incident listings as a table or JSON.

Listings carry keys and counts only, never a session or viewer identifier.
"""

from __future__ import annotations

import difflib
import json
import math
from datetime import datetime, timedelta
from typing import Any

import duckdb

from toolkit.config.fields import duration_text
from toolkit.engine import warehouse
from toolkit.words import Reading, measure_text, number_text, plural, printable, spoken
from toolkit.model import Project
from toolkit.problems import Problem, ProjectInvalid, display_path

ALERT_COLUMNS = ("alert_id", "status", "severity", "check_name", "key", "key_text", "split_value", "opened_at",
                 "breach_started_at", "last_breach_at", "closed_at", "close_reason", "breach_windows",
                 "affected_sessions", "affected_viewers", "excess_sessions", "affected_per_hour", "peak_value",
                 "threshold", "fingerprint", "incident_id",
                 # a source alarm's (layout 6): check_name is NULL, alarm 'silent' or 'lagging'
                 "alarm", "source_name", "last_file_at", "newest_data_at")
CAUSE_FIELDS = ("rank", "key", "key_text", "bad", "expected", "excess_share", "score", "significant")
INCIDENT_COLUMNS = ("incident_id", "status", "severity", "opened_at", "closed_at", "cause_alert_id", "cause_check",
                    "cause_key", "cause_key_text", "cause_split_value", "alerts", "alert_ids", "affected_sessions",
                    "affected_viewers", "excess_sessions", "first_run_id", "last_run_id", "cause_alarm")


def list_alerts(project: Project, status: str = "all", checks: tuple[str, ...] = (),
                since: datetime | None = None) -> list[dict[str, Any]]:
    """Alerts, open ones first, newest first; filtered by status, check names and opening time.

    While a run holds the warehouse, this reads the copy the last run published.
    """
    con = warehouse.open_for_reading(project)
    try:
        refuse_unknown_checks(project, con, checks)
        return alerts_from(con, status, checks, since)
    finally:
        con.close()


def refuse_unknown_checks(project: Project, con: duckdb.DuckDBPyConnection, checks: tuple[str, ...]) -> None:
    """``--check NAME`` naming no check of the project and no check with alerts in the warehouse (a
    check since removed) is a mistake, not 'no alerts': exit 2 naming the checks there are."""
    if not checks:
        return
    known = set(project.checks) | {row[0] for row in con.execute(
        "SELECT DISTINCT check_name FROM alerts WHERE check_name IS NOT NULL").fetchall()}
    unknown = [name for name in checks if name not in known]
    if unknown:
        names = ", ".join(sorted(known)) or "none"
        raise ProjectInvalid([Problem(display_path(project.file), 0,
                                      f"--check: no check named '{printable(name)}'{_close(name, known)}; "
                                      f"the checks are: {names}") for name in unknown])


def _close(name: str, known: set[str]) -> str:
    close = difflib.get_close_matches(name, sorted(known), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def has_incidents(con: duckdb.DuckDBPyConnection) -> bool:
    """Whether the warehouse has layout 5's causes and incidents: a file of an earlier release is read
    as it is until the next run converts it, without them."""
    return con.execute("SELECT count(*) FROM information_schema.tables WHERE table_name = 'incidents'").fetchone()[0] > 0


def present_columns(con: duckdb.DuckDBPyConnection, table: str) -> set[str]:
    """The columns ``table`` has: a file (or a published copy) of an earlier layout lacks later ones,
    which listings read as NULL until the next run converts it."""
    return {row[0] for row in con.execute(
        "SELECT column_name FROM information_schema.columns WHERE table_name = $table", {"table": table}).fetchall()}


def alerts_from(con: duckdb.DuckDBPyConnection, status: str = "all", checks: tuple[str, ...] = (),
                since: datetime | None = None) -> list[dict[str, Any]]:
    layout_5 = has_incidents(con)
    present = present_columns(con, "alerts")
    cols = ", ".join(c if c in present else f"NULL AS {c}" for c in ALERT_COLUMNS)
    rows = con.execute(
        f"""
        SELECT {cols} FROM alerts
        WHERE ($status = 'all' OR status = $status)
          AND (len($checks) = 0 OR list_contains($checks, check_name))
          AND ($since IS NULL OR opened_at >= $since)
        ORDER BY status = 'open' DESC, opened_at DESC, check_name, key_text, split_value
        """,
        {"status": status, "checks": list(checks), "since": since},
    ).fetchall()
    alerts = [dict(zip(ALERT_COLUMNS, row)) for row in rows]
    causes = causes_for(con, [a["alert_id"] for a in alerts]) if layout_5 else {}
    for alert in alerts:
        alert["causes"] = causes.get(alert["alert_id"], [])
    return alerts


def causes_for(con: duckdb.DuckDBPyConnection, alert_ids: list[str],
               significant_only: bool = False) -> dict[str, list[dict[str, Any]]]:
    """Each alert's causes from ``alert_causes`` (its latest run's, by rank): where its excess lies."""
    if not alert_ids:
        return {}
    rows = con.execute(
        f"""
        SELECT alert_id, {", ".join(CAUSE_FIELDS)}
        FROM alert_causes
        WHERE list_contains($ids, alert_id) AND (NOT $significant_only OR significant)
        QUALIFY run_id IS NOT DISTINCT FROM max(run_id) OVER (PARTITION BY alert_id)
        ORDER BY alert_id, rank
        """,
        {"ids": alert_ids, "significant_only": significant_only},
    ).fetchall()
    found: dict[str, list[dict[str, Any]]] = {}
    for alert_id, *fields in rows:
        found.setdefault(alert_id, []).append(dict(zip(CAUSE_FIELDS, fields)))
    return found


def cause_line(key_text: str | None, causes: list[dict[str, Any]], affected: int | None = None) -> str | None:
    """Where an alert's excess lies, from its significant causes (up to three), with the alert's
    affected sessions: 'site=news: 69 sessions affected, 81 % of the excess in cdn=birch,
    country=DE'; several answers each with their share ('…: the excess 52 % in site=sport; 45 % in site=news'),
    so failures spread over one attribute's values do not read as one value's; None without one."""
    answers = [c for c in causes if c["significant"]]
    if not answers:
        return None
    count = f" {plural(affected, 'session')} affected," if affected is not None else ""
    head = f"{printable(key_text or '(all sessions)')}:{count}"
    if len(answers) == 1:
        share = excess_share_text(answers[0]["excess_share"]) or "the excess"
        return f"{head} {share} in {printable(answers[0]['key_text'])}"
    parts = [f"{_share_number(c['excess_share'])} in {printable(c['key_text'])}" for c in answers[:3]]
    more = f" and {len(answers) - 3} more" if len(answers) > 3 else ""
    return f"{head} the excess {'; '.join(parts)}{more}"


def _share_number(share: float | None) -> str:
    """'52 %'; 'all' from 99.5 %; '?' without a share."""
    if share is None or not math.isfinite(share):
        return "?"
    return "all" if share >= 0.995 else f"{100 * share:.0f} %"


def excess_share_text(share: float | None) -> str:
    """'81 % of the excess'; 'all of the excess' from 99.5 % (a combination can hold more than the
    window's excess when the rest failed less than expected: '107 %' would read as a mistake);
    '' without a share."""
    if share is None or not math.isfinite(share):
        return ""
    return "all of the excess" if share >= 0.995 else f"{100 * share:.0f} % of the excess"


def alerts_json(alerts: list[dict[str, Any]]) -> str:
    """A JSON list for scripts: the key as an object, data times as ``YYYY-MM-DD HH:MM:SS``."""

    def encode(value: Any) -> Any:
        if isinstance(value, float) and not math.isfinite(value):
            return None  # NaN and infinity are not JSON: strict parsers refuse them
        return value.isoformat(sep=" ") if isinstance(value, datetime) else value

    def shown(alert: dict[str, Any]) -> dict[str, Any]:
        out = {k: encode(v) for k, v in alert.items() if k != "causes"}
        out["causes"] = [{k: encode(c[k]) for k in JSON_CAUSE_FIELDS} for c in alert.get("causes", [])]
        return out

    return json.dumps([shown(a) for a in alerts], indent=2, ensure_ascii=False, allow_nan=False)


JSON_CAUSE_FIELDS = ("rank", "key", "bad", "expected", "excess_share", "score", "significant")


def alerts_table(alerts: list[dict[str, Any]], known: dict[str, Reading] | None = None) -> str:
    """A fixed-width table for a terminal; text from the data cannot move the cursor or add lines.
    ``worst`` and ``threshold`` are in each check's unit (``known``: how each check's figures read)."""
    if not alerts:
        return "no alerts"
    known = known or {}
    head = ("status", "severity", "check", "key", "split", "worst", "threshold", "opened", "windows", "affected",
            "viewers", "excess", "per hour", "incident")
    body = [
        (
            a["status"] if a["status"] == "open" else f"closed ({a['close_reason']})",
            a["severity"], check_label(a), printable(a["key_text"] or "(all)"), printable(a["split_value"] or ""),
            *figures(a, known.get(a["check_name"] or "", Reading())),
            a["opened_at"].strftime("%Y-%m-%d %H:%M"), count_or_dash(a["breach_windows"]),
            count_or_dash(a["affected_sessions"]), count_or_dash(a.get("affected_viewers")),
            count_or_dash(a.get("excess_sessions")), count_or_dash(a["affected_per_hour"]),
            printable(a.get("incident_id") or "-"),
        )
        for a in alerts
    ]
    below = [alarm_line(a) if a.get("alarm") else cause_line(a["key_text"], a.get("causes", []), a.get("affected_sessions"))
             for a in alerts]
    return _table(head, body, below)


def figures(alert: dict[str, Any], reading: Reading) -> tuple[str, str]:
    """An alert's worst value and its threshold as people read them: in the measure's unit, rounded
    (a CUSUM's threshold is its decision interval h; a source alarm's, durations)."""
    if alert.get("alarm"):
        return spoken(alert.get("peak_value")), spoken(alert.get("threshold"))
    threshold = alert.get("threshold")
    if reading.method == "cusum":
        shown = f"h {number_text(threshold)}" if threshold is not None else "-"
    else:
        shown = measure_text(threshold, reading)
    return measure_text(alert.get("peak_value"), reading), shown


def _table(head: tuple[str, ...], body: list[tuple[str, ...]], below: list[str | None]) -> str:
    """Fixed-width columns; a row's line ``below`` it (where its excess lies), indented, when it has one."""
    widths = [max(len(str(r[i])) for r in (head, *body)) for i in range(len(head))]
    lines = ["  ".join(str(c).ljust(w) for c, w in zip(head, widths)).rstrip(),
             "  ".join("-" * w for w in widths)]
    for row, line in zip(body, below):
        lines.append("  ".join(str(c).ljust(w) for c, w in zip(row, widths)).rstrip())
        if line:
            lines.append(f"  └ {line}")
    return "\n".join(lines)


def count_or_dash(value: float | int | None) -> str:
    """A count rounded to a whole number with thousands separators, or '-' where there is none (viewers
    without a source's viewer_id, excess of a ratio or quantile measure)."""
    return "-" if value is None else f"{round(value):,}"


def list_incidents(project: Project, status: str = "all") -> list[dict[str, Any]]:
    """Incidents, newest first, each with its cause alert's significant causes.

    While a run holds the warehouse, this reads the copy the last run published.
    """
    con = warehouse.open_for_reading(project)
    try:
        return incidents_from(con, status)
    finally:
        con.close()


def incidents_from(con: duckdb.DuckDBPyConnection, status: str = "all",
                   alert_ids: list[str] | None = None) -> list[dict[str, Any]]:
    """Incidents of ``status``, newest first; with ``alert_ids``, only those holding one of them."""
    if not has_incidents(con):
        return []
    present = present_columns(con, "incidents")
    rows = con.execute(
        f"""
        SELECT {", ".join(c if c in present else f"NULL AS {c}" for c in INCIDENT_COLUMNS)} FROM incidents
        WHERE ($status = 'all' OR status = $status)
          AND ($all OR len(list_intersect(alert_ids, $ids::VARCHAR[])) > 0)
        ORDER BY opened_at DESC, incident_id
        """,
        {"status": status, "all": alert_ids is None, "ids": alert_ids or []},
    ).fetchall()
    incidents = [dict(zip(INCIDENT_COLUMNS, row)) for row in rows]
    cause_ids = [i["cause_alert_id"] for i in incidents if i["cause_alert_id"]]
    figures_of = {alert_id: (peak, threshold) for alert_id, peak, threshold in con.execute(
        "SELECT alert_id, peak_value, threshold FROM alerts WHERE list_contains($ids, alert_id)",
        {"ids": cause_ids}).fetchall()} if cause_ids else {}
    causes = causes_for(con, cause_ids, significant_only=True)
    for incident in incidents:
        # the cause alert's worst value and threshold, for the words people read (not in --json)
        incident["cause_peak_value"], incident["cause_threshold"] = figures_of.get(incident["cause_alert_id"],
                                                                                   (None, None))
        incident["alert_ids"] = list(incident["alert_ids"] or [])
        incident["causes"] = causes.get(incident["cause_alert_id"], [])
    return incidents


def incidents_json(incidents: list[dict[str, Any]]) -> str:
    """A JSON list for scripts: the cause as an object, data times as ``YYYY-MM-DD HH:MM:SS``."""

    def encode(value: Any) -> Any:
        if isinstance(value, float) and not math.isfinite(value):
            return None
        return value.isoformat(sep=" ") if isinstance(value, datetime) else value

    shown = [
        {
            "incident_id": i["incident_id"], "status": i["status"], "severity": i["severity"],
            "opened_at": encode(i["opened_at"]), "closed_at": encode(i["closed_at"]),
            "cause": {"check": i["cause_check"], "key": i["cause_key"], "key_text": i["cause_key_text"],
                      "split_value": i["cause_split_value"], "alert_id": i["cause_alert_id"],
                      "alarm": i.get("cause_alarm")},
            "alerts": i["alerts"], "alert_ids": i["alert_ids"],
            "affected_sessions": i["affected_sessions"], "affected_viewers": i["affected_viewers"],
            "excess_sessions": encode(i["excess_sessions"]),
            "causes": [{k: encode(c[k]) for k in JSON_CAUSE_FIELDS} for c in i["causes"]],
            "first_run_id": i["first_run_id"], "last_run_id": i["last_run_id"],
        }
        for i in incidents
    ]
    return json.dumps(shown, indent=2, ensure_ascii=False, allow_nan=False)


def incidents_table(incidents: list[dict[str, Any]], known: dict[str, Reading] | None = None) -> str:
    """A fixed-width table for a terminal, each incident's top cause on the line below it; ``worst``
    and ``threshold`` are the cause alert's, in its check's unit."""
    if not incidents:
        return "no incidents"
    known = known or {}
    head = ("incident", "status", "severity", "opened", "closed", "cause", "worst", "threshold", "alerts", "affected",
            "viewers")
    body = [
        (
            printable(i["incident_id"]), i["status"], i["severity"] or "-",
            i["opened_at"].strftime("%Y-%m-%d %H:%M") if i["opened_at"] else "-",
            i["closed_at"].strftime("%Y-%m-%d %H:%M") if i["closed_at"] else "-",
            incident_cause(i),
            *figures({"alarm": i.get("cause_alarm"), "peak_value": i.get("cause_peak_value"),
                      "threshold": i.get("cause_threshold")}, known.get(i["cause_check"] or "", Reading())),
            f"{i['alerts'] or 0:,}", count_or_dash(i["affected_sessions"]),
            count_or_dash(i["affected_viewers"]),
        )
        for i in incidents
    ]
    below = [cause_line(i["cause_key_text"], i["causes"], i.get("affected_sessions")) for i in incidents]
    return _table(head, body, below)


def check_label(alert: dict[str, Any]) -> str:
    """What the 'check' column shows: the check's name, or a source alarm's in brackets, '(silent)'
    (no check is named so)."""
    return f"({alert['alarm']})" if alert.get("alarm") else str(alert["check_name"])


def alarm_line(alert: dict[str, Any]) -> str:
    """What a source alarm found, for the line below it: 'source=sessions: no new file since
    2026-11-02 03:00:00 UTC, 47 min at the last run (max_silence 30m)'. Its times are wall clock."""
    limit = timedelta(seconds=alert["threshold"]) if alert.get("threshold") is not None else None
    where = printable(alert["key_text"] or f"source={alert.get('source_name')}")
    still = alert["status"] == "open"
    if alert["alarm"] == "silent":
        key, last = "max_silence", alert.get("last_file_at")
        said = f"no new file since {_clock(last)}"
        if still and last and alert.get("last_breach_at"):
            said += f", {spoken((alert['last_breach_at'] - last).total_seconds())} at the last run"
        elif not still and alert.get("close_reason") == "data flowing again":
            said = (f"no new file from {_clock(alert['breach_started_at'])} to {_clock(alert['closed_at'])}, "
                    f"{spoken((alert['closed_at'] - alert['breach_started_at']).total_seconds())}")
    else:
        key = "max_lag"
        said = (f"newest data {_time_text(alert.get('newest_data_at'))} (data time), more than {key} behind the "
                f"clock since {_clock(alert['opened_at'])}") if still else \
            f"newest data more than {key} behind the clock from {_clock(alert['opened_at'])} to {_clock(alert['closed_at'])}"
        said += f", at most {spoken(alert.get('peak_value'))}"
    return f"{where}: {said} ({key} {duration_text(limit) if limit else '?'})"


def _clock(value: datetime | None) -> str:
    return f"{_time_text(value)} UTC"


def _time_text(value: datetime | None) -> str:
    return value.strftime("%Y-%m-%d %H:%M:%S") if value else "?"


def incident_cause(incident: dict[str, Any]) -> str:
    """'site_errors site=news', with the split value in brackets: the cause alert's series ('(silent)
    source=sessions' for a source alarm's)."""
    check = f"({incident['cause_alarm']})" if incident.get("cause_alarm") else incident["cause_check"] or "?"
    text = f"{check} {incident['cause_key_text'] or '(all sessions)'}"
    if incident["cause_split_value"] is not None:
        text += f" [{incident['cause_split_value']}]"
    return printable(text)
