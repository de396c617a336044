{% import "spark/moves.sql" as move %}
{% set source_lit = source.name | literal %}
-- ── stage 0 · source, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated: read_parquet($files) is the view Spark reads the same files
-- into, and each row's file is the path Spark reports, decoded from its URL form (file:/…%20…).
-- Repeats across runs are found in the warehouse: the new files' id hashes go there, the ones
-- read before come back, and the hashes of the sessions kept are recorded there.
-- On Spark a session id's md5 stays hex and a row's file is its path; the warehouse keeps the md5
-- as a number, so hashes change form on the DuckDB side.
{% import "macros.sql" as m %}
-- @read lake_files
-- @spark lake_rows
CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    {{ source.session_id | ident }}::VARCHAR AS __session_id,
    md5({{ source.session_id | ident }}::VARCHAR) AS __id_hash,
    {{ source.event_time | ident }}::TIMESTAMP AS __event_time,
    {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS __excluded,
{% for column in columns %}
    {{ column | ident }},
{% endfor %}
    filename AS __file
FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true)
{%- if source.until %}
WHERE {{ source.event_time | ident }}::TIMESTAMP < {{ source.until | literal }}
{%- endif %};
-- @to-duckdb spark_new_ids
SELECT DISTINCT __id_hash FROM lake_rows WHERE __id_hash IS NOT NULL;
-- @duckdb read_before
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT n.__id_hash AS id_hash
FROM spark_new_ids AS n
WHERE {{ m.md5_hex_number("n.__id_hash") }} IN (
    SELECT id_hash
    FROM session_ids
    WHERE source_name = {{ source_lit }}
      AND first_path IN (SELECT path FROM files_read WHERE check_name = $reader)
);
{{ move.to_spark("read_before", "true") }}
-- @translate repeated_ids
-- @translate lake_sessions
-- @translate lake_counts
-- @spark lake_file_rows
CREATE OR REPLACE TEMP TABLE lake_file_rows AS
SELECT __file AS path, count(*) AS rows
FROM lake_rows
GROUP BY __file;
{{ move.to_duckdb("lake_counts") }}
{{ move.to_duckdb("lake_file_rows") }}
-- @spark kept_ids
CREATE OR REPLACE TEMP VIEW kept_ids AS SELECT __id_hash, __file FROM lake_sessions;
-- @to-duckdb spark_kept_ids
SELECT __id_hash, __file FROM kept_ids;
-- @duckdb
INSERT INTO session_ids
SELECT {{ source_lit }} AS source_name, {{ m.md5_hex_number("__id_hash") }}, __file
FROM spark_kept_ids
WHERE __file NOT IN (SELECT path FROM files_read);
-- @duckdb
-- Every file Spark read is one this run listed, under the same path, or its rows would go uncounted.
SELECT error('Spark read a file the run did not list: ' || path)
FROM lake_file_rows
WHERE path NOT IN (SELECT unnest($files));
