{% import "macros.sql" as m %}
{% set check_lit = check.name | literal %}
{% set b = baseline %}
{% set g = guard %}
-- ── stage 4 · verdict ──────────────────────────────────────────────────────────────────────
-- Each new window's baseline, threshold and verdict.
--
-- Baseline and threshold:
{% if b.method == "rolling_percentile" %}
-- rolling_percentile: baseline = quantile_cont(value, {{ b.q }}) over the series' last {{ b.history }} earlier
-- windows that did not breach; a window gets a threshold once it has {{ b.min_history }} of them:
{% if check.direction == "up" %}
--   threshold = {% if b.floor is not none %}greatest({{ b.floor }}, {% endif %}{{ b.factor }} × baseline{% if b.floor is not none %}){% endif +%}
{% else %}
--   threshold = {% if b.floor is not none %}least({{ b.floor }}, {% endif %}{{ b.factor }} × baseline{% if b.floor is not none %}){% endif +%}
{% endif %}
{% elif b.method == "p_chart" %}
-- p_chart (NIST/SEMATECH e-Handbook §6.3.3.2, proportions control chart): baseline = p̄ = Σ bad ÷
-- Σ sessions over the series' last {{ b.history }} earlier windows that did not breach (at least {{ b.min_history }});
-- the limit widens for small windows, n = this window's sessions:
{% if check.direction == "up" %}
--   threshold = p̄ + {{ b.sigmas }} × √(p̄ (1 − p̄) / n)
{% else %}
--   threshold = max(0, p̄ − {{ b.sigmas }} × √(p̄ (1 − p̄) / n))
{% endif %}
{% elif b.method == "ewma" %}
{% set lam = b.lam %}
-- ewma (NIST/SEMATECH e-Handbook §6.3.2.4, EWMA control chart), λ = {{ lam }}:
--   statistic z = {{ lam }} × value + {{ 1 - lam }} × z of the series' previous window
--   (a new series starts at {{ "the target " ~ b.target if b.target is not none else "its first value" }}; a window without a value keeps z);
--   target = {{ b.target if b.target is not none else "mean of the series' last " ~ b.history ~ " earlier windows that did not breach" }},
--   s = {{ b.sigma if b.sigma is not none else "their standard deviation" }};
--   threshold = target {{ "+" if check.direction == "up" else "−" }} {{ b.sigmas }} × s × √(λ / (2 − λ)), and the window breaches on z, not on its value.
{% elif b.method == "cusum" %}
-- cusum (Bernoulli CUSUM, Reynolds and Stoumbos 1999, Journal of Quality Technology 31:87–108):
--   p₀ = Σ bad ÷ Σ sessions over the series' last {{ b.history }} earlier windows that did not breach (at least {{ b.min_history }}),
--   p₁ = {{ b.shift }} × p₀ (the rise to detect), γ = ln[(1−p₀)/(1−p₁)] ÷ ln[p₁(1−p₀) / (p₀(1−p₁))];
--   statistic S = min(2h, max(0, S of the series' previous window + bad − sessions × γ)), starting at 0
--   (a window without a threshold keeps S); baseline = p₀, threshold = h, and the window breaches on S.
--   h makes the in-control average run length {{ b.in_control_sessions }} sessions: found for a grid of p₀ by the
--   Markov chain of Brook and Evans (1972) over the per-session statistic (toolkit/runlength.py),
--   interpolated here linearly in ln p₀. A p₀ below the grid's first row is taken as that row's
--   (γ then exceeds what that p₀ needs, so false alarms come less often, never more); above its
--   last row a window has no threshold.
--   Judged only at window ends, S is never above the per-session statistic V of the chain at the same
--   session. By induction over windows: if S ≤ V where a window starts, then since each session gives
--   V_i ≥ V_{i−1} + x_i − γ and V_i ≥ 0, at its end V ≥ max(0, V_start + bad − n·γ) ≥ max(0,
--   S_start + bad − n·γ) ≥ S (the ceiling only lowers S). So a window's S exceeds h only once V has:
--   false alarms come no more often than the chain's run length says.
--   The ceiling 2h changes nothing before S first exceeds h; after an incident it bounds the
--   evidence S carries, so S falls back below h within about h ÷ (γ − p₀) in-control sessions.
{% elif b.method == "peers" %}
-- peers: each window against the same time window of its peers, the other series with the same
-- {{ b.peers_by | join(", ") }}{% if measure.split %} and the same {{ measure.split }} value{% endif %}, the series itself left out; a peer's window counts when it
-- has at least {{ g.min_sessions }} sessions{% if measure.kind != "rate" %} and a value{% endif %}. Fewer than {{ b.min_peers }} peers: no threshold, no verdict.
{% if measure.kind == "rate" %}
-- Funnel-plot control limits for a proportion (Spiegelhalter 2005, "Funnel plots for comparing
-- institutional performance", Statistics in Medicine 24:1185-1202), n = this window's sessions,
-- N = the peers' sessions (p₀ is itself estimated from N sessions: with many peers 1/N vanishes):
--   baseline p₀ = Σ bad ÷ Σ sessions over the peers' windows
{% if check.direction == "up" %}
--   threshold = p₀ + {{ b.sigmas }} × √(φ × p₀ (1 − p₀) × (1/n + 1/N))
{% else %}
--   threshold = max(0, p₀ − {{ b.sigmas }} × √(φ × p₀ (1 − p₀) × (1/n + 1/N)))
{% endif %}
-- with the over-dispersion factor φ of the peers (Spiegelhalter 2005, "Handling over-dispersion of
-- performance indicators", Quality and Safety in Health Care 14:347-351): each of the I peers'
-- z = (yᵢ − p₀) / √(p₀ (1 − p₀) / nᵢ), winsorised to their 10th and 90th percentiles; φ̂ = Σ z² / I;
-- φ = φ̂ when I·φ̂ is above the 95th percentile of χ² with I − 1 degrees of freedom (Wilson and
-- Hilferty 1931: ν (1 − 2/9ν + 1.6448536 √(2/9ν))³), else 1.
{% else %}
-- A robust comparison with the peers' values: baseline = their median, s = 1.4826 × their median
-- absolute deviation (1.4826 = 1 / Φ⁻¹(0.75): s estimates a standard deviation for normal data):
--   threshold = median {{ "+" if check.direction == "up" else "−" }} {{ b.sigmas }} × s
{% endif %}
-- history_windows holds the number of peers.
{% endif %}
{% if measure.split %}
-- A split value first seen after its key's first window has the key's earlier windows as history,
-- each with value 0: it had no bad sessions in them.
{% endif %}
--
-- Verdict: a window breaches when it has a threshold, its {{ "EWMA statistic" if b.method == "ewma" else "CUSUM statistic" if b.method == "cusum" else "value" }} is {{ "above" if check.direction == "up" else "below" }} it, and the data is enough
-- to say so: at least {{ g.min_sessions }} sessions{% if measure.kind == "rate" %}, {{ g.min_bad }} bad{% endif %}{% if b.confidence %} and the confidence bound below{% endif %}. It is healthy when it has a threshold, a
-- value, at least {{ g.min_sessions }} sessions and is not beyond the threshold. Every other window gets no verdict
-- (breach NULL): too few sessions, no value (a zero denominator, no session with a value){% if measure.kind == "rate" or b.confidence %}, or
-- beyond the threshold on too little evidence{% endif %}. A window without a verdict is neither healthy nor a breach: it
-- does not enter the history and cannot close an alert. A window before the series has a threshold
-- enters the history when it has a value and at least {{ g.min_sessions }} sessions (breach false).
{% if b.confidence %}
-- confidence {{ b.confidence }}: it also needs the {{ "lower" if check.direction == "up" else "upper" }} end of its Wilson score interval (Wilson 1927)
-- at that two-sided confidence (z = {{ z_for(b.confidence) }}) beyond the threshold, so a small noisy window cannot:
--   bound = (p̂ + z²/2n {{ "−" if check.direction == "up" else "+" }} z·√(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n),  p̂ = bad / sessions
{% endif %}
--
{% if b.method == "peers" %}
-- A window's threshold needs no history, only the windows of its peers, so one pass decides every
-- verdict: no loop. A time window has the same window_number in every series of the check, and the
-- windows of all series for one time close at the same watermark (the check's), so a new window's
-- peers are all among this run's new windows (new_key_windows: every key's window of that time).

-- peer_pairs: each new window of a series (by its row in new_windows: the pairs grow with the square
-- of a peer group, so they carry no key) beside each window of its peers of the same time.
CREATE OR REPLACE TEMP TABLE peer_pairs AS
SELECT
    s.rowid AS window_id, p.sessions AS peer_sessions,
{% if measure.kind == "rate" %}
    -- a peer without a row for this split value had no bad session with it
    coalesce(pw.bad, 0) AS peer_bad,
    coalesce(pw.bad, 0) / p.sessions AS peer_value
{% else %}
    pw.value AS peer_value
{% endif %}
FROM new_windows AS s
JOIN new_key_windows AS p
    ON p.window_number = s.window_number AND p.key IS DISTINCT FROM s.key
    AND {{ m.from_map("p.key", b.peers_by) }} IS NOT DISTINCT FROM {{ m.from_map("s.key", b.peers_by) }}
LEFT JOIN new_windows AS pw
    ON pw.key = p.key AND pw.window_number = p.window_number AND pw.split_value IS NOT DISTINCT FROM s.split_value
WHERE p.sessions >= {{ g.min_sessions }}{% if measure.kind != "rate" %} AND pw.value IS NOT NULL{% endif %};

-- peer_figures: per window, how many peers, the pooled figure and the spread its limit uses.
CREATE OR REPLACE TEMP TABLE peer_figures AS
{% if measure.kind == "rate" %}
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
{% else %}
WITH centre AS (
    SELECT window_id, count(*) AS peers, quantile_cont(peer_value, 0.5) AS median
    FROM peer_pairs
    GROUP BY window_id
)
SELECT
    c.window_id, c.peers, c.median AS baseline,
    -- the median absolute deviation from the median
    quantile_cont(abs(x.peer_value - c.median), 0.5) AS spread
FROM centre AS c
JOIN peer_pairs AS x ON x.window_id = c.window_id
GROUP BY c.window_id, c.peers, c.median;
{% endif %}

-- judged: every new window with its peers' figure, threshold and verdict (breach NULL: no verdict,
-- as for the other methods: too few sessions, no value, or beyond the limit on too few bad sessions).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    CASE
        WHEN value IS NULL OR sessions < {{ g.min_sessions }} THEN NULL
        WHEN threshold IS NULL OR NOT coalesce(value {{ ">" if check.direction == "up" else "<" }} threshold, false) THEN false
{% if measure.kind == "rate" %}
        WHEN bad < {{ g.min_bad }} THEN NULL
{% endif %}
        ELSE true
    END AS breach
FROM (
    SELECT
        n.*,
        f.baseline,
        coalesce(f.peers, 0) AS history_windows,
        CASE WHEN f.peers >= {{ b.min_peers }} THEN
{% if measure.kind == "rate" %}
{% set width = b.sigmas ~ " * sqrt(f.spread * f.baseline * (1 - f.baseline) * (1 / n.sessions + 1 / f.peer_sessions))" %}
            {%+ if check.direction == "up" %}f.baseline + {{ width }}{% else %}greatest(0.0, f.baseline - {{ width }}){% endif +%}
{% else %}
            f.baseline {{ "+" if check.direction == "up" else "-" }} {{ b.sigmas }} * 1.482602218505602 * f.spread
{% endif %}
        END AS threshold
    FROM new_windows AS n
    LEFT JOIN peer_figures AS f ON f.window_id = n.rowid
);
{% else %}
-- A window's history is the earlier windows of its series that did not breach, so verdicts depend on
-- the verdicts before them: the statements between '@loop' and '@end' are one round, repeated until
-- no window changes between history and not (a breach and a window without a verdict are both kept
-- out of it, so a flag moving between the two changes no baseline). A round recomputes only the
-- series still changing, all of them at once.

-- history: the series' earlier windows that did not breach (and, for a split value seen late, its
-- key's quiet windows before it), the last {{ b.history }} of each series. Read from series_state, where the
-- run that wrote them kept each series' last {{ b.history }} (persist.sql), never from its whole history.
CREATE OR REPLACE TEMP TABLE history AS
WITH stored AS (
    SELECT s.key, s.split_value, unnest(s.recent, recursive := true)
    FROM series_state AS s
    SEMI JOIN (SELECT DISTINCT key, split_value FROM new_windows) AS n
        ON s.key = n.key AND s.split_value IS NOT DISTINCT FROM n.split_value
    WHERE s.check_name = {{ check_lit }}
){% if measure.split %},
first_seen AS (
    -- a split value without a window before this run: its first window
    SELECT n.key, n.split_value, min(n.key_window) AS first_window
    FROM new_windows AS n
    ANTI JOIN (SELECT key, split_value FROM series_state WHERE check_name = {{ check_lit }}) AS s
        ON s.key = n.key AND s.split_value IS NOT DISTINCT FROM n.split_value
    GROUP BY n.key, n.split_value
),
quiet AS (
    -- a split value first seen in its key's n-th window had no bad session in the n-1 before (the
    -- key's last {{ b.history }} stored ones with data enough to be history are in key_state)
    SELECT f.key, f.split_value, k.window_number, 0.0::DOUBLE AS value, k.sessions, 0::BIGINT AS bad
    FROM first_seen AS f
    JOIN (SELECT key, unnest(recent, recursive := true) FROM key_state
          WHERE check_name = {{ check_lit }} AND key IN (SELECT key FROM first_seen)
          UNION ALL
          SELECT key, key_window, window_number, sessions FROM new_key_windows
          WHERE sessions >= {{ g.min_sessions }}) AS k   -- the quiet windows with data enough to be history
        ON k.key = f.key AND k.key_window < f.first_window
){% endif %}

SELECT key, split_value, window_number, value, sessions, bad
FROM (
    SELECT key, split_value, window_number, value, sessions, bad FROM stored
{% if measure.split %}
    UNION ALL
    SELECT key, split_value, window_number, value, sessions, bad FROM quiet
{% endif %}
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY window_number DESC) <= {{ b.history }};

{% if b.method == "ewma" %}
CREATE OR REPLACE TEMP TABLE smoothed AS
WITH RECURSIVE numbered AS (
    SELECT key, split_value, window_number, value,
           row_number() OVER (PARTITION BY key, split_value ORDER BY window_number) AS step
    FROM new_windows
),
start AS (
    SELECT s.key, s.split_value, coalesce(l.statistic, {{ b.target if b.target is not none else "NULL" }})::DOUBLE AS z
    FROM (SELECT DISTINCT key, split_value FROM new_windows) AS s
    LEFT JOIN (
        -- the statistic of the series' last window that has one (series_state, kept by persist.sql)
        SELECT key, split_value, statistic FROM series_state WHERE check_name = {{ check_lit }}
    ) AS l ON {{ m.same_series("s", "l") }}
),
chain(key, split_value, step, window_number, z) AS (
    SELECT key, split_value, 0::BIGINT, NULL::BIGINT, z FROM start
    UNION ALL
    SELECT n.key, n.split_value, n.step, n.window_number,
           CASE WHEN n.value IS NULL THEN c.z
                ELSE {{ b.lam }} * n.value + {{ 1 - b.lam }} * coalesce(c.z, n.value) END
    FROM chain AS c
    JOIN numbered AS n ON {{ m.same_series("n", "c") }} AND n.step = c.step + 1
)
SELECT key, split_value, window_number, z AS statistic FROM chain WHERE step > 0;

{% endif %}
{% if b.method == "cusum" %}
-- cusum_intervals: h for shift {{ b.shift }} and an in-control run length of {{ b.in_control_sessions }} sessions at each p₀ of
-- the grid (log-spaced, {{ intervals | length }} rows), computed by toolkit.runlength.interval_table; each row also
-- holds the next row's p₀ and h, between which h is interpolated linearly in ln p₀.
CREATE OR REPLACE TEMP TABLE cusum_intervals AS
SELECT p0, h, lead(p0) OVER (ORDER BY p0) AS next_p0, lead(h) OVER (ORDER BY p0) AS next_h
FROM (VALUES
{% for p0, h in intervals %}
    ({{ "%.9g" | format(p0) }}::DOUBLE, {{ "%.9g" | format(h) }}::DOUBLE){{ "," if not loop.last }}
{% endfor %}
) AS grid(p0, h);

-- cusum_start: each series' statistic where the last run left it (0 for a new series).
CREATE OR REPLACE TEMP TABLE cusum_start AS
SELECT s.key, s.split_value, coalesce(l.statistic, 0.0)::DOUBLE AS statistic
FROM (SELECT DISTINCT key, split_value FROM new_windows) AS s
LEFT JOIN (
    -- the statistic of the series' last window that has one (series_state, kept by persist.sql)
    SELECT key, split_value, statistic FROM series_state WHERE check_name = {{ check_lit }}
) AS l ON {{ m.same_series("s", "l") }};

{% endif %}
-- judged: the new windows with their verdicts so far; `changed` marks those whose breach flag
-- changed in the last round (at first, all of them).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
{% if b.method == "ewma" %}
    n.*,
    s.statistic,
{% else %}
    *,
{% endif %}
{% if b.method == "cusum" %}
    NULL::DOUBLE AS statistic,
{% endif %}
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
{% if b.method == "ewma" %}
FROM new_windows AS n
LEFT JOIN smoothed AS s ON {{ m.same_series("n", "s") }} AND n.window_number = s.window_number;
{% else %}
FROM new_windows;
{% endif %}

-- @statement round_limit
-- The most rounds the loop may take. The first window of a series whose verdict is not final has
-- only final windows before it, so each round settles at least one more window of every series:
-- a series of n new windows settles within n rounds, and one more round finds nothing changing.
-- Beyond that the verdicts cannot settle, and the run stops with an error rather than loop on.
SELECT coalesce(max(windows), 0) + 1 AS round_limit
FROM (SELECT count(*) AS windows FROM judged GROUP BY key, split_value);

-- @loop until still_changing = 0, at most round_limit rounds
-- baselines: each window's baseline, from the eligible windows before it as the breach flags stand
-- now. Only what can have moved is recomputed: in each series with a window that changed in the last
-- round, the windows from the first of them on (`since`). Every window before it saw the same flags
-- in the last round as now, so its verdict is final; the first round, when every window is
-- `changed`, computes them all. The rows read are those windows and the {{ b.history }} eligible ones before them.
CREATE OR REPLACE TEMP TABLE baselines AS
WITH moving AS (
    SELECT key, split_value, min(window_number) AS since FROM judged WHERE changed GROUP BY key, split_value
),
series_rows AS (
    SELECT h.key, h.split_value, h.window_number, h.value, h.sessions, h.bad, false AS is_new, true AS eligible, s.since
    FROM history AS h
    JOIN moving AS s ON {{ m.same_series("h", "s") }}
    UNION ALL
    SELECT j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad, true, coalesce(NOT j.breach, false) AND j.value IS NOT NULL, s.since
    FROM judged AS j
    JOIN moving AS s ON {{ m.same_series("j", "s") }}
),
numbered AS (
    -- hb: how many eligible windows come before this one; history is the eligible rows with hb in
    -- [hb - history, hb - 1], whatever breached windows lie between them
    SELECT *,
        coalesce(count(*) FILTER (WHERE eligible) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS hb
    FROM series_rows
),
reached AS (
    -- what the windows from `since` on can look back on: the rows from the {{ b.history }}th eligible one
    -- before `since` (hb_since: the eligible rows before it)
    SELECT *
    FROM (
        SELECT *, max(hb) FILTER (WHERE window_number <= since) OVER (PARTITION BY key, split_value) AS hb_since
        FROM numbered
    )
    WHERE window_number >= since OR hb >= hb_since - {{ b.history }}
),
framed AS (
    SELECT
        key, split_value, window_number, is_new,
{% if b.method == "rolling_percentile" %}
        quantile_cont(value, {{ b.q }}) FILTER (WHERE eligible) OVER earlier AS baseline,
{% elif b.method in ("p_chart", "cusum") %}
        sum(bad) FILTER (WHERE eligible) OVER earlier
            / nullif(sum(sessions) FILTER (WHERE eligible) OVER earlier, 0) AS baseline,
{% elif b.method == "ewma" %}
        {% if b.target is not none %}{{ b.target }}::DOUBLE{% else %}avg(value) FILTER (WHERE eligible) OVER earlier{% endif %} AS baseline,
        {% if b.sigma is not none %}{{ b.sigma }}::DOUBLE{% else %}stddev_samp(value) FILTER (WHERE eligible) OVER earlier{% endif %} AS spread,
{% endif %}
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows,
        since
    FROM reached
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN {{ b.history }} PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, window_number, baseline, {% if b.method == "ewma" %}spread, {% endif %}history_windows
FROM framed
WHERE is_new AND window_number >= since;

{% if b.method == "cusum" %}
-- cusum_chain: each recomputed window's γ and h from its p₀, and the statistic chained window to
-- window from the series' last window before them (where the last round left it), else from where
-- the last run left it.
CREATE OR REPLACE TEMP TABLE cusum_chain AS
WITH RECURSIVE designed AS MATERIALIZED (
    SELECT j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad,
           greatest(base.baseline, {{ "%.9g" | format(intervals[0][0]) }}) AS p0,
           base.history_windows >= {{ b.min_history }} AS enough
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
),
steps AS MATERIALIZED (
    SELECT d.key, d.split_value, d.window_number, d.value, d.sessions, d.bad,
           row_number() OVER (PARTITION BY d.key, d.split_value ORDER BY d.window_number) AS step,
           CASE WHEN d.enough AND g.p0 IS NOT NULL THEN
               ln((1 - d.p0) / (1 - {{ b.shift }} * d.p0)) / ln({{ b.shift }} * d.p0 * (1 - d.p0) / (d.p0 * (1 - {{ b.shift }} * d.p0)))
           END AS gamma,
           CASE WHEN d.enough THEN
               CASE WHEN g.next_p0 IS NULL THEN g.h
                    ELSE g.h + (g.next_h - g.h) * (ln(d.p0) - ln(g.p0)) / (ln(g.next_p0) - ln(g.p0)) END
           END AS h
    FROM designed AS d
    LEFT JOIN cusum_intervals AS g
        ON d.p0 >= g.p0 AND (d.p0 < g.next_p0 OR (g.next_p0 IS NULL AND d.p0 = g.p0))
),
resumed AS (
    SELECT s.key, s.split_value, coalesce(b.statistic, s.statistic) AS statistic
    FROM cusum_start AS s
    JOIN (SELECT key, split_value, min(window_number) AS since FROM designed GROUP BY key, split_value) AS r
        ON {{ m.same_series("s", "r") }}
    LEFT JOIN (
        SELECT j.key, j.split_value, arg_max(j.statistic, j.window_number) AS statistic
        FROM judged AS j
        JOIN (SELECT key, split_value, min(window_number) AS since FROM designed GROUP BY key, split_value) AS f
            ON {{ m.same_series("j", "f") }} AND j.window_number < f.since
        GROUP BY j.key, j.split_value
    ) AS b ON {{ m.same_series("s", "b") }}
),
chain(key, split_value, step, window_number, statistic, h) AS (
    SELECT s.key, s.split_value, 0::BIGINT, NULL::BIGINT, s.statistic, NULL::DOUBLE
    FROM resumed AS s
    UNION ALL
    SELECT t.key, t.split_value, t.step, t.window_number,
           CASE WHEN t.h IS NULL OR t.value IS NULL THEN c.statistic
                ELSE least(2 * t.h, greatest(0.0, c.statistic + t.bad - t.sessions * t.gamma)) END,
           t.h
    FROM chain AS c
    JOIN steps AS t ON {{ m.same_series("t", "c") }} AND t.step = c.step + 1
)
SELECT key, split_value, window_number, statistic, h FROM chain WHERE step > 0;

{% endif %}
-- round_verdicts: each recomputed window's threshold and verdict: breach true (a breach), false (healthy,
-- or no threshold yet with enough data to be history) or NULL (no verdict: too little data).
CREATE OR REPLACE TEMP TABLE round_verdicts AS
SELECT
    *,
    CASE
        WHEN value IS NULL OR sessions < {{ g.min_sessions }} THEN NULL
        WHEN threshold IS NULL
          OR NOT coalesce({{ "statistic" if b.method in ("ewma", "cusum") else "value" }} {{ ">" if check.direction == "up" else "<" }} threshold, false) THEN false
{% if measure.kind == "rate" %}
        WHEN bad < {{ g.min_bad }} THEN NULL
{% endif %}
{% if b.confidence %}
{% set z = z_for(b.confidence) %}
{% if check.direction == "up" %}
        WHEN NOT coalesce({{ m.wilson_lower("bad", "sessions", z) }} > threshold, false) THEN NULL
{% else %}
        WHEN NOT coalesce({{ m.wilson_upper("bad", "sessions", z) }} < threshold, false) THEN NULL
{% endif %}
{% endif %}
        ELSE true
    END AS breach
FROM (
    SELECT
        j.key, j.split_value, j.window_number, j.value, {% if b.method == "ewma" %}j.statistic, {% elif b.method == "cusum" %}cs.statistic, {% endif %}j.sessions, j.bad, base.baseline, base.history_windows,
        CASE WHEN base.history_windows >= {{ b.min_history }} THEN
{% if b.method == "rolling_percentile" %}
{% set raw = b.factor ~ " * base.baseline" %}
            {%+ if b.floor is none %}{{ raw }}{% elif check.direction == "up" %}greatest({{ b.floor }}, {{ raw }}){% else %}least({{ b.floor }}, {{ raw }}){% endif +%}
{% elif b.method == "p_chart" %}
{% set spread = b.sigmas ~ " * sqrt(base.baseline * (1 - base.baseline) / j.sessions)" %}
            {%+ if check.direction == "up" %}base.baseline + {{ spread }}{% else %}greatest(0.0, base.baseline - {{ spread }}){% endif +%}
{% elif b.method == "ewma" %}
            base.baseline {{ "+" if check.direction == "up" else "-" }} {{ b.sigmas }} * base.spread * sqrt({{ b.lam }} / (2 - {{ b.lam }}))
{% elif b.method == "cusum" %}
            cs.h
{% endif %}
        END AS threshold
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
{% if b.method == "cusum" %}
    JOIN cusum_chain AS cs ON j.key = cs.key AND j.split_value IS NOT DISTINCT FROM cs.split_value AND j.window_number = cs.window_number
{% endif %}
);

-- What the round changed: only the windows that moved into or out of the history (healthy, breach
-- false, against a breach or no verdict) since the last round. Every window recomputed takes its new
-- flag, so a window's stored verdict is always one a round computed, not a guess.
UPDATE judged SET changed = false WHERE changed;

UPDATE judged
SET
    baseline = r.baseline,
    history_windows = r.history_windows,
    threshold = r.threshold,
{% if b.method == "cusum" %}
    statistic = r.statistic,
{% endif %}
    changed = coalesce(NOT judged.breach, false) IS DISTINCT FROM coalesce(NOT r.breach, false),
    breach = r.breach
FROM round_verdicts AS r
WHERE judged.key = r.key AND judged.split_value IS NOT DISTINCT FROM r.split_value AND judged.window_number = r.window_number;

{% set judged_on = "statistic" if b.method in ("ewma", "cusum") else "value" %}
-- A guess for the next round that only speeds the loop: in a series still changing, each window after
-- the first that changed whose {{ judged_on }} is {{ "at least" if check.direction == "up" else "at most" }} that of a breach this round found is taken
-- as a breach, so a run of breaches settles in a round or two rather than a few windows a round.
-- Every window up to the first that changed keeps its verdict, so each round still settles at least
-- one more window; a guessed window is judged again in the next round, and the loop ends only when a
-- round moves no window into or out of the history.
UPDATE judged
SET breach = true
FROM (
    SELECT key, split_value, min(window_number) FILTER (WHERE changed) AS frontier,
           {{ "min" if check.direction == "up" else "max" }}({{ judged_on }}) FILTER (WHERE breach) AS edge
    FROM judged
    SEMI JOIN (SELECT DISTINCT key, split_value FROM judged WHERE changed) AS c ON {{ m.same_series("judged", "c") }}
    GROUP BY key, split_value
) AS g
WHERE {{ m.same_series("judged", "g") }} AND judged.window_number > g.frontier
  AND judged.{{ judged_on }} {{ ">=" if check.direction == "up" else "<=" }} g.edge AND judged.breach IS DISTINCT FROM true;

-- @statement still_changing
-- The end of a round: how many windows it moved into or out of the history. The loop stops at 0.
SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
-- @end
{% endif %}
