-- QUALIFY stays: Spark 4 runs it, and rewriting it into a subquery would add a column to SELECT *.
-- An ascending ORDER BY gains NULLS LAST: DuckDB sorts NULLs last, Spark first.
-- duckdb:
SELECT * FROM windows_seen QUALIFY row_number() OVER (PARTITION BY key ORDER BY seq) = 1
-- spark:
SELECT
  *
FROM windows_seen
QUALIFY
  ROW_NUMBER() OVER (PARTITION BY key ORDER BY seq NULLS LAST) = 1
