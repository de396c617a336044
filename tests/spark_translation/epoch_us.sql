-- epoch_us, which sqlglot passes through by name, is Spark's UNIX_MICROS.
-- duckdb:
SELECT epoch_us(event_time) - epoch_us(window_start) AS us FROM placed
-- spark:
SELECT
  UNIX_MICROS(event_time) - UNIX_MICROS(window_start) AS us
FROM placed
