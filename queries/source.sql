{% import "macros.sql" as m %}
-- ── stage 0 · source ───────────────────────────────────────────────────────────────────────
-- Source {{ source.name }}: the sessions of the files not read before ($files, read from where they are;
-- $paths, their names relative to the source's path), read once for every check that has read the
-- same files before ($reader is the first of them), each session id once per check, in this run and
-- across runs. Rows without a session id or a sane event time are counted and skipped; excluded
-- sessions never count. A session id is kept only as its md5 (a 128-bit number).
{% set source_lit = source.name | literal %}
-- Each new file: its place in $files, its name, and the latest event time a session in it can
-- sanely have: {{ source.max_future | interval }} (max_future) after the file was written.
CREATE OR REPLACE TEMP TABLE run_files AS
SELECT m.i AS file_index, m.f.path AS path, m.f.modified_at + {{ source.max_future | interval }} AS latest_sane
FROM (SELECT unnest($manifest) AS f, generate_subscripts($manifest, 1) - 1 AS i) AS m;

-- The reader's data time before this run: sessions more than {{ source.dedup_horizon | interval }} (dedup_horizon)
-- older than it can no longer be told from repeats, whose ids are forgotten by then. And when a
-- backlog is read in several runs, the earliest event time of the files left for the next runs
-- ($read_until): the watermark stays before it, and count windows wait for the sessions after it.
CREATE OR REPLACE TEMP TABLE read_limits AS
SELECT
    (SELECT watermark FROM check_state WHERE check_name = $reader) - {{ source.dedup_horizon | interval }} AS remembered_from,
    $read_until::TIMESTAMP AS read_until;

CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    r.__session_id,
    md5_number(r.__session_id) AS __id_hash,
    -- an event time that cannot be right (infinite, or after its file was written + max_future) is
    -- no event time: the row is invalid and never moves the watermark
    CASE WHEN isfinite(r.__event_time) AND r.__event_time <= f.latest_sane THEN r.__event_time END AS __event_time,
    r.__event_time IS NOT NULL AND NOT coalesce(isfinite(r.__event_time) AND r.__event_time <= f.latest_sane, false) AS __insane_time,
{% if source.viewer_id %}
    -- the viewer's point in the sketch: register × 64 + rank; neither the id nor the hash is kept
    {{ m.viewer_point_of("r.__viewer_hash") }} AS __viewer_point,
{% endif %}
    r.* EXCLUDE (__session_id, __event_time{% if source.viewer_id %}, __viewer_hash{% endif %})
FROM (
    SELECT
        {{ source.session_id | ident }}::VARCHAR AS __session_id,
        ({{ source.time.sql }})::TIMESTAMP AS __event_time,
        {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS __excluded,
{% if source.viewer_id %}
        -- the viewer only as a 64-bit hash, made its point in the viewer sketch below (see macros.sql)
        {{ m.viewer_hash(source.viewer_id | ident) }} AS __viewer_hash,
{% endif %}
{% for column in columns %}
        {{ column | ident }},
{% endfor %}
        file_index::INTEGER AS __file
    FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
{%- if source.until %}

    -- A replay up to {{ source.until }} (a backtest): sessions at or after it are not read.
    WHERE ({{ source.time.sql }})::TIMESTAMP < {{ source.until | literal }}
{%- endif %}

) AS r
JOIN run_files AS f ON f.file_index = r.__file;

-- Session ids the reader has counted before (from a file it has read): repeats. Checks read a
-- source's files together only when they have read the same files before, so it is every one's.
CREATE OR REPLACE TEMP TABLE read_before AS
SELECT DISTINCT id_hash
FROM session_ids
WHERE source_name = {{ source_lit }}
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
-- The ids read more than once: candidates first, those whose 64-bit hash is read more than once (a
-- grouping on 8 bytes, not 16), then the exact test on their md5 for the candidates only.
CREATE OR REPLACE TEMP TABLE repeated_ids AS
SELECT __id_hash
FROM valid_rows
WHERE NOT __beyond_horizon
  AND hash(__session_id) IN (
      SELECT hash(__session_id) FROM valid_rows WHERE NOT __beyond_horizon GROUP BY ALL HAVING count(*) > 1)
GROUP BY __id_hash
HAVING count(*) > 1;

-- A view, not a copy: each check's scan reads it once.
{% set kept_columns %}__session_id, __id_hash, __event_time, __excluded, {% if source.viewer_id %}__viewer_point, {% endif %}{% for column in columns %}{{ column | ident }}, {% endfor %}__file{% endset %}
CREATE OR REPLACE TEMP VIEW lake_sessions AS
SELECT {{ kept_columns }}
FROM valid_rows
WHERE NOT __beyond_horizon
  AND __id_hash NOT IN (SELECT __id_hash FROM repeated_ids)
  AND __id_hash NOT IN (SELECT id_hash FROM read_before)
UNION ALL
SELECT {{ kept_columns }}
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

-- Remember each kept id with the file it was kept from (hashes only); only pairs not yet known.
{{ m.remember_ids(source, "SELECT (hash_high::UHUGEINT << 64) | hash_low AS id_hash, $paths[__file + 1] AS first_path, __event_time AS event_time FROM kept_ids") }};

-- Forget ids more than dedup_horizon behind the data every check of the source has read.
{{ m.forget_ids(source) }};
