{% import "macros.sql" as m %}
{% import "spark/moves.sql" as move %}
{% set check_lit = check.name | literal %}
-- ── stage 3 · measure, on Spark ────────────────────────────────────────────────────────────
-- DuckDB's statements, translated; the key windows and windows go back to the warehouse, where the
-- baselines and the life cycle run as with DuckDB.
{% if measure.split %}
-- @to-spark series_state
SELECT check_name, {{ m.from_map("key", check.by) }} AS key, split_value
FROM series_state
WHERE check_name = {{ check_lit }};
{% endif %}
{% if measure.kind == "rate" and measure.split %}
-- @translate split_counts
{% endif %}
-- @translate key_window_stats
-- @translate new_key_windows
-- @translate new_windows
{{ move.to_duckdb("new_key_windows", check.by) }}
{{ move.to_duckdb("new_windows", check.by) }}
