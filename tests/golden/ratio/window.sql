-- ── stage 2 · window ───────────────────────────────────────────────────────────────────────
-- Count windows: each 30 sessions of a series in (event_time, session_id) order; a
-- window that is not full INTERVAL 6 HOUR after its first session closes as it is once the
-- watermark has passed that moment. Partial windows are carried to the next run.
CREATE OR REPLACE TEMP TABLE series_last AS
SELECT {'site': key['site']} AS key, last_window_number, last_end
FROM key_state
WHERE check_name = 'golden';

CREATE OR REPLACE TEMP TABLE pooled AS
SELECT
    p.*,
    row_number() OVER in_order - 1 AS i,
    -- a window starting here cannot fill: fewer than N sessions left, or the N-th is too late, or
    -- it is held: a backlog read in several runs holds the sessions at or after read_until until the
    -- earlier ones still unread have been read, so windows fill in the order one run fills them
    coalesce(lead(p.event_time, 29) OVER in_order > p.event_time + INTERVAL 6 HOUR
             OR lead(p.held, 29) OVER in_order, true) AS is_cut
FROM (
    SELECT *, coalesce(event_time >= (SELECT read_until FROM read_limits), false) AS held
    FROM (
        SELECT {'site': key['site']} AS key, event_time, session_id, numerator, denominator, false AS late
        FROM carry
        WHERE check_name = 'golden'
        UNION ALL
        -- late: earlier than the end of a window already closed for the series; it joins the open window
        SELECT a.key, a.event_time, a.session_id, a.numerator, a.denominator,                coalesce(a.event_time < s.last_end, false) AS late
        FROM arrivals AS a
        LEFT JOIN series_last AS s ON s.key = a.key
    )
) AS p
WINDOW in_order AS (PARTITION BY p.key ORDER BY p.event_time, p.session_id);

-- Cuts: window starts that cannot fill; each either times out (the watermark has passed
-- start + max_wait: the window closes with the sessions within max_wait of its start, up to
-- position lim) or stays open and is carried.
CREATE OR REPLACE TEMP TABLE cuts AS
WITH starts AS (
    SELECT key, i, event_time,
           event_time + INTERVAL 6 HOUR < (SELECT current FROM watermarks) AS times_out
    FROM pooled
    WHERE is_cut
)
SELECT c.key, c.i, CASE WHEN c.times_out THEN t.i END AS lim, c.times_out
FROM starts AS c
-- the last session (by time, then position) no later than max_wait after the cut's first one,
-- looked up only in the series that have a cut that times out
ASOF LEFT JOIN (
    SELECT key, i, epoch_us(event_time)::HUGEINT * 1000000000000 + i AS at
    FROM pooled
    WHERE key IN (SELECT key FROM starts WHERE times_out)
) AS t
    ON t.key = c.key
   AND t.at <= epoch_us(c.event_time + INTERVAL 6 HOUR)::HUGEINT * 1000000000000 + 999999999999;

-- Spans of full windows per series: each starts at position span_start (the start of the pool, or
-- just behind a cut that timed out) and runs to the first cut on its stride, at position cut_start
-- (NULL: no cut, full windows to the end). When that cut times out (cut_closes), its window holds
-- the sessions up to position cut_end and the next span starts behind it. One step per cut, all
-- series at once.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
WITH RECURSIVE span(key, span_start, cut_start, cut_end, cut_closes) AS (
    SELECT key, 0::BIGINT, min(i), arg_min(lim, i), arg_min(times_out, i)
    FROM cuts
    WHERE i % 30 = 0
    GROUP BY key
    UNION ALL
    SELECT c.key, s.cut_end + 1, min(c.i), arg_min(c.lim, c.i), arg_min(c.times_out, c.i)
    FROM span AS s
    JOIN cuts AS c ON c.key = s.key AND c.i > s.cut_end AND (c.i - s.cut_end - 1) % 30 = 0
    WHERE s.cut_closes
    GROUP BY c.key, s.cut_end
)
SELECT key, span_start, cut_start, cut_end, cut_closes FROM span
UNION ALL
-- after the last cut that timed out, or where a series has no cut on its stride: full windows to the end
SELECT key, span_start, NULL, NULL, NULL
FROM (
    SELECT p.key, coalesce(max(s.cut_end) + 1, 0) AS span_start, count(s.key) AS cuts_found,
           arg_max(s.cut_closes, s.span_start) AS last_cut_closes
    FROM (SELECT DISTINCT key FROM pooled) AS p
    LEFT JOIN span AS s ON s.key = p.key
    GROUP BY p.key
)
WHERE cuts_found = 0 OR last_cut_closes;

-- Each pooled session's window, named by the position of its first session (w0; NULL: still open);
-- a view: a run holds every table it makes until it commits, and this one would be another copy.
CREATE OR REPLACE TEMP VIEW placed AS
WITH spans AS (
    SELECT *, coalesce(lead(span_start) OVER (PARTITION BY key ORDER BY span_start), 9223372036854775807) AS next_span_start
    FROM full_window_spans
)
SELECT
    p.*,
    CASE
        WHEN r.cut_start IS NULL OR p.i < r.cut_start
            THEN r.span_start + (p.i - r.span_start) // 30 * 30
        WHEN r.cut_closes AND p.i <= r.cut_end THEN r.cut_start
    END AS w0
FROM pooled AS p
JOIN spans AS r ON p.key = r.key AND p.i >= r.span_start AND p.i < r.next_span_start;

-- window_number: count windows are numbered 1, 2, 3 … in each series, on from its last window.
CREATE OR REPLACE TEMP TABLE closed_windows AS
SELECT
    w.key, w.w0, w.window_start, w.window_end,
    coalesce(s.last_window_number, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.w0) AS window_number
FROM (
    SELECT key, w0, min(event_time) AS window_start, max(event_time) AS window_end
    FROM placed
    WHERE w0 IS NOT NULL
    GROUP BY key, w0
) AS w
LEFT JOIN series_last AS s ON s.key = w.key;

-- A view: the measure stage reads it once.
CREATE OR REPLACE TEMP VIEW window_sessions AS
SELECT p.* EXCLUDE (i, is_cut, held, w0), w.window_number, w.window_start, w.window_end
FROM placed AS p
JOIN closed_windows AS w ON w.key = p.key AND w.w0 = p.w0;

CREATE OR REPLACE TEMP TABLE carry_next AS
SELECT MAP {'site': struct_extract(key, 'site')} AS key, 'site=' || CASE WHEN struct_extract(key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'site') ELSE '"' || replace(replace(struct_extract(key, 'site'), '\', '\\'), '"', '\"') || '"' END AS key_text, event_time, session_id, numerator, denominator
FROM placed
WHERE w0 IS NULL;

CREATE OR REPLACE TEMP TABLE window_counts AS
SELECT count(*) FILTER (WHERE late) AS late_rows FROM pooled;
