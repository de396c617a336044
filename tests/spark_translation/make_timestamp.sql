-- make_timestamp of microseconds is a naive timestamp: TIMESTAMP_MICROS gives Spark's local one,
-- so it is cast to TIMESTAMP_NTZ. epoch_us is UNIX_MICROS, and DuckDB's integer division // is DIV.
-- duckdb:
SELECT make_timestamp(epoch_us(event_time) // 3600000000 * 3600000000) AS window_start FROM arrivals
-- spark:
SELECT
  CAST(TIMESTAMP_MICROS(UNIX_MICROS(event_time) DIV 3600000000 * 3600000000) AS TIMESTAMP_NTZ) AS window_start
FROM arrivals
