-- DuckDB's filename column is the path the run listed; Spark reports the file as a URL
-- (file:/a%20b/...), decoded back to that path ('+' kept: URL_DECODE would make it a space).
-- duckdb:
SELECT filename AS location, count(*) AS rows FROM read_parquet($files, filename = true) GROUP BY filename
-- spark:
SELECT
  URL_DECODE(REPLACE(REGEXP_REPLACE(__spark_file, '^file:', ''), '+', '%2B')) AS location,
  COUNT(*) AS rows
FROM lake_files
GROUP BY
  URL_DECODE(REPLACE(REGEXP_REPLACE(__spark_file, '^file:', ''), '+', '%2B'))
