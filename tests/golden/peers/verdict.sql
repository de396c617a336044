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
-- Verdict: a window breaches when it has a threshold, its value is above it, and the data is enough
-- to say so: at least 3 sessions, 2 bad. It is healthy when it has a threshold, a
-- value, at least 3 sessions and is not beyond the threshold. Every other window gets no verdict
-- (breach NULL): too few sessions, no value (a zero denominator, no session with a value), or
-- beyond the threshold on too little evidence. A window without a verdict is neither healthy nor a breach: it
-- does not enter the history and cannot close an alert. A window before the series has a threshold
-- enters the history when it has a value and at least 3 sessions (breach false).
--
-- A window's threshold needs no history, only the windows of its peers, so one pass decides every
-- verdict: no loop. A time window has the same window_number in every series of the check, and the
-- windows of all series for one time close at the same watermark (the check's), so a new window's
-- peers are all among this run's new windows (new_key_windows: every key's window of that time).

-- peer_pairs: each new window of a series (by its row in new_windows: the pairs grow with the square
-- of a peer group, so they carry no key) beside each window of its peers of the same time.
CREATE OR REPLACE TEMP TABLE peer_pairs AS
SELECT
    s.rowid AS window_id, p.sessions AS peer_sessions,
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
    SELECT window_id, count(*) AS peers, sum(peer_sessions) AS peer_sessions,
           sum(peer_bad) / sum(peer_sessions) AS p0
    FROM peer_pairs
    GROUP BY window_id
),
scored AS (
    -- each peer's z-score against p₀ (none when p₀ is 0 or 1: no binomial spread to scale by)
    SELECT x.window_id, (x.peer_value - t.p0) / sqrt(t.p0 * (1 - t.p0) / x.peer_sessions) AS z
    FROM peer_pairs AS x
    JOIN pooled AS t ON x.window_id = t.window_id
    WHERE t.p0 > 0 AND t.p0 < 1
),
bounds AS (
    SELECT window_id, quantile_cont(z, 0.1) AS low, quantile_cont(z, 0.9) AS high
    FROM scored
    GROUP BY window_id
),
dispersion AS (
    -- φ̂: the mean square of the winsorised z-scores
    SELECT z.window_id, avg(least(greatest(z.z, b.low), b.high) ^ 2) AS phi_hat
    FROM scored AS z
    JOIN bounds AS b ON z.window_id = b.window_id
    GROUP BY z.window_id
)
SELECT
    t.window_id, t.peers, t.peer_sessions, t.p0 AS baseline,
    CASE WHEN t.peers >= 2
              AND t.peers * d.phi_hat > (t.peers - 1) * (1 - 2 / (9 * (t.peers - 1))
                                                         + 1.6448536269514722 * sqrt(2 / (9 * (t.peers - 1)))) ^ 3
         THEN d.phi_hat ELSE 1.0 END AS spread
FROM pooled AS t
LEFT JOIN dispersion AS d ON t.window_id = d.window_id;

-- judged: every new window with its peers' figure, threshold and verdict (breach NULL: no verdict,
-- as for the other methods: too few sessions, no value, or beyond the limit on too few bad sessions).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    CASE
        WHEN value IS NULL OR sessions < 3 THEN NULL
        WHEN threshold IS NULL OR NOT coalesce(value > threshold, false) THEN false
        WHEN bad < 2 THEN NULL
        ELSE true
    END AS breach
FROM (
    SELECT
        n.*,
        f.baseline,
        coalesce(f.peers, 0) AS history_windows,
        CASE WHEN f.peers >= 2 THEN
            f.baseline + 2.5 * sqrt(f.spread * f.baseline * (1 - f.baseline) * (1 / n.sessions + 1 / f.peer_sessions))
        END AS threshold
    FROM new_windows AS n
    LEFT JOIN peer_figures AS f ON f.window_id = n.rowid
);
