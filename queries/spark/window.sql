{% import "spark/moves.sql" as move %}
{% set check_lit = check.name | literal %}
-- ── stage 2 · window, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated, with the series' last windows and the partial windows carried
-- from the warehouse{% if window.kind == "count" %}; Spark has neither ASOF joins nor aggregates in
-- recursive queries, so the cuts are found another way (below){% endif %}.
{{ move.to_spark("key_state", "check_name = " ~ check_lit, check.by) }}
{{ move.to_spark("carry", "check_name = " ~ check_lit, check.by) }}
-- @translate series_last
{% if window.kind == "count" %}
-- @translate pooled
{% set n = window.sessions %}
{% set wait_us = (window.max_wait.total_seconds() * 1000000) | int %}
-- @spark cuts
-- Cuts: window starts that cannot fill; each either times out (the watermark has passed
-- start + max_wait: the window closes with the sessions up to position lim, the last one no later
-- than {{ window.max_wait | interval }} after its start) or stays open and is carried. lim counts the
-- series' sessions up to that moment with a range frame over their event times.
CREATE OR REPLACE TEMP TABLE cuts AS
SELECT key, i, lim, times_out
FROM (
    SELECT key, i, is_cut,
           count(*) OVER (PARTITION BY key ORDER BY epoch_us(event_time)
                          RANGE BETWEEN UNBOUNDED PRECEDING AND {{ wait_us }} FOLLOWING) - 1 AS lim,
           event_time + {{ window.max_wait | interval }} < (SELECT current FROM watermarks) AS times_out
    FROM pooled
) AS p
WHERE is_cut;

-- @spark next_cut
-- Where a span of full windows can start (the start of the pool, and just behind each cut that
-- times out), and the first cut on that span's stride (at or after the start, a multiple of
-- {{ n }} sessions on): for every start at once, the smallest cut not before it in its stride class.
CREATE OR REPLACE TEMP TABLE next_cut AS
WITH starts AS (
    SELECT DISTINCT key, 0::BIGINT AS span_start FROM pooled
    UNION
    SELECT key, lim + 1 AS span_start FROM cuts WHERE times_out
),
marks AS (
    SELECT key, span_start AS at, false AS is_cut FROM starts
    UNION ALL
    SELECT key, i AS at, true AS is_cut FROM cuts
),
found AS (
    SELECT key, at AS span_start, is_cut,
           min(CASE WHEN is_cut THEN at END) OVER (
               PARTITION BY key, at % {{ n }} ORDER BY at DESC, is_cut DESC
               ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS cut_start
    FROM marks
)
SELECT f.key, f.span_start, f.cut_start, c.lim AS cut_end, c.times_out AS cut_closes
FROM found AS f
LEFT JOIN cuts AS c ON c.key = f.key AND c.i = f.cut_start
WHERE NOT f.is_cut;

-- @to-duckdb spark_next_cut
SELECT key, span_start, cut_start, cut_end, cut_closes FROM next_cut;

-- @duckdb full_window_spans
-- Spans of full windows per series, from the start of the pool to the first cut on the span's
-- stride; after a cut that times out the next span starts behind it. The walk is sequential within
-- a series, so it runs in the warehouse over next_cut (a row per start, not per session): one step
-- per cut, all series at once.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
WITH RECURSIVE span AS (
    SELECT key, span_start, cut_start, cut_end, cut_closes FROM spark_next_cut WHERE span_start = 0
    UNION ALL
    SELECT n.key, n.span_start, n.cut_start, n.cut_end, n.cut_closes
    FROM span AS s
    JOIN spark_next_cut AS n ON n.key = s.key AND n.span_start = s.cut_end + 1
    WHERE s.cut_closes
)
SELECT key, span_start, cut_start, cut_end, cut_closes FROM span;

-- @to-spark full_window_spans
SELECT key, span_start, cut_start, cut_end, cut_closes FROM full_window_spans;
-- @translate placed
-- @translate closed_windows
-- @translate window_sessions
-- @translate carry_next
-- @translate window_counts
{% else %}
-- @translate stamped
-- @translate window_counts
-- @translate window_sessions
-- @translate carry_next
{% endif %}
{{ move.to_duckdb("carry_next", check.by) }}
{{ move.to_duckdb("window_counts") }}
