"""Impact: excess sessions of rate alerts, affected sessions of ratio and quantile alerts counted
session by session, and distinct viewers estimated with a HyperLogLog sketch computed in SQL.

Reference: P. Flajolet, É. Fusy, O. Gandouet, F. Meunier, "HyperLogLog: the analysis of a
near-optimal cardinality estimation algorithm", AofA 2007 (DMTCS proc. AH, 127-146): with m
registers the relative standard error is about 1.04/√m (m = 1024: 3.25 %); α_m = 0.7213/(1 + 1.079/m)
for m ≥ 128; below 5m/2 the estimate is linear counting, m·ln(m/V) with V empty registers;
registers of two sketches merge by element-wise maximum (the sketch of the union).
"""

from __future__ import annotations

import hashlib
import json
import math
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from conftest import PLAIN_PROJECT, write_project, write_rows

from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.engine import warehouse
from toolkit.sql.templates import shared

M = 1024
STANDARD_ERROR = 1.04 / math.sqrt(M)  # Flajolet et al. 2007, about 3.25 % for m = 1024


def _macros():
    return shared().get_template("macros.sql").module


def _sketch_sql(values: str) -> str:
    """The sketch of the viewers ``values`` (a query of one column v), as the impact stage builds it."""
    point = _macros().viewer_point("v")
    return (f"SELECT list(point ORDER BY point) AS sketch FROM (SELECT max({point}) AS point "
            f"FROM ({values}) WHERE v IS NOT NULL GROUP BY ({point}) // 64)")


def _estimate(con: duckdb.DuckDBPyConnection, sketch_query: str) -> int:
    return con.execute(f"SELECT {_macros().hll_estimate('sketch')} FROM ({sketch_query})").fetchone()[0]


def _viewers(prefix: str, n: int) -> str:
    return f"SELECT '{prefix}-' || i AS v FROM range({n}) AS t(i)"


def test_a_viewer_point_is_register_and_rank_of_the_md5s_first_64_bits() -> None:
    # independent of the SQL: hashlib's md5, the top 10 bits the register, the rank the position of
    # the first 1-bit among the other 54 (55 when they are all 0)
    con = duckdb.connect()
    for viewer in ("v-1", "fernhill-viewer-42", "ünïcode", "", "12345"):
        h = int.from_bytes(hashlib.md5(viewer.encode()).digest()[:8], "big")
        register, rest = h >> 54, h & ((1 << 54) - 1)
        rank = 55 if rest == 0 else 54 - rest.bit_length() + 1
        got = con.execute(f"SELECT {_macros().viewer_point('$v')}", {"v": viewer}).fetchone()[0]
        assert got == register * 64 + rank, viewer
    assert con.execute(f"SELECT {_macros().viewer_point('NULL::VARCHAR')}").fetchone()[0] is None


@pytest.mark.parametrize("n", [1, 7, 60, 300, 1_000, 2_000, 2_600, 5_000, 20_000, 100_000, 400_000])
def test_the_estimate_is_within_three_standard_errors_of_the_exact_count(n: int) -> None:
    con = duckdb.connect()
    got = _estimate(con, _sketch_sql(_viewers(f"viewer-{n}", n)))
    exact = con.execute(f"SELECT count(DISTINCT v) FROM ({_viewers(f'viewer-{n}', n)})").fetchone()[0]
    assert exact == n
    assert abs(got - n) <= max(3 * STANDARD_ERROR * n, 1), (n, got)


def test_a_fixed_seed_case_is_within_two_percent() -> None:
    # 50,000 viewers seen 150,000 times (each three times): repeats change nothing. ±2 % is narrower
    # than one standard error (3.25 %), so this pins one fixed set of viewers (it gives 49,473,
    # −1.05 %); the statistical check is the three-standard-error test above, and the exact value
    # is recomputed below from the same hashes by a plain-Python HyperLogLog
    con = duckdb.connect()
    values = "SELECT 'fernhill-viewer-' || (i % 50000) AS v FROM range(150000) AS t(i)"
    got = _estimate(con, _sketch_sql(values))
    assert abs(got - 50_000) <= 0.02 * 50_000, got
    registers = [0] * M
    for i in range(50_000):
        h = int.from_bytes(hashlib.md5(f"fernhill-viewer-{i}".encode()).digest()[:8], "big")
        rest = h & ((1 << 54) - 1)
        registers[h >> 54] = max(registers[h >> 54], 55 - rest.bit_length())
    alpha = 0.7213 / (1 + 1.079 / M)
    raw = alpha * M * M / sum(2.0 ** -r for r in registers)
    empty = registers.count(0)
    expected = M * math.log(M / empty) if raw <= 2.5 * M and empty else raw
    assert got == round(expected)


def test_small_counts_use_linear_counting_and_are_nearly_exact() -> None:
    # below 5m/2 = 2560 the estimate is m·ln(m/V); a handful of viewers in distinct registers is exact
    con = duckdb.connect()
    for n in (0, 1, 2, 5, 10):
        values = _viewers("few", n) if n else "SELECT NULL::VARCHAR AS v"
        sketch = f"SELECT coalesce(sketch, []::INTEGER[]) AS sketch FROM ({_sketch_sql(values)})"
        assert _estimate(con, sketch) == n


def test_sketches_merge_by_the_largest_rank_of_each_register_into_the_sketch_of_the_union() -> None:
    con = duckdb.connect()
    a = "SELECT 'viewer-' || i AS v FROM range(0, 30000) AS t(i)"
    b = "SELECT 'viewer-' || i AS v FROM range(20000, 45000) AS t(i)"
    union = f"{a} UNION ALL {b}"
    merged = con.execute(f"""
        SELECT list(point ORDER BY point) FROM (
            SELECT max(point) AS point
            FROM (SELECT unnest(sketch) AS point FROM ({_sketch_sql(a)})
                  UNION ALL SELECT unnest(sketch) FROM ({_sketch_sql(b)}))
            GROUP BY point // 64)""").fetchone()[0]
    assert merged == con.execute(_sketch_sql(union)).fetchone()[0]
    assert abs(_estimate(con, _sketch_sql(union)) - 45_000) <= 3 * STANDARD_ERROR * 45_000


# ── a run over a known lake ─────────────────────────────────────────────────────────────────────

START = datetime(2026, 11, 2)
SCHEMA = ("session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, viewer VARCHAR, error_code VARCHAR, "
          "rebuffer_ms DOUBLE, play_ms DOUBLE, startup_ms DOUBLE")
BAD_PER_HOUR = [2, 2, 2, 2, 10, 6, 2]
# the viewers of the bad sessions of hours 4 and 5, in order: viewers retry
BAD_VIEWERS = {4: ["viewer-secret-a"] * 4 + ["viewer-secret-b"] * 3 + ["viewer-secret-c"] * 2 + ["viewer-secret-d"],
               5: ["viewer-secret-d"] * 2 + ["viewer-secret-e"] * 2 + ["viewer-secret-f"] * 2}


def impact_rows() -> list[tuple]:
    """One site, 20 sessions an hour for 7 hours. Session i of hour h fails when i < bad[h]; in hour 4
    sessions 0-4 stall for 90 % of their time (the others 5 %; session 19 played nothing) and
    sessions 0-11 start in 3000 ms (the others in 1000 ms; session 18 has no startup time)."""
    rows = []
    for h, bad in enumerate(BAD_PER_HOUR):
        for i in range(20):
            viewer = BAD_VIEWERS[h][i] if h in BAD_VIEWERS and i < bad else f"viewer-secret-ok-{h}-{i}"
            rebuffer, play = (90.0, 10.0) if h == 4 and i < 5 else (5.0, 95.0)
            if h == 4 and i == 19:
                rebuffer, play = 0.0, 0.0
            startup = 3000.0 if h == 4 and i < 12 else 1000.0
            if h == 4 and i == 18:
                startup = None
            rows.append((f"s-{h}-{i}", START + timedelta(hours=h, minutes=3 * i), "kids", viewer,
                         "E42" if i < bad else None, rebuffer, play, startup))
    return rows


RATE = """\
check: failures
source: sessions
by: [site]
measure: {kind: rate, bad: error_code IS NOT NULL}
window: {sessions: 20, max_wait: 1d}
baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.1}
guard: {min_sessions: 5, min_bad: 2}
lifecycle: {recover_after: 1}
"""
RATIO = """\
check: stalls
source: sessions
by: [site]
measure: {kind: ratio, numerator: rebuffer_ms, denominator: play_ms + rebuffer_ms}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 0.2}
"""
QUANTILE = """\
check: slow_starts
source: sessions
by: [site]
measure: {kind: quantile, of: startup_ms, q: 0.5}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 10, min_history: 3, factor: 1, floor: 2000}
"""


def impact_project(folder: Path, viewers: bool = True) -> Path:
    lake = write_rows(folder / "lake", SCHEMA, impact_rows())
    text = PLAIN_PROJECT.format(lake=lake) + ("    viewer_id: viewer\n" if viewers else "")
    return write_project(folder, {"failures.yml": RATE, "stalls.yml": RATIO, "slow_starts.yml": QUANTILE}, text)


def _query(project: Path, sql: str) -> list[tuple]:
    con = duckdb.connect(str(project.parent / "w.duckdb"), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_excess_affected_and_viewers_against_a_hand_count(tmp_path: Path) -> None:
    project = impact_project(tmp_path)
    run(load_project(project))
    # rate: hours 4 and 5 breach (10 and 6 bad of 20 against a baseline of 0.1): excess
    # 10 − 20 × 0.1 = 8 and 6 − 2 = 4; affected 10 + 6; viewers a, b, c, d then d, e, f: 4, then 6
    assert _query(project, "SELECT window_number, affected_sessions, round(excess_sessions, 9), len(viewer_sketch) "
                           "FROM windows WHERE check_name = 'failures' AND breach ORDER BY 1") == [
        (5, 10, 8.0, 4), (6, 6, 4.0, 3)]
    assert _query(project, "SELECT affected_sessions, excess_sessions IS NULL, viewer_sketch IS NULL FROM windows "
                           "WHERE check_name = 'failures' AND NOT breach GROUP BY ALL") == [(None, True, True)]
    assert _query(project, "SELECT status, breach_windows, affected_sessions, round(excess_sessions, 9), "
                           "affected_viewers FROM alerts WHERE check_name = 'failures'") == [
        ("closed", 2, 16, 12.0, 6)]
    assert _query(project, "SELECT e.event, e.affected_sessions, round(e.excess_sessions, 9), e.affected_viewers "
                           "FROM alert_events AS e JOIN alerts USING (alert_id) WHERE check_name = 'failures' "
                           "ORDER BY e.occurred_at, e.event DESC") == [
        ("opened", 10, 8.0, 4), ("updated", 16, 12.0, 6), ("closed", 16, 12.0, 6)]
    # ratio: hour 4's ratio 520/1900 = 0.27 breaches the floor 0.2; only sessions 0-4 (0.9 each) are
    # beyond it (session 19's own value is 0/0: none); their viewers: a (0-3) and b (4)
    # quantile: hour 4's median 3000 breaches 2000; sessions 0-11 are beyond it (session 18 has no
    # value): viewers a, b, c, d and the two good sessions 10 and 11
    assert _query(project, "SELECT check_name, affected_sessions, excess_sessions, affected_viewers FROM alerts "
                           "WHERE check_name <> 'failures' ORDER BY 1") == [
        ("slow_starts", 12, None, 6), ("stalls", 5, None, 2)]
    assert _query(project, "SELECT check_name, sessions, affected_sessions FROM windows WHERE breach ORDER BY 1") == [
        ("failures", 20, 10), ("failures", 20, 6), ("slow_starts", 20, 12), ("stalls", 20, 5)]


def test_without_viewer_id_viewers_are_null_and_the_rest_is_the_same(tmp_path: Path) -> None:
    project = impact_project(tmp_path, viewers=False)
    run(load_project(project))
    assert _query(project, "SELECT check_name, affected_sessions, round(excess_sessions, 9), affected_viewers, "
                           "viewer_sketch FROM alerts ORDER BY 1") == [
        ("failures", 16, 12.0, None, None), ("slow_starts", 12, None, None, None), ("stalls", 5, None, None, None)]
    assert _query(project, "SELECT count(*) FROM windows WHERE viewer_sketch IS NOT NULL") == [(0,)]
    assert _query(project, "SELECT count(*) FROM alert_events WHERE affected_viewers IS NOT NULL") == [(0,)]


def test_an_alert_open_across_runs_merges_its_sketch(tmp_path: Path) -> None:
    # hours 0-4 in one run, 5-6 in the next: the alert opened in the first run grows in the second,
    # its sketch merged with the new window's, and ends as one run over everything ends
    rows = impact_rows()
    once = impact_project(tmp_path / "once")
    run(load_project(once))
    lake = tmp_path / "twice" / "lake"
    write_rows(lake, SCHEMA, [r for r in rows if r[1] < START + timedelta(hours=5)], "a.parquet")
    text = PLAIN_PROJECT.format(lake=lake) + "    viewer_id: viewer\n"
    twice = write_project(tmp_path / "twice", {"failures.yml": RATE, "stalls.yml": RATIO, "slow_starts.yml": QUANTILE},
                          text)
    run(load_project(twice))
    write_rows(lake, SCHEMA, [r for r in rows if r[1] >= START + timedelta(hours=5)], "b.parquet")
    run(load_project(twice))
    columns = ("SELECT alert_id, status, affected_sessions, round(excess_sessions, 9), affected_viewers, viewer_sketch "
               "FROM alerts ORDER BY 1")
    assert _query(twice, columns) == _query(once, columns)
    events = ("SELECT alert_id, occurred_at, event, affected_sessions, round(excess_sessions, 9), affected_viewers "
              "FROM alert_events ORDER BY ALL")
    assert _query(twice, events) == _query(once, events)
    # a rebuild runs every stage in the run's transaction, the sessions on the same connection
    run(load_project(twice), rebuild=True)
    assert _query(twice, columns) == _query(once, columns)
    assert _query(twice, events) == _query(once, events)


def test_no_viewer_id_is_stored_or_shown(tmp_path: Path) -> None:
    project = impact_project(tmp_path)
    run(load_project(project))
    con = duckdb.connect(str(project.parent / "w.duckdb"), read_only=True)
    try:
        tables = [r[0] for r in con.execute("SELECT table_name FROM duckdb_tables() WHERE NOT temporary").fetchall()]
        for table in tables:
            text = json.dumps(con.execute(f"SELECT * FROM {table}").fetchall(), default=str)
            assert "viewer-secret" not in text, table
    finally:
        con.close()
    for copy in (project.parent / "w_tables").glob("*.parquet") if (project.parent / "w_tables").exists() else ():
        assert b"viewer-secret" not in copy.read_bytes()


def test_listings_report_and_payloads_show_viewers_and_excess_and_no_viewer_id(tmp_path: Path) -> None:
    import threading
    from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

    from toolkit.outputs.delivery import notify
    from toolkit.outputs.listings import alerts_json, alerts_table, list_alerts
    from toolkit.outputs.report import write_report

    bodies: list[bytes] = []

    class Sink(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 (http.server's name)
            bodies.append(self.rfile.read(int(self.headers["Content-Length"])))
            self.send_response(200)
            self.end_headers()

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Sink)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        project_file = impact_project(tmp_path)
        text = project_file.read_text() + (f"webhooks:\n  - url: http://127.0.0.1:{server.server_port}/hook\n"
                                           "    catch_up: 52w\nnotify:\n  growth: 0\n")
        project_file.write_text(text)
        project = load_project(project_file)
        run(project)
        assert len(notify(project).delivered) == len(bodies) > 0
    finally:
        server.shutdown()
        server.server_close()

    alerts = list_alerts(project)
    table = alerts_table(alerts).splitlines()
    assert table[0].split() == ["status", "severity", "check", "key", "split", "worst", "threshold", "opened",
                                "windows", "affected", "viewers", "excess", "per", "hour", "incident"]
    # from the check on: check, key, worst, threshold, opened (two words), windows, affected, viewers, excess
    rows = {words[words.index("medium") + 1]: words[words.index("medium") + 1:] for words in map(str.split, table[2:])}
    assert rows["failures"][7:10] == ["16", "6", "12"]
    assert rows["stalls"][7:10] == ["5", "2", "-"]
    listed = {a["check_name"]: a for a in json.loads(alerts_json(alerts))}
    assert (listed["failures"]["affected_viewers"], listed["failures"]["excess_sessions"]) == (6, pytest.approx(12.0))
    assert (listed["slow_starts"]["affected_viewers"], listed["slow_starts"]["excess_sessions"]) == (6, None)

    page = tmp_path / "report.html"
    write_report(project, page)
    html = page.read_text(encoding="utf-8")
    assert "affected viewers" in html
    assert "6 (estimated)" in html and "12 above the baseline rate" in html

    payloads = [json.loads(b) for b in bodies]
    closed = [p for p in payloads if p["check"] == "failures" and p["event"] == "closed"]
    assert [(p["affected_sessions"], p["affected_viewers"], p["excess_sessions"]) for p in closed] == [(16, 6, 12.0)]
    opened = [p for p in payloads if p["check"] == "stalls" and p["event"] == "opened"]
    assert [(p["affected_sessions"], p["affected_viewers"], p["excess_sessions"]) for p in opened] == [(5, 2, None)]
    for shown in (html, "\n".join(table), alerts_json(alerts), *(b.decode() for b in bodies)):
        assert "viewer-secret" not in shown


def test_a_layout_3_file_is_converted_with_its_rate_impact_filled_in(tmp_path: Path) -> None:
    # A warehouse as layout 3 wrote it (no viewer_id then): hours 0-5 read, the rate alert open with
    # two breaching windows, the ratio and quantile alerts open with one. The conversion fills the
    # rate check's impact from its stored windows; ratio and quantile windows cannot be recounted.
    rows = impact_rows()
    lake = tmp_path / "lake"
    write_rows(lake, SCHEMA, [r for r in rows if r[1] < START + timedelta(hours=6)], "a.parquet")
    project_file = write_project(tmp_path, {"failures.yml": RATE, "stalls.yml": RATIO, "slow_starts.yml": QUANTILE},
                                 PLAIN_PROJECT.format(lake=lake))
    run(load_project(project_file))
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    for table, column in (("carry", "viewer_point"), ("windows", "affected_sessions"), ("windows", "excess_sessions"),
                          ("windows", "viewer_sketch"), ("alerts", "excess_sessions"), ("alerts", "affected_viewers"),
                          ("alerts", "viewer_sketch"), ("alert_events", "excess_sessions"),
                          ("alert_events", "affected_viewers")):
        con.execute(f"ALTER TABLE {table} DROP COLUMN {column}")
    # layout 3 counted every session of a breaching ratio or quantile window as affected
    con.execute("UPDATE alerts SET affected_sessions = 20 WHERE check_name <> 'failures'")
    con.execute("UPDATE alert_events SET affected_sessions = 20 WHERE alert_id IN "
                "(SELECT alert_id FROM alerts WHERE check_name <> 'failures')")
    # nor the causes and incidents of layout 5
    for table in ("alert_causes", "incidents", "incident_events"):
        con.execute(f"DROP TABLE {table}")
    con.execute("ALTER TABLE alerts DROP COLUMN incident_id")
    con.execute("ALTER TABLE outbox DROP COLUMN incident_id")
    con.execute("UPDATE schema_version SET version = 3")
    con.close()

    # the last hour lands: the rate alert closes, the others stay open (one healthy window)
    write_rows(lake, SCHEMA, [r for r in rows if r[1] >= START + timedelta(hours=6)], "b.parquet")
    run(load_project(project_file))
    assert _query(project_file, "SELECT version FROM schema_version") == [(warehouse.SCHEMA_VERSION,)]
    assert _query(project_file, "SELECT check_name, window_end, affected_sessions, round(excess_sessions, 9) "
                                "FROM windows WHERE breach ORDER BY 1, 2") == [
        ("failures", START + timedelta(hours=4, minutes=57), 10, 8.0),
        ("failures", START + timedelta(hours=5, minutes=57), 6, 4.0),
        ("slow_starts", START + timedelta(hours=5), None, None), ("stalls", START + timedelta(hours=5), None, None)]
    assert _query(project_file, "SELECT check_name, status, affected_sessions, round(excess_sessions, 9), "
                                "affected_viewers FROM alerts ORDER BY 1") == [
        ("failures", "closed", 16, 12.0, None), ("slow_starts", "open", 20, None, None),
        ("stalls", "open", 20, None, None)]
    assert _query(project_file, "SELECT e.event, e.affected_sessions, round(e.excess_sessions, 9) "
                                "FROM alert_events AS e JOIN alerts USING (alert_id) WHERE check_name = 'failures' "
                                "ORDER BY e.occurred_at, e.event DESC") == [
        ("opened", 10, 8.0), ("updated", 16, 12.0), ("closed", 16, 12.0)]
    # the run after the conversion groups every alert, the earlier ones too, into incidents
    assert _query(project_file, "SELECT count(*) FROM alerts WHERE incident_id IS NULL") == [(0,)]


def test_a_viewer_id_the_lake_does_not_have_is_one_line_naming_the_file_and_line(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from toolkit.cli import main

    project = impact_project(tmp_path)
    project.write_text(project.read_text().replace("viewer_id: viewer", "viewer_id: viewr"))
    result = CliRunner().invoke(main, ["validate", "-p", str(project)])
    assert result.exit_code == 2
    assert result.output == (f"{project}:7: sources.sessions.viewer_id: unknown column 'viewr' "
                             "(did you mean 'viewer'?) in source 'sessions'\n")
    assert not (tmp_path / "w.duckdb").exists()


def test_on_the_demo_lake_affected_sessions_are_exact_and_viewers_within_the_error(
        tmp_path: Path, fernhill_lake) -> None:
    # The catalogue over the shared 300,000-session demo lake (its viewers retry: several sessions
    # each). For the ratio and quantile checks, every breaching window's affected sessions and the
    # distinct viewers among them are recounted from the lake's rows by plain SQL over the files.
    project_file = fernhill_lake.project(tmp_path / "demo")
    run(load_project(project_file))
    con = duckdb.connect()
    con.execute(f"ATTACH '{tmp_path / 'demo' / 'warehouse.duckdb'}' AS w (READ_ONLY)")
    lake = f"read_parquet('{fernhill_lake.path}/**/*.parquet', hive_partitioning = true)"
    own = {"rebuffering_by_site": ("site", "s.rebuffer_ms::DOUBLE / nullif(s.play_ms + s.rebuffer_ms, 0) > b.threshold",
                                   "true"),
           "startup_time_by_device": ("device_family", "s.startup_ms > b.threshold", "s.startup_ms IS NOT NULL")}
    compared = 0
    for check, (column, beyond, where) in own.items():
        exact = con.execute(f"""
            SELECT a.alert_id, count(*), count(DISTINCT s.viewer_id)
            FROM w.alerts AS a
            JOIN w.windows AS b ON b.check_name = a.check_name AND b.key = a.key AND b.breach
                AND b.window_end BETWEEN a.opened_at AND a.last_breach_at
            JOIN {lake} AS s ON s.{column} = b.key['{column}']
                AND s.ended_at >= b.window_start AND s.ended_at < b.window_end
            WHERE a.check_name = '{check}' AND {where} AND {beyond}
              AND NOT (s.is_bot OR regexp_matches(s.user_agent, '(?i)(bot|crawler|spider)'))
            GROUP BY a.alert_id ORDER BY 1""").fetchall()
        stored = con.execute(f"SELECT alert_id, affected_sessions, affected_viewers FROM w.alerts "
                             f"WHERE check_name = '{check}' ORDER BY 1").fetchall()
        assert [(a, n) for a, n, _ in stored] == [(a, n) for a, n, _ in exact]
        for (_, _, estimate), (_, _, viewers) in zip(stored, exact):
            assert abs(estimate - viewers) <= max(3 * STANDARD_ERROR * viewers, 1), (check, estimate, viewers)
            compared += 1
    assert compared >= 1
    # a viewer counts once however many of its sessions were hit
    assert con.execute("SELECT bool_and(affected_viewers <= affected_sessions), count(*) FROM w.alerts "
                       "WHERE affected_viewers IS NOT NULL").fetchone()[0]
