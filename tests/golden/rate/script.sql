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
-- retired.
SELECT check_name FROM check_state
UNION
SELECT check_name FROM alerts WHERE status = 'open'
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
-- go, with their events. Alerts of earlier definitions stay as history.
DELETE FROM alert_events
WHERE alert_id IN (SELECT alert_id FROM alerts WHERE check_name = $check AND definition_hash = $definition);

DELETE FROM alerts WHERE check_name = $check AND definition_hash = $definition;

-- @statement begin.drop_state
-- Every derived trace of $check (not its alerts), so it reads the lake again from the start; the
-- session ids of files no check has read any more go too (a re-read records them again).
DELETE FROM windows WHERE check_name = $check;

DELETE FROM key_windows WHERE check_name = $check;

DELETE FROM carry WHERE check_name = $check;

DELETE FROM key_state WHERE check_name = $check;

DELETE FROM check_state WHERE check_name = $check;

DELETE FROM files_read WHERE check_name = $check;

DELETE FROM session_ids AS i
WHERE NOT EXISTS (SELECT 1 FROM files_read AS f WHERE f.source_name = i.source_name AND f.path = i.first_path);

-- which files are new for each check

-- @statement begin.read_histories
-- What each check has read, as one hash of its files' names: checks read a source's new files
-- together only when they have read the same files before.
SELECT check_name, md5(string_agg(path, chr(10) ORDER BY path)) AS history
FROM files_read
GROUP BY check_name;

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
-- How many rounds $check's verdicts took ($rounds), and what the check did, for the run's summary.
UPDATE run_checks
SET rounds = $rounds
WHERE run_id = $run_id AND check_name = $check
RETURNING rows_read, windows_written, alerts_opened, alerts_closed;

-- ══ the run ends ═════════════════════════════════════════════════════════════════════════
-- its record, and the commit

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

-- @statement publish.windows
COPY (SELECT * FROM "windows") TO $path (FORMAT parquet);

-- @statement publish.runs
COPY (SELECT * FROM "runs") TO $path (FORMAT parquet);
