-- What a run asks of a source's new files before reading them (toolkit/lake/files.py): their
-- columns and types from the Parquet footers, the types the source's checks read, partition
-- folders that contradict their files, and, for a backlog, each file's first event time. The
-- footers and the partition checks run on a connection of their own, so a file that is not
-- Parquet cannot abort the run's transaction.

-- @statement lake.footers
-- Each new file's top-level columns and their DuckDB types ($files), from its footer alone.
SELECT file_name, name, duckdb_type FROM parquet_schema($files) WHERE duckdb_type IS NOT NULL;

-- @statement lake.footer
-- When the footers cannot be read together: each file's alone ($files holding one), to name the
-- file that is not readable Parquet.
SELECT 1 FROM parquet_schema($files) LIMIT 1;

-- @statement lake.known_columns
-- The type of each column the source's checks read, as first recorded ($source).
SELECT column_name, column_type, first_path FROM source_columns WHERE source_name = $source;

-- @statement lake.record_column
-- A column read for the first time: the type later files must keep.
INSERT INTO source_columns VALUES ($source, $column, $type, $path);
{% if partition %}

-- @statement lake.partition
-- Sessions of one file ($files) in a partition folder whose own column says otherwise than the
-- folder's value ($value, read as the column's type): DuckDB would take the folder's value and
-- move them. The column's type in the file is a plain type name, checked before it is written here.
SELECT count(*) AS contradicting, any_value({{ partition.column | ident }}::VARCHAR) AS file_value
FROM read_parquet($files, hive_partitioning = false)
WHERE {{ partition.column | ident }} IS DISTINCT FROM TRY_CAST($value AS {{ partition.type }});
{% endif %}
{% if source %}

-- @statement lake.first_event_times
-- A backlog larger than max_read_per_run is read in data-time order: each new file's earliest sane
-- event time (finite, no later than its $limits entry: the file's time + max_future).
SELECT file_index, min(t) AS first_event_time
FROM (
    SELECT file_index, ({{ source.time.sql if source.time else source.event_time | ident }})::TIMESTAMP AS t
    FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
)
WHERE isfinite(t) AND t <= $limits[file_index::BIGINT + 1]
GROUP BY file_index;
{% endif %}
