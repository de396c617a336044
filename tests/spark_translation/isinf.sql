-- Spark has no isinf: a number is infinite when its absolute value equals infinity.
-- duckdb:
SELECT isinf(startup_ms) AS inf FROM lake_rows
-- spark:
SELECT
  (
    ABS(startup_ms) = CAST('Infinity' AS DOUBLE)
  ) AS inf
FROM lake_rows
