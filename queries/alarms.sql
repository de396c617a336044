-- Source alarms: alerts about a source itself, not about a check's series, judged by every run
-- after its checks (and before the incidents), inside its transaction, for each source of the
-- checks it ran that has `max_silence` or `max_lag`. The one place the wall clock enters a
-- decision: $now is the run's clock reading as it began (runs.started_at); no window, baseline or
-- check's alert ever reads it.
--
--   silent   no new file has arrived for longer than max_silence ($max_silence seconds). A file
--            arrived at its modification time (an object's LastModified), or when the first run
--            that read it began if that is earlier (a writer's clock ahead of ours); files listed
--            now and not read yet arrived at the earlier of their time and $now. A source with no
--            file at all is silent since the project's first run. The alert closes as 'data
--            flowing again' once the newest arrival is within max_silence, at the first arrival
--            after the silence.
--   lagging  the source's newest data time (the largest sane event time its checks have read:
--            their watermark) is more than max_lag ($max_lag seconds) behind the clock. Not judged
--            while a backlog holds the source's reading back ($lag_judged false: max_read_per_run),
--            since the lag is then Plimsoll's, not the lake's. Closes as 'caught up'.
--
-- An alarm is one alert while it lasts: opened once (event 'opened'), then updated by each run that
-- finds it still beyond its limit (last_breach_at, peak_value; no event), and closed once (event
-- 'closed'); a limit raised so far that the alarm is within it closes it as 'limit raised'. Its
-- check_name is NULL (it is no check), alarm says which, key is {source: NAME}; opened_at is the
-- moment the limit was passed (the stretch's start + the limit), breach_started_at the stretch's
-- start (the last file's arrival, or the newest data time), times are wall clock (UTC) but for
-- newest_data_at; value and threshold are seconds: how long silent or behind, and the limit.

-- @statement alarms.retire
-- Open alarms no longer watched close, at $now: their source gone from the project ($sources), or
-- its max_silence ($silent_sources: the sources that have one) or max_lag ($lagging_sources) taken
-- out. Returns what closed, for the run's summary.
CREATE OR REPLACE TEMP TABLE alarm_retired AS
SELECT alert_id, source_name, alarm,
       CASE WHEN list_contains($sources::VARCHAR[], source_name) THEN 'limit removed' ELSE 'source removed' END
           AS close_reason
FROM alerts
WHERE status = 'open' AND alarm IS NOT NULL
  AND NOT list_contains(CASE alarm WHEN 'silent' THEN $silent_sources::VARCHAR[] ELSE $lagging_sources::VARCHAR[] END,
                        source_name);

INSERT INTO alert_events BY NAME
SELECT a.alert_id, $run_id AS run_id, $now::TIMESTAMP AS occurred_at, 'closed' AS event, NULL::DOUBLE AS value,
       a.threshold, a.last_file_at, a.newest_data_at
FROM alerts AS a
SEMI JOIN alarm_retired AS r ON r.alert_id = a.alert_id;

UPDATE alerts
SET status = 'closed', close_reason = r.close_reason, closed_at = $now::TIMESTAMP, last_run_id = $run_id
FROM alarm_retired AS r
WHERE alerts.alert_id = r.alert_id;

SELECT source_name, alarm, close_reason FROM alarm_retired ORDER BY source_name, alarm DESC;

-- @statement alarms.arrivals
-- When each file of source $source arrived: the files runs have read (the first run that read one
-- found it), and those listed now ($listing) and not read yet.
CREATE OR REPLACE TEMP TABLE alarm_arrivals AS
WITH read_before AS (
    SELECT f.path, min(f.modified_at) AS modified_at, min(coalesce(r.started_at, $now::TIMESTAMP)) AS found_at
    FROM files_read AS f
    LEFT JOIN runs AS r ON r.run_id = f.run_id
    WHERE f.source_name = $source
    GROUP BY f.path
),
listed AS (
    SELECT l.path, l.modified_at, $now::TIMESTAMP AS found_at
    FROM (SELECT unnest($listing::STRUCT(path VARCHAR, modified_at TIMESTAMP)[], recursive := true)) AS l
    WHERE NOT EXISTS (SELECT 1 FROM read_before AS b WHERE b.path = l.path)
)
SELECT path, least(modified_at, found_at) AS arrived_at FROM read_before
UNION ALL
SELECT path, least(modified_at, found_at) AS arrived_at FROM listed;

-- @statement alarms.verdicts
-- Each alarm of $source that is watched, measured at $now against its limit, beside its open alert:
-- opened, continued (still beyond the limit), closed, or nothing.
CREATE OR REPLACE TEMP TABLE alarm_verdicts AS
WITH evidence AS (
    SELECT
        coalesce((SELECT max(arrived_at) FROM alarm_arrivals), (SELECT min(started_at) FROM runs),
                 $now::TIMESTAMP) AS last_file_at,
        -- the watermark of the source's checks ($checks): the newest sane event time read from it
        (SELECT max(watermark) FROM check_state WHERE list_contains($checks::VARCHAR[], check_name)) AS newest_data_at
),
measured AS (
    SELECT 'silent' AS alarm, $max_silence::BIGINT AS limit_seconds, last_file_at AS stretch_start,
           epoch($now::TIMESTAMP) - epoch(last_file_at) AS seconds, last_file_at, newest_data_at
    FROM evidence
    WHERE $max_silence IS NOT NULL
    UNION ALL
    SELECT 'lagging', $max_lag::BIGINT, newest_data_at,
           epoch($now::TIMESTAMP) - epoch(newest_data_at), last_file_at, newest_data_at
    FROM evidence
    WHERE $max_lag IS NOT NULL AND $lag_judged AND newest_data_at IS NOT NULL
),
judged AS (
    SELECT
        m.*,
        m.seconds > m.limit_seconds AS beyond,
        a.alert_id AS open_alert_id, a.opened_at AS open_since, a.threshold AS open_threshold,
        a.peak_value AS open_peak, a.last_file_at AS open_last_file_at, a.newest_data_at AS open_newest_data_at
    FROM measured AS m
    LEFT JOIN alerts AS a ON a.status = 'open' AND a.alarm = m.alarm AND a.source_name = $source
)
SELECT
    *,
    CASE
        WHEN beyond AND open_alert_id IS NULL THEN 'opened'
        WHEN beyond THEN 'continued'
        WHEN open_alert_id IS NOT NULL THEN 'closed'
    END AS action,
    stretch_start + to_seconds(limit_seconds) AS opened_at,
    CASE
        WHEN alarm = 'silent' AND last_file_at > open_last_file_at THEN 'data flowing again'
        WHEN alarm = 'lagging' AND newest_data_at > open_newest_data_at THEN 'caught up'
        ELSE 'limit raised'
    END AS close_reason,
    -- a silence ends with the first file that arrived after it (never before the alert opened)
    CASE
        WHEN alarm = 'silent' AND last_file_at > open_last_file_at THEN greatest(open_since, (
            SELECT min(arrived_at) FROM alarm_arrivals WHERE arrived_at > open_last_file_at))
        ELSE $now::TIMESTAMP
    END AS closed_at
FROM judged;

-- @statement alarms.record
-- What the verdicts change: an 'opened' or 'closed' event each (a closed silence's value is how long
-- it lasted, a closed lag's the lag now), the open alerts updated or closed, the new ones made (the
-- alert id from the source, the alarm, its opening and the run, since wall-clock alarms are never
-- derived again; the fingerprint from the source and the alarm).
INSERT INTO alert_events BY NAME
SELECT
    coalesce(open_alert_id, substr(md5(to_json({'source': $source, 'alarm': alarm, 'opened_at': opened_at,
                                                'run_id': $run_id})::VARCHAR), 1, 16)) AS alert_id,
    $run_id AS run_id,
    CASE action WHEN 'opened' THEN opened_at ELSE closed_at END AS occurred_at,
    action AS event,
    CASE
        WHEN action = 'opened' THEN seconds
        WHEN alarm = 'silent' AND close_reason = 'data flowing again' THEN epoch(closed_at) - epoch(open_last_file_at)
        ELSE seconds
    END AS value,
    coalesce(open_threshold, limit_seconds) AS threshold,
    last_file_at,
    newest_data_at
FROM alarm_verdicts
WHERE action IN ('opened', 'closed');

UPDATE alerts
SET last_breach_at = CASE WHEN v.action = 'continued' THEN $now::TIMESTAMP ELSE alerts.last_breach_at END,
    peak_value = CASE
        WHEN v.action = 'continued' THEN greatest(alerts.peak_value, v.seconds)
        -- a silence that ended lasted until the first new file
        WHEN v.alarm = 'silent' AND v.close_reason = 'data flowing again'
            THEN greatest(alerts.peak_value, epoch(v.closed_at) - epoch(v.open_last_file_at))
        ELSE alerts.peak_value
    END,
    status = CASE WHEN v.action = 'closed' THEN 'closed' ELSE 'open' END,
    close_reason = CASE WHEN v.action = 'closed' THEN v.close_reason END,
    closed_at = CASE WHEN v.action = 'closed' THEN v.closed_at END,
    last_file_at = v.last_file_at,
    newest_data_at = v.newest_data_at,
    last_run_id = $run_id
FROM alarm_verdicts AS v
WHERE alerts.alert_id = v.open_alert_id AND v.action IN ('continued', 'closed');

INSERT INTO alerts BY NAME
SELECT
    substr(md5(to_json({'source': $source, 'alarm': alarm, 'opened_at': opened_at, 'run_id': $run_id})::VARCHAR),
           1, 16) AS alert_id,
    NULL::VARCHAR AS check_name,
    $severity AS severity,
    MAP {'source': $source} AS key,
    'source=' || $source AS key_text,
    'open' AS status,
    opened_at,
    stretch_start AS breach_started_at,
    $now::TIMESTAMP AS last_breach_at,
    seconds AS peak_value,
    limit_seconds::DOUBLE AS threshold,
    substr(md5(to_json({'source': $source, 'alarm': alarm})::VARCHAR), 1, 16) AS fingerprint,
    $run_id AS first_run_id,
    $run_id AS last_run_id,
    alarm,
    $source AS source_name,
    last_file_at,
    newest_data_at
FROM alarm_verdicts
WHERE action = 'opened';

-- @statement alarms.summary
-- What the run says about $source's alarms.
SELECT alarm, action, seconds, limit_seconds, last_file_at, newest_data_at, close_reason, closed_at,
       CASE WHEN action = 'closed' AND alarm = 'silent' AND close_reason = 'data flowing again'
            THEN epoch(closed_at) - epoch(open_last_file_at) END AS silence_seconds
FROM alarm_verdicts
WHERE action IS NOT NULL
ORDER BY alarm DESC;
