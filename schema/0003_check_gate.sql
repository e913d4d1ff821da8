-- sluice lineage database, schema version 3.
--
-- Whether a check ran as a gate of a plan (a failure stopped the run) or on its own. Recorded so
-- that a plan exported from the history writes its gates back as gates.

ALTER TABLE check_results ADD COLUMN gate INTEGER NOT NULL DEFAULT 0 CHECK (gate IN (0, 1));
