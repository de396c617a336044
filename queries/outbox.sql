-- `plimsoll notify`, step 1, in one transaction: every alert event not yet in the outbox, once per
-- webhook ($webhooks: name, url). An 'opened' or 'closed' event is always sent. An 'updated' event is
-- sent only once affected_sessions has grown by $growth (0.5 = 50 %) over the last event queued for the
-- same alert and webhook; the others are kept as 'skipped', so each event is decided once, and queuing
-- again adds nothing. The idempotency key hashes the event (alert, kind, data time, affected sessions)
-- and the webhook's name, so a full refresh that derives the same events again does not resend them.
-- The payload carries keys and counts, never a session or viewer id.
CREATE OR REPLACE TEMP TABLE outbox_new AS
WITH RECURSIVE
hooks AS (
    SELECT unnest($webhooks, recursive := true)
),
events AS (
    SELECT
        e.alert_id, e.run_id, e.occurred_at, e.event, e.value, e.threshold, e.affected_sessions,
        a.check_name, a.severity, a.key, a.key_text, a.split_value, a.opened_at, a.closed_at,
        a.close_reason, a.fingerprint,
        CASE e.event WHEN 'opened' THEN 0 WHEN 'updated' THEN 1 ELSE 2 END AS event_rank
    FROM (SELECT DISTINCT * FROM alert_events) AS e
    JOIN alerts AS a ON a.alert_id = e.alert_id
),
numbered AS (
    SELECT
        *,
        count(*) FILTER (WHERE event <> 'closed') OVER (
            PARTITION BY alert_id ORDER BY occurred_at, event_rank, affected_sessions ROWS UNBOUNDED PRECEDING
        ) AS breach_windows,
        md5(to_json({'alert_id': alert_id, 'event': event, 'occurred_at': occurred_at,
                     'affected_sessions': affected_sessions})::VARCHAR) AS event_key
    FROM events
    -- two windows of one alert alike in all of these are one piece of news
    QUALIFY row_number() OVER (PARTITION BY event_key ORDER BY run_id DESC, value) = 1
),
candidates AS (
    SELECT
        h.name AS webhook, h.url, n.*,
        md5(to_json({'event': n.event_key, 'webhook': h.name})::VARCHAR) AS idempotency_key
    FROM numbered AS n
    CROSS JOIN hooks AS h
),
fresh AS (
    SELECT
        c.*,
        row_number() OVER (PARTITION BY webhook, alert_id ORDER BY occurred_at, event_rank, affected_sessions) AS n
    FROM candidates AS c
    ANTI JOIN outbox AS o ON o.idempotency_key = c.idempotency_key
),
seeds AS (
    -- the affected sessions of the last event queued to be sent, per alert and webhook
    SELECT webhook, alert_id, max(affected_sessions) AS last_sent
    FROM outbox
    WHERE status <> 'skipped' AND event <> 'closed'
    GROUP BY webhook, alert_id
),
decided AS (
    SELECT f.webhook, f.alert_id, f.n, f.idempotency_key, d.send,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE s.last_sent END AS last_sent
    FROM fresh AS f
    LEFT JOIN seeds AS s ON s.webhook = f.webhook AND s.alert_id = f.alert_id
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR s.last_sent IS NULL
               OR f.affected_sessions >= s.last_sent * (1 + $growth) AS send
    ) AS d
    WHERE f.n = 1
    UNION ALL
    SELECT f.webhook, f.alert_id, f.n, f.idempotency_key, d.send,
           CASE WHEN d.send AND f.event <> 'closed' THEN f.affected_sessions ELSE w.last_sent END
    FROM decided AS w
    JOIN fresh AS f ON f.webhook = w.webhook AND f.alert_id = w.alert_id AND f.n = w.n + 1
    CROSS JOIN LATERAL (
        SELECT f.event <> 'updated' OR w.last_sent IS NULL
               OR f.affected_sessions >= w.last_sent * (1 + $growth) AS send
    ) AS d
)
SELECT
    f.idempotency_key, f.webhook, f.url, f.alert_id, f.run_id, f.event, f.occurred_at, f.affected_sessions,
    to_json({
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
        'closed_at': CASE WHEN f.event = 'closed' THEN strftime(f.closed_at, '%Y-%m-%dT%H:%M:%SZ') END,
        'close_reason': CASE WHEN f.event = 'closed' THEN f.close_reason END,
        'value': f.value,
        'threshold': f.threshold,
        'affected_sessions': f.affected_sessions,
        'breach_windows': f.breach_windows,
        'run_id': f.run_id,
        'sender': 'plimsoll ' || $version
    })::VARCHAR AS payload,
    CASE WHEN d.send THEN 'queued' ELSE 'skipped' END AS status,
    0 AS attempts,
    NULL::VARCHAR AS last_error,
    (SELECT coalesce(max(seq), 0) FROM outbox)
        + row_number() OVER (ORDER BY f.occurred_at, f.event_rank, f.alert_id, f.webhook) AS seq,
    $now::TIMESTAMP AS enqueued_at,
    NULL::TIMESTAMP AS last_attempt_at,
    CASE WHEN d.send THEN $now::TIMESTAMP END AS next_attempt_at,
    NULL::TIMESTAMP AS delivered_at
FROM fresh AS f
JOIN decided AS d ON d.webhook = f.webhook AND d.alert_id = f.alert_id AND d.n = f.n;

INSERT INTO outbox BY NAME
SELECT * FROM outbox_new;
