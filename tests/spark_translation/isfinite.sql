-- Spark has no isfinite: x - x is 0 for a finite number and NaN for NaN and for either infinity.
-- duckdb:
SELECT CASE WHEN isfinite(startup_ms) THEN startup_ms END AS x FROM lake_rows
-- spark:
SELECT
  CASE WHEN (
    (
      startup_ms - startup_ms
    ) = 0
  ) THEN startup_ms END AS x
FROM lake_rows
