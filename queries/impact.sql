{% import "macros.sql" as m %}
{% set beyond = ">" if check.direction == "up" else "<" %}
{% set per_session = measure.kind != "rate" or source.viewer_id %}
-- ── stage 4b · impact ──────────────────────────────────────────────────────────────────────
-- What each breaching window cost: its affected sessions{% if measure.kind == "rate" %}, its excess sessions{% endif %}{% if source.viewer_id %}, and a sketch of
-- the viewers they belong to{% endif %}. Other windows get NULL.
{% if measure.kind == "rate" %}
--   affected_sessions = bad{% if measure.split %} (with this {{ measure.split }} value){% endif +%}
{% if check.direction == "up" %}
--   excess_sessions = max(0, bad − sessions × baseline): the bad sessions above what the series'
--   baseline rate would have given on the same sessions (0 where the window was not above its
--   baseline, which a factor below 1, a floor or an EWMA statistic can allow)
{% else %}
--   excess_sessions = max(0, sessions × baseline − bad): the sessions short of what the series'
--   baseline rate would have given on the same sessions (direction: down)
{% endif %}
{% else %}
--   affected_sessions = the window's sessions whose own value ({% if measure.kind == "ratio" %}numerator ÷ denominator{% else %}{{ measure.of.sql }}{% endif %}) is
--   {{ "above" if check.direction == "up" else "below" }} the window's threshold, not every session of the window
{% endif %}
{% if source.viewer_id %}
--   viewer_sketch = the HyperLogLog sketch (m = 1024 registers, see macros.sql) of the viewers
--   ({{ source.viewer_id }}) of the affected sessions: the largest viewer point of each register
{% endif %}
{% if per_session %}

-- The breaching windows, with the key as the sessions have it: they go where the sessions are.
CREATE OR REPLACE TEMP TABLE breaching AS
SELECT {{ m.from_map("key", check.by) }} AS key, split_value, window_number, threshold
FROM judged
WHERE breach;

-- Read where the sessions are, only for the breaching windows: per window{% if source.viewer_id %} and sketch register{% endif %}, the
-- affected sessions{% if source.viewer_id %} and the register's largest viewer point{% endif %}.
CREATE OR REPLACE TEMP TABLE affected_registers AS
SELECT
    b.key, b.split_value, b.window_number,
{% if source.viewer_id %}
    s.viewer_point // 64 AS register,
    max(s.viewer_point) AS viewer_point,
{% endif %}
    count(*) AS sessions
FROM window_sessions AS s
JOIN breaching AS b ON s.key = b.key AND s.window_number = b.window_number
{% if measure.kind == "rate" %}
WHERE s.is_bad AND s.split_value IS NOT DISTINCT FROM b.split_value
{% elif measure.kind == "ratio" %}
WHERE s.numerator / nullif(s.denominator, 0) {{ beyond }} b.threshold
{% else %}
WHERE s.quantile_input {{ beyond }} b.threshold
{% endif %}
GROUP BY b.key, b.split_value, b.window_number{% if source.viewer_id %}, s.viewer_point // 64{% endif %};
{% endif %}

-- The windows with their impact.
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
    j.*,
{% if measure.kind == "rate" %}
    CASE WHEN j.breach THEN j.bad END AS affected_sessions,
    CASE WHEN j.breach THEN greatest(0.0, {% if check.direction == "up" %}j.bad - j.sessions * j.baseline{% else %}j.sessions * j.baseline - j.bad{% endif %}) END AS excess_sessions,
{% else %}
    CASE WHEN j.breach THEN coalesce(a.sessions, 0) END AS affected_sessions,
    NULL::DOUBLE AS excess_sessions,
{% endif %}
{% if source.viewer_id %}
    CASE WHEN j.breach THEN coalesce(a.viewer_sketch, []::INTEGER[]) END AS viewer_sketch
{% else %}
    NULL::INTEGER[] AS viewer_sketch
{% endif %}
FROM judged AS j{% if not per_session %};{% endif +%}
{% if per_session %}
LEFT JOIN (
    SELECT
        key, split_value, window_number, sum(sessions)::BIGINT AS sessions{% if source.viewer_id %},
        list(viewer_point ORDER BY viewer_point) FILTER (WHERE viewer_point IS NOT NULL) AS viewer_sketch{% endif +%}
    FROM affected_registers
    GROUP BY key, split_value, window_number
) AS a ON a.key = {{ m.from_map("j.key", check.by) }} AND a.split_value IS NOT DISTINCT FROM j.split_value
    AND a.window_number = j.window_number;
{% endif %}
