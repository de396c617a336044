{% import "macros.sql" as m %}
-- ── stage 1 · scan ─────────────────────────────────────────────────────────────────────────
-- The check's sessions: not excluded{% if check.where %}, matching its `where`{% endif %}; its key and measure inputs.
{% if measure.kind != "rate" %}
-- A measure input that is NaN or ±infinity is missing (NULL), and counted: it would compare
-- beyond every threshold.
{% endif %}
-- A view: the window stage reads it once.
CREATE OR REPLACE TEMP VIEW arrivals AS
SELECT
    session_id,
    event_time,
    key,
{% if source.viewer_id %}
    viewer_point,
{% endif %}
{% if measure.kind == "rate" %}
    is_bad,
    split_value,
    NOT finite AS nonfinite
{% elif measure.kind == "ratio" %}
    CASE WHEN finite THEN numerator END AS numerator,
    CASE WHEN finite THEN denominator END AS denominator,
    NOT finite AS nonfinite
{% else %}
    CASE WHEN finite THEN quantile_input END AS quantile_input,
    NOT finite AS nonfinite
{% endif %}
FROM (
    SELECT
        *,
{% if measure.kind == "ratio" %}
        coalesce(isfinite(numerator) AND isfinite(denominator), true) AS finite
{% elif measure.kind == "quantile" %}
        coalesce(isfinite(quantile_input), true) AS finite
{% else %}
        true AS finite
{% endif %}
    FROM (
        SELECT
            __session_id AS session_id,
            __event_time AS event_time,
            {{ m.key_struct(check.by) }} AS key,
{% if source.viewer_id %}
            __viewer_point AS viewer_point,
{% endif %}
{% if measure.kind == "rate" %}
            coalesce({{ measure.bad.sql }}, false) AS is_bad,
            {% if measure.split %}{{ measure.split | ident }}::VARCHAR{% else %}NULL::VARCHAR{% endif %} AS split_value
{% elif measure.kind == "ratio" %}
            ({{ measure.numerator.sql }})::DOUBLE AS numerator,
            ({{ measure.denominator.sql }})::DOUBLE AS denominator
{% elif measure.kind == "quantile" %}
            ({{ measure.of.sql }})::DOUBLE AS quantile_input
{% endif %}
        FROM lake_sessions
        WHERE NOT __excluded{% if check.where %} AND coalesce({{ check.where.sql }}, false){% endif %}

    )
);

-- The check's watermarks: `previous`, where its last run left it, and `current`, the largest sane
-- event time read by this check so far, this run's files included; when a backlog is read in
-- several runs, no later than the earliest session still unread (read_until), so nothing still to
-- come lands in a window already closed.
CREATE OR REPLACE TEMP TABLE watermarks AS
SELECT
    prior.watermark AS previous,
    greatest(prior.watermark, least(c.latest, coalesce((SELECT read_until FROM read_limits), c.latest))) AS current
FROM (SELECT (SELECT watermark FROM check_state WHERE check_name = {{ check.name | literal }}) AS watermark) AS prior,
     lake_counts AS c;

CREATE OR REPLACE TEMP TABLE scan_counts AS
SELECT
    c.rows_read, c.invalid_rows, c.duplicate_rows, c.rows_excluded, c.beyond_horizon,
    c.rows_read - c.invalid_rows - c.duplicate_rows - c.beyond_horizon - c.rows_excluded - a.rows_kept AS rows_filtered,
    a.rows_kept,
    a.nonfinite_values
FROM lake_counts AS c, (SELECT count(*) AS rows_kept, count(*) FILTER (WHERE nonfinite) AS nonfinite_values FROM arrivals) AS a;
