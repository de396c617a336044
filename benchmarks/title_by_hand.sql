-- The title check (checks/title_errors.yml) written by hand for the benchmark: the same windows,
-- thresholds, verdicts and alerts as `plimsoll run --check title_errors` over $files on a fresh
-- warehouse, as one would write it for this one check with no state kept between runs.
--
--   sessions: one per session_id (the earliest, then by file), crawlers excluded, title_id set
--   windows:  each 200 sessions of (site, title_id) in (ended_at, session_id) order; a window not
--             full 2 days after its first session closes with what it has once the watermark
--             (largest ended_at read) has passed that moment
--   series:   one per error_code seen for the title, from the window it is first seen in; the
--             title's earlier windows count as history at 0
--   verdict:  threshold = max(0.05, 2 × quantile_cont 0.9 of the last 30 healthy values),
--             once there are 4; fewer than 100 sessions: no verdict; value <= threshold: healthy
--             (history); above it: a breach with 10 bad or more, else no verdict
--   alerts:   open on a breach, close after 2 healthy windows in a row, or expire 3 days after
--             the series' last window; a breach whose window starts within 6 hours of the
--             series' last recovery reopens that alert
-- Statements end with a semicolon at the end of a line; benchmarks/bench.py runs them in order.

CREATE OR REPLACE TEMP TABLE raw AS
SELECT session_id::VARCHAR AS sid, ended_at::TIMESTAMP AS t, site::VARCHAR AS site,
       title_id::VARCHAR AS title_id, error_code::VARCHAR AS error_code,
       coalesce(is_bot OR regexp_matches(user_agent, '(?i)(bot|crawler|spider)'), false) AS crawler,
       filename
FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true);

CREATE OR REPLACE TEMP TABLE watermark AS SELECT max(t) AS w FROM raw;

-- one row per session id (ids seen twice are rare: only they are sorted), crawlers left out
CREATE OR REPLACE TEMP TABLE repeated AS
SELECT sid FROM raw WHERE sid IS NOT NULL AND t IS NOT NULL GROUP BY sid HAVING count(*) > 1;

CREATE OR REPLACE TEMP TABLE titles AS
SELECT site, title_id, row_number() OVER () AS k
FROM (SELECT DISTINCT site, title_id FROM raw WHERE title_id IS NOT NULL);

CREATE OR REPLACE TEMP TABLE kept AS
WITH one AS (
    SELECT * FROM raw
    WHERE sid IS NOT NULL AND t IS NOT NULL AND sid NOT IN (SELECT sid FROM repeated)
    UNION ALL
    SELECT * FROM raw
    WHERE t IS NOT NULL AND sid IN (SELECT sid FROM repeated)
    QUALIFY row_number() OVER (PARTITION BY sid ORDER BY t, filename) = 1
)
SELECT k.k, k.site, k.title_id, o.sid, o.t, o.error_code
FROM one AS o
JOIN titles AS k ON k.site IS NOT DISTINCT FROM o.site AND k.title_id = o.title_id
WHERE NOT o.crawler;

-- positions per title in (ended_at, session_id) order; a cut is a position where a window
-- cannot fill: the 200th session from it is more than 2 days later, or there is none
CREATE OR REPLACE TEMP TABLE pos AS
SELECT k, site, title_id, t, error_code,
       row_number() OVER in_order - 1 AS i,
       coalesce(lead(t, 199) OVER in_order > t + INTERVAL 2 DAY, true) AS is_cut,
       count(*) OVER (PARTITION BY k) AS n
FROM kept
WINDOW in_order AS (PARTITION BY k ORDER BY t, sid);

-- at a cut, lim is the last position within 2 days of it; the window closes short if 2 days
-- have passed by the watermark, else it stays open
CREATE OR REPLACE TEMP TABLE cuts AS
SELECT c.k, c.i, l.i AS lim, c.t + INTERVAL 2 DAY < (SELECT w FROM watermark) AS times_out
FROM (SELECT k, i, t FROM pos WHERE is_cut) AS c
-- the latest time no later than 2 days on, and the last position at that time
ASOF JOIN (SELECT k, t, max(i) AS i FROM pos GROUP BY k, t) AS l
    ON l.k = c.k AND l.t <= c.t + INTERVAL 2 DAY;

-- segments: from start a, full windows every 200 positions up to the first cut on that stride;
-- a cut that times out is a short window, and the next segment starts after it
CREATE OR REPLACE TEMP TABLE segments AS
WITH RECURSIVE seg(k, a) AS (
    SELECT DISTINCT k, 0::BIGINT FROM pos
    UNION ALL
    SELECT s.k, arg_min(c.lim, c.i) + 1
    FROM seg AS s
    JOIN cuts AS c ON c.k = s.k AND c.i >= s.a AND (c.i - s.a) % 200 = 0
    GROUP BY s.k, s.a
    HAVING arg_min(c.times_out, c.i)
)
SELECT s.k, s.a, min(c.i) AS c, arg_min(c.lim, c.i) AS c_lim, arg_min(c.times_out, c.i) AS c_out
FROM seg AS s
LEFT JOIN cuts AS c ON c.k = s.k AND c.i >= s.a AND (c.i - s.a) % 200 = 0
GROUP BY s.k, s.a;

CREATE OR REPLACE TEMP TABLE placed AS
SELECT p.*,
       CASE WHEN p.i < coalesce(s.c, p.n) THEN s.a + (p.i - s.a) // 200 * 200
            WHEN s.c_out AND p.i <= s.c_lim THEN s.c END AS w0
FROM pos AS p
ASOF JOIN segments AS s ON s.k = p.k AND p.i >= s.a;

CREATE OR REPLACE TEMP TABLE key_windows AS
SELECT k, w0, any_value(site) AS site, any_value(title_id) AS title_id,
       min(t) AS window_start, max(t) AS window_end, count(*) AS sessions,
       row_number() OVER (PARTITION BY k ORDER BY w0) AS seq
FROM placed
WHERE w0 IS NOT NULL
GROUP BY k, w0;

-- one series per error code of a title, from its first window; r numbers the series' windows
CREATE OR REPLACE TEMP TABLE series_windows AS
WITH bad_by_code AS (
    SELECT p.k, w.seq, p.error_code, count(*) AS bad
    FROM placed AS p JOIN key_windows AS w ON w.k = p.k AND w.w0 = p.w0
    WHERE p.error_code IS NOT NULL
    GROUP BY ALL
),
codes AS (
    SELECT k, error_code, min(seq) AS since, dense_rank() OVER (ORDER BY k, error_code) AS sid
    FROM bad_by_code GROUP BY k, error_code
)
SELECT c.sid, c.k, c.error_code, w.seq, w.seq - c.since + 1 AS r, c.since, w.site, w.title_id,
       w.window_start, w.window_end, w.sessions, coalesce(b.bad, 0) AS bad,
       coalesce(b.bad, 0) / w.sessions AS value
FROM codes AS c
JOIN key_windows AS w ON w.k = c.k AND w.seq >= c.since
LEFT JOIN bad_by_code AS b ON b.k = c.k AND b.seq = w.seq AND b.error_code = c.error_code;

-- every series steps through its windows in order, all series at once: history, verdict, alert
CREATE OR REPLACE TEMP TABLE judged AS
WITH RECURSIVE step(sid, r, hist, threshold, breach, is_open, streak, episode, opens, recovers,
                    expires_before, close_episode, window_end, last_recovery, reopens) AS (
    SELECT sid, 0::BIGINT, list_transform(range(least(since - 1, 30)), lambda x: 0.0::DOUBLE),
           NULL::DOUBLE, false, false, 0, 0, false, false, false, NULL::INTEGER, NULL::TIMESTAMP,
           NULL::TIMESTAMP, false
    FROM series_windows WHERE r = 1
    UNION ALL
    SELECT sid, r,
           CASE WHEN verdict IS NOT DISTINCT FROM false THEN list_append(hist, value)[-30:] ELSE hist END,
           thr, verdict,
           CASE WHEN is_breach THEN true
                WHEN healthy AND still_open AND streak + 1 >= 2 THEN false
                ELSE still_open END,
           CASE WHEN is_breach THEN 0 WHEN healthy AND still_open THEN streak + 1 ELSE streak END,
           CASE WHEN is_breach AND NOT still_open AND NOT reopening THEN episode + 1 ELSE episode END,
           is_breach AND NOT still_open,
           healthy AND still_open AND streak + 1 >= 2,
           expired,
           episode,
           window_end,
           CASE WHEN healthy AND still_open AND streak + 1 >= 2 THEN window_end
                WHEN expired OR (is_breach AND NOT still_open) THEN NULL
                ELSE last_recovery END,
           is_breach AND NOT still_open AND reopening
    FROM (
        SELECT *,
               coalesce(verdict, false) AS is_breach,
               coalesce(verdict = false AND thr IS NOT NULL, false) AS healthy,
               coalesce(NOT expired AND window_start < last_recovery + INTERVAL 6 HOUR, false) AS reopening
        FROM (
        SELECT s.sid, w.r, s.hist, w.value, w.window_start, w.window_end, s.episode, s.last_recovery,
               t.thr,
               CASE WHEN w.sessions < 100 THEN NULL
                    WHEN t.thr IS NULL OR NOT (w.value > t.thr) THEN false
                    WHEN w.bad < 10 THEN NULL
                    ELSE true END AS verdict,
               s.is_open AND w.window_end > s.window_end + INTERVAL 3 DAY AS expired,
               s.is_open AND NOT (w.window_end > s.window_end + INTERVAL 3 DAY) AS still_open,
               CASE WHEN s.is_open AND NOT (w.window_end > s.window_end + INTERVAL 3 DAY) THEN s.streak ELSE 0 END AS streak
        FROM step AS s
        JOIN series_windows AS w ON w.sid = s.sid AND w.r = s.r + 1,
        LATERAL (SELECT CASE WHEN len(s.hist) >= 4
                             THEN greatest(0.05, 2.0 * list_aggregate(s.hist, 'quantile_cont', 0.9)) END AS thr) AS t
        )
    )
)
SELECT w.*, s.threshold, s.breach, s.is_open, s.episode, s.opens, s.recovers, s.expires_before,
       s.close_episode, s.reopens
FROM step AS s JOIN series_windows AS w ON w.sid = s.sid AND w.r = s.r
WHERE s.r > 0;

CREATE OR REPLACE TEMP TABLE title_windows AS
SELECT 'site=' || coalesce(site, '<null>') || ', title_id=' || coalesce(title_id, '<null>') AS key_text,
       error_code AS split_value, seq AS window_number, window_start, window_end, sessions, bad, value, threshold, breach
FROM judged;

CREATE OR REPLACE TEMP TABLE title_alerts AS
WITH closes AS (
    -- an alert closes where it recovers, where its series comes back after 3 silent days, or at
    -- the watermark when that is over 3 days after its series' last window
    SELECT sid, episode, window_end AS closed_at, 'recovered' AS close_reason FROM judged WHERE recovers
    UNION ALL
    SELECT j.sid, j.close_episode, l.window_end + INTERVAL 3 DAY, 'expired'
    FROM judged AS j
    JOIN judged AS l ON l.sid = j.sid AND l.r = j.r - 1
    WHERE j.expires_before
    UNION ALL
    SELECT sid, episode, window_end + INTERVAL 3 DAY, 'expired'
    FROM (SELECT * FROM judged QUALIFY r = max(r) OVER (PARTITION BY sid)), watermark
    WHERE is_open AND window_end + INTERVAL 3 DAY < w
),
episodes AS (
    SELECT j.sid, j.episode,
           'site=' || coalesce(any_value(j.site), '<null>') || ', title_id=' || coalesce(any_value(j.title_id), '<null>') AS key_text,
           any_value(j.error_code) AS split_value,
           min(j.window_end) FILTER (WHERE j.opens AND NOT j.reopens) AS opened_at,
           max(j.window_end) AS last_breach_end,
           count(*) AS breach_windows,
           sum(j.bad) AS affected_sessions,
           max(j.value) AS peak_value,
           arg_min(j.threshold, j.r) AS threshold
    FROM judged AS j
    WHERE j.breach
    GROUP BY j.sid, j.episode
),
last_close AS (
    -- a reopened alert closes more than once: its last close, if no breach came after it
    SELECT c.*
    FROM closes AS c
    JOIN episodes AS e ON e.sid = c.sid AND e.episode = c.episode AND c.closed_at > e.last_breach_end
    QUALIFY row_number() OVER (PARTITION BY c.sid, c.episode ORDER BY c.closed_at DESC) = 1
)
SELECT e.key_text, e.split_value,
       CASE WHEN c.closed_at IS NULL THEN 'open' ELSE 'closed' END AS status,
       c.close_reason, e.opened_at, c.closed_at, e.breach_windows, e.affected_sessions, e.peak_value, e.threshold
FROM episodes AS e
LEFT JOIN last_close AS c ON c.sid = e.sid AND c.episode = e.episode;
