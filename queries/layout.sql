-- The warehouse's layout (toolkit/engine/warehouse.py): which one a file has, and what converting
-- it from an earlier one takes besides queries/migrate_*.sql. Run by the first command that opens
-- the file for writing, in one transaction.

-- @statement layout.version
SELECT max(version) AS version FROM schema_version;

-- @statement layout.in_use
-- Whether the file holds anything: a new file is made in this release's layout at once.
SELECT (SELECT count(*) FROM runs) + (SELECT count(*) FROM files_read) AS rows_held;

-- @statement layout.begin
BEGIN TRANSACTION;

-- @statement layout.record
DELETE FROM schema_version;

INSERT INTO schema_version VALUES ($version);

-- @statement layout.commit
COMMIT;

-- @statement layout.roll_back
ROLLBACK;

-- @statement layout.columns
-- Every table's columns, for the renames of layout 3.
SELECT table_name, column_name FROM duckdb_columns() WHERE database_name = current_database();

-- @statement layout.stored_definition
SELECT definition_hash FROM check_state WHERE check_name = $check;

-- @statement layout.adopt_definition
-- After an upgrade, $check's definition hash is the one its compiled SQL has now ($now): the
-- release wrote the SQL differently, not the check, so its windows stay valid.
UPDATE alerts SET definition_hash = $now
WHERE check_name = $check AND status = 'open' AND definition_hash = $old;

UPDATE check_state SET definition_hash = $now WHERE check_name = $check;

-- @statement layout.id_hash_type
-- Files from before id hashes were numbers keep them as hex text.
SELECT data_type FROM duckdb_columns()
WHERE table_name = 'session_ids' AND column_name = 'id_hash' AND database_name = current_database();

-- @statement layout.id_hashes_as_numbers
-- Hex and number are the same md5, so nothing read before is read again or lost.
{% import "macros.sql" as m %}
ALTER TABLE session_ids ALTER id_hash TYPE UHUGEINT USING {{ m.md5_hex_number("id_hash") }};
