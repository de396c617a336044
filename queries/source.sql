-- ── stage 0 · source ───────────────────────────────────────────────────────────────────────
-- Source {{ source.name }}: the sessions of the files not read before ($files), read once for
-- every check that reads the same files, each session id once. Rows without a session id or event
-- time are counted and skipped; excluded sessions never count.
CREATE OR REPLACE TEMP TABLE lake_rows AS
SELECT
    {{ source.session_id | ident }}::VARCHAR AS __session_id,
    {{ source.event_time | ident }}::TIMESTAMP AS __event_time,
    {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS __excluded,
{% for column in columns %}
    {{ column | ident }},
{% endfor %}
    filename AS __file
FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true)
{%- if source.until %}

-- A replay up to {{ source.until }} (a backtest): sessions at or after it are not read.
WHERE {{ source.event_time | ident }}::TIMESTAMP < {{ source.until | literal }}
{%- endif %};

-- One copy of each session id: the earliest, then by file name, so every run keeps the same one.
CREATE OR REPLACE TEMP TABLE repeated_ids AS
SELECT __session_id
FROM lake_rows
WHERE __session_id IS NOT NULL AND __event_time IS NOT NULL
GROUP BY __session_id
HAVING count(*) > 1;

CREATE OR REPLACE TEMP TABLE lake_sessions AS
SELECT *
FROM lake_rows
WHERE __session_id IS NOT NULL AND __event_time IS NOT NULL
  AND __session_id NOT IN (SELECT __session_id FROM repeated_ids)
UNION ALL
SELECT *
FROM lake_rows
WHERE __event_time IS NOT NULL
  AND __session_id IN (SELECT __session_id FROM repeated_ids)
QUALIFY row_number() OVER (PARTITION BY __session_id ORDER BY __event_time, __file) = 1;

CREATE OR REPLACE TEMP TABLE lake_counts AS
SELECT
    count(*) AS rows_read,
    count(*) FILTER (WHERE __session_id IS NULL OR __event_time IS NULL) AS rows_invalid,
    count(*) FILTER (WHERE __session_id IS NOT NULL AND __event_time IS NOT NULL)
        - (SELECT count(*) FROM lake_sessions) AS duplicate_rows,
    (SELECT count(*) FROM lake_sessions WHERE __excluded) AS rows_excluded,
    max(__event_time) AS latest
FROM lake_rows;

CREATE OR REPLACE TEMP TABLE lake_file_rows AS
SELECT __file AS path, count(*) AS rows
FROM lake_rows
GROUP BY __file;
