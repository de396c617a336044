-- Plimsoll check golden: every statement `plimsoll run` executes for it, in order, as shown.
-- Opening the warehouse comes first, as for every command that writes it, and is not repeated
-- here: the settings of queries/connection.sql, the tables of queries/warehouse.sql (made if
-- missing) and, for a file of an earlier layout, its conversion (queries/layout.sql, migrate_*.sql).
-- Parameters: $files (where the new Parquet files are read from), $paths (their names
-- relative to the source's path), $manifest (names, sizes and times), $run_id, $reader (the
-- check whose earlier files decide repeats), $read_until (a backlog read in several runs:
-- the earliest event time left for the next runs, else NULL), $source_checks (the checks of
-- the source), $definition (hash of the SQL up to the verdict stage), $check (the check's name);
-- the run's own statements name theirs. The statements from '@loop' to '@end' are one round,
-- repeated until its last statement returns 0. A named statement ('@statement NAME') runs where
-- its name says: the run's own are in queries/run.sql, the lake's in queries/lake.sql.
-- ══ the run begins ═══════════════════════════════════════════════════════════════════════
-- (not with --rebuild) the definitions the checks' windows were computed with; then the run's
-- number

-- @statement open.stored_definitions
-- The definition hash each check's windows were computed with (not read by a rebuild): a check
-- whose compiled SQL hashes otherwise now is not run until it is rebuilt.
SELECT check_name, definition_hash FROM check_state;

-- @statement open.next_run_id
-- The run's number: one more than the last run's, whether that one succeeded or failed.
SELECT coalesce(max(run_id), 0) + 1 AS run_id FROM runs;

-- ══ the run's transaction ════════════════════════════════════════════════════════════════
-- its bookkeeping tables, then everything to the commit in one transaction; the per-session stages
-- run on a second connection (not with --rebuild), set up first

-- @statement begin.run_tables
-- What each reading of a source found (its rows count once per reading, however many checks share
-- it), and the alerts closed for checks that are gone or rebuilt: the run record adds them up.
CREATE OR REPLACE TEMP TABLE run_scans (
    rows_read BIGINT, invalid_rows BIGINT, duplicate_rows BIGINT, rows_excluded BIGINT
);
CREATE OR REPLACE TEMP TABLE run_retired (check_name VARCHAR, alerts_closed BIGINT);

-- @statement connection.time_zone
SET TimeZone = 'UTC';

-- @statement begin.transaction
-- Everything from here to the commit is one transaction: a run that fails or is killed leaves the
-- warehouse as it was.
BEGIN TRANSACTION;

-- @statement begin.known_checks
-- Checks the warehouse knows, by their state or an open alert; those no longer in the project are
-- retired. (A source alarm's alert is no check's: queries/alarms.sql retires those.)
SELECT check_name FROM check_state
UNION
SELECT check_name FROM alerts WHERE status = 'open' AND check_name IS NOT NULL
ORDER BY 1;

-- @statement begin.forget_removed_sources
-- A source gone from the project ($sources: those left): its recorded column types and remembered
-- ids go, so a source added later under the same name starts afresh.
DELETE FROM source_columns WHERE NOT list_contains($sources, source_name);

DELETE FROM session_ids WHERE NOT list_contains($sources, source_name);

-- for each check no longer in the project: begin.close_alerts ('check removed') and
-- begin.drop_state; then with --rebuild, for each selected check: begin.close_alerts ('check
-- changed', for alerts of earlier definitions), begin.forget_rebuilt_alerts and begin.drop_state

-- @statement begin.close_alerts
-- $check's open alerts close for $reason ('check removed', or 'check changed' for a rebuild, which
-- keeps those of the definition $keep): at the check's watermark, the last data time it saw, with a
-- 'closed' event each. Returns how many closed.
INSERT INTO run_retired
SELECT $check, count(*)
FROM alerts
WHERE check_name = $check AND status = 'open' AND ($keep IS NULL OR definition_hash IS DISTINCT FROM $keep);

INSERT INTO alert_events BY NAME
SELECT alert_id, $run_id AS run_id,
       coalesce((SELECT max(watermark) FROM check_state WHERE check_name = $check), last_breach_at) AS occurred_at,
       'closed' AS event, NULL::DOUBLE AS value, NULL::DOUBLE AS threshold, affected_sessions, excess_sessions,
       affected_viewers
FROM alerts
WHERE check_name = $check AND status = 'open' AND ($keep IS NULL OR definition_hash IS DISTINCT FROM $keep);

UPDATE alerts
SET status = 'closed', close_reason = $reason,
    closed_at = coalesce((SELECT max(watermark) FROM check_state WHERE check_name = $check), last_breach_at),
    last_run_id = $run_id, healthy_streak = NULL
WHERE check_name = $check AND status = 'open' AND ($keep IS NULL OR definition_hash IS DISTINCT FROM $keep);

-- @statement begin.forget_rebuilt_alerts
-- A rebuild derives the alerts of the current definition $definition again, with the same ids: they
-- go, with their events and causes (the run explains them again). Alerts of earlier definitions stay
-- as history.
DELETE FROM alert_events
WHERE alert_id IN (SELECT alert_id FROM alerts WHERE check_name = $check AND definition_hash = $definition);

DELETE FROM alert_causes
WHERE alert_id IN (SELECT alert_id FROM alerts WHERE check_name = $check AND definition_hash = $definition);

DELETE FROM alerts WHERE check_name = $check AND definition_hash = $definition;

-- @statement begin.drop_state
-- Every derived trace of $check (not its alerts), so it reads the lake again from the start; the
-- session ids of files no check has read any more go too (a re-read records them again).
DELETE FROM windows WHERE check_name = $check;

DELETE FROM key_windows WHERE check_name = $check;

DELETE FROM carry WHERE check_name = $check;

DELETE FROM key_state WHERE check_name = $check;

DELETE FROM series_state WHERE check_name = $check;

DELETE FROM check_state WHERE check_name = $check;

DELETE FROM files_read WHERE check_name = $check;

DELETE FROM table_versions WHERE check_name = $check;

DELETE FROM session_ids AS i
WHERE NOT EXISTS (SELECT 1 FROM files_read AS f WHERE f.source_name = i.source_name AND f.path = i.first_path);

-- which files are new for each check

-- @statement begin.read_histories
-- What each check has read, as one hash of its files' names: checks read a source's new files
-- together only when they have read the same files before.
SELECT check_name, md5(string_agg(path, chr(10) ORDER BY path)) AS history
FROM files_read
GROUP BY check_name;

-- @statement begin.table_versions
-- How far each check has read its Delta or Iceberg source: it reads on from there.
SELECT check_name, table_version, snapshot_id, complete FROM table_versions;

-- @statement begin.files_read_by
-- The files $check has read: the others in its source's listing are new.
SELECT path FROM files_read WHERE check_name = $check;

-- a backlog larger than max_read_per_run: the new files in data-time order

-- @statement lake.first_event_times
-- A backlog larger than max_read_per_run is read in data-time order: each new file's earliest sane
-- event time (finite, no later than its $limits entry: the file's time + max_future).
SELECT file_index, min(t) AS first_event_time
FROM (
    SELECT file_index, ("ended_at")::TIMESTAMP AS t
    FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
)
WHERE isfinite(t) AND t <= $limits[file_index::BIGINT + 1]
GROUP BY file_index;

-- @statement begin.note_changed_files
-- Files $check read before whose size or time now differ in the listing ($listing): recorded once,
-- never read again (that would count their sessions twice); returned for the run to name them.
INSERT INTO changed_files
SELECT $run_id, f.check_name, f.path, f.size, f.modified_at, l.size, l.modified_at
FROM files_read AS f
JOIN (SELECT unnest($listing, recursive := true)) AS l ON l.path = f.path
WHERE f.check_name = $check AND (f.size <> l.size OR f.modified_at <> l.modified_at)
  AND NOT EXISTS (SELECT 1 FROM changed_files AS c
                  WHERE c.check_name = f.check_name AND c.path = f.path
                    AND c.size_now = l.size AND c.modified_now = l.modified_at)
RETURNING path, size_read, size_now, modified_read, modified_now;

-- ══ source sessions: its new files ═══════════════════════════════════════════════════════
-- read once for every check that read the same files before; first their footers (on a connection
-- of their own), the types the checks read, and (per file in a folder named after a column the
-- checks read: COLUMN, of TYPE) partition folders that contradict their files

-- @statement lake.known_columns
-- The type of each column the source's checks read, as first recorded ($source).
SELECT column_name, column_type, first_path FROM source_columns WHERE source_name = $source;

-- @statement lake.footers
-- Each new file's top-level columns and their DuckDB types ($files), from its footer alone.
SELECT file_name, name, duckdb_type FROM parquet_schema($files) WHERE duckdb_type IS NOT NULL;

-- @statement lake.footer
-- When the footers cannot be read together: each file's alone ($files holding one), to name the
-- file that is not readable Parquet.
SELECT 1 FROM parquet_schema($files) LIMIT 1;

-- @statement lake.partition
-- Sessions of one file ($files) in a partition folder whose own column says otherwise than the
-- folder's value ($value, read as the column's type): DuckDB would take the folder's value and
-- move them. The column's type in the file is a plain type name, checked before it is written here.
SELECT count(*) AS contradicting, any_value("COLUMN"::VARCHAR) AS file_value
FROM read_parquet($files, hive_partitioning = false)
WHERE "COLUMN" IS DISTINCT FROM TRY_CAST($value AS TYPE);

-- @statement lake.record_column
-- A column read for the first time: the type later files must keep.
INSERT INTO source_columns VALUES ($source, $column, $type, $path);

-- ▶ golden: stage source is printed here, as in source.sql

-- The tables the transaction's stages read, moved there from the stage connection:
-- @statement move.lake_counts.out
SELECT * FROM "lake_counts";

-- @statement move.lake_counts.in
CREATE OR REPLACE TEMP TABLE "lake_counts" AS SELECT * FROM moved_rows;

-- @statement move.lake_file_rows.out
SELECT * FROM "lake_file_rows";

-- @statement move.lake_file_rows.in
CREATE OR REPLACE TEMP TABLE "lake_file_rows" AS SELECT * FROM moved_rows;

-- @statement source.count_scan
-- What the reading found, once however many checks share it.
INSERT INTO run_scans SELECT rows_read, invalid_rows, duplicate_rows, rows_excluded FROM lake_counts;

-- @statement source.impossible_times
-- Files holding sessions with an impossible event time (counted as invalid): the run names each.
SELECT path, insane_times FROM lake_file_rows WHERE insane_times > 0 ORDER BY path;

-- ▶ golden: stage scan is printed here, as in scan.sql

-- ▶ golden: stage window is printed here, as in window.sql

-- ▶ golden: stage measure is printed here, as in measure.sql

-- The tables the transaction's stages read, moved there from the stage connection:
-- @statement move.watermarks.out
SELECT * FROM "watermarks";

-- @statement move.watermarks.in
CREATE OR REPLACE TEMP TABLE "watermarks" AS SELECT * FROM moved_rows;

-- @statement move.scan_counts.out
SELECT * FROM "scan_counts";

-- @statement move.scan_counts.in
CREATE OR REPLACE TEMP TABLE "scan_counts" AS SELECT * FROM moved_rows;

-- @statement move.carry_next.out
SELECT * FROM "carry_next";

-- @statement move.carry_next.in
CREATE OR REPLACE TEMP TABLE "carry_next" AS SELECT * FROM moved_rows;

-- @statement move.window_counts.out
SELECT * FROM "window_counts";

-- @statement move.window_counts.in
CREATE OR REPLACE TEMP TABLE "window_counts" AS SELECT * FROM moved_rows;

-- @statement move.new_key_windows.out
SELECT * FROM "new_key_windows";

-- @statement move.new_key_windows.in
CREATE OR REPLACE TEMP TABLE "new_key_windows" AS SELECT * FROM moved_rows;

-- @statement move.new_windows.out
SELECT * FROM "new_windows";

-- @statement move.new_windows.in
CREATE OR REPLACE TEMP TABLE "new_windows" AS SELECT * FROM moved_rows;

-- ▶ golden: stage verdict is printed here, as in verdict.sql

-- ▶ golden: stage impact is printed here, as in impact.sql

-- ▶ golden: stage lifecycle is printed here, as in lifecycle.sql

-- ▶ golden: stage persist is printed here, as in persist.sql

-- ══ the check's record ═══════════════════════════════════════════════════════════════════
-- how many rounds its verdicts took, and what it did

-- @statement check.result
-- How many rounds $check's verdicts took ($rounds), the seconds its own stages took ($seconds: wall
-- clock, from its scan to its persist), and what the check did, for the run's summary.
UPDATE run_checks
SET rounds = $rounds, seconds = $seconds
WHERE run_id = $run_id AND check_name = $check
RETURNING rows_read, windows_written, alerts_opened, alerts_closed;

-- ══ after every check: source alarms ═════════════════════════════════════════════════════
-- open alarms of sources no longer watched close (source sessions has no max_silence or max_lag)
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

-- ══ after every check: causes and incidents ══════════════════════════════════════════════
-- the causes of each alert the run opened or added breaching windows to (for each: causes.alert,
-- causes.windows, then the explain statements, explain.round and explain.mark in turns, and
-- causes.store); then every alert grouped into incidents
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

-- (check 'golden' has no attributes to explain by: its alerts get no causes)

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
-- ══ the run ends ═════════════════════════════════════════════════════════════════════════
-- its record, and the commit

-- @statement end.forget_ids
-- Session ids of $source more than its dedup_horizon ($horizon) behind the data every check of the
-- source ($source_checks) has read, now that this run's checks have moved their watermarks: no
-- session read later can be told from a repeat of them (it would be late), so they go at once
-- rather than at the next run's source stage. The id memory so holds about dedup_horizon of
-- sessions after every run, however many days one run read.
DELETE FROM session_ids
WHERE source_name = $source
  AND event_time < (SELECT min(watermark) FROM check_state WHERE list_contains($source_checks, check_name))
                   - $horizon;

-- @statement end.repeats
-- Valid sessions read, and those that repeated sessions already counted: a run of mostly repeats
-- (the lake copied or sent again) says so.
SELECT coalesce(sum(rows_read - invalid_rows), 0) AS valid_rows, coalesce(sum(duplicate_rows), 0) AS repeats
FROM run_scans;

-- @statement end.record
-- The run record ($status 'ok', or 'failed' with $error): what every reading read (once per
-- reading) and what every check wrote. Times are wall clock, the only place they are used.
INSERT INTO runs BY NAME
SELECT $run_id AS run_id, $started AS started_at, $finished AS finished_at, $status AS status,
       $checks AS checks, $rebuild AS rebuild,
       (SELECT count(DISTINCT (source_name, path)) FROM files_read WHERE run_id = $run_id) AS files_read,
       s.rows_read, s.rows_excluded, s.duplicate_rows, c.late_rows, s.invalid_rows,
       (SELECT count(DISTINCT path) FROM changed_files WHERE run_id = $run_id) AS changed_files,
       c.windows_written, c.alerts_opened,
       c.alerts_closed + (SELECT coalesce(sum(alerts_closed), 0) FROM run_retired) AS alerts_closed,
       $error AS error, c.nonfinite_values, $warning AS warning
FROM (SELECT coalesce(sum(rows_read), 0) AS rows_read, coalesce(sum(rows_excluded), 0) AS rows_excluded,
             coalesce(sum(duplicate_rows), 0) AS duplicate_rows,
             coalesce(sum(invalid_rows), 0) AS invalid_rows
      FROM run_scans) AS s,
     (SELECT coalesce(sum(late_rows), 0) AS late_rows, coalesce(sum(windows_written), 0) AS windows_written,
             coalesce(sum(alerts_opened), 0) AS alerts_opened,
             coalesce(sum(alerts_closed), 0) AS alerts_closed,
             coalesce(sum(nonfinite_values), 0) AS nonfinite_values
      FROM run_checks WHERE run_id = $run_id) AS c;

-- @statement end.files_read
-- Distinct files the run read, for its summary.
SELECT count(DISTINCT (source_name, path)) AS files_read FROM files_read WHERE run_id = $run_id;

-- @statement end.commit
COMMIT;

-- a run that fails rolls back, then writes its 'failed' record alone: begin.transaction,
-- end.record, end.commit

-- @statement end.roll_back
-- A run that failed: everything it did is undone; then its record alone ($status 'failed') is
-- written in a transaction of its own, by begin.transaction, end.record and end.commit.
ROLLBACK;

-- ══ after the run ════════════════════════════════════════════════════════════════════════
-- the tables analysts read, published as Parquet beside the warehouse

-- @statement publish.alerts
COPY (SELECT * FROM "alerts") TO $path (FORMAT parquet);

-- @statement publish.alert_events
COPY (SELECT * FROM "alert_events") TO $path (FORMAT parquet);

-- @statement publish.windows.published
-- What the copy must hold now ($through: the last run whose rows it holds): every row, the rows of
-- runs up to $through still here (fewer than the copy holds: a rebuild or a removed check took some
-- away, and the copy is made whole again), the last run with rows, and the table's layout.
SELECT
    count(*) AS rows_now,
    count(*) FILTER (WHERE NOT coalesce(run_id > $through, false)) AS rows_through,
    max(run_id) AS last_run,
    (SELECT max(version) FROM schema_version) AS layout,
    (SELECT list(column_name || ' ' || data_type ORDER BY column_index)
     FROM duckdb_columns() WHERE database_name = current_database() AND schema_name = 'main' AND table_name = 'windows') AS columns
FROM "windows";

-- @statement publish.windows.whole
-- The whole table, as the copy's one part.
COPY (SELECT * FROM "windows") TO $path (FORMAT parquet);

-- @statement publish.windows.runs
-- The rows of the runs after $after, up to $through: the part a run adds.
COPY (SELECT * FROM "windows" WHERE run_id > $after AND run_id <= $through) TO $path (FORMAT parquet);

-- @statement publish.windows.merge
-- Parts of the same size made one ($parts), so a copy stays a few files however many runs it holds.
COPY (SELECT * FROM read_parquet($parts)) TO $path (FORMAT parquet);

-- @statement publish.runs
COPY (SELECT * FROM "runs") TO $path (FORMAT parquet);

-- @statement publish.alert_causes
COPY (SELECT * FROM "alert_causes") TO $path (FORMAT parquet);

-- @statement publish.incidents
COPY (SELECT * FROM "incidents") TO $path (FORMAT parquet);

-- @statement publish.incident_events
COPY (SELECT * FROM "incident_events") TO $path (FORMAT parquet);
