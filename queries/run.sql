-- A run's own statements, around the stages of its checks: its number, its transaction, checks that
-- are gone or rebuilt, which files are new, the tables moved between its two connections, what each
-- check did, and its record. Each is named (`-- @statement PART.NAME`, PART saying when it runs) and
-- executed by name by toolkit/engine/runner.py; `plimsoll sql CHECK` prints them where a run
-- executes them. Values arrive as parameters: $run_id, $check (a check's name), and others named
-- where they are used.

-- ════ before the run's transaction ════

-- @statement open.stored_definitions
-- The definition hash each check's windows were computed with (not read by a rebuild): a check
-- whose compiled SQL hashes otherwise now is not run until it is rebuilt.
SELECT check_name, definition_hash FROM check_state;

-- @statement open.next_run_id
-- The run's number: one more than the last run's, whether that one succeeded or failed.
SELECT coalesce(max(run_id), 0) + 1 AS run_id FROM runs;

-- ════ the run's transaction begins ════

-- @statement begin.run_tables
-- What each reading of a source found (its rows count once per reading, however many checks share
-- it), and the alerts closed for checks that are gone or rebuilt: the run record adds them up.
CREATE OR REPLACE TEMP TABLE run_scans (
    rows_read BIGINT, invalid_rows BIGINT, duplicate_rows BIGINT, rows_excluded BIGINT
);
CREATE OR REPLACE TEMP TABLE run_retired (check_name VARCHAR, alerts_closed BIGINT);

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

-- ════ between the run's two connections ════
-- The stages that touch every session run on a connection of their own, outside the transaction
-- (not in a rebuild, nor on Spark). What the transaction's stages read of theirs crosses as Arrow:
-- each table is read there, registered on the transaction's connection as moved_rows, and made a
-- temp table of the same name. The impact stage's breaching windows cross the other way, to be
-- read beside the sessions.
{% for stage, tables in moved.items() %}
{% for table in tables %}

-- @statement move.{{ table }}.out
SELECT * FROM {{ table | ident }};

-- @statement move.{{ table }}.in
CREATE OR REPLACE TEMP TABLE {{ table | ident }} AS SELECT * FROM moved_rows;
{% endfor %}
{% endfor %}

-- @statement move.{{ streamed }}.clear
-- A run before this one in the same call that ran the source stage in the transaction (the first
-- run of a rebuild over a backlog) left its {{ streamed }} view on the transaction's connection;
-- the stream takes its name.
DROP VIEW IF EXISTS {{ streamed | ident }};

-- @statement move.{{ streamed }}.stream
-- The kept sessions' id hashes, streamed in batches to the transaction's connection for the source
-- stage's INSERT INTO session_ids, which reads them as {{ streamed }}.
SELECT * FROM {{ streamed | ident }};

-- ════ after each source stage ════

-- @statement source.count_scan
-- What the reading found, once however many checks share it.
INSERT INTO run_scans SELECT rows_read, invalid_rows, duplicate_rows, rows_excluded FROM lake_counts;

-- @statement source.impossible_times
-- Files holding sessions with an impossible event time (counted as invalid): the run names each.
SELECT path, insane_times FROM lake_file_rows WHERE insane_times > 0 ORDER BY path;

-- ════ after each check's stages ════

-- @statement check.result
-- How many rounds $check's verdicts took ($rounds), the seconds its own stages took ($seconds: wall
-- clock, from its scan to its persist), and what the check did, for the run's summary.
UPDATE run_checks
SET rounds = $rounds, seconds = $seconds
WHERE run_id = $run_id AND check_name = $check
RETURNING rows_read, windows_written, alerts_opened, alerts_closed;

-- ════ the run ends ════

-- @statement end.table_version
-- How far $check has now read its Delta or Iceberg source ($source, $format): up to $version
-- ($snapshot_id), in full unless $complete is false.
DELETE FROM table_versions WHERE check_name = $check;

INSERT INTO table_versions VALUES ($check, $source, $format, $version, $snapshot_id, $complete, $run_id);

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

-- @statement end.roll_back
-- A run that failed: everything it did is undone; then its record alone ($status 'failed') is
-- written in a transaction of its own, by begin.transaction, end.record and end.commit.
ROLLBACK;
