-- sluice lineage database on a PostgreSQL server, schema version 6: the tables the SQLite
-- migrations 0001 to 0006 make (see those files for what every column means), in PostgreSQL's
-- types. Integers are BIGINT and flags the integers 0 and 1, as in SQLite, so that a row
-- encodes to the same bytes on both backends and the audit chain's row commitments hold for a
-- store copied from one to the other.
--
-- Every table has a `rowid` column, as SQLite tables have one of their own: the id itself where
-- the table has one, else a number the server gives. Row commitments name rows by it; it is not
-- part of a row's encoding. Foreign keys are checked at commit.
--
-- The audit log is append-only: a trigger refuses every UPDATE and DELETE of an entry and
-- TRUNCATE of the table, whoever asks (the table's owner included; only a superuser who
-- drops the trigger could go round it, and the roles sluice sets up are not superusers).

CREATE TABLE objects (
    hash        TEXT PRIMARY KEY CHECK (length(hash) = 64),
    n_bytes     BIGINT NOT NULL CHECK (n_bytes >= 0),
    kind        TEXT NOT NULL CHECK (kind IN ('table', 'row_index', 'blob')),
    created_at  TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE
);

CREATE TABLE agents (
    id          BIGINT PRIMARY KEY,
    identity    TEXT NOT NULL UNIQUE,
    kind        TEXT NOT NULL CHECK (kind IN ('person', 'software')),
    source      TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE datasets (
    id          BIGINT PRIMARY KEY,
    name        TEXT NOT NULL UNIQUE,
    key_columns TEXT,
    created_at  TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE steps (
    id           BIGINT PRIMARY KEY,
    kind         TEXT NOT NULL CHECK (kind IN ('ingest', 'operation', 'command', 'hand_edit', 'revert', 'replay')),
    operation    TEXT,
    params       TEXT NOT NULL,
    agent_id     BIGINT NOT NULL REFERENCES agents(id) DEFERRABLE INITIALLY DEFERRED,
    tool_version TEXT NOT NULL,
    reason       TEXT,
    started_at   TEXT NOT NULL,
    ended_at     TEXT NOT NULL,
    rows_in      BIGINT,
    rows_out     BIGINT,
    lineage      TEXT NOT NULL CHECK (lineage IN ('exact', 'inferred', 'none')),
    source       TEXT,
    code         TEXT,
    repeats_step BIGINT REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    reverts_step BIGINT REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    provenance   TEXT REFERENCES objects(hash) DEFERRABLE INITIALLY DEFERRED,
    rowid        BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE versions (
    id             BIGINT PRIMARY KEY,
    dataset_id     BIGINT NOT NULL REFERENCES datasets(id) DEFERRABLE INITIALLY DEFERRED,
    seq            BIGINT NOT NULL CHECK (seq >= 1),
    hash           TEXT NOT NULL REFERENCES objects(hash) DEFERRABLE INITIALLY DEFERRED,
    row_index      TEXT NOT NULL REFERENCES objects(hash) DEFERRABLE INITIALLY DEFERRED,
    step_id        BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    n_rows         BIGINT NOT NULL CHECK (n_rows >= 0),
    n_cols         BIGINT NOT NULL CHECK (n_cols >= 0),
    n_bytes        BIGINT NOT NULL CHECK (n_bytes >= 0),
    header         TEXT NOT NULL,
    dialect        TEXT NOT NULL,
    null_tokens    TEXT NOT NULL,
    created_at     TEXT NOT NULL,
    storage        TEXT CHECK (storage IN ('kept', 'recomputable')),
    rowid          BIGINT GENERATED ALWAYS AS (id) STORED,
    UNIQUE (dataset_id, seq)
);
CREATE INDEX versions_by_hash ON versions(hash);
CREATE INDEX versions_by_step ON versions(step_id);

CREATE TABLE column_profiles (
    version_id      BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    col_idx         BIGINT NOT NULL,
    name            TEXT NOT NULL,
    inferred_type   TEXT NOT NULL,
    n_blank         BIGINT NOT NULL,
    n_distinct      BIGINT NOT NULL,
    distinct_exact  BIGINT NOT NULL CHECK (distinct_exact IN (0, 1)),
    min_value       TEXT,
    max_value       TEXT,
    min_len         BIGINT,
    max_len         BIGINT,
    rowid           BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (version_id, col_idx)
);

CREATE TABLE step_inputs (
    step_id     BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    position    BIGINT NOT NULL,
    version_id  BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    role        TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (step_id, position)
);
CREATE INDEX step_inputs_by_version ON step_inputs(version_id);

CREATE TABLE row_runs (
    step_id     BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    output_id   BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    input_id    BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    out_start   BIGINT NOT NULL CHECK (out_start >= 0),
    in_start    BIGINT NOT NULL CHECK (in_start >= 0),
    len         BIGINT NOT NULL CHECK (len >= 1),
    rowid       BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (output_id, out_start)
);

CREATE TABLE cell_changes (
    step_id     BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    output_id   BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    row_idx     BIGINT NOT NULL CHECK (row_idx >= 0),
    column_name TEXT NOT NULL,
    old_value   TEXT,
    new_value   TEXT,
    rowid       BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (output_id, row_idx, column_name)
);

CREATE TABLE drops (
    step_id      BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    input_id     BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    row_idx      BIGINT NOT NULL CHECK (row_idx >= 0),
    reason       TEXT NOT NULL,
    duplicate_of BIGINT,
    rowid        BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (step_id, input_id, row_idx)
);

CREATE TABLE column_sources (
    step_id       BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    output_id     BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    output_column TEXT NOT NULL,
    input_id      BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    input_column  TEXT NOT NULL,
    rowid         BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (output_id, output_column, input_id, input_column)
);

CREATE TABLE check_results (
    id             BIGINT PRIMARY KEY,
    version_id     BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    rule           TEXT NOT NULL,
    passed         BIGINT NOT NULL CHECK (passed IN (0, 1)),
    n_failing      BIGINT NOT NULL,
    first_failing  TEXT NOT NULL,
    agent_id       BIGINT NOT NULL REFERENCES agents(id) DEFERRABLE INITIALLY DEFERRED,
    checked_at     TEXT NOT NULL,
    gate           BIGINT NOT NULL DEFAULT 0 CHECK (gate IN (0, 1)),
    rowid          BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE cell_notes (
    step_id     BIGINT NOT NULL REFERENCES steps(id) DEFERRABLE INITIALLY DEFERRED,
    output_id   BIGINT NOT NULL REFERENCES versions(id) DEFERRABLE INITIALLY DEFERRED,
    row_idx     BIGINT NOT NULL CHECK (row_idx >= 0),
    column_name TEXT NOT NULL,
    note        TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS IDENTITY UNIQUE,
    PRIMARY KEY (output_id, row_idx, column_name)
);

CREATE TABLE endorsements (
    id           BIGINT PRIMARY KEY,
    kind         TEXT NOT NULL CHECK (kind IN ('version', 'report', 'audit_head', 'admission', 'retirement')),
    subject      TEXT NOT NULL,
    label        TEXT NOT NULL,
    meaning      TEXT NOT NULL,
    name         TEXT NOT NULL,
    signed_at    TEXT NOT NULL,
    fingerprint  TEXT NOT NULL,
    public_key   TEXT NOT NULL,
    admitted_key TEXT,
    statement    TEXT NOT NULL,
    signature    TEXT NOT NULL,
    rowid        BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE meanings (
    id          BIGINT PRIMARY KEY,
    word        TEXT NOT NULL UNIQUE,
    description TEXT NOT NULL,
    declared_at TEXT NOT NULL,
    rowid       BIGINT GENERATED ALWAYS AS (id) STORED
);

CREATE TABLE audit_log (
    seq        BIGINT PRIMARY KEY CHECK (seq >= 1),
    at         TEXT NOT NULL,
    agent      TEXT NOT NULL,
    action     TEXT NOT NULL,
    subject    TEXT NOT NULL,
    details    TEXT NOT NULL,
    prev_hash  TEXT NOT NULL CHECK (length(prev_hash) = 64),
    hash       TEXT NOT NULL UNIQUE CHECK (length(hash) = 64),
    rowid      BIGINT GENERATED ALWAYS AS (seq) STORED
);

CREATE FUNCTION sluice_audit_log_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION 'the audit log is append-only: an entry is never changed or removed'
        USING ERRCODE = 'insufficient_privilege';
END
$$;

CREATE TRIGGER audit_log_append_only BEFORE UPDATE OR DELETE ON audit_log
    FOR EACH ROW EXECUTE FUNCTION sluice_audit_log_refuse();
CREATE TRIGGER audit_log_no_truncate BEFORE TRUNCATE ON audit_log
    FOR EACH STATEMENT EXECUTE FUNCTION sluice_audit_log_refuse();
