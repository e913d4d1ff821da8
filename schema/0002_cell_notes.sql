-- sluice lineage database, schema version 2.
--
-- Notes a step made about single cells that are not changes of value, or that need a word
-- beside the change: for instance a `number` step that could not read an amount and kept the
-- text as it was, or blanked it. A note never replaces a cell change; it explains one, or
-- records why a cell was deliberately left alone.

CREATE TABLE cell_notes (
    step_id     INTEGER NOT NULL REFERENCES steps(id),
    output_id   INTEGER NOT NULL REFERENCES versions(id),
    -- 0-based data row of the output version.
    row_idx     INTEGER NOT NULL CHECK (row_idx >= 0),
    column_name TEXT NOT NULL,
    note        TEXT NOT NULL,
    PRIMARY KEY (output_id, row_idx, column_name)
) STRICT;
