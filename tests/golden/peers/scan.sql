-- ── stage 1 · scan ─────────────────────────────────────────────────────────────────────────
-- The check's sessions: not excluded; its key and measure inputs.
-- A view: the window stage reads it once.
CREATE OR REPLACE TEMP VIEW arrivals AS
SELECT
    session_id,
    event_time,
    key,
    is_bad,
    split_value,
    NOT finite AS nonfinite
FROM (
    SELECT
        *,
        true AS finite
    FROM (
        SELECT
            __session_id AS session_id,
            __event_time AS event_time,
            {'site': "site"::VARCHAR, 'title_id': "title_id"::VARCHAR} AS key,
            coalesce(NOT "error_code" IS NULL, false) AS is_bad,
NULL::VARCHAR AS split_value
        FROM lake_sessions
        WHERE NOT __excluded
    )
);

-- The check's watermarks: `previous`, where its last run left it, and `current`, the largest sane
-- event time read by this check so far, this run's files included; when a backlog is read in
-- several runs, no later than the earliest session still unread (read_until), so nothing still to
-- come lands in a window already closed.
CREATE OR REPLACE TEMP TABLE watermarks AS
SELECT
    prior.watermark AS previous,
    greatest(prior.watermark, least(c.latest, coalesce((SELECT read_until FROM read_limits), c.latest))) AS current
FROM (SELECT (SELECT watermark FROM check_state WHERE check_name = 'golden') AS watermark) AS prior,
     lake_counts AS c;

CREATE OR REPLACE TEMP TABLE scan_counts AS
SELECT
    c.rows_read, c.invalid_rows, c.duplicate_rows, c.rows_excluded, c.beyond_horizon,
    c.rows_read - c.invalid_rows - c.duplicate_rows - c.beyond_horizon - c.rows_excluded - a.rows_kept AS rows_filtered,
    a.rows_kept,
    a.nonfinite_values
FROM lake_counts AS c, (SELECT count(*) AS rows_kept, count(*) FILTER (WHERE nonfinite) AS nonfinite_values FROM arrivals) AS a;
