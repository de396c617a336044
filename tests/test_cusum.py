"""The CUSUM baseline on simulated sessions (seeded, hash-based Bernoulli draws) through the runner:
an incident long enough to push S to its ceiling and the alert closing soon after it, a backlog
read in several runs giving what one run gives, and `plimsoll sql` showing the decision intervals.

One series of hourly windows of N sessions at P; from window INCIDENT_FROM to INCIDENT_TO the rate
is RISE × P.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
from click.testing import CliRunner
from conftest import PLAIN_PROJECT, write_project

from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.runlength import gamma, interval_table

N, P, RISE = 500, 0.02, 4
WINDOWS, INCIDENT_FROM, INCIDENT_TO = 110, 40, 70
CHECK = """\
check: cusum
source: sessions
by: [series]
measure: {kind: rate, bad: bad}
window: {every: 1h}
baseline: {method: cusum, shift: 2, in_control_sessions: 100000, history: 20, min_history: 10}
lifecycle: {recover_after: 2, expire_after: 7d}
"""


def lake(folder: Path, files: int = 1) -> Path:
    """The series' sessions, in ``files`` files of consecutive hours."""
    folder.mkdir(parents=True)
    con = duckdb.connect()
    per_file = -(-WINDOWS // files)
    for f in range(files):
        con.execute(f"""
            COPY (
                SELECT printf('%d-%d', w, i) AS session_id,
                       TIMESTAMP '2026-11-02' + INTERVAL (w) HOUR + INTERVAL (i) SECOND AS ended_at,
                       's-0' AS series,
                       (hash(hash(w, i, 'bernoulli')) % 1000000) / 1e6
                           < CASE WHEN w >= {INCIDENT_FROM} AND w < {INCIDENT_TO} THEN {RISE * P} ELSE {P} END AS bad
                FROM range({f * per_file}, {min(WINDOWS, (f + 1) * per_file)}) b(w), range({N}) c(i)
            ) TO '{folder / f"part-{f:02d}.parquet"}' (FORMAT parquet)
        """)
    con.close()
    return folder


def windows(warehouse: Path) -> list[tuple]:
    con = duckdb.connect(str(warehouse), read_only=True)
    try:
        return con.execute("SELECT window_number, window_end, sessions, bad, statistic, baseline, threshold, breach "
                           "FROM windows ORDER BY window_number").fetchall()
    finally:
        con.close()


def test_after_a_long_incident_the_ceiling_lets_the_alert_close(tmp_path: Path) -> None:
    project = load_project(write_project(tmp_path, {"cusum.yml": CHECK},
                                         PLAIN_PROJECT.format(lake=lake(tmp_path / "lake"))))
    run(project)
    rows = windows(project.warehouse)
    first = rows[0][0]
    by_hour = {number - first: row for number, *row in rows}
    judged = [r for r in by_hour.values() if r[5] is not None]
    assert len(judged) >= WINDOWS - 12
    # S never above 2h, and held there through the incident
    assert all(s <= 2 * h * (1 + 1e-12) for _, _, _, s, _, h, _ in judged)
    assert by_hour[INCIDENT_TO - 1][3] == 2 * by_hour[INCIDENT_TO - 1][5]
    # a fourfold rise is signalled in its first or second hour, and no hour before it breached
    breaches = [hour for hour, r in by_hour.items() if r[6]]
    assert breaches[0] in (INCIDENT_FROM, INCIDENT_FROM + 1), breaches
    con = duckdb.connect(str(project.warehouse), read_only=True)
    (closed_at, reason), = con.execute("SELECT closed_at, close_reason FROM alerts").fetchall()
    con.close()
    assert reason == "recovered"
    closed_hour = next(hour for hour, r in by_hour.items() if r[0] == closed_at)
    # back to P, S falls below h within a few hours and two healthy windows close the alert
    assert INCIDENT_TO < closed_hour <= INCIDENT_TO + 6, closed_hour
    # without the ceiling S would still carry most of the incident's excess, far above h: the
    # same recursion over the stored counts, with γ from each window's p₀
    uncapped = 0.0
    for hour in range(0, closed_hour + 1):
        _, sessions, bad, _, p0, h, _ = by_hour[hour]
        if h is not None:
            uncapped = max(0.0, uncapped + bad - sessions * gamma(p0, 2 * p0))
    assert uncapped > 10 * by_hour[closed_hour][5]


def test_a_backlog_read_in_several_runs_gives_one_runs_windows(tmp_path: Path) -> None:
    data = lake(tmp_path / "lake", files=5)
    whole = load_project(write_project(tmp_path / "whole", {"cusum.yml": CHECK}, PLAIN_PROJECT.format(lake=data)))
    run(whole)
    text = PLAIN_PROJECT.format(lake=data) + "max_read_per_run: 1KB\n"
    parts_file = write_project(tmp_path / "parts", {"cusum.yml": CHECK}, text)
    result = CliRunner().invoke(main, ["run", "-p", str(parts_file)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    assert "runs 1-5: 5 new files" in result.output
    one, many = windows(whole.warehouse), windows(load_project(parts_file).warehouse)
    assert len(one) == WINDOWS - 1 and any(r[7] for r in one)   # the last hour is still open
    assert many == one


def test_plimsoll_sql_shows_the_decision_intervals(tmp_path: Path) -> None:
    project_file = write_project(tmp_path, {"cusum.yml": CHECK}, PLAIN_PROJECT.format(lake=lake(tmp_path / "lake")))
    result = CliRunner().invoke(main, ["sql", "cusum", "-p", str(project_file)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    table = interval_table(2.0, 100000)
    assert f"the grid (log-spaced, {len(table)} rows)" in result.output
    for p0, h in table:
        assert f"({p0:.9g}::DOUBLE, {h:.9g}::DOUBLE)" in result.output


# ── a small rise: the CUSUM against the p-chart at no more false alarms ─────────────────────────

SERIES, HOURS, STEP_AT, RISEN = 40, 140, 60, 20   # series s-0 … s-19 rise by half at hour STEP_AT
P_CHART = """\
check: pchart
source: sessions
by: [series]
measure: {kind: rate, bad: bad}
window: {every: 1h}
baseline: {method: p_chart, sigmas: 3, history: 20, min_history: 20}
lifecycle: {recover_after: 2, expire_after: 7d}
"""
# The p-chart above breaches a window of 500 sessions at 2 % with probability P(X ≥ 20) ≈ 0.0034
# (X ~ Binomial(500, 0.02)): about once in 290 windows, 145,000 sessions. The CUSUM is set to
# alarm no more often: once in 150,000 sessions.
CUSUM_SMALL = """\
check: cusum
source: sessions
by: [series]
measure: {kind: rate, bad: bad}
window: {every: 1h}
baseline: {method: cusum, shift: 1.5, in_control_sessions: 150000, history: 20, min_history: 20}
lifecycle: {recover_after: 2, expire_after: 7d}
"""


def small_rise_lake(folder: Path) -> Path:
    folder.mkdir(parents=True)
    duckdb.connect().execute(f"""
        COPY (
            SELECT printf('%d-%d-%d', s, w, i) AS session_id,
                   TIMESTAMP '2026-11-02' + INTERVAL (w) HOUR + INTERVAL (i) SECOND AS ended_at,
                   's-' || s AS series,
                   (hash(hash(s, w, i, 'small rise')) % 1000000) / 1e6
                       < CASE WHEN s < {RISEN} AND w >= {STEP_AT} THEN {1.5 * P} ELSE {P} END AS bad
            FROM range({SERIES}) a(s), range({HOURS}) b(w), range({N}) c(i)
        ) TO '{folder / "part.parquet"}' (FORMAT parquet)
    """)
    return folder


def test_a_rise_by_half_is_seen_sooner_than_by_the_p_chart_at_fewer_false_alarms(tmp_path: Path) -> None:
    project = load_project(write_project(tmp_path, {"pchart.yml": P_CHART, "cusum.yml": CUSUM_SMALL},
                                         PLAIN_PROJECT.format(lake=small_rise_lake(tmp_path / "lake"))))
    run(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    found = {}
    for check in ("pchart", "cusum"):
        opened = con.execute("""
            SELECT a.key_text, (epoch(a.opened_at) - epoch(TIMESTAMP '2026-11-02')) / 3600 - 1 AS hour
            FROM alerts AS a WHERE a.check_name = ? ORDER BY a.opened_at""", [check]).fetchall()
        false_alarms = [h for key, h in opened if int(key.split("-")[1]) >= RISEN or h < STEP_AT]
        delays = {}
        for key, hour in opened:
            if int(key.split("-")[1]) < RISEN and hour >= STEP_AT and key not in delays:
                delays[key] = hour - STEP_AT + 1           # windows from the rise to the alert
        found[check] = (len(false_alarms), delays)
    con.close()
    (p_false, p_delays), (c_false, c_delays) = found["pchart"], found["cusum"]
    print(f"false alarms: p-chart {p_false}, CUSUM {c_false}; risen series found: p-chart "
          f"{len(p_delays)}, CUSUM {len(c_delays)} of {RISEN}; mean windows to the alert: p-chart "
          f"{sum(p_delays.values()) / max(1, len(p_delays)):.1f}, CUSUM "
          f"{sum(c_delays.values()) / max(1, len(c_delays)):.1f}")
    assert c_false <= p_false
    assert len(c_delays) >= len(p_delays)
    # every series both found, the CUSUM found no later, and sooner on average
    both = set(p_delays) & set(c_delays)
    assert len(both) >= RISEN // 2
    assert sum(c_delays[k] for k in both) < sum(p_delays[k] for k in both)
