-- read_parquet($files) is the view the read step makes of the run's new files on Spark.
-- duckdb:
SELECT * FROM read_parquet($files, filename = true, hive_partitioning = true, union_by_name = true)
-- spark:
SELECT
  *
FROM lake_files
