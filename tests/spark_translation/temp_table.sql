-- A DuckDB temp table is a temporary view on Spark: the runner materializes the views it reuses.
-- duckdb:
CREATE OR REPLACE TEMP TABLE counted AS SELECT key, count(*) AS sessions FROM arrivals GROUP BY key
-- spark:
CREATE OR REPLACE TEMPORARY VIEW counted AS
SELECT
  key,
  COUNT(*) AS sessions
FROM arrivals
GROUP BY
  key
