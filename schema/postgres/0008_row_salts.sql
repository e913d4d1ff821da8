-- sluice lineage database on a PostgreSQL server, schema version 8: the salt columns the
-- SQLite migration 0008 adds (see that file for what they are for), NULL in old rows.
ALTER TABLE column_profiles ADD COLUMN salt BYTEA CHECK (salt IS NULL OR length(salt) = 32);
ALTER TABLE cell_notes ADD COLUMN salt BYTEA CHECK (salt IS NULL OR length(salt) = 32);
