{% import "macros.sql" as m %}
-- ── stage 1 · scan ─────────────────────────────────────────────────────────────────────────
-- The sessions of the files this run has not read before ($files), each session id once.
-- Rows without a session id or event time are counted and skipped; excluded sessions never count.
CREATE OR REPLACE TEMP TABLE scanned AS
SELECT
    {{ source.session_id | ident }}::VARCHAR AS session_id,
    {{ source.event_time | ident }}::TIMESTAMP AS event_time,
    {% if source.exclude %}coalesce({{ source.exclude.sql }}, false){% else %}false{% endif %} AS excluded,
    {% if check.where %}coalesce({{ check.where.sql }}, false){% else %}true{% endif %} AS selected,
    {{ m.key_struct(check.by) }} AS key,
{% if measure.kind == "rate" %}
    coalesce({{ measure.bad.sql }}, false) AS is_bad,
    {% if measure.split %}{{ measure.split | ident }}::VARCHAR{% else %}NULL::VARCHAR{% endif %} AS split_value,
    NULL::DOUBLE AS num,
    NULL::DOUBLE AS den,
    NULL::DOUBLE AS x,
{% elif measure.kind == "ratio" %}
    NULL::BOOLEAN AS is_bad,
    NULL::VARCHAR AS split_value,
    ({{ measure.numerator.sql }})::DOUBLE AS num,
    ({{ measure.denominator.sql }})::DOUBLE AS den,
    NULL::DOUBLE AS x,
{% elif measure.kind == "quantile" %}
    NULL::BOOLEAN AS is_bad,
    NULL::VARCHAR AS split_value,
    NULL::DOUBLE AS num,
    NULL::DOUBLE AS den,
    ({{ measure.of.sql }})::DOUBLE AS x,
{% endif %}
    filename AS source_file
FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true);

-- The watermark: the largest event time read by this check so far, this run's files included.
CREATE OR REPLACE TEMP TABLE clock AS
SELECT
    prior.watermark AS previous,
    greatest(prior.watermark, (SELECT max(event_time) FROM scanned)) AS current
FROM (SELECT (SELECT watermark FROM check_state WHERE check_name = {{ check.name | literal }}) AS watermark) AS prior;

-- One copy of each session id: the earliest, then by file name, so every run keeps the same one.
CREATE OR REPLACE TEMP TABLE repeated_ids AS
SELECT session_id
FROM scanned
WHERE session_id IS NOT NULL AND event_time IS NOT NULL
GROUP BY session_id
HAVING count(*) > 1;

CREATE OR REPLACE TEMP TABLE firsts AS
SELECT *
FROM scanned
WHERE session_id IS NOT NULL AND event_time IS NOT NULL
  AND session_id NOT IN (SELECT session_id FROM repeated_ids)
UNION ALL
SELECT *
FROM scanned
WHERE event_time IS NOT NULL
  AND session_id IN (SELECT session_id FROM repeated_ids)
QUALIFY row_number() OVER (PARTITION BY session_id ORDER BY event_time, source_file) = 1;

CREATE OR REPLACE TEMP TABLE arrivals AS
SELECT * EXCLUDE (excluded, selected, source_file)
FROM firsts
WHERE NOT excluded AND selected;

CREATE OR REPLACE TEMP TABLE scan_counts AS
SELECT
    (SELECT count(*) FROM scanned) AS rows_read,
    (SELECT count(*) FROM scanned WHERE session_id IS NULL OR event_time IS NULL) AS rows_invalid,
    (SELECT count(*) FROM scanned WHERE session_id IS NOT NULL AND event_time IS NOT NULL)
        - count(*) AS duplicate_rows,
    count(*) FILTER (WHERE excluded) AS rows_excluded,
    count(*) FILTER (WHERE NOT excluded AND NOT selected) AS rows_filtered,
    count(*) FILTER (WHERE NOT excluded AND selected) AS rows_kept
FROM firsts;
