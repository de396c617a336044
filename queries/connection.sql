-- The settings every connection to the warehouse gets (toolkit/engine/warehouse.py): data time is
-- UTC, and the project's memory limit and threads bound what DuckDB takes.

-- @statement connection.time_zone
SET TimeZone = 'UTC';

-- @statement connection.memory_limit
-- Beyond this ($limit, e.g. 1400MB) DuckDB spills to disk beside the warehouse.
SET memory_limit = $limit;

-- @statement connection.threads
SET threads = $threads;
