-- Warehouse layout 2 -> 3, in one transaction: columns renamed so their names say what they hold
-- (each listed in CHANGELOG.md; `renamed` holds those the file still has under their old name).
{% for table, old, new in renamed %}
ALTER TABLE {{ table | ident }} RENAME COLUMN {{ old | ident }} TO {{ new | ident }};
{% endfor %}
SELECT 1;
