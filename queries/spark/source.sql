{% import "spark/moves.sql" as move %}
{% set source_lit = source.name | literal %}
-- ── stage 0 · source, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated: read_parquet($files) is the view Spark reads the same files
-- into, and each row's file is the path Spark reports, decoded from its URL form (file:/…%20…).
-- Repeats across runs are found in the warehouse: the new files' id hashes go there, the ones
-- read before come back, and the hashes of the sessions kept are recorded there.
-- @read lake_files
-- @translate lake_rows
-- @to-duckdb spark_new_ids
SELECT DISTINCT __id_hash FROM lake_rows WHERE __id_hash IS NOT NULL;
-- @duckdb read_before
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT id_hash
FROM session_ids
WHERE source_name = {{ source_lit }}
  AND first_path IN (SELECT path FROM files_read WHERE check_name = $reader)
  AND id_hash IN (SELECT __id_hash FROM spark_new_ids);
{{ move.to_spark("read_before", "true") }}
-- @translate repeated_ids
-- @translate lake_sessions
-- @translate lake_counts
-- @translate lake_file_rows
{{ move.to_duckdb("lake_counts") }}
{{ move.to_duckdb("lake_file_rows") }}
-- @to-duckdb spark_kept_ids
SELECT __id_hash, __file FROM lake_sessions;
-- @duckdb
INSERT INTO session_ids
SELECT {{ source_lit }} AS source_name, __id_hash, __file
FROM spark_kept_ids
WHERE __file NOT IN (SELECT path FROM files_read);
-- @duckdb
-- Every file Spark read is one this run listed, under the same path, or its rows would go uncounted.
SELECT error('Spark read a file the run did not list: ' || path)
FROM lake_file_rows
WHERE path NOT IN (SELECT unnest($files));
