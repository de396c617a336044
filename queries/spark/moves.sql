{% import "macros.sql" as m %}
{#- Rows moved between the engines, written as the directives toolkit/spark_sql.py reads. A series key
    is a STRUCT in Spark (Spark cannot group or join on MAPs) and a MAP in the warehouse: it changes
    form on the DuckDB side, with the warehouse's own macros. -#}
{% macro to_spark(table, where, by=none) -%}
-- @to-spark {{ table }}
SELECT *{% if by is not none %} REPLACE ({{ m.from_map("key", by) }} AS key){% endif %} FROM {{ table }} WHERE {{ where }};
{%- endmacro %}
{% macro to_duckdb(table, by=none) -%}
-- @to-duckdb spark_{{ table }}
SELECT * FROM {{ table }};
-- @duckdb
CREATE OR REPLACE TEMP TABLE {{ table }} AS
SELECT *{% if by is not none %} REPLACE ({{ m.to_map("key", by) }} AS key){% endif %} FROM spark_{{ table }};
{%- endmacro %}
