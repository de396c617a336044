{% set b = baseline %}
{% set g = guard %}
-- ── stage 5 · breach ───────────────────────────────────────────────────────────────────────
-- A window breaches when it has a threshold, its value is {{ "above" if check.direction == "up" else "below" }} it, and it passes the guard
-- (at least {{ g.min_sessions }} sessions{% if measure.kind == "rate" %} and {{ g.min_bad }} bad{% endif %}); every other window with a threshold is healthy.
-- @repeat (with stage 4): until no breach flag changes
CREATE OR REPLACE TEMP TABLE decided AS
SELECT
    *,
    coalesce(
        threshold IS NOT NULL
        AND value {{ ">" if check.direction == "up" else "<" }} threshold
        AND sessions >= {{ g.min_sessions }}
{% if measure.kind == "rate" %}
        AND bad >= {{ g.min_bad }}
{% endif %}
    , false) AS breach
FROM (
    SELECT
        j.key, j.split_value, j.seq, j.value, j.sessions, j.bad, v.baseline, v.history_windows,
        CASE WHEN v.history_windows >= {{ b.min_history }} THEN
{% if b.method == "rolling_percentile" %}
{% set raw = b.factor ~ " * v.baseline" %}
            {% if b.floor is none %}{{ raw }}{% elif check.direction == "up" %}greatest({{ b.floor }}, {{ raw }}){% else %}least({{ b.floor }}, {{ raw }}){% endif %}

{% endif %}
        END AS threshold
    FROM judged AS j
    JOIN verdicts AS v ON j.key = v.key AND j.split_value IS NOT DISTINCT FROM v.split_value AND j.seq = v.seq
);

UPDATE judged SET changed = false WHERE changed;

UPDATE judged
SET
    baseline = d.baseline,
    history_windows = d.history_windows,
    threshold = d.threshold,
    changed = judged.breach IS DISTINCT FROM d.breach,
    breach = d.breach
FROM decided AS d
WHERE judged.key = d.key AND judged.split_value IS NOT DISTINCT FROM d.split_value AND judged.seq = d.seq;

SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
