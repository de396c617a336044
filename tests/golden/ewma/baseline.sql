-- ── stage 4 · baseline ─────────────────────────────────────────────────────────────────────
-- ewma (NIST/SEMATECH e-Handbook §6.3.2.4, EWMA control chart), λ = 0.3:
--   statistic z = 0.3 × value + 0.7 × z of the series' previous window
--   (a new series starts at its first value; a window without a value keeps z);
--   target = mean of the series' last 10 earlier windows that did not breach,
--   s = their standard deviation;
--   threshold = target + 3.0 × s × √(λ / (2 − λ)), and the window breaches on z, not on its value.
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
)
SELECT key, split_value, seq, value, sessions, bad
FROM (
    SELECT key, split_value, seq, value, sessions, bad FROM earlier WHERE NOT breach AND value IS NOT NULL
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY seq DESC) <= 10;

CREATE OR REPLACE TEMP TABLE smoothed AS
WITH RECURSIVE numbered AS (
    SELECT key, split_value, seq, value,
           row_number() OVER (PARTITION BY key, split_value ORDER BY seq) AS step
    FROM new_windows
),
start AS (
    SELECT s.key, s.split_value, coalesce(l.statistic, NULL)::DOUBLE AS z
    FROM (SELECT DISTINCT key, split_value FROM new_windows) AS s
    LEFT JOIN (
        SELECT key, split_value, arg_max(statistic, seq) AS statistic
        FROM windows
        WHERE check_name = 'golden'
        GROUP BY key, split_value
    ) AS l ON s.key = l.key AND s.split_value IS NOT DISTINCT FROM l.split_value
),
chain(key, split_value, step, seq, z) AS (
    SELECT key, split_value, 0::BIGINT, NULL::BIGINT, z FROM start
    UNION ALL
    SELECT n.key, n.split_value, n.step, n.seq,
           CASE WHEN n.value IS NULL THEN c.z
                ELSE 0.3 * n.value + 0.7 * coalesce(c.z, n.value) END
    FROM chain AS c
    JOIN numbered AS n ON n.key = c.key AND n.split_value IS NOT DISTINCT FROM c.split_value AND n.step = c.step + 1
)
SELECT key, split_value, seq, z AS statistic FROM chain WHERE step > 0;

CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    n.*,
    s.statistic,
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
FROM new_windows AS n
LEFT JOIN smoothed AS s ON n.key = s.key AND n.split_value IS NOT DISTINCT FROM s.split_value AND n.seq = s.seq;
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
avg(value) FILTER (WHERE eligible) OVER earlier AS baseline,
stddev_samp(value) FILTER (WHERE eligible) OVER earlier AS spread,
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows
    FROM numbered
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN 10 PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, seq, baseline, spread, history_windows
FROM framed
WHERE is_new;
