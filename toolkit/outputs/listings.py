"""Reading results back for people and scripts: alert listings as a table or JSON.

Listings carry keys and counts only, never a session or viewer identifier.
"""

from __future__ import annotations

import json
import math
from datetime import datetime
from typing import Any

import duckdb

from toolkit.engine import warehouse
from toolkit.model import Project

ALERT_COLUMNS = ("alert_id", "status", "severity", "check_name", "key", "key_text", "split_value", "opened_at",
                 "breach_started_at", "last_breach_at", "closed_at", "close_reason", "breach_windows",
                 "affected_sessions", "affected_viewers", "excess_sessions", "affected_per_hour", "peak_value",
                 "threshold", "fingerprint")


def list_alerts(project: Project, status: str = "all", checks: tuple[str, ...] = (),
                since: datetime | None = None) -> list[dict[str, Any]]:
    """Alerts, open ones first, newest first; filtered by status, check names and opening time.

    While a run holds the warehouse, this reads the copy the last run published.
    """
    con = warehouse.open_for_reading(project)
    try:
        return alerts_from(con, status, checks, since)
    finally:
        con.close()


def alerts_from(con: duckdb.DuckDBPyConnection, status: str = "all", checks: tuple[str, ...] = (),
                since: datetime | None = None) -> list[dict[str, Any]]:
    cols = ", ".join(ALERT_COLUMNS)
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
    return [dict(zip(ALERT_COLUMNS, row)) for row in rows]


def alerts_json(alerts: list[dict[str, Any]]) -> str:
    """A JSON list for scripts: the key as an object, data times as ``YYYY-MM-DD HH:MM:SS``."""

    def encode(value: Any) -> Any:
        if isinstance(value, float) and not math.isfinite(value):
            return None  # NaN and infinity are not JSON: strict parsers refuse them
        return value.isoformat(sep=" ") if isinstance(value, datetime) else value

    return json.dumps([{k: encode(v) for k, v in a.items()} for a in alerts], indent=2, ensure_ascii=False,
                      allow_nan=False)


def alerts_table(alerts: list[dict[str, Any]]) -> str:
    """A fixed-width table for a terminal; text from the data cannot move the cursor or add lines."""
    if not alerts:
        return "no alerts"
    head = ("status", "severity", "check", "key", "split", "opened", "windows", "affected", "viewers", "excess",
            "per hour")
    body = [
        (
            a["status"] if a["status"] == "open" else f"closed ({a['close_reason']})",
            a["severity"], a["check_name"], printable(a["key_text"] or "(all)"), printable(a["split_value"] or ""),
            a["opened_at"].strftime("%Y-%m-%d %H:%M"), str(a["breach_windows"]), f"{a['affected_sessions']:,}",
            count_or_dash(a.get("affected_viewers")), count_or_dash(a.get("excess_sessions")),
            f"{a['affected_per_hour']:,.0f}",
        )
        for a in alerts
    ]
    widths = [max(len(str(r[i])) for r in (head, *body)) for i in range(len(head))]
    lines = ["  ".join(str(c).ljust(w) for c, w in zip(row, widths)).rstrip() for row in (head, *body)]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def count_or_dash(value: float | int | None) -> str:
    """A count rounded to a whole number with thousands separators, or '-' where there is none (viewers
    without a source's viewer_id, excess of a ratio or quantile measure)."""
    return "-" if value is None else f"{round(value):,}"


def printable(text: str) -> str:
    """``text`` with control characters (newlines, terminal escapes) written as ``\\x..`` escapes."""
    return "".join(ch if ch.isprintable() else f"\\x{ord(ch):02x}" if ord(ch) < 256 else f"\\u{ord(ch):04x}"
                   for ch in text)
