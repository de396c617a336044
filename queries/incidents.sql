-- Incidents: the alerts of one problem, with the alert whose key explains the others as its cause.
-- Run at the end of every run, inside its transaction, over every alert (a check's current and
-- earlier definitions alike, except alerts closed as 'check changed': a rebuild derives them again),
-- so an incident that spans runs is grouped the same as if one run had read everything.
--
-- Alert A explains alert B when their breaching spans (first breaching window's start to last
-- breaching window's end) overlap in data time, both are a check's or both a source alarm (whose
-- times are wall clock: never compared with a check's), and
--   · A and B watch the same series (the same key) in two checks: share 1; or
--   · B's excess lies inside A's key: of B's causes that are answers (alert_causes.significant),
--     those whose combination, with B's own key, holds every column=value of A's key carry at
--     least $inside (a share of B's excess), and the answers outside A's key at most $outside
--     (what lies outside A is no longer the problem). A key strictly coarser than B's (a site
--     against one title of the site) never explains B: its excess lies inside A by construction.
-- Where A and B explain each other, the larger share decides; on a tie, the better cause (below).
-- Each alert's parent is the alert that explains the largest share of it (on a tie the better
-- cause); following parents ends at a root, the incident's cause: an alert nothing explains.
-- Better cause: more columns in its key (more specific), higher severity, more affected sessions,
-- a source's silence before its lag, opened earlier, then the smaller alert_id, so every choice is
-- deterministic.
-- The incident's id is made from its earliest alert's (earliest opened; of alerts opened together,
-- the cause, else the smallest alert_id): an alert that leaves an incident when its causes change
-- does not take the incident's id with it when it opened with the cause.

-- @statement incidents.group
CREATE OR REPLACE TEMP TABLE incident_alerts AS
WITH RECURSIVE
nodes AS (
    SELECT
        alert_id, check_name, key, split_value, status, opened_at, closed_at, breach_started_at, last_breach_at,
        severity, affected_sessions, affected_viewers, excess_sessions, last_run_id, alarm,
        list_transform(map_entries(key), lambda e: e.key || '=' || coalesce(e.value, chr(0))) AS items,
        row_number() OVER (ORDER BY cardinality(key) DESC,
                                    CASE severity WHEN 'high' THEN 0 WHEN 'medium' THEN 1 ELSE 2 END,
                                    coalesce(affected_sessions, 0) DESC,
                                    -- a source both silent and lagging: the silence explains the lag
                                    alarm IS NOT DISTINCT FROM 'lagging', opened_at, alert_id) AS cause_order
    FROM alerts
    WHERE close_reason IS DISTINCT FROM 'check changed'
),
answers AS (
    SELECT
        c.alert_id,
        list_distinct(n.items || list_transform(map_entries(c.key), lambda e: e.key || '=' || coalesce(e.value, chr(0))))
            AS items,
        coalesce(c.excess_share, 0) AS share
    FROM alert_causes AS c
    JOIN nodes AS n USING (alert_id)
    WHERE c.significant
),
pairs AS (
    SELECT a.alert_id AS explainer, b.alert_id AS explained, a.cause_order, a.items AS a_items, b.items AS b_items
    FROM nodes AS a
    JOIN nodes AS b
        ON a.alert_id <> b.alert_id
       AND a.breach_started_at < b.last_breach_at AND b.breach_started_at < a.last_breach_at
       AND (a.alarm IS NULL) = (b.alarm IS NULL)
),
edges AS (
    SELECT p.explainer, p.explained, p.cause_order, 1.0::DOUBLE AS share
    FROM pairs AS p
    WHERE list_sort(p.a_items) = list_sort(p.b_items)
    UNION ALL
    SELECT p.explainer, p.explained, any_value(p.cause_order),
           coalesce(sum(s.share) FILTER (WHERE list_has_all(s.items, p.a_items)), 0) AS share
    FROM pairs AS p
    JOIN answers AS s ON s.alert_id = p.explained
    WHERE list_sort(p.a_items) <> list_sort(p.b_items)
      AND NOT (list_has_all(p.b_items, p.a_items))   -- A strictly coarser than B
    GROUP BY p.explainer, p.explained
    HAVING coalesce(sum(s.share) FILTER (WHERE list_has_all(s.items, p.a_items)), 0) >= $inside
       AND coalesce(sum(s.share) FILTER (WHERE NOT list_has_all(s.items, p.a_items)), 0) <= $outside
),
kept AS (  -- of two alerts that explain each other, the stronger direction
    SELECT e.*
    FROM edges AS e
    LEFT JOIN edges AS r ON r.explainer = e.explained AND r.explained = e.explainer
    WHERE r.explainer IS NULL OR r.share < e.share OR (r.share = e.share AND e.cause_order < r.cause_order)
),
parents AS (
    SELECT explained AS alert_id, arg_min(explainer, (-share, cause_order)) AS parent
    FROM kept
    GROUP BY explained
),
up(alert_id, ancestor, steps) AS (
    SELECT alert_id, alert_id, 0 FROM nodes
    UNION
    SELECT u.alert_id, p.parent, u.steps + 1
    FROM up AS u
    JOIN parents AS p ON p.alert_id = u.ancestor
    WHERE u.steps < (SELECT count(*) FROM nodes)
),
roots AS (
    -- the ancestor nothing explains; in a cycle of explanations (three or more alerts), the best cause in it
    SELECT u.alert_id, arg_min(u.ancestor, (p.parent IS NOT NULL, n.cause_order)) AS cause_alert_id
    FROM (SELECT DISTINCT alert_id, ancestor FROM up) AS u
    JOIN nodes AS n ON n.alert_id = u.ancestor
    LEFT JOIN parents AS p ON p.alert_id = u.ancestor
    GROUP BY u.alert_id
)
SELECT n.*, r.cause_alert_id,
       first_value(n.alert_id) OVER (PARTITION BY r.cause_alert_id
                                     ORDER BY n.opened_at, n.alert_id <> r.cause_alert_id, n.alert_id) AS first_alert_id
FROM nodes AS n
JOIN roots AS r USING (alert_id);

-- @statement incidents.now
-- The incidents as they are now.
CREATE OR REPLACE TEMP TABLE incidents_now AS
SELECT
    substr(md5('incident ' || i.first_alert_id), 1, 16) AS incident_id,
    CASE WHEN bool_or(i.status = 'open') THEN 'open' ELSE 'closed' END AS status,
    min(i.opened_at) AS opened_at,
    CASE WHEN bool_and(i.status <> 'open') THEN max(i.closed_at) END AS closed_at,
    i.cause_alert_id,
    any_value(c.check_name) AS cause_check,
    any_value(c.key) AS cause_key,
    any_value(c.key_text) AS cause_key_text,
    any_value(c.split_value) AS cause_split_value,
    CASE min(CASE i.severity WHEN 'high' THEN 0 WHEN 'medium' THEN 1 ELSE 2 END)
        WHEN 0 THEN 'high' WHEN 1 THEN 'medium' ELSE 'low' END AS severity,
    count(*) AS alerts,
    list(i.alert_id ORDER BY i.opened_at, i.alert_id) AS alert_ids,
    any_value(c.affected_sessions) AS affected_sessions,
    any_value(c.affected_viewers) AS affected_viewers,
    any_value(c.excess_sessions) AS excess_sessions,
    max(i.last_breach_at) AS last_breach_at,
    any_value(c.alarm) AS cause_alarm
FROM incident_alerts AS i
JOIN alerts AS c ON c.alert_id = i.cause_alert_id
GROUP BY i.cause_alert_id, i.first_alert_id;

-- @statement incidents.events
-- What changed since the last run, as events at data times: an incident new to the table opened
-- (and closed, if all its alerts closed in the same run); one whose alerts, cause or affected
-- sessions changed was updated; one whose last alert closed closed; one open again reopened; one
-- gone (its alerts joined another incident) closed as 'merged'.
INSERT INTO incident_events
SELECT n.incident_id, $run_id, n.opened_at, 'opened', 'open', n.cause_alert_id, n.alerts, n.alert_ids,
       n.affected_sessions, n.affected_viewers
FROM incidents_now AS n
WHERE n.incident_id NOT IN (SELECT incident_id FROM incidents)
UNION ALL
SELECT n.incident_id, $run_id, n.last_breach_at, 'updated', n.status, n.cause_alert_id, n.alerts, n.alert_ids,
       n.affected_sessions, n.affected_viewers
FROM incidents_now AS n
JOIN incidents AS o USING (incident_id)
WHERE (o.alert_ids <> n.alert_ids OR o.cause_alert_id <> n.cause_alert_id
       OR o.affected_sessions IS DISTINCT FROM n.affected_sessions)
  AND NOT (o.status = 'closed' AND n.status = 'open')
UNION ALL
SELECT n.incident_id, $run_id, n.last_breach_at, 'reopened', 'open', n.cause_alert_id, n.alerts, n.alert_ids,
       n.affected_sessions, n.affected_viewers
FROM incidents_now AS n
JOIN incidents AS o USING (incident_id)
WHERE o.status = 'closed' AND n.status = 'open'
UNION ALL
SELECT n.incident_id, $run_id, n.closed_at, 'closed', 'closed', n.cause_alert_id, n.alerts, n.alert_ids,
       n.affected_sessions, n.affected_viewers
FROM incidents_now AS n
LEFT JOIN incidents AS o USING (incident_id)
WHERE n.status = 'closed' AND o.status IS DISTINCT FROM 'closed'
UNION ALL
SELECT o.incident_id, $run_id,
       -- a source alarm's incident in wall clock, a check's in data time
       (SELECT max(m.last_breach_at) FROM incidents_now AS m WHERE (m.cause_alarm IS NULL) = (o.cause_alarm IS NULL)),
       'closed', 'merged',
       o.cause_alert_id, o.alerts, o.alert_ids, o.affected_sessions, o.affected_viewers
FROM incidents AS o
WHERE o.incident_id NOT IN (SELECT incident_id FROM incidents_now);

-- @statement incidents.store
-- The table replaced by what it is now; an incident keeps the run that first made it, and the
-- last run that changed it.
CREATE OR REPLACE TEMP TABLE incidents_next AS
SELECT
    n.incident_id, n.status, n.opened_at, n.closed_at, n.cause_alert_id, n.cause_check, n.cause_key,
    n.cause_key_text, n.cause_split_value, n.severity, n.alerts, n.alert_ids, n.affected_sessions,
    n.affected_viewers, n.excess_sessions, n.cause_alarm,
    coalesce(o.first_run_id, $run_id) AS first_run_id,
    CASE WHEN o.incident_id IS NULL OR o.status <> n.status OR o.alert_ids <> n.alert_ids
              OR o.cause_alert_id <> n.cause_alert_id OR o.affected_sessions IS DISTINCT FROM n.affected_sessions
         THEN $run_id ELSE o.last_run_id END AS last_run_id
FROM incidents_now AS n
LEFT JOIN incidents AS o USING (incident_id);

DELETE FROM incidents;

INSERT INTO incidents BY NAME SELECT * FROM incidents_next;

UPDATE alerts
SET incident_id = i.incident_id
FROM (SELECT a.alert_id, n.incident_id
      FROM incident_alerts AS a
      JOIN incidents_now AS n ON n.cause_alert_id = a.cause_alert_id) AS i
WHERE alerts.alert_id = i.alert_id AND alerts.incident_id IS DISTINCT FROM i.incident_id;

DROP TABLE incident_alerts;
DROP TABLE incidents_now;
DROP TABLE incidents_next;
