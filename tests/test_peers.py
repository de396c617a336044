"""The peers baseline: each time window of a series against the same window of the series that
share ``peers_by``, the series itself left out.

Reference values: funnel-plot limits against exact binomial quantiles from scipy, the χ² percentile
the over-dispersion test uses against scipy's; then the method end to end over real Parquet and
DuckDB files: a family of dozens of releases whose rates really differ (over-dispersed), where the
limits must not flag a good share of them and must flag a release broken from its first hour; the
number of peers below which there is no verdict; a backlog read in several runs; and validation.
"""

from __future__ import annotations

import math
import statistics
from pathlib import Path

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

import oracle
from conftest import FIXTURE_LAKE, PROJECT, write_project
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.problems import ProjectInvalid

GOLDEN_PEERS = (Path(__file__).parent / "golden" / "peers" / "check.yml").read_text()

LAKE_PROJECT = """\
warehouse: warehouse.duckdb
checks: checks/
sources:
  sessions:
    path: {lake}
    session_id: session_id
    event_time: ended_at
"""

RELEASE_CHECK = """\
check: release_peers
source: sessions
by: [device_family, player_version]
measure:
  kind: rate
  bad: error_code IS NOT NULL
window:
  every: 1h
baseline:
  method: peers
  peers_by: [device_family]
  min_peers: {min_peers}
  sigmas: 3
guard:
  min_sessions: 200
  min_bad: 5
"""


def counts_lake(folder: Path, counts: list[tuple[str, str, int, int, int]]) -> Path:
    """A lake of sessions from (device_family, player_version, hour, sessions, bad) rows: each hour's
    sessions spread over the hour, its first `bad` ones failing."""
    lake = folder / "lake"
    lake.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    con.execute("CREATE TABLE counts (device_family VARCHAR, player_version VARCHAR, hour INTEGER, "
                "sessions INTEGER, bad INTEGER)")
    con.executemany("INSERT INTO counts VALUES (?, ?, ?, ?, ?)", counts)
    con.execute(f"""
        COPY (
            SELECT printf('%s-%s-%d-%d', device_family, player_version, hour, i) AS session_id,
                   TIMESTAMP '2026-11-02 00:00:00' + to_microseconds(
                       (hour * 3600 + (i * 3599.0 / sessions))::BIGINT * 1000000) AS ended_at,
                   device_family, player_version,
                   CASE WHEN i < bad THEN 'PLAYER-CRASH' END AS error_code
            FROM counts, range(sessions) AS r(i)
            ORDER BY ended_at
        ) TO '{lake / "part-0.parquet"}' (FORMAT parquet)""")
    con.close()
    return lake


def windows_of(project_file: Path, check: str) -> list[dict]:
    con = duckdb.connect(str(load_project(project_file).warehouse), read_only=True)
    try:
        names = ("key_text", "window_number", "sessions", "bad", "value", "baseline", "history_windows",
                 "threshold", "breach")
        rows = con.execute(f"SELECT {', '.join(names)} FROM windows WHERE check_name = $c "
                           "ORDER BY key_text, window_number", {"c": check}).fetchall()
        return [dict(zip(names, r)) for r in rows]
    finally:
        con.close()


# ----------------------------------------------------------------------------------------------
# reference values


def exact_funnel_limit(n: int, p0: float, probability: float) -> float:
    """The exact binomial limit for a proportion, interpolated as Spiegelhalter (2005, Statistics in
    Medicine 24:1185-1202, appendix; recalled from memory) describes: r the smallest count with
    F(r) ≥ probability, α = (F(r) − probability) / (F(r) − F(r − 1)), limit (r − α) / n."""
    r = stats.binom.ppf(probability, n, p0)
    f_r, f_before = stats.binom.cdf(r, n, p0), stats.binom.cdf(r - 1, n, p0)
    return (r - (f_r - probability) / (f_r - f_before)) / n


@pytest.mark.parametrize("n,p0", [(20_000, 0.015), (5_000, 0.05), (2_000, 0.2), (800, 0.3)])
def test_funnel_limits_approach_the_exact_binomial_limits(tmp_path: Path, n: int, p0: float) -> None:
    # one release of n sessions and four peers of 10,000 sessions at exactly p0 (no
    # over-dispersion: φ = 1): the run's threshold is p0 + 3·√(p0(1−p0)·(1/n + 1/N)), N = 40,000
    # the peers' sessions. Without the 1/N term (p0 known: many peers) it is the funnel limit,
    # against the exact limit at the same one-sided probability Φ(3) from scipy's binomial quantiles.
    peers = [("tv", f"v{i}", 0, 10_000, round(10_000 * p0)) for i in range(4)]
    lake = counts_lake(tmp_path, [("tv", "new", 0, n, round(n * p0)), *peers, ("tv", "new", 2, 1, 0)])
    project_file = write_project(tmp_path, {"c.yml": RELEASE_CHECK.format(min_peers=2)},
                                 LAKE_PROJECT.format(lake=lake))
    assert run(load_project(project_file)).status == "ok"
    window = next(w for w in windows_of(project_file, "release_peers") if w["key_text"].endswith("player_version=new"))
    assert window["baseline"] == pytest.approx(p0) and window["history_windows"] == 4
    assert window["threshold"] == pytest.approx(p0 + 3 * math.sqrt(p0 * (1 - p0) * (1 / n + 1 / 40_000)), rel=1e-12)
    assert window["threshold"] == pytest.approx(oracle.peer_rate_limit(p0, n, 40_000, 1.0, 3.0, True), rel=1e-12)
    funnel = oracle.peer_rate_limit(p0, n, math.inf, 1.0, 3.0, True)
    assert funnel == pytest.approx(p0 + 3 * math.sqrt(p0 * (1 - p0) / n), rel=1e-12)
    exact = exact_funnel_limit(n, p0, stats.norm.cdf(3))
    # the normal limit falls short of the exact one by the binomial's skew: less than 4 % of the
    # limit's distance from p0 once n·p0 is a few hundred
    assert abs(funnel - exact) < 0.04 * (exact - p0)


def test_the_over_dispersion_test_uses_the_chi_square_95th_percentile() -> None:
    # Wilson and Hilferty (1931) against scipy's χ² quantile: within 2.5 % for 1 degree of freedom,
    # 1 % from 2 on
    for df in range(1, 201):
        exact = stats.chi2.ppf(0.95, df)
        assert oracle.chi2_95(df) == pytest.approx(exact, rel=0.025 if df == 1 else 0.01)


def test_over_dispersion_by_hand() -> None:
    # ten peers of 1,000 sessions around p0 = 0.02, worked by hand: z = (y − 0.02)/√(0.02·0.98/1000)
    n, p0 = 1000, 0.02
    rates = [0.010, 0.012, 0.015, 0.018, 0.020, 0.022, 0.025, 0.028, 0.030, 0.060]
    se = math.sqrt(p0 * (1 - p0) / n)
    z = [(y - p0) / se for y in rates]
    low, high = np.quantile(z, 0.1), np.quantile(z, 0.9)
    # the outlier (0.06, z = 9.04) is pulled in to the 90th percentile (position 8.1 of 0..9), so it
    # cannot set φ alone
    assert z[-1] == pytest.approx(9.035079, abs=1e-6) and high == pytest.approx(z[8] + 0.1 * (z[9] - z[8]))
    phi_hat = statistics.fmean([min(max(x, low), high) ** 2 for x in z])
    assert oracle.overdispersion(p0, [(n, y) for y in rates]) == (pytest.approx(phi_hat), True)
    assert 10 * phi_hat > stats.chi2.ppf(0.95, 9)
    # peers that agree with their binomial spread leave the limits alone
    calm = [0.016, 0.018, 0.019, 0.020, 0.020, 0.021, 0.022, 0.024]
    assert oracle.overdispersion(p0, [(n, y) for y in calm]) == (1.0, True)


# ----------------------------------------------------------------------------------------------
# dozens of peers whose rates really differ


def family_counts(seed: int = 5) -> list[tuple[str, str, int, int, int]]:
    """24 releases of one family for 4 hours, each with its own failure rate (log-normal around
    1.5 %, σ = 0.35, as releases differ), about 12,000 sessions an hour each; from hour 1 a new
    release failing 4.6 % of its sessions."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(24):
        rate = 0.015 * math.exp(0.35 * statistics.NormalDist().inv_cdf((i + 0.5) / 24))
        for hour in range(4):
            n = int(rng.integers(10_000, 14_000))
            out.append(("android", f"8.{i:02d}", hour, n, int(rng.binomial(n, rate))))
    for hour in range(1, 4):
        n = int(rng.integers(10_000, 14_000))
        out.append(("android", "9.0.0", hour, n, int(rng.binomial(n, 0.046))))
    out.append(("android", "8.00", 6, 1, 0))   # moves the watermark past the last hour
    return out


@pytest.fixture(scope="module")
def family(tmp_path_factory: pytest.TempPathFactory) -> tuple[list[dict], list[tuple]]:
    folder = tmp_path_factory.mktemp("family")
    counts = family_counts()
    lake = counts_lake(folder, counts)
    project_file = write_project(folder, {"c.yml": RELEASE_CHECK.format(min_peers=3)}, LAKE_PROJECT.format(lake=lake))
    assert run(load_project(project_file)).status == "ok"
    return windows_of(project_file, "release_peers"), counts


def test_a_release_broken_from_its_first_hour_breaches_in_every_hour(family) -> None:
    windows, _ = family
    broken = [w for w in windows if w["key_text"].endswith("player_version=9.0.0")]
    assert len(broken) == 3 and all(w["breach"] for w in broken)
    assert all(w["history_windows"] == 24 for w in broken)


def test_over_dispersed_peers_do_not_flag_a_share_of_the_family(family) -> None:
    # releases 8.00 to 8.20 fail at 0.6 to 1.45 times the family's median rate: the family's
    # ordinary spread: the over-dispersed limits flag none of their hours, while binomial limits
    # alone (φ = 1) flag a fifth of all hours. The three worst releases (1.6 to 2 times) may be.
    windows, _ = family
    others = [w for w in windows if not w["key_text"].endswith("player_version=9.0.0")]
    assert len(others) == 24 * 4 and all(w["threshold"] is not None for w in others)
    ordinary = [w for w in others if w["key_text"] < "device_family=android, player_version=8.21"]
    assert len(ordinary) == 21 * 4
    hour_sessions: dict[int, int] = {}
    for w in windows:
        hour_sessions[w["window_number"]] = hour_sessions.get(w["window_number"], 0) + w["sessions"]
    binomial_only = sum(
        w["value"] > oracle.peer_rate_limit(w["baseline"], w["sessions"], hour_sessions[w["window_number"]] - w["sessions"],
                                            1.0, 3.0, True) and w["bad"] >= 5
        for w in others)
    assert binomial_only >= 0.15 * len(others), binomial_only
    assert not any(w["breach"] for w in ordinary)
    assert sum(w["breach"] for w in others) <= 0.05 * len(others)


def test_each_threshold_is_the_funnel_limit_of_its_peers(family) -> None:
    # the pooled rate, the winsorised over-dispersion and the limit recomputed from the stored
    # windows with the oracle's rule: every window's peers are the family's other releases that hour
    windows, _ = family
    by_hour: dict[int, list[dict]] = {}
    for w in windows:
        by_hour.setdefault(w["window_number"], []).append(w)
    phi_used = 0
    for w in windows:
        peers = [p for p in by_hour[w["window_number"]] if p is not w and p["sessions"] >= 200]
        p0 = sum(p["bad"] for p in peers) / sum(p["sessions"] for p in peers)
        phi, exact = oracle.overdispersion(p0, [(p["sessions"], p["bad"] / p["sessions"]) for p in peers])
        assert exact
        phi_used += phi > 1
        assert w["baseline"] == pytest.approx(p0, rel=1e-12) and w["history_windows"] == len(peers)
        peer_sessions = sum(p["sessions"] for p in peers)
        assert w["threshold"] == pytest.approx(
            p0 + 3 * math.sqrt(phi * p0 * (1 - p0) * (1 / w["sessions"] + 1 / peer_sessions)), rel=1e-9)
    assert phi_used >= 0.9 * len(windows)


def test_fewer_peers_than_min_peers_give_no_threshold_and_no_verdict(tmp_path: Path) -> None:
    counts = [row for row in family_counts() if row[1] in ("8.00", "8.05", "9.0.0")]
    lake = counts_lake(tmp_path, counts)
    project_file = write_project(tmp_path, {"c.yml": RELEASE_CHECK.format(min_peers=3)}, LAKE_PROJECT.format(lake=lake))
    assert run(load_project(project_file)).status == "ok"
    windows = windows_of(project_file, "release_peers")
    assert windows and all(w["threshold"] is None and not w["breach"] for w in windows)
    assert {w["history_windows"] for w in windows} == {1, 2}
    # with two peers enough, the broken release is found
    (tmp_path / "warehouse.duckdb").unlink()
    write_project(tmp_path, {"c.yml": RELEASE_CHECK.format(min_peers=2)}, LAKE_PROJECT.format(lake=lake))
    assert run(load_project(project_file)).status == "ok"
    windows = windows_of(project_file, "release_peers")
    assert [w["breach"] for w in windows if w["key_text"].endswith("9.0.0")] == [True] * 3


# ----------------------------------------------------------------------------------------------
# a backlog read in several runs


def test_a_backlog_read_in_several_runs_gives_what_one_run_gives(tmp_path: Path) -> None:
    # the fixture lake cut into a file per six hours; a limit below one file reads one per run
    lake = tmp_path / "lake"
    lake.mkdir()
    con = duckdb.connect()
    rows = f"read_parquet('{FIXTURE_LAKE}/**/*.parquet', hive_partitioning = false)"
    starts = con.execute(f"SELECT DISTINCT date_trunc('day', ended_at) + INTERVAL 6 HOUR * (hour(ended_at) // 6) "
                         f"FROM {rows} WHERE ended_at IS NOT NULL ORDER BY 1").fetchall()
    for (start,) in starts:
        con.execute(f"COPY (SELECT * FROM {rows} WHERE ended_at >= $s AND ended_at < $s + INTERVAL 6 HOUR) "
                    f"TO '{lake / f'part-{start:%Y%m%d%H}.parquet'}' (FORMAT parquet)", {"s": start})
    con.close()
    whole, parts = tmp_path / "whole", tmp_path / "parts"
    run(load_project(write_project(whole, {"peers.yml": GOLDEN_PEERS}, PROJECT.format(lake=lake))))
    project_file = write_project(parts, {"peers.yml": GOLDEN_PEERS},
                                 PROJECT.format(lake=lake) + "max_read_per_run: 1KB\n")
    result = CliRunner().invoke(main, ["run", "-p", str(project_file)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    assert f"runs 1-{len(starts)}:" in result.output
    one, many = windows_of(whole / "plimsoll.yml", "golden"), windows_of(project_file, "golden")
    assert len(one) > 50 and any(w["breach"] for w in one)
    assert many == one


# ----------------------------------------------------------------------------------------------
# validation


def _peers_check(by: str, peers_by: str, window: str = "  every: 2h\n") -> str:
    return ("check: peers_probe\nsource: sessions\n"
            f"by: {by}\n"
            "measure:\n  kind: rate\n  bad: error_code IS NOT NULL\n"
            f"window:\n{window}"
            f"baseline:\n  method: peers\n  peers_by: {peers_by}\n")


@pytest.mark.parametrize("text,line,words", [
    (_peers_check("[site, title_id]", "[site]", "  sessions: 50\n  max_wait: 1h\n"), 11,
     "baseline.method: peers compares series over the same time window; count windows (window.sessions) "
     "share no common time: use window.every"),
    (_peers_check("[site, title_id]", "[site, title_id]"), 11, "baseline.peers_by must name some of the columns of 'by'"),
    (_peers_check("[site, title_id]", "[]"), 11, "baseline.peers_by must name some of the columns of 'by'"),
    (_peers_check("[site]", "[site]"), 11, "baseline.peers_by must name some of the columns of 'by'"),
    (_peers_check("[site, title_id]", "[cdn]"), 11, "baseline.peers_by: 'cdn' not in 'by'"),
    (_peers_check("[site, title_id]", "[site]") + "  min_peers: 1\n", 12, "baseline.min_peers: must be at least 2"),
    (_peers_check("[site, title_id]", "[site]") + "  history: 10\n", 12, "unknown key 'history' in baseline"),
    (_peers_check("[site, title_id]", "[site]").replace("  peers_by: [site]\n", ""), 9,
     "missing key 'peers_by' in baseline"),
])
def test_a_peers_check_that_cannot_work_is_refused_with_its_line(tmp_path: Path, text: str, line: int,
                                                                 words: str) -> None:
    project_file = write_project(tmp_path, {"peers_probe.yml": text})
    with pytest.raises(ProjectInvalid) as caught:
        load_project(project_file)
    messages = [f"{p.file}:{p.line}: {p.message}" for p in caught.value.problems]
    assert any(f"peers_probe.yml:{line}: {words}" in m for m in messages), messages
    result = CliRunner().invoke(main, ["validate", "-p", str(project_file)])
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert not (tmp_path / "warehouse.duckdb").exists()


def test_a_good_peers_check_compiles_its_formula_into_the_sql(tmp_path: Path) -> None:
    project = load_project(write_project(tmp_path, {"p.yml": _peers_check("[site, title_id]", "[site]")}))
    check = project.checks["peers_probe"]
    assert check.baseline.peers_by == ("site",) and check.baseline.min_peers == 3 and check.baseline.sigmas == 3.0
    result = CliRunner().invoke(main, ["sql", "peers_probe", "-p", str(tmp_path / "plimsoll.yml")])
    assert result.exit_code == 0, result.output
    assert "threshold = p₀ + 3.0 × √(φ × p₀ (1 − p₀) × (1/n + 1/N))" in result.output
    assert "-- @loop" not in result.output
