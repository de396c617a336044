-- Spark's RLIKE matches anywhere in the text: the whole pattern is anchored.
-- duckdb:
SELECT regexp_full_match(title_id, 't-[0-9]+') AS plain FROM lake_rows
-- spark:
SELECT
  title_id RLIKE CONCAT('^(?:', 't-[0-9]+', ')$') AS plain
FROM lake_rows
