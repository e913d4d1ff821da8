//! The lineage database (`.sluice/lineage.db`): opening it with the right settings, applying the
//! embedded migrations from `schema/`, the write transaction every command goes through, and the
//! queries the rest of the engine asks. All SQL in sluice is here and in [`super::audit`], and
//! every value reaches SQLite as a bound parameter, never spliced into SQL text.

use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::{params, Connection, OpenFlags, OptionalExtension, TransactionBehavior};
use serde_json::Value;

use super::audit::{Key, Selector};
use crate::error::{Error, ErrorKind, Result};
use crate::model::{
    canonical_json, Agent, AuditEntry, CellChange, ColumnProfile, Dataset, Dialect, Drop,
    Endorsement, LineageKind, Meaning, RowRun, SourceFile, Step, StepKind, Storage, Version,
};

/// The objects that only recomputable versions name (their bytes or row index).
const UNSTORED_OBJECTS: &str = "SELECT o.hash FROM objects o
     WHERE EXISTS (SELECT 1 FROM versions v WHERE v.hash = o.hash OR v.row_index = o.hash)
       AND NOT EXISTS (SELECT 1 FROM versions v WHERE (v.hash = o.hash OR v.row_index = o.hash)
                       AND (v.storage IS NULL OR v.storage <> 'recomputable'))";

/// The migrations, in order. Each entry is (schema version it produces, SQL).
const MIGRATIONS: &[(i64, &str)] = &[
    (1, include_str!("../../schema/0001_lineage.sql")),
    (2, include_str!("../../schema/0002_cell_notes.sql")),
    (3, include_str!("../../schema/0003_check_gate.sql")),
    (4, include_str!("../../schema/0004_step_provenance.sql")),
    (5, include_str!("../../schema/0005_endorsements.sql")),
    (6, include_str!("../../schema/0006_storage.sql")),
    (7, include_str!("../../schema/0007_erasure.sql")),
];

/// The schema version this build writes.
pub const SCHEMA_VERSION: i64 = MIGRATIONS[MIGRATIONS.len() - 1].0;

/// How long a command waits for another command's write transaction before giving up.
const BUSY_TIMEOUT: Duration = Duration::from_secs(60);

pub struct Lineage {
    pub(super) conn: Connection,
    path: PathBuf,
}

pub(super) fn db_err(e: rusqlite::Error) -> Error {
    ErrorKind::Sqlite(e.to_string().to_lowercase()).into()
}

fn corrupt(path: &Path, e: rusqlite::Error) -> Error {
    ErrorKind::CorruptDatabase {
        path: path.to_path_buf(),
        detail: e.to_string().to_lowercase(),
    }
    .into()
}

impl Lineage {
    /// Creates a new database at `path` and applies every migration.
    pub fn create(path: &Path) -> Result<Lineage> {
        Lineage::connect(
            path,
            OpenFlags::SQLITE_OPEN_READ_WRITE | OpenFlags::SQLITE_OPEN_CREATE,
        )
    }

    /// Writes a copy of the database as it is now (one snapshot) to the new file `path`.
    pub fn copy_to(&self, path: &Path) -> Result<()> {
        let target = path.to_str().ok_or_else(|| {
            Error::from(ErrorKind::Internal(format!(
                "{}: not a UTF-8 path",
                path.display()
            )))
        })?;
        self.conn
            .execute("VACUUM INTO ?1", [target])
            .map_err(db_err)?;
        Ok(())
    }

    /// Opens an existing database, refusing one written by a newer schema and migrating an older
    /// one.
    pub fn open(path: &Path) -> Result<Lineage> {
        Lineage::connect(path, OpenFlags::SQLITE_OPEN_READ_WRITE)
    }

    fn connect(path: &Path, flags: OpenFlags) -> Result<Lineage> {
        let conn = Connection::open_with_flags(path, flags).map_err(|e| corrupt(path, e))?;
        let mut l = Lineage {
            conn,
            path: path.to_path_buf(),
        };
        l.configure()?;
        l.migrate()?;
        Ok(l)
    }

    fn configure(&mut self) -> Result<()> {
        let path = self.path.clone();
        self.conn
            .busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| corrupt(&path, e))?;
        // Reading the schema first turns "file is not a database" into a clear error.
        self.conn
            .query_row("SELECT count(*) FROM sqlite_master", [], |r| {
                r.get::<_, i64>(0)
            })
            .map_err(|e| corrupt(&path, e))?;
        let mode: String = self
            .conn
            .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
            .map_err(|e| corrupt(&path, e))?;
        if !mode.eq_ignore_ascii_case("wal") {
            return Err(ErrorKind::Sqlite(format!(
                "could not switch the lineage database to WAL mode (got {mode})"
            ))
            .into());
        }
        self.conn
            .execute_batch("PRAGMA foreign_keys = ON; PRAGMA synchronous = FULL;")
            .map_err(|e| corrupt(&path, e))?;
        Ok(())
    }

    fn user_version(&self) -> Result<i64> {
        self.conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(|e| corrupt(&self.path, e))
    }

    fn migrate(&mut self) -> Result<()> {
        let found = self.user_version()?;
        if found > SCHEMA_VERSION {
            return Err(ErrorKind::SchemaTooNew {
                path: self.path.clone(),
                found,
                known: SCHEMA_VERSION,
            }
            .into());
        }
        if found == SCHEMA_VERSION {
            return Ok(());
        }
        let path = self.path.clone();
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)
            .map_err(db_err)?;
        // Another process may have migrated while we waited for the write lock.
        let now: i64 = tx
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(|e| corrupt(&path, e))?;
        for (v, sql) in MIGRATIONS {
            if *v > now {
                tx.execute_batch(sql).map_err(|e| {
                    Error::from(ErrorKind::Sqlite(format!(
                        "applying schema migration {v}: {}",
                        e.to_string().to_lowercase()
                    )))
                })?;
                tx.execute_batch(&format!("PRAGMA user_version = {v}"))
                    .map_err(db_err)?;
            }
        }
        tx.commit().map_err(db_err)?;
        Ok(())
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn schema_version(&self) -> Result<i64> {
        self.user_version()
    }

    /// Runs `f` inside one `BEGIN IMMEDIATE` transaction.
    pub fn write<T>(&mut self, f: impl FnOnce(&mut Tx<'_>) -> Result<T>) -> Result<T> {
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)
            .map_err(db_err)?;
        let mut t = Tx {
            tx,
            journal: Vec::new(),
        };
        let out = f(&mut t)?;
        if !t.journal.is_empty() {
            // Every row a command writes is committed to by one of its audit entries.
            return Err(ErrorKind::Internal(
                "rows were written without an audit entry to commit to them; nothing was recorded"
                    .into(),
            )
            .into());
        }
        t.tx.commit().map_err(db_err)?;
        Ok(out)
    }

    /// Runs `f`, whose queries all read one snapshot of the database (a deferred read
    /// transaction; under WAL, writers committing meanwhile are not seen). `verify` reads
    /// through it so that a step committed while it runs is seen whole or not at all.
    pub fn snapshot<T>(&self, f: impl FnOnce() -> Result<T>) -> Result<T> {
        self.conn.execute_batch("BEGIN DEFERRED").map_err(db_err)?;
        // The snapshot starts at the first read.
        let started = self
            .conn
            .query_row("SELECT count(*) FROM sqlite_master", [], |r| {
                r.get::<_, i64>(0)
            })
            .map_err(db_err);
        let out = started.and_then(|_| f());
        let end = self.conn.execute_batch("COMMIT").map_err(db_err);
        let out = out?;
        end?;
        Ok(out)
    }

    // ---- queries -------------------------------------------------------------------------

    pub fn datasets(&self) -> Result<Vec<Dataset>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT d.name, d.key_columns, d.created_at,
                        (SELECT count(*) FROM versions v WHERE v.dataset_id = d.id)
                 FROM datasets d ORDER BY d.name",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok(Dataset {
                    name: r.get(0)?,
                    key: parse_key(r.get::<_, Option<String>>(1)?),
                    created_at: r.get(2)?,
                    n_versions: r.get::<_, i64>(3)? as u64,
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    pub fn dataset(&self, name: &str) -> Result<Option<Dataset>> {
        Ok(self.datasets()?.into_iter().find(|d| d.name == name))
    }

    pub fn versions_of(&self, dataset: &str) -> Result<Vec<Version>> {
        self.query_versions("WHERE d.name = ?1 ORDER BY v.seq", params![dataset])
    }

    pub fn latest_version(&self, dataset: &str) -> Result<Option<Version>> {
        Ok(self
            .query_versions(
                "WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1",
                params![dataset],
            )?
            .pop())
    }

    pub fn version_by_seq(&self, dataset: &str, seq: u64) -> Result<Option<Version>> {
        Ok(self
            .query_versions(
                "WHERE d.name = ?1 AND v.seq = ?2",
                params![dataset, seq as i64],
            )?
            .pop())
    }

    pub fn version_by_id(&self, id: i64) -> Result<Option<Version>> {
        Ok(self.query_versions("WHERE v.id = ?1", params![id])?.pop())
    }

    /// The versions a step read, in order, each with its role ('input', 'table', 'other').
    pub fn step_input_versions(&self, step_id: i64) -> Result<Vec<(String, Version)>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT version_id, role FROM step_inputs WHERE step_id = ?1 ORDER BY position",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![step_id], |r| {
                Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?))
            })
            .map_err(db_err)?
            .collect::<rusqlite::Result<Vec<_>>>()
            .map_err(db_err)?;
        let mut out = Vec::with_capacity(rows.len());
        for (id, role) in rows {
            let v = self
                .version_by_id(id)?
                .ok_or_else(|| bad_field("step_inputs.version_id", &id.to_string()))?;
            out.push((role, v));
        }
        Ok(out)
    }

    /// The hash of a step's provenance object, if it has one (see `crate::provenance`).
    pub fn step_provenance(&self, step_id: i64) -> Result<Option<String>> {
        self.conn
            .query_row(
                "SELECT provenance FROM steps WHERE id = ?1",
                params![step_id],
                |r| r.get::<_, Option<String>>(0),
            )
            .optional()
            .map(Option::flatten)
            .map_err(db_err)
    }

    /// The versions a step produced, in order.
    pub fn step_outputs(&self, step_id: i64) -> Result<Vec<Version>> {
        self.query_versions("WHERE v.step_id = ?1 ORDER BY v.id", params![step_id])
    }

    /// Versions whose hash starts with `prefix` (lowercase hex).
    pub fn versions_by_hash_prefix(&self, prefix: &str) -> Result<Vec<Version>> {
        // A range scan instead of LIKE, so that no character of the prefix is a pattern.
        let hi = format!("{prefix}g");
        self.query_versions(
            "WHERE v.hash >= ?1 AND v.hash < ?2 ORDER BY d.name, v.seq",
            params![prefix, hi],
        )
    }

    /// The versions whose bytes or row index are the object `hash`.
    pub fn versions_of_object(&self, hash: &str) -> Result<Vec<Version>> {
        self.query_versions(
            "WHERE v.hash = ?1 OR v.row_index = ?1 ORDER BY v.id",
            params![hash],
        )
    }

    /// The objects no stored version needs: those every version that names them (as its
    /// bytes or its row index) is [`Storage::Recomputable`]. `reclaim` may free them and
    /// `verify` does not miss them.
    pub fn unstored_objects(&self) -> Result<std::collections::HashSet<String>> {
        let mut st = self.conn.prepare(UNSTORED_OBJECTS).map_err(db_err)?;
        let rows = st.query_map([], |r| r.get(0)).map_err(db_err)?;
        rows.collect::<rusqlite::Result<_>>().map_err(db_err)
    }

    /// Whether a version whose bytes are `hash` is recorded as stored (any of them: versions
    /// of identical bytes share one object). For [`super::Store::bytes_stored`].
    pub fn hash_stored(&self, hash: &str) -> Result<bool> {
        self.conn
            .query_row(
                "SELECT EXISTS (SELECT 1 FROM versions WHERE hash = ?1
                     AND (storage IS NULL OR storage <> 'recomputable'))
                 OR NOT EXISTS (SELECT 1 FROM versions WHERE hash = ?1)",
                params![hash],
                |r| r.get(0),
            )
            .map_err(db_err)
    }

    pub fn all_versions(&self) -> Result<Vec<Version>> {
        self.query_versions("ORDER BY d.name, v.seq", params![])
    }

    fn query_versions(&self, tail: &str, p: impl rusqlite::Params) -> Result<Vec<Version>> {
        let sql = format!(
            "SELECT v.id, d.name, v.seq, v.hash, v.row_index, v.n_rows, v.n_cols, v.n_bytes,
                    v.header, v.dialect, v.null_tokens, v.created_at, v.step_id, v.storage
             FROM versions v JOIN datasets d ON d.id = v.dataset_id {tail}"
        );
        let mut st = self.conn.prepare(&sql).map_err(db_err)?;
        let rows = st
            .query_map(p, |r| {
                Ok((
                    r.get::<_, i64>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, i64>(2)?,
                    r.get::<_, String>(3)?,
                    r.get::<_, String>(4)?,
                    r.get::<_, i64>(5)?,
                    r.get::<_, i64>(6)?,
                    r.get::<_, i64>(7)?,
                    r.get::<_, String>(8)?,
                    r.get::<_, String>(9)?,
                    r.get::<_, String>(10)?,
                    r.get::<_, String>(11)?,
                    r.get::<_, i64>(12)?,
                    r.get::<_, Option<String>>(13)?,
                ))
            })
            .map_err(db_err)?;
        let mut out = Vec::new();
        for row in rows {
            let (
                id,
                dataset,
                seq,
                hash,
                row_index,
                n_rows,
                n_cols,
                n_bytes,
                header,
                dialect,
                nulls,
                created_at,
                step_id,
                storage,
            ) = row.map_err(db_err)?;
            out.push(Version {
                id,
                dataset,
                seq: seq as u64,
                hash,
                row_index,
                n_rows: n_rows as u64,
                n_cols: n_cols as u64,
                n_bytes: n_bytes as u64,
                header: parse_json_field(&header, "versions.header")?,
                dialect: parse_json_field::<Dialect>(&dialect, "versions.dialect")?,
                null_tokens: parse_json_field(&nulls, "versions.null_tokens")?,
                created_at,
                step_id,
                storage: Storage::from_column(storage.as_deref()).ok_or_else(|| {
                    bad_field("versions.storage", storage.as_deref().unwrap_or(""))
                })?,
            });
        }
        Ok(out)
    }

    pub fn profiles(&self, version_id: i64) -> Result<Vec<ColumnProfile>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT name, inferred_type, n_blank, n_distinct, distinct_exact, min_value,
                        max_value, min_len, max_len
                 FROM column_profiles WHERE version_id = ?1 ORDER BY col_idx",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![version_id], |r| {
                Ok(ColumnProfile {
                    name: r.get(0)?,
                    inferred_type: r.get(1)?,
                    n_blank: r.get::<_, i64>(2)? as u64,
                    n_distinct: r.get::<_, i64>(3)? as u64,
                    distinct_exact: r.get::<_, i64>(4)? == 1,
                    min: r.get(5)?,
                    max: r.get(6)?,
                    min_len: r.get::<_, Option<i64>>(7)?.map(|v| v as u64),
                    max_len: r.get::<_, Option<i64>>(8)?.map(|v| v as u64),
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    pub fn step(&self, id: i64) -> Result<Option<Step>> {
        Ok(self.query_steps("WHERE s.id = ?1", params![id])?.pop())
    }

    /// Steps that produced or read a version of `dataset` (every step when `None`), newest first.
    pub fn steps(&self, dataset: Option<&str>) -> Result<Vec<Step>> {
        match dataset {
            None => self.query_steps("ORDER BY s.id DESC", params![]),
            Some(name) => self.query_steps(
                "WHERE s.id IN (
                    SELECT v.step_id FROM versions v JOIN datasets d ON d.id = v.dataset_id WHERE d.name = ?1
                    UNION
                    SELECT i.step_id FROM step_inputs i JOIN versions v ON v.id = i.version_id
                        JOIN datasets d ON d.id = v.dataset_id WHERE d.name = ?1)
                 ORDER BY s.id DESC",
                params![name],
            ),
        }
    }

    fn query_steps(&self, tail: &str, p: impl rusqlite::Params) -> Result<Vec<Step>> {
        let sql = format!(
            "SELECT s.id, s.kind, s.operation, s.params, a.identity, s.tool_version, s.reason,
                    s.started_at, s.ended_at, s.rows_in, s.rows_out, s.lineage, s.source, s.code,
                    s.repeats_step, s.reverts_step
             FROM steps s JOIN agents a ON a.id = s.agent_id {tail}"
        );
        let mut st = self.conn.prepare(&sql).map_err(db_err)?;
        type Raw = (
            i64,
            String,
            Option<String>,
            String,
            String,
            String,
            Option<String>,
            String,
            String,
            Option<i64>,
            Option<i64>,
            String,
            Option<String>,
            Option<String>,
            Option<i64>,
            Option<i64>,
        );
        let rows = st
            .query_map(p, |r| {
                Ok::<Raw, rusqlite::Error>((
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                    r.get(6)?,
                    r.get(7)?,
                    r.get(8)?,
                    r.get(9)?,
                    r.get(10)?,
                    r.get(11)?,
                    r.get(12)?,
                    r.get(13)?,
                    r.get(14)?,
                    r.get(15)?,
                ))
            })
            .map_err(db_err)?;
        let raws = rows
            .collect::<rusqlite::Result<Vec<Raw>>>()
            .map_err(db_err)?;
        let mut out = Vec::with_capacity(raws.len());
        for (
            id,
            kind,
            operation,
            params_text,
            agent,
            tool_version,
            reason,
            started_at,
            ended_at,
            rows_in,
            rows_out,
            lineage,
            source,
            code,
            repeats_step,
            reverts_step,
        ) in raws
        {
            out.push(Step {
                id,
                kind: StepKind::parse(&kind).ok_or_else(|| bad_field("steps.kind", &kind))?,
                operation,
                params: parse_json_field::<Value>(&params_text, "steps.params")?,
                agent,
                tool_version,
                reason,
                started_at,
                ended_at,
                rows_in: rows_in.map(|v| v as u64),
                rows_out: rows_out.map(|v| v as u64),
                lineage: LineageKind::parse(&lineage)
                    .ok_or_else(|| bad_field("steps.lineage", &lineage))?,
                source: match source {
                    Some(s) => Some(parse_json_field::<SourceFile>(&s, "steps.source")?),
                    None => None,
                },
                code: match code {
                    Some(c) => Some(parse_json_field::<Value>(&c, "steps.code")?),
                    None => None,
                },
                repeats_step,
                reverts_step,
                inputs: self.labels(
                    "SELECT d.name, v.seq FROM step_inputs i JOIN versions v ON v.id = i.version_id
                     JOIN datasets d ON d.id = v.dataset_id WHERE i.step_id = ?1 ORDER BY i.position",
                    id,
                )?,
                outputs: self.labels(
                    "SELECT d.name, v.seq FROM versions v JOIN datasets d ON d.id = v.dataset_id
                     WHERE v.step_id = ?1 ORDER BY v.id",
                    id,
                )?,
            });
        }
        Ok(out)
    }

    fn labels(&self, sql: &str, step_id: i64) -> Result<Vec<String>> {
        let mut st = self.conn.prepare_cached(sql).map_err(db_err)?;
        let rows = st
            .query_map(params![step_id], |r| {
                Ok(format!(
                    "{}:v{}",
                    r.get::<_, String>(0)?,
                    r.get::<_, i64>(1)?
                ))
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The row map of output version `output_id` from input `input_id`, ordered by output row.
    pub fn row_runs(&self, output_id: i64, input_id: i64) -> Result<Vec<RowRun>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT out_start, in_start, len FROM row_runs
                 WHERE output_id = ?1 AND input_id = ?2 ORDER BY out_start",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![output_id, input_id], |r| {
                Ok(RowRun {
                    out_start: r.get::<_, i64>(0)? as u64,
                    in_start: r.get::<_, i64>(1)? as u64,
                    len: r.get::<_, i64>(2)? as u64,
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The cells the step that made `output_id` changed, by row then column name.
    pub fn cell_changes(&self, output_id: i64) -> Result<Vec<CellChange>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT row_idx, column_name, old_value, new_value FROM cell_changes
                 WHERE output_id = ?1 ORDER BY row_idx, column_name",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![output_id], |r| {
                Ok(CellChange {
                    row_idx: r.get::<_, i64>(0)? as u64,
                    column: r.get(1)?,
                    old: r.get(2)?,
                    new: r.get(3)?,
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The check results recorded on a version, oldest first: (rule JSON, passed, failing
    /// rows, who, when, whether it ran as a plan's gate).
    pub fn check_results(&self, version_id: i64) -> Result<Vec<CheckRow>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT c.rule, c.passed, c.n_failing, a.identity, c.checked_at, c.gate FROM check_results c
                 JOIN agents a ON a.id = c.agent_id WHERE c.version_id = ?1 ORDER BY c.id",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![version_id], |r| {
                Ok((
                    r.get(0)?,
                    r.get::<_, i64>(1)? == 1,
                    r.get::<_, i64>(2)? as u64,
                    r.get(3)?,
                    r.get(4)?,
                    r.get::<_, i64>(5)? == 1,
                ))
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The notes on single cells of output version `output_id`: (row, column, note).
    pub fn cell_notes(&self, output_id: i64) -> Result<Vec<(u64, String, String)>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT row_idx, column_name, note FROM cell_notes
                 WHERE output_id = ?1 ORDER BY row_idx, column_name",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![output_id], |r| {
                Ok((r.get::<_, i64>(0)? as u64, r.get(1)?, r.get(2)?))
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// (output column, input column) pairs recorded for output version `output_id`.
    pub fn column_sources(&self, output_id: i64) -> Result<Vec<(String, String)>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT output_column, input_column FROM column_sources
                 WHERE output_id = ?1 ORDER BY output_column, input_column",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![output_id], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// Like [`Lineage::column_sources`], with the input version each source column is in:
    /// (output column, input version id, input column).
    pub fn column_sources_from(&self, output_id: i64) -> Result<Vec<(String, i64, String)>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT output_column, input_id, input_column FROM column_sources
                 WHERE output_id = ?1 ORDER BY output_column, input_id, input_column",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![output_id], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The input rows of `input_id` that step `step_id` removed, by row.
    pub fn drops(&self, step_id: i64, input_id: i64) -> Result<Vec<Drop>> {
        let mut st = self
            .conn
            .prepare_cached(
                "SELECT row_idx, reason, duplicate_of FROM drops
                 WHERE step_id = ?1 AND input_id = ?2 ORDER BY row_idx",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map(params![step_id, input_id], |r| {
                Ok(Drop {
                    row_idx: r.get::<_, i64>(0)? as u64,
                    reason: r.get(1)?,
                    duplicate_of: r.get::<_, Option<i64>>(2)?.map(|v| v as u64),
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    pub fn audit_entries(&self) -> Result<Vec<AuditEntry>> {
        super::audit::entries(&self.conn)
    }

    /// Every endorsement (sign-offs and changes to the trusted keys), in recording order.
    pub fn endorsements(&self) -> Result<Vec<Endorsement>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT id, kind, subject, label, meaning, name, signed_at, fingerprint,
                        public_key, admitted_key, statement, signature
                 FROM endorsements ORDER BY id",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok(Endorsement {
                    id: r.get(0)?,
                    kind: r.get(1)?,
                    subject: r.get(2)?,
                    label: r.get(3)?,
                    meaning: r.get(4)?,
                    name: r.get(5)?,
                    signed_at: r.get(6)?,
                    fingerprint: r.get(7)?,
                    public_key: r.get(8)?,
                    admitted_key: r.get(9)?,
                    statement: r.get(10)?,
                    signature: r.get(11)?,
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The meanings the store declared, in declaration order.
    pub fn meanings(&self) -> Result<Vec<Meaning>> {
        let mut st = self
            .conn
            .prepare("SELECT word, description, declared_at FROM meanings ORDER BY id")
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok(Meaning {
                    word: r.get(0)?,
                    description: r.get(1)?,
                    declared_at: Some(r.get(2)?),
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The recorded size of object `hash`, when it is recorded.
    pub fn object_size(&self, hash: &str) -> Result<Option<u64>> {
        self.conn
            .query_row(
                "SELECT n_bytes FROM objects WHERE hash = ?1",
                params![hash],
                |r| r.get::<_, i64>(0),
            )
            .optional()
            .map(|n| n.map(|n| n as u64))
            .map_err(db_err)
    }

    /// Every object the database records, as (hash, kind, n_bytes).
    pub fn objects(&self) -> Result<Vec<(String, String, u64)>> {
        let mut st = self
            .conn
            .prepare("SELECT hash, kind, n_bytes FROM objects ORDER BY hash")
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get::<_, i64>(2)? as u64))
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// SQLite's own structural check plus its foreign-key check, as human-readable lines.
    pub fn integrity_problems(&self) -> Result<Vec<String>> {
        let mut out = Vec::new();
        let mut st = self
            .conn
            .prepare("PRAGMA integrity_check")
            .map_err(|e| corrupt(&self.path, e))?;
        let rows = st
            .query_map([], |r| r.get::<_, String>(0))
            .map_err(|e| corrupt(&self.path, e))?;
        for r in rows {
            let line = r.map_err(|e| corrupt(&self.path, e))?;
            if line != "ok" {
                out.push(format!("database structure: {line}"));
            }
        }
        out.extend(self.strings("PRAGMA foreign_key_check", |r| {
            Ok(format!(
                "table {} row {} refers to a missing row of {}",
                r.get::<_, String>(0)?,
                r.get::<_, Option<i64>>(1)?
                    .map_or("?".into(), |v| v.to_string()),
                r.get::<_, String>(2)?
            ))
        })?);
        Ok(out)
    }

    /// Checks that go beyond foreign keys: every version's objects are of the right kind, and
    /// version numbers of each dataset run 1..n without gaps.
    pub fn consistency_problems(&self) -> Result<Vec<String>> {
        let mut out = Vec::new();
        out.extend(self.strings(
            "SELECT d.name, v.seq, o.kind, 'table' FROM versions v JOIN datasets d ON d.id = v.dataset_id
                JOIN objects o ON o.hash = v.hash WHERE o.kind != 'table'
             UNION ALL
             SELECT d.name, v.seq, o.kind, 'row_index' FROM versions v JOIN datasets d ON d.id = v.dataset_id
                JOIN objects o ON o.hash = v.row_index WHERE o.kind != 'row_index'",
            |r| {
                Ok(format!(
                    "version {}:v{}: its {} object is recorded as kind {}",
                    r.get::<_, String>(0)?,
                    r.get::<_, i64>(1)?,
                    r.get::<_, String>(3)?,
                    r.get::<_, String>(2)?
                ))
            },
        )?);
        out.extend(self.strings(
            "SELECT d.name, count(v.id), coalesce(max(v.seq), 0) FROM datasets d
             LEFT JOIN versions v ON v.dataset_id = d.id GROUP BY d.id
             HAVING count(v.id) != coalesce(max(v.seq), 0)",
            |r| {
                Ok(format!(
                    "dataset {}: {} versions but numbers go up to {} (a version is missing)",
                    r.get::<_, String>(0)?,
                    r.get::<_, i64>(1)?,
                    r.get::<_, i64>(2)?
                ))
            },
        )?);
        Ok(out)
    }

    /// The rows a committed selector names now, as (rowid, canonical encoding); an error when
    /// the table is gone or unreadable.
    pub fn selected_rows(&self, sel: &Selector) -> Result<Vec<(i64, Vec<u8>)>> {
        super::audit::select_rows(&self.conn, sel)
    }

    /// Every rowid of one of [`super::audit::TABLES`].
    pub fn rowids(&self, table: &str) -> Result<Vec<i64>> {
        super::audit::rowids(&self.conn, table)
    }

    /// The tables, views and triggers the database holds (names and types), besides SQLite's own.
    pub fn schema_objects(&self) -> Result<Vec<(String, String)>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT type, name FROM sqlite_master WHERE type IN ('table', 'view', 'trigger')
                 AND name NOT LIKE 'sqlite\\_%' ESCAPE '\\' ORDER BY name",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// Runs a query without parameters and renders each row as a line.
    fn strings(
        &self,
        sql: &str,
        render: impl FnMut(&rusqlite::Row<'_>) -> rusqlite::Result<String>,
    ) -> Result<Vec<String>> {
        let mut st = self.conn.prepare(sql).map_err(db_err)?;
        let rows = st.query_map([], render).map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }
}

fn parse_key(v: Option<String>) -> Option<Vec<String>> {
    v.and_then(|s| serde_json::from_str(&s).ok())
}

fn bad_field(field: &str, value: &str) -> Error {
    ErrorKind::Inconsistent(format!(
        "unexpected value {value:?} in {field}; run `sluice verify`"
    ))
    .into()
}

fn parse_json_field<T: serde::de::DeserializeOwned>(text: &str, field: &str) -> Result<T> {
    serde_json::from_str(text).map_err(|e| {
        ErrorKind::Inconsistent(format!(
            "{field} holds malformed JSON ({e}); run `sluice verify`"
        ))
        .into()
    })
}

/// A recorded check result: (rule JSON, passed, failing rows, who, when).
pub type CheckRow = (String, bool, u64, String, String, bool);

/// A step to record.
pub struct NewStep<'a> {
    pub kind: StepKind,
    pub operation: Option<&'a str>,
    pub params: Value,
    pub agent: &'a Agent,
    pub reason: Option<&'a str>,
    pub started_at: String,
    pub ended_at: String,
    pub rows_in: Option<u64>,
    pub rows_out: Option<u64>,
    pub lineage: LineageKind,
    pub source: Option<&'a SourceFile>,
    /// (version id, role) of each input, in order.
    pub inputs: Vec<(i64, &'a str)>,
    /// The hash of the step's provenance object (changed cells, dropped rows), when it has one;
    /// the object must be recorded with `insert_object` first.
    pub provenance: Option<&'a str>,
    /// For outside commands and hand edits: what ran and where (stored as canonical JSON in
    /// `steps.code`).
    pub code: Option<&'a Value>,
    /// The step this one repeats on other data (`rerun --with`).
    pub repeats_step: Option<i64>,
}

/// A version to record.
pub struct NewVersion<'a> {
    pub dataset: &'a str,
    /// When `Some`, the dataset's declared key is set to these columns.
    pub key: Option<&'a [String]>,
    pub step_id: i64,
    pub hash: &'a str,
    pub n_bytes: u64,
    pub row_index: &'a str,
    pub row_index_bytes: u64,
    pub n_rows: u64,
    pub header: &'a [String],
    pub dialect: &'a Dialect,
    pub null_tokens: &'a [String],
    pub profiles: &'a [ColumnProfile],
    pub created_at: &'a str,
    /// Whether the version's bytes are kept (see [`Storage`]).
    pub storage: Storage,
}

/// An open write transaction. `journal` names the rows written since the last audit entry; the
/// next entry commits to them (see [`super::audit`]).
pub struct Tx<'c> {
    pub(super) tx: rusqlite::Transaction<'c>,
    journal: Vec<Selector>,
}

impl Tx<'_> {
    pub(super) fn wrote(&mut self, table: &'static str, by: &'static str, key: Key) {
        self.journal.push(Selector::one(table, by, key));
    }

    pub(super) fn wrote_range(
        &mut self,
        table: &'static str,
        by: &'static str,
        from: Key,
        to: Key,
    ) {
        self.journal.push(Selector {
            table,
            by,
            from,
            to,
        });
    }

    pub(super) fn agent_id(&mut self, agent: &Agent) -> Result<i64> {
        self.tx
            .execute(
                "INSERT INTO agents (identity, kind, source) VALUES (?1, 'person', ?2)
                 ON CONFLICT (identity) DO NOTHING",
                params![agent.identity(), agent.source],
            )
            .map_err(db_err)?;
        let id = self
            .tx
            .query_row(
                "SELECT id FROM agents WHERE identity = ?1",
                params![agent.identity()],
                |r| r.get(0),
            )
            .map_err(db_err)?;
        self.wrote("agents", "id", Key::Int(id));
        Ok(id)
    }

    pub fn insert_step(&mut self, s: &NewStep<'_>) -> Result<i64> {
        let agent_id = self.agent_id(s.agent)?;
        let source = match s.source {
            Some(src) => Some(serde_json::to_string(src).map_err(|e| Error::usage(e.to_string()))?),
            None => None,
        };
        self.tx
            .execute(
                "INSERT INTO steps (kind, operation, params, agent_id, tool_version, reason,
                    started_at, ended_at, rows_in, rows_out, lineage, source, provenance, code,
                    repeats_step)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15)",
                params![
                    s.kind.as_str(),
                    s.operation,
                    canonical_json(&s.params),
                    agent_id,
                    crate::TOOL_VERSION,
                    s.reason,
                    s.started_at,
                    s.ended_at,
                    s.rows_in.map(|v| v as i64),
                    s.rows_out.map(|v| v as i64),
                    s.lineage.as_str(),
                    source,
                    s.provenance,
                    s.code.map(canonical_json),
                    s.repeats_step,
                ],
            )
            .map_err(db_err)?;
        let step_id = self.tx.last_insert_rowid();
        self.wrote("steps", "id", Key::Int(step_id));
        self.wrote("step_inputs", "step_id", Key::Int(step_id));
        for (pos, (vid, role)) in s.inputs.iter().enumerate() {
            self.tx
                .execute(
                    "INSERT INTO step_inputs (step_id, position, version_id, role) VALUES (?1, ?2, ?3, ?4)",
                    params![step_id, pos as i64, vid, role],
                )
                .map_err(db_err)?;
        }
        Ok(step_id)
    }

    /// Marks `step_id` as the revert of `reverted` (`steps.reverts_step`).
    pub fn set_reverts_step(&mut self, step_id: i64, reverted: i64) -> Result<()> {
        self.tx
            .execute(
                "UPDATE steps SET reverts_step = ?1 WHERE id = ?2",
                params![reverted, step_id],
            )
            .map_err(db_err)?;
        self.wrote("steps", "id", Key::Int(step_id));
        Ok(())
    }

    pub fn insert_object(&mut self, hash: &str, n_bytes: u64, kind: &str, at: &str) -> Result<()> {
        self.tx
            .execute(
                "INSERT INTO objects (hash, n_bytes, kind, created_at) VALUES (?1, ?2, ?3, ?4)
                 ON CONFLICT (hash) DO NOTHING",
                params![hash, n_bytes as i64, kind, at],
            )
            .map_err(db_err)?;
        self.wrote("objects", "hash", Key::Text(hash.to_string()));
        Ok(())
    }

    pub fn latest_version_hash(&self, dataset: &str) -> Result<Option<String>> {
        self.tx
            .query_row(
                "SELECT v.hash FROM versions v JOIN datasets d ON d.id = v.dataset_id
                 WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1",
                params![dataset],
                |r| r.get(0),
            )
            .optional()
            .map_err(db_err)
    }

    /// The id of the latest version of `dataset`, inside the transaction.
    pub fn latest_version_id(&self, dataset: &str) -> Result<Option<i64>> {
        self.tx
            .query_row(
                "SELECT v.id FROM versions v JOIN datasets d ON d.id = v.dataset_id
                 WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1",
                params![dataset],
                |r| r.get(0),
            )
            .optional()
            .map_err(db_err)
    }

    /// Records a version (creating its dataset when new) with its objects and profile, and
    /// returns its id and 1-based number within the dataset.
    pub fn insert_version(&mut self, v: &NewVersion<'_>) -> Result<(i64, u64)> {
        self.refuse_erased_bytes(v.hash)?;
        let key_json = match v.key {
            Some(k) => Some(serde_json::to_string(k).map_err(|e| Error::usage(e.to_string()))?),
            None => None,
        };
        self.tx
            .execute(
                "INSERT INTO datasets (name, key_columns, created_at) VALUES (?1, ?2, ?3)
                 ON CONFLICT (name) DO NOTHING",
                params![v.dataset, key_json, v.created_at],
            )
            .map_err(db_err)?;
        if let Some(k) = &key_json {
            self.tx
                .execute(
                    "UPDATE datasets SET key_columns = ?2 WHERE name = ?1",
                    params![v.dataset, k],
                )
                .map_err(db_err)?;
        }
        let dataset_id: i64 = self
            .tx
            .query_row(
                "SELECT id FROM datasets WHERE name = ?1",
                params![v.dataset],
                |r| r.get(0),
            )
            .map_err(db_err)?;
        self.wrote("datasets", "id", Key::Int(dataset_id));
        let seq: i64 = self
            .tx
            .query_row(
                "SELECT coalesce(max(seq), 0) + 1 FROM versions WHERE dataset_id = ?1",
                params![dataset_id],
                |r| r.get(0),
            )
            .map_err(db_err)?;
        self.insert_object(v.hash, v.n_bytes, "table", v.created_at)?;
        self.insert_object(v.row_index, v.row_index_bytes, "row_index", v.created_at)?;
        self.tx
            .execute(
                "INSERT INTO versions (dataset_id, seq, hash, row_index, step_id, n_rows, n_cols,
                    n_bytes, header, dialect, null_tokens, created_at, storage)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13)",
                params![
                    dataset_id,
                    seq,
                    v.hash,
                    v.row_index,
                    v.step_id,
                    v.n_rows as i64,
                    v.header.len() as i64,
                    v.n_bytes as i64,
                    json(v.header),
                    json(v.dialect),
                    json(v.null_tokens),
                    v.created_at,
                    v.storage.column(),
                ],
            )
            .map_err(db_err)?;
        let version_id = self.tx.last_insert_rowid();
        self.wrote("versions", "id", Key::Int(version_id));
        self.wrote("column_profiles", "version_id", Key::Int(version_id));
        for (i, p) in v.profiles.iter().enumerate() {
            self.tx
                .execute(
                    "INSERT INTO column_profiles (version_id, col_idx, name, inferred_type, n_blank,
                        n_distinct, distinct_exact, min_value, max_value, min_len, max_len)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
                    params![
                        version_id,
                        i as i64,
                        p.name,
                        p.inferred_type,
                        p.n_blank as i64,
                        p.n_distinct as i64,
                        i64::from(p.distinct_exact),
                        p.min,
                        p.max,
                        p.min_len.map(|x| x as i64),
                        p.max_len.map(|x| x as i64),
                    ],
                )
                .map_err(db_err)?;
        }
        Ok((version_id, seq as u64))
    }

    /// Records the provenance of one output version: its row map, the cells changed and the
    /// input rows dropped.
    /// Records the results of checking rules on version `version_id`: (rule as canonical
    /// JSON, passed, failing row count, first failing rows as JSON).
    pub fn insert_check_results(
        &mut self,
        version_id: i64,
        agent: &Agent,
        results: &[(String, bool, u64, String)],
        gate: bool,
        at: &str,
    ) -> Result<()> {
        let agent_id = self.agent_id(agent)?;
        let mut ids = Vec::with_capacity(results.len());
        let mut st = self
            .tx
            .prepare_cached(
                "INSERT INTO check_results (version_id, rule, passed, n_failing, first_failing, agent_id, checked_at, gate)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            )
            .map_err(db_err)?;
        for (rule, passed, n, first) in results {
            st.execute(params![
                version_id,
                rule,
                i64::from(*passed),
                *n as i64,
                first,
                agent_id,
                at,
                i64::from(gate)
            ])
            .map_err(db_err)?;
            ids.push(self.tx.last_insert_rowid());
        }
        drop(st);
        for id in ids {
            self.wrote("check_results", "id", Key::Int(id));
        }
        Ok(())
    }

    /// Records notes on single cells of output version `output_id`: (row, column, note).
    pub fn insert_cell_notes(
        &mut self,
        step_id: i64,
        output_id: i64,
        notes: &[(u64, String, String)],
    ) -> Result<()> {
        let mut st = self
            .tx
            .prepare_cached(
                "INSERT INTO cell_notes (step_id, output_id, row_idx, column_name, note)
                 VALUES (?1, ?2, ?3, ?4, ?5)",
            )
            .map_err(db_err)?;
        for (row, col, note) in notes {
            st.execute(params![step_id, output_id, *row as i64, col, note])
                .map_err(db_err)?;
        }
        drop(st);
        if !notes.is_empty() {
            self.wrote("cell_notes", "output_id", Key::Int(output_id));
        }
        Ok(())
    }

    /// Records, for output version `output_id`, which input columns its columns came from
    /// (output column, input column), where that is not simply the column of the same name.
    pub fn insert_column_sources(
        &mut self,
        step_id: i64,
        output_id: i64,
        input_id: i64,
        sources: &[(String, String)],
    ) -> Result<()> {
        let mut st = self
            .tx
            .prepare_cached(
                "INSERT INTO column_sources (step_id, output_id, output_column, input_id, input_column)
                 VALUES (?1, ?2, ?3, ?4, ?5) ON CONFLICT DO NOTHING",
            )
            .map_err(db_err)?;
        for (out, inp) in sources {
            st.execute(params![step_id, output_id, out, input_id, inp])
                .map_err(db_err)?;
        }
        drop(st);
        if !sources.is_empty() {
            self.wrote("column_sources", "output_id", Key::Int(output_id));
        }
        Ok(())
    }

    /// Records that version `version_id`'s bytes are now kept, kept by request, or left to be
    /// recomputed; the next audit entry commits to the row anew.
    pub fn set_storage(&mut self, version_id: i64, storage: Storage) -> Result<()> {
        self.tx
            .execute(
                "UPDATE versions SET storage = ?2 WHERE id = ?1",
                params![version_id, storage.column()],
            )
            .map_err(db_err)?;
        self.wrote("versions", "id", Key::Int(version_id));
        Ok(())
    }

    /// The hash of every object the database records as stored (`reclaim` keeps exactly
    /// these): all but those only recomputable versions name ([`Lineage::unstored_objects`]).
    pub fn object_hashes(&self) -> Result<Vec<String>> {
        // The complement of `UNSTORED_OBJECTS`, written out (SQL is never built with format!).
        let mut st = self
            .tx
            .prepare(
                "SELECT o.hash FROM objects o
                 WHERE NOT (EXISTS (SELECT 1 FROM versions v
                                    WHERE v.hash = o.hash OR v.row_index = o.hash)
                        AND NOT EXISTS (SELECT 1 FROM versions v
                                        WHERE (v.hash = o.hash OR v.row_index = o.hash)
                                          AND (v.storage IS NULL OR v.storage <> 'recomputable')))
                 ORDER BY o.hash",
            )
            .map_err(db_err)?;
        let rows = st.query_map([], |r| r.get(0)).map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The last audit entry's sequence number and hash, inside the transaction.
    pub fn audit_head(&self) -> Result<Option<(u64, String)>> {
        self.tx
            .query_row(
                "SELECT seq, hash FROM audit_log ORDER BY seq DESC LIMIT 1",
                [],
                |r| Ok((r.get::<_, i64>(0)? as u64, r.get(1)?)),
            )
            .optional()
            .map_err(db_err)
    }

    /// Records an endorsement (its `id` is ignored) and returns its id.
    pub fn insert_endorsement(&mut self, e: &Endorsement) -> Result<i64> {
        self.tx
            .execute(
                "INSERT INTO endorsements (kind, subject, label, meaning, name, signed_at,
                    fingerprint, public_key, admitted_key, statement, signature)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
                params![
                    e.kind,
                    e.subject,
                    e.label,
                    e.meaning,
                    e.name,
                    e.signed_at,
                    e.fingerprint,
                    e.public_key,
                    e.admitted_key,
                    e.statement,
                    e.signature
                ],
            )
            .map_err(db_err)?;
        let id = self.tx.last_insert_rowid();
        self.wrote("endorsements", "id", Key::Int(id));
        Ok(id)
    }

    /// Records a meaning the store declares; returns its id.
    pub fn insert_meaning(&mut self, m: &Meaning, at: &str) -> Result<i64> {
        self.tx
            .execute(
                "INSERT INTO meanings (word, description, declared_at) VALUES (?1, ?2, ?3)",
                params![m.word, m.description, at],
            )
            .map_err(db_err)?;
        let id = self.tx.last_insert_rowid();
        self.wrote("meanings", "id", Key::Int(id));
        Ok(id)
    }

    /// Appends one entry to the audit chain, inside this transaction.
    pub fn audit(
        &mut self,
        agent: &Agent,
        action: &str,
        subject: &str,
        details: &Value,
        at: &str,
    ) -> Result<AuditEntry> {
        let journal = std::mem::take(&mut self.journal);
        super::audit::append(&self.tx, agent, action, subject, details, at, journal)
    }
}

fn json<T: serde::Serialize + ?Sized>(x: &T) -> String {
    serde_json::to_string(x).unwrap_or_else(|_| "null".to_string())
}
