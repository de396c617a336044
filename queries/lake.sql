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

-- @statement lake.delta_added
-- A Delta table's commits after the version a check read ($logs: their _delta_log/<version>.json
-- files): the data files they appended (add actions with dataChange), each at its latest add,
-- leaving out those a later commit removed as a change of data (deleted or rewritten before any run
-- read them). Files removed since only by compaction (dataChange false) hold rows no run has
-- counted: they are read from their own files while storage still holds them (still_held false).
WITH actions AS (
    SELECT regexp_extract(filename, '([0-9]+)\.json$', 1)::BIGINT AS version, json
    FROM read_json_objects($logs, filename = true, format = 'newline_delimited')
),
added AS (
    SELECT json ->> '$.add.path' AS path, (json ->> '$.add.size')::BIGINT AS size,
           (json ->> '$.add.modificationTime')::BIGINT AS modified_ms, version,
           (json ->> '$.add.deletionVector') IS NOT NULL AS deletion_vector
    FROM actions
    WHERE json ->> '$.add.path' IS NOT NULL AND coalesce((json ->> '$.add.dataChange')::BOOLEAN, true)
    QUALIFY row_number() OVER (PARTITION BY json ->> '$.add.path' ORDER BY version DESC) = 1
),
removed AS (
    SELECT json ->> '$.remove.path' AS path, version,
           coalesce((json ->> '$.remove.dataChange')::BOOLEAN, true) AS data_change
    FROM actions
    WHERE json ->> '$.remove.path' IS NOT NULL
)
SELECT
    a.path, a.size, a.modified_ms, a.version, a.deletion_vector,
    NOT EXISTS (SELECT 1 FROM removed AS r WHERE r.path = a.path AND r.version > a.version) AS still_held
FROM added AS a
WHERE NOT EXISTS (SELECT 1 FROM removed AS r WHERE r.path = a.path AND r.version > a.version AND r.data_change)
ORDER BY a.path;

-- @statement lake.delta_changes
-- The same commits' changes of data, which a run reports: each commit that removed files as a
-- change of data (a delete, update, merge or overwrite), its operation, and the files it wrote and
-- removed. Of those it removed, the ones that a commit after the version read had added: the files
-- before it were all counted by the check, those after it maybe not; and how many of them a
-- compaction had written (see toolkit/lake/tables.py).
WITH actions AS (
    SELECT regexp_extract(filename, '([0-9]+)\.json$', 1)::BIGINT AS version, json
    FROM read_json_objects($logs, filename = true, format = 'newline_delimited')
),
added_since AS (
    SELECT json ->> '$.add.path' AS path,
           bool_and(NOT coalesce((json ->> '$.add.dataChange')::BOOLEAN, true)) AS by_compaction
    FROM actions
    WHERE json ->> '$.add.path' IS NOT NULL
    GROUP BY ALL
)
SELECT
    version,
    any_value(json ->> '$.commitInfo.operation') AS operation,
    count(*) FILTER (WHERE json ->> '$.remove.path' IS NOT NULL
                       AND coalesce((json ->> '$.remove.dataChange')::BOOLEAN, true)) AS removed,
    list(json ->> '$.add.path' ORDER BY json ->> '$.add.path')
        FILTER (WHERE json ->> '$.add.path' IS NOT NULL
                  AND coalesce((json ->> '$.add.dataChange')::BOOLEAN, true)) AS written,
    list(json ->> '$.remove.path' ORDER BY json ->> '$.remove.path')
        FILTER (WHERE json ->> '$.remove.path' IN (SELECT path FROM added_since)
                  AND coalesce((json ->> '$.remove.dataChange')::BOOLEAN, true)) AS removed_since,
    -- files a compaction after the version read wrote, which this commit deleted from or rewrote:
    -- the files compacted into them then no longer say which of their rows are still in the table
    count(*) FILTER (WHERE json ->> '$.remove.path' IN (SELECT path FROM added_since WHERE by_compaction)
                       AND coalesce((json ->> '$.remove.dataChange')::BOOLEAN, true)) AS removed_compacted
FROM actions
GROUP BY version
HAVING removed > 0
ORDER BY version;
