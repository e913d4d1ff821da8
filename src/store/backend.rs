//! The seam between the lineage queries and the database that runs them: one trait
//! ([`Database`]) with a definition per backend, SQLite in a file ([`super::sqlite`]) and
//! PostgreSQL on a server ([`super::pg`]), and the neutral values that cross it.
//!
//! A query's text is written once, in the SQL both backends share, with numbered placeholders
//! (`?1`); the PostgreSQL backend turns them into its own (`$1`). Every value crosses as a bound
//! [`Value`], never spliced into the text. What the two dialects do differently (opening,
//! migrations, the write transaction and how writers are put in one order, the snapshot a
//! reader sees, the catalogue, the structural check) is a method of the trait, defined once per
//! backend.

use crate::error::{ErrorKind, Result};

/// A value bound to a query or read from a row: the storage classes both backends share.
/// PostgreSQL's booleans are read as the integers 0 and 1, as SQLite stores them.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
    Blob(Vec<u8>),
}

impl From<i64> for Value {
    fn from(v: i64) -> Value {
        Value::Int(v)
    }
}

impl From<&str> for Value {
    fn from(v: &str) -> Value {
        Value::Text(v.to_string())
    }
}

impl From<String> for Value {
    fn from(v: String) -> Value {
        Value::Text(v)
    }
}

impl From<&String> for Value {
    fn from(v: &String) -> Value {
        Value::Text(v.clone())
    }
}

impl<T: Into<Value>> From<Option<T>> for Value {
    fn from(v: Option<T>) -> Value {
        v.map_or(Value::Null, Into::into)
    }
}

/// Values to bind, in placeholder order: `vals![a, b]`.
#[macro_export]
macro_rules! vals {
    ($($v:expr),* $(,)?) => {
        &[$($crate::store::backend::Value::from($v)),*][..]
    };
}

/// One result row.
#[derive(Debug, Clone)]
pub struct Row(pub Vec<Value>);

fn wrong(i: usize, want: &str, got: &Value) -> crate::Error {
    ErrorKind::Inconsistent(format!(
        "the lineage database returned {got:?} in result column {i} where {want} was expected; run `sluice verify`"
    ))
    .into()
}

impl Row {
    pub fn int(&self, i: usize) -> Result<i64> {
        match self.0.get(i) {
            Some(Value::Int(v)) => Ok(*v),
            other => Err(wrong(i, "an integer", other.unwrap_or(&Value::Null))),
        }
    }

    pub fn opt_int(&self, i: usize) -> Result<Option<i64>> {
        match self.0.get(i) {
            Some(Value::Null) => Ok(None),
            _ => self.int(i).map(Some),
        }
    }

    pub fn text(&self, i: usize) -> Result<String> {
        match self.0.get(i) {
            Some(Value::Text(v)) => Ok(v.clone()),
            other => Err(wrong(i, "a text", other.unwrap_or(&Value::Null))),
        }
    }

    pub fn blob(&self, i: usize) -> Result<Vec<u8>> {
        match self.0.get(i) {
            Some(Value::Blob(v)) => Ok(v.clone()),
            other => Err(wrong(i, "bytes", other.unwrap_or(&Value::Null))),
        }
    }

    pub fn opt_text(&self, i: usize) -> Result<Option<String>> {
        match self.0.get(i) {
            Some(Value::Null) => Ok(None),
            _ => self.text(i).map(Some),
        }
    }
}

/// Which backend holds a store's lineage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Sqlite,
    Postgres,
}

/// A lineage database: SQLite in the store folder, or PostgreSQL on a server.
pub trait Database: Send {
    fn kind(&self) -> Kind;
    /// Where it is, for messages: the file, or the server and database (never a password).
    fn describe(&self) -> String;
    /// Runs a query and returns its rows.
    fn query(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>>;
    /// Like [`Database::query`], with the result's column names.
    fn query_named(&self, sql: &str, params: &[Value]) -> Result<(Vec<String>, Vec<Row>)>;
    /// Runs several statements without parameters (a migration, the roles' setup).
    fn batch(&self, sql: &str) -> Result<()>;
    /// Runs a statement; returns how many rows it changed.
    fn execute(&self, sql: &str, params: &[Value]) -> Result<u64>;
    /// Starts the write transaction of one command. Writers are put in one order: once this
    /// returns, no other writer's transaction runs until this one ends, and every query sees
    /// what the writers before it committed (see DEVELOPERS.md, "Backends").
    fn begin_write(&self) -> Result<()>;
    fn commit(&self) -> Result<()>;
    fn rollback(&self) -> Result<()>;
    /// Starts a read-only transaction whose queries all see one snapshot.
    fn begin_snapshot(&self) -> Result<()>;
    fn end_snapshot(&self) -> Result<()>;
    /// The schema version the database is at (0 when empty).
    fn schema_version(&self) -> Result<i64>;
    /// Applies this backend's migrations up to the build's schema version.
    fn migrate(&self) -> Result<()>;
    /// The backend's own structural and foreign-key checks, as readable lines.
    fn integrity_problems(&self) -> Result<Vec<String>>;
    /// The tables, views and triggers sluice did not make itself as part of the backend's
    /// machinery (the schema version, the append-only trigger), as (type, name).
    fn schema_objects(&self) -> Result<Vec<(String, String)>>;
    /// Writes a copy of the database as it is now to the new file `path` in the backend's own
    /// way; `false` when it has none (the copy then goes row by row).
    fn copy_file(&self, _path: &std::path::Path) -> Result<bool> {
        Ok(false)
    }
}

/// The lineage tables in the order a copy fills them (each after the tables it refers to), with
/// their columns; the copy between backends ([`super::lineage::Lineage::copy_into`]) reads and
/// writes exactly these. A row the target already holds (a copy into a store that has an
/// earlier part of the same history) is left as it is: the copy checked that it is the same.
pub const COPY_ORDER: &[(&str, &str, &str)] = &[
    (
        "objects",
        "SELECT hash, n_bytes, kind, created_at FROM objects ORDER BY hash",
        "INSERT INTO objects (hash, n_bytes, kind, created_at) VALUES (?1, ?2, ?3, ?4) ON CONFLICT DO NOTHING",
    ),
    (
        "agents",
        "SELECT id, identity, kind, source FROM agents ORDER BY id",
        "INSERT INTO agents (id, identity, kind, source) VALUES (?1, ?2, ?3, ?4) ON CONFLICT DO NOTHING",
    ),
    (
        "datasets",
        "SELECT id, name, key_columns, created_at FROM datasets ORDER BY id",
        "INSERT INTO datasets (id, name, key_columns, created_at) VALUES (?1, ?2, ?3, ?4) ON CONFLICT DO NOTHING",
    ),
    (
        "steps",
        "SELECT id, kind, operation, params, agent_id, tool_version, reason, started_at, ended_at,
                rows_in, rows_out, lineage, source, code, repeats_step, reverts_step, provenance
         FROM steps ORDER BY id",
        "INSERT INTO steps (id, kind, operation, params, agent_id, tool_version, reason, started_at,
                ended_at, rows_in, rows_out, lineage, source, code, repeats_step, reverts_step,
                provenance)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17) ON CONFLICT DO NOTHING",
    ),
    (
        "versions",
        "SELECT id, dataset_id, seq, hash, row_index, step_id, n_rows, n_cols, n_bytes, header,
                dialect, null_tokens, created_at, storage
         FROM versions ORDER BY id",
        "INSERT INTO versions (id, dataset_id, seq, hash, row_index, step_id, n_rows, n_cols,
                n_bytes, header, dialect, null_tokens, created_at, storage)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14) ON CONFLICT DO NOTHING",
    ),
    (
        "column_profiles",
        "SELECT version_id, col_idx, name, inferred_type, n_blank, n_distinct, distinct_exact,
                min_value, max_value, min_len, max_len, salt
         FROM column_profiles ORDER BY version_id, col_idx",
        "INSERT INTO column_profiles (version_id, col_idx, name, inferred_type, n_blank,
                n_distinct, distinct_exact, min_value, max_value, min_len, max_len, salt)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12) ON CONFLICT DO NOTHING",
    ),
    (
        "step_inputs",
        "SELECT step_id, position, version_id, role FROM step_inputs ORDER BY step_id, position",
        "INSERT INTO step_inputs (step_id, position, version_id, role) VALUES (?1, ?2, ?3, ?4) ON CONFLICT DO NOTHING",
    ),
    (
        "row_runs",
        "SELECT step_id, output_id, input_id, out_start, in_start, len FROM row_runs
         ORDER BY output_id, out_start",
        "INSERT INTO row_runs (step_id, output_id, input_id, out_start, in_start, len)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6) ON CONFLICT DO NOTHING",
    ),
    (
        "cell_changes",
        "SELECT step_id, output_id, row_idx, column_name, old_value, new_value FROM cell_changes
         ORDER BY output_id, row_idx, column_name",
        "INSERT INTO cell_changes (step_id, output_id, row_idx, column_name, old_value, new_value)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6) ON CONFLICT DO NOTHING",
    ),
    (
        "drops",
        "SELECT step_id, input_id, row_idx, reason, duplicate_of FROM drops
         ORDER BY step_id, input_id, row_idx",
        "INSERT INTO drops (step_id, input_id, row_idx, reason, duplicate_of)
         VALUES (?1, ?2, ?3, ?4, ?5) ON CONFLICT DO NOTHING",
    ),
    (
        "column_sources",
        "SELECT step_id, output_id, output_column, input_id, input_column FROM column_sources
         ORDER BY output_id, output_column, input_id, input_column",
        "INSERT INTO column_sources (step_id, output_id, output_column, input_id, input_column)
         VALUES (?1, ?2, ?3, ?4, ?5) ON CONFLICT DO NOTHING",
    ),
    (
        "check_results",
        "SELECT id, version_id, rule, passed, n_failing, first_failing, agent_id, checked_at, gate
         FROM check_results ORDER BY id",
        "INSERT INTO check_results (id, version_id, rule, passed, n_failing, first_failing,
                agent_id, checked_at, gate)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9) ON CONFLICT DO NOTHING",
    ),
    (
        "cell_notes",
        "SELECT step_id, output_id, row_idx, column_name, note, salt FROM cell_notes
         ORDER BY output_id, row_idx, column_name",
        "INSERT INTO cell_notes (step_id, output_id, row_idx, column_name, note, salt)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6) ON CONFLICT DO NOTHING",
    ),
    (
        "endorsements",
        "SELECT id, kind, subject, label, meaning, name, signed_at, fingerprint, public_key,
                admitted_key, statement, signature
         FROM endorsements ORDER BY id",
        "INSERT INTO endorsements (id, kind, subject, label, meaning, name, signed_at,
                fingerprint, public_key, admitted_key, statement, signature)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12) ON CONFLICT DO NOTHING",
    ),
    (
        "meanings",
        "SELECT id, word, description, declared_at FROM meanings ORDER BY id",
        "INSERT INTO meanings (id, word, description, declared_at) VALUES (?1, ?2, ?3, ?4) ON CONFLICT DO NOTHING",
    ),
    (
        "erasure_orders",
        "SELECT id, version_id, names, request, agent_id, ordered_at, n_cells
         FROM erasure_orders ORDER BY id",
        "INSERT INTO erasure_orders (id, version_id, names, request, agent_id, ordered_at, n_cells)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7) ON CONFLICT DO NOTHING",
    ),
    (
        "erased_versions",
        "SELECT order_id, version_id, root, salts, kept, marked, n_erased, stored_hash,
                stored_row_index
         FROM erased_versions ORDER BY order_id, version_id",
        "INSERT INTO erased_versions (order_id, version_id, root, salts, kept, marked, n_erased,
                stored_hash, stored_row_index)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9) ON CONFLICT DO NOTHING",
    ),
    (
        "audit_log",
        "SELECT seq, at, agent, action, subject, details, prev_hash, hash FROM audit_log
         ORDER BY seq",
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8) ON CONFLICT DO NOTHING",
    ),
];

/// The columns a later step changes on an earlier row (a withdrawal marks the step it takes
/// out, intake declares a dataset's key, storage commands set a version's storage): a copy into
/// a store that holds an earlier part of the same history sets them as the source has them.
pub const COPY_CHANGES: &[(&str, &str)] = &[
    (
        "SELECT id, reverts_step FROM steps WHERE reverts_step IS NOT NULL ORDER BY id",
        "UPDATE steps SET reverts_step = ?2 WHERE id = ?1",
    ),
    (
        "SELECT id, key_columns FROM datasets ORDER BY id",
        "UPDATE datasets SET key_columns = ?2 WHERE id = ?1",
    ),
    (
        "SELECT id, storage FROM versions ORDER BY id",
        "UPDATE versions SET storage = ?2 WHERE id = ?1",
    ),
];
