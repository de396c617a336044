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
CREATE OR REPLACE TEMP TABLE key_windows AS
SELECT
    key,
    any_value(key_text) AS key_text,
    seq,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
{% if measure.kind == "rate" %}
    count(*) FILTER (WHERE is_bad) AS bad,
    count(*) FILTER (WHERE is_bad) / count(*) AS value
{% elif measure.kind == "ratio" %}
    NULL::BIGINT AS bad,
    sum(num) / nullif(sum(den), 0) AS value
{% else %}
    NULL::BIGINT AS bad,
    quantile_cont(x, {{ measure.q }}) AS value
{% endif %}
FROM window_sessions
GROUP BY key, seq;

CREATE OR REPLACE TEMP TABLE new_windows AS
{% if measure.kind == "rate" and measure.split %}
WITH bad_by_value AS (
    SELECT key, seq, split_value, count(*) AS bad
    FROM window_sessions
    WHERE is_bad
    GROUP BY key, seq, split_value
),
known AS (
    -- each split value of a key, from the first window it was seen in (earlier runs: seq 0)
    SELECT key, split_value, min(since) AS since
    FROM (
        SELECT key, split_value, 0 AS since
        FROM windows
        WHERE check_name = {{ check_lit }} AND key IN (SELECT key FROM key_windows)
        GROUP BY key, split_value
        UNION ALL
        SELECT key, split_value, seq FROM bad_by_value
    )
    GROUP BY key, split_value
)
SELECT
    w.key, w.key_text, k.split_value, w.seq, w.window_start, w.window_end, w.sessions,
    coalesce(b.bad, 0) AS bad,
    coalesce(b.bad, 0) / w.sessions AS value
FROM key_windows AS w
JOIN known AS k ON k.key = w.key AND w.seq >= k.since
LEFT JOIN bad_by_value AS b
    ON b.key = w.key AND b.seq = w.seq AND b.split_value IS NOT DISTINCT FROM k.split_value;
{% else %}
SELECT key, key_text, NULL::VARCHAR AS split_value, seq, window_start, window_end, sessions, bad, value
FROM key_windows;
{% endif %}
