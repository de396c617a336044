-- Only make_timestamp of microseconds is translated; epoch_ms (milliseconds) is not.
-- duckdb:
SELECT epoch_ms(ended_ms) AS ended_at FROM arrivals
-- refused:
make_timestamp with scale 3: only microseconds are translated
