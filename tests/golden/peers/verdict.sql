-- ── stage 4 · verdict ──────────────────────────────────────────────────────────────────────
-- Each new window's baseline, threshold and verdict.
--
-- Baseline and threshold:
-- peers: each window against the same time window of its peers, the other series with the same
-- site, the series itself left out; a peer's window counts when it
-- has at least 3 sessions. Fewer than 2 peers: no threshold, no verdict.
-- Funnel-plot control limits for a proportion (Spiegelhalter 2005, "Funnel plots for comparing
-- institutional performance", Statistics in Medicine 24:1185-1202), n = this window's sessions,
-- N = the peers' sessions (p₀ is itself estimated from N sessions: with many peers 1/N vanishes):
--   baseline p₀ = Σ bad ÷ Σ sessions over the peers' windows
--   threshold = p₀ + 2.5 × √(φ × p₀ (1 − p₀) × (1/n + 1/N))
-- with the over-dispersion factor φ of the peers (Spiegelhalter 2005, "Handling over-dispersion of
-- performance indicators", Quality and Safety in Health Care 14:347-351): each of the I peers'
-- z = (yᵢ − p₀) / √(p₀ (1 − p₀) / nᵢ), winsorised to their 10th and 90th percentiles; φ̂ = Σ z² / I;
-- φ = φ̂ when I·φ̂ is above the 95th percentile of χ² with I − 1 degrees of freedom (Wilson and
-- Hilferty 1931: ν (1 − 2/9ν + 1.6448536 √(2/9ν))³), else 1.
-- history_windows holds the number of peers.
--
-- Verdict: a window breaches when it has a threshold, its value is above it, and it passes the guard
-- (at least 3 sessions and 2 bad); every other window with a threshold and a value is
-- healthy. A window without a value (a zero denominator, no session with a value) gives no verdict.
--
-- A window's threshold needs no history, only the windows of its peers, so one pass decides every
-- verdict: no loop. A time window has the same window_number in every series of the check, and the
-- windows of all series for one time close at the same watermark (the check's), so a new window's
-- peers are all among this run's new windows (new_key_windows: every key's window of that time).

-- peer_pairs: each new window of a series beside each window of its peers of the same time.
CREATE OR REPLACE TEMP TABLE peer_pairs AS
SELECT
    s.key, s.split_value, s.window_number, p.sessions AS peer_sessions,
    -- a peer without a row for this split value had no bad session with it
    coalesce(pw.bad, 0) AS peer_bad,
    coalesce(pw.bad, 0) / p.sessions AS peer_value
FROM new_windows AS s
JOIN new_key_windows AS p
    ON p.window_number = s.window_number AND p.key IS DISTINCT FROM s.key
    AND {'site': p.key['site']} IS NOT DISTINCT FROM {'site': s.key['site']}
LEFT JOIN new_windows AS pw
    ON pw.key = p.key AND pw.window_number = p.window_number AND pw.split_value IS NOT DISTINCT FROM s.split_value
WHERE p.sessions >= 3;

-- peer_figures: per window, how many peers, the pooled figure and the spread its limit uses.
CREATE OR REPLACE TEMP TABLE peer_figures AS
WITH pooled AS (
    SELECT key, split_value, window_number, count(*) AS peers, sum(peer_sessions) AS peer_sessions,
           sum(peer_bad) / sum(peer_sessions) AS p0
    FROM peer_pairs
    GROUP BY key, split_value, window_number
),
scored AS (
    -- each peer's z-score against p₀ (none when p₀ is 0 or 1: no binomial spread to scale by)
    SELECT x.key, x.split_value, x.window_number,
           (x.peer_value - t.p0) / sqrt(t.p0 * (1 - t.p0) / x.peer_sessions) AS z
    FROM peer_pairs AS x
    JOIN pooled AS t ON x.key = t.key AND x.split_value IS NOT DISTINCT FROM t.split_value AND x.window_number = t.window_number
    WHERE t.p0 > 0 AND t.p0 < 1
),
bounds AS (
    SELECT key, split_value, window_number, quantile_cont(z, 0.1) AS low, quantile_cont(z, 0.9) AS high
    FROM scored
    GROUP BY key, split_value, window_number
),
dispersion AS (
    -- φ̂: the mean square of the winsorised z-scores
    SELECT z.key, z.split_value, z.window_number, avg(least(greatest(z.z, b.low), b.high) ^ 2) AS phi_hat
    FROM scored AS z
    JOIN bounds AS b ON z.key = b.key AND z.split_value IS NOT DISTINCT FROM b.split_value AND z.window_number = b.window_number
    GROUP BY z.key, z.split_value, z.window_number
)
SELECT
    t.key, t.split_value, t.window_number, t.peers, t.peer_sessions, t.p0 AS baseline,
    CASE WHEN t.peers >= 2
              AND t.peers * d.phi_hat > (t.peers - 1) * (1 - 2 / (9 * (t.peers - 1))
                                                         + 1.6448536269514722 * sqrt(2 / (9 * (t.peers - 1)))) ^ 3
         THEN d.phi_hat ELSE 1.0 END AS spread
FROM pooled AS t
LEFT JOIN dispersion AS d ON t.key = d.key AND t.split_value IS NOT DISTINCT FROM d.split_value AND t.window_number = d.window_number;

-- judged: every new window with its peers' figure, threshold and verdict.
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    coalesce(
        threshold IS NOT NULL
        AND value IS NOT NULL
        AND value > threshold
        AND sessions >= 3
        AND bad >= 2
    , false) AS breach
FROM (
    SELECT
        n.*,
        f.baseline,
        coalesce(f.peers, 0) AS history_windows,
        CASE WHEN f.peers >= 2 THEN
            f.baseline + 2.5 * sqrt(f.spread * f.baseline * (1 - f.baseline) * (1 / n.sessions + 1 / f.peer_sessions))
        END AS threshold
    FROM new_windows AS n
    LEFT JOIN peer_figures AS f ON n.key = f.key AND n.split_value IS NOT DISTINCT FROM f.split_value AND n.window_number = f.window_number
);
