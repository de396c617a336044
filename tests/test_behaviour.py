"""How a 3-sigma p-chart behaves on simulated sessions (seeded, hash-based Bernoulli draws).

Stated bounds:
- False alarms. Given the limits the toolkit computed, a window of n sessions with true rate p
  breaches with probability P(Binomial(n, p) / n > threshold); summed over all judged windows this
  is the expected number of false alarms E, with variance V = Σ P(1 − P). The observed count must
  not exceed E + 4·√V + 1.
- Detection. A step to 3× the base rate (2 % → 6 %, 300 sessions a window) is caught by the first
  or second window after the step (per-window detection probability above 0.8, so missing both has
  probability below 0.04); the test's data is fixed by its seed.
"""

from __future__ import annotations

import math
from pathlib import Path

import duckdb

from conftest import PLAIN_PROJECT, write_project
from toolkit.config.project import load_project
from toolkit.engine.runner import run

SERIES, WINDOWS, N, P = 20, 50, 300, 0.02
CHECK = """\
check: pchart
source: sessions
by: [series]
measure: {kind: rate, bad: bad}
window: {every: 1h}
baseline: {method: p_chart, sigmas: 3, history: 20, min_history: 20}
guard: {min_sessions: 1}
"""


def simulate(folder: Path, step_at: int | None = None) -> Path:
    """SERIES x WINDOWS hourly windows of N sessions; from window ``step_at`` on, series s-0 at 3 P."""
    lake = folder / "lake"
    lake.mkdir(parents=True)
    step = "false" if step_at is None else f"(s = 0 AND w >= {step_at})"
    duckdb.connect().execute(f"""
        COPY (
            SELECT printf('%d-%d-%d', s, w, i) AS session_id,
                   TIMESTAMP '2026-11-02' + INTERVAL (w) HOUR + INTERVAL (i) SECOND AS ended_at,
                   's-' || s AS series,
                   (hash(hash(s, w, i, 'bernoulli')) % 1000000) / 1e6
                       < CASE WHEN {step} THEN {3 * P} ELSE {P} END AS bad
            FROM range({SERIES}) a(s), range({WINDOWS + 2}) b(w), range({N}) c(i)
        ) TO '{lake / "part.parquet"}' (FORMAT parquet)
    """)
    project = load_project(write_project(folder, {"pchart.yml": CHECK}, PLAIN_PROJECT.format(lake=lake)))
    run(project)
    return project.warehouse


def breach_probability(n: int, p: float, threshold: float) -> float:
    """P(X / n > threshold) for X ~ Binomial(n, p)."""
    first = math.floor(threshold * n) + 1
    return sum(math.comb(n, k) * p ** k * (1 - p) ** (n - k) for k in range(max(first, 0), n + 1))


def test_false_alarms_stay_within_the_binomial_expectation(tmp_path: Path) -> None:
    con = duckdb.connect(str(simulate(tmp_path)), read_only=True)
    judged = con.execute("SELECT sessions, threshold, breach FROM windows WHERE threshold IS NOT NULL").fetchall()
    assert len(judged) >= SERIES * (WINDOWS - 21)
    chances = [breach_probability(n, P, t) for n, t, _ in judged]
    expected, variance = sum(chances), sum(c * (1 - c) for c in chances)
    observed = sum(1 for *_, breach in judged if breach)
    assert observed <= expected + 4 * math.sqrt(variance) + 1, (observed, expected, variance)
    # and the limits are the 3-sigma p-chart's: about p + 3·√(p(1−p)/n) for the true p
    mean_threshold = sum(t for _, t, _ in judged) / len(judged)
    assert abs(mean_threshold - (P + 3 * math.sqrt(P * (1 - P) / N))) < 0.006


def test_a_step_to_three_times_the_rate_is_caught_within_two_windows(tmp_path: Path) -> None:
    step_at = 30
    con = duckdb.connect(str(simulate(tmp_path, step_at)), read_only=True)
    first = con.execute(
        "SELECT min(w.window_number - s.first_window) FROM windows AS w, "
        "(SELECT min(window_number) AS first_window FROM windows WHERE key_text = 'series=s-0') AS s "
        "WHERE w.key_text = 'series=s-0' AND w.breach").fetchone()[0]
    assert first is not None and step_at <= first <= step_at + 1
    alert = con.execute("SELECT count(*) FROM alerts WHERE key_text = 'series=s-0'").fetchone()[0]
    assert alert >= 1
