-- sluice lineage database, schema version 1.
--
-- Migrations in this folder are numbered, embedded in the binary and applied in order when a
-- store is opened; the applied version is kept in PRAGMA user_version. Every migration runs in
-- one transaction. Never edit a migration that has been released: add the next number.
--
-- Conventions: times are RFC 3339 UTC text; hashes are 64 lowercase hex digits of BLAKE3;
-- row indices are 0-based data rows (the header is not a row); JSON columns hold canonical JSON
-- (keys sorted, no insignificant white space).

-- Every object file the database refers to. An object row is inserted in the same transaction
-- that first references it, after the file itself was made durable.
CREATE TABLE objects (
    hash        TEXT PRIMARY KEY CHECK (length(hash) = 64),
    n_bytes     INTEGER NOT NULL CHECK (n_bytes >= 0),
    -- 'table' (a dataset version's bytes), 'row_index' (per-row offsets and fingerprints),
    -- 'blob' (anything else a step keeps, e.g. a workbook or a report).
    kind        TEXT NOT NULL CHECK (kind IN ('table', 'row_index', 'blob')),
    created_at  TEXT NOT NULL
) STRICT;

-- People and programs that act on the store (W3C PROV agents).
CREATE TABLE agents (
    id          INTEGER PRIMARY KEY,
    -- "Name <email>" or a plain name, exactly as resolved.
    identity    TEXT NOT NULL UNIQUE,
    -- 'person' or 'software'.
    kind        TEXT NOT NULL CHECK (kind IN ('person', 'software')),
    -- Where the identity came from: 'option', 'environment', 'git', 'os', 'builtin'.
    source      TEXT NOT NULL
) STRICT;

CREATE TABLE datasets (
    id          INTEGER PRIMARY KEY,
    name        TEXT NOT NULL UNIQUE,
    -- JSON array of key column names, or NULL when no key is declared.
    key_columns TEXT,
    created_at  TEXT NOT NULL
) STRICT;

-- Activities: an ingest of an outside file, a built-in operation, an outside command, a hand
-- edit, a revert, a replay.
CREATE TABLE steps (
    id           INTEGER PRIMARY KEY,
    kind         TEXT NOT NULL CHECK (kind IN ('ingest', 'operation', 'command', 'hand_edit', 'revert', 'replay')),
    -- The operation name for built-in operations ('trim', 'dedupe', ...), else NULL.
    operation    TEXT,
    -- Canonical JSON of the parameters (operation arguments, intake options, command line).
    params       TEXT NOT NULL,
    agent_id     INTEGER NOT NULL REFERENCES agents(id),
    -- The sluice build that recorded the step.
    tool_version TEXT NOT NULL,
    reason       TEXT,
    started_at   TEXT NOT NULL,
    ended_at     TEXT NOT NULL,
    rows_in      INTEGER,
    rows_out     INTEGER,
    -- 'exact' (recorded by a sluice operation), 'inferred' (by a diff), 'none' (an intake).
    lineage      TEXT NOT NULL CHECK (lineage IN ('exact', 'inferred', 'none')),
    -- For ingests: JSON with the source path, size and modification time.
    source       TEXT,
    -- For outside commands: JSON with commit, branch, dirty files, working directory, exit status.
    code         TEXT,
    repeats_step INTEGER REFERENCES steps(id),
    reverts_step INTEGER REFERENCES steps(id)
) STRICT;

CREATE TABLE versions (
    id             INTEGER PRIMARY KEY,
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    -- 1-based number of the version within its dataset: `orders@3`.
    seq            INTEGER NOT NULL CHECK (seq >= 1),
    hash           TEXT NOT NULL REFERENCES objects(hash),
    row_index      TEXT NOT NULL REFERENCES objects(hash),
    step_id        INTEGER NOT NULL REFERENCES steps(id),
    n_rows         INTEGER NOT NULL CHECK (n_rows >= 0),
    n_cols         INTEGER NOT NULL CHECK (n_cols >= 0),
    n_bytes        INTEGER NOT NULL CHECK (n_bytes >= 0),
    -- JSON array of column names in order.
    header         TEXT NOT NULL,
    -- JSON: delimiter, quote, line_ending, bom, encoding, has_header, detected.
    dialect        TEXT NOT NULL,
    -- JSON array of the null tokens declared at intake (counted as blanks).
    null_tokens    TEXT NOT NULL,
    created_at     TEXT NOT NULL,
    UNIQUE (dataset_id, seq)
) STRICT;
CREATE INDEX versions_by_hash ON versions(hash);
CREATE INDEX versions_by_step ON versions(step_id);

-- The per-column quality profile of a version.
CREATE TABLE column_profiles (
    version_id      INTEGER NOT NULL REFERENCES versions(id),
    -- 0-based column position.
    col_idx         INTEGER NOT NULL,
    name            TEXT NOT NULL,
    -- 'integer', 'decimal', 'date', 'text', or 'empty' when every value is blank.
    inferred_type   TEXT NOT NULL,
    n_blank         INTEGER NOT NULL,
    n_distinct      INTEGER NOT NULL,
    -- 1 when n_distinct is an exact count, 0 when it is an estimate.
    distinct_exact  INTEGER NOT NULL CHECK (distinct_exact IN (0, 1)),
    min_value       TEXT,
    max_value       TEXT,
    -- Lengths in Unicode scalar values over non-blank values.
    min_len         INTEGER,
    max_len         INTEGER,
    PRIMARY KEY (version_id, col_idx)
) STRICT;

-- Which versions a step read, in order. `role` says how: 'input', 'table' (a mapping or lookup
-- table), 'other' (the second source of an append).
CREATE TABLE step_inputs (
    step_id     INTEGER NOT NULL REFERENCES steps(id),
    position    INTEGER NOT NULL,
    version_id  INTEGER NOT NULL REFERENCES versions(id),
    role        TEXT NOT NULL,
    PRIMARY KEY (step_id, position)
) STRICT;
CREATE INDEX step_inputs_by_version ON step_inputs(version_id);

-- Row maps as runs: output rows out_start .. out_start+len came from input rows
-- in_start .. in_start+len of input version input_id. Rows of the output not covered by a run
-- are new (inserted by a hand edit, or an aggregate).
CREATE TABLE row_runs (
    step_id     INTEGER NOT NULL REFERENCES steps(id),
    output_id   INTEGER NOT NULL REFERENCES versions(id),
    input_id    INTEGER NOT NULL REFERENCES versions(id),
    out_start   INTEGER NOT NULL CHECK (out_start >= 0),
    in_start    INTEGER NOT NULL CHECK (in_start >= 0),
    len         INTEGER NOT NULL CHECK (len >= 1),
    PRIMARY KEY (output_id, out_start)
) STRICT;

-- Every cell a step changed, by output row and column name.
CREATE TABLE cell_changes (
    step_id     INTEGER NOT NULL REFERENCES steps(id),
    output_id   INTEGER NOT NULL REFERENCES versions(id),
    row_idx     INTEGER NOT NULL CHECK (row_idx >= 0),
    column_name TEXT NOT NULL,
    old_value   TEXT,
    new_value   TEXT,
    PRIMARY KEY (output_id, row_idx, column_name)
) STRICT;

-- Every input row a step removed, and why.
CREATE TABLE drops (
    step_id      INTEGER NOT NULL REFERENCES steps(id),
    input_id     INTEGER NOT NULL REFERENCES versions(id),
    row_idx      INTEGER NOT NULL CHECK (row_idx >= 0),
    -- The predicate text it matched, or a description such as "duplicate".
    reason       TEXT NOT NULL,
    -- For duplicates: the 0-based input row it duplicated.
    duplicate_of INTEGER,
    PRIMARY KEY (step_id, input_id, row_idx)
) STRICT;

-- For derived columns (split, combine, extract, lookup): which input columns an output column
-- came from.
CREATE TABLE column_sources (
    step_id       INTEGER NOT NULL REFERENCES steps(id),
    output_id     INTEGER NOT NULL REFERENCES versions(id),
    output_column TEXT NOT NULL,
    input_id      INTEGER NOT NULL REFERENCES versions(id),
    input_column  TEXT NOT NULL,
    PRIMARY KEY (output_id, output_column, input_id, input_column)
) STRICT;

-- Results of declared rules evaluated on a version.
CREATE TABLE check_results (
    id             INTEGER PRIMARY KEY,
    version_id     INTEGER NOT NULL REFERENCES versions(id),
    -- Canonical JSON of the rule.
    rule           TEXT NOT NULL,
    passed         INTEGER NOT NULL CHECK (passed IN (0, 1)),
    n_failing      INTEGER NOT NULL,
    -- JSON array of the first failing 0-based rows.
    first_failing  TEXT NOT NULL,
    agent_id       INTEGER NOT NULL REFERENCES agents(id),
    checked_at     TEXT NOT NULL
) STRICT;

-- The append-only, hash-chained record of every action that changed the store. `hash` is the
-- BLAKE3 of the entry's canonical encoding (see DEVELOPERS.md, "Audit chain"), which includes
-- `prev_hash`, the hash of the entry before it (64 zeros for the first entry).
CREATE TABLE audit_log (
    seq        INTEGER PRIMARY KEY CHECK (seq >= 1),
    at         TEXT NOT NULL,
    agent      TEXT NOT NULL,
    action     TEXT NOT NULL,
    subject    TEXT NOT NULL,
    details    TEXT NOT NULL,
    prev_hash  TEXT NOT NULL CHECK (length(prev_hash) = 64),
    hash       TEXT NOT NULL UNIQUE CHECK (length(hash) = 64)
) STRICT;
