-- ── stage 4 · baseline ─────────────────────────────────────────────────────────────────────
-- rolling_percentile: baseline = quantile_cont(value, 0.9) over the series' last 10 earlier
-- windows that did not breach; a window gets a threshold once it has 3 of them:
--   threshold = greatest(0.05, 1.5 × baseline)-- A split value first seen after its key's first window has the key's earlier windows as history,
-- each with value 0: it had no bad sessions in them.
-- Earlier windows that did not breach can only enter a window's history in order, so the verdicts
-- of a series are found by repeating this stage and the next until no breach flag changes; each
-- round settles at least one more window of every series still changing, all series at once.
CREATE OR REPLACE TEMP TABLE history AS
WITH earlier AS (
    SELECT w.key, w.split_value, w.seq, w.key_window, w.value, w.sessions, w.bad, w.breach
    FROM windows AS w
    SEMI JOIN (SELECT DISTINCT key, split_value FROM new_windows) AS n
        ON w.key = n.key AND w.split_value IS NOT DISTINCT FROM n.split_value
    WHERE w.check_name = 'golden'
),
first_seen AS (
    SELECT key, split_value, min(key_window) AS first_window
    FROM (SELECT key, split_value, key_window FROM earlier
          UNION ALL SELECT key, split_value, key_window FROM new_windows)
    GROUP BY key, split_value
),
quiet AS (
    -- a split value first seen in its key's n-th window had no bad session in the n-1 before
    SELECT f.key, f.split_value, k.seq, 0.0::DOUBLE AS value, k.sessions, 0::BIGINT AS bad
    FROM first_seen AS f
    JOIN (SELECT key, key_window, seq, sessions FROM key_windows WHERE check_name = 'golden'
          UNION ALL SELECT key, key_window, seq, sessions FROM new_key_windows) AS k
        ON k.key = f.key AND k.key_window < f.first_window
        AND k.key_window >= f.first_window - 10
)
SELECT key, split_value, seq, value, sessions, bad
FROM (
    SELECT key, split_value, seq, value, sessions, bad FROM earlier WHERE NOT breach AND value IS NOT NULL
    UNION ALL
    SELECT key, split_value, seq, value, sessions, bad FROM quiet
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY seq DESC) <= 10;

CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
FROM new_windows;
-- @repeat (with stage 5): until no breach flag changes
CREATE OR REPLACE TEMP TABLE verdicts AS
WITH moving AS (
    SELECT DISTINCT key, split_value FROM judged WHERE changed
),
series_rows AS (
    SELECT h.key, h.split_value, h.seq, h.value, h.sessions, h.bad, false AS is_new, true AS eligible
    FROM history AS h
    SEMI JOIN moving AS s ON h.key = s.key AND h.split_value IS NOT DISTINCT FROM s.split_value
    UNION ALL
    SELECT j.key, j.split_value, j.seq, j.value, j.sessions, j.bad, true, NOT j.breach AND j.value IS NOT NULL
    FROM judged AS j
    SEMI JOIN moving AS s ON j.key = s.key AND j.split_value IS NOT DISTINCT FROM s.split_value
),
numbered AS (
    -- hb: how many eligible windows come before this one; history is the eligible rows with hb in
    -- [hb - history, hb - 1], whatever breached windows lie between them
    SELECT *,
        coalesce(count(*) FILTER (WHERE eligible) OVER (
            PARTITION BY key, split_value ORDER BY seq ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS hb
    FROM series_rows
),
framed AS (
    SELECT
        key, split_value, seq, is_new,
        quantile_cont(value, 0.9) FILTER (WHERE eligible) OVER earlier AS baseline,
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows
    FROM numbered
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN 10 PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, seq, baseline, history_windows
FROM framed
WHERE is_new;
