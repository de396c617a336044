-- Warehouse layout 1 -> 2, in one transaction ($sources: each source's name and base; $checks: each
-- check's source). Files are named relative to their source's path, so moving the project or
-- remounting the lake does not make every file look new. Paths not below the base stay as they are.
CREATE OR REPLACE TEMP TABLE migrate_sources AS SELECT unnest($sources, recursive := true);

CREATE OR REPLACE TEMP TABLE migrate_checks AS SELECT unnest($checks, recursive := true);

UPDATE files_read AS f
SET source_name = c.source_name
FROM migrate_checks AS c
WHERE c.check_name = f.check_name AND f.source_name IS NULL;

UPDATE files_read AS f
SET path = substr(f.path, length(s.base) + 2)
FROM migrate_sources AS s
WHERE s.source_name = f.source_name AND starts_with(f.path, s.base || '/');

UPDATE changed_files AS f
SET path = substr(f.path, length(s.base) + 2)
FROM migrate_checks AS c
JOIN migrate_sources AS s ON s.source_name = c.source_name
WHERE c.check_name = f.check_name AND starts_with(f.path, s.base || '/');

UPDATE session_ids AS i
SET first_path = substr(i.first_path, length(s.base) + 2)
FROM migrate_sources AS s
WHERE s.source_name = i.source_name AND starts_with(i.first_path, s.base || '/');

UPDATE source_columns AS t
SET first_path = substr(t.first_path, length(s.base) + 2)
FROM migrate_sources AS s
WHERE s.source_name = t.source_name AND starts_with(t.first_path, s.base || '/');

-- ids remembered before they had a data time: as recent as the source's newest data
UPDATE session_ids AS i
SET event_time = w.watermark
FROM (
    SELECT c.source_name, max(st.watermark) AS watermark
    FROM check_state AS st
    JOIN migrate_checks AS c ON c.check_name = st.check_name
    GROUP BY c.source_name
) AS w
WHERE w.source_name = i.source_name AND i.event_time IS NULL;
