-- `plimsoll notify`, step 1, in one transaction: every alert event not yet in the outbox, once per
-- webhook ($webhooks: name, url). An 'opened', 'reopened' or 'closed' event is sent. An 'updated' event is sent
-- only once affected_sessions has grown by $growth (0.5 = 50 %) over the last event queued for the same
-- incident and webhook; the others are kept as 'skipped' (skip_reason 'growth'), so each event is
-- decided once, and queuing again adds nothing.
--
-- An event is known by its incident, not its alert_id: the alert's fingerprint (check, key, split
-- value) and opened_at, the kind of event, and its data time for 'updated', 'reopened' and a close
-- that follows a reopening (an alert reopened closes more than once). A rebuild after a check
-- changed (--rebuild) derives the same incidents again under new alert ids; what a webhook was
-- told about them is not told again, and growth is measured against what it was told. The rebuild
-- also closes the old definition's open alerts as 'check changed': that close is skipped
-- ('rebuilt') when the rebuilt definition has an alert for the same incident, which goes on, and sent
-- when it has none. The idempotency key hashes the event's identity and the webhook's name.
--
-- A webhook's first pass (no outbox row yet) does not replay history: events older than its
-- catch_up (seconds), in data time before the newest data the warehouse has read, are kept as
-- 'skipped' ('catch_up'), except the opening of an alert still open, so the receiver learns of the
-- problems going on now.
-- The payload carries keys and counts, never a session or viewer id: the alert's incident and its
-- significant causes (alert_causes: a run replaces an alert's causes when it grows it, so these are
-- the latest run's, which may be later than the event's when notify runs after several runs).
--
-- Webhooks with per 'incident' are given the events of incident_events instead (after the alerts').
--
-- A source alarm's event (alerts.alarm 'silent' or 'lagging', queries/alarms.sql) has a payload of
-- its own: no check, windows or sessions, but the source, how long it was silent or behind and the
-- limit (seconds), its newest file's arrival and its newest data time. Its times are wall clock, so
-- its age for catch_up is measured against $now, and the newest data time against which check
-- events' age is measured leaves it out.
CREATE OR REPLACE TEMP MACRO outbox_event_identity(fingerprint, opened_at, event, occurred_at, close_reason,
                                                   definition_hash, after_reopening) AS
    md5(to_json({
        'fingerprint': fingerprint,
        'opened_at': opened_at,
        'event': event,
        'occurred_at': CASE WHEN event IN ('updated', 'reopened') OR after_reopening THEN occurred_at END,
        -- each definition's 'check changed' close is its own event: the rebuilt alert may close later
        'definition': CASE WHEN event = 'closed' AND close_reason = 'check changed' THEN definition_hash END
    })::VARCHAR);

-- rows queued before the outbox knew incidents take theirs from their alert
UPDATE outbox
SET fingerprint = a.fingerprint,
    opened_at = a.opened_at,
    event_identity = outbox_event_identity(a.fingerprint, a.opened_at, outbox.event, outbox.occurred_at,
                                           a.close_reason, a.definition_hash, false)
FROM alerts AS a
WHERE a.alert_id = outbox.alert_id AND outbox.event_identity IS NULL;

-- each alert's significant causes as the last run that grew it computed them, best first
CREATE OR REPLACE TEMP TABLE outbox_cause_sets AS
SELECT
    alert_id,
    coalesce(list({
        'rank': rank, 'key': key, 'key_text': key_text, 'bad': bad,
        'expected': CASE WHEN isfinite(expected) THEN round(expected, 2) END,
        'excess_share': CASE WHEN isfinite(excess_share) THEN round(excess_share, 4) END
    } ORDER BY rank) FILTER (WHERE significant), []) AS causes
FROM alert_causes
GROUP BY alert_id;

CREATE OR REPLACE TEMP TABLE outbox_new AS
WITH RECURSIVE
hooks AS (
    SELECT
        *,
        NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.webhook = w.name AND o.incident_id IS NULL) AS first_pass,
        -- data time, not the clock: lakes lag, and every decision in a run is made in data time
        greatest((SELECT max(watermark) FROM check_state),
                 (SELECT max(occurred_at) FROM alert_events
                  WHERE alert_id IN (SELECT alert_id FROM alerts WHERE alarm IS NULL)))
            - to_seconds(w.catch_up) AS catch_up_from,
        -- a source alarm's events are in wall-clock time
        $now::TIMESTAMP - to_seconds(w.catch_up) AS alarm_catch_up_from
    FROM (SELECT unnest($webhooks, recursive := true)) AS w
    WHERE w.per = 'alert'
),
cause_sets AS (
    SELECT * FROM outbox_cause_sets
),
events AS (
    SELECT
        e.alert_id, e.run_id, e.occurred_at, e.event, e.value, e.threshold, e.affected_sessions,
        e.excess_sessions, e.affected_viewers,
        a.check_name, a.severity, a.key, a.key_text, a.split_value, a.opened_at, a.closed_at,
        a.close_reason, a.fingerprint, a.status AS alert_status, a.incident_id, coalesce(cs.causes, []) AS causes,
        a.alarm, a.source_name, e.last_file_at, e.newest_data_at,
        CASE e.event WHEN 'opened' THEN 0 WHEN 'reopened' THEN 0 WHEN 'updated' THEN 1 ELSE 2 END AS event_rank,
        outbox_event_identity(a.fingerprint, a.opened_at, e.event, e.occurred_at, a.close_reason,
                              a.definition_hash, e.event = 'closed' AND EXISTS (
                                  SELECT 1 FROM alert_events AS r
                                  WHERE r.alert_id = e.alert_id AND r.event = 'reopened' AND r.occurred_at < e.occurred_at
                              )) AS event_identity,
        e.event = 'closed' AND a.close_reason = 'check changed' AND EXISTS (
            SELECT 1
            FROM alerts AS r  -- an alert of the same incident made by the rebuild or after it
            WHERE r.fingerprint = a.fingerprint AND r.opened_at = a.opened_at AND r.alert_id <> a.alert_id
              AND r.first_run_id >= e.run_id
        ) AS rebuilt
    FROM (SELECT DISTINCT * FROM alert_events) AS e
    JOIN alerts AS a ON a.alert_id = e.alert_id
    LEFT JOIN cause_sets AS cs ON cs.alert_id = e.alert_id
),
numbered AS (
    SELECT
        *,
        count(*) FILTER (WHERE event <> 'closed') OVER (
            PARTITION BY alert_id ORDER BY occurred_at, event_rank, affected_sessions ROWS UNBOUNDED PRECEDING
        ) AS breach_windows
    FROM events
    -- one event of an incident, whichever alert reported it: the open alert's, else the newest run's
    QUALIFY row_number() OVER (
        PARTITION BY event_identity ORDER BY alert_status = 'open' DESC, run_id DESC, affected_sessions DESC, value
    ) = 1
),
candidates AS (
    SELECT
        h.name AS webhook, h.url, n.*,
        md5(to_json({'event': n.event_identity, 'webhook': h.name})::VARCHAR) AS idempotency_key,
        coalesce(h.first_pass
                 AND n.occurred_at < CASE WHEN n.alarm IS NULL THEN h.catch_up_from ELSE h.alarm_catch_up_from END
                 AND NOT (n.event = 'opened' AND n.alert_status = 'open'), false) AS stale
    FROM numbered AS n
    CROSS JOIN hooks AS h
),
fresh AS (
    SELECT
        c.*,
        row_number() OVER (
            PARTITION BY webhook, fingerprint, opened_at ORDER BY occurred_at, event_rank, affected_sessions
        ) AS n
    FROM candidates AS c
    -- not queued for this webhook already: by key, by the incident's event, or (a row of an earlier
    -- version whose alert is gone) by the same alert's event at the same data time and size
    WHERE NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.idempotency_key = c.idempotency_key)
      AND NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.webhook = c.webhook AND o.event_identity = c.event_identity)
      AND NOT EXISTS (SELECT 1 FROM outbox AS o
                      WHERE o.webhook = c.webhook AND o.incident_id IS NULL AND o.alert_id = c.alert_id AND o.event = c.event
                        AND o.occurred_at = c.occurred_at AND o.affected_sessions = c.affected_sessions)
),
seeds AS (
    -- the affected sessions of the last event queued to be sent, per incident and webhook
    SELECT webhook, fingerprint, opened_at, max(affected_sessions) AS last_sent
    FROM outbox
    WHERE status <> 'skipped' AND event <> 'closed' AND incident_id IS NULL
    GROUP BY webhook, fingerprint, opened_at
),
decided AS (
    SELECT f.webhook, f.fingerprint, f.opened_at, f.n, f.idempotency_key, d.send, d.why,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE s.last_sent END AS last_sent
    FROM fresh AS f
    LEFT JOIN seeds AS s ON s.webhook = f.webhook AND s.fingerprint = f.fingerprint AND s.opened_at = f.opened_at
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR s.last_sent IS NULL OR f.affected_sessions >= s.last_sent * (1 + $growth)
               AS grown
    ) AS g
    CROSS JOIN LATERAL (
        SELECT NOT f.rebuilt AND NOT f.stale AND g.grown AS send,
               CASE WHEN f.rebuilt THEN 'rebuilt' WHEN f.stale THEN 'catch_up' WHEN NOT g.grown THEN 'growth' END AS why
    ) AS d
    WHERE f.n = 1
    UNION ALL
    SELECT f.webhook, f.fingerprint, f.opened_at, f.n, f.idempotency_key, d.send, d.why,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE w.last_sent END
    FROM decided AS w
    JOIN fresh AS f
      ON f.webhook = w.webhook AND f.fingerprint = w.fingerprint AND f.opened_at = w.opened_at AND f.n = w.n + 1
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR w.last_sent IS NULL OR f.affected_sessions >= w.last_sent * (1 + $growth)
               AS grown
    ) AS g
    CROSS JOIN LATERAL (
        SELECT NOT f.rebuilt AND NOT f.stale AND g.grown AS send,
               CASE WHEN f.rebuilt THEN 'rebuilt' WHEN f.stale THEN 'catch_up' WHEN NOT g.grown THEN 'growth' END AS why
    ) AS d
)
SELECT
    f.idempotency_key, f.webhook, f.url, f.alert_id, f.run_id, f.event, f.occurred_at, f.affected_sessions,
    CASE WHEN f.alarm IS NULL THEN to_json({
        'idempotency_key': f.idempotency_key,
        'event': f.event,
        'occurred_at': strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ'),
        'check': f.check_name,
        'severity': f.severity,
        'alert_id': f.alert_id,
        'fingerprint': f.fingerprint,
        'key': f.key,
        'key_text': f.key_text,
        'split_value': f.split_value,
        'opened_at': strftime(f.opened_at, '%Y-%m-%dT%H:%M:%SZ'),
        'closed_at': CASE WHEN f.event = 'closed' THEN strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ') END,
        -- only a recovery can be reopened: a close before the alert's last one was a recovery
        'close_reason': CASE WHEN f.event = 'closed' THEN
            CASE WHEN f.closed_at = f.occurred_at THEN f.close_reason ELSE 'recovered' END END,
        -- NaN and infinity are not JSON: a strict parser would refuse the whole event
        'value': CASE WHEN isfinite(f.value) THEN f.value END,
        'threshold': CASE WHEN isfinite(f.threshold) THEN f.threshold END,
        'affected_sessions': f.affected_sessions,
        'affected_viewers': f.affected_viewers,
        'excess_sessions': round(f.excess_sessions, 1),
        'breach_windows': f.breach_windows,
        'incident_id': f.incident_id,
        'causes': f.causes,
        'run_id': f.run_id,
        'sender': 'plimsoll ' || $version
    })::VARCHAR ELSE to_json({
        -- a source alarm: times are wall clock, but newest_data_at (data time)
        'idempotency_key': f.idempotency_key,
        'event': f.event,
        'occurred_at': strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ'),
        'check': NULL::VARCHAR,
        'alarm': f.alarm,
        'source': f.source_name,
        'severity': f.severity,
        'alert_id': f.alert_id,
        'fingerprint': f.fingerprint,
        'key': f.key,
        'key_text': f.key_text,
        'opened_at': strftime(f.opened_at, '%Y-%m-%dT%H:%M:%SZ'),
        'closed_at': CASE WHEN f.event = 'closed' THEN strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ') END,
        'close_reason': CASE WHEN f.event = 'closed' THEN f.close_reason END,
        -- how long silent (a closed silence: until the first new file) or behind the clock, and the limit
        'duration_seconds': CASE WHEN isfinite(f.value) THEN round(f.value)::BIGINT END,
        'limit_seconds': CASE WHEN isfinite(f.threshold) THEN round(f.threshold)::BIGINT END,
        'last_file_at': strftime(f.last_file_at, '%Y-%m-%dT%H:%M:%SZ'),
        'newest_data_at': strftime(f.newest_data_at, '%Y-%m-%dT%H:%M:%SZ'),
        'incident_id': f.incident_id,
        'run_id': f.run_id,
        'sender': 'plimsoll ' || $version
    })::VARCHAR END AS payload,
    CASE WHEN d.send THEN 'queued' ELSE 'skipped' END AS status,
    0 AS attempts,
    NULL::VARCHAR AS last_error,
    (SELECT coalesce(max(seq), 0) FROM outbox)
        + row_number() OVER (ORDER BY f.occurred_at, f.event_rank, f.alert_id, f.webhook) AS seq,
    $now::TIMESTAMP AS enqueued_at,
    NULL::TIMESTAMP AS last_attempt_at,
    CASE WHEN d.send THEN $now::TIMESTAMP END AS next_attempt_at,
    NULL::TIMESTAMP AS delivered_at,
    f.fingerprint,
    f.opened_at,
    f.event_identity,
    d.why AS skip_reason,
    NULL::VARCHAR AS incident_id
FROM fresh AS f
JOIN decided AS d
  ON d.webhook = f.webhook AND d.fingerprint = f.fingerprint AND d.opened_at = f.opened_at AND d.n = f.n;

-- Webhooks with per 'incident': each event of incident_events once per webhook. An event is known by
-- its incident and kind, and for 'closed' and 'reopened' its data time, for 'updated' also its alerts
-- and size (so a rebuild that derives the same events again sends nothing twice). 'opened',
-- 'reopened' and 'closed' are sent, a close with status 'merged' too (its alerts joined another
-- incident, named by merged_into: the receiver folds its page into that one's); an
-- 'updated' one when an alert joined, the cause changed, or affected_sessions grew by $growth over
-- the last event queued for the incident and webhook, else it is kept as 'skipped' ('growth'). The
-- catch_up rule of a webhook's first pass is the alerts' rule, the opening of an incident still open
-- standing for the opening of an alert still open.
CREATE OR REPLACE TEMP TABLE outbox_incident_new AS
WITH RECURSIVE
hooks AS (
    SELECT
        *,
        NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.webhook = w.name AND o.incident_id IS NOT NULL) AS first_pass,
        greatest((SELECT max(watermark) FROM check_state),
                 (SELECT max(occurred_at) FROM alert_events
                  WHERE alert_id IN (SELECT alert_id FROM alerts WHERE alarm IS NULL)),
                 (SELECT max(occurred_at) FROM incident_events
                  WHERE cause_alert_id NOT IN (SELECT alert_id FROM alerts WHERE alarm IS NOT NULL)))
            - to_seconds(w.catch_up) AS catch_up_from,
        $now::TIMESTAMP - to_seconds(w.catch_up) AS alarm_catch_up_from
    FROM (SELECT unnest($webhooks, recursive := true)) AS w
    WHERE w.per = 'incident'
),
events AS (
    SELECT
        e.incident_id, e.run_id, e.occurred_at, e.event, e.status, e.cause_alert_id, e.alerts, e.alert_ids,
        e.affected_sessions, e.affected_viewers,
        -- an incident merged into another is gone from incidents: its opening from its events,
        -- its severity its cause alert's, and the incident that now holds its cause alert
        i.status AS incident_status, coalesce(i.opened_at, o.opened_at) AS opened_at,
        coalesce(i.severity, a.severity) AS severity,
        CASE WHEN e.status = 'merged' THEN a.incident_id END AS merged_into,
        a.check_name, a.key, a.key_text, a.split_value, a.alarm,
        -- the cause alert's worst value and its threshold, for the words a message says
        CASE WHEN isfinite(a.peak_value) THEN a.peak_value END AS cause_peak_value,
        CASE WHEN isfinite(a.threshold) THEN a.threshold END AS cause_threshold,
        coalesce(cs.causes, []) AS causes,
        CASE e.event WHEN 'opened' THEN 0 WHEN 'reopened' THEN 0 WHEN 'updated' THEN 1 ELSE 2 END AS event_rank,
        md5(to_json({
            'incident': e.incident_id,
            'event': e.event,
            'occurred_at': CASE WHEN e.event <> 'opened' THEN e.occurred_at END,
            'alert_ids': CASE WHEN e.event = 'updated' THEN e.alert_ids END,
            'affected_sessions': CASE WHEN e.event = 'updated' THEN e.affected_sessions END
        })::VARCHAR) AS event_identity
    FROM (SELECT DISTINCT * FROM incident_events) AS e
    LEFT JOIN incidents AS i ON i.incident_id = e.incident_id
    LEFT JOIN alerts AS a ON a.alert_id = e.cause_alert_id
    LEFT JOIN outbox_cause_sets AS cs ON cs.alert_id = e.cause_alert_id
    LEFT JOIN (SELECT incident_id, min(occurred_at) AS opened_at FROM incident_events WHERE event = 'opened'
               GROUP BY incident_id) AS o ON o.incident_id = e.incident_id
    QUALIFY row_number() OVER (PARTITION BY event_identity ORDER BY e.run_id DESC) = 1
),
candidates AS (
    SELECT
        h.name AS webhook, h.url, n.*,
        md5(to_json({'event': n.event_identity, 'webhook': h.name})::VARCHAR) AS idempotency_key,
        coalesce(h.first_pass
                 AND n.occurred_at < CASE WHEN n.alarm IS NULL THEN h.catch_up_from ELSE h.alarm_catch_up_from END
                 -- (an incident merged into another is gone from incidents: not open, history)
                 AND NOT (n.event = 'opened' AND coalesce(n.incident_status = 'open', false)), false) AS stale
    FROM events AS n
    CROSS JOIN hooks AS h
),
fresh AS (
    SELECT
        c.*,
        row_number() OVER (PARTITION BY webhook, incident_id ORDER BY occurred_at, event_rank, run_id) AS n
    FROM candidates AS c
    WHERE NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.idempotency_key = c.idempotency_key)
      AND NOT EXISTS (SELECT 1 FROM outbox AS o WHERE o.webhook = c.webhook AND o.event_identity = c.event_identity)
),
seeds AS (
    -- the last event queued to be sent, per incident and webhook: its size, alerts and cause
    SELECT webhook, incident_id,
           arg_max(affected_sessions, seq) AS last_sent,
           arg_max((payload::JSON ->> 'alerts')::BIGINT, seq) AS last_alerts,
           arg_max(alert_id, seq) AS last_cause
    FROM outbox
    WHERE status <> 'skipped' AND event <> 'closed' AND incident_id IS NOT NULL
    GROUP BY webhook, incident_id
),
decided AS (
    SELECT f.webhook, f.incident_id, f.n, d.send, d.why,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE s.last_sent END AS last_sent,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.alerts ELSE s.last_alerts END AS last_alerts,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.cause_alert_id ELSE s.last_cause END AS last_cause
    FROM fresh AS f
    LEFT JOIN seeds AS s ON s.webhook = f.webhook AND s.incident_id = f.incident_id
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR s.last_sent IS NULL OR f.alerts > s.last_alerts
               OR f.cause_alert_id IS DISTINCT FROM s.last_cause
               OR f.affected_sessions >= s.last_sent * (1 + $growth) AS grown
    ) AS g
    CROSS JOIN LATERAL (
        SELECT NOT f.stale AND g.grown AS send,
               CASE WHEN f.stale THEN 'catch_up' WHEN NOT g.grown THEN 'growth' END AS why
    ) AS d
    WHERE f.n = 1
    UNION ALL
    SELECT f.webhook, f.incident_id, f.n, d.send, d.why,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE w.last_sent END,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.alerts ELSE w.last_alerts END,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.cause_alert_id ELSE w.last_cause END
    FROM decided AS w
    JOIN fresh AS f ON f.webhook = w.webhook AND f.incident_id = w.incident_id AND f.n = w.n + 1
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR w.last_sent IS NULL OR f.alerts > w.last_alerts
               OR f.cause_alert_id IS DISTINCT FROM w.last_cause
               OR f.affected_sessions >= w.last_sent * (1 + $growth) AS grown
    ) AS g
    CROSS JOIN LATERAL (
        SELECT NOT f.stale AND g.grown AS send,
               CASE WHEN f.stale THEN 'catch_up' WHEN NOT g.grown THEN 'growth' END AS why
    ) AS d
)
SELECT
    f.idempotency_key, f.webhook, f.url, f.cause_alert_id AS alert_id, f.run_id, f.event, f.occurred_at,
    f.affected_sessions,
    to_json({
        'idempotency_key': f.idempotency_key,
        'event': f.event,
        'occurred_at': strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ'),
        'incident_id': f.incident_id,
        'status': f.status,
        'opened_at': strftime(f.opened_at, '%Y-%m-%dT%H:%M:%SZ'),
        'closed_at': CASE WHEN f.event = 'closed' THEN strftime(f.occurred_at, '%Y-%m-%dT%H:%M:%SZ') END,
        'merged_into': f.merged_into,
        'cause': {'check': f.check_name, 'key': f.key, 'key_text': f.key_text, 'split_value': f.split_value,
                  'alert_id': f.cause_alert_id, 'alarm': f.alarm, 'peak_value': f.cause_peak_value,
                  'threshold': f.cause_threshold},
        'alert_ids': f.alert_ids,
        'alerts': f.alerts,
        'severity': f.severity,
        'affected_sessions': f.affected_sessions,
        'affected_viewers': f.affected_viewers,
        'causes': f.causes,
        'run_id': f.run_id,
        'sender': 'plimsoll ' || $version
    })::VARCHAR AS payload,
    CASE WHEN d.send THEN 'queued' ELSE 'skipped' END AS status,
    0 AS attempts,
    NULL::VARCHAR AS last_error,
    (SELECT coalesce(max(seq), 0) FROM outbox) + (SELECT count(*) FROM outbox_new)
        + row_number() OVER (ORDER BY f.occurred_at, f.event_rank, f.incident_id, f.webhook) AS seq,
    $now::TIMESTAMP AS enqueued_at,
    NULL::TIMESTAMP AS last_attempt_at,
    CASE WHEN d.send THEN $now::TIMESTAMP END AS next_attempt_at,
    NULL::TIMESTAMP AS delivered_at,
    NULL::VARCHAR AS fingerprint,
    f.opened_at,
    f.event_identity,
    d.why AS skip_reason,
    f.incident_id
FROM fresh AS f
JOIN decided AS d ON d.webhook = f.webhook AND d.incident_id = f.incident_id AND d.n = f.n;

INSERT INTO outbox_new BY NAME
SELECT * FROM outbox_incident_new;

INSERT INTO outbox BY NAME
SELECT * FROM outbox_new;
