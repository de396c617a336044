"""Run lengths of CUSUM charts (toolkit.runlength) against published values, a direct solve and
simulation, and the decision intervals the CUSUM baseline writes into its SQL."""

from __future__ import annotations

import math

import numpy as np
import pytest

from toolkit.runlength import (ChainError, bernoulli_arl, bernoulli_arl_at, chain_arl, decision_interval,
                               gamma, grid, interpolated_h, interval_table, lattice, normal_cdf, two_sided)


def normal_arl(k: float, h: float, mean: float, states: int = 600) -> float:
    return chain_arl(normal_cdf(mean), k, h, states)


# ── the general chain against published normal-CUSUM run lengths ──────────────────────────────

def test_brook_and_evans_1972() -> None:
    # Brook & Evans (1972), Biometrika 59:539–549: one-sided k = 0.5, h = 3, x ~ N(μ, 1)
    assert normal_arl(0.5, 3, 0.0) == pytest.approx(117.59, abs=0.01)
    assert normal_arl(0.5, 3, 1.5) == pytest.approx(3.75, abs=0.005)


def test_lucas_and_crosier_1982_two_sided() -> None:
    # Lucas & Crosier (1982), Table 1: two-sided k = 0.5, h = 4 (transcribed); the lower chart at
    # mean μ runs as the upper chart at −μ, and 1/ARL = 1/ARL⁺ + 1/ARL⁻
    published = {0: 168, 0.25: 74.2, 0.5: 26.6, 0.75: 13.3, 1: 8.38, 1.5: 4.75, 2: 3.34, 2.5: 2.62,
                 3: 2.19, 4: 1.71, 5: 1.31}
    for mean, arl in published.items():
        computed = two_sided(normal_arl(0.5, 4, mean), normal_arl(0.5, 4, -mean))
        # the table gives three significant digits
        assert computed == pytest.approx(arl, rel=0.006), (mean, computed)


def test_waldmann_1986() -> None:
    # Waldmann (1986), one-sided k = 0.5, h = 3 (transcribed): μ = −0.5, 0, 0.5
    assert normal_arl(0.5, 3, -0.5) == pytest.approx(1963, rel=0.001)
    assert normal_arl(0.5, 3, 0.0) == pytest.approx(117.4, rel=0.002)
    assert normal_arl(0.5, 3, 0.5) == pytest.approx(17.35, rel=0.001)


def test_sas_qc_1999() -> None:
    # SAS/QC (1999), one-sided k = 0.25, h = 8, μ = 2.5 (transcribed): 4.1500836225
    assert normal_arl(0.25, 8, 2.5, states=1000) == pytest.approx(4.1500836225, rel=1e-4)


def test_siegmund_approximation() -> None:
    # Siegmund's approximation ARL₀ ≈ (e^{2kb} − 2kb − 1) / (2k²), b = h + 1.166 (from memory: good to
    # about a percent for normal CUSUMs of this size)
    for k, h in ((0.5, 3), (0.5, 4), (0.5, 5), (0.25, 8)):
        b = h + 1.166
        approx = (math.exp(2 * k * b) - 2 * k * b - 1) / (2 * k * k)
        assert normal_arl(k, h, 0.0) == pytest.approx(approx, rel=0.02), (k, h)


def test_the_chain_converges_with_more_states() -> None:
    coarse, fine = normal_arl(0.5, 3, 0.0, 50), normal_arl(0.5, 3, 0.0, 800)
    assert abs(coarse - 117.59) > abs(fine - 117.59)


# ── the Bernoulli lattice chain ────────────────────────────────────────────────────────────────

def dense_bernoulli_arl(p: float, a: int, b: int, top: int) -> float:
    """The same chain as a plain dense linear system (I − P)L = 1 over the states 0 … top."""
    n = top + 1
    moves = np.zeros((n, n))
    for j in range(n):
        if j + b - a <= top:
            moves[j, j + b - a] += p
        moves[j, max(0, j - a)] += 1 - p
    return float(np.linalg.solve(np.eye(n) - moves, np.ones(n))[0])


# the last three restate the pass in terms of newer values on the way (coefficients above 10⁴)
@pytest.mark.parametrize("p, a, b, top", [(0.02, 1, 40, 150), (0.05, 3, 40, 100), (0.3, 7, 17, 60),
                                          (0.02, 5, 201, 900), (0.001, 1, 800, 3000), (0.2, 5, 21, 300),
                                          (0.05, 2, 35, 600), (0.3, 7, 17, 250)])
def test_every_h_at_once_equals_a_direct_solve(p: float, a: int, b: int, top: int) -> None:
    from fractions import Fraction
    arls = bernoulli_arl(p, Fraction(a, b), top)
    for h in (a, a + 1, top // 2, top - 1, top):
        assert arls[h] == pytest.approx(dense_bernoulli_arl(p, a, b, h), rel=1e-7), h


def test_gamma_lies_between_the_rates() -> None:
    # Reynolds & Stoumbos (1999): γ = ln[(1−p₀)/(1−p₁)] / ln[p₁(1−p₀)/(p₀(1−p₁))]
    for p0, shift in ((0.001, 1.5), (0.02, 1.5), (0.02, 2), (0.2, 3)):
        g = gamma(p0, shift * p0)
        assert p0 < g < shift * p0
    assert float(lattice(0.0246715589544137)) == pytest.approx(0.0246715589544137, rel=1e-4)


def simulate(p: float, g: float, h: float, paths: int, window: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Sessions to the first signal of the per-session chain, and of the same paths judged only
    at the end of each window of ``window`` sessions (S = max(0, S + bad − n·γ) per window)."""
    rng = np.random.default_rng(seed)
    per_session = np.zeros(paths)
    per_window = np.zeros(paths)
    first_session = np.zeros(paths, dtype=np.int64)
    first_window = np.zeros(paths, dtype=np.int64)
    bad_in_window = np.zeros(paths)
    step = 0
    while (first_window == 0).any():
        step += 1
        x = (rng.random(paths) < p).astype(float)
        per_session = np.maximum(0.0, per_session + x - g)
        first_session[(first_session == 0) & (per_session > h)] = step
        bad_in_window += x
        if step % window == 0:
            per_window = np.maximum(0.0, per_window + bad_in_window - window * g)
            bad_in_window[:] = 0
            first_window[(first_window == 0) & (per_window > h)] = step
    return first_session, first_window


def test_bernoulli_chain_against_simulation_and_windows_judge_later() -> None:
    # p₀ = 5 %, a doubling, 2,000 sessions in control: short enough to simulate many runs
    p0, shift, sessions = 0.05, 2.0, 2000
    g, h = decision_interval(p0, shift, sessions)
    chain = bernoulli_arl_at(p0, g, h)
    assert sessions <= chain < sessions * 1.05
    first_session, first_window = simulate(p0, g, h, paths=3000, window=100, seed=5)
    standard_error = first_session.std() / math.sqrt(len(first_session))
    assert abs(first_session.mean() - chain) < 3.5 * standard_error
    # Judged at window ends the statistic is never above the per-session one on the same path
    # (see queries/verdict.sql), so no path signals earlier, and false alarms are rarer
    assert (first_window >= first_session).all()
    assert first_window.mean() > first_session.mean()
    # and a rise is still caught: at 2 × p₀ the chain's ARL against simulation
    out_chain = bernoulli_arl_at(shift * p0, g, h)
    out_session, _ = simulate(shift * p0, g, h, paths=3000, window=100, seed=6)
    assert abs(out_session.mean() - out_chain) < 3.5 * out_session.std() / math.sqrt(3000)


def test_two_percent_computed_run_lengths() -> None:
    # Computed (not published) with this chain: p₀ = 2 %, about one false alarm per 100,000
    # sessions, tuned for a rise of half: a rise to 3 % is signalled after about 1,950 sessions,
    # to 4 % after about 760 (the figures, from the same kind of chain)
    g, h = decision_interval(0.02, 1.5, 100_000)
    assert bernoulli_arl_at(0.02, g, h) == pytest.approx(100_000, rel=0.002)
    assert bernoulli_arl_at(0.03, g, h) == pytest.approx(1950, rel=0.01)
    assert bernoulli_arl_at(0.04, g, h) == pytest.approx(760, rel=0.03)


def test_decision_interval_is_the_smallest_reaching_the_run_length() -> None:
    g, h = decision_interval(0.01, 2.0, 50_000)
    f = lattice(g)
    assert bernoulli_arl_at(0.01, g, h) >= 50_000
    assert bernoulli_arl_at(0.01, g, h - 1 / f.denominator) < 50_000


def test_interpolated_h_stays_within_a_percent_below_five_percent() -> None:
    # h interpolated in ln p₀ between grid points, at the geometric middle of every interval up to
    # p₀ = 5 %: the in-control ARL it gives stays within 1 % of the target (measured worst: 0.6 %).
    # Above that the Bernoulli CUSUM's ARL moves in steps with h and the error grows (DEVELOPERS.md).
    shift, sessions = 1.5, 100_000
    table = interval_table(shift, sessions)
    worst = 0.0
    for (lo, _), (hi, _) in zip(table, table[1:]):
        if hi > 0.05:
            break
        p = math.sqrt(lo * hi)
        arl = bernoulli_arl_at(p, gamma(p, shift * p), interpolated_h(table, p))
        worst = max(worst, abs(arl / sessions - 1))
    assert worst < 0.01


def test_grid_and_its_ends() -> None:
    points = grid(1.5)
    assert points[0] == pytest.approx(0.001) and points[-1] == pytest.approx(0.25)
    assert grid(5)[-1] == pytest.approx(0.18)
    table = interval_table(1.5, 100_000)
    assert interpolated_h(table, 0.0) == table[0][1]          # below the grid: its first row
    assert interpolated_h(table, 0.3) is None                 # above it: no threshold
    assert all(h > 0 for _, h in table)


def test_a_long_run_at_a_small_shift_keeps_its_precision() -> None:
    # h ≈ 64: the chain's coefficients grow by about e^(p·h/γ) ≈ e^61 down the pass, restated
    # in terms of the newest values whenever they pass 10⁴
    g, h = decision_interval(0.01, 1.1, 10_000_000)
    f = lattice(g)
    assert h > 50
    assert 10_000_000 <= bernoulli_arl_at(0.01, g, h) < 10_000_000 * 1.001
    assert bernoulli_arl_at(0.01, g, h - 1 / f.denominator) < 10_000_000


def test_a_decision_interval_beyond_the_limit_is_refused() -> None:
    with pytest.raises(ChainError, match="no decision interval up to h = 200 reaches"):
        decision_interval(0.001, 1.05, 10**12)
