-- ── stage 3 · measure, on Spark ────────────────────────────────────────────────────────────
-- DuckDB's statements, translated; the key windows and windows go back to the warehouse, where the
-- baselines and the life cycle run as with DuckDB.

-- [on Spark]
/* ── stage 3 · measure ────────────────────────────────────────────────────────────────────── */
/* quantile_cont("startup_ms", 0.9) over the window's sessions (NULL values left out). */
CREATE OR REPLACE TEMPORARY VIEW key_window_stats AS
SELECT
  key AS key,
  'site=' || CASE
    WHEN key.site IS NULL
    THEN '<null>'
    WHEN key.site RLIKE '^[\\p{L}\\p{N}_.:/@+-]+$'
    THEN key.site
    ELSE '"' || REPLACE(REPLACE(key.site, '\\', '\\\\'), '"', '\\"') || '"'
  END AS key_text,
  window_number,
  MIN(window_start) AS window_start,
  MAX(window_end) AS window_end,
  COUNT(*) AS sessions,
  CAST(NULL AS BIGINT) AS bad,
  PERCENTILE(quantile_input, 0.9) AS value
FROM window_sessions
GROUP BY
  key,
  window_number;

-- [on Spark]
/* key_window: the ordinal of the window among all of its key's windows, across runs */
CREATE OR REPLACE TEMPORARY VIEW new_key_windows AS
SELECT
  w.*,
  COALESCE(s.windows, 0) + ROW_NUMBER() OVER (PARTITION BY w.key ORDER BY w.window_number NULLS LAST) AS key_window
FROM key_window_stats AS w
LEFT JOIN key_state AS s
  ON s.check_name = 'golden' AND s.key = w.key;

-- [on Spark]
CREATE OR REPLACE TEMPORARY VIEW new_windows AS
SELECT
  key,
  key_text,
  CAST(NULL AS STRING) AS split_value,
  window_number,
  key_window,
  window_start,
  window_end,
  sessions,
  bad,
  value
FROM new_key_windows;

-- [Spark rows -> DuckDB relation spark_new_key_windows]
SELECT
  *
FROM new_key_windows;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE new_key_windows AS
SELECT * REPLACE (MAP {'site': struct_extract(key, 'site')} AS key) FROM spark_new_key_windows;

-- [Spark rows -> DuckDB relation spark_new_windows]
SELECT
  *
FROM new_windows;

-- [on DuckDB (the warehouse)]
CREATE OR REPLACE TEMP TABLE new_windows AS
SELECT * REPLACE (MAP {'site': struct_extract(key, 'site')} AS key) FROM spark_new_windows;
