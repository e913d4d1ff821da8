-- sluice lineage database on a PostgreSQL server, schema version 7: the erasure tables the
-- SQLite migration 0007 makes (see that file for what every column means), in PostgreSQL's
-- types, each with its `rowid` as in 0006. Orders are not carried out on a server yet (the
-- erased values would stay in its write-ahead log, archive and backups), but a store copied
-- from SQLite keeps its orders and erased versions here.

CREATE TABLE erasure_orders (
    id          BIGINT PRIMARY KEY,
    version_id  BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    names       TEXT NOT NULL,
    request     TEXT NOT NULL,
    agent_id    BIGINT NOT NULL REFERENCES agents(id) DEFERRABLE INITIALLY DEFERRED,
    ordered_at  TEXT NOT NULL,
    n_cells     BIGINT NOT NULL CHECK (n_cells >= 0),
    rowid       BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE erased_versions (
    order_id          BIGINT NOT NULL REFERENCES erasure_orders(id) DEFERRABLE INITIALLY DEFERRED,
    version_id        BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    root              TEXT NOT NULL CHECK (length(root) = 64),
    salts             BYTEA NOT NULL,
    kept              BYTEA NOT NULL,
    marked            BYTEA NOT NULL,
    n_erased          BIGINT NOT NULL CHECK (n_erased >= 0),
    stored_hash       TEXT NOT NULL REFERENCES objects(hash) DEFERRABLE INITIALLY DEFERRED,
    stored_row_index  TEXT NOT NULL REFERENCES objects(hash) DEFERRABLE INITIALLY DEFERRED,
    rowid             BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (order_id, version_id)
);
CREATE INDEX erased_versions_by_version ON erased_versions(version_id);
