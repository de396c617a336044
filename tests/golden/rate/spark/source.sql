-- ── stage 0 · source, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated: read_parquet($files) is the view Spark reads the same files
-- into, and each row's file is found by the location Spark reports, decoded from its URL form
-- (file:/…%20…). The new files and the run's limits are made in the warehouse and sent to Spark.
-- Repeats across runs are found in the warehouse: the new files' id hashes go there, the ones
-- read before come back, and the hashes of the sessions kept are recorded there.
-- On Spark a session id's md5 stays hex; the warehouse keeps it as a number, so hashes change
-- form on the DuckDB side.

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE run_files AS
SELECT m.i AS file_index, m.f.path AS path, $files[m.i + 1] AS location,
       m.f.modified_at + INTERVAL 1 DAY AS latest_sane
FROM (SELECT unnest($manifest) AS f, generate_subscripts($manifest, 1) - 1 AS i) AS m;

-- [DuckDB rows -> Spark view run_files]
SELECT * FROM run_files WHERE true;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE read_limits AS
SELECT
    (SELECT watermark FROM check_state WHERE check_name = $reader) - INTERVAL 3 DAY AS remembered_from,
    $read_until::TIMESTAMP AS read_until;

-- [DuckDB rows -> Spark view read_limits]
SELECT * FROM read_limits WHERE true;

-- [on Spark: the new files ($files) as view lake_files: Parquet, hive partitions, columns merged by name]

-- [on Spark]
/* An event time that cannot be right (after its file was written + max_future; an infinite one is */
/* far beyond that on Spark) is no event time: the row is invalid and never moves the watermark. */
CREATE OR REPLACE TEMPORARY VIEW lake_rows AS
SELECT
  r.__session_id,
  MD5(r.__session_id) AS __id_hash,
  CASE WHEN r.__event_time <= f.latest_sane THEN r.__event_time END AS __event_time,
  NOT r.__event_time IS NULL
  AND NOT COALESCE(r.__event_time <= f.latest_sane, FALSE) AS __insane_time,
  r.__excluded,
  r.`site`,
  r.`error_code`,
  f.file_index AS __file,
  r.__location
FROM (
  SELECT
    CAST(`session_id` AS STRING) AS __session_id,
    CAST((
      `ended_at`
    ) AS TIMESTAMP_NTZ) AS __event_time,
    COALESCE(`is_bot`, FALSE) AS __excluded,
    `site`,
    `error_code`,
    URL_DECODE(REPLACE(REGEXP_REPLACE(__spark_file, '^file:', ''), '+', '%2B')) AS __location
  FROM lake_files
) AS r
LEFT JOIN run_files AS f
  ON f.location = r.__location;

-- [Spark rows -> DuckDB relation spark_unlisted]
SELECT DISTINCT
  __location
FROM lake_rows
WHERE
  __file IS NULL;

-- [on DuckDB (the warehouse)]
-- Every file Spark read is one this run listed, under the same location, or its rows would go uncounted.
SELECT error('Spark read a file the run did not list: ' || __location)
FROM spark_unlisted;

-- [Spark rows -> DuckDB relation spark_new_ids]
SELECT DISTINCT
  __id_hash
FROM lake_rows
WHERE
  NOT __id_hash IS NULL;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT n.__id_hash AS id_hash
FROM spark_new_ids AS n
WHERE ('0x' || substr(n.__id_hash, 31, 2) || substr(n.__id_hash, 29, 2) || substr(n.__id_hash, 27, 2) || substr(n.__id_hash, 25, 2) || substr(n.__id_hash, 23, 2) || substr(n.__id_hash, 21, 2) || substr(n.__id_hash, 19, 2) || substr(n.__id_hash, 17, 2) || substr(n.__id_hash, 15, 2) || substr(n.__id_hash, 13, 2) || substr(n.__id_hash, 11, 2) || substr(n.__id_hash, 9, 2) || substr(n.__id_hash, 7, 2) || substr(n.__id_hash, 5, 2) || substr(n.__id_hash, 3, 2) || substr(n.__id_hash, 1, 2))::UHUGEINT IN (
    SELECT id_hash
    FROM session_ids
    WHERE source_name = 'sessions'
      AND first_path IN (SELECT path FROM files_read WHERE check_name = $reader)
);

-- [DuckDB rows -> Spark view read_before]
SELECT * FROM read_before WHERE true;

-- [on Spark]
/* Valid rows, and those too old to be told from repeats. */
CREATE OR REPLACE TEMPORARY VIEW valid_rows AS
SELECT
  *,
  COALESCE(__event_time < (
    SELECT
      remembered_from
    FROM read_limits
  ), FALSE) AS __beyond_horizon
FROM lake_rows
WHERE
  NOT __session_id IS NULL AND NOT __event_time IS NULL;

-- [on Spark]
/* One copy of each new session id: the earliest, then by file, so every run keeps the same one. */
/* The ids read more than once: candidates first, those whose 64-bit hash is read more than once (a */
/* grouping on 8 bytes, not 16), then the exact test on their md5 for the candidates only. */
CREATE OR REPLACE TEMPORARY VIEW repeated_ids AS
SELECT
  __id_hash
FROM valid_rows
WHERE
  NOT __beyond_horizon
  AND XXHASH64(__session_id) IN (
    SELECT
      XXHASH64(__session_id)
    FROM valid_rows
    WHERE
      NOT __beyond_horizon
    GROUP BY ALL
    HAVING
      COUNT(*) > 1
  )
GROUP BY
  __id_hash
HAVING
  COUNT(*) > 1;

-- [on Spark]
/* A view, not a copy: each check's scan reads it once. */
CREATE OR REPLACE TEMPORARY VIEW lake_sessions AS
SELECT
  __session_id,
  __id_hash,
  __event_time,
  __excluded,
  `site`,
  `error_code`,
  __file
FROM valid_rows
WHERE
  NOT __beyond_horizon
  AND NOT __id_hash IN (
    SELECT
      __id_hash
    FROM repeated_ids
  )
  AND NOT __id_hash IN (
    SELECT
      id_hash
    FROM read_before
  )
UNION ALL
SELECT
  __session_id,
  __id_hash,
  __event_time,
  __excluded,
  `site`,
  `error_code`,
  __file
FROM valid_rows
WHERE
  NOT __beyond_horizon
  AND __id_hash IN (
    SELECT
      __id_hash
    FROM repeated_ids
  )
  AND NOT __id_hash IN (
    SELECT
      id_hash
    FROM read_before
  )
QUALIFY
  ROW_NUMBER() OVER (PARTITION BY __id_hash ORDER BY __event_time NULLS LAST, __file NULLS LAST) = 1;

-- [on Spark]
CREATE OR REPLACE TEMPORARY VIEW lake_counts AS
WITH kept AS (
  SELECT
    COUNT(*) AS sessions,
    COUNT(*) FILTER(WHERE
      __excluded) AS excluded
  FROM lake_sessions
), valid AS (
  SELECT
    COUNT(*) AS rows_valid,
    COUNT(*) FILTER(WHERE
      __beyond_horizon) AS beyond_horizon
  FROM valid_rows
)
SELECT
  COUNT(*) AS rows_read,
  COUNT(*) FILTER(WHERE
    __session_id IS NULL OR __event_time IS NULL) AS invalid_rows,
  ANY_VALUE(valid.rows_valid) IGNORE NULLS - ANY_VALUE(valid.beyond_horizon) IGNORE NULLS - ANY_VALUE(kept.sessions) IGNORE NULLS AS duplicate_rows,
  ANY_VALUE(valid.beyond_horizon) IGNORE NULLS AS beyond_horizon,
  ANY_VALUE(kept.excluded) IGNORE NULLS AS rows_excluded,
  MAX(__event_time) AS latest /* the watermark's candidate: every possible event time read (an impossible one is NULL by now) */
FROM lake_rows, kept, valid;

-- [on Spark]
/* What each file held: its rows, and those without a session id or a sane event time. */
CREATE OR REPLACE TEMPORARY VIEW lake_file_rows AS
SELECT
  f.path,
  COUNT(r.__file) AS rows,
  COUNT(r.__file) FILTER(WHERE
    r.__session_id IS NULL OR r.__event_time IS NULL) AS invalid_rows,
  COUNT(r.__file) FILTER(WHERE
    r.__insane_time) AS insane_times
FROM run_files AS f
LEFT JOIN lake_rows AS r
  ON r.__file = f.file_index
GROUP BY
  f.path;

-- [Spark rows -> DuckDB relation spark_lake_counts]
SELECT
  *
FROM lake_counts;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE lake_counts AS
SELECT * FROM spark_lake_counts;

-- [Spark rows -> DuckDB relation spark_lake_file_rows]
SELECT
  *
FROM lake_file_rows;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE lake_file_rows AS
SELECT * FROM spark_lake_file_rows;

-- [on Spark]
CREATE OR REPLACE TEMPORARY VIEW kept_ids AS
SELECT
  __id_hash,
  __file,
  __event_time
FROM lake_sessions;

-- [Spark rows -> DuckDB relation spark_kept_ids]
SELECT
  __id_hash,
  __file,
  __event_time
FROM kept_ids;

-- [on DuckDB (the warehouse)]
-- Remember each kept id with the file it was kept from; only pairs not yet known.
INSERT INTO session_ids BY NAME
SELECT 'sessions' AS source_name, k.id_hash, k.first_path, k.event_time
FROM (SELECT ('0x' || substr(__id_hash, 31, 2) || substr(__id_hash, 29, 2) || substr(__id_hash, 27, 2) || substr(__id_hash, 25, 2) || substr(__id_hash, 23, 2) || substr(__id_hash, 21, 2) || substr(__id_hash, 19, 2) || substr(__id_hash, 17, 2) || substr(__id_hash, 15, 2) || substr(__id_hash, 13, 2) || substr(__id_hash, 11, 2) || substr(__id_hash, 9, 2) || substr(__id_hash, 7, 2) || substr(__id_hash, 5, 2) || substr(__id_hash, 3, 2) || substr(__id_hash, 1, 2))::UHUGEINT AS id_hash, $paths[__file + 1] AS first_path, __event_time AS event_time FROM spark_kept_ids) AS k
ANTI JOIN (
    SELECT id_hash, first_path
    FROM session_ids
    WHERE source_name = 'sessions' AND list_contains($paths, first_path)
) AS known
    ON known.id_hash = k.id_hash AND known.first_path = k.first_path;

-- [on DuckDB (the warehouse)]
-- Forget ids more than dedup_horizon behind the data every check of the source has read.
DELETE FROM session_ids
WHERE source_name = 'sessions'
  AND event_time < (SELECT min(watermark) FROM check_state WHERE list_contains($source_checks, check_name))
                   - INTERVAL 3 DAY;
