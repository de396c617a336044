{% import "spark/moves.sql" as move %}
-- ── stage 0 · source, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated: read_parquet($files) is the view Spark reads the same files
-- into, and each row's file is the path Spark reports, decoded from its URL form (file:/…%20…).
-- @read lake_files
-- @translate lake_rows
-- @translate repeated_ids
-- @translate lake_sessions
-- @translate lake_counts
-- @translate lake_file_rows
{{ move.to_duckdb("lake_counts") }}
{{ move.to_duckdb("lake_file_rows") }}
-- @duckdb
-- Every file Spark read is one this run listed, under the same path, or its rows would go uncounted.
SELECT error('Spark read a file the run did not list: ' || path)
FROM lake_file_rows
WHERE path NOT IN (SELECT unnest($files));
