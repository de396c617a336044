"""An independent, loop-by-loop implementation of Plimsoll's window, baseline and lifecycle rules.

Written from the semantics (README's "How a check decides" and the baseline formulas; not from the
SQL templates) so property tests can compare the two. It is plain Python over rows as dicts, with
numpy for one thing only, the linear-interpolation quantile; it uses no pandas and no SQL. It is slow
on purpose: every rule is one readable loop. It covers a single run that reads all the data at once,
so the watermark is the largest event time read.

Baseline methods: ``rolling_percentile`` (factor × quantile of earlier values, with a floor),
``p_chart`` (p̄ pooled over earlier windows ± sigmas standard errors at this window's n; NIST/SEMATECH
e-Handbook §6.3.3.2), ``ewma`` (the statistic z = λ·value + (1−λ)·z of the previous window, against
target ± sigmas·s·√(λ/(2−λ)), target and s given or the mean and sample standard deviation of
earlier windows; §6.3.2.4), ``cusum`` (the Bernoulli CUSUM S = min(2h, max(0, S + bad − n·γ)) of
Reynolds and Stoumbos 1999, p₀ pooled as for the p-chart, h interpolated in ln p₀ from the table of
decision intervals the toolkit computes, the one thing taken from it), and for rates the Wilson
(1927) score bound as a ``confidence`` gate.
``peers`` compares each time window of a series with the same window of the series sharing
``peers_by``, itself left out: for rates funnel-plot limits p₀ ± sigmas·√(φ·p₀(1−p₀)·(1/n + 1/N)),
N the peers' sessions, with the
winsorised over-dispersion factor φ (Spiegelhalter 2005, both papers), for ratios and quantiles the
peers' median ± sigmas·1.4826·MAD.

Expressions are given as Python callables over a row dict that return ``None`` for SQL NULL.
"""

from __future__ import annotations

import hashlib
import json
import math
import statistics
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from toolkit.runlength import interval_table

Row = dict[str, Any]
RowFn = Callable[[Row], Any]

EPOCH = datetime(1970, 1, 1)
ONE_US = timedelta(microseconds=1)


@dataclass(frozen=True)
class OracleCheck:
    """What the oracle needs of one check; the expression fields are Python callables."""

    name: str
    by: tuple[str, ...]
    kind: str                                  # rate | ratio | quantile
    bad: RowFn | None = None
    split: str | None = None
    numerator: RowFn | None = None
    denominator: RowFn | None = None
    of: RowFn | None = None
    q: float | None = None
    direction: str = "up"
    sessions: int | None = None                # count window
    max_wait: timedelta | None = None
    every: timedelta | None = None             # time window
    lateness: timedelta = timedelta(0)
    method: str = "rolling_percentile"         # rolling_percentile | p_chart | ewma
    base_q: float = 0.9                        # rolling_percentile: the quantile of earlier values
    history: int = 10
    min_history: int = 3
    factor: float = 1.0
    floor: float | None = None
    sigmas: float = 3.0                        # p_chart, ewma
    lam: float | None = None                   # ewma: λ
    target: float | None = None                # ewma: the known mean, else from history
    sigma: float | None = None                 # ewma: the known standard deviation, else from history
    shift: float | None = None                 # cusum: the rate to detect is shift × p₀
    in_control_sessions: int | None = None     # cusum: the in-control run length h is chosen for
    confidence: float | None = None            # rate: the Wilson bound's two-sided confidence
    peers_by: tuple[str, ...] = ()             # peers: the columns of `by` a series' peers share
    min_peers: int = 3                         # peers: fewer peers than this, no threshold
    min_sessions: int = 1
    min_bad: int = 0
    recover_after: int = 2
    expire_after: timedelta = timedelta(days=7)
    reopen_within: timedelta = timedelta(hours=6)
    definition: str = ""                       # the compiled check's definition hash (in alert ids)
    where: RowFn | None = None
    exclude: RowFn | None = None
    severity: str = "medium"


@dataclass
class Result:
    """The oracle's windows, alerts and alert events, plus what it needed to decide them."""

    watermark: datetime | None
    windows: list[Row] = field(default_factory=list)
    alerts: list[Row] = field(default_factory=list)
    events: list[Row] = field(default_factory=list)
    # A value within rounding of its threshold where one side came from interpolation: the verdict
    # then depends on the last bit of two correct quantile algorithms, so a test should skip it.
    ambiguous: bool = False


# ----------------------------------------------------------------------------------------------
# small pieces


def quantile(values: list[float], q: float) -> tuple[float | None, bool]:
    """quantile_cont (numpy 'linear'); the flag says whether the result is exact (no interpolation)."""
    if not values:
        return None, True
    ordered = sorted(values)
    pos = (len(ordered) - 1) * q
    lo = math.floor(pos)
    hi = min(lo + 1, len(ordered) - 1)
    exact = pos == lo or ordered[lo] == ordered[hi]
    return float(np.quantile(np.array(ordered, dtype=float), q, method="linear")), exact


def epoch_us(t: datetime) -> int:
    return (t - EPOCH) // ONE_US


def as_text(value: Any) -> str | None:
    """A key or split value as VARCHAR."""
    if value is None:
        return None
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def key_text(by: tuple[str, ...], values: tuple[str | None, ...]) -> str:
    return ", ".join(f"{c}={key_value(v)}" for c, v in zip(by, values))


def key_value(value: str | None) -> str:
    """One key value as key_text writes it: plain when it is letters, digits and _.:/@+- only,
    otherwise in double quotes with backslash and quote escaped; NULL as <null>."""
    if value is None:
        return "<null>"
    if value and all(ch.isalpha() or ch.isnumeric() or ch in "_.:/@+-" for ch in value):
        return value
    return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'


def alert_hash(check: str, by: tuple[str, ...], values: tuple[str | None, ...], split: str | None,
               opened_at: datetime | None, seq: int | None = None, definition: str = "") -> str:
    """First 16 hex of md5 over the JSON of {'check','key','split'[,'opened_at','window_number','definition']}
    as DuckDB writes it; ``definition`` is the check's compiled-definition hash, an opaque label."""
    key = "{" + ",".join(f"{json.dumps(c)}:{json.dumps(v)}" for c, v in zip(by, values)) + "}"
    parts = [f'"check":{json.dumps(check)}', f'"key":{key}', f'"split":{json.dumps(split)}']
    if opened_at is not None:
        parts.append(f'"opened_at":"{_ts_text(opened_at)}"')
        parts.append(f'"window_number":{seq}')
        parts.append(f'"definition":{json.dumps(definition)}')
    text = "{" + ",".join(parts) + "}"
    return hashlib.md5(text.encode("utf-8")).hexdigest()[:16]


def _ts_text(t: datetime) -> str:
    text = t.strftime("%Y-%m-%d %H:%M:%S")
    if t.microsecond:
        text += f".{t.microsecond:06d}".rstrip("0")
    return text


def truthy(value: Any) -> bool:
    """A SQL boolean used as a filter: NULL is false."""
    return value is not None and bool(value)


# ----------------------------------------------------------------------------------------------
# reading: watermark, invalid rows, duplicates, exclusion, where


def watermark(rows: list[Row], event_time: str) -> datetime | None:
    times = [r[event_time] for r in rows if r[event_time] is not None]
    return max(times) if times else None


def selected_sessions(check: OracleCheck, rows: list[Row], session_id: str,
                      event_time: str) -> list[Row]:
    """Valid rows, one per session id (first by event time, then file name), excluded/where applied."""
    valid = [r for r in rows if r[session_id] is not None and r[event_time] is not None]
    first: dict[Any, Row] = {}
    for r in sorted(valid, key=lambda r: (r[event_time], r.get("_file", ""))):
        first.setdefault(r[session_id], r)
    kept = []
    for r in first.values():
        if check.exclude is not None and truthy(check.exclude(r)):
            continue
        if check.where is not None and not truthy(check.where(r)):
            continue
        kept.append(r)
    return kept


# ----------------------------------------------------------------------------------------------
# windows


@dataclass
class KeyWindow:
    seq: int
    start: datetime
    end: datetime
    rows: list[Row]


def count_windows(rows: list[Row], n: int, max_wait: timedelta, w: datetime,
                  session_id: str, event_time: str) -> list[KeyWindow]:
    """Greedy count windows of one key; only the closed ones."""
    ordered = sorted(rows, key=lambda r: (r[event_time], str(r[session_id])))
    out: list[KeyWindow] = []
    a = 0
    while a < len(ordered):
        limit = ordered[a][event_time] + max_wait
        b = a
        while b + 1 < len(ordered) and b + 1 - a < n and ordered[b + 1][event_time] <= limit:
            b += 1
        members = ordered[a:b + 1]
        if len(members) == n or w > limit:
            times = [r[event_time] for r in members]
            out.append(KeyWindow(len(out) + 1, min(times), max(times), members))
            a = b + 1
        else:
            break
    return out


def time_windows(rows: list[Row], every: timedelta, lateness: timedelta, w: datetime,
                 event_time: str) -> list[KeyWindow]:
    """Epoch-aligned windows of one key that hold a session; only the closed ones."""
    size = every // ONE_US
    groups: dict[int, list[Row]] = {}
    for r in rows:
        groups.setdefault(epoch_us(r[event_time]) // size, []).append(r)
    out = []
    for k in sorted(groups):
        start = EPOCH + timedelta(microseconds=k * size)
        end = EPOCH + timedelta(microseconds=(k + 1) * size)
        if w > end + lateness:
            out.append(KeyWindow(k, start, end, groups[k]))
    return out


# ----------------------------------------------------------------------------------------------
# measures


def measure_rows(check: OracleCheck, windows: list[KeyWindow]) -> list[tuple[str | None, Row]]:
    """(split value, window row) per series and key window, in seq order."""
    out: list[tuple[str | None, Row]] = []
    seen: list[str | None] = []
    for ordinal, kw in enumerate(windows, start=1):
        base = {"window_number": kw.seq, "window_start": kw.start, "window_end": kw.end, "sessions": len(kw.rows),
                "key_window": ordinal}
        if check.kind == "rate":
            flags = [truthy(check.bad(r)) for r in kw.rows]
            if check.split is None:
                bad = sum(flags)
                out.append((None, {**base, "bad": bad, "value": bad / len(kw.rows), "exact": True}))
                continue
            values = [as_text(r[check.split]) for r, f in zip(kw.rows, flags) if f]
            for v in values:
                if v not in seen:
                    seen.append(v)
            for v in seen:
                bad = sum(1 for x in values if x == v)
                out.append((v, {**base, "bad": bad, "value": bad / len(kw.rows), "exact": True}))
        elif check.kind == "ratio":
            nums = [check.numerator(r) for r in kw.rows]
            dens = [check.denominator(r) for r in kw.rows]
            nums = [float(x) for x in nums if x is not None]
            dens = [float(x) for x in dens if x is not None]
            num = sum(nums) if nums else None
            den = sum(dens) if dens else None
            value = None if num is None or den is None or den == 0 else num / den
            # each session's own value, for the sessions an alert counts as affected
            own = [None if n is None or d is None or float(d) == 0 else float(n) / float(d)
                   for n, d in ((check.numerator(r), check.denominator(r)) for r in kw.rows)]
            out.append((None, {**base, "bad": None, "value": value, "exact": True, "own": own}))
        elif check.kind == "quantile":
            xs = [float(x) for x in (check.of(r) for r in kw.rows) if x is not None]
            value, exact = quantile(xs, check.q)
            out.append((None, {**base, "bad": None, "value": value, "exact": exact, "own": xs}))
        else:
            raise ValueError(check.kind)
    return out


# ----------------------------------------------------------------------------------------------
# baseline and breach (sequential)


@dataclass(frozen=True)
class Earlier:
    """One earlier window that did not breach and had a value: history for the windows after it."""

    value: float
    sessions: int
    bad: int | None


def limits(check: OracleCheck, hist: list[Earlier], sessions: int) -> tuple[float | None, float | None, bool]:
    """(baseline, threshold, exact) of a window from its history; ``exact`` when no rounding went
    into the threshold, so a value equal to it is equal in any correct implementation."""
    up = check.direction == "up"
    if check.method == "rolling_percentile":
        baseline, exact = quantile([h.value for h in hist], check.base_q)
        if len(hist) < check.min_history:
            return baseline, None, exact
        threshold = check.factor * baseline
        if check.floor is not None:
            threshold = max(check.floor, threshold) if up else min(check.floor, threshold)
        return baseline, threshold, exact
    if check.method == "p_chart":
        # p̄ pools the earlier windows' counts (Σ bad ÷ Σ sessions), not their rates
        pooled = sum(h.bad for h in hist) / sum(h.sessions for h in hist) if hist else None
        if len(hist) < check.min_history:
            return pooled, None, True
        spread = check.sigmas * math.sqrt(pooled * (1 - pooled) / sessions)
        if up:
            return pooled, pooled + spread, spread == 0
        # a lower limit clipped to 0 well below it is exactly 0 however it was rounded
        return pooled, max(0.0, pooled - spread), spread == 0 or pooled - spread < -1e-9 * spread
    if check.method == "ewma":
        values = [h.value for h in hist]
        target = check.target if check.target is not None else (statistics.fmean(values) if values else None)
        s = check.sigma if check.sigma is not None else (statistics.stdev(values) if len(values) > 1 else None)
        if len(hist) < check.min_history or target is None or s is None:
            return target, None, False
        width = check.sigmas * s * math.sqrt(check.lam / (2 - check.lam))
        # a limit of exactly 0 from a target and spread of 0 went through no rounding
        return target, (target + width if up else target - width), width == 0 and target == 0
    raise ValueError(check.method)


def cusum_step(s: float, x: float, n: int, k: float, ceiling: float | None) -> float:
    """One step of a tabular CUSUM over a window of n observations summing to x, reference value k
    per observation: max(0, s + x − n·k), and never above ``ceiling`` when one is given."""
    s = max(0.0, s + x - n * k)
    return s if ceiling is None else min(ceiling, s)


def cusum_design(check: OracleCheck, p0: float) -> tuple[float, float] | None:
    """(γ, h) of the CUSUM at in-control rate p₀: γ = ln[(1−p₀)/(1−p₁)] / ln[p₁(1−p₀)/(p₀(1−p₁))]
    with p₁ = shift·p₀ (Reynolds and Stoumbos 1999), h linear in ln p₀ between the rows of the
    toolkit's table; a p₀ below the table is its first row's, above it there is none."""
    table = interval_table(float(check.shift), int(check.in_control_sessions))
    p = max(p0, table[0][0])
    if p > table[-1][0]:
        return None
    for (lo, h_lo), (hi, h_hi) in zip(table, table[1:]):
        if lo <= p < hi:
            h = h_lo + (h_hi - h_lo) * (math.log(p) - math.log(lo)) / (math.log(hi) - math.log(lo))
            break
    else:
        h = table[-1][1]
    p1 = check.shift * p
    return math.log((1 - p) / (1 - p1)) / math.log(p1 * (1 - p) / (p * (1 - p1))), h


def wilson(bad: int, n: int, confidence: float, end: str) -> float:
    """Wilson (1927) score interval's lower or upper end for bad of n at a two-sided confidence."""
    z = statistics.NormalDist().inv_cdf(1 - (1 - confidence) / 2)
    p = bad / n
    centre = p + z * z / (2 * n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    scale = 1 + z * z / n
    return max(0.0, (centre - half) / scale) if end == "lower" else min(1.0, (centre + half) / scale)


def _near(a: float, b: float, rel: float = 1e-9) -> bool:
    return abs(a - b) <= rel * max(abs(a), abs(b), 1e-300)


def judge(check: OracleCheck, series: list[Row], prior: list[int] | tuple[int, ...] = ()) -> bool:
    """Fill statistic/baseline/threshold/breach in place for one series in seq order; True if
    ambiguous (a verdict on a tie that rounding could decide either way).

    ``prior``: the sessions of the quiet windows before the series' first one, each eligible
    history at value 0 with no bad session (a split value first seen in its key's n-th window has
    the n-1 windows of its key before it).
    """
    ambiguous = False
    # a quiet window is history when it has sessions enough for a verdict
    eligible = [Earlier(0.0, n, 0) for n in prior if n >= check.min_sessions]
    up = check.direction == "up"
    z = check.target if check.method == "ewma" else None   # the EWMA of the previous window
    zeros = not z                                           # only zeros went into z: it is exact
    cusum = 0.0                                             # the CUSUM of the previous window
    for w in series:
        value = w["value"]
        if check.method == "ewma":
            # a window without a value keeps the statistic; a series without a target starts at its
            # first value
            if value is not None:
                previous = value if z is None else z
                z = check.lam * value + (1 - check.lam) * previous
                zeros = zeros and value == 0
            w["statistic"] = z
        else:
            w["statistic"] = None
        hist = eligible[-check.history:]
        w["history_windows"] = len(hist)
        if check.method == "cusum":
            # p₀ pooled as for the p-chart; a window without a design (too little history, p₀ above
            # the table) or without a value keeps S
            pooled = sum(h.bad for h in hist) / sum(h.sessions for h in hist) if hist else None
            design = cusum_design(check, pooled) if len(hist) >= check.min_history else None
            if design is not None and value is not None:
                gamma, h = design
                cusum = cusum_step(cusum, w["bad"], w["sessions"], gamma, 2 * h)
            w["statistic"] = cusum
            w["baseline"], threshold, exact = pooled, (design[1] if design else None), False
        else:
            w["baseline"], threshold, exact = limits(check, hist, w["sessions"])
        w["threshold"] = threshold
        judged = w["statistic"] if check.method in ("ewma", "cusum") else value
        crosses = False
        if threshold is not None and value is not None and judged is not None:
            crosses = judged > threshold if up else judged < threshold
            if _near(judged, threshold) and not (exact and w["exact"] and (check.method != "ewma" or zeros)):
                ambiguous = True
        # breach: True, False (healthy, or no threshold yet), None (no verdict: too little data)
        if value is None or w["sessions"] < check.min_sessions:
            verdict = None
        elif not crosses:
            verdict = False
        elif check.kind == "rate" and w["bad"] < check.min_bad:
            verdict = None
        else:
            verdict = True
            if check.confidence is not None:
                bound = wilson(w["bad"], w["sessions"], check.confidence, "lower" if up else "upper")
                if not (bound > threshold if up else bound < threshold):
                    verdict = None
                if _near(bound, threshold, 1e-8):
                    ambiguous = True
        w["breach"] = verdict
        if verdict is False:
            eligible.append(Earlier(value, w["sessions"], w["bad"]))
    return ambiguous


# ----------------------------------------------------------------------------------------------
# peers: the same time window of the other series that share peers_by

# the 95th percentile of the standard normal, and the MAD's consistency factor 1 / Φ⁻¹(0.75)
Z95 = statistics.NormalDist().inv_cdf(0.95)
MAD_SCALE = 1 / statistics.NormalDist().inv_cdf(0.75)


def chi2_95(df: int) -> float:
    """The 95th percentile of χ² with ``df`` degrees of freedom, by Wilson and Hilferty (1931)."""
    return df * (1 - 2 / (9 * df) + Z95 * math.sqrt(2 / (9 * df))) ** 3


def overdispersion(p0: float, peers: list[tuple[int, float]]) -> tuple[float, bool]:
    """(φ, exact) for peers' (sessions, rate) around p₀: the mean square of their z-scores
    winsorised to the 10th and 90th percentiles, used when I·φ̂ passes χ²(I−1)'s 95th percentile,
    else 1. ``exact`` is False when I·φ̂ lies within rounding of that percentile."""
    if not 0 < p0 < 1 or len(peers) < 2:
        return 1.0, True
    z = [(y - p0) / math.sqrt(p0 * (1 - p0) / n) for n, y in peers]
    low, _ = quantile(z, 0.1)
    high, _ = quantile(z, 0.9)
    phi_hat = statistics.fmean([min(max(x, low), high) ** 2 for x in z])
    limit = chi2_95(len(peers) - 1)
    return (phi_hat if len(peers) * phi_hat > limit else 1.0), not _near(len(peers) * phi_hat, limit, 1e-9)


def peer_rate_limit(p0: float, n: int, peer_sessions: float, phi: float, sigmas: float, up: bool) -> float:
    """The funnel-plot limit of a window of n sessions around the peers' pooled rate p₀, estimated
    from ``peer_sessions`` sessions (math.inf: p₀ known, the funnel plot's own limit)."""
    width = sigmas * math.sqrt(phi * p0 * (1 - p0) * (1 / n + 1 / peer_sessions))
    return p0 + width if up else max(0.0, p0 - width)


def judge_peers(check: OracleCheck, keyed: list[tuple[tuple[str | None, ...], dict[int, int],
                                                      dict[str | None, list[Row]]]]) -> bool:
    """Fill baseline/history_windows/threshold/breach of every series from its peers; True if a
    verdict is ambiguous. ``keyed``: per key, its values, its windows' sessions by window number,
    and its series (split value → windows)."""
    ambiguous = False
    up = check.direction == "up"
    shared = [check.by.index(c) for c in check.peers_by]
    by_number: dict[tuple[tuple[str | None, ...], str | None], dict[int, Row]] = {}
    for values, _, series in keyed:
        for split, rows in series.items():
            by_number[(values, split)] = {r["window_number"]: r for r in rows}
    for values, _, series in keyed:
        group = [values[i] for i in shared]
        others = [(v, sizes) for v, sizes, _ in keyed
                  if v != values and [v[i] for i in shared] == group]
        for split, rows in series.items():
            for w in rows:
                k = w["window_number"]
                peers: list[tuple[int, float, int | None]] = []     # (sessions, value, bad)
                for v, sizes in others:
                    if k not in sizes or sizes[k] < check.min_sessions:
                        continue
                    row = by_number.get((v, split), {}).get(k)
                    if check.kind == "rate":
                        bad = row["bad"] if row is not None else 0
                        peers.append((sizes[k], bad / sizes[k], bad))
                    elif row is not None and row["value"] is not None:
                        peers.append((sizes[k], row["value"], None))
                w["statistic"] = None
                w["history_windows"] = len(peers)
                threshold, exact = None, True
                if check.kind == "rate":
                    p0 = sum(p[2] for p in peers) / sum(p[0] for p in peers) if peers else None
                    w["baseline"] = p0
                    if len(peers) >= check.min_peers:
                        phi, exact = overdispersion(p0, [(n, y) for n, y, _ in peers])
                        peer_sessions = sum(p[0] for p in peers)
                        threshold = peer_rate_limit(p0, w["sessions"], peer_sessions, phi, check.sigmas, up)
                        width = abs(peer_rate_limit(p0, w["sessions"], peer_sessions, phi, check.sigmas, True) - p0)
                        # no spread (p₀ of 0 or 1), or a lower limit clipped to 0 well below it: exact
                        exact = exact and (width == 0 or (not up and p0 - width < -1e-9 * width))
                else:
                    median, median_exact = quantile([y for _, y, _ in peers], 0.5)
                    w["baseline"] = median
                    if len(peers) >= check.min_peers:
                        mad, _ = quantile([abs(y - median) for _, y, _ in peers], 0.5)
                        width = check.sigmas * MAD_SCALE * mad
                        threshold = median + width if up else median - width
                        exact = median_exact and width == 0
                w["threshold"] = threshold
                value = w["value"]
                crosses = threshold is not None and value is not None and (
                    value > threshold if up else value < threshold)
                if threshold is not None and value is not None and _near(value, threshold) and not (
                        exact and w["exact"]):
                    ambiguous = True
                # as for the other methods: None is no verdict (too little data)
                if value is None or w["sessions"] < check.min_sessions:
                    w["breach"] = None
                elif not crosses:
                    w["breach"] = False
                elif check.kind == "rate" and w["bad"] < check.min_bad:
                    w["breach"] = None
                else:
                    w["breach"] = True
    return ambiguous


# ----------------------------------------------------------------------------------------------
# lifecycle


def lifecycle(check: OracleCheck, series: list[Row], w: datetime, ident: dict[str, Any]
              ) -> tuple[list[Row], list[Row]]:
    """Alerts and events of one series from its judged windows."""
    alerts: list[Row] = []
    events: list[Row] = []
    x = check.expire_after
    up = check.direction == "up"
    current: Row | None = None
    prev_end: datetime | None = None
    last_recovered: tuple[Row, datetime] | None = None   # the alert of the series' last close, a recovery


    def close(reason: str, at: datetime) -> None:
        nonlocal current, last_recovered
        current["status"] = "closed"
        current["close_reason"] = reason
        current["closed_at"] = at
        events.append({"alert_id": current["alert_id"], "event": "closed", "occurred_at": at})
        last_recovered = (current, at) if reason == "recovered" else None
        current = None

    for win in series:
        end = win["window_end"]
        if current is not None and end > prev_end + x:
            close("expired", prev_end + x)
        # no verdict (breach None: too little data, no value): neither healthy nor a breach
        healthy = win["threshold"] is not None and win["value"] is not None and win["breach"] is False
        if win["breach"] and current is None and last_recovered is not None \
                and win["window_start"] < last_recovered[1] + check.reopen_within:
            # a breach soon after a recovery reopens that alert: its counts go on
            current = last_recovered[0]
            last_recovered = None
            affected = win["bad"] if check.kind == "rate" else sum(
                1 for v in win["own"] if v is not None and (v > win["threshold"] if up else v < win["threshold"]))
            current.update(status="open", close_reason=None, closed_at=None, healthy_streak=0,
                           last_breach_at=end, breach_windows=current["breach_windows"] + 1,
                           affected_sessions=current["affected_sessions"] + affected,
                           peak_value=(max if up else min)(current["peak_value"], win["value"]))
            events.append({"alert_id": current["alert_id"], "event": "reopened", "occurred_at": end,
                           "value": win["value"], "threshold": win["threshold"],
                           "affected_sessions": current["affected_sessions"]})
        elif win["breach"]:
            # a ratio's or quantile's affected sessions: those whose own value is beyond the threshold
            affected = win["bad"] if check.kind == "rate" else sum(
                1 for v in win["own"] if v is not None and (v > win["threshold"] if up else v < win["threshold"]))
            if current is not None:
                current["breach_windows"] += 1
                current["affected_sessions"] += affected
                current["peak_value"] = (max if up else min)(current["peak_value"], win["value"])
                current["last_breach_at"] = end
                current["healthy_streak"] = 0
                events.append({"alert_id": current["alert_id"], "event": "updated", "occurred_at": end,
                               "value": win["value"], "threshold": win["threshold"],
                               "affected_sessions": current["affected_sessions"]})
            else:
                current = {
                    **ident,
                    "alert_id": alert_hash(check.name, ident["_by"], ident["_values"], ident["split_value"], end,
                                           win["window_number"], check.definition),
                    "fingerprint": alert_hash(check.name, ident["_by"], ident["_values"], ident["split_value"], None),
                    "severity": check.severity, "status": "open", "close_reason": None,
                    "opened_at": end, "last_breach_at": end, "closed_at": None, "breach_windows": 1,
                    "affected_sessions": affected, "peak_value": win["value"],
                    "threshold": win["threshold"], "healthy_streak": 0,
                }
                alerts.append(current)
                events.append({"alert_id": current["alert_id"], "event": "opened", "occurred_at": end,
                               "value": win["value"], "threshold": win["threshold"],
                               "affected_sessions": affected})
        elif healthy and current is not None:
            current["healthy_streak"] += 1
            if current["healthy_streak"] >= check.recover_after:
                close("recovered", end)
        prev_end = end
    if current is not None and prev_end is not None and w > prev_end + x:
        close("expired", prev_end + x)
    for a in alerts:
        a.pop("_by", None)
        a.pop("_values", None)
    return alerts, events


# ----------------------------------------------------------------------------------------------
# the whole check


def run_check(check: OracleCheck, rows: list[Row], session_id: str = "session_id",
              event_time: str = "ended_at", watermark_at: datetime | None = None) -> Result:
    """Windows, alerts and events of one check over all rows read in one run.

    ``watermark_at`` is the run's watermark when ``rows`` are only some of its series (the rest
    are judged in other calls); by default it is the latest event time of ``rows``.
    """
    w = watermark_at if watermark_at is not None else watermark(rows, event_time)
    result = Result(watermark=w)
    if w is None:
        return result
    keys: dict[tuple[str | None, ...], list[Row]] = {}
    for r in selected_sessions(check, rows, session_id, event_time):
        keys.setdefault(tuple(as_text(r[c]) for c in check.by), []).append(r)
    keyed = []
    for values, members in keys.items():
        if check.sessions is not None:
            kws = count_windows(members, check.sessions, check.max_wait, w, session_id, event_time)
        else:
            kws = time_windows(members, check.every, check.lateness, w, event_time)
        text = key_text(check.by, values)
        series: dict[str | None, list[Row]] = {}
        for split, row in measure_rows(check, kws):
            series.setdefault(split, []).append({"key_text": text, "split_value": split, **row})
        keyed.append((values, {kw.seq: len(kw.rows) for kw in kws}, series, kws, text))
    if check.method == "peers":
        result.ambiguous |= judge_peers(check, [(v, sizes, series) for v, sizes, series, _, _ in keyed])
    for values, _, series, kws, text in keyed:
        for split, rows_of in series.items():
            first = rows_of[0]["key_window"] if check.split is not None else 1
            if check.method != "peers":
                result.ambiguous |= judge(check, rows_of, [len(kw.rows) for kw in kws[:first - 1]])
            ident = {"key_text": text, "split_value": split, "_by": check.by, "_values": values}
            alerts, events = lifecycle(check, rows_of, w, ident)
            result.alerts += alerts
            result.events += events
            for r in rows_of:
                r.pop("exact")
                r.pop("key_window")
            result.windows += rows_of
    result.windows.sort(key=window_order)
    result.alerts.sort(key=alert_order)
    result.events.sort(key=event_order)
    return result


def _text_order(v: str | None) -> tuple[bool, str]:
    return (v is not None, v or "")


def window_order(r: Row) -> tuple:
    return (r["key_text"], _text_order(r["split_value"]), r["window_number"])


def alert_order(r: Row) -> tuple:
    return (r["key_text"], _text_order(r["split_value"]), r["opened_at"], r["closed_at"] is None,
            r["closed_at"] or r["opened_at"])


def event_order(r: Row) -> tuple:
    """Count windows can share an end time, so ties are broken by the cumulative count and value."""
    rank = {"opened": 0, "reopened": 0, "updated": 1, "closed": 2}
    return (r["alert_id"], r["occurred_at"], rank[r["event"]], r.get("affected_sessions") or 0,
            r.get("value") or 0.0)
