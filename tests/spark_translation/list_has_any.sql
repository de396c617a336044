-- DuckDB's list_has_any is Spark's arrays_overlap.
-- duckdb:
SELECT list_has_any(codes, ['E1', 'E2']) AS any_code FROM lake_rows
-- spark:
SELECT
  ARRAYS_OVERLAP(codes, ARRAY('E1', 'E2')) AS any_code
FROM lake_rows
