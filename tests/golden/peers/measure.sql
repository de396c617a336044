-- ── stage 3 · measure ──────────────────────────────────────────────────────────────────────
-- rate = bad sessions ÷ sessions of the window.
CREATE OR REPLACE TEMP TABLE key_window_stats AS
SELECT
    MAP {'site': struct_extract(key, 'site'), 'title_id': struct_extract(key, 'title_id')} AS key,
    'site=' || CASE WHEN struct_extract(key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'site') ELSE '"' || replace(replace(struct_extract(key, 'site'), '\', '\\'), '"', '\"') || '"' END || ', ' || 'title_id=' || CASE WHEN struct_extract(key, 'title_id') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'title_id'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'title_id') ELSE '"' || replace(replace(struct_extract(key, 'title_id'), '\', '\\'), '"', '\"') || '"' END AS key_text,
    window_number,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
    count(*) FILTER (WHERE is_bad) AS bad,
    count(*) FILTER (WHERE is_bad) / count(*) AS value
FROM window_sessions
GROUP BY key, window_number;

-- key_window: the ordinal of the window among all of its key's windows, across runs
CREATE OR REPLACE TEMP TABLE new_key_windows AS
SELECT
    w.*,
    coalesce(s.windows, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.window_number) AS key_window
FROM key_window_stats AS w
LEFT JOIN key_state AS s ON s.check_name = 'golden' AND s.key = w.key;

CREATE OR REPLACE TEMP TABLE new_windows AS
SELECT key, key_text, NULL::VARCHAR AS split_value, window_number, key_window, window_start, window_end, sessions, bad, value
FROM new_key_windows;
