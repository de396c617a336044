-- A MAP that is not a series key has no Spark form here (Spark cannot group or join on it).
-- duckdb:
SELECT MAP {'site': site} AS m FROM arrivals
-- refused:
a MAP other than a series key: MAP {'site': site}
