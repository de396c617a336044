{% import "spark/moves.sql" as move %}
-- ── stage 1 · scan, on Spark ───────────────────────────────────────────────────────────────
-- DuckDB's statements, translated; the check's watermark comes from the warehouse.
{{ move.to_spark("check_state", "check_name = " ~ (check.name | literal)) }}
-- @translate arrivals
-- @translate watermarks
-- @translate scan_counts
{{ move.to_duckdb("watermarks") }}
{{ move.to_duckdb("scan_counts") }}
