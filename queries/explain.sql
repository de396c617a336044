{% import "macros.sql" as m %}
{% set time = "(" ~ source.time.sql ~ ")::TIMESTAMP" %}
{% set count_window = check.window.sessions is not none %}
{% set by_cutoff = check.measure.kind == "quantile" or (check.measure.kind == "ratio" and check.direction != "up") %}
{% set beyond = ">" if check.direction == "up" else "<" %}
{% set peers = check.baseline.method == "peers" %}
-- `plimsoll explain`: where in the attributes a window's bad sessions exceed what was expected.
--
-- The rows: the sessions of one series ($key: its `by` values) in the windows being explained
-- ($spans with in_window: one window, or an alert's breaching windows{{ ", both ends included: count windows" if count_window else ", end excluded: time windows" }})
-- and in its history ($spans without: the series' earlier windows with a healthy verdict), each
-- session once. Each row carries x, its bad count, and n, its weight:
{% if peers %}
-- A peers check compares a series with its peers in the same windows, not with its own past: its
-- "history" is the sessions of its peers ($key's {{ check.baseline.peers_by | join(", ") }}, another {{ (check.by | reject("in", check.baseline.peers_by)) | join(", ") }}) in the
-- windows being explained, so a combination's expected count comes from how its peers fail there.
{% endif %}
{% if check.measure.kind == "rate" %}
--   rate: x = 1 for a bad session, else 0; n = 1.
{% elif by_cutoff %}
--   {{ check.measure.kind }}{{ " falling" if check.direction != "up" }}: x = 1 for a session whose own value ({% if check.measure.kind == "ratio" %}numerator ÷ denominator{% else %}{{ check.measure.of.sql }}{% endif %}) is
--   {{ "above" if check.direction == "up" else "below" }} $cutoff (the threshold the window breached), else 0; n = 1: the
--   affected sessions, as the impact stage counts them, against how often the history's sessions
--   were beyond the same cut-off.
{% else %}
--   ratio: x = its numerator, n = its denominator (the window's value is Σx ÷ Σn).
{% endif %}
-- The attributes examined: {{ attributes | join(", ") }}.
--
-- For every combination c of up to {{ depth }} attributes (GROUPING SETS), in the window: X = Σx,
-- N = Σn; in the history: Xh, Nh. The expected bad count is F = N · r, with the combination's
-- historical rate shrunk toward the series' (R = ΣXh ÷ ΣNh) by a prior worth {{ prior }} rows' weight:
--   r = (Xh + k·R) ÷ (Nh + k),   k = {{ prior }} × (ΣNh ÷ history rows)
-- and its score is the expectation-based Poisson scan statistic (Neill 2009, International Journal
-- of Forecasting 25:498-517): S = X·ln(X/F) − (X − F) where X > F, else 0. Its share of the
-- window's excess (explanatory power, Bhagwan et al. 2014, NSDI) is (X − F) ÷ (ΣX − ΣF).

-- @statement explain.rows
-- The rows, summed per leaf (a full combination of the attributes) in the window and in the
-- history: the rounds below group leaves, not sessions.
CREATE OR REPLACE TEMP TABLE explain_rows AS
SELECT {% for a in attributes %}{{ ("a" ~ loop.index0) | ident }}, {% endfor %}in_window, sum(x) AS x, sum(n) AS n, count(*) AS rows, false AS explained
FROM (
SELECT
    {% for a in attributes %}{{ a | ident }}::VARCHAR AS {{ ("a" ~ loop.index0) | ident }}, {% endfor +%}
    in_window,
{% if check.measure.kind == "rate" %}
    (coalesce({{ check.measure.bad.sql }}, false){% if check.measure.split %} AND {{ check.measure.split | ident }}::VARCHAR IS NOT DISTINCT FROM $split_value{% endif %})::INTEGER::DOUBLE AS x,
    1.0::DOUBLE AS n
{% elif by_cutoff %}
{% set v = "((" ~ check.measure.numerator.sql ~ ")::DOUBLE / nullif((" ~ check.measure.denominator.sql ~ ")::DOUBLE, 0))" if check.measure.kind == "ratio" else "(" ~ check.measure.of.sql ~ ")::DOUBLE" %}
    -- a session without a finite value is left out, as its window left it out
    CASE WHEN isfinite({{ v }}) THEN ({{ v }} {{ beyond }} $cutoff)::INTEGER::DOUBLE END AS x,
    1.0::DOUBLE AS n
{% else %}
    ({{ check.measure.numerator.sql }})::DOUBLE AS x,
    ({{ check.measure.denominator.sql }})::DOUBLE AS n
{% endif %}
FROM (
    SELECT r.*, {{ "r.__in_series" if peers else "h.in_window" }} AS in_window
    FROM (
        SELECT *, {{ time }} AS __event_time{% if peers %},
            {% for column in check.by %}{{ column | ident }}::VARCHAR IS NOT DISTINCT FROM $key[{{ column | literal }}]{{ " AND " if not loop.last }}{% endfor %} AS __in_series{% endif +%}
        FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
        WHERE {{ source.session_id | ident }} IS NOT NULL
          -- one span around them all first, which Parquet statistics can skip row groups by
          AND {{ time }} >= $read_from AND {{ time }} <= $read_until
{% for column in (check.baseline.peers_by if peers else check.by) %}
          AND {{ column | ident }}::VARCHAR IS NOT DISTINCT FROM $key[{{ column | literal }}]
{% endfor %}
{% if check.where %}
          AND coalesce({{ check.where.sql }}, false)
{% endif %}
{% if source.exclude %}
          AND NOT coalesce({{ source.exclude.sql }}, false)
{% endif %}
    ) AS r
    -- the window and the history windows ($spans: start, end, in_window)
    JOIN (SELECT unnest($spans, recursive := true)) AS h
        ON r.__event_time >= h.window_start AND r.__event_time {{ "<=" if count_window else "<" }} h.window_end
    -- each session once: its earliest row
    QUALIFY row_number() OVER (PARTITION BY r.{{ source.session_id | ident }} ORDER BY r.__event_time, {{ "r.__in_series" if peers else "h.in_window" }} DESC) = 1
)
{% if check.measure.kind != "rate" %}
WHERE x IS NOT NULL AND n IS NOT NULL AND isfinite(x) AND isfinite(n)
{% endif %}
)
GROUP BY {% for a in attributes %}{{ ("a" ~ loop.index0) | ident }}, {% endfor %}in_window;

-- @statement explain.totals
-- The window's and the history's totals: the excess to share out, and R.
SELECT
    coalesce(sum(x) FILTER (WHERE in_window), 0) AS window_bad,
    coalesce(sum(n) FILTER (WHERE in_window), 0) AS window_weight,
    coalesce(sum(x) FILTER (WHERE NOT in_window), 0) AS history_bad,
    coalesce(sum(n) FILTER (WHERE NOT in_window), 0) AS history_weight,
    coalesce(sum(rows) FILTER (WHERE NOT in_window), 0) AS history_rows,
    coalesce(sum(rows) FILTER (WHERE in_window), 0) AS window_rows
FROM explain_rows;

-- @statement explain.round
-- One round: every combination over the rows not explained yet with more bad than expected, scored;
-- the best first. The caller takes the best, made finer while one more attribute value holds nearly
-- all of its excess (--: what lies outside it is no longer the problem).
WITH series AS (
    SELECT sum(x) / nullif(sum(n), 0) AS rate, sum(n) / nullif(sum(rows), 0) AS row_weight
    FROM explain_rows
    WHERE NOT in_window
),
cells AS (
    SELECT
        map_from_entries(list_filter([
{% for a in attributes %}
            CASE WHEN grouping({{ ("a" ~ loop.index0) | ident }}) = 0 THEN {'key': {{ a | literal }}, 'value': {{ ("a" ~ loop.index0) | ident }}} END{{ "," if not loop.last }}
{% endfor %}
        ], lambda e: e IS NOT NULL)) AS combination,
        coalesce(sum(x) FILTER (WHERE in_window), 0) AS bad,
        coalesce(sum(n) FILTER (WHERE in_window), 0) AS weight,
        coalesce(sum(x) FILTER (WHERE NOT in_window), 0) AS history_bad,
        coalesce(sum(n) FILTER (WHERE NOT in_window), 0) AS history_weight
    FROM explain_rows
    WHERE NOT explained
    GROUP BY GROUPING SETS ({% for s in sets %}({% for i in s %}{{ ("a" ~ i) | ident }}{{ ", " if not loop.last }}{% endfor %}){{ ", " if not loop.last }}{% endfor %})
),
expected AS (
    SELECT
        c.*,
        c.weight * (c.history_bad + {{ prior }} * s.row_weight * s.rate) / nullif(c.history_weight + {{ prior }} * s.row_weight, 0)
            AS expected
    FROM cells AS c, series AS s
    WHERE c.weight > 0
)
SELECT
    combination,
    bad,
    weight,
    expected,
    CASE WHEN bad > expected AND expected > 0 THEN bad * ln(bad / expected) - (bad - expected) ELSE 0 END AS score
FROM expected
WHERE bad > expected
ORDER BY score DESC, cardinality(combination), combination::VARCHAR
LIMIT {{ candidates }};

-- @statement explain.mark
-- The chosen combination's rows are explained: the next round looks at what is left.
UPDATE explain_rows
SET explained = true
WHERE NOT explained
  AND list_bool_and([
{% for a in attributes %}
      NOT list_contains($names, {{ a | literal }}) OR {{ ("a" ~ loop.index0) | ident }} IS NOT DISTINCT FROM $values[list_position($names, {{ a | literal }})]{{ "," if not loop.last }}
{% endfor %}
  ]);

-- @statement explain.drop
DROP TABLE IF EXISTS explain_rows;
