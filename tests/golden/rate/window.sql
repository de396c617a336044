-- ── stage 2 · window ───────────────────────────────────────────────────────────────────────
-- Count windows: each 30 sessions of a series in (event_time, session_id) order; a
-- window that is not full INTERVAL 6 HOUR after its first session closes as it is once the
-- watermark has passed that moment. Partial windows are carried to the next run.
CREATE OR REPLACE TEMP TABLE series_last AS
SELECT {'site': key['site']} AS key, last_window_number, last_end
FROM key_state
WHERE check_name = 'golden';

-- How count windows are found, all series at once. Number each series' sessions 0, 1, 2 … in
-- (event_time, session_id) order: its position. Windows are laid greedily from position 0: a
-- window of 30 sessions can start at position p when the 30th from there ended within
-- INTERVAL 6 HOUR of the first. A position where that fails is a cut. A window starting at a cut either
-- times out, once the watermark has passed its first session's time + INTERVAL 6 HOUR (it closes with
-- the sessions up to that moment, and the next window starts behind them), or stays open: it and
-- every session after it are carried to the next run.
--   So from where a span of full windows starts (position 0, or just behind a cut that timed out),
-- windows follow every 30 positions up to the first cut on that stride; only that cut matters.
-- A series walks from span to span, one step per cut that timed out.
CREATE OR REPLACE TEMP TABLE pooled AS
SELECT
    p.*,
    row_number() OVER in_order - 1 AS position,
    -- a window starting here cannot fill: fewer than 30 sessions left, or the 30th is too
    -- late, or it is held: a backlog read in several runs holds the sessions at or after read_until
    -- until the earlier ones still unread have been read, so windows fill as one run fills them
    coalesce(lead(p.event_time, 29) OVER in_order > p.event_time + INTERVAL 6 HOUR
             OR lead(p.held, 29) OVER in_order, true) AS is_cut
FROM (
    SELECT *, coalesce(event_time >= (SELECT read_until FROM read_limits), false) AS held
    FROM (
        SELECT {'site': key['site']} AS key, event_time, session_id, is_bad, split_value, false AS late
        FROM carry
        WHERE check_name = 'golden'
        UNION ALL
        -- late: earlier than the end of a window already closed for the series; it joins the open window
        SELECT a.key, a.event_time, a.session_id, a.is_bad, a.split_value,                coalesce(a.event_time < s.last_end, false) AS late
        FROM arrivals AS a
        LEFT JOIN series_last AS s ON s.key = a.key
    )
) AS p
WINDOW in_order AS (PARTITION BY p.key ORDER BY p.event_time, p.session_id);

-- Every cut, whether it times out, and for one that does the position of the last session within
-- INTERVAL 6 HOUR of it (cut_end: a count over the event times, looked at only in the series that
-- have a cut that times out).
CREATE OR REPLACE TEMP TABLE cuts AS
WITH timing_out AS (
    SELECT DISTINCT key
    FROM pooled
    WHERE is_cut AND event_time + INTERVAL 6 HOUR < (SELECT current FROM watermarks)
)
SELECT key, position AS cut_start, times_out, CASE WHEN times_out THEN reach - 1 END AS cut_end
FROM (
    SELECT key, position, is_cut,
           event_time + INTERVAL 6 HOUR < (SELECT current FROM watermarks) AS times_out,
           count(*) OVER (PARTITION BY key ORDER BY epoch_us(event_time)
                          RANGE BETWEEN UNBOUNDED PRECEDING AND 21600000000 FOLLOWING) AS reach
    FROM pooled
    WHERE key IN (SELECT key FROM timing_out)
)
WHERE is_cut
UNION ALL
SELECT key, position, false, NULL
FROM pooled
WHERE is_cut AND key NOT IN (SELECT key FROM timing_out);

-- Where a span of full windows can start (position 0, and just behind each cut that times out),
-- and the first cut on its stride: at or after the start, a whole number of windows on. For every
-- start at once: the smallest cut not before it among the positions equal to it modulo 30.
CREATE OR REPLACE TEMP TABLE span_ends AS
WITH span_starts AS (
    SELECT key, 0::BIGINT AS span_start FROM pooled WHERE position = 0
    UNION
    SELECT key, cut_end + 1 FROM cuts WHERE times_out
),
marks AS (
    SELECT key, span_start AS mark, false AS is_cut FROM span_starts
    UNION ALL
    SELECT key, cut_start AS mark, true AS is_cut FROM cuts
),
found AS (
    SELECT key, mark AS span_start, is_cut,
           min(CASE WHEN is_cut THEN mark END) OVER (
               PARTITION BY key, mark % 30 ORDER BY mark DESC, is_cut DESC
               ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS cut_start
    FROM marks
)
SELECT f.key, f.span_start, f.cut_start, c.cut_end, coalesce(c.times_out, false) AS cut_closes
FROM found AS f
LEFT JOIN cuts AS c ON c.key = f.key AND c.cut_start = f.cut_start
WHERE NOT f.is_cut;

-- The walk: each series' spans from position 0, on behind every cut that times out (one step per
-- such cut, all series at once). A span whose cut stays open, or that has no cut (cut_start NULL:
-- full windows to the end), is its series' last.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
WITH RECURSIVE walk AS (
    SELECT key, span_start, cut_start, cut_end, cut_closes FROM span_ends WHERE span_start = 0
    UNION ALL
    SELECT n.key, n.span_start, n.cut_start, n.cut_end, n.cut_closes
    FROM walk AS w
    JOIN span_ends AS n ON n.key = w.key AND n.span_start = w.cut_end + 1
    WHERE w.cut_closes
)
SELECT key, span_start, cut_start, cut_end, cut_closes FROM walk;

-- Each pooled session's window, named by the position of its first session (window_first; NULL:
-- still open); a view: a run holds every table it makes until it commits, and this one would be
-- another copy.
CREATE OR REPLACE TEMP VIEW placed AS
WITH spans AS (
    SELECT *, coalesce(lead(span_start) OVER (PARTITION BY key ORDER BY span_start), 9223372036854775807) AS next_span_start
    FROM full_window_spans
)
SELECT
    p.*,
    CASE
        WHEN r.cut_start IS NULL OR p.position < r.cut_start
            THEN r.span_start + (p.position - r.span_start) // 30 * 30
        WHEN r.cut_closes AND p.position <= r.cut_end THEN r.cut_start
    END AS window_first
FROM pooled AS p
JOIN spans AS r ON p.key = r.key AND p.position >= r.span_start AND p.position < r.next_span_start;

-- window_number: count windows are numbered 1, 2, 3 … in each series, on from its last window.
CREATE OR REPLACE TEMP TABLE closed_windows AS
SELECT
    w.key, w.window_first, w.window_start, w.window_end,
    coalesce(s.last_window_number, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.window_first) AS window_number
FROM (
    SELECT key, window_first, min(event_time) AS window_start, max(event_time) AS window_end
    FROM placed
    WHERE window_first IS NOT NULL
    GROUP BY key, window_first
) AS w
LEFT JOIN series_last AS s ON s.key = w.key;

-- A view: the measure stage reads it once.
CREATE OR REPLACE TEMP VIEW window_sessions AS
SELECT p.* EXCLUDE (position, is_cut, held, window_first), w.window_number, w.window_start, w.window_end
FROM placed AS p
JOIN closed_windows AS w ON w.key = p.key AND w.window_first = p.window_first;

CREATE OR REPLACE TEMP TABLE carry_next AS
SELECT MAP {'site': struct_extract(key, 'site')} AS key, 'site=' || CASE WHEN struct_extract(key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'site') ELSE '"' || replace(replace(struct_extract(key, 'site'), '\', '\\'), '"', '\"') || '"' END AS key_text, event_time, session_id, is_bad, split_value
FROM placed
WHERE window_first IS NULL;

CREATE OR REPLACE TEMP TABLE window_counts AS
SELECT count(*) FILTER (WHERE late) AS late_rows FROM pooled;
