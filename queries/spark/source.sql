{% import "spark/moves.sql" as move %}
{% set source_lit = source.name | literal %}
-- ── stage 0 · source, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated: read_parquet($files) is the view Spark reads the same files
-- into, and each row's file is found by the location Spark reports, decoded from its URL form
-- (file:/…%20…). The new files and the run's limits are made in the warehouse and sent to Spark.
-- Repeats across runs are found in the warehouse: the new files' id hashes go there, the ones
-- read before come back, and the hashes of the sessions kept are recorded there.
-- On Spark a session id's md5 stays hex; the warehouse keeps it as a number, so hashes change
-- form on the DuckDB side.
{% import "macros.sql" as m %}
-- @duckdb run_files
CREATE OR REPLACE TEMP TABLE run_files AS
SELECT m.i AS file_index, m.f.path AS path, $files[m.i + 1] AS location,
       m.f.modified_at + {{ source.max_future | interval }} AS latest_sane
FROM (SELECT unnest($manifest) AS f, generate_subscripts($manifest, 1) - 1 AS i) AS m;
{{ move.to_spark("run_files", "true") }}
-- @duckdb read_limits
CREATE OR REPLACE TEMP TABLE read_limits AS
SELECT
    (SELECT watermark FROM check_state WHERE check_name = $reader) - {{ source.dedup_horizon | interval }} AS remembered_from,
    $read_until::TIMESTAMP AS read_until;
{{ move.to_spark("read_limits", "true") }}
-- @read lake_files
-- @spark lake_rows
-- An event time that cannot be right (after its file was written + max_future; an infinite one is
-- far beyond that on Spark) is no event time: the row is invalid and never moves the watermark.
CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    r.__session_id,
    md5(r.__session_id) AS __id_hash,
    CASE WHEN r.__event_time <= f.latest_sane THEN r.__event_time END AS __event_time,
    r.__event_time IS NOT NULL AND NOT coalesce(r.__event_time <= f.latest_sane, false) AS __insane_time,
    r.__excluded,
{% for column in columns %}
    r.{{ column | ident }},
{% endfor %}
    f.file_index AS __file,
    r.__location
FROM (
    SELECT
        {{ source.session_id | ident }}::VARCHAR AS __session_id,
        ({{ source.time.sql }})::TIMESTAMP AS __event_time,
        {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS __excluded,
{% for column in columns %}
        {{ column | ident }},
{% endfor %}
        filename AS __location
    FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true)
{%- if source.until %}

    WHERE ({{ source.time.sql }})::TIMESTAMP < {{ source.until | literal }}
{%- endif %}

) AS r
LEFT JOIN run_files AS f ON f.location = r.__location;
-- @to-duckdb spark_unlisted
SELECT DISTINCT __location FROM lake_rows WHERE __file IS NULL;
-- @duckdb
-- Every file Spark read is one this run listed, under the same location, or its rows would go uncounted.
SELECT error('Spark read a file the run did not list: ' || __location)
FROM spark_unlisted;
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
-- @translate valid_rows
-- @translate repeated_ids
-- @translate lake_sessions
-- @translate lake_counts
-- @translate lake_file_rows
{{ move.to_duckdb("lake_counts") }}
{{ move.to_duckdb("lake_file_rows") }}
-- @spark kept_ids
CREATE OR REPLACE TEMP VIEW kept_ids AS SELECT __id_hash, __file, __event_time FROM lake_sessions;
-- @to-duckdb spark_kept_ids
SELECT __id_hash, __file, __event_time FROM kept_ids;
-- @duckdb
-- Remember each kept id with the file it was kept from; only pairs not yet known.
{{ m.remember_ids(source, "SELECT " ~ m.md5_hex_number("__id_hash") ~ " AS id_hash, $paths[__file + 1] AS first_path, __event_time AS event_time FROM spark_kept_ids") }};
-- @duckdb
-- Forget ids more than dedup_horizon behind the data every check of the source has read.
{{ m.forget_ids(source) }};
