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
-- The check's series this run (those of the new sessions and of the open windows), each numbered
-- (series), so the statements below sort, group and join each session on a number, not on its key.
CREATE OR REPLACE TEMP TABLE series_ids AS
SELECT k.key, (row_number() OVER ())::BIGINT AS series, s.last_window_number, s.last_end
FROM (
    SELECT key FROM arrivals
    UNION
    SELECT {'site': key['site']} FROM carry WHERE check_name = 'golden'
) AS k
LEFT JOIN series_last AS s ON s.key = k.key;

CREATE OR REPLACE TEMP TABLE pooled AS
SELECT
    p.*,
    row_number() OVER in_order - 1 AS position,
    -- a window starting here cannot fill: fewer than 30 sessions left, or the 30th is too
    -- late, or it is held: a backlog read in several runs holds the sessions at or after read_until
    -- until the earlier ones still unread have been read, so windows fill as one run fills them
    coalesce(lead(p.event_time, 29) OVER in_order > p.event_time + INTERVAL 6 HOUR
             OR lead(p.held, 29) OVER in_order, true) AS is_cut,
    -- tied: another session of the series has the same event time; ties are put in session id order below
    coalesce(p.event_time = lag(p.event_time) OVER in_order OR p.event_time = lead(p.event_time) OVER in_order, false) AS tied
FROM (
    SELECT *, coalesce(event_time >= (SELECT read_until FROM read_limits), false) AS held
    FROM (
        SELECT i.series, c.event_time, c.session_id, c.numerator, c.denominator, false AS late
        FROM carry AS c
        JOIN series_ids AS i ON i.key = {'site': c.key['site']}
        WHERE c.check_name = 'golden'
        UNION ALL
        -- late: earlier than the end of a window already closed for the series; it joins the open window
        SELECT i.series, a.event_time, a.session_id, a.numerator, a.denominator,                coalesce(a.event_time < i.last_end, false) AS late
        FROM arrivals AS a
        JOIN series_ids AS i ON i.key = a.key
    )
) AS p
-- sessions in event time order only: a sort on the session id too would compare strings for every
-- pair, and only a few sessions share a time
WINDOW in_order AS (PARTITION BY p.series ORDER BY p.event_time);

-- Sessions of a series that share an event time take that time's positions in session id order.
-- Whether a position is a cut depends on the event times at it and 29 on, the same whichever
-- tied session holds it, so cuts and spans below are found from pooled as it is; only which session
-- sits where changes (fixed: its position in (event_time, session_id) order).
CREATE OR REPLACE TEMP TABLE tie_positions AS
SELECT series, position,
       min(position) OVER same_time + row_number() OVER (PARTITION BY series, event_time ORDER BY session_id) - 1 AS fixed
FROM pooled
WHERE tied
WINDOW same_time AS (PARTITION BY series, event_time);

-- Every cut, whether it times out, and for one that does the position of the last session within
-- INTERVAL 6 HOUR of it (cut_end: a count over the event times, looked at only in the series that
-- have a cut that times out).
CREATE OR REPLACE TEMP TABLE cuts AS
WITH timing_out AS (
    SELECT DISTINCT series
    FROM pooled
    WHERE is_cut AND event_time + INTERVAL 6 HOUR < (SELECT current FROM watermarks)
)
SELECT series, position AS cut_start, times_out, CASE WHEN times_out THEN reach - 1 END AS cut_end
FROM (
    SELECT series, position, is_cut,
           event_time + INTERVAL 6 HOUR < (SELECT current FROM watermarks) AS times_out,
           count(*) OVER (PARTITION BY series ORDER BY epoch_us(event_time)
                          RANGE BETWEEN UNBOUNDED PRECEDING AND 21600000000 FOLLOWING) AS reach
    FROM pooled
    WHERE series IN (SELECT series FROM timing_out)
)
WHERE is_cut
UNION ALL
SELECT series, position, false, NULL
FROM pooled
WHERE is_cut AND series NOT IN (SELECT series FROM timing_out);

-- Where a span of full windows can start (position 0, and just behind each cut that times out),
-- and the first cut on its stride: at or after the start, a whole number of windows on. For every
-- start at once: the smallest cut not before it among the positions equal to it modulo 30.
CREATE OR REPLACE TEMP TABLE span_ends AS
WITH span_starts AS (
    SELECT series, 0::BIGINT AS span_start FROM pooled WHERE position = 0
    UNION
    SELECT series, cut_end + 1 FROM cuts WHERE times_out
),
marks AS (
    SELECT series, span_start AS mark, false AS is_cut FROM span_starts
    UNION ALL
    SELECT series, cut_start AS mark, true AS is_cut FROM cuts
),
found AS (
    SELECT series, mark AS span_start, is_cut,
           min(CASE WHEN is_cut THEN mark END) OVER (
               PARTITION BY series, mark % 30 ORDER BY mark DESC, is_cut DESC
               ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS cut_start
    FROM marks
)
SELECT f.series, f.span_start, f.cut_start, c.cut_end, coalesce(c.times_out, false) AS cut_closes
FROM found AS f
LEFT JOIN cuts AS c ON c.series = f.series AND c.cut_start = f.cut_start
WHERE NOT f.is_cut;

-- The walk: each series' spans from position 0, on behind every cut that times out (one step per
-- such cut, all series at once). A span whose cut stays open, or that has no cut (cut_start NULL:
-- full windows to the end), is its series' last.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
WITH RECURSIVE walk AS (
    SELECT series, span_start, cut_start, cut_end, cut_closes FROM span_ends WHERE span_start = 0
    UNION ALL
    SELECT n.series, n.span_start, n.cut_start, n.cut_end, n.cut_closes
    FROM walk AS w
    JOIN span_ends AS n ON n.series = w.series AND n.span_start = w.cut_end + 1
    WHERE w.cut_closes
)
SELECT series, span_start, cut_start, cut_end, cut_closes FROM walk;

-- Each pooled session's window, named by the position of its first session (window_first; NULL:
-- still open); a view: a run holds every table it makes until it commits, and this one would be
-- another copy.
CREATE OR REPLACE TEMP VIEW placed AS
WITH spans AS (
    SELECT *, coalesce(lead(span_start) OVER (PARTITION BY series ORDER BY span_start), 9223372036854775807) AS next_span_start
    FROM full_window_spans
),
seated AS (
    -- each session at its position in (event_time, session_id) order
    SELECT p.* EXCLUDE (position), coalesce(t.fixed, p.position) AS position
    FROM pooled AS p
    LEFT JOIN tie_positions AS t ON p.tied AND t.series = p.series AND t.position = p.position
)
SELECT
    p.*,
    CASE
        WHEN r.cut_start IS NULL OR p.position < r.cut_start
            THEN r.span_start + (p.position - r.span_start) // 30 * 30
        WHEN r.cut_closes AND p.position <= r.cut_end THEN r.cut_start
    END AS window_first
FROM seated AS p
JOIN spans AS r ON p.series = r.series AND p.position >= r.span_start AND p.position < r.next_span_start;

-- window_number: count windows are numbered 1, 2, 3 … in each series, on from its last window.
CREATE OR REPLACE TEMP TABLE closed_windows AS
SELECT
    i.key, w.series, w.window_first, w.window_start, w.window_end,
    coalesce(i.last_window_number, 0) + row_number() OVER (PARTITION BY w.series ORDER BY w.window_first) AS window_number
FROM (
    SELECT series, window_first, min(event_time) AS window_start, max(event_time) AS window_end
    FROM placed
    WHERE window_first IS NOT NULL
    GROUP BY series, window_first
) AS w
JOIN series_ids AS i ON i.series = w.series;

-- A view: the measure stage reads it once.
CREATE OR REPLACE TEMP VIEW window_sessions AS
SELECT w.key, p.* EXCLUDE (series, position, is_cut, tied, held, window_first), w.window_number, w.window_start, w.window_end
FROM placed AS p
JOIN closed_windows AS w ON w.series = p.series AND w.window_first = p.window_first;

CREATE OR REPLACE TEMP TABLE carry_next AS
SELECT MAP {'site': struct_extract(i.key, 'site')} AS key, 'site=' || CASE WHEN struct_extract(i.key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(i.key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(i.key, 'site') ELSE '"' || replace(replace(struct_extract(i.key, 'site'), '\', '\\'), '"', '\"') || '"' END AS key_text, p.event_time, p.session_id, p.numerator, p.denominator
FROM placed AS p
JOIN series_ids AS i ON i.series = p.series
WHERE p.window_first IS NULL;

CREATE OR REPLACE TEMP TABLE window_counts AS
SELECT count(*) FILTER (WHERE late) AS late_rows FROM pooled;
