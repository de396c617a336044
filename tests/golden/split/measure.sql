-- ── stage 3 · measure ──────────────────────────────────────────────────────────────────────
-- rate = bad sessions ÷ sessions of the window; split by error_code: the key's window
-- is formed first, then each error_code value seen so far for the key gets bad-with-that-value ÷ all
-- sessions of the window (0 where it had none), so every value's history keeps its quiet windows.
-- The window's sessions and bad sessions per error_code value, read from the sessions once.
CREATE OR REPLACE TEMP TABLE split_counts AS
SELECT
    key, seq, split_value,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
    count(*) FILTER (WHERE is_bad) AS bad
FROM window_sessions
GROUP BY key, seq, split_value;

CREATE OR REPLACE TEMP TABLE key_window_stats AS
SELECT
    MAP {'site': struct_extract(key, 'site')} AS key,
    'site=' || CASE WHEN struct_extract(key, 'site') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'site'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'site') ELSE '"' || replace(replace(struct_extract(key, 'site'), '\', '\\'), '"', '\"') || '"' END AS key_text,
    seq,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    sum(sessions)::BIGINT AS sessions,
    sum(bad)::BIGINT AS bad,
    sum(bad) / sum(sessions) AS value
FROM split_counts
GROUP BY key, seq;

-- key_window: the ordinal of the window among all of its key's windows, across runs
CREATE OR REPLACE TEMP TABLE new_key_windows AS
SELECT
    w.*,
    coalesce(s.windows, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.seq) AS key_window
FROM key_window_stats AS w
LEFT JOIN key_state AS s ON s.check_name = 'golden' AND s.key = w.key;

CREATE OR REPLACE TEMP TABLE new_windows AS
WITH bad_by_value AS (
    SELECT MAP {'site': struct_extract(key, 'site')} AS key, seq, split_value, bad
    FROM split_counts
    WHERE bad > 0
),
known AS (
    -- each split value of a key, from the first window it was seen in (earlier runs: seq 0)
    SELECT key, split_value, min(since) AS since
    FROM (
        SELECT key, split_value, 0 AS since
        FROM windows
        WHERE check_name = 'golden' AND key IN (SELECT key FROM new_key_windows)
        GROUP BY key, split_value
        UNION ALL
        SELECT key, split_value, seq FROM bad_by_value
    )
    GROUP BY key, split_value
)
SELECT
    w.key, w.key_text, k.split_value, w.seq, w.key_window, w.window_start, w.window_end, w.sessions,
    coalesce(b.bad, 0) AS bad,
    coalesce(b.bad, 0) / w.sessions AS value
FROM new_key_windows AS w
JOIN known AS k ON k.key = w.key AND w.seq >= k.since
LEFT JOIN bad_by_value AS b
    ON b.key = w.key AND b.seq = w.seq AND b.split_value IS NOT DISTINCT FROM k.split_value;
