{% import "macros.sql" as m %}
-- ── stage 1 · scan ─────────────────────────────────────────────────────────────────────────
-- The check's sessions: not excluded{% if check.where %}, matching its `where`{% endif %}; its key and measure inputs.
-- A view: the window stage reads it once.
CREATE OR REPLACE TEMP VIEW arrivals AS
SELECT
    __session_id AS session_id,
    __event_time AS event_time,
    {{ m.key_struct(check.by) }} AS key,
{% if measure.kind == "rate" %}
    coalesce({{ measure.bad.sql }}, false) AS is_bad,
    {% if measure.split %}{{ measure.split | ident }}::VARCHAR{% else %}NULL::VARCHAR{% endif %} AS split_value
{% elif measure.kind == "ratio" %}
    ({{ measure.numerator.sql }})::DOUBLE AS num,
    ({{ measure.denominator.sql }})::DOUBLE AS den
{% elif measure.kind == "quantile" %}
    ({{ measure.of.sql }})::DOUBLE AS x
{% endif %}
FROM lake_sessions
WHERE NOT __excluded{% if check.where %} AND coalesce({{ check.where.sql }}, false){% endif %};

-- The watermark: the largest event time read by this check so far, this run's files included.
CREATE OR REPLACE TEMP TABLE clock AS
SELECT
    prior.watermark AS previous,
    greatest(prior.watermark, (SELECT latest FROM lake_counts)) AS current
FROM (SELECT (SELECT watermark FROM check_state WHERE check_name = {{ check.name | literal }}) AS watermark) AS prior;

CREATE OR REPLACE TEMP TABLE scan_counts AS
SELECT
    c.rows_read, c.rows_invalid, c.duplicate_rows, c.rows_excluded,
    c.rows_read - c.rows_invalid - c.duplicate_rows - c.rows_excluded - a.rows_kept AS rows_filtered,
    a.rows_kept
FROM lake_counts AS c, (SELECT count(*) AS rows_kept FROM arrivals) AS a;
