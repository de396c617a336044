-- The copies of the tables analysts read, published as Parquet beside the warehouse after every
-- run (toolkit/engine/warehouse.py), and read in their place while a run holds the warehouse. Each
-- copy is written under a temporary name ($path) and renamed, so a reader never sees half a file.
{% for table in tables %}

-- @statement publish.{{ table }}
COPY (SELECT * FROM {{ table | ident }}) TO $path (FORMAT parquet);
{% endfor %}
{% for table, path in copies %}

-- @statement read.{{ table }}
CREATE VIEW {{ table | ident }} AS SELECT * FROM read_parquet({{ path | literal }});
{% endfor %}
