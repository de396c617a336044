-- ── stage 0 · source ───────────────────────────────────────────────────────────────────────
-- Source {{ source.name }}: the sessions of the files not read before ($files), read once for
-- every check that reads the same files ($reader is the first of them), each session id once, in
-- this run and across runs. Rows without a session id or event time are counted and skipped;
-- excluded sessions never count. A session id is kept only as its md5 (a 128-bit number), and a
-- row's file as its place in $files, which is sorted by path.
{% set source_lit = source.name | literal %}
CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    {{ source.session_id | ident }}::VARCHAR AS __session_id,
    md5_number({{ source.session_id | ident }}::VARCHAR) AS __id_hash,
    {{ source.event_time | ident }}::TIMESTAMP AS __event_time,
    {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS __excluded,
{% for column in columns %}
    {{ column | ident }},
{% endfor %}
    file_index::INTEGER AS __file
FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
{%- if source.until %}

-- A replay up to {{ source.until }} (a backtest): sessions at or after it are not read.
WHERE {{ source.event_time | ident }}::TIMESTAMP < {{ source.until | literal }}
{%- endif %};

-- Session ids already read, in an earlier run, from a file these checks have read: duplicates.
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT id_hash
FROM session_ids
WHERE source_name = {{ source_lit }}
  AND first_path IN (SELECT path FROM files_read WHERE check_name = $reader)
  AND id_hash IN (SELECT __id_hash FROM lake_rows WHERE __id_hash IS NOT NULL);

-- One copy of each new session id: the earliest, then by file name, so every run keeps the same one.
CREATE OR REPLACE TEMP TABLE repeated_ids AS
SELECT __id_hash
FROM lake_rows
WHERE __id_hash IS NOT NULL AND __event_time IS NOT NULL
GROUP BY __id_hash
HAVING count(*) > 1;

-- A view, not a copy: each check's scan reads it once.
CREATE OR REPLACE TEMP VIEW lake_sessions AS
SELECT *
FROM lake_rows
WHERE __id_hash IS NOT NULL AND __event_time IS NOT NULL
  AND __id_hash NOT IN (SELECT __id_hash FROM repeated_ids)
  AND __id_hash NOT IN (SELECT id_hash FROM read_before)
UNION ALL
SELECT *
FROM lake_rows
WHERE __event_time IS NOT NULL
  AND __id_hash IN (SELECT __id_hash FROM repeated_ids)
  AND __id_hash NOT IN (SELECT id_hash FROM read_before)
QUALIFY row_number() OVER (PARTITION BY __id_hash ORDER BY __event_time, __file) = 1;

CREATE OR REPLACE TEMP TABLE lake_counts AS
WITH kept AS (
    SELECT count(*) AS sessions, count(*) FILTER (WHERE __excluded) AS excluded FROM lake_sessions
)
SELECT
    count(*) AS rows_read,
    count(*) FILTER (WHERE __session_id IS NULL OR __event_time IS NULL) AS rows_invalid,
    count(*) FILTER (WHERE __session_id IS NOT NULL AND __event_time IS NOT NULL)
        - any_value(kept.sessions) AS duplicate_rows,
    any_value(kept.excluded) AS rows_excluded,
    max(__event_time) AS latest
FROM lake_rows, kept;

CREATE OR REPLACE TEMP TABLE lake_file_rows AS
SELECT $files[__file + 1] AS path, count(*) AS rows
FROM lake_rows
GROUP BY __file;

-- The kept sessions' id hashes as two 64-bit halves, which is how they reach the warehouse's
-- connection when the stages run on a connection of their own (Arrow has no 128-bit integer).
CREATE OR REPLACE TEMP VIEW kept_ids AS
SELECT (__id_hash >> 64)::UBIGINT AS hash_high, (__id_hash & 18446744073709551615)::UBIGINT AS hash_low, __file
FROM lake_sessions;

-- Remember the ids of files no check has read before (hashes only), for the next runs.
INSERT INTO session_ids
SELECT {{ source_lit }} AS source_name, (hash_high::UHUGEINT << 64) | hash_low, $files[__file + 1]
FROM kept_ids
WHERE __file IN (
    SELECT f.i - 1
    FROM (SELECT unnest($files) AS path, generate_subscripts($files, 1) AS i) AS f
    WHERE f.path NOT IN (SELECT path FROM files_read)
);
