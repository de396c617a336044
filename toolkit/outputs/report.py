"""The HTML report: one static page, the incidents first (each cause, where its excess lies, the alerts
it explains and the cause's series), then every alert's series drawn against its threshold.

The page needs no network to be read: styles are inline, every chart is an SVG drawn by matplotlib
and written into the page, and a Content-Security-Policy forbids scripts and any outside load. Text
from the data (check names, keys, split values) reaches the page only through Jinja2 autoescaping,
and inside the SVGs through matplotlib's XML escaping. The windows drawn come from SQL over the
warehouse (``queries/report.sql``); the page carries keys and counts, never a session identifier.
"""

from __future__ import annotations

import io
import re
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from importlib.resources import files
from pathlib import Path
from typing import Any

import duckdb
import jinja2
import markupsafe

from toolkit import __version__

from toolkit.engine import warehouse
from toolkit.sql.templates import template_folder
from toolkit.model import Check, Project
from toolkit.config.fields import duration_text
from toolkit.words import Reading, measure_text
from toolkit.outputs.listings import (alarm_line, alerts_from, cause_line, check_label, count_or_dash, excess_share_text,
                                      incident_cause, incidents_from, refuse_unknown_checks)

CONTEXT_BEFORE = 48   # windows drawn before an alert's first breaching window
CONTEXT_AFTER = 24    # windows drawn after the window that closed it
MAX_POINTS = 600      # a longer span is thinned (see queries/report.sql)


@dataclass
class Series:
    """The windows drawn for one alert, as columns."""

    window_end: list[datetime] = field(default_factory=list)
    plotted: list[float | None] = field(default_factory=list)
    threshold: list[float | None] = field(default_factory=list)
    breach: list[bool] = field(default_factory=list)
    ewma: bool = False  # the windows carry a statistic (EWMA or CUSUM): it is plotted, not the value
    statistic: str = "EWMA statistic"
    span_windows: int = 0
    thinned: bool = False

    @property
    def shown(self) -> int:
        return len(self.window_end)


@dataclass
class ReportResult:
    path: Path
    alerts: int
    open_alerts: int
    bytes: int
    incidents: int = 0


def write_report(project: Project, out: Path, checks: tuple[str, ...] = (),
                 since: datetime | None = None) -> ReportResult:
    """Render the report of the alerts matching ``checks`` and ``since`` into ``out``."""
    con = warehouse.open_for_reading(project)  # the published copies while a run holds the file
    try:
        refuse_unknown_checks(project, con, checks)
        alerts = alerts_from(con, "all", checks, since)
        incidents = incidents_from(con, "all", [a["alert_id"] for a in alerts])
        causes = [i["cause_alert_id"] for i in incidents if i["cause_alert_id"]]
        series = series_for(con, sorted({a["alert_id"] for a in alerts} | set(causes)))
        cause_alerts = {a["alert_id"]: a for a in alerts_from(con, "all")} if causes else {}
        earlier = earlier_incidents(con, alerts)
        newest = con.execute("SELECT max(window_end) FROM windows").fetchone()[0]
    finally:
        con.close()
    cards = [_card(project, a, series.get(a["alert_id"], Series()), earlier.get(a["alert_id"], 0)) for a in alerts]
    shown = {a["alert_id"]: a for a in alerts}
    incident_cards = [_incident_card(project, i, shown, cause_alerts.get(i["cause_alert_id"]),
                                     series.get(i["cause_alert_id"], Series()))
                      for i in incidents]
    html = render_page(
        title=f"Plimsoll report: {project.file.parent.name}",
        project=str(project.file), warehouse=str(project.warehouse),
        generated=datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        newest=_time(newest), filters=_filters(checks, since), cards=cards, incidents=incident_cards,
        context=(CONTEXT_BEFORE, CONTEXT_AFTER, MAX_POINTS), version=__version__,
    )
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    partial = out.with_name(out.name + ".partial")
    partial.write_text(html, encoding="utf-8")
    partial.replace(out)  # never a half-written page under the real name
    return ReportResult(out, len(alerts), sum(a["status"] == "open" for a in alerts), len(html.encode()),
                        len(incidents))


def series_for(con: duckdb.DuckDBPyConnection, alert_ids: list[str]) -> dict[str, Series]:
    """Each alert's windows around its breach, from ``queries/report.sql``."""
    if not alert_ids:
        return {}
    sql = (template_folder() / "report.sql").read_text(encoding="utf-8")
    rows = con.execute(sql, {"alert_ids": alert_ids, "before": CONTEXT_BEFORE, "after": CONTEXT_AFTER,
                             "max_points": MAX_POINTS}).fetchall()
    found: dict[str, Series] = {}
    for (alert_id, _seq, _start, end, _sessions, _bad, _value, statistic, threshold, breach, plotted,
         span_windows, thinned) in rows:
        s = found.setdefault(alert_id, Series())
        s.window_end.append(end)
        s.plotted.append(plotted)
        s.threshold.append(threshold)
        s.breach.append(bool(breach))
        s.ewma = s.ewma or statistic is not None
        s.span_windows, s.thinned = int(span_windows), bool(thinned)
    return found


def earlier_incidents(con: duckdb.DuckDBPyConnection, alerts: list[dict[str, Any]]) -> dict[str, int]:
    """How many alerts of the same series (fingerprint) opened before each one."""
    if not alerts:
        return {}
    rows = con.execute(
        """
        SELECT a.alert_id, count(e.alert_id)
        FROM alerts AS a
        LEFT JOIN alerts AS e ON e.fingerprint = a.fingerprint AND e.opened_at < a.opened_at
        WHERE list_contains($ids, a.alert_id)
        GROUP BY a.alert_id
        """,
        {"ids": [a["alert_id"] for a in alerts]},
    ).fetchall()
    return dict(rows)


def _incident_card(project: Project, incident: dict[str, Any], shown: dict[str, dict[str, Any]],
                   cause: dict[str, Any] | None, series: Series) -> dict[str, Any]:
    """One incident: its cause, where the cause's excess lies, the alerts it explains, the cause's chart."""
    explained = []
    for alert_id in incident["alert_ids"]:
        alert = shown.get(alert_id)
        label = (f"{check_label(alert)}: {alert['key_text'] or '(all sessions)'}"
                 + (f" [{alert['split_value']}]" if alert["split_value"] is not None else "")
                 + f" ({alert['status']})") if alert else f"alert {alert_id} (not in this report)"
        explained.append({"alert_id": alert_id, "label": label, "anchor": f"alert-{alert_id}" if alert else None,
                          "cause": alert_id == incident["cause_alert_id"]})
    check = project.checks.get(incident["cause_check"] or "")
    cusum = check is not None and check.baseline.method == "cusum"
    if cusum:
        series.statistic = "CUSUM statistic"
    chart = None
    if cause is not None and series.shown:
        chart = markupsafe.Markup(chart_svg(cause, series, None if cusum or check is None else check.measure.kind,
                                            salt=f"incident-{incident['incident_id']}",
                                            unit=check.measure.unit if check is not None else None))
    return {
        "incident": incident,
        "anchor": f"incident-{incident['incident_id']}",
        "cause": incident_cause(incident),
        "excess": [_cause_text(c, check) for c in incident["causes"]],
        "explained": explained,
        "figures": [
            ("status", incident["status"]),
            ("severity", incident["severity"] or "-"),
            ("opened", _time(incident["opened_at"])),
            ("closed", _time(incident["closed_at"]) or "still open"),
            ("alerts", f"{incident['alerts'] or 0:,}"),
            ("affected sessions", count_or_dash(incident["affected_sessions"])),
            ("affected viewers", "not counted" if incident["affected_viewers"] is None
             else f"{incident['affected_viewers']:,} (estimated)"),
            ("excess sessions", count_or_dash(incident["excess_sessions"])),
            ("incident id", incident["incident_id"]),
        ],
        "chart": chart,
        "alarm": alarm_line(cause) if cause is not None and cause.get("alarm") else None,
        "no_chart": NO_ALARM_CHART if incident.get("cause_alarm") else "No windows of the cause's series are in the warehouse.",
        "series": series,
        "direction": check.direction if check else None,
    }


NO_ALARM_CHART = "A source alarm has no windows: it compares the wall clock with the source's files and data."
ALARM_ABOUT = {
    "silent": "No new file arrived for the source for longer than its max_silence (wall-clock time).",
    "lagging": "The source's newest data time fell behind the wall clock by more than its max_lag.",
}


def _card_head(alert: dict[str, Any]) -> dict[str, Any]:
    """What every card starts with: the alert, its label and its anchor in the page."""
    return {"alert": alert, "label": check_label(alert), "anchor": f"alert-{alert['alert_id']}"}


def _status_figures(alert: dict[str, Any]) -> list[tuple[str, str]]:
    """A card's first figures: its status (with the close reason) and severity."""
    return [("status", alert["status"] + (f" ({alert['close_reason']})" if alert["close_reason"] else "")),
            ("severity", alert["severity"])]


def _alarm_card(alert: dict[str, Any], earlier: int) -> dict[str, Any]:
    """A source alarm's card: what it found and when (wall clock), no windows to chart."""
    limit = duration_text(timedelta(seconds=alert["threshold"])) if alert["threshold"] is not None else "?"
    silent = alert["alarm"] == "silent"
    return {
        **_card_head(alert),
        "figures": [
            *_status_figures(alert),
            ("source", alert["source_name"] or "?"),
            ("max_silence" if silent else "max_lag", limit),
            ("newest file arrived" if silent else "newest data (data time)",
             _time(alert["last_file_at"] if silent else alert["newest_data_at"])),
            ("opened (wall clock, UTC)", _time(alert["opened_at"])),
            ("last found", _time(alert["last_breach_at"])),
            ("closed", _time(alert["closed_at"]) or "still open"),
            ("what it found", alarm_line(alert)),
            ("earlier alerts of this alarm", str(earlier)),
            ("incident", alert.get("incident_id") or "none"),
            ("alert id", alert["alert_id"]),
            ("fingerprint", alert["fingerprint"]),
        ],
        "about": ALARM_ABOUT.get(alert["alarm"], ""),
        "direction": None,
        "chart": None,
        "no_chart": NO_ALARM_CHART,
        "series": Series(),
    }


def _cause_text(cause: dict[str, Any], check: Check | None) -> str:
    """'cdn=birch, country=DE: 69 failing sessions (1.5 expected), 81 % of the excess'; what is
    counted follows the measure (failing sessions of a rate, sessions beyond the threshold of a
    quantile or a falling ratio, the numerator of a rising ratio)."""
    share = excess_share_text(cause["excess_share"])
    where = cause["key_text"] or "the whole series (spread over every attribute value)"
    if check is None or check.measure.kind == "rate":
        counted = "failing sessions"
    elif check.measure.kind == "quantile" or check.direction != "up":
        counted = "sessions beyond the threshold"
    else:
        counted = "of the numerator"
    return f"{where}: {cause['bad']:,.0f} {counted} ({cause['expected']:,.1f} expected)" + (f", {share}" if share else "")


def _card(project: Project, alert: dict[str, Any], series: Series, earlier: int) -> dict[str, Any]:
    if alert.get("alarm"):
        return _alarm_card(alert, earlier)
    check = project.checks.get(alert["check_name"])
    kind = check.measure.kind if check else None
    reading = Reading(kind, check.measure.unit if check else None)

    def fmt(value: float | None) -> str:  # in the measure's unit, rounded for reading, as the listings say it
        return measure_text(value, reading)

    # a CUSUM's threshold h and statistic S count bad sessions, not a rate
    cusum = check is not None and check.baseline.method == "cusum"
    if cusum:
        series.statistic = "CUSUM statistic"
    return {
        **_card_head(alert),
        "figures": [
            *_status_figures(alert),
            ("breach started", _time(alert["breach_started_at"])),
            ("opened", _time(alert["opened_at"])),
            ("last breach", _time(alert["last_breach_at"])),
            ("closed", _time(alert["closed_at"]) or "still open"),
            ("breaching windows", f"{alert['breach_windows']:,}"),
            ("affected sessions", f"{alert['affected_sessions']:,}"),
            ("affected viewers", "not counted (the source has no viewer_id)" if alert["affected_viewers"] is None
             else f"{alert['affected_viewers']:,} (estimated)"),
            ("excess sessions", "-" if alert["excess_sessions"] is None
             else f"{count_or_dash(alert['excess_sessions'])} above the baseline rate"),
            ("affected per hour", f"{alert['affected_per_hour']:,.0f}"),
            ("peak value", fmt(alert["peak_value"])),
            ("threshold at opening", (_format_for(None) if cusum else fmt)(alert["threshold"])),
            ("earlier alerts of this series", str(earlier)),
            ("incident", alert.get("incident_id") or "none"),
            ("excess lies in", cause_line(alert["key_text"], alert.get("causes", []), alert.get("affected_sessions"))
             or "no cause found"),
            ("alert id", alert["alert_id"]),
            ("fingerprint", alert["fingerprint"]),
        ],
        "about": check.about if check else "",
        "direction": check.direction if check else None,
        "chart": markupsafe.Markup(chart_svg(alert, series, None if cusum else kind, unit=reading.unit))
        if series.shown else None,
        "no_chart": "No windows of this series are in the warehouse.",
        "series": series,
    }


def chart_svg(alert: dict[str, Any], series: Series, kind: str | None, salt: str | None = None,
              unit: str | None = None) -> str:
    """One alert's series against its threshold, breaching windows marked, as an inline SVG element.

    ``salt`` keeps the SVG's element ids apart from another chart of the same alert on the page."""
    import matplotlib
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
    from matplotlib.figure import Figure
    from matplotlib.ticker import PercentFormatter

    nan = float("nan")
    ys = [nan if v is None else v for v in series.plotted]
    ts = [nan if v is None else v for v in series.threshold]
    # svg.fonttype none: text stays <text> (small, selectable, escaped by matplotlib); the alert id as
    # hash salt keeps element ids deterministic and distinct between the charts of one page
    style = {"svg.fonttype": "none", "svg.hashsalt": salt or alert["alert_id"], "font.size": 9,
             "font.family": "sans-serif", "font.sans-serif": ["DejaVu Sans"],
             "axes.spines.top": False, "axes.spines.right": False}
    with matplotlib.rc_context(style), warnings.catch_warnings():
        # text is drawn by the browser (svg.fonttype none); a glyph matplotlib lacks is not a problem
        warnings.filterwarnings("ignore", message="Glyph .* missing from", category=UserWarning)
        fig = Figure(figsize=(8.6, 2.7), dpi=72, layout="constrained")
        FigureCanvasSVG(fig)
        ax = fig.add_subplot()
        label = series.statistic if series.ewma else "window value"
        ax.plot(series.window_end, ys, color="#1f5f8b", linewidth=1.3, label=label)
        ax.plot(series.window_end, ts, color="#b5651d", linewidth=1.1, linestyle="--", label="threshold")
        hits = [(x, y) for x, y, b in zip(series.window_end, ys, series.breach) if b]
        if hits:
            ax.plot([x for x, _ in hits], [y for _, y in hits], linestyle="none", marker="o", markersize=4.5,
                    color="#c0392b", label="breaching window")
        end = alert["closed_at"] or series.window_end[-1]
        ax.axvspan(alert["breach_started_at"], end, color="#c0392b", alpha=0.08, linewidth=0)
        title = alert["key_text"] or "(all sessions)"
        if alert["split_value"] is not None:
            title += f" [{alert['split_value']}]"
        ax.set_title(title, loc="left", fontsize=9, parse_math=False)
        ax.set_ylabel(f"{label} ({unit})" if unit and unit != "%" and kind != "rate" else label, parse_math=False)
        locator = AutoDateLocator()
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))
        if kind == "rate" or (kind is not None and unit == "%"):  # the check's unit: a fraction read as %
            ax.yaxis.set_major_formatter(PercentFormatter(1.0))
        ax.grid(True, color="#e5e5e5", linewidth=0.6)
        fig.legend(loc="outside lower center", fontsize=8, frameon=False, ncols=3)
        buffer = io.StringIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    text = buffer.getvalue()
    text = text[text.index("<svg"):]  # the element only: no XML prolog or DOCTYPE inside HTML
    return re.sub(r"\s*<metadata>.*?</metadata>", "", text, count=1, flags=re.S)  # RDF boilerplate


def render_page(**context: Any) -> str:
    return _environment().get_template("report.html").render(**context)


_ENV: jinja2.Environment | None = None


def _environment() -> jinja2.Environment:
    """HTML templates, autoescaped; separate from the SQL templates, which must not be escaped."""
    global _ENV
    if _ENV is None:
        _ENV = jinja2.Environment(
            loader=jinja2.FileSystemLoader(str(Path(str(files("toolkit.outputs"))) / "templates")),
            autoescape=True,
            undefined=jinja2.StrictUndefined,
            trim_blocks=True,
            lstrip_blocks=True,
        )
        _ENV.filters["time"] = _time
        _ENV.filters["count"] = count_or_dash
    return _ENV


def _format_for(kind: str | None):
    def fmt(value: float | None) -> str:
        if value is None:
            return "-"
        if kind == "rate":
            return f"{value * 100:.2f} %"
        return f"{value:,.4g}" if abs(value) < 1e4 else f"{value:,.0f}"

    return fmt


def _time(value: datetime | None) -> str:
    return value.strftime("%Y-%m-%d %H:%M:%S") if value else ""


def _filters(checks: tuple[str, ...], since: datetime | None) -> str:
    parts = [f"checks {', '.join(checks)}"] if checks else ["all checks"]
    if since:
        parts.append(f"opened at or after {_time(since)}")
    return "; ".join(parts)
