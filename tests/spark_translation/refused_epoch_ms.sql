-- Only make_timestamp of microseconds is translated; epoch_ms (milliseconds) is not.
-- duckdb:
SELECT epoch_ms(ended_ms) AS ended_at FROM arrivals
-- refused:
a timestamp from epoch milliseconds (epoch_ms) has no Spark translation here; write make_timestamp(epoch microseconds), e.g. make_timestamp(ended_ms * 1000)
