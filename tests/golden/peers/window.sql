-- ── stage 2 · window ───────────────────────────────────────────────────────────────────────
-- Time windows of INTERVAL 2 HOUR, aligned to the epoch; a window closes once the watermark
-- passes its end + INTERVAL 15 MINUTE. Sessions for a window already closed are late.
CREATE OR REPLACE TEMP TABLE series_last AS
SELECT {'site': key['site'], 'title_id': key['title_id']} AS key, last_window_number, last_end
FROM key_state
WHERE check_name = 'golden';

-- Each session with its window; a view, so the sessions are not copied: each statement below reads
-- them where they are. window_number: how many windows of INTERVAL 2 HOUR lie between
-- 1970-01-01 and the window's start (negative before it), so windows of the same time have the same number in every series.
CREATE OR REPLACE TEMP VIEW stamped AS
SELECT
    p.*,
    (epoch_us(p.event_time) - ((epoch_us(p.event_time)) % 7200000000 + 7200000000) % 7200000000) // 7200000000 AS window_number,
    make_timestamp((epoch_us(p.event_time) - ((epoch_us(p.event_time)) % 7200000000 + 7200000000) % 7200000000) // 7200000000 * 7200000000) AS window_start,
    make_timestamp((epoch_us(p.event_time) - ((epoch_us(p.event_time)) % 7200000000 + 7200000000) % 7200000000) // 7200000000 * 7200000000 + 7200000000) AS window_end
FROM (
    SELECT {'site': key['site'], 'title_id': key['title_id']} AS key, event_time, session_id, is_bad, split_value
    FROM carry
    WHERE check_name = 'golden'
    UNION ALL
    SELECT key, event_time, session_id, is_bad, split_value
    FROM arrivals
) AS p;

-- Late: the session's window had already closed at the previous watermark. Counted, not windowed.
CREATE OR REPLACE TEMP TABLE window_counts AS
SELECT count(*) AS late_rows
FROM stamped
WHERE window_end + INTERVAL 15 MINUTE < (SELECT previous FROM watermarks);

CREATE OR REPLACE TEMP VIEW window_sessions AS
SELECT *
FROM stamped
WHERE window_end + INTERVAL 15 MINUTE < (SELECT current FROM watermarks)
  AND NOT coalesce(window_end + INTERVAL 15 MINUTE < (SELECT previous FROM watermarks), false);

CREATE OR REPLACE TEMP TABLE carry_next AS
SELECT MAP {'site': struct_extract(key, 'site'), 'title_id': struct_extract(key, 'title_id')} AS key, 'site=' || CASE WHEN struct_extract(key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'site') ELSE '"' || replace(replace(struct_extract(key, 'site'), '\', '\\'), '"', '\"') || '"' END || ', ' || 'title_id=' || CASE WHEN struct_extract(key, 'title_id') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'title_id'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'title_id') ELSE '"' || replace(replace(struct_extract(key, 'title_id'), '\', '\\'), '"', '\"') || '"' END AS key_text, event_time, session_id, is_bad, split_value
FROM stamped
WHERE NOT (window_end + INTERVAL 15 MINUTE < (SELECT current FROM watermarks));
