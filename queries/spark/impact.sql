{% import "spark/moves.sql" as move %}
-- ── stage 4b · impact, on Spark ────────────────────────────────────────────────────────────
-- The breaching windows go to Spark, where the sessions are; each one's affected sessions come
-- back, and the windows get their impact in the warehouse as with DuckDB.
-- @duckdb breaching
-- @to-spark breaching
SELECT * FROM breaching;
-- @translate affected_registers
{{ move.to_duckdb("affected_registers") }}
-- @duckdb judged
