{% import "macros.sql" as m %}
{% set b = baseline %}
{% set g = guard %}
-- ── stage 5 · breach ───────────────────────────────────────────────────────────────────────
-- A window breaches when it has a threshold, its {{ "EWMA statistic" if b.method == "ewma" else "value" }} is {{ "above" if check.direction == "up" else "below" }} it, and it passes the guard
-- (at least {{ g.min_sessions }} sessions{% if measure.kind == "rate" %} and {{ g.min_bad }} bad{% endif %}); every other window with a threshold and a value is
-- healthy. A window without a value (a zero denominator, no session with a value) gives no verdict.
{% if b.confidence %}
-- confidence {{ b.confidence }}: it also needs the {{ "lower" if check.direction == "up" else "upper" }} end of its Wilson score interval (Wilson 1927)
-- at that two-sided confidence (z = {{ z_for(b.confidence) }}) beyond the threshold, so a small noisy window cannot:
--   bound = (p̂ + z²/2n {{ "−" if check.direction == "up" else "+" }} z·√(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n),  p̂ = bad / sessions
{% endif %}
-- @repeat (with stage 4): until no breach flag changes
CREATE OR REPLACE TEMP TABLE decided AS
SELECT
    *,
    coalesce(
        threshold IS NOT NULL
        AND value IS NOT NULL
        AND {{ "statistic" if b.method == "ewma" else "value" }} {{ ">" if check.direction == "up" else "<" }} threshold
        AND sessions >= {{ g.min_sessions }}
{% if measure.kind == "rate" %}
        AND bad >= {{ g.min_bad }}
{% endif %}
{% if b.confidence %}
{% set z = z_for(b.confidence) %}
{% if check.direction == "up" %}
        AND {{ m.wilson_lower("bad", "sessions", z) }} > threshold
{% else %}
        AND {{ m.wilson_upper("bad", "sessions", z) }} < threshold
{% endif %}
{% endif %}
    , false) AS breach
FROM (
    SELECT
        j.key, j.split_value, j.seq, j.value, {% if b.method == "ewma" %}j.statistic, {% endif %}j.sessions, j.bad, v.baseline, v.history_windows,
        CASE WHEN v.history_windows >= {{ b.min_history }} THEN
{% if b.method == "rolling_percentile" %}
{% set raw = b.factor ~ " * v.baseline" %}
            {% if b.floor is none %}{{ raw }}{% elif check.direction == "up" %}greatest({{ b.floor }}, {{ raw }}){% else %}least({{ b.floor }}, {{ raw }}){% endif %}

{% elif b.method == "p_chart" %}
{% set spread = b.sigmas ~ " * sqrt(v.baseline * (1 - v.baseline) / j.sessions)" %}
            {% if check.direction == "up" %}v.baseline + {{ spread }}{% else %}greatest(0.0, v.baseline - {{ spread }}){% endif %}

{% elif b.method == "ewma" %}
            v.baseline {{ "+" if check.direction == "up" else "-" }} {{ b.sigmas }} * v.spread * sqrt({{ b.lam }} / (2 - {{ b.lam }}))
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
