-- sluice lineage database, schema version 4.
--
-- The cell-level provenance of a built-in step (the output cells it changed, the input rows it
-- dropped and why) moves into one immutable object per step, named by its BLAKE3 hash; the old
-- and new values of a changed cell are read from the step's input and output versions. The
-- format is described in src/provenance.rs. Steps recorded before keep their rows in
-- `cell_changes` and `drops`, which stay readable.

ALTER TABLE steps ADD COLUMN provenance TEXT REFERENCES objects(hash);
