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
{#- A key as text, `site=kids, title_id=t-1187`: one text per key and one key per text. A value of
    letters, digits and _.:/@+- is written as it is; any other (spaces, commas, quotes, '=', the
    empty text) in double quotes with \ and " escaped; a NULL as <null>, which no written value
    can be. -#}
{% macro key_text(expr, by) -%}
{% if by %}{% for col in by %}{{ (col ~ "=") | literal }} || {{ key_value("struct_extract(" ~ expr ~ ", " ~ (col | literal) ~ ")") }}{{ " || ', ' || " if not loop.last }}{% endfor %}{% else %}''{% endif %}
{%- endmacro %}
{% macro key_value(v) -%}
CASE WHEN {{ v }} IS NULL THEN '<null>' WHEN regexp_matches({{ v }}, '^[\p{L}\p{N}_.:/@+-]+$') THEN {{ v }} ELSE '"' || replace(replace({{ v }}, '\', '\\'), '"', '\"') || '"' END
{%- endmacro %}
{#- An md5 in hex (the digest's 16 bytes in order, as Spark and md5() give it) as md5_number's
    value: the same bytes read as a little-endian 128-bit number. -#}
{% macro md5_hex_number(h) -%}
('0x' || {% for k in range(15, -1, -1) %}substr({{ h }}, {{ 2 * k + 1 }}, 2){{ " || " if not loop.last }}{% endfor %})::UHUGEINT
{%- endmacro %}
{#- The columns a measure reads from each session: the window stage moves only these (and, when the
    source names its viewers, the session's place in the viewer sketch). -#}
{% macro inputs(measure, source) -%}
{% if measure.kind == "rate" %}is_bad, split_value{% elif measure.kind == "ratio" %}numerator, denominator{% else %}quantile_input{% endif %}{% if source.viewer_id %}, viewer_point{% endif %}
{%- endmacro %}
{#- HyperLogLog (Flajolet, Fusy, Gandouet and Meunier 2007) with m = 2^10 = 1024 registers: relative
    standard error about 1.04/√m = 3.25 %, and a sketch of at most 1024 small numbers per window.
    A viewer's 64-bit hash is the first 8 bytes of the md5 of its id as text (md5 is the same in
    every DuckDB release, unlike hash()); its top 10 bits pick the register, and its rank is the
    position of the first 1-bit in the other 54 (55 when they are all 0). The session keeps only
    register × 64 + rank, its viewer point; a sketch is the list of the largest point of each
    register it has seen, sorted. Sketches merge by taking each register's largest rank. -#}
{% macro viewer_hash(v) -%}
('0x' || substr(md5(({{ v }})::VARCHAR), 1, 16))::UBIGINT
{%- endmacro %}
{% macro viewer_point_of(h) -%}
CASE WHEN {{ h }} IS NOT NULL THEN ({{ h }} >> 54)::INTEGER * 64 + CASE WHEN ({{ h }} & 18014398509481983) = 0 THEN 55 ELSE 55 - length(bin({{ h }} & 18014398509481983)) END END
{%- endmacro %}
{% macro viewer_point(v) -%}
{{ viewer_point_of(viewer_hash(v)) }}
{%- endmacro %}
{#- The estimate from a sketch's `registers` (how many registers are set) and `inverse_sum` (Σ 2^-rank
    over them): E = α·m² / (empty registers + Σ 2^-rank), α = 0.7213 / (1 + 1.079/m); below 5m/2
    with empty registers left, linear counting m·ln(m / empty) instead. Rounded to a whole viewer. -#}
{% macro hll_count(registers, inverse_sum) -%}
round(CASE WHEN 0.7213 / (1 + 1.079 / 1024) * 1048576 / (1024 - ({{ registers }}) + ({{ inverse_sum }})) <= 2560 AND ({{ registers }}) < 1024 THEN 1024 * ln(1024 / (1024 - ({{ registers }}))) ELSE 0.7213 / (1 + 1.079 / 1024) * 1048576 / (1024 - ({{ registers }}) + ({{ inverse_sum }})) END)::BIGINT
{%- endmacro %}
{#- The estimate of a stored sketch (a list of viewer points); NULL stays NULL. -#}
{% macro hll_estimate(sketch) -%}
{{ hll_count("len(" ~ sketch ~ ")", "coalesce(list_sum(list_transform(" ~ sketch ~ ", lambda p: 2.0 ^ -(p % 64))), 0.0)") }}
{%- endmacro %}
{% macro same_series(a, b) -%}
{{ a }}.key = {{ b }}.key AND {{ a }}.split_value IS NOT DISTINCT FROM {{ b }}.split_value
{%- endmacro %}
{#- Wilson (1927) score interval for x of n at normal quantile z:
    (p̂ + z²/2n ∓ z·√(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n), p̂ = x/n. -#}
{% macro wilson_lower(x, n, z) -%}
greatest(0.0, (({{ x }}) / ({{ n }}) + ({{ z }}) ^ 2 / (2 * ({{ n }})) - ({{ z }}) * sqrt((({{ x }}) / ({{ n }})) * (1 - ({{ x }}) / ({{ n }})) / ({{ n }}) + ({{ z }}) ^ 2 / (4 * ({{ n }}) ^ 2))) / (1 + ({{ z }}) ^ 2 / ({{ n }})))
{%- endmacro %}
{% macro wilson_upper(x, n, z) -%}
least(1.0, (({{ x }}) / ({{ n }}) + ({{ z }}) ^ 2 / (2 * ({{ n }})) + ({{ z }}) * sqrt((({{ x }}) / ({{ n }})) * (1 - ({{ x }}) / ({{ n }})) / ({{ n }}) + ({{ z }}) ^ 2 / (4 * ({{ n }}) ^ 2))) / (1 + ({{ z }}) ^ 2 / ({{ n }})))
{%- endmacro %}
{#- x ÷ w rounded down, for a window's number: times before 1970 are negative and must fall in the
    window they belong to (integer division alone rounds toward zero). -#}
{% macro floor_div(x, w) -%}
({{ x }} - (({{ x }}) % {{ w }} + {{ w }}) % {{ w }}) // {{ w }}
{%- endmacro %}
{#- The source stage's two writes to the id memory, on either engine: remember each kept id with
    the file it was kept from (`kept`: id_hash, first_path, event_time), only pairs not yet known (a
    check catching up on files others read may keep ids they kept from older files); then forget
    ids more than dedup_horizon behind the data every check of the source has read. -#}
{% macro remember_ids(source, kept) -%}
INSERT INTO session_ids BY NAME
SELECT {{ source.name | literal }} AS source_name, k.id_hash, k.first_path, k.event_time
FROM ({{ kept }}) AS k
ANTI JOIN (
    SELECT id_hash, first_path
    FROM session_ids
    WHERE source_name = {{ source.name | literal }} AND list_contains($paths, first_path)
) AS known
    ON known.id_hash = k.id_hash AND known.first_path = k.first_path
{%- endmacro %}
{% macro forget_ids(source) -%}
DELETE FROM session_ids
WHERE source_name = {{ source.name | literal }}
  AND event_time < (SELECT min(watermark) FROM check_state WHERE list_contains($source_checks, check_name))
                   - {{ source.dedup_horizon | interval }}
{%- endmacro %}
{#- The walk over a count window's spans (see window.sql): from each series' span at position 0,
    on to the span that starts just behind its cut, while that cut times out. Sequential within a
    series, so a recursive query; it reads a row per span, never a row per session. -#}
{% macro walk_spans(span_ends, series="key") -%}
WITH RECURSIVE walk AS (
    SELECT {{ series }}, span_start, cut_start, cut_end, cut_closes FROM {{ span_ends }} WHERE span_start = 0
    UNION ALL
    SELECT n.{{ series }}, n.span_start, n.cut_start, n.cut_end, n.cut_closes
    FROM walk AS w
    JOIN {{ span_ends }} AS n ON n.{{ series }} = w.{{ series }} AND n.span_start = w.cut_end + 1
    WHERE w.cut_closes
)
SELECT {{ series }}, span_start, cut_start, cut_end, cut_closes FROM walk
{%- endmacro %}
