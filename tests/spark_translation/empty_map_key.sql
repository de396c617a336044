-- A check without by has the empty MAP as its key in the warehouse and '' on Spark.
-- duckdb:
SELECT map([]::VARCHAR[], []::VARCHAR[]) AS key, sessions FROM counted
-- spark:
SELECT
  '' AS key,
  sessions
FROM counted
