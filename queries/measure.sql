{% import "macros.sql" as m %}
{% set check_lit = check.name | literal %}
-- ── stage 3 · measure ──────────────────────────────────────────────────────────────────────
{% if measure.kind == "rate" %}
-- rate = bad sessions ÷ sessions of the window{% if measure.split %}; split by {{ measure.split }}: the key's window
-- is formed first, then each {{ measure.split }} value seen so far for the key gets bad-with-that-value ÷ all
-- sessions of the window (0 where it had none), so every value's history keeps its quiet windows{% endif %}.
{% elif measure.kind == "ratio" %}
-- ratio of sums = Σ ({{ measure.numerator.sql }}) ÷ Σ ({{ measure.denominator.sql }}); NULL when the denominator is 0.
{% else %}
-- quantile_cont({{ measure.of.sql }}, {{ measure.q }}) over the window's sessions (NULL values left out).
{% endif %}
{% if measure.kind == "rate" and measure.split %}
-- The window's sessions and bad sessions per {{ measure.split }} value, read from the sessions once.
CREATE OR REPLACE TEMP TABLE split_counts AS
SELECT
    key, window_number, split_value,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
    count(*) FILTER (WHERE is_bad) AS bad
FROM window_sessions
GROUP BY key, window_number, split_value;

CREATE OR REPLACE TEMP TABLE key_window_stats AS
SELECT
    {{ m.to_map("key", check.by) }} AS key,
    {{ m.key_text("key", check.by) }} AS key_text,
    window_number,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    sum(sessions)::BIGINT AS sessions,
    sum(bad)::BIGINT AS bad,
    sum(bad) / sum(sessions) AS value
FROM split_counts
GROUP BY key, window_number;
{% else %}
CREATE OR REPLACE TEMP TABLE key_window_stats AS
SELECT
    {{ m.to_map("key", check.by) }} AS key,
    {{ m.key_text("key", check.by) }} AS key_text,
    window_number,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
{% if measure.kind == "rate" %}
    count(*) FILTER (WHERE is_bad) AS bad,
    count(*) FILTER (WHERE is_bad) / count(*) AS value
{% elif measure.kind == "ratio" %}
    NULL::BIGINT AS bad,
    sum(numerator) / nullif(sum(denominator), 0) AS value
{% else %}
    NULL::BIGINT AS bad,
    quantile_cont(quantile_input, {{ measure.q }}) AS value
{% endif %}
FROM window_sessions
GROUP BY key, window_number;
{% endif %}

-- key_window: the ordinal of the window among all of its key's windows, across runs
CREATE OR REPLACE TEMP TABLE new_key_windows AS
SELECT
    w.*,
    coalesce(s.windows, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.window_number) AS key_window
FROM key_window_stats AS w
LEFT JOIN key_state AS s ON s.check_name = {{ check_lit }} AND s.key = w.key;

CREATE OR REPLACE TEMP TABLE new_windows AS
{% if measure.kind == "rate" and measure.split %}
WITH bad_by_value AS (
    SELECT {{ m.to_map("key", check.by) }} AS key, window_number, split_value, bad
    FROM split_counts
    WHERE bad > 0
),
known AS (
    -- each split value of a key, and the first of the new windows it has a row in: a value seen in
    -- an earlier run has one in every window (since NULL: whatever the window's number, which is
    -- negative for time windows before 1970), a new one from its first bad session's window on
    SELECT key, split_value, CASE WHEN bool_or(earlier) THEN NULL ELSE min(window_number) END AS since
    FROM (
        SELECT key, split_value, true AS earlier, NULL::BIGINT AS window_number
        FROM series_state   -- a row per series with a window (persist.sql), not the windows themselves
        WHERE check_name = {{ check_lit }} AND key IN (SELECT key FROM new_key_windows)
        UNION ALL
        SELECT key, split_value, false, window_number FROM bad_by_value
    )
    GROUP BY key, split_value
)
SELECT
    w.key, w.key_text, k.split_value, w.window_number, w.key_window, w.window_start, w.window_end, w.sessions,
    coalesce(b.bad, 0) AS bad,
    coalesce(b.bad, 0) / w.sessions AS value
FROM new_key_windows AS w
JOIN known AS k ON k.key = w.key AND (k.since IS NULL OR w.window_number >= k.since)
LEFT JOIN bad_by_value AS b
    ON b.key = w.key AND b.window_number = w.window_number AND b.split_value IS NOT DISTINCT FROM k.split_value;
{% else %}
SELECT key, key_text, NULL::VARCHAR AS split_value, window_number, key_window, window_start, window_end, sessions, bad, value
FROM new_key_windows;
{% endif %}
