-- Causes: where each alert's excess lies in the attributes, computed in the run that opens the
-- alert or adds breaching windows to it, inside the run's transaction. Each alert is explained
-- with the statements of queries/explain.sql (what `plimsoll explain ALERT_ID` runs): its latest
-- breaching windows (at most $explained of them) against the series' healthy windows before the
-- alert's first breach (at most $history, leaving out the $gap just before it), over the files its
-- check has read.

-- @statement causes.touched
-- The alerts of $checks (those that can be explained) with a breaching window this run wrote.
SELECT DISTINCT a.alert_id
FROM alerts AS a
JOIN windows AS w
    ON w.check_name = a.check_name AND w.key = a.key AND w.split_value IS NOT DISTINCT FROM a.split_value
   AND w.breach AND w.run_id = $run_id AND w.window_end BETWEEN a.opened_at AND a.last_breach_at
WHERE list_contains($checks::VARCHAR[], a.check_name)
ORDER BY a.alert_id;

-- @statement causes.alert
-- One alert: its check, series and the threshold it breached.
SELECT check_name, key, key_text, split_value, threshold
FROM alerts
WHERE alert_id = $alert_id;

-- @statement causes.windows
-- The alert's explained windows (its latest breaching ones) and its history (the healthy windows
-- before its first breach, latest first), each role in window order.
WITH a AS (SELECT * FROM alerts WHERE alert_id = $alert_id),
series AS (
    SELECT
        w.window_number, w.window_start, w.window_end,
        w.breach AND w.window_end BETWEEN a.opened_at AND a.last_breach_at AS explained,
        w.breach = false AND w.window_end <= a.breach_started_at AS healthy_before
    FROM windows AS w
    JOIN a ON w.check_name = a.check_name AND w.key = a.key AND w.split_value IS NOT DISTINCT FROM a.split_value
),
explained AS (
    SELECT true AS explained, window_number, window_start, window_end
    FROM series WHERE explained ORDER BY window_number DESC LIMIT $explained
),
history AS (
    -- a guard band: the $gap healthy windows just before the first breach may already hold the
    -- problem's start (a release ramping up, a CDN degrading), which would teach its combinations
    -- that failing is their normal; the history ends before them
    SELECT false AS explained, window_number, window_start, window_end
    FROM series WHERE healthy_before ORDER BY window_number DESC LIMIT $history OFFSET $gap
)
SELECT * FROM explained
UNION ALL
SELECT * FROM history
ORDER BY explained DESC, window_number;

-- @statement causes.store
-- The alert's causes, replacing those of an earlier run ($causes may be empty: nothing to say).
DELETE FROM alert_causes WHERE alert_id = $alert_id;

INSERT INTO alert_causes
SELECT
    $alert_id, c.rank, MAP(c.names, c."values"), c.key_text, c.bad, c.expected, c.sessions, c.excess_share,
    c.score, c.significant, $windows, $history_windows, $run_id
FROM (
    SELECT unnest($causes::STRUCT("rank" INTEGER, names VARCHAR[], "values" VARCHAR[], key_text VARCHAR,
                                  bad DOUBLE, expected DOUBLE, sessions DOUBLE, excess_share DOUBLE,
                                  score DOUBLE, significant BOOLEAN)[]) AS c
);
