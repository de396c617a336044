"""`plimsoll report`: one self-contained page, checked in a real headless browser and by its parts."""

from __future__ import annotations

import hashlib
import re
import subprocess
from datetime import timedelta
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

import browser
from browser import open_page
from conftest import PLAIN_PROJECT, write_project, write_rows
from incident_lake import HOSTILE_PLAYER, at
from known_lake import CHECK, HOSTILE, START, known_project, warehouse_held
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.outputs.report import MAX_POINTS, series_for


def invoke(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


class Elements(HTMLParser):
    """Tags seen, text per enclosing tag, and the text inside each chart's SVG."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.stack: list[str] = []
        self.text: list[str] = []
        self.svg_text: list[str] = []
        self.charts = 0
        self.links: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.links += [v or "" for k, v in attrs if k in ("src", "href", "xlink:href", "action", "data")]
        if tag == "svg" and self.stack and self.stack[-1] == "figure":
            self.charts += 1
        self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        while self.stack and self.stack.pop() != tag:
            pass

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if "svg" in self.stack:
            self.svg_text.append(data)


def parse(html: str) -> Elements:
    found = Elements()
    found.feed(html)
    return found


@pytest.fixture
def project(tmp_path: Path) -> Path:
    project = known_project(tmp_path)
    assert invoke("run", "-p", str(project)).exit_code == 0
    return project


def test_report_in_a_headless_browser(project: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    out = tmp_path / "report.html"
    result = invoke("report", "--out", str(out), "-p", str(project))
    assert result.exit_code == 0, result.output
    assert result.output.startswith(f"{out}: 2 alerts (1 open), ")
    launches = []
    started = subprocess.run

    def launch(command: list[str], **kwargs):
        launches.append(command)
        return started(command, **kwargs)

    monkeypatch.setattr(browser.subprocess, "run", launch)
    page = open_page(out, tmp_path / "report.png")
    monkeypatch.undo()
    assert len(launches) == 1, launches  # one load gives the DOM, the console and the screenshot
    assert page.console == []
    assert page.screenshot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    dom = parse(page.dom)
    assert dom.charts == 4  # each alert is its own incident: the incident's cause, then each alert
    assert "script" not in dom.tags  # the hostile title is text, not markup, in the page and in the SVG
    assert any(HOSTILE in t for t in dom.text)
    assert any(HOSTILE in t for t in dom.svg_text)
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in out.read_text()


def test_the_browser_check_sees_console_errors(tmp_path: Path) -> None:
    broken = tmp_path / "broken.html"
    broken.write_text("<!doctype html><title>t</title><p>x</p><script>notDefinedAnywhere();</script>")
    page = open_page(broken, tmp_path / "broken.png")
    assert any("Uncaught ReferenceError: notDefinedAnywhere is not defined" in m for m in page.console), page.console


def test_report_page_loads_nothing_from_outside(project: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.html"
    invoke("report", "--out", str(out), "-p", str(project))
    html = out.read_text()
    dom = parse(html)
    assert not {"script", "link", "img", "iframe", "object"} & set(dom.tags)
    assert dom.links and all(link.startswith("#") for link in dom.links)  # anchors within the page only
    assert "url(" not in html.replace("url(#", "")
    assert "default-src 'none'" in html


def test_open_alerts_come_first(project: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.html"
    invoke("report", "--out", str(out), "-p", str(project))
    html = out.read_text()
    summary = html[html.index('id="open"'):html.index('id="alerts"')]
    assert "Open alerts (1)" in summary and "&lt;script&gt;" in summary and "title_id=t-1" not in summary
    assert html.index("status</dt><dd>open<") < html.index("status</dt><dd>closed (recovered)<")


def test_report_filters(project: Path, tmp_path: Path) -> None:
    out = tmp_path / "late.html"
    result = invoke("report", "--out", str(out), "--since", "2026-11-02 00:50:00", "-p", str(project))
    assert result.exit_code == 0 and "1 alert (1 open), 1 incident" in result.output
    assert parse(out.read_text()).charts == 2  # its incident's cause, and the alert
    result = invoke("report", "--out", str(out), "--since", "2030-01-01", "-p", str(project))
    assert "0 alerts" in result.output and "No alerts match." in out.read_text()
    # a check no one has is a mistake, not an empty page: exit 2 naming the checks, the page left as it was
    before = out.read_text()
    result = invoke("report", "--out", str(out), "--check", "other", "-p", str(project))
    assert result.exit_code == 2 and result.output.endswith("--check: no check named 'other'; the checks are: "
                                                            "title_errors\n")
    assert out.read_text() == before


def test_report_before_any_run_says_so(tmp_path: Path) -> None:
    project = known_project(tmp_path)
    result = invoke("report", "--out", str(tmp_path / "r.html"), "-p", str(project))
    assert result.exit_code == 1 and "no warehouse yet" in result.output
    assert not (tmp_path / "r.html").exists()


def test_chart_data_comes_from_the_windows_with_the_ewma_statistic(tmp_path: Path) -> None:
    ewma = CHECK.replace("method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1",
                         "method: ewma, lambda: 0.5, history: 10, min_history: 3, target: 0.02, sigma: 0.05")
    project = load_project(known_project(tmp_path, checks={"c.yml": ewma}))
    assert invoke("run", "-p", str(project.file)).exit_code == 0
    con = duckdb.connect(str(project.warehouse), read_only=True)
    ids = [r[0] for r in con.execute("SELECT alert_id FROM alerts ORDER BY opened_at").fetchall()]
    assert ids
    series = series_for(con, ids)
    for alert_id in ids:
        expected = con.execute(
            "SELECT w.window_end, w.statistic, w.value, w.breach AND w.window_end BETWEEN a.opened_at AND "
            "a.last_breach_at FROM windows w JOIN alerts a "
            "ON a.key = w.key AND a.check_name = w.check_name WHERE a.alert_id = $a ORDER BY w.window_number",
            {"a": alert_id}).fetchall()
        s = series[alert_id]
        assert s.ewma and not s.thinned
        assert s.window_end == [r[0] for r in expected]
        assert s.plotted == [r[1] if r[1] is not None else r[2] for r in expected]
        assert any(r[1] is not None and r[1] != r[2] for r in expected)  # the statistic, not the value
        assert s.breach == [bool(r[3]) for r in expected]   # no verdict (NULL) is drawn as no breach
    con.close()


def test_each_chart_marks_only_its_own_alerts_breaching_windows(tmp_path: Path) -> None:
    # one series with two alerts (no reopening): each chart spans the other's windows too
    from known_lake import SCHEMA, session_rows
    bad = [0, 0, 0, 0, 6, 7, 0, 0, 0, 0, 0, 0, 8, 9, 0, 0]
    lake = write_rows(tmp_path / "lake", SCHEMA, session_rows({"t-1": bad}))
    check = CHECK.replace("lifecycle: {recover_after: 1, expire_after: 7d}",
                          "lifecycle: {recover_after: 1, expire_after: 7d, reopen_within: 0s}")
    project = load_project(write_project(tmp_path, {"c.yml": check}, PLAIN_PROJECT.format(lake=lake)))
    assert invoke("run", "-p", str(project.file)).exit_code == 0
    con = duckdb.connect(str(project.warehouse), read_only=True)
    alerts = con.execute("SELECT alert_id, opened_at, last_breach_at FROM alerts ORDER BY opened_at").fetchall()
    assert len(alerts) == 2
    series = series_for(con, [a[0] for a in alerts])
    con.close()
    for alert_id, opened, last in alerts:
        marked = [end for end, hit in zip(series[alert_id].window_end, series[alert_id].breach) if hit]
        assert len(series[alert_id].window_end) == len(bad)   # both alerts' windows are drawn
        assert marked and all(opened <= end <= last for end in marked), (alert_id, marked)
        assert len(marked) == 2


def test_a_long_series_is_thinned_and_keeps_its_spikes(tmp_path: Path) -> None:
    # one session per window, 3000 windows: every 250th window is a slow one that breaches
    slow = set(range(400, 3000, 250))
    rows = [(f"s{i}", START + timedelta(minutes=i), 9000 if i in slow else 1000 + i % 7) for i in range(3000)]
    lake = write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, startup_ms INTEGER", rows)
    check = """\
    check: startup
    source: sessions
    measure: {kind: quantile, of: startup_ms, q: 0.5}
    window: {sessions: 1, max_wait: 1h}
    baseline: {method: rolling_percentile, q: 0.9, history: 50, min_history: 20, factor: 2}
    lifecycle: {recover_after: 3000, expire_after: 30d}
    """
    project = write_project(tmp_path, {"s.yml": check}, PLAIN_PROJECT.format(lake=lake))
    assert invoke("run", "-p", str(project)).exit_code == 0
    out = tmp_path / "long.html"
    assert invoke("report", "--out", str(out), "-p", str(project)).exit_code == 0
    p = load_project(project)
    con = duckdb.connect(str(p.warehouse), read_only=True)
    (alert_id, opened_at), = con.execute("SELECT alert_id, opened_at FROM alerts").fetchall()
    s = series_for(con, [alert_id])[alert_id]
    con.close()
    assert opened_at == START + timedelta(minutes=400)
    assert s.thinned and s.shown <= MAX_POINTS and s.span_windows == 3000 - 400 + 48
    drawn_breaches = {t for t, b in zip(s.window_end, s.breach) if b}
    assert drawn_breaches == {START + timedelta(minutes=i) for i in slow}
    assert max(s.plotted) == 9000
    html = out.read_text()
    assert f"thinned: {s.shown:,} of 2,648 windows drawn" in html
    assert len(html.encode()) < 120_000


def test_report_and_alerts_read_the_published_copies_while_a_run_holds_the_warehouse(
        project: Path, tmp_path: Path) -> None:
    with warehouse_held(tmp_path / "w.duckdb"):
        out = tmp_path / "while-running.html"
        result = invoke("report", "--out", str(out), "-p", str(project))
        assert result.exit_code == 0, result.output
        assert parse(out.read_text()).charts == 4
        listed = invoke("alerts", "--status", "open", "-p", str(project))
        assert listed.exit_code == 0 and HOSTILE in listed.output


def test_a_cusum_alert_shows_its_statistic_and_h_as_counts(tmp_path: Path) -> None:
    cusum = CHECK.replace("method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1",
                          "method: cusum, shift: 2, in_control_sessions: 200, history: 10, min_history: 3")
    project = load_project(known_project(tmp_path, checks={"c.yml": cusum}))
    assert invoke("run", "-p", str(project.file)).exit_code == 0
    con = duckdb.connect(str(project.warehouse), read_only=True)
    (threshold,) = con.execute("SELECT threshold FROM alerts ORDER BY opened_at LIMIT 1").fetchone()
    con.close()
    assert invoke("report", "-p", str(project.file), "--out", str(tmp_path / "r.html")).exit_code == 0
    page = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "CUSUM statistic" in page and "EWMA statistic" not in page
    # h is a count of excess bad sessions, not a rate: shown as a number, not a percentage
    assert f"{threshold:,.4g}" in page and f"{threshold * 100:.2f} %" not in page


# ── incidents ───────────────────────────────────────────────────────────────────────────────────────
# over the incidents and causes real runs computed on the lake of tests/incident_lake.py


@pytest.fixture
def with_incidents(tmp_path: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return at(tmp_path_factory, tmp_path / "p")


def test_the_page_opens_with_the_incidents(with_incidents: Path, tmp_path: Path) -> None:
    project = with_incidents
    out = tmp_path / "report.html"
    result = invoke("report", "--out", str(out), "-p", str(project))
    assert result.exit_code == 0 and result.output.startswith(f"{out}: 8 alerts (3 open), 4 incidents, ")
    html = out.read_text()
    dom = parse(html)
    assert dom.charts == 4 + 8  # each incident's cause, then each alert
    head = html[html.index('id="incidents"'):html.index('id="open"')]
    assert "Incidents (4), newest first" in head
    order = [head.index(f'id="incident-{i}"') for i in ("5ba65235a6aec75c", "fdb4fe30b5f82899", "d9f1e7ec9e39f425",
                                                        "c3a1e7d355a53142")]
    assert order == sorted(order)
    birch = head[head.index('id="incident-c3a1e7d355a53142"'):]
    assert "cause: cdn_country cdn=birch, country=DE" in birch
    # only the cause alert's significant causes, never the rows below them
    assert "<li>site=sport: 95 failing sessions (2.1 expected), 52 % of the excess</li>" in birch
    assert "<li>site=news: 88 failing sessions (3.2 expected), 48 % of the excess</li>" in birch
    assert "country=DE: 103" not in birch and "player=7.1" not in head
    # the alerts it explains link to their cards, and every link has its target on the page
    ids = dict(_query(project, "SELECT key_text || ' ' || strftime(opened_at, '%H:%M'), alert_id FROM alerts"))
    assert f'<a href="#alert-{ids["site=news 16:30"]}">site: site=news (closed)</a>' in birch
    targets = set(re.findall(r' id="([^"]+)"', html))
    assert all(link[1:] in targets for link in dom.links if link.startswith("#alert-"))
    # hostile text from the data is text
    assert "player=&lt;img src=x onerror=alert(2)&gt;: 5 failing sessions (0.5 expected), 70 % of the excess" in head
    assert HOSTILE_PLAYER not in html and "script" not in dom.tags and "img" not in dom.tags
    # each alert's card names its incident and where its excess lies
    card = html[html.index(f'id="alert-{ids["site=news 16:30"]}"'):]
    assert "<dt>incident</dt><dd>c3a1e7d355a53142</dd>" in card
    assert ("<dt>excess lies in</dt><dd>site=news: 107 sessions affected, 95 % of the excess in "
            "cdn=birch, country=DE</dd>") in card


def _query(project: Path, sql: str) -> list[tuple]:
    con = duckdb.connect(str(load_project(project).warehouse), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_the_incidents_follow_the_alerts_chosen(with_incidents: Path, tmp_path: Path) -> None:
    out = tmp_path / "late.html"
    result = invoke("report", "--out", str(out), "--since", "2026-11-03 05:00:00", "-p", str(with_incidents))
    assert "4 alerts (3 open), 2 incidents" in result.output
    html = out.read_text()
    assert 'id="incident-5ba65235a6aec75c"' in html and 'id="incident-fdb4fe30b5f82899"' in html
    assert "c3a1e7d355a53142" not in html
    assert parse(html).charts == 2 + 4


def test_a_report_without_incidents_says_so(tmp_path: Path, tmp_path_factory: pytest.TempPathFactory) -> None:
    project = at(tmp_path_factory, tmp_path / "p", step=3)  # four hours read: no alert yet
    out = tmp_path / "report.html"
    result = invoke("report", "--out", str(out), "-p", str(project))
    assert result.exit_code == 0 and ", 0 incidents, " in result.output
    html = out.read_text()
    assert "Incidents (0), newest first" in html and "No incidents" in html
    assert parse(html).charts == 0


def test_an_alert_without_causes_says_so(project: Path, tmp_path: Path) -> None:
    # the known lake has no attributes: each alert is its own incident, with nothing to explain it by
    out = tmp_path / "report.html"
    assert invoke("report", "--out", str(out), "-p", str(project)).exit_code == 0
    html = out.read_text()
    assert html.count("<dt>excess lies in</dt><dd>no cause found</dd>") == 2
    for (alert_id,) in _query(project, "SELECT alert_id FROM alerts"):
        incident = hashlib.md5(f"incident {alert_id}".encode()).hexdigest()[:16]
        assert f"<dt>incident</dt><dd>{incident}</dd>" in html[html.index(f'id="alert-{alert_id}"'):]


def test_the_incidents_page_in_a_headless_browser(with_incidents: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.html"
    assert invoke("report", "--out", str(out), "-p", str(with_incidents)).exit_code == 0
    page = open_page(out, tmp_path / "report.png")
    assert page.console == []
    dom = parse(page.dom)
    assert dom.charts == 4 + 8
    assert "script" not in dom.tags and "img" not in dom.tags
    assert any(HOSTILE_PLAYER in t for t in dom.text)


def test_figures_and_charts_read_in_the_checks_unit(tmp_path: Path) -> None:
    ratio = CHECK.replace("measure: {kind: rate, bad: error_code IS NOT NULL}",
                          "measure: {kind: ratio, numerator: 'CASE WHEN error_code IS NULL THEN 0 ELSE 1000 END', "
                          "denominator: '1', unit: ms}").replace("guard: {min_sessions: 5, min_bad: 2}",
                                                                  "guard: {min_sessions: 5}").replace(
        "floor: 0.1", "floor: 100")
    project = known_project(tmp_path, checks={"c.yml": ratio})
    assert invoke("run", "-p", str(project)).exit_code == 0
    out = tmp_path / "r.html"
    assert invoke("report", "--out", str(out), "-p", str(project)).exit_code == 0
    page = out.read_text()
    assert "peak value</dt><dd>800 ms<" in page and "threshold at opening</dt><dd>100 ms<" in page
    assert "window value (ms)" in page
    listed = invoke("alerts", "-p", str(project)).output
    assert "800 ms" in listed and "100 ms" in listed
