-- A function sqlglot does not know for Spark is refused, never passed through by name.
-- duckdb:
SELECT damerau_levenshtein(title_id, 't-1') AS d FROM arrivals
-- refused:
damerau_levenshtein() has no known Spark SQL translation
