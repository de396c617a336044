{% import "macros.sql" as m %}
{% set check_lit = check.name | literal %}
{% set b = baseline %}
-- ── stage 4 · baseline ─────────────────────────────────────────────────────────────────────
{% if b.method == "rolling_percentile" %}
-- rolling_percentile: baseline = quantile_cont(value, {{ b.q }}) over the series' last {{ b.history }} earlier
-- windows that did not breach; a window gets a threshold once it has {{ b.min_history }} of them:
{% if check.direction == "up" %}
--   threshold = {% if b.floor is not none %}greatest({{ b.floor }}, {% endif %}{{ b.factor }} × baseline{% if b.floor is not none %}){% endif %}
{% else %}
--   threshold = {% if b.floor is not none %}least({{ b.floor }}, {% endif %}{{ b.factor }} × baseline{% if b.floor is not none %}){% endif %}
{% endif %}
{% elif b.method == "p_chart" %}
-- p_chart (NIST/SEMATECH e-Handbook §6.3.3.2, proportions control chart): baseline = p̄ = Σ bad ÷
-- Σ sessions over the series' last {{ b.history }} earlier windows that did not breach (at least {{ b.min_history }});
-- the limit widens for small windows, n = this window's sessions:
{% if check.direction == "up" %}
--   threshold = p̄ + {{ b.sigmas }} × √(p̄ (1 − p̄) / n)
{% else %}
--   threshold = max(0, p̄ − {{ b.sigmas }} × √(p̄ (1 − p̄) / n))
{% endif %}
{% elif b.method == "ewma" %}
{% set lam = b.lam %}
-- ewma (NIST/SEMATECH e-Handbook §6.3.2.4, EWMA control chart), λ = {{ lam }}:
--   statistic z = {{ lam }} × value + {{ 1 - lam }} × z of the series' previous window
--   (a new series starts at {{ "the target " ~ b.target if b.target is not none else "its first value" }}; a window without a value keeps z);
--   target = {{ b.target if b.target is not none else "mean of the series' last " ~ b.history ~ " earlier windows that did not breach" }},
--   s = {{ b.sigma if b.sigma is not none else "their standard deviation" }};
--   threshold = target {{ "+" if check.direction == "up" else "−" }} {{ b.sigmas }} × s × √(λ / (2 − λ)), and the window breaches on z, not on its value.
{% endif %}
{% if measure.split %}
-- A split value first seen after its key's first window has the key's earlier windows as history,
-- each with value 0: it had no bad sessions in them.
{% endif %}
-- Earlier windows that did not breach can only enter a window's history in order, so the verdicts
-- of a series are found by repeating this stage and the next until no breach flag changes; each
-- round settles at least one more window of every series still changing, all series at once.
CREATE OR REPLACE TEMP TABLE history AS
WITH earlier AS (
    SELECT w.key, w.split_value, w.seq, w.key_window, w.value, w.sessions, w.bad, w.breach
    FROM windows AS w
    SEMI JOIN (SELECT DISTINCT key, split_value FROM new_windows) AS n
        ON w.key = n.key AND w.split_value IS NOT DISTINCT FROM n.split_value
    WHERE w.check_name = {{ check_lit }}
){% if measure.split %},
first_seen AS (
    SELECT key, split_value, min(key_window) AS first_window
    FROM (SELECT key, split_value, key_window FROM earlier
          UNION ALL SELECT key, split_value, key_window FROM new_windows)
    GROUP BY key, split_value
),
quiet AS (
    -- a split value first seen in its key's n-th window had no bad session in the n-1 before
    SELECT f.key, f.split_value, k.seq, 0.0::DOUBLE AS value, k.sessions, 0::BIGINT AS bad
    FROM first_seen AS f
    JOIN (SELECT key, key_window, seq, sessions FROM key_windows WHERE check_name = {{ check_lit }}
          UNION ALL SELECT key, key_window, seq, sessions FROM new_key_windows) AS k
        ON k.key = f.key AND k.key_window < f.first_window
        AND k.key_window >= f.first_window - {{ b.history }}
){% endif %}

SELECT key, split_value, seq, value, sessions, bad
FROM (
    SELECT key, split_value, seq, value, sessions, bad FROM earlier WHERE NOT breach AND value IS NOT NULL
{% if measure.split %}
    UNION ALL
    SELECT key, split_value, seq, value, sessions, bad FROM quiet
{% endif %}
)
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY seq DESC) <= {{ b.history }};

{% if b.method == "ewma" %}
CREATE OR REPLACE TEMP TABLE smoothed AS
WITH RECURSIVE numbered AS (
    SELECT key, split_value, seq, value,
           row_number() OVER (PARTITION BY key, split_value ORDER BY seq) AS step
    FROM new_windows
),
start AS (
    SELECT s.key, s.split_value, coalesce(l.statistic, {{ b.target if b.target is not none else "NULL" }})::DOUBLE AS z
    FROM (SELECT DISTINCT key, split_value FROM new_windows) AS s
    LEFT JOIN (
        SELECT key, split_value, arg_max(statistic, seq) AS statistic
        FROM windows
        WHERE check_name = {{ check_lit }}
        GROUP BY key, split_value
    ) AS l ON {{ m.same_series("s", "l") }}
),
chain(key, split_value, step, seq, z) AS (
    SELECT key, split_value, 0::BIGINT, NULL::BIGINT, z FROM start
    UNION ALL
    SELECT n.key, n.split_value, n.step, n.seq,
           CASE WHEN n.value IS NULL THEN c.z
                ELSE {{ b.lam }} * n.value + {{ 1 - b.lam }} * coalesce(c.z, n.value) END
    FROM chain AS c
    JOIN numbered AS n ON {{ m.same_series("n", "c") }} AND n.step = c.step + 1
)
SELECT key, split_value, seq, z AS statistic FROM chain WHERE step > 0;

{% endif %}
CREATE OR REPLACE TEMP TABLE judged AS
SELECT
{% if b.method == "ewma" %}
    n.*,
    s.statistic,
{% else %}
    *,
{% endif %}
    NULL::DOUBLE AS baseline,
    NULL::BIGINT AS history_windows,
    NULL::DOUBLE AS threshold,
    false AS breach,
    true AS changed
{% if b.method == "ewma" %}
FROM new_windows AS n
LEFT JOIN smoothed AS s ON {{ m.same_series("n", "s") }} AND n.seq = s.seq;
{% else %}
FROM new_windows;
{% endif %}
-- @repeat (with stage 5): until no breach flag changes
CREATE OR REPLACE TEMP TABLE verdicts AS
WITH moving AS (
    SELECT DISTINCT key, split_value FROM judged WHERE changed
),
series_rows AS (
    SELECT h.key, h.split_value, h.seq, h.value, h.sessions, h.bad, false AS is_new, true AS eligible
    FROM history AS h
    SEMI JOIN moving AS s ON h.key = s.key AND h.split_value IS NOT DISTINCT FROM s.split_value
    UNION ALL
    SELECT j.key, j.split_value, j.seq, j.value, j.sessions, j.bad, true, NOT j.breach AND j.value IS NOT NULL
    FROM judged AS j
    SEMI JOIN moving AS s ON j.key = s.key AND j.split_value IS NOT DISTINCT FROM s.split_value
),
numbered AS (
    -- hb: how many eligible windows come before this one; history is the eligible rows with hb in
    -- [hb - history, hb - 1], whatever breached windows lie between them
    SELECT *,
        coalesce(count(*) FILTER (WHERE eligible) OVER (
            PARTITION BY key, split_value ORDER BY seq ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS hb
    FROM series_rows
),
framed AS (
    SELECT
        key, split_value, seq, is_new,
{% if b.method == "rolling_percentile" %}
        quantile_cont(value, {{ b.q }}) FILTER (WHERE eligible) OVER earlier AS baseline,
{% elif b.method == "p_chart" %}
        sum(bad) FILTER (WHERE eligible) OVER earlier
            / nullif(sum(sessions) FILTER (WHERE eligible) OVER earlier, 0) AS baseline,
{% elif b.method == "ewma" %}
        {% if b.target is not none %}{{ b.target }}::DOUBLE{% else %}avg(value) FILTER (WHERE eligible) OVER earlier{% endif %} AS baseline,
        {% if b.sigma is not none %}{{ b.sigma }}::DOUBLE{% else %}stddev_samp(value) FILTER (WHERE eligible) OVER earlier{% endif %} AS spread,
{% endif %}
        count(*) FILTER (WHERE eligible) OVER earlier AS history_windows
    FROM numbered
    WINDOW earlier AS (
        PARTITION BY key, split_value ORDER BY hb RANGE BETWEEN {{ b.history }} PRECEDING AND 1 PRECEDING
    )
)
SELECT key, split_value, seq, baseline, {% if b.method == "ewma" %}spread, {% endif %}history_windows
FROM framed
WHERE is_new;
