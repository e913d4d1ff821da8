-- sluice lineage database, schema version 8.
--
-- Salts for the rows that can hold a cell's value. A column profile's smallest and largest
-- value, and a note on a single cell, are values of the version; the audit entry that records
-- them commits to the rows by a digest. Without a secret in the row, someone who guesses an
-- erased value and reads the row's other fields could hash them and confirm the guess against
-- that digest. Each such row gets 32 random bytes, which are part of what the entry commits
-- to; an erasure that overwrites the value empties the salt too, and records the row's salted
-- leaf from before (see DEVELOPERS.md, "Row commitments" and "Erasure").
--
-- The columns are added as NULL in old rows, so the commitments made to them stay valid; such
-- rows keep the old gap, which the erasure's dry run names.
ALTER TABLE column_profiles ADD COLUMN salt BLOB CHECK (salt IS NULL OR length(salt) = 32);
ALTER TABLE cell_notes ADD COLUMN salt BLOB CHECK (salt IS NULL OR length(salt) = 32);
