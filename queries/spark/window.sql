{% import "macros.sql" as m %}
{% import "spark/moves.sql" as move %}
{% set check_lit = check.name | literal %}
-- ── stage 2 · window, on Spark ─────────────────────────────────────────────────────────────
-- DuckDB's statements, translated, with the series' last windows and the partial windows carried
-- from the warehouse{% if window.kind == "count" %}; the walk from span to span runs in the warehouse{% endif %}.
{{ move.to_spark("key_state", "check_name = " ~ check_lit, check.by) }}
{{ move.to_spark("carry", "check_name = " ~ check_lit, check.by) }}
-- @translate series_last
{% if window.kind == "count" %}
-- @spark series_ids
-- On Spark a temp table is a view, computed afresh at every read, and row_number wants an order:
-- the series are numbered in key order, so every read gives each the same number.
CREATE OR REPLACE TEMP TABLE series_ids AS
SELECT k.key, (row_number() OVER (ORDER BY k.key))::BIGINT AS series, s.last_window_number, s.last_end
FROM (
    SELECT key FROM arrivals
    UNION
    SELECT {{ m.from_map("key", check.by) }} FROM carry WHERE check_name = {{ check_lit }}
) AS k
LEFT JOIN series_last AS s ON s.key = k.key;
-- @translate pooled
-- @translate tie_positions
-- @translate cuts
-- @translate span_ends
-- @to-duckdb spark_span_ends
SELECT series, span_start, cut_start, cut_end, cut_closes FROM span_ends;
-- @duckdb full_window_spans
-- The walk is sequential within a series: it runs in the warehouse over the spans (a row per
-- span, not per session), and its spans go back to Spark to place the sessions.
CREATE OR REPLACE TEMP TABLE full_window_spans AS
{{ m.walk_spans("spark_span_ends", "series") }};
-- @to-spark full_window_spans
SELECT series, span_start, cut_start, cut_end, cut_closes FROM full_window_spans;
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
