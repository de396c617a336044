-- A series key is a MAP in the warehouse but stays a STRUCT on Spark, which cannot group or join
-- on MAPs: a MAP built from the struct's own fields is the struct.
-- duckdb:
SELECT MAP {'site': struct_extract(key, 'site'), 'cdn': struct_extract(key, 'cdn')} AS key, sessions FROM counted
-- spark:
SELECT
  key AS key,
  sessions
FROM counted
