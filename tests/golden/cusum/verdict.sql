-- ── stage 4 · verdict ──────────────────────────────────────────────────────────────────────
-- Each new window's baseline, threshold and verdict.
--
-- Baseline and threshold:
-- cusum (Bernoulli CUSUM, Reynolds and Stoumbos 1999, Journal of Quality Technology 31:87–108):
--   p₀ = Σ bad ÷ Σ sessions over the series' last 10 earlier windows that did not breach (at least 3),
--   p₁ = 2.0 × p₀ (the rise to detect), γ = ln[(1−p₀)/(1−p₁)] ÷ ln[p₁(1−p₀) / (p₀(1−p₁))];
--   statistic S = min(2h, max(0, S of the series' previous window + bad − sessions × γ)), starting at 0
--   (a window without a threshold keeps S); baseline = p₀, threshold = h, and the window breaches on S.
--   h makes the in-control average run length 3000 sessions: found for a grid of p₀ by the
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
--
-- Verdict: a window breaches when it has a threshold, its CUSUM statistic is above it, and the data is enough
-- to say so: at least 10 sessions, 2 bad. It is healthy when it has a threshold, a
-- value, at least 10 sessions and is not beyond the threshold. Every other window gets no verdict
-- (breach NULL): too few sessions, no value (a zero denominator, no session with a value), or
-- beyond the threshold on too little evidence. A window without a verdict is neither healthy nor a breach: it
-- does not enter the history and cannot close an alert. A window before the series has a threshold
-- enters the history when it has a value and at least 10 sessions (breach false).
--
-- A window's history is the earlier windows of its series that did not breach, so verdicts depend on
-- the verdicts before them: the statements between '@loop' and '@end' are one round, repeated until
-- no window changes between history and not (a breach and a window without a verdict are both kept
-- out of it, so a flag moving between the two changes no baseline). A round recomputes only the
-- series still changing, all of them at once.

-- history: the series' earlier windows that did not breach (and, for a split value seen late, its
-- key's quiet windows before it), the last 10 of each series. Read from series_state, where the
-- run that wrote them kept each series' last 10 (persist.sql), never from its whole history.
CREATE OR REPLACE TEMP TABLE history AS
WITH stored AS (
    SELECT s.key, s.split_value, unnest(s.recent, recursive := true)
    FROM series_state AS s
    SEMI JOIN (SELECT DISTINCT key, split_value FROM new_windows) AS n
        ON s.key = n.key AND s.split_value IS NOT DISTINCT FROM n.split_value
    WHERE s.check_name = 'golden'
)
SELECT key, split_value, window_number, value, sessions, bad
FROM (
    SELECT key, split_value, window_number, value, sessions, bad FROM stored
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY window_number DESC) <= 10;

-- cusum_intervals: h for shift 2.0 and an in-control run length of 3000 sessions at each p₀ of
-- the grid (log-spaced, 65 rows), computed by toolkit.runlength.interval_table; each row also
-- holds the next row's p₀ and h, between which h is interpolated linearly in ln p₀.
CREATE OR REPLACE TEMP TABLE cusum_intervals AS
SELECT p0, h, lead(p0) OVER (ORDER BY p0) AS next_p0, lead(h) OVER (ORDER BY p0) AS next_h
FROM (VALUES
    (0.001::DOUBLE, 0.998737601::DOUBLE),
    (0.0010901037::DOUBLE, 1.16483171::DOUBLE),
    (0.00118832607::DOUBLE, 1.30218603::DOUBLE),
    (0.00129539864::DOUBLE, 1.41682243::DOUBLE),
    (0.00141211885::DOUBLE, 1.51509539::DOUBLE),
    (0.00153935598::DOUBLE, 1.60244309::DOUBLE),
    (0.00167805765::DOUBLE, 1.6779661::DOUBLE),
    (0.00182925684::DOUBLE, 1.74398827::DOUBLE),
    (0.00199407965::DOUBLE, 1.80435174::DOUBLE),
    (0.0021737536::DOUBLE, 1.85833769::DOUBLE),
    (0.00236961683::DOUBLE, 1.90588447::DOUBLE),
    (0.00258312807::DOUBLE, 1.95001096::DOUBLE),
    (0.00281587746::DOUBLE, 1.98876673::DOUBLE),
    (0.00306959843::DOUBLE, 2.08756388::DOUBLE),
    (0.0033461806::DOUBLE, 2.1888183::DOUBLE),
    (0.00364768384::DOUBLE, 2.28421053::DOUBLE),
    (0.00397635364::DOUBLE, 2.37105515::DOUBLE),
    (0.00433463781::DOUBLE, 2.45580636::DOUBLE),
    (0.0047252047::DOUBLE, 2.5407649::DOUBLE),
    (0.00515096312::DOUBLE, 2.62089202::DOUBLE),
    (0.00561508394::DOUBLE, 2.70017241::DOUBLE),
    (0.00612102376::DOUBLE, 2.78091873::DOUBLE),
    (0.00667255063::DOUBLE, 2.86363636::DOUBLE),
    (0.00727377211::DOUBLE, 2.95013123::DOUBLE),
    (0.00792916588::DOUBLE, 3.05011839::DOUBLE),
    (0.00864361304::DOUBLE, 3.14291115::DOUBLE),
    (0.00942243453::DOUBLE, 3.23898964::DOUBLE),
    (0.0102714307::DOUBLE, 3.33275862::DOUBLE),
    (0.0111969246::DOUBLE, 3.42551332::DOUBLE),
    (0.0122058089::DOUBLE, 3.5154185::DOUBLE),
    (0.0133055974::DOUBLE, 3.61578401::DOUBLE),
    (0.0145044809::DOUBLE, 3.70157068::DOUBLE),
    (0.0158113883::DOUBLE, 3.79908676::DOUBLE),
    (0.0172360528::DOUBLE, 3.89718615::DOUBLE),
    (0.0187890849::DOUBLE, 3.99185889::DOUBLE),
    (0.020482051::DOUBLE, 4.0887574::DOUBLE),
    (0.0223275595::DOUBLE, 4.19354839::DOUBLE),
    (0.0243393551::DOUBLE, 4.27692308::DOUBLE),
    (0.026532421::DOUBLE, 4.36421725::DOUBLE),
    (0.0289230903::DOUBLE, 4.45337621::DOUBLE),
    (0.0315291676::DOUBLE, 4.54296875::DOUBLE),
    (0.0343700622::DOUBLE, 4.63975155::DOUBLE),
    (0.0374669319::DOUBLE, 4.73137698::DOUBLE),
    (0.040842841::DOUBLE, 4.81434599::DOUBLE),
    (0.0445229319::DOUBLE, 4.90847458::DOUBLE),
    (0.0485346127::DOUBLE, 4.98015267::DOUBLE),
    (0.0529077608::DOUBLE, 5.05855856::DOUBLE),
    (0.0576749456::DOUBLE, 5.14822547::DOUBLE),
    (0.0628716715::DOUBLE, 5.17426273::DOUBLE),
    (0.0685366415::DOUBLE, 5.26027397::DOUBLE),
    (0.0747120463::DOUBLE, 5.32851986::DOUBLE),
    (0.0814438779::DOUBLE, 5.38461538::DOUBLE),
    (0.0887822725::DOUBLE, 5.42944785::DOUBLE),
    (0.0967818835::DOUBLE, 5.47567568::DOUBLE),
    (0.105502289::DOUBLE, 5.49477352::DOUBLE),
    (0.115008435::DOUBLE, 5.48432056::DOUBLE),
    (0.125371121::DOUBLE, 5.52554745::DOUBLE),
    (0.136667522::DOUBLE, 5.48230088::DOUBLE),
    (0.148981771::DOUBLE, 5.52173913::DOUBLE),
    (0.162405579::DOUBLE, 5.49358974::DOUBLE),
    (0.177038923::DOUBLE, 5.42446043::DOUBLE),
    (0.192990784::DOUBLE, 5.36363636::DOUBLE),
    (0.210379967::DOUBLE, 5.27642276::DOUBLE),
    (0.22933598::DOUBLE, 5.2::DOUBLE),
    (0.25::DOUBLE, 5.03571429::DOUBLE)
) AS grid(p0, h);

-- cusum_start: each series' statistic where the last run left it (0 for a new series).
CREATE OR REPLACE TEMP TABLE cusum_start AS
SELECT s.key, s.split_value, coalesce(l.statistic, 0.0)::DOUBLE AS statistic
FROM (SELECT DISTINCT key, split_value FROM new_windows) AS s
LEFT JOIN (
    -- the statistic of the series' last window that has one (series_state, kept by persist.sql)
    SELECT key, split_value, statistic FROM series_state WHERE check_name = 'golden'
) AS l ON s.key = l.key AND s.split_value IS NOT DISTINCT FROM l.split_value;

-- judged: the new windows with their verdicts so far; `changed` marks those whose breach flag
-- changed in the last round (at first, all of them).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    NULL::DOUBLE AS statistic,
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
FROM new_windows;

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
-- `changed`, computes them all. The rows read are those windows and the 10 eligible ones before them.
CREATE OR REPLACE TEMP TABLE baselines AS
WITH moving AS (
    SELECT key, split_value, min(window_number) AS since FROM judged WHERE changed GROUP BY key, split_value
),
series_rows AS (
    SELECT h.key, h.split_value, h.window_number, h.value, h.sessions, h.bad, false AS is_new, true AS eligible, s.since
    FROM history AS h
    JOIN moving AS s ON h.key = s.key AND h.split_value IS NOT DISTINCT FROM s.split_value
    UNION ALL
    SELECT j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad, true, coalesce(NOT j.breach, false) AND j.value IS NOT NULL, s.since
    FROM judged AS j
    JOIN moving AS s ON j.key = s.key AND j.split_value IS NOT DISTINCT FROM s.split_value
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
    -- what the windows from `since` on can look back on: the rows from the 10th eligible one
    -- before `since` (hb_since: the eligible rows before it)
    SELECT *
    FROM (
        SELECT *, max(hb) FILTER (WHERE window_number <= since) OVER (PARTITION BY key, split_value) AS hb_since
        FROM numbered
    )
    WHERE window_number >= since OR hb >= hb_since - 10
),
framed AS (
    SELECT
        key, split_value, window_number, is_new,
        sum(bad) FILTER (WHERE eligible) OVER earlier
            / nullif(sum(sessions) FILTER (WHERE eligible) OVER earlier, 0) AS baseline,
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows,
        since
    FROM reached
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN 10 PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, window_number, baseline, history_windows
FROM framed
WHERE is_new AND window_number >= since;

-- cusum_chain: each recomputed window's γ and h from its p₀, and the statistic chained window to
-- window from the series' last window before them (where the last round left it), else from where
-- the last run left it.
CREATE OR REPLACE TEMP TABLE cusum_chain AS
WITH RECURSIVE designed AS MATERIALIZED (
    SELECT j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad,
           greatest(base.baseline, 0.001) AS p0,
           base.history_windows >= 3 AS enough
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
),
steps AS MATERIALIZED (
    SELECT d.key, d.split_value, d.window_number, d.value, d.sessions, d.bad,
           row_number() OVER (PARTITION BY d.key, d.split_value ORDER BY d.window_number) AS step,
           CASE WHEN d.enough AND g.p0 IS NOT NULL THEN
               ln((1 - d.p0) / (1 - 2.0 * d.p0)) / ln(2.0 * d.p0 * (1 - d.p0) / (d.p0 * (1 - 2.0 * d.p0)))
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
        ON s.key = r.key AND s.split_value IS NOT DISTINCT FROM r.split_value
    LEFT JOIN (
        SELECT j.key, j.split_value, arg_max(j.statistic, j.window_number) AS statistic
        FROM judged AS j
        JOIN (SELECT key, split_value, min(window_number) AS since FROM designed GROUP BY key, split_value) AS f
            ON j.key = f.key AND j.split_value IS NOT DISTINCT FROM f.split_value AND j.window_number < f.since
        GROUP BY j.key, j.split_value
    ) AS b ON s.key = b.key AND s.split_value IS NOT DISTINCT FROM b.split_value
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
    JOIN steps AS t ON t.key = c.key AND t.split_value IS NOT DISTINCT FROM c.split_value AND t.step = c.step + 1
)
SELECT key, split_value, window_number, statistic, h FROM chain WHERE step > 0;

-- round_verdicts: each recomputed window's threshold and verdict: breach true (a breach), false (healthy,
-- or no threshold yet with enough data to be history) or NULL (no verdict: too little data).
CREATE OR REPLACE TEMP TABLE round_verdicts AS
SELECT
    *,
    CASE
        WHEN value IS NULL OR sessions < 10 THEN NULL
        WHEN threshold IS NULL
          OR NOT coalesce(statistic > threshold, false) THEN false
        WHEN bad < 2 THEN NULL
        ELSE true
    END AS breach
FROM (
    SELECT
        j.key, j.split_value, j.window_number, j.value, cs.statistic, j.sessions, j.bad, base.baseline, base.history_windows,
        CASE WHEN base.history_windows >= 3 THEN
            cs.h
        END AS threshold
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
    JOIN cusum_chain AS cs ON j.key = cs.key AND j.split_value IS NOT DISTINCT FROM cs.split_value AND j.window_number = cs.window_number
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
    statistic = r.statistic,
    changed = coalesce(NOT judged.breach, false) IS DISTINCT FROM coalesce(NOT r.breach, false),
    breach = r.breach
FROM round_verdicts AS r
WHERE judged.key = r.key AND judged.split_value IS NOT DISTINCT FROM r.split_value AND judged.window_number = r.window_number;

-- A guess for the next round that only speeds the loop: in a series still changing, each window after
-- the first that changed whose statistic is at least that of a breach this round found is taken
-- as a breach, so a run of breaches settles in a round or two rather than a few windows a round.
-- Every window up to the first that changed keeps its verdict, so each round still settles at least
-- one more window; a guessed window is judged again in the next round, and the loop ends only when a
-- round moves no window into or out of the history.
UPDATE judged
SET breach = true
FROM (
    SELECT key, split_value, min(window_number) FILTER (WHERE changed) AS frontier,
           min(statistic) FILTER (WHERE breach) AS edge
    FROM judged
    SEMI JOIN (SELECT DISTINCT key, split_value FROM judged WHERE changed) AS c ON judged.key = c.key AND judged.split_value IS NOT DISTINCT FROM c.split_value
    GROUP BY key, split_value
) AS g
WHERE judged.key = g.key AND judged.split_value IS NOT DISTINCT FROM g.split_value AND judged.window_number > g.frontier
  AND judged.statistic >= g.edge AND judged.breach IS DISTINCT FROM true;

-- @statement still_changing
-- The end of a round: how many windows it moved into or out of the history. The loop stops at 0.
SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
-- @end
