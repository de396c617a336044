"""Control-chart and confidence-bound baselines through the toolkit's own SQL, against published values.

Sources, with how sure each value is:
- NIST/SEMATECH e-Handbook of Statistical Methods, §6.3.3.2 "Proportions Control Charts": the wafer
  example, 30 wafers of 50 chips (fractions transcribed; p̄ = 0.231333, UCL = 0.410239).
- Varying sample sizes (p̄ = ΣD/Σn, limits per sample; standard practice, values computed by hand).
- Wilson (1927), JASA 22:209–212, score interval; Newcombe (1998), Stat. Med. 17:857–872, Table I,
  95 % (81/263 transcribed; 15/148, 0/20 and 1/29 from memory, all four reproduced by statsmodels
  `proportion_confint(method="wilson")`); further values computed with statsmodels 0.15.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest

from conftest import PLAIN_PROJECT, write_project, write_rows
from toolkit.config.project import load_project
from toolkit.engine.runner import run

START = datetime(2026, 11, 2)
WAFER_FRACTIONS = [.24, .30, .16, .20, .08, .14, .32, .18, .28, .20, .10, .12, .34, .24, .44, .16, .20,
                   .10, .26, .22, .40, .36, .48, .30, .18, .24, .14, .26, .18, .12]


def write_lake(folder: Path, windows: list[tuple[str, int, int]], hours_apart: int = 1) -> Path:
    """Sessions for (series, sessions, bad) windows, one hour each in order, per series."""
    rows = []
    hour: dict[str, int] = {}
    for series, n, bad in windows:
        h = hour.get(series, 0)
        hour[series] = h + hours_apart
        for i in range(n):
            at = START + timedelta(hours=h, seconds=i + 1)
            rows.append((f"{series}-{h}-{i}", at, series, "E" if i < bad else None))
    # a later session that closes every window (data time: weeks after, still before the file was written)
    rows.append(("closer", START + timedelta(days=20), "closer", None))
    return write_rows(folder / "lake", "session_id VARCHAR, ended_at TIMESTAMP, series VARCHAR, error_code VARCHAR",
                      rows)


def run_check(folder: Path, windows: list[tuple[str, int, int]], baseline: str, extra: str = "") -> list[tuple]:
    folder.mkdir(parents=True, exist_ok=True)
    lake = write_lake(folder, windows)
    check = f"""\
check: pc
source: sessions
by: [series]
measure:
  kind: rate
  bad: error_code IS NOT NULL
window:
  every: 1h
baseline:
{baseline}
{extra}
"""
    project = load_project(write_project(folder, {"pc.yml": check}, PLAIN_PROJECT.format(lake=lake)))
    run(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    return con.execute("SELECT key_text, sessions, bad, value, baseline, threshold, breach FROM windows "
                       "WHERE key_text <> 'series=closer' ORDER BY key_text, window_number").fetchall()


def test_p_chart_nist_wafer_example(tmp_path: Path) -> None:
    # NIST §6.3.3.2: 30 wafers of 50; a 31st window at 0.48 against limits from all 30 earlier ones.
    windows = [("w", 50, round(f * 50)) for f in WAFER_FRACTIONS] + [("w", 50, 24)]
    assert sum(b for _, _, b in windows[:30]) == 347
    rows = run_check(tmp_path, windows, "  method: p_chart\n  sigmas: 3\n  history: 30\n  min_history: 30")
    *earlier, last = rows
    assert all(r[5] is None for r in earlier)            # fewer than 30 earlier windows: no verdict
    assert last[4] == pytest.approx(0.231333, abs=5e-7)   # p̄ = 347 / 1500
    assert last[5] == pytest.approx(0.410239, abs=5e-7)   # UCL = p̄ + 3·√(p̄(1−p̄)/50)
    assert last[6] is True                                # 0.48 > UCL


def test_p_chart_limits_follow_each_windows_size(tmp_path: Path) -> None:
    # Varying n (computed by hand): D = 4, 6, 1 of n = 20, 40, 10 -> p̄ = 11/70 = 0.157143;
    # UCL = 0.401278 (n=20), 0.329773 (n=40), 0.502402 (n=10).
    windows = []
    for series, n in (("a", 20), ("b", 40), ("c", 10)):
        windows += [(series, 20, 4), (series, 40, 6), (series, 10, 1), (series, n, 0)]
    rows = run_check(tmp_path, windows, "  method: p_chart\n  sigmas: 3\n  history: 3\n  min_history: 3")
    judged = {r[0]: r for r in rows if r[5] is not None}
    assert set(judged) == {"series=a", "series=b", "series=c"}
    for series, ucl in (("series=a", 0.401278), ("series=b", 0.329773), ("series=c", 0.502402)):
        assert judged[series][4] == pytest.approx(11 / 70, abs=1e-6)
        assert judged[series][5] == pytest.approx(ucl, abs=5e-7)


def test_p_chart_down_limit_is_clipped_at_zero(tmp_path: Path) -> None:
    windows = [("a", 20, 4), ("a", 40, 6), ("a", 10, 1), ("a", 10, 0)]
    rows = run_check(tmp_path, windows, "  method: p_chart\n  sigmas: 3\n  history: 3\n  min_history: 3",
                     "direction: down")
    assert rows[-1][5] == 0.0 and rows[-1][6] is False    # p̄ − 3σ < 0 for n = 10: LCL clipped at 0


# Wilson score interval, 95 %, Newcombe (1998) Table I and statsmodels (see module docstring).
WILSON = [
    (81, 263, 0.95, 0.2553, 0.3662),
    (15, 148, 0.95, 0.0624, 0.1605),
    (0, 20, 0.95, 0.0000, 0.1611),
    (1, 29, 0.95, 0.0061, 0.1718),
    (8, 10, 0.95, 0.490162, 0.943318),
    (10, 10, 0.95, 0.722467, 1.0),
    (5, 25, 0.95, 0.088606, 0.391310),
    (12, 30, 0.99, 0.208841, 0.627381),
]


@pytest.mark.parametrize("x,n,confidence,lower,upper", WILSON)
def test_wilson_bounds_in_the_toolkits_sql(x: int, n: int, confidence: float, lower: float, upper: float) -> None:
    from toolkit.sql.templates import wilson_sql, z_for

    z = str(z_for(confidence))
    sql = f"SELECT {wilson_sql('lower', '$x', '$n', z)}, {wilson_sql('upper', '$x', '$n', z)}"
    lo, hi = duckdb.connect().execute(sql, {"x": x, "n": n}).fetchone()
    places = 4 if lower in (0.2553, 0.0624, 0.0, 0.0061) else 6
    assert lo == pytest.approx(lower, abs=0.5 * 10 ** -places)
    assert hi == pytest.approx(upper, abs=0.5 * 10 ** -places)


def test_a_small_noisy_window_does_not_breach_with_confidence(tmp_path: Path) -> None:
    # 40 sessions with 3 errors (7.5 %) clears a plain 5 % threshold, but the lower Wilson bound at
    # 95 % is 2.6 %, which does not: beyond the threshold on too little evidence, no verdict (NULL).
    # 400 sessions with 40 errors (10 %, bound 7.4 %) still breaches.
    base = "  method: rolling_percentile\n  q: 0.5\n  history: 5\n  min_history: 3\n  factor: 1.0\n  floor: 0.05"
    windows = [("a", 40, 0)] * 3 + [("a", 40, 3)] + [("b", 400, 0)] * 3 + [("b", 400, 40)]
    plain = run_check(tmp_path / "plain", windows, base)
    bounded = run_check(tmp_path / "bounded", windows, base + "\n  confidence: 0.95")
    assert [r[6] for r in plain] == [False, False, False, True, False, False, False, True]
    assert [r[6] for r in bounded] == [False, False, False, None, False, False, False, True]


# NIST/SEMATECH e-Handbook §6.3.2.4, EWMA control chart (transcribed): target 50, s = 2.0539,
# λ = 0.3, k = 3; the EWMA to 2 decimals; UCL 52.5884 and LCL 47.4115 (the handbook rounds
# √(λ/(2−λ)) to 0.4201, so limits are compared to about 1e-3).
EWMA_DATA = [52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5, 49.6, 47.6, 49.9, 51.3, 47.8, 51.2,
             52.6, 52.4, 53.6, 52.1]
EWMA_VALUES = [50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33, 50.11, 49.36, 49.52,
               50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99]


def ewma_windows(folder: Path, direction: str, batches: int = 1) -> list[tuple]:
    """The handbook's series as hourly windows of one session each, read in ``batches`` runs."""
    folder.mkdir(parents=True, exist_ok=True)
    lake = folder / "lake"
    rows = [(f"s{i}", START + timedelta(hours=i, minutes=5), "a", x) for i, x in enumerate(EWMA_DATA)]
    rows.append(("closer", datetime(2026, 11, 20), "b", 0.0))
    check = f"""\
check: ew
source: sessions
by: [series]
measure: {{kind: ratio, numerator: x, denominator: "1"}}
direction: {direction}
window: {{every: 1h}}
baseline: {{method: ewma, lambda: 0.3, sigmas: 3, history: 30, min_history: 1, target: 50, sigma: 2.0539}}
"""
    size = -(-len(rows) // batches)
    for b in range(batches):
        write_rows(lake, "session_id VARCHAR, ended_at TIMESTAMP, series VARCHAR, x DOUBLE",
                   rows[b * size:(b + 1) * size], f"part-{b}.parquet")
        project = load_project(write_project(folder, {"ew.yml": check}, PLAIN_PROJECT.format(lake=lake)))
        run(project)
    return duckdb.connect(str(project.warehouse), read_only=True).execute(
        "SELECT value, statistic, threshold, breach FROM windows WHERE key_text = 'series=a' ORDER BY window_number"
    ).fetchall()


def test_ewma_nist_example(tmp_path: Path) -> None:
    rows = ewma_windows(tmp_path / "up", "up")
    assert [r[0] for r in rows] == EWMA_DATA
    assert [round(r[1], 2) for r in rows] == pytest.approx(EWMA_VALUES, abs=0.006)
    assert all(r[2] == pytest.approx(52.5884, abs=1e-3) for r in rows[1:])
    assert rows[0][2] is None                       # no earlier window yet: no verdict
    assert not any(r[3] for r in rows)              # the handbook's process is in control
    lower = ewma_windows(tmp_path / "down", "down")
    assert all(r[2] == pytest.approx(47.4115, abs=1e-3) for r in lower[1:])
    assert not any(r[3] for r in lower)


def test_ewma_carries_its_statistic_from_run_to_run(tmp_path: Path) -> None:
    # The same series read in three runs: each run continues from the last stored statistic.
    assert ewma_windows(tmp_path / "many", "up", batches=3) == ewma_windows(tmp_path / "one", "up")
