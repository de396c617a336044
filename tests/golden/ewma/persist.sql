-- ── stage 6 · persist ───────────────────────────────────────────────────────────────────────
-- Everything below commits in the run's one transaction, with the files read and the run record.
INSERT INTO windows BY NAME
SELECT
    'golden' AS check_name, key, key_text, split_value, window_number, key_window, window_start, window_end,
    sessions, bad, value, statistic, baseline, history_windows, threshold, breach,
    affected_sessions, excess_sessions, viewer_sketch,
    $run_id AS run_id
FROM judged;

INSERT INTO key_windows BY NAME
SELECT 'golden' AS check_name, key, key_text, key_window, window_number, window_start, window_end, sessions, bad,
       $run_id AS run_id
FROM new_key_windows;

-- ┌ what the next run's baselines and measures read instead of each series' whole history
-- Each key's state.
CREATE OR REPLACE TEMP TABLE next_key_state AS
SELECT n.key, n.last_window_number, n.last_end, n.windows, NULL AS recent
FROM (
    SELECT key, max(window_number) AS last_window_number, max(window_end) AS last_end, max(key_window) AS windows
    FROM new_key_windows
    GROUP BY key
) AS n
;

DELETE FROM key_state
WHERE check_name = 'golden' AND key IN (SELECT key FROM new_key_windows);

INSERT INTO key_state BY NAME
SELECT 'golden' AS check_name, * FROM next_key_state;

-- Each series of the new windows: its last 10 windows that are history for the next ones (this run's
-- history and its new windows without a breach and with a value), and its statistic.
CREATE OR REPLACE TEMP TABLE next_series_state AS
WITH touched AS (
    SELECT DISTINCT key, split_value FROM judged
),
history_rows AS (
    SELECT key, split_value, window_number, value, sessions, bad
    FROM (
        SELECT key, split_value, window_number, value, sessions, bad FROM history
        UNION ALL
        SELECT key, split_value, window_number, value, sessions, bad
        FROM judged
        WHERE coalesce(NOT breach, false) AND value IS NOT NULL
    )
    QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY window_number DESC) <= 10
),
recent AS (
    SELECT key, split_value,
           list({'window_number': window_number, 'value': value, 'sessions': sessions, 'bad': bad} ORDER BY window_number) AS recent
    FROM history_rows
    GROUP BY key, split_value
),
statistics AS (
    -- the statistic of the series' last window that has one: the stored one, or a new window's
    SELECT key, split_value, arg_max(statistic, window_number) AS statistic,
           max(window_number) FILTER (WHERE statistic IS NOT NULL) AS statistic_window
    FROM (
        SELECT s.key, s.split_value, s.statistic, s.statistic_window AS window_number
        FROM series_state AS s
        SEMI JOIN touched AS t ON s.key = t.key AND s.split_value IS NOT DISTINCT FROM t.split_value
        WHERE s.check_name = 'golden'
        UNION ALL
        SELECT key, split_value, statistic, window_number FROM judged
    )
    GROUP BY key, split_value
)
SELECT t.key, t.split_value, coalesce(r.recent, []) AS recent, s.statistic, s.statistic_window
FROM touched AS t
LEFT JOIN recent AS r ON r.key = t.key AND r.split_value IS NOT DISTINCT FROM t.split_value
LEFT JOIN statistics AS s ON s.key = t.key AND s.split_value IS NOT DISTINCT FROM t.split_value;

DELETE FROM series_state AS s
WHERE s.check_name = 'golden'
  AND EXISTS (SELECT 1 FROM next_series_state AS n WHERE n.key = s.key AND n.split_value IS NOT DISTINCT FROM s.split_value);

INSERT INTO series_state BY NAME
SELECT 'golden' AS check_name, * FROM next_series_state;
-- └

DELETE FROM carry WHERE check_name = 'golden';

INSERT INTO carry BY NAME
SELECT 'golden' AS check_name, * FROM carry_next;

DELETE FROM alerts
WHERE alert_id IN (SELECT alert_id FROM alert_rows WHERE touched);

INSERT INTO alerts BY NAME
SELECT * EXCLUDE (episode, touched, closed_silently)
FROM alert_rows
WHERE touched;

INSERT INTO alert_events BY NAME
SELECT * FROM event_rows;

DELETE FROM check_state WHERE check_name = 'golden';

INSERT INTO check_state BY NAME
SELECT 'golden' AS check_name, current AS watermark, $definition AS definition_hash, $run_id AS last_run_id
FROM watermarks;

INSERT INTO files_read BY NAME
SELECT 'golden' AS check_name, 'sessions' AS source_name, f.path, f.size,
       f.modified_at, $run_id AS run_id, coalesce(n.rows, 0) AS rows, coalesce(n.invalid_rows, 0) AS invalid_rows
FROM (SELECT unnest($manifest, recursive := true)) AS f
LEFT JOIN lake_file_rows AS n ON n.path = f.path;

INSERT INTO run_checks BY NAME
SELECT
    $run_id AS run_id, 'golden' AS check_name,
    len($manifest) AS files_read,
    c.rows_read, c.invalid_rows, c.rows_excluded, c.rows_filtered, c.duplicate_rows,
    -- late for its window, or by more than dedup_horizon behind the data already read
    (SELECT late_rows FROM window_counts) + c.beyond_horizon AS late_rows,
    c.beyond_horizon,
    c.nonfinite_values,
    (SELECT count(*) FROM judged) AS windows_written,
    (SELECT count(*) FROM judged WHERE breach) AS breach_windows,
    (SELECT count(*) FROM event_rows WHERE event = 'opened') AS alerts_opened,
    (SELECT count(*) FROM event_rows WHERE event = 'closed') AS alerts_closed,
    (SELECT current FROM watermarks) AS watermark
FROM scan_counts AS c;
