-- Warehouse layout 3 -> 4, in one transaction: impact. The new columns (queries/warehouse.sql) are
-- filled where the stored windows allow it: a breaching window of a rate check ($up_checks and
-- $down_checks, by direction) gets its affected sessions (its bad sessions) and its excess
-- sessions, and so do the alerts of the checks' current definitions, with their events, summed
-- over their breaching windows. Sessions are not kept, so breaching windows of ratio and quantile
-- checks keep affected_sessions NULL and their alerts the count of every session of their
-- breaching windows; no viewer sketch can be made after the fact (affected_viewers stays NULL).
UPDATE windows
SET affected_sessions = bad,
    excess_sessions = greatest(0.0, CASE WHEN list_contains($up_checks::VARCHAR[], check_name)
                                         THEN bad - sessions * baseline ELSE sessions * baseline - bad END)
WHERE breach AND bad IS NOT NULL AND baseline IS NOT NULL
  AND (list_contains($up_checks::VARCHAR[], check_name) OR list_contains($down_checks::VARCHAR[], check_name));

CREATE OR REPLACE TEMP TABLE layout_4_excess AS
SELECT a.alert_id, a.last_breach_at, w.window_end, w.excess_sessions
FROM alerts AS a
JOIN check_state AS s ON s.check_name = a.check_name AND s.definition_hash = a.definition_hash
JOIN windows AS w ON w.check_name = a.check_name AND w.key = a.key AND w.split_value IS NOT DISTINCT FROM a.split_value
    AND w.breach AND w.window_end BETWEEN a.opened_at AND a.last_breach_at
WHERE list_contains($up_checks::VARCHAR[], a.check_name) OR list_contains($down_checks::VARCHAR[], a.check_name);

UPDATE alerts
SET excess_sessions = x.excess_sessions
FROM (SELECT alert_id, sum(excess_sessions) AS excess_sessions FROM layout_4_excess GROUP BY alert_id) AS x
WHERE alerts.alert_id = x.alert_id;

-- an event's excess as of its moment: the breaching windows that had ended by then
UPDATE alert_events
SET excess_sessions = x.excess_sessions
FROM (
    SELECT e.alert_id, e.occurred_at, e.event, sum(x.excess_sessions) AS excess_sessions
    FROM (SELECT DISTINCT alert_id, occurred_at, event FROM alert_events) AS e
    JOIN layout_4_excess AS x ON x.alert_id = e.alert_id AND x.window_end <= e.occurred_at
    GROUP BY ALL
) AS x
WHERE alert_events.alert_id = x.alert_id AND alert_events.occurred_at = x.occurred_at AND alert_events.event = x.event;

DROP TABLE layout_4_excess;
