-- sluice lineage database, schema version 7.
--
-- Erasure orders. An order names cells of a raw version (the rows a predicate or key chose,
-- given cells, or whole columns); carrying it out empties those cells and every cell derived
-- from them in every version the lineage reaches, keeping the proof of every other cell.
--
-- erasure_orders: one row per order carried out. `names` is canonical JSON of what the order
-- named, without the values it named (a predicate or key value names the person): its kind
-- and the 1-based data rows or the column names. `request` is the free text the order gave.
CREATE TABLE erasure_orders (
    id          INTEGER PRIMARY KEY,
    version_id  INTEGER NOT NULL REFERENCES versions(id),
    names       TEXT NOT NULL,
    request     TEXT NOT NULL,
    agent_id    INTEGER NOT NULL REFERENCES agents(id),
    ordered_at  TEXT NOT NULL,
    n_cells     INTEGER NOT NULL CHECK (n_cells >= 0)
) STRICT;

-- erased_versions: per order, every version it reached. `root` (64 hex digits) is the salted
-- cell commitment over the version's cells as recorded, computed from its hash-checked bytes
-- just before they were erased; `salts` the salt tree punctured at the erased cells
-- (commitment::Salts::to_bytes); `kept` per erased cell its u64 LE cell number and its 32-byte
-- leaf, in cell order; `marked` the u64 LE cell numbers of summary cells kept as published and
-- no longer recomputable. `stored_hash` and `stored_row_index` name the objects holding the
-- version's bytes with the erased cells empty, which readers read in place of the version's
-- own (its hash stays its name).
CREATE TABLE erased_versions (
    order_id          INTEGER NOT NULL REFERENCES erasure_orders(id),
    version_id        INTEGER NOT NULL REFERENCES versions(id),
    root              TEXT NOT NULL CHECK (length(root) = 64),
    salts             BLOB NOT NULL,
    kept              BLOB NOT NULL,
    marked            BLOB NOT NULL,
    n_erased          INTEGER NOT NULL CHECK (n_erased >= 0),
    stored_hash       TEXT NOT NULL REFERENCES objects(hash),
    stored_row_index  TEXT NOT NULL REFERENCES objects(hash),
    PRIMARY KEY (order_id, version_id)
) STRICT;
CREATE INDEX erased_versions_by_version ON erased_versions(version_id);
