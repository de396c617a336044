{% import "macros.sql" as m %}
{% set check_lit = check.name | literal %}
{% set keep = check.baseline.history if check.baseline.history is not none else 0 %}
-- Warehouse layout 6 -> 7, in one transaction, for check {{ check.name }}: series_state and key_state.recent made
-- from its stored windows, as its runs would have kept them (persist.sql): each series' last {{ keep }}
-- windows that are history (no breach, a value{% if check.measure.split %}; a split value's quiet windows, its key's windows of at
-- least {{ check.guard.min_sessions }} sessions before its first{% endif %}), and the statistic of its last window that has one.
DELETE FROM series_state WHERE check_name = {{ check_lit }};

INSERT INTO series_state BY NAME
WITH w AS (
    SELECT * FROM windows WHERE check_name = {{ check_lit }}
),
first_seen AS (
    SELECT key, split_value, min(key_window) AS first_window FROM w GROUP BY key, split_value
),
history_rows AS (
    SELECT key, split_value, window_number, value, sessions, bad
    FROM (
        SELECT key, split_value, window_number, value, sessions, bad FROM w WHERE NOT breach AND value IS NOT NULL
{% if check.measure.split %}
        UNION ALL
        SELECT f.key, f.split_value, k.window_number, 0.0::DOUBLE, k.sessions, 0::BIGINT
        FROM first_seen AS f
        JOIN key_windows AS k
            ON k.check_name = {{ check_lit }} AND k.key = f.key AND k.key_window < f.first_window
            AND k.sessions >= {{ check.guard.min_sessions }}
{% endif %}
    )
    QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY window_number DESC) <= {{ keep }}
),
recent AS (
    SELECT key, split_value,
           list({'window_number': window_number, 'value': value, 'sessions': sessions, 'bad': bad} ORDER BY window_number) AS recent
    FROM history_rows
    GROUP BY key, split_value
),
statistics AS (
    SELECT key, split_value, arg_max(statistic, window_number) AS statistic,
           max(window_number) FILTER (WHERE statistic IS NOT NULL) AS statistic_window
    FROM w
    GROUP BY key, split_value
)
SELECT {{ check_lit }} AS check_name, f.key, f.split_value, coalesce(r.recent, []) AS recent, s.statistic, s.statistic_window
FROM first_seen AS f
LEFT JOIN recent AS r ON {{ m.same_series("r", "f") }}
LEFT JOIN statistics AS s ON {{ m.same_series("s", "f") }};
{% if check.measure.split and keep %}

UPDATE key_state AS s
SET recent = r.recent
FROM (
    SELECT key, list({'key_window': key_window, 'window_number': window_number, 'sessions': sessions} ORDER BY key_window) AS recent
    FROM (
        SELECT key, key_window, window_number, sessions
        FROM key_windows
        WHERE check_name = {{ check_lit }} AND sessions >= {{ check.guard.min_sessions }}
        QUALIFY row_number() OVER (PARTITION BY key ORDER BY key_window DESC) <= {{ keep }}
    )
    GROUP BY key
) AS r
WHERE s.check_name = {{ check_lit }} AND s.key = r.key;
{% endif %}
