-- ── stage 4b · impact ──────────────────────────────────────────────────────────────────────
-- What each breaching window cost: its affected sessions. Other windows get NULL.
--   affected_sessions = the window's sessions whose own value (numerator ÷ denominator) is
--   below the window's threshold, not every session of the window

-- The breaching windows, with the key as the sessions have it: they go where the sessions are.
CREATE OR REPLACE TEMP TABLE breaching AS
SELECT {'site': key['site']} AS key, split_value, window_number, threshold
FROM judged
WHERE breach;

-- The breaching windows, moved to the stage connection, where the sessions are:
-- @statement move.breaching.out
SELECT * FROM "breaching";

-- @statement move.breaching.in
CREATE OR REPLACE TEMP TABLE "breaching" AS SELECT * FROM moved_rows;

-- On the stage connection:
-- Read where the sessions are, only for the breaching windows: per window, the
-- affected sessions.
CREATE OR REPLACE TEMP TABLE affected_registers AS
SELECT
    b.key, b.split_value, b.window_number,
    count(*) AS sessions
FROM window_sessions AS s
JOIN breaching AS b ON s.key = b.key AND s.window_number = b.window_number
WHERE s.numerator / nullif(s.denominator, 0) < b.threshold
GROUP BY b.key, b.split_value, b.window_number;

-- Moved back to the run's transaction, where the rest of the stage runs:
-- @statement move.affected_registers.out
SELECT * FROM "affected_registers";

-- @statement move.affected_registers.in
CREATE OR REPLACE TEMP TABLE "affected_registers" AS SELECT * FROM moved_rows;

-- The windows with their impact.
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    j.*,
    CASE WHEN j.breach THEN coalesce(a.sessions, 0) END AS affected_sessions,
    NULL::DOUBLE AS excess_sessions,
    NULL::INTEGER[] AS viewer_sketch
FROM judged AS j
LEFT JOIN (
    SELECT
        key, split_value, window_number, sum(sessions)::BIGINT AS sessions
    FROM affected_registers
    GROUP BY key, split_value, window_number
) AS a ON a.key = {'site': j.key['site']} AND a.split_value IS NOT DISTINCT FROM j.split_value
    AND a.window_number = j.window_number;
