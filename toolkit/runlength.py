"""Run lengths of CUSUM charts by Markov chains, and the CUSUM baseline's decision intervals.

A CUSUM S = max(0, S + x − k) signals when S > h. Its average run length (ARL: how many
observations until the first signal, starting from S = 0) follows from a Markov chain over the
values S can take before it signals (Brook and Evans 1972, Biometrika 59:539–549):

- :func:`chain_arl`, for an increment x of any continuous distribution (given by its CDF): the
  interval [0, h] cut into ``states`` cells, S = 0 the first, each cell represented by its middle,
  as Brook and Evans do; the error falls as the square of the cell width.
- :func:`bernoulli_arl`, for the Bernoulli CUSUM of Reynolds and Stoumbos (1999, Journal of
  Quality Technology 31:87–108): one session at a time, x = 1 for a bad session and 0 for a good
  one, k = γ. With γ = a/b the statistic stays on the lattice of multiples of 1/b, so the chain
  over {0, 1/b, …, h} is exact. It is solved for every h at once (see the function).

The CUSUM baseline (``baseline: {method: cusum}``) uses the second: :func:`decision_interval`
gives, for an in-control rate p₀, a rate to detect p₁ = shift × p₀ and a run length N sessions,
γ and the smallest h whose in-control ARL is at least N; :func:`interval_table` gives h on a
log-spaced grid of p₀ that the verdict SQL interpolates.

Plain Python and numpy; nothing of Plimsoll's is imported, so any layer may use it.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from fractions import Fraction
from functools import lru_cache

import numpy as np

# The grid of in-control rates the verdict SQL interpolates h on: from P_LOW (a lower p₀ is taken
# as P_LOW: γ is then too high for it, so the chart alarms less often than designed, never more)
# to the top (min(P_HIGH, TOP_DETECTED / shift); above it a window gets no threshold), with
# STEPS_PER_DOUBLING points for every doubling of p₀.
P_LOW = 0.001
P_HIGH = 0.25
TOP_DETECTED = 0.9
STEPS_PER_DOUBLING = 8

# the largest decision interval searched for: beyond it a run length is refused
H_LIMIT = 200

# γ = a/b: the largest numerator and denominator of the fraction the chain uses for γ
_MAX_A = 48
_MAX_B = 6000


class ChainError(ArithmeticError):
    """The chain cannot give a usable decision interval: it would lie beyond H_LIMIT, or the
    answer kept too few significant digits."""


def chain_arl(cdf: Callable[[np.ndarray], np.ndarray], k: float, h: float, states: int = 400) -> float:
    """Zero-state ARL of S = max(0, S + x − k), signal when S > h, x with distribution ``cdf``.

    Brook and Evans (1972): cell i (i = 0 … t−1) holds S in ((i − ½)w, (i + ½)w], cell 0 also S = 0
    itself, w = 2h / (2t − 1), so the last cell ends at h. From the middle iw of cell i, S moves to
    cell j with probability F((j − i + ½)w + k) − F((j − i − ½)w + k), to cell 0 with F(½w − iw + k).
    """
    t = states
    w = 2 * h / (2 * t - 1)
    i = np.arange(t)[:, None]
    j = np.arange(t)[None, :]
    upper = cdf((j - i + 0.5) * w + k)
    lower = np.where(j == 0, 0.0, cdf((j - i - 0.5) * w + k))
    transitions = upper - lower
    arl = np.linalg.solve(np.eye(t) - transitions, np.ones(t))
    return float(arl[0])


def normal_cdf(mean: float = 0.0) -> Callable[[np.ndarray], np.ndarray]:
    """The CDF of N(mean, 1), vectorised (for :func:`chain_arl`)."""
    erf = np.vectorize(math.erf)
    return lambda x: 0.5 * (1.0 + erf((np.asarray(x) - mean) / math.sqrt(2.0)))


def two_sided(arl_up: float, arl_down: float) -> float:
    """The ARL of two one-sided charts run together: 1/ARL = 1/ARL⁺ + 1/ARL⁻ (exact when the two
    cannot both be above 0 at once, as for k ≥ the half-width of the shift; Lucas and Crosier 1982)."""
    return 1.0 / (1.0 / arl_up + 1.0 / arl_down)


def gamma(p0: float, p1: float) -> float:
    """The Bernoulli CUSUM's reference value for detecting a rise from p₀ to p₁ (Reynolds and
    Stoumbos 1999): γ = ln[(1−p₀)/(1−p₁)] / ln[p₁(1−p₀) / (p₀(1−p₁))]; p₀ < γ < p₁."""
    return math.log((1 - p0) / (1 - p1)) / math.log(p1 * (1 - p0) / (p0 * (1 - p1)))


def lattice(g: float) -> Fraction:
    """γ as a fraction a/b the chain can use: the closest with b ≤ 6000 and a ≤ 48."""
    limit = _MAX_B
    while True:
        f = Fraction(g).limit_denominator(limit)
        if f.numerator <= _MAX_A or limit == 1:
            return f
        limit = max(1, limit // 2)


def _sweep(p: float, g: Fraction, visit: Callable[[Callable[[int], float], int, int], bool],
           top: int | None = None, blocks: int = 1) -> None:
    """The Bernoulli CUSUM B = max(0, B + X − γ), γ = g = a/b, P(X = 1) = p, signalling when
    B > H/b, solved for every H at once, in one pass.

    In units of 1/b the chain is on the integers 0 … H: a bad session moves j to j + b − a, a good
    one to max(0, j − a). The expected sessions to a signal, L, satisfy
    L_j = 1 + p·L_{j+b−a} + (1−p)·L_{max(0, j−a)}, L = 0 above H. Read from the top down, the
    equation at j gives L_{j−a} from L_j and L_{j+b−a}, so with the a top values unknown every L_j
    is an affine function of them that depends only on d = H − j; the a equations at j < a then
    fix them (:func:`_solve_top`). So one pass over d = 0, 1, 2 … serves every H.

    The coefficients grow about as e^(p·d/γ) down the pass, and the answer is their difference;
    so whenever they pass 10⁴ the pass is restated in terms of the a newest values instead of the
    a top ones (the rows it still reads, the last b + a, are rewritten), and no precision is lost.

    ``visit(arl, first, last)`` is called after every ``blocks`` blocks of a distances, first …
    last, with ``arl(h)``, the ARL at a decision interval h/b among them; the pass ends when it
    returns True, or after ``top``.
    """
    a, b = g.numerator, g.denominator
    q = 1.0 - p
    # rows[i] = (α, β₀ … β_{a−1}): L at distance base + i below the top is α + β·x for the current
    # unknowns x. A step reads the rows b and a distances back, a visit the last `blocks` blocks and
    # b before them, a restatement the last b + a: only the last `keep` distances are kept, so memory
    # stays bounded however long the pass (the rows are slid to the front when the buffer fills).
    keep = b + (blocks + 2) * a
    rows = np.zeros((max(2 * keep, 4 * b, 2 * a), a + 1))
    base = 0
    rows[:a, 1:] = np.eye(a)
    one = np.zeros(a + 1)
    one[0] = 1.0
    d = first = a
    count = 0
    while top is None or d <= top:  # a block of a distances at once: each reads only d − a and d − b
        end = d + a if top is None else min(d + a, top + 1)
        if end - base > len(rows):
            slide = d - keep - base
            rows[:d - base - slide] = rows[slide:d - base]
            base += slide
        lo, hi = d - base, end - base
        if d >= b:
            above = rows[lo - b:hi - b]
        else:
            back = np.arange(d, end) - b
            above = np.where((back >= 0)[:, None], rows[np.maximum(back, 0)], 0.0)
        rows[lo:hi] = (rows[lo - a:hi - a] - one - p * above) / q
        d = end
        count += 1
        if count % blocks and (top is None or d <= top):
            continue
        # every distance a visit asks for lies in the kept rows, at or above `base`
        if visit(lambda h: _solve_top(rows, h - base, a, b, p, q), first, d - 1):
            return
        first = d
        if np.abs(rows[d - a - base:d - base, 1:]).max() > 1e4:
            # x = B⁻¹(y − A) for the newest values y = A + B·x: every row read later in terms of y
            newest = rows[d - a - base:d - base]
            inverse = np.linalg.inv(newest[:, 1:])
            start = max(0, d - b - a - base)
            kept = rows[start:d - base]
            kept[:, 1:] = kept[:, 1:] @ inverse
            kept[:, 0] = kept[:, 0] - kept[:, 1:] @ newest[:, 0]
            rows[start:d - base] = kept


def bernoulli_arl(p: float, g: Fraction, top: int) -> np.ndarray:
    """Zero-state ARLs, in sessions, of the Bernoulli CUSUM B = max(0, B + X − γ), γ = g = a/b,
    P(X = 1) = p, signalling when B > H/b: element H of the result for every H from a to ``top``
    (the elements below a are NaN). See :func:`_sweep` for how the chain is solved."""
    arls = np.full(top + 1, np.nan)

    def visit(arl: Callable[[int], float], first: int, last: int) -> bool:
        for h in range(first, last + 1):
            arls[h] = arl(h)
        return False

    _sweep(p, g, visit, top)
    return arls


def _solve_top(rows: np.ndarray, h: int, a: int, b: int, p: float, q: float) -> float:
    """L_0 of the chain on 0 … h from the equations at j = 0 … a−1: L_j = 1 + q·L_0 + p·L_{j+b−a}."""
    j = np.arange(a)
    up = h - (j + b - a)
    eqs = rows[h - j] - q * rows[h] - p * np.where((up >= 0)[:, None], rows[np.maximum(up, 0)], 0.0)
    x = np.linalg.solve(eqs[:, 1:], 1.0 - eqs[:, 0])
    arl = float(rows[h, 0] + rows[h, 1:] @ x)
    # The affine coefficients grow about as e^(p·h/γ) down the chain, and the ARL is their
    # difference: refuse an answer that kept fewer than about 7 significant digits.
    scale = abs(rows[h, 0]) + float(np.abs(rows[h, 1:]) @ np.abs(x))
    if not math.isfinite(arl) or scale > 1e9 * max(abs(arl), 1.0):
        raise ChainError(f"the run-length chain loses its precision at p = {p:g}, h = {h / b:g}")
    return arl


def bernoulli_arl_at(p: float, g: float, h: float) -> float:
    """The zero-state ARL in sessions of the Bernoulli CUSUM with reference value g and decision
    interval h (h rounded down to the lattice of γ's fraction)."""
    f = lattice(g)
    top = int(math.floor(h * f.denominator + 1e-9))
    return float(bernoulli_arl_lattice(p, f, top))


def bernoulli_arl_lattice(p: float, f: Fraction, top: int) -> float:
    """The ARL at decision interval top/b alone (see :func:`_sweep`)."""
    found: list[float] = []

    def visit(arl: Callable[[int], float], first: int, last: int) -> bool:
        if first <= top <= last:
            found.append(arl(top))
            return True
        return False

    _sweep(p, f, visit, top, blocks=16)
    return found[0]


def decision_interval(p0: float, shift: float, sessions: int) -> tuple[float, float]:
    """(γ, h) of the Bernoulli CUSUM for a rise from p₀ to shift × p₀ whose in-control ARL is at
    least ``sessions``: h the smallest on γ's lattice that reaches it. Raises ChainError when that
    h lies beyond H_LIMIT (a small shift with a very long run)."""
    g = gamma(p0, shift * p0)
    f = lattice(g)
    b = f.denominator
    found: list[int] = []

    def visit(arl: Callable[[int], float], first: int, last: int) -> bool:
        # the ARL grows with h: the stretch that reaches the run length holds the smallest such h
        if arl(last) < sessions:
            if last > H_LIMIT * b:
                raise ChainError(f"no decision interval up to h = {H_LIMIT} reaches {sessions} sessions at p0 = {p0:g}")
            return False
        low, high = first - 1, last  # arl(high) ≥ sessions; arl(low) < sessions or low below the stretch
        while high - low > 1:
            middle = (low + high) // 2
            if arl(middle) >= sessions:
                high = middle
            else:
                low = middle
        found.append(high)
        return True

    _sweep(p0, f, visit, blocks=16)
    return g, found[0] / b


def grid(shift: float) -> list[float]:
    """The p₀ of :func:`interval_table`: log-spaced from P_LOW to the top, both included."""
    top = min(P_HIGH, TOP_DETECTED / shift)
    steps = max(1, math.ceil(STEPS_PER_DOUBLING * math.log2(top / P_LOW)))
    return [P_LOW * (top / P_LOW) ** (i / steps) for i in range(steps + 1)]


@lru_cache(maxsize=64)
def interval_table(shift: float, sessions: int) -> tuple[tuple[float, float], ...]:
    """(p₀, h) for every p₀ of :func:`grid`: what the verdict SQL interpolates h on, linearly in
    ln p₀. Values are rounded to 9 significant digits, as the SQL prints them."""
    return tuple((float(f"{p:.9g}"), float(f"{decision_interval(p, shift, sessions)[1]:.9g}"))
                 for p in grid(shift))


def interpolated_h(table: tuple[tuple[float, float], ...], p0: float) -> float | None:
    """h at p₀ from ``table``, linear in ln p₀; p₀ below the first row is taken as the first row's,
    and above the last row there is none (the rule the verdict SQL follows)."""
    p = max(p0, table[0][0])
    for (lo, h_lo), (hi, h_hi) in zip(table, table[1:]):
        if lo <= p <= hi:
            return h_lo + (h_hi - h_lo) * (math.log(p) - math.log(lo)) / (math.log(hi) - math.log(lo))
    return None
