-- Plimsoll check play_time_down: every statement `plimsoll run` executes for it, in order, as shown.
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
       'closed' AS event, NULL::DOUBLE AS value, NULL::DOUBLE AS threshold, affected_sessions
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

-- ── stage 0 · source ───────────────────────────────────────────────────────────────────────
-- Source sessions: the sessions of the files not read before ($files, read from where they are;
-- $paths, their names relative to the source's path), read once for every check that has read the
-- same files before ($reader is the first of them), each session id once per check, in this run and
-- across runs. Rows without a session id or a sane event time are counted and skipped; excluded
-- sessions never count. A session id is kept only as its md5 (a 128-bit number).
-- Each new file: its place in $files, its name, and the latest event time a session in it can
-- sanely have: INTERVAL 1 DAY (max_future) after the file was written.
CREATE OR REPLACE TEMP TABLE run_files AS
SELECT m.i AS file_index, m.f.path AS path, m.f.modified_at + INTERVAL 1 DAY AS latest_sane
FROM (SELECT unnest($manifest) AS f, generate_subscripts($manifest, 1) - 1 AS i) AS m;

-- The reader's data time before this run: sessions more than INTERVAL 3 DAY (dedup_horizon)
-- older than it can no longer be told from repeats, whose ids are forgotten by then. And when a
-- backlog is read in several runs, the earliest event time of the files left for the next runs
-- ($read_until): the watermark stays before it, and count windows wait for the sessions after it.
CREATE OR REPLACE TEMP TABLE read_limits AS
SELECT
    (SELECT watermark FROM check_state WHERE check_name = $reader) - INTERVAL 3 DAY AS remembered_from,
    $read_until::TIMESTAMP AS read_until;

CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    r.__session_id,
    md5_number(r.__session_id) AS __id_hash,
    -- an event time that cannot be right (infinite, or after its file was written + max_future) is
    -- no event time: the row is invalid and never moves the watermark
    CASE WHEN isfinite(r.__event_time) AND r.__event_time <= f.latest_sane THEN r.__event_time END AS __event_time,
    r.__event_time IS NOT NULL AND NOT coalesce(isfinite(r.__event_time) AND r.__event_time <= f.latest_sane, false) AS __insane_time,
    r.* EXCLUDE (__session_id, __event_time)
FROM (
    SELECT
        "session_id"::VARCHAR AS __session_id,
        ("ended_at")::TIMESTAMP AS __event_time,
coalesce("is_bot", false) AS __excluded,
        "cdn",
        "play_ms",
        file_index::INTEGER AS __file
    FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
) AS r
JOIN run_files AS f ON f.file_index = r.__file;

-- Session ids the reader has counted before (from a file it has read): repeats. Checks read a
-- source's files together only when they have read the same files before, so it is every one's.
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT id_hash
FROM session_ids
WHERE source_name = 'sessions'
  AND first_path IN (SELECT path FROM files_read WHERE check_name = $reader)
  AND id_hash IN (SELECT __id_hash FROM lake_rows WHERE __id_hash IS NOT NULL);

-- Valid rows, and those too old to be told from repeats.
CREATE OR REPLACE TEMP VIEW valid_rows AS
SELECT
    *,
    coalesce(__event_time < (SELECT remembered_from FROM read_limits), false) AS __beyond_horizon
FROM lake_rows
WHERE __session_id IS NOT NULL AND __event_time IS NOT NULL;

-- One copy of each new session id: the earliest, then by file, so every run keeps the same one.
CREATE OR REPLACE TEMP TABLE repeated_ids AS
SELECT __id_hash
FROM valid_rows
WHERE NOT __beyond_horizon
GROUP BY __id_hash
HAVING count(*) > 1;

-- A view, not a copy: each check's scan reads it once.
CREATE OR REPLACE TEMP VIEW lake_sessions AS
SELECT __session_id, __id_hash, __event_time, __excluded, "cdn", "play_ms", __file
FROM valid_rows
WHERE NOT __beyond_horizon
  AND __id_hash NOT IN (SELECT __id_hash FROM repeated_ids)
  AND __id_hash NOT IN (SELECT id_hash FROM read_before)
UNION ALL
SELECT __session_id, __id_hash, __event_time, __excluded, "cdn", "play_ms", __file
FROM valid_rows
WHERE NOT __beyond_horizon
  AND __id_hash IN (SELECT __id_hash FROM repeated_ids)
  AND __id_hash NOT IN (SELECT id_hash FROM read_before)
QUALIFY row_number() OVER (PARTITION BY __id_hash ORDER BY __event_time, __file) = 1;

CREATE OR REPLACE TEMP TABLE lake_counts AS
WITH kept AS (
    SELECT count(*) AS sessions, count(*) FILTER (WHERE __excluded) AS excluded FROM lake_sessions
),
valid AS (
    SELECT count(*) AS rows_valid, count(*) FILTER (WHERE __beyond_horizon) AS beyond_horizon FROM valid_rows
)
SELECT
    count(*) AS rows_read,
    count(*) FILTER (WHERE __session_id IS NULL OR __event_time IS NULL) AS invalid_rows,
    any_value(valid.rows_valid) - any_value(valid.beyond_horizon) - any_value(kept.sessions) AS duplicate_rows,
    any_value(valid.beyond_horizon) AS beyond_horizon,
    any_value(kept.excluded) AS rows_excluded,
    -- the watermark's candidate: every possible event time read (an impossible one is NULL by now)
    max(__event_time) AS latest
FROM lake_rows, kept, valid;

-- What each file held: its rows, and those without a session id or a sane event time.
CREATE OR REPLACE TEMP TABLE lake_file_rows AS
SELECT
    f.path,
    count(r.__file) AS rows,
    count(r.__file) FILTER (WHERE r.__session_id IS NULL OR r.__event_time IS NULL) AS invalid_rows,
    count(r.__file) FILTER (WHERE r.__insane_time) AS insane_times
FROM run_files AS f
LEFT JOIN lake_rows AS r ON r.__file = f.file_index
GROUP BY f.path;

-- The kept sessions' id hashes as two 64-bit halves, which is how they reach the warehouse's
-- connection when the stages run on a connection of their own (Arrow has no 128-bit integer).
CREATE OR REPLACE TEMP VIEW kept_ids AS
SELECT (__id_hash >> 64)::UBIGINT AS hash_high, (__id_hash & 18446744073709551615)::UBIGINT AS hash_low,
       __file, __event_time
FROM lake_sessions;

-- The statements above ran on the stage connection. The INSERT below runs in the run's transaction,
-- on the warehouse's own connection, reading kept_ids from the stage connection as a stream of
-- batches:
-- @statement move.kept_ids.clear
-- A run before this one in the same call that ran the source stage in the transaction (the first
-- run of a rebuild over a backlog) left its kept_ids view on the transaction's connection;
-- the stream takes its name.
DROP VIEW IF EXISTS "kept_ids";

-- @statement move.kept_ids.stream
-- The kept sessions' id hashes, streamed in batches to the transaction's connection for the source
-- stage's INSERT INTO session_ids, which reads them as kept_ids.
SELECT * FROM "kept_ids";

-- Remember each kept id with the file it was kept from (hashes only); only pairs not yet known.
INSERT INTO session_ids BY NAME
SELECT 'sessions' AS source_name, k.id_hash, k.first_path, k.event_time
FROM (SELECT (hash_high::UHUGEINT << 64) | hash_low AS id_hash, $paths[__file + 1] AS first_path, __event_time AS event_time FROM kept_ids) AS k
ANTI JOIN (
    SELECT id_hash, first_path
    FROM session_ids
    WHERE source_name = 'sessions' AND list_contains($paths, first_path)
) AS known
    ON known.id_hash = k.id_hash AND known.first_path = k.first_path;

-- Forget ids more than dedup_horizon behind the data every check of the source has read.
DELETE FROM session_ids
WHERE source_name = 'sessions'
  AND event_time < (SELECT min(watermark) FROM check_state WHERE list_contains($source_checks, check_name))
                   - INTERVAL 3 DAY;

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

-- ── stage 1 · scan ─────────────────────────────────────────────────────────────────────────
-- The check's sessions: not excluded; its key and measure inputs.
-- A measure input that is NaN or ±infinity is missing (NULL), and counted: it would compare
-- beyond every threshold.
-- A view: the window stage reads it once.
CREATE OR REPLACE TEMP VIEW arrivals AS
SELECT
    session_id,
    event_time,
    key,
    CASE WHEN finite THEN numerator END AS numerator,
    CASE WHEN finite THEN denominator END AS denominator,
    NOT finite AS nonfinite
FROM (
    SELECT
        *,
        coalesce(isfinite(numerator) AND isfinite(denominator), true) AS finite
    FROM (
        SELECT
            __session_id AS session_id,
            __event_time AS event_time,
            {'cdn': "cdn"::VARCHAR} AS key,
            ("play_ms")::DOUBLE AS numerator,
            (1)::DOUBLE AS denominator
        FROM lake_sessions
        WHERE NOT __excluded
    )
);

-- The check's watermarks: `previous`, where its last run left it, and `current`, the largest sane
-- event time read by this check so far, this run's files included; when a backlog is read in
-- several runs, no later than the earliest session still unread (read_until), so nothing still to
-- come lands in a window already closed.
CREATE OR REPLACE TEMP TABLE watermarks AS
SELECT
    prior.watermark AS previous,
    greatest(prior.watermark, least(c.latest, coalesce((SELECT read_until FROM read_limits), c.latest))) AS current
FROM (SELECT (SELECT watermark FROM check_state WHERE check_name = 'play_time_down') AS watermark) AS prior,
     lake_counts AS c;

CREATE OR REPLACE TEMP TABLE scan_counts AS
SELECT
    c.rows_read, c.invalid_rows, c.duplicate_rows, c.rows_excluded, c.beyond_horizon,
    c.rows_read - c.invalid_rows - c.duplicate_rows - c.beyond_horizon - c.rows_excluded - a.rows_kept AS rows_filtered,
    a.rows_kept,
    a.nonfinite_values
FROM lake_counts AS c, (SELECT count(*) AS rows_kept, count(*) FILTER (WHERE nonfinite) AS nonfinite_values FROM arrivals) AS a;

-- ── stage 2 · window ───────────────────────────────────────────────────────────────────────
-- Count windows: each 40 sessions of a series in (event_time, session_id) order; a
-- window that is not full INTERVAL 12 HOUR after its first session closes as it is once the
-- watermark has passed that moment. Partial windows are carried to the next run.
CREATE OR REPLACE TEMP TABLE series_last AS
SELECT {'cdn': key['cdn']} AS key, last_window_number, last_end
FROM key_state
WHERE check_name = 'play_time_down';

-- How count windows are found, all series at once. Number each series' sessions 0, 1, 2 … in
-- (event_time, session_id) order: its position. Windows are laid greedily from position 0: a
-- window of 40 sessions can start at position p when the 40th from there ended within
-- INTERVAL 12 HOUR of the first. A position where that fails is a cut. A window starting at a cut either
-- times out, once the watermark has passed its first session's time + INTERVAL 12 HOUR (it closes with
-- the sessions up to that moment, and the next window starts behind them), or stays open: it and
-- every session after it are carried to the next run.
--   So from where a span of full windows starts (position 0, or just behind a cut that timed out),
-- windows follow every 40 positions up to the first cut on that stride; only that cut matters.
-- A series walks from span to span, one step per cut that timed out.
CREATE OR REPLACE TEMP TABLE pooled AS
SELECT
    p.*,
    row_number() OVER in_order - 1 AS position,
    -- a window starting here cannot fill: fewer than 40 sessions left, or the 40th is too
    -- late, or it is held: a backlog read in several runs holds the sessions at or after read_until
    -- until the earlier ones still unread have been read, so windows fill as one run fills them
    coalesce(lead(p.event_time, 39) OVER in_order > p.event_time + INTERVAL 12 HOUR
             OR lead(p.held, 39) OVER in_order, true) AS is_cut
FROM (
    SELECT *, coalesce(event_time >= (SELECT read_until FROM read_limits), false) AS held
    FROM (
        SELECT {'cdn': key['cdn']} AS key, event_time, session_id, numerator, denominator, false AS late
        FROM carry
        WHERE check_name = 'play_time_down'
        UNION ALL
        -- late: earlier than the end of a window already closed for the series; it joins the open window
        SELECT a.key, a.event_time, a.session_id, a.numerator, a.denominator,                coalesce(a.event_time < s.last_end, false) AS late
        FROM arrivals AS a
        LEFT JOIN series_last AS s ON s.key = a.key
    )
) AS p
WINDOW in_order AS (PARTITION BY p.key ORDER BY p.event_time, p.session_id);

-- Every cut, whether it times out, and for one that does the position of the last session within
-- INTERVAL 12 HOUR of it (cut_end: a count over the event times, looked at only in the series that
-- have a cut that times out).
CREATE OR REPLACE TEMP TABLE cuts AS
WITH timing_out AS (
    SELECT DISTINCT key
    FROM pooled
    WHERE is_cut AND event_time + INTERVAL 12 HOUR < (SELECT current FROM watermarks)
)
SELECT key, position AS cut_start, times_out, CASE WHEN times_out THEN reach - 1 END AS cut_end
FROM (
    SELECT key, position, is_cut,
           event_time + INTERVAL 12 HOUR < (SELECT current FROM watermarks) AS times_out,
           count(*) OVER (PARTITION BY key ORDER BY epoch_us(event_time)
                          RANGE BETWEEN UNBOUNDED PRECEDING AND 43200000000 FOLLOWING) AS reach
    FROM pooled
    WHERE key IN (SELECT key FROM timing_out)
)
WHERE is_cut
UNION ALL
SELECT key, position, false, NULL
FROM pooled
WHERE is_cut AND key NOT IN (SELECT key FROM timing_out);

-- Where a span of full windows can start (position 0, and just behind each cut that times out),
-- and the first cut on its stride: at or after the start, a whole number of windows on. For every
-- start at once: the smallest cut not before it among the positions equal to it modulo 40.
CREATE OR REPLACE TEMP TABLE span_ends AS
WITH span_starts AS (
    SELECT key, 0::BIGINT AS span_start FROM pooled WHERE position = 0
    UNION
    SELECT key, cut_end + 1 FROM cuts WHERE times_out
),
marks AS (
    SELECT key, span_start AS mark, false AS is_cut FROM span_starts
    UNION ALL
    SELECT key, cut_start AS mark, true AS is_cut FROM cuts
),
found AS (
    SELECT key, mark AS span_start, is_cut,
           min(CASE WHEN is_cut THEN mark END) OVER (
               PARTITION BY key, mark % 40 ORDER BY mark DESC, is_cut DESC
               ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS cut_start
    FROM marks
)
SELECT f.key, f.span_start, f.cut_start, c.cut_end, coalesce(c.times_out, false) AS cut_closes
FROM found AS f
LEFT JOIN cuts AS c ON c.key = f.key AND c.cut_start = f.cut_start
WHERE NOT f.is_cut;

-- The walk: each series' spans from position 0, on behind every cut that times out (one step per
-- such cut, all series at once). A span whose cut stays open, or that has no cut (cut_start NULL:
-- full windows to the end), is its series' last.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
WITH RECURSIVE walk AS (
    SELECT key, span_start, cut_start, cut_end, cut_closes FROM span_ends WHERE span_start = 0
    UNION ALL
    SELECT n.key, n.span_start, n.cut_start, n.cut_end, n.cut_closes
    FROM walk AS w
    JOIN span_ends AS n ON n.key = w.key AND n.span_start = w.cut_end + 1
    WHERE w.cut_closes
)
SELECT key, span_start, cut_start, cut_end, cut_closes FROM walk;

-- Each pooled session's window, named by the position of its first session (window_first; NULL:
-- still open); a view: a run holds every table it makes until it commits, and this one would be
-- another copy.
CREATE OR REPLACE TEMP VIEW placed AS
WITH spans AS (
    SELECT *, coalesce(lead(span_start) OVER (PARTITION BY key ORDER BY span_start), 9223372036854775807) AS next_span_start
    FROM full_window_spans
)
SELECT
    p.*,
    CASE
        WHEN r.cut_start IS NULL OR p.position < r.cut_start
            THEN r.span_start + (p.position - r.span_start) // 40 * 40
        WHEN r.cut_closes AND p.position <= r.cut_end THEN r.cut_start
    END AS window_first
FROM pooled AS p
JOIN spans AS r ON p.key = r.key AND p.position >= r.span_start AND p.position < r.next_span_start;

-- window_number: count windows are numbered 1, 2, 3 … in each series, on from its last window.
CREATE OR REPLACE TEMP TABLE closed_windows AS
SELECT
    w.key, w.window_first, w.window_start, w.window_end,
    coalesce(s.last_window_number, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.window_first) AS window_number
FROM (
    SELECT key, window_first, min(event_time) AS window_start, max(event_time) AS window_end
    FROM placed
    WHERE window_first IS NOT NULL
    GROUP BY key, window_first
) AS w
LEFT JOIN series_last AS s ON s.key = w.key;

-- A view: the measure stage reads it once.
CREATE OR REPLACE TEMP VIEW window_sessions AS
SELECT p.* EXCLUDE (position, is_cut, held, window_first), w.window_number, w.window_start, w.window_end
FROM placed AS p
JOIN closed_windows AS w ON w.key = p.key AND w.window_first = p.window_first;

CREATE OR REPLACE TEMP TABLE carry_next AS
SELECT MAP {'cdn': struct_extract(key, 'cdn')} AS key, 'cdn=' || CASE WHEN struct_extract(key, 'cdn') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'cdn'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'cdn') ELSE '"' || replace(replace(struct_extract(key, 'cdn'), '\', '\\'), '"', '\"') || '"' END AS key_text, event_time, session_id, numerator, denominator
FROM placed
WHERE window_first IS NULL;

CREATE OR REPLACE TEMP TABLE window_counts AS
SELECT count(*) FILTER (WHERE late) AS late_rows FROM pooled;

-- ── stage 3 · measure ──────────────────────────────────────────────────────────────────────
-- ratio of sums = Σ ("play_ms") ÷ Σ (1); NULL when the denominator is 0.
CREATE OR REPLACE TEMP TABLE key_window_stats AS
SELECT
    MAP {'cdn': struct_extract(key, 'cdn')} AS key,
    'cdn=' || CASE WHEN struct_extract(key, 'cdn') IS NULL THEN '<null>' WHEN regexp_matches(struct_extract(key, 'cdn'), '^[\p{L}\p{N}_.:/@+-]+$') THEN struct_extract(key, 'cdn') ELSE '"' || replace(replace(struct_extract(key, 'cdn'), '\', '\\'), '"', '\"') || '"' END AS key_text,
    window_number,
    min(window_start) AS window_start,
    max(window_end) AS window_end,
    count(*) AS sessions,
    NULL::BIGINT AS bad,
    sum(numerator) / nullif(sum(denominator), 0) AS value
FROM window_sessions
GROUP BY key, window_number;

-- key_window: the ordinal of the window among all of its key's windows, across runs
CREATE OR REPLACE TEMP TABLE new_key_windows AS
SELECT
    w.*,
    coalesce(s.windows, 0) + row_number() OVER (PARTITION BY w.key ORDER BY w.window_number) AS key_window
FROM key_window_stats AS w
LEFT JOIN key_state AS s ON s.check_name = 'play_time_down' AND s.key = w.key;

CREATE OR REPLACE TEMP TABLE new_windows AS
SELECT key, key_text, NULL::VARCHAR AS split_value, window_number, key_window, window_start, window_end, sessions, bad, value
FROM new_key_windows;

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

-- ── stage 4 · verdict ──────────────────────────────────────────────────────────────────────
-- Each new window's baseline, threshold and verdict.
--
-- Baseline and threshold:
-- rolling_percentile: baseline = quantile_cont(value, 0.2) over the series' last 10 earlier
-- windows that did not breach; a window gets a threshold once it has 3 of them:
--   threshold = least(20000000.0, 0.9 × baseline)
--
-- Verdict: a window breaches when it has a threshold, its value is below it, and it passes the guard
-- (at least 1 sessions); every other window with a threshold and a value is
-- healthy. A window without a value (a zero denominator, no session with a value) gives no verdict.
--
-- A window's history is the earlier windows of its series that did not breach, so verdicts depend on
-- the verdicts before them: the statements between '@loop' and '@end' are one round, repeated until
-- no breach flag changes. A round recomputes only the series still changing, all of them at once.

-- history: the series' earlier windows in the warehouse that did not breach (and, for a split value
-- seen late, its key's quiet windows before it), the last 10 of each series.
CREATE OR REPLACE TEMP TABLE history AS
WITH earlier AS (
    SELECT w.key, w.split_value, w.window_number, w.key_window, w.value, w.sessions, w.bad, w.breach
    FROM windows AS w
    SEMI JOIN (SELECT DISTINCT key, split_value FROM new_windows) AS n
        ON w.key = n.key AND w.split_value IS NOT DISTINCT FROM n.split_value
    WHERE w.check_name = 'play_time_down'
)
SELECT key, split_value, window_number, value, sessions, bad
FROM (
    SELECT key, split_value, window_number, value, sessions, bad FROM earlier WHERE NOT breach AND value IS NOT NULL
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY window_number DESC) <= 10;

-- judged: the new windows with their verdicts so far; `changed` marks those whose breach flag
-- changed in the last round (at first, all of them).
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    *,
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
FROM new_windows;

-- @statement round_limit
-- The most rounds the loop may take. The first window of a series whose verdict is not final has
-- only final windows before it, so each round settles at least one more window of every series:
-- a series of n new windows settles within n rounds, and one more round finds nothing changing.
-- Beyond that the verdicts cannot settle, and the run stops with an error rather than loop on.
SELECT coalesce(max(windows), 0) + 1 AS round_limit
FROM (SELECT count(*) AS windows FROM judged GROUP BY key, split_value);

-- @loop until still_changing = 0, at most round_limit rounds
-- baselines: each window's baseline, from the eligible windows before it as the breach flags stand
-- now (only the series with a window that changed in the last round).
CREATE OR REPLACE TEMP TABLE baselines AS
WITH moving AS (
    SELECT DISTINCT key, split_value FROM judged WHERE changed
),
series_rows AS (
    SELECT h.key, h.split_value, h.window_number, h.value, h.sessions, h.bad, false AS is_new, true AS eligible
    FROM history AS h
    SEMI JOIN moving AS s ON h.key = s.key AND h.split_value IS NOT DISTINCT FROM s.split_value
    UNION ALL
    SELECT j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad, true, NOT j.breach AND j.value IS NOT NULL
    FROM judged AS j
    SEMI JOIN moving AS s ON j.key = s.key AND j.split_value IS NOT DISTINCT FROM s.split_value
),
numbered AS (
    -- hb: how many eligible windows come before this one; history is the eligible rows with hb in
    -- [hb - history, hb - 1], whatever breached windows lie between them
    SELECT *,
        coalesce(count(*) FILTER (WHERE eligible) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS hb
    FROM series_rows
),
framed AS (
    SELECT
        key, split_value, window_number, is_new,
        quantile_cont(value, 0.2) FILTER (WHERE eligible) OVER earlier AS baseline,
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows
    FROM numbered
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN 10 PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, window_number, baseline, history_windows
FROM framed
WHERE is_new;

-- round_verdicts: each recomputed window's threshold and whether it breaches.
CREATE OR REPLACE TEMP TABLE round_verdicts AS
SELECT
    *,
    coalesce(
        threshold IS NOT NULL
        AND value IS NOT NULL
        AND value < threshold
        AND sessions >= 1
    , false) AS breach
FROM (
    SELECT
        j.key, j.split_value, j.window_number, j.value, j.sessions, j.bad, base.baseline, base.history_windows,
        CASE WHEN base.history_windows >= 3 THEN
            least(20000000.0, 0.9 * base.baseline)
        END AS threshold
    FROM judged AS j
    JOIN baselines AS base ON j.key = base.key AND j.split_value IS NOT DISTINCT FROM base.split_value AND j.window_number = base.window_number
);

-- What the round changed: only the windows whose breach flag differs from the last round's.
UPDATE judged SET changed = false WHERE changed;

UPDATE judged
SET
    baseline = r.baseline,
    history_windows = r.history_windows,
    threshold = r.threshold,
    changed = judged.breach IS DISTINCT FROM r.breach,
    breach = r.breach
FROM round_verdicts AS r
WHERE judged.key = r.key AND judged.split_value IS NOT DISTINCT FROM r.split_value AND judged.window_number = r.window_number;

-- @statement still_changing
-- The end of a round: how many breach flags it changed. The loop stops at 0.
SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
-- @end

-- ── stage 5 · lifecycle ─────────────────────────────────────────────────────────────────────
-- A breach opens an alert for its series unless one is open; more breaches update it. An open alert
-- closes as 'recovered' after 2 healthy windows in a row, or as 'expired' once the series
-- has had no window for INTERVAL 7 DAY (between two windows, or before the watermark).
-- All in data time, one pass over every series' new windows in order.
CREATE OR REPLACE TEMP TABLE open_alerts AS
SELECT *
FROM alerts
WHERE check_name = 'play_time_down' AND status = 'open' AND definition_hash = $definition;

CREATE OR REPLACE TEMP TABLE steps AS
WITH relevant AS (
    SELECT DISTINCT key, split_value FROM judged WHERE breach
    UNION
    SELECT key, split_value FROM open_alerts
),
ordered AS (
    SELECT
        j.key, j.key_text, j.split_value, j.window_number, j.window_start, j.window_end, j.value, j.threshold,
        j.bad, j.sessions, j.breach,
        -- no verdict without a value (a zero denominator, an empty window): neither healthy nor a breach
        j.threshold IS NOT NULL AND j.value IS NOT NULL AND NOT j.breach AS healthy,
        coalesce(lag(j.window_end) OVER (PARTITION BY j.key, j.split_value ORDER BY j.window_number), l.last_end) AS prev_end,
        o.alert_id IS NOT NULL AS carried,
        coalesce(o.healthy_streak, 0) AS streak0
    FROM judged AS j
    SEMI JOIN relevant AS r ON j.key = r.key AND j.split_value IS NOT DISTINCT FROM r.split_value
    LEFT JOIN key_state AS l ON l.check_name = 'play_time_down' AND l.key = j.key
    LEFT JOIN open_alerts AS o ON j.key = o.key AND j.split_value IS NOT DISTINCT FROM o.split_value
),
stretched AS (
    -- stretch n: the windows after the n-th breach of this run, up to and including the next breach
    SELECT
        *,
        coalesce(prev_end + INTERVAL 7 DAY < window_end, false) AS gap,
        coalesce(count(*) FILTER (WHERE breach) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS stretch
    FROM ordered
),
counted AS (
    SELECT
        *,
        coalesce(count(*) FILTER (WHERE healthy) OVER within, 0)
            + CASE WHEN stretch = 0 THEN streak0 ELSE 0 END AS healthy_before,
        coalesce(bool_or(gap) OVER within, false) AS gap_before,
        stretch > 0 OR carried AS breached_before
    FROM stretched
    WINDOW within AS (
        PARTITION BY key, split_value, stretch ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
    )
),
flagged AS (
    -- is_open: an alert of the series is open when this window comes (before it counts)
    SELECT *, breached_before AND NOT gap_before AND healthy_before < 2 AS is_open
    FROM counted
)
SELECT
    *,
    is_open AND gap AS expires_here,
    is_open AND NOT gap AND healthy AND healthy_before + 1 >= 2 AS recovers_here,
    breach AND NOT (is_open AND NOT gap) AS opens_here,
    breach AND is_open AND NOT gap AS continues_here
FROM flagged;

CREATE OR REPLACE TEMP TABLE episode_steps AS
SELECT
    *,
    -- episode 0 is the alert already open before this run
    sum(opens_here::INTEGER) OVER (PARTITION BY key, split_value ORDER BY window_number ROWS UNBOUNDED PRECEDING) AS episode,
    coalesce(sum(opens_here::INTEGER) OVER (
        PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
    ), 0) AS episode_before
FROM steps;

CREATE OR REPLACE TEMP TABLE episodes AS
WITH breaches AS (
    SELECT
        key, any_value(key_text) AS key_text, split_value, episode,
        min(window_end) FILTER (WHERE opens_here) AS opened_at,
        min(window_start) FILTER (WHERE opens_here) AS breach_started_at,
        min(window_number) FILTER (WHERE opens_here) AS opened_window,
        arg_min(threshold, window_number) FILTER (WHERE opens_here) AS open_threshold,
        count(*) AS breach_windows,
        sum(coalesce(bad, sessions)) AS affected_sessions,
        min(value) AS peak_value,
        max(window_end) AS last_breach_at,
        max(window_number) AS last_breach_window
    FROM episode_steps
    WHERE breach
    GROUP BY key, split_value, episode
),
closes AS (
    SELECT
        key, split_value, episode_before AS episode,
        CASE WHEN expires_here THEN prev_end + INTERVAL 7 DAY ELSE window_end END AS closed_at,
        CASE WHEN expires_here THEN 'expired' ELSE 'recovered' END AS close_reason,
        CASE WHEN expires_here THEN NULL ELSE value END AS close_value,
        threshold AS close_threshold
    FROM episode_steps
    WHERE expires_here OR recovers_here
),
all_episodes AS (
    SELECT key, split_value, episode FROM breaches
    UNION
    SELECT key, split_value, 0 FROM open_alerts
),
series_end AS (
    SELECT s.key, s.split_value, coalesce(max(j.window_end), max(l.last_end)) AS last_window_end
    FROM all_episodes AS s
    LEFT JOIN judged AS j ON j.key = s.key AND j.split_value IS NOT DISTINCT FROM s.split_value
    LEFT JOIN key_state AS l ON l.check_name = 'play_time_down' AND l.key = s.key
    GROUP BY s.key, s.split_value
),
healthy_tail AS (
    -- healthy windows after the last breach of a series: the streak an open alert carries on
    SELECT e.key, e.split_value, count(*) FILTER (WHERE e.healthy AND e.window_number > coalesce(b.last_window, -1)) AS n
    FROM episode_steps AS e
    LEFT JOIN (SELECT key, split_value, max(last_breach_window) AS last_window FROM breaches GROUP BY ALL) AS b
        ON e.key = b.key AND e.split_value IS NOT DISTINCT FROM b.split_value
    GROUP BY e.key, e.split_value
),
merged AS (
    SELECT
        a.key, a.split_value, a.episode,
        coalesce(o.alert_id, NULL) AS prior_alert_id,
        coalesce(b.key_text, o.key_text) AS key_text,
        coalesce(o.opened_at, b.opened_at) AS opened_at,
        coalesce(o.breach_started_at, b.breach_started_at) AS breach_started_at,
        b.opened_window,
        coalesce(o.threshold, b.open_threshold) AS threshold,
        coalesce(o.breach_windows, 0) + coalesce(b.breach_windows, 0) AS breach_windows,
        coalesce(o.affected_sessions, 0) + coalesce(b.affected_sessions, 0) AS affected_sessions,
        least(o.peak_value, b.peak_value) AS peak_value,
        coalesce(b.last_breach_at, o.last_breach_at) AS last_breach_at,
        o.first_run_id,
        c.closed_at, c.close_reason, c.close_value, c.close_threshold,
        CASE
            WHEN b.episode IS NULL THEN o.healthy_streak + coalesce(t.n, 0)
            ELSE coalesce(t.n, 0)
        END AS healthy_streak,
        e.last_window_end,
        b.episode IS NOT NULL OR c.episode IS NOT NULL OR t.n > 0 AS touched
    FROM all_episodes AS a
    LEFT JOIN breaches AS b ON a.key = b.key AND a.split_value IS NOT DISTINCT FROM b.split_value AND a.episode = b.episode
    LEFT JOIN open_alerts AS o ON a.key = o.key AND a.split_value IS NOT DISTINCT FROM o.split_value AND a.episode = 0
    LEFT JOIN closes AS c ON a.key = c.key AND a.split_value IS NOT DISTINCT FROM c.split_value AND a.episode = c.episode
    LEFT JOIN healthy_tail AS t ON a.key = t.key AND a.split_value IS NOT DISTINCT FROM t.split_value
    LEFT JOIN series_end AS e ON a.key = e.key AND a.split_value IS NOT DISTINCT FROM e.split_value
)
SELECT
    *,
    -- silent_too_long: an alert still open whose series has had no window for expire_after at the
    -- watermark expires
    closed_at IS NULL
        AND last_window_end + INTERVAL 7 DAY < (SELECT current FROM watermarks) AS silent_too_long
FROM merged;

CREATE OR REPLACE TEMP TABLE alert_rows AS
SELECT
    coalesce(prior_alert_id, substr(md5(to_json({
        'check': 'play_time_down', 'key': key, 'split': split_value, 'opened_at': opened_at, 'window_number': opened_window,
        'definition': $definition
    })::VARCHAR), 1, 16)) AS alert_id,
    'play_time_down' AS check_name,
    'medium' AS severity,
    key,
    key_text,
    split_value,
    CASE WHEN closed_at IS NOT NULL OR silent_too_long THEN 'closed' ELSE 'open' END AS status,
    CASE WHEN closed_at IS NOT NULL THEN close_reason WHEN silent_too_long THEN 'expired' END AS close_reason,
    opened_at,
    breach_started_at,
    last_breach_at,
    CASE
        WHEN closed_at IS NOT NULL THEN closed_at
        WHEN silent_too_long THEN last_window_end + INTERVAL 7 DAY
    END AS closed_at,
    breach_windows,
    affected_sessions,
    -- sessions hit per hour of data time, over the breaching windows' span (at least one minute)
    affected_sessions / greatest(epoch(last_breach_at - breach_started_at) / 3600.0, 1 / 60.0) AS affected_per_hour,
    peak_value,
    threshold,
    substr(md5(to_json({'check': 'play_time_down', 'key': key, 'split': split_value})::VARCHAR), 1, 16) AS fingerprint,
    coalesce(first_run_id, $run_id) AS first_run_id,
    $run_id AS last_run_id,
    CASE WHEN closed_at IS NULL AND NOT silent_too_long THEN healthy_streak END AS healthy_streak,
    $definition AS definition_hash,
    episode,
    touched OR silent_too_long AS touched,
    close_value,
    close_threshold
FROM episodes;

CREATE OR REPLACE TEMP TABLE event_rows AS
WITH breach_events AS (
    SELECT
        s.key, s.split_value, s.episode, s.window_end AS occurred_at,
        CASE WHEN s.opens_here THEN 'opened' ELSE 'updated' END AS event,
        s.value, s.threshold,
        coalesce(o.affected_sessions, 0) + sum(coalesce(s.bad, s.sessions)) OVER (
            PARTITION BY s.key, s.split_value, s.episode ORDER BY s.window_number ROWS UNBOUNDED PRECEDING
        ) AS affected_sessions,
        s.window_number
    FROM episode_steps AS s
    LEFT JOIN open_alerts AS o ON s.key = o.key AND s.split_value IS NOT DISTINCT FROM o.split_value AND s.episode = 0
    WHERE s.breach
)
SELECT a.alert_id, $run_id AS run_id, e.occurred_at, e.event, e.value, e.threshold, e.affected_sessions
FROM breach_events AS e
JOIN alert_rows AS a ON e.key = a.key AND e.split_value IS NOT DISTINCT FROM a.split_value AND e.episode = a.episode
UNION ALL
SELECT alert_id, $run_id, closed_at, 'closed', close_value, close_threshold, affected_sessions
FROM alert_rows
WHERE status = 'closed';

-- ── stage 6 · persist ───────────────────────────────────────────────────────────────────────
-- Everything below commits in the run's one transaction, with the files read and the run record.
INSERT INTO windows BY NAME
SELECT
    'play_time_down' AS check_name, key, key_text, split_value, window_number, key_window, window_start, window_end,
    sessions, bad, value, baseline, history_windows, threshold, breach,
    $run_id AS run_id
FROM judged;

INSERT INTO key_windows BY NAME
SELECT 'play_time_down' AS check_name, key, key_text, key_window, window_number, window_start, window_end, sessions, bad,
       $run_id AS run_id
FROM new_key_windows;

DELETE FROM key_state
WHERE check_name = 'play_time_down' AND key IN (SELECT key FROM new_key_windows);

INSERT INTO key_state BY NAME
SELECT 'play_time_down' AS check_name, key, max(window_number) AS last_window_number, max(window_end) AS last_end,
       max(key_window) AS windows
FROM new_key_windows
GROUP BY key;

DELETE FROM carry WHERE check_name = 'play_time_down';

INSERT INTO carry BY NAME
SELECT 'play_time_down' AS check_name, * FROM carry_next;

DELETE FROM alerts
WHERE alert_id IN (SELECT alert_id FROM alert_rows WHERE touched);

INSERT INTO alerts BY NAME
SELECT * EXCLUDE (episode, touched, close_value, close_threshold)
FROM alert_rows
WHERE touched;

INSERT INTO alert_events BY NAME
SELECT * FROM event_rows;

DELETE FROM check_state WHERE check_name = 'play_time_down';

INSERT INTO check_state BY NAME
SELECT 'play_time_down' AS check_name, current AS watermark, $definition AS definition_hash, $run_id AS last_run_id
FROM watermarks;

INSERT INTO files_read BY NAME
SELECT 'play_time_down' AS check_name, 'sessions' AS source_name, f.path, f.size,
       f.modified_at, $run_id AS run_id, coalesce(n.rows, 0) AS rows, coalesce(n.invalid_rows, 0) AS invalid_rows
FROM (SELECT unnest($manifest, recursive := true)) AS f
LEFT JOIN lake_file_rows AS n ON n.path = f.path;

INSERT INTO run_checks BY NAME
SELECT
    $run_id AS run_id, 'play_time_down' AS check_name,
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
