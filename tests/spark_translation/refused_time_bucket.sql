-- time_bucket has no Spark form sqlglot writes correctly: refused with what to write instead.
-- duckdb:
SELECT time_bucket(INTERVAL 1 HOUR, ended_at) AS hour FROM lake_rows
-- refused:
time_bucket() has no Spark SQL translation; write the bucket with arithmetic on epoch_us()
