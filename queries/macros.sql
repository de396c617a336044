{#- Shared pieces of SQL text. Every name passes through the `ident` filter, every constant through
    `literal`; user expressions arrive already regenerated from their checked parse tree. -#}
{% macro key_map(by) -%}
{% if by %}MAP {{ '{' }}{% for col in by %}{{ col | literal }}: {{ col | ident }}::VARCHAR{{ ", " if not loop.last }}{% endfor %}{{ '}' }}{% else %}map([]::VARCHAR[], []::VARCHAR[]){% endif %}
{%- endmacro %}
{% macro key_text(by) -%}
{% if by %}{% for col in by %}{{ (col ~ "=") | literal }} || coalesce({{ col | ident }}::VARCHAR, '<null>'){{ " || ', ' || " if not loop.last }}{% endfor %}{% else %}''{% endif %}
{%- endmacro %}
{% macro same_series(a, b) -%}
{{ a }}.key = {{ b }}.key AND {{ a }}.split_value IS NOT DISTINCT FROM {{ b }}.split_value
{%- endmacro %}
