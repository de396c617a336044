-- The copies of the tables analysts read, published as Parquet beside the warehouse after every
-- run (toolkit/engine/warehouse.py), and read in their place while a run holds the warehouse. Each
-- file is written under a temporary name ($path) and renamed, so a reader never sees half a file.
-- The small tables are copied whole. `windows`, which grows with every run, is a folder of parts
-- (`windows/`, a link to the folder of the latest copy): a run adds a part holding its own rows,
-- and only a run that took rows away (a rebuild, a removed check) or a new layout copies it whole.
{% for table in tables %}
{% if table == "windows" %}

-- @statement publish.windows.published
-- What the copy must hold now ($through: the last run whose rows it holds): every row, the rows of
-- runs up to $through still here (fewer than the copy holds: a rebuild or a removed check took some
-- away, and the copy is made whole again), the last run with rows, and the table's layout.
SELECT
    count(*) AS rows_now,
    count(*) FILTER (WHERE NOT coalesce(run_id > $through, false)) AS rows_through,
    max(run_id) AS last_run,
    (SELECT max(version) FROM schema_version) AS layout,
    (SELECT list(column_name || ' ' || data_type ORDER BY column_index)
     FROM duckdb_columns() WHERE database_name = current_database() AND schema_name = 'main' AND table_name = 'windows') AS columns
FROM "windows";

-- @statement publish.windows.whole
-- The whole table, as the copy's one part.
COPY (SELECT * FROM "windows") TO $path (FORMAT parquet);

-- @statement publish.windows.runs
-- The rows of the runs after $after, up to $through: the part a run adds.
COPY (SELECT * FROM "windows" WHERE run_id > $after AND run_id <= $through) TO $path (FORMAT parquet);

-- @statement publish.windows.merge
-- Parts of the same size made one ($parts), so a copy stays a few files however many runs it holds.
COPY (SELECT * FROM read_parquet($parts)) TO $path (FORMAT parquet);
{% else %}

-- @statement publish.{{ table }}
COPY (SELECT * FROM {{ table | ident }}) TO $path (FORMAT parquet);
{% endif %}
{% endfor %}
{% for table, path in copies %}

-- @statement read.{{ table }}
CREATE VIEW {{ table | ident }} AS SELECT * FROM read_parquet({{ path | literal }});
{% endfor %}
