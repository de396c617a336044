-- quantile_cont is exact, interpolating linearly between the two nearest values; so is Spark's
-- PERCENTILE (not PERCENTILE_APPROX, and not PERCENTILE_CONT, which Spark takes only WITHIN GROUP).
-- duckdb:
SELECT key, quantile_cont(x, 0.9) AS value FROM arrivals GROUP BY key
-- spark:
SELECT
  key,
  PERCENTILE(x, 0.9) AS value
FROM arrivals
GROUP BY
  key
