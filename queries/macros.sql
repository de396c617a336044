{#- Shared pieces of SQL text. Every name passes through the `ident` filter, every constant through
    `literal`; user expressions arrive already regenerated from their checked parse tree. -#}
{#- While sessions are windowed, a series key is a STRUCT of the `by` values as text (cheap to sort
    and join); windows, alerts and state store it as MAP(VARCHAR, VARCHAR). A check without `by` has
    the single key ''. -#}
{% macro key_struct(by) -%}
{% if by %}{{ '{' }}{% for col in by %}{{ col | literal }}: {{ col | ident }}::VARCHAR{{ ", " if not loop.last }}{% endfor %}{{ '}' }}{% else %}''{% endif %}
{%- endmacro %}
{% macro to_map(expr, by) -%}
{% if by %}MAP {{ '{' }}{% for col in by %}{{ col | literal }}: struct_extract({{ expr }}, {{ col | literal }}){{ ", " if not loop.last }}{% endfor %}{{ '}' }}{% else %}map([]::VARCHAR[], []::VARCHAR[]){% endif %}
{%- endmacro %}
{% macro from_map(expr, by) -%}
{% if by %}{{ '{' }}{% for col in by %}{{ col | literal }}: {{ expr }}[{{ col | literal }}]{{ ", " if not loop.last }}{% endfor %}{{ '}' }}{% else %}''{% endif %}
{%- endmacro %}
{% macro key_text(expr, by) -%}
{% if by %}{% for col in by %}{{ (col ~ "=") | literal }} || coalesce(struct_extract({{ expr }}, {{ col | literal }}), '<null>'){{ " || ', ' || " if not loop.last }}{% endfor %}{% else %}''{% endif %}
{%- endmacro %}
{% macro same_series(a, b) -%}
{{ a }}.key = {{ b }}.key AND {{ a }}.split_value IS NOT DISTINCT FROM {{ b }}.split_value
{%- endmacro %}
