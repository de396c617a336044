-- ── stage 4b · impact ──────────────────────────────────────────────────────────────────────
-- What each breaching window cost: its affected sessions, its excess sessions. Other windows get NULL.
--   affected_sessions = bad
--   excess_sessions = max(0, bad − sessions × baseline): the bad sessions above what the series'
--   baseline rate would have given on the same sessions (0 where the window was not above its
--   baseline, which a factor below 1, a floor or an EWMA statistic can allow)

-- The windows with their impact.
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    j.*,
    CASE WHEN j.breach THEN j.bad END AS affected_sessions,
    CASE WHEN j.breach THEN greatest(0.0, j.bad - j.sessions * j.baseline) END AS excess_sessions,
    NULL::INTEGER[] AS viewer_sketch
FROM judged AS j;
