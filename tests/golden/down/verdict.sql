-- ── stage 4 · verdict ──────────────────────────────────────────────────────────────────────
-- Each new window's baseline, threshold and verdict.
--
-- Baseline and threshold:
-- rolling_percentile: baseline = quantile_cont(value, 0.2) over the series' last 10 earlier
-- windows that did not breach; a window gets a threshold once it has 3 of them:
--   threshold = least(20000000.0, 0.9 × baseline)
--
-- Verdict: a window breaches when it has a threshold, its value is below it, and the data is enough
-- to say so: at least 10 sessions. It is healthy when it has a threshold, a
-- value, at least 10 sessions and is not beyond the threshold. Every other window gets no verdict
-- (breach NULL): too few sessions, no value (a zero denominator, no session with a value). A window without a verdict is neither healthy nor a breach: it
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

-- judged: the new windows with their verdicts so far; `changed` marks those whose breach flag
-- changed in the last round (at first, all of them).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
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
        quantile_cont(value, 0.2) FILTER (WHERE eligible) OVER earlier AS baseline,
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

-- round_verdicts: each recomputed window's threshold and verdict: breach true (a breach), false (healthy,
-- or no threshold yet with enough data to be history) or NULL (no verdict: too little data).
CREATE OR REPLACE TEMP TABLE round_verdicts AS
SELECT
    *,
    CASE
        WHEN value IS NULL OR sessions < 10 THEN NULL
        WHEN threshold IS NULL
          OR NOT coalesce(value < threshold, false) THEN false
        ELSE true
    END AS breach
FROM (
    SELECT
        j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad, base.baseline, base.history_windows,
        CASE WHEN base.history_windows >= 3 THEN
            least(20000000.0, 0.9 * base.baseline)
        END AS threshold
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
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
    changed = coalesce(NOT judged.breach, false) IS DISTINCT FROM coalesce(NOT r.breach, false),
    breach = r.breach
FROM round_verdicts AS r
WHERE judged.key = r.key AND judged.split_value IS NOT DISTINCT FROM r.split_value AND judged.window_number = r.window_number;

-- A guess for the next round that only speeds the loop: in a series still changing, each window after
-- the first that changed whose value is at most that of a breach this round found is taken
-- as a breach, so a run of breaches settles in a round or two rather than a few windows a round.
-- Every window up to the first that changed keeps its verdict, so each round still settles at least
-- one more window; a guessed window is judged again in the next round, and the loop ends only when a
-- round moves no window into or out of the history.
UPDATE judged
SET breach = true
FROM (
    SELECT key, split_value, min(window_number) FILTER (WHERE changed) AS frontier,
           max(value) FILTER (WHERE breach) AS edge
    FROM judged
    SEMI JOIN (SELECT DISTINCT key, split_value FROM judged WHERE changed) AS c ON judged.key = c.key AND judged.split_value IS NOT DISTINCT FROM c.split_value
    GROUP BY key, split_value
) AS g
WHERE judged.key = g.key AND judged.split_value IS NOT DISTINCT FROM g.split_value AND judged.window_number > g.frontier
  AND judged.value <= g.edge AND judged.breach IS DISTINCT FROM true;

-- @statement still_changing
-- The end of a round: how many windows it moved into or out of the history. The loop stops at 0.
SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
-- @end
