//! The lineage database: opening it (SQLite in the store folder, or PostgreSQL on a server,
//! behind [`super::backend::Database`]), applying the backend's migrations, the write
//! transaction every command goes through, and the queries the rest of the engine asks. All
//! SQL in sluice is here, in [`super::audit`] and in the backends, and every value reaches the
//! database as a bound parameter, never spliced into SQL text.

use std::path::Path;

use serde_json::Value;

use super::audit::{Key, RowSalts, Selector};
use super::backend::{self, Database, Kind, Row};
use super::pg::Pg;
use super::sqlite::Sqlite;
use crate::error::{Error, ErrorKind, Result};
use crate::model::{
    canonical_json, Agent, AuditEntry, CellChange, ColumnProfile, Dataset, Dialect, Drop,
    Endorsement, LineageKind, Meaning, RowRun, SourceFile, Step, StepKind, Storage, Version,
};
use crate::vals;

/// The objects that only recomputable versions name (their bytes or row index).
const UNSTORED_OBJECTS: &str = "SELECT o.hash FROM objects o
     WHERE EXISTS (SELECT 1 FROM versions v WHERE v.hash = o.hash OR v.row_index = o.hash)
       AND NOT EXISTS (SELECT 1 FROM versions v WHERE (v.hash = o.hash OR v.row_index = o.hash)
                       AND (v.storage IS NULL OR v.storage <> 'recomputable'))";

/// The schema version this build writes (the SQLite migrations' last; a server's schema is
/// kept at the same number).
pub const SCHEMA_VERSION: i64 = super::sqlite::MIGRATIONS[super::sqlite::MIGRATIONS.len() - 1].0;

pub struct Lineage {
    pub(super) db: Box<dyn Database>,
}

fn u(v: i64) -> u64 {
    v as u64
}

impl Lineage {
    /// Creates a new SQLite database at `path` and applies every migration.
    pub fn create(path: &Path) -> Result<Lineage> {
        Lineage::with(Box::new(Sqlite::connect(path, true)?))
    }

    /// Opens an existing SQLite database, refusing one written by a newer schema and migrating
    /// an older one.
    pub fn open(path: &Path) -> Result<Lineage> {
        Lineage::with(Box::new(Sqlite::connect(path, false)?))
    }

    /// Connects to the lineage database on a PostgreSQL server (`conn`, a connection string
    /// without a password), migrating it when it is empty or older.
    pub fn connect_server(conn: &str) -> Result<Lineage> {
        Lineage::with(Box::new(Pg::connect(conn)?))
    }

    fn with(db: Box<dyn Database>) -> Result<Lineage> {
        db.migrate()?;
        Ok(Lineage { db })
    }

    /// Which backend holds the lineage.
    pub fn kind(&self) -> Kind {
        self.db.kind()
    }

    /// Where the lineage is, for messages: the file, or the server (never a password).
    pub fn describe(&self) -> String {
        self.db.describe()
    }

    /// Runs several statements without parameters (the roles' setup), in one transaction.
    pub(super) fn run_script(&self, sql: &str) -> Result<()> {
        self.in_transaction(&|db| db.batch(sql))
    }

    /// Runs `f` on the backend in one write transaction (the store's own work that records
    /// nothing in the lineage, such as the roles).
    pub(super) fn in_transaction(&self, f: &dyn Fn(&dyn Database) -> Result<()>) -> Result<()> {
        self.db.begin_write()?;
        match f(self.db.as_ref()) {
            Ok(()) => self.db.commit(),
            Err(e) => {
                let _ = self.db.rollback();
                Err(e)
            }
        }
    }

    /// Runs one query of the store's own (the roles') and returns its rows.
    pub(super) fn query_raw(&self, sql: &str, p: &[backend::Value]) -> Result<Vec<Row>> {
        self.db.query(sql, p)
    }

    /// Writes a copy of the lineage as it is now (one snapshot) to the new SQLite file `path`.
    pub fn copy_to(&self, path: &Path) -> Result<()> {
        if self.db.copy_file(path)? {
            return Ok(());
        }
        let target = Lineage::create(path)?;
        self.copy_into(&target).map(|_| ())
    }

    /// Why a copy into `target` would be refused, if it would: [`Lineage::copy_into`]'s check,
    /// made before anything else is copied (the copy checks again in its transaction).
    pub fn copy_refused(&self, target: &Lineage) -> Result<Option<String>> {
        let ours = self.audit_entries()?;
        let theirs = target.audit_entries()?;
        Ok(moved_on(
            &ours,
            &theirs,
            &self.describe(),
            &target.describe(),
        ))
    }

    /// Copies this lineage into `target`, in one snapshot here and one write transaction
    /// there (so a failure or a kill leaves `target` as it was), when `target` holds nothing
    /// or an earlier part of the same history: its audit chain is a beginning of this one,
    /// entry for entry. Rows keep their ids and values, so the chain's row commitments hold
    /// there. A `target` whose chain is not a beginning of this one (it moved on, or it is
    /// another history) is named ([`ErrorKind::MovedOn`]) and nothing is written.
    pub fn copy_into(&self, target: &Lineage) -> Result<Copied> {
        self.snapshot(|| {
            let ours = self.audit_entries()?;
            target.write(|tx| {
                let theirs = super::audit::entries(tx.db)?;
                if let Some(problem) = moved_on(&ours, &theirs, &self.describe(), &tx.db.describe())
                {
                    return Err(ErrorKind::MovedOn(problem).into());
                }
                if theirs.len() == ours.len() {
                    return Ok(Copied {
                        entries_before: theirs.len() as u64,
                        entries_copied: 0,
                    });
                }
                for (_, select, insert) in backend::COPY_ORDER {
                    for row in self.db.query(select, &[])? {
                        tx.db.execute(insert, &row.0)?;
                    }
                }
                for (select, update) in backend::COPY_CHANGES {
                    for row in self.db.query(select, &[])? {
                        tx.db.execute(update, &row.0)?;
                    }
                }
                Ok(Copied {
                    entries_before: theirs.len() as u64,
                    entries_copied: (ours.len() - theirs.len()) as u64,
                })
            })
        })
    }

    pub fn schema_version(&self) -> Result<i64> {
        self.db.schema_version()
    }

    /// Runs `f` inside one write transaction (SQLite: `BEGIN IMMEDIATE`; PostgreSQL: the
    /// writers' advisory lock first), committed when it returns `Ok`, rolled back otherwise.
    pub fn write<T>(&self, f: impl FnOnce(&mut Tx<'_>) -> Result<T>) -> Result<T> {
        self.db.begin_write()?;
        let mut t = Tx {
            db: self.db.as_ref(),
            journal: Vec::new(),
            objects: Vec::new(),
        };
        let out = f(&mut t);
        let out = match out {
            Ok(v) if !t.journal.is_empty() => {
                let _ = v;
                // Every row a command writes is committed to by one of its audit entries.
                Err(ErrorKind::Internal(
                    "rows were written without an audit entry to commit to them; nothing was recorded"
                        .into(),
                )
                .into())
            }
            other => other,
        };
        match out {
            Ok(v) => {
                self.db.commit()?;
                Ok(v)
            }
            Err(e) => {
                let _ = self.db.rollback();
                Err(e)
            }
        }
    }

    /// Runs `f`, whose queries all read one snapshot of the database (a read transaction;
    /// writers committing meanwhile are not seen). `verify` reads through it so that a step
    /// committed while it runs is seen whole or not at all.
    pub fn snapshot<T>(&self, f: impl FnOnce() -> Result<T>) -> Result<T> {
        self.db.begin_snapshot()?;
        let out = f();
        let end = self.db.end_snapshot();
        let out = out?;
        end?;
        Ok(out)
    }

    fn rows(&self, sql: &str, p: &[backend::Value]) -> Result<Vec<Row>> {
        self.db.query(sql, p)
    }

    fn first(&self, sql: &str, p: &[backend::Value]) -> Result<Option<Row>> {
        Ok(self.db.query(sql, p)?.into_iter().next())
    }

    // ---- queries -------------------------------------------------------------------------

    pub fn datasets(&self) -> Result<Vec<Dataset>> {
        self.rows(
            "SELECT d.name, d.key_columns, d.created_at,
                    (SELECT count(*) FROM versions v WHERE v.dataset_id = d.id)
             FROM datasets d ORDER BY d.name",
            &[],
        )?
        .iter()
        .map(|r| {
            Ok(Dataset {
                name: r.text(0)?,
                key: parse_key(r.opt_text(1)?),
                created_at: r.text(2)?,
                n_versions: u(r.int(3)?),
            })
        })
        .collect()
    }

    pub fn dataset(&self, name: &str) -> Result<Option<Dataset>> {
        Ok(self.datasets()?.into_iter().find(|d| d.name == name))
    }

    pub fn versions_of(&self, dataset: &str) -> Result<Vec<Version>> {
        self.query_versions(VERSIONS_OF, vals![dataset])
    }

    pub fn latest_version(&self, dataset: &str) -> Result<Option<Version>> {
        Ok(self.query_versions(LATEST_VERSION, vals![dataset])?.pop())
    }

    pub fn version_by_seq(&self, dataset: &str, seq: u64) -> Result<Option<Version>> {
        Ok(self
            .query_versions(VERSION_BY_SEQ, vals![dataset, seq as i64])?
            .pop())
    }

    pub fn version_by_id(&self, id: i64) -> Result<Option<Version>> {
        Ok(self.query_versions(VERSION_BY_ID, vals![id])?.pop())
    }

    /// The versions a step read, in order, each with its role ('input', 'table', 'other').
    pub fn step_input_versions(&self, step_id: i64) -> Result<Vec<(String, Version)>> {
        let rows = self.rows(
            "SELECT version_id, role FROM step_inputs WHERE step_id = ?1 ORDER BY position",
            vals![step_id],
        )?;
        let mut out = Vec::with_capacity(rows.len());
        for r in rows {
            let (id, role) = (r.int(0)?, r.text(1)?);
            let v = self
                .version_by_id(id)?
                .ok_or_else(|| bad_field("step_inputs.version_id", &id.to_string()))?;
            out.push((role, v));
        }
        Ok(out)
    }

    /// The hash of a step's provenance object, if it has one (see `crate::provenance`).
    pub fn step_provenance(&self, step_id: i64) -> Result<Option<String>> {
        match self.first("SELECT provenance FROM steps WHERE id = ?1", vals![step_id])? {
            Some(r) => r.opt_text(0),
            None => Ok(None),
        }
    }

    /// The hashes of every step's provenance object.
    pub fn provenance_objects(&self) -> Result<std::collections::HashSet<String>> {
        self.rows(
            "SELECT provenance FROM steps WHERE provenance IS NOT NULL",
            &[],
        )?
        .iter()
        .map(|r| r.text(0))
        .collect()
    }

    /// The versions a step produced, in order.
    pub fn step_outputs(&self, step_id: i64) -> Result<Vec<Version>> {
        self.query_versions(STEP_OUTPUTS, vals![step_id])
    }

    /// Versions whose hash starts with `prefix` (lowercase hex).
    pub fn versions_by_hash_prefix(&self, prefix: &str) -> Result<Vec<Version>> {
        // A range scan instead of LIKE, so that no character of the prefix is a pattern.
        let hi = format!("{prefix}g");
        self.query_versions(VERSIONS_BY_PREFIX, vals![prefix, hi])
    }

    /// The versions whose bytes or row index are the object `hash`.
    pub fn versions_of_object(&self, hash: &str) -> Result<Vec<Version>> {
        self.query_versions(VERSIONS_OF_OBJECT, vals![hash])
    }

    /// The objects no stored version needs: those every version that names them (as its
    /// bytes or its row index) is [`Storage::Recomputable`]. `reclaim` may free them and
    /// `verify` does not miss them.
    pub fn unstored_objects(&self) -> Result<std::collections::HashSet<String>> {
        self.rows(UNSTORED_OBJECTS, &[])?
            .iter()
            .map(|r| r.text(0))
            .collect()
    }

    /// Whether a version whose bytes are `hash` is recorded as stored (any of them: versions
    /// of identical bytes share one object). For [`super::Store::bytes_stored`].
    pub fn hash_stored(&self, hash: &str) -> Result<bool> {
        let r = self.first(
            "SELECT CASE WHEN EXISTS (SELECT 1 FROM versions WHERE hash = ?1
                     AND (storage IS NULL OR storage <> 'recomputable'))
                 OR NOT EXISTS (SELECT 1 FROM versions WHERE hash = ?1) THEN 1 ELSE 0 END",
            vals![hash],
        )?;
        Ok(r.map_or(Ok(0), |r| r.int(0))? == 1)
    }

    pub fn all_versions(&self) -> Result<Vec<Version>> {
        self.query_versions(ALL_VERSIONS, &[])
    }

    fn query_versions(&self, sql: &str, p: &[backend::Value]) -> Result<Vec<Version>> {
        read_versions(&self.rows(sql, p)?)
    }

    pub fn profiles(&self, version_id: i64) -> Result<Vec<ColumnProfile>> {
        self.rows(
            "SELECT name, inferred_type, n_blank, n_distinct, distinct_exact, min_value,
                    max_value, min_len, max_len
             FROM column_profiles WHERE version_id = ?1 ORDER BY col_idx",
            vals![version_id],
        )?
        .iter()
        .map(|r| {
            Ok(ColumnProfile {
                name: r.text(0)?,
                inferred_type: r.text(1)?,
                n_blank: u(r.int(2)?),
                n_distinct: u(r.int(3)?),
                distinct_exact: r.int(4)? == 1,
                min: r.opt_text(5)?,
                max: r.opt_text(6)?,
                min_len: r.opt_int(7)?.map(u),
                max_len: r.opt_int(8)?.map(u),
            })
        })
        .collect()
    }

    pub fn step(&self, id: i64) -> Result<Option<Step>> {
        Ok(self.query_steps(STEP_BY_ID, vals![id])?.pop())
    }

    /// Steps that produced or read a version of `dataset` (every step when `None`), newest first.
    pub fn steps(&self, dataset: Option<&str>) -> Result<Vec<Step>> {
        match dataset {
            None => self.query_steps(ALL_STEPS, &[]),
            Some(name) => self.query_steps(STEPS_OF_DATASET, vals![name]),
        }
    }

    fn query_steps(&self, sql: &str, p: &[backend::Value]) -> Result<Vec<Step>> {
        let raws = self.rows(sql, p)?;
        let mut out = Vec::with_capacity(raws.len());
        for r in raws {
            let id = r.int(0)?;
            let kind = r.text(1)?;
            let params_text = r.text(3)?;
            let lineage = r.text(11)?;
            out.push(Step {
                id,
                kind: StepKind::parse(&kind).ok_or_else(|| bad_field("steps.kind", &kind))?,
                operation: r.opt_text(2)?,
                params: parse_json_field::<Value>(&params_text, "steps.params")?,
                agent: r.text(4)?,
                tool_version: r.text(5)?,
                reason: r.opt_text(6)?,
                started_at: r.text(7)?,
                ended_at: r.text(8)?,
                rows_in: r.opt_int(9)?.map(u),
                rows_out: r.opt_int(10)?.map(u),
                lineage: LineageKind::parse(&lineage)
                    .ok_or_else(|| bad_field("steps.lineage", &lineage))?,
                source: match r.opt_text(12)? {
                    Some(s) => Some(parse_json_field::<SourceFile>(&s, "steps.source")?),
                    None => None,
                },
                code: match r.opt_text(13)? {
                    Some(c) => Some(parse_json_field::<Value>(&c, "steps.code")?),
                    None => None,
                },
                repeats_step: r.opt_int(14)?,
                reverts_step: r.opt_int(15)?,
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
        self.rows(sql, vals![step_id])?
            .iter()
            .map(|r| Ok(format!("{}:v{}", r.text(0)?, r.int(1)?)))
            .collect()
    }

    /// The row map of output version `output_id` from input `input_id`, ordered by output row.
    pub fn row_runs(&self, output_id: i64, input_id: i64) -> Result<Vec<RowRun>> {
        self.rows(
            "SELECT out_start, in_start, len FROM row_runs
             WHERE output_id = ?1 AND input_id = ?2 ORDER BY out_start",
            vals![output_id, input_id],
        )?
        .iter()
        .map(|r| {
            Ok(RowRun {
                out_start: u(r.int(0)?),
                in_start: u(r.int(1)?),
                len: u(r.int(2)?),
            })
        })
        .collect()
    }

    /// The cells the step that made `output_id` changed, by row then column name.
    pub fn cell_changes(&self, output_id: i64) -> Result<Vec<CellChange>> {
        self.rows(
            "SELECT row_idx, column_name, old_value, new_value FROM cell_changes
             WHERE output_id = ?1 ORDER BY row_idx, column_name",
            vals![output_id],
        )?
        .iter()
        .map(|r| {
            Ok(CellChange {
                row_idx: u(r.int(0)?),
                column: r.text(1)?,
                old: r.opt_text(2)?,
                new: r.opt_text(3)?,
            })
        })
        .collect()
    }

    /// The check results recorded on a version, oldest first: (rule JSON, passed, failing
    /// rows, who, when, whether it ran as a plan's gate).
    pub fn check_results(&self, version_id: i64) -> Result<Vec<CheckRow>> {
        self.rows(
            "SELECT c.rule, c.passed, c.n_failing, a.identity, c.checked_at, c.gate FROM check_results c
             JOIN agents a ON a.id = c.agent_id WHERE c.version_id = ?1 ORDER BY c.id",
            vals![version_id],
        )?
        .iter()
        .map(|r| {
            Ok((
                r.text(0)?,
                r.int(1)? == 1,
                u(r.int(2)?),
                r.text(3)?,
                r.text(4)?,
                r.int(5)? == 1,
            ))
        })
        .collect()
    }

    /// The notes on single cells of output version `output_id`: (row, column, note).
    pub fn cell_notes(&self, output_id: i64) -> Result<Vec<(u64, String, String)>> {
        self.rows(
            "SELECT row_idx, column_name, note FROM cell_notes
             WHERE output_id = ?1 ORDER BY row_idx, column_name",
            vals![output_id],
        )?
        .iter()
        .map(|r| Ok((u(r.int(0)?), r.text(1)?, r.text(2)?)))
        .collect()
    }

    /// (output column, input column) pairs recorded for output version `output_id`.
    pub fn column_sources(&self, output_id: i64) -> Result<Vec<(String, String)>> {
        self.rows(
            "SELECT output_column, input_column FROM column_sources
             WHERE output_id = ?1 ORDER BY output_column, input_column",
            vals![output_id],
        )?
        .iter()
        .map(|r| Ok((r.text(0)?, r.text(1)?)))
        .collect()
    }

    /// Like [`Lineage::column_sources`], with the input version each source column is in:
    /// (output column, input version id, input column).
    pub fn column_sources_from(&self, output_id: i64) -> Result<Vec<(String, i64, String)>> {
        self.rows(
            "SELECT output_column, input_id, input_column FROM column_sources
             WHERE output_id = ?1 ORDER BY output_column, input_id, input_column",
            vals![output_id],
        )?
        .iter()
        .map(|r| Ok((r.text(0)?, r.int(1)?, r.text(2)?)))
        .collect()
    }

    /// The input rows of `input_id` that step `step_id` removed, by row.
    pub fn drops(&self, step_id: i64, input_id: i64) -> Result<Vec<Drop>> {
        self.rows(
            "SELECT row_idx, reason, duplicate_of FROM drops
             WHERE step_id = ?1 AND input_id = ?2 ORDER BY row_idx",
            vals![step_id, input_id],
        )?
        .iter()
        .map(|r| {
            Ok(Drop {
                row_idx: u(r.int(0)?),
                reason: r.text(1)?,
                duplicate_of: r.opt_int(2)?.map(u),
            })
        })
        .collect()
    }

    pub fn audit_entries(&self) -> Result<Vec<AuditEntry>> {
        super::audit::entries(self.db.as_ref())
    }

    /// Every endorsement (sign-offs and changes to the trusted keys), in recording order.
    pub fn endorsements(&self) -> Result<Vec<Endorsement>> {
        self.rows(
            "SELECT id, kind, subject, label, meaning, name, signed_at, fingerprint,
                    public_key, admitted_key, statement, signature
             FROM endorsements ORDER BY id",
            &[],
        )?
        .iter()
        .map(|r| {
            Ok(Endorsement {
                id: r.int(0)?,
                kind: r.text(1)?,
                subject: r.text(2)?,
                label: r.text(3)?,
                meaning: r.text(4)?,
                name: r.text(5)?,
                signed_at: r.text(6)?,
                fingerprint: r.text(7)?,
                public_key: r.text(8)?,
                admitted_key: r.opt_text(9)?,
                statement: r.text(10)?,
                signature: r.text(11)?,
            })
        })
        .collect()
    }

    /// The meanings the store declared, in declaration order.
    pub fn meanings(&self) -> Result<Vec<Meaning>> {
        self.rows(
            "SELECT word, description, declared_at FROM meanings ORDER BY id",
            &[],
        )?
        .iter()
        .map(|r| {
            Ok(Meaning {
                word: r.text(0)?,
                description: r.text(1)?,
                declared_at: Some(r.text(2)?),
            })
        })
        .collect()
    }

    /// The recorded size of object `hash`, when it is recorded.
    pub fn object_size(&self, hash: &str) -> Result<Option<u64>> {
        match self.first("SELECT n_bytes FROM objects WHERE hash = ?1", vals![hash])? {
            Some(r) => Ok(Some(u(r.int(0)?))),
            None => Ok(None),
        }
    }

    /// Every object the database records, as (hash, kind, n_bytes).
    pub fn objects(&self) -> Result<Vec<(String, String, u64)>> {
        self.rows("SELECT hash, kind, n_bytes FROM objects ORDER BY hash", &[])?
            .iter()
            .map(|r| Ok((r.text(0)?, r.text(1)?, u(r.int(2)?))))
            .collect()
    }

    /// The backend's own structural and foreign-key checks, as human-readable lines.
    pub fn integrity_problems(&self) -> Result<Vec<String>> {
        self.db.integrity_problems()
    }

    /// Checks that go beyond foreign keys: every version's objects are of the right kind, and
    /// version numbers of each dataset run 1..n without gaps.
    pub fn consistency_problems(&self) -> Result<Vec<String>> {
        let mut out = Vec::new();
        for r in self.rows(
            "SELECT d.name, v.seq, o.kind, 'table' FROM versions v JOIN datasets d ON d.id = v.dataset_id
                JOIN objects o ON o.hash = v.hash WHERE o.kind != 'table'
             UNION ALL
             SELECT d.name, v.seq, o.kind, 'row_index' FROM versions v JOIN datasets d ON d.id = v.dataset_id
                JOIN objects o ON o.hash = v.row_index WHERE o.kind != 'row_index'",
            &[],
        )? {
            out.push(format!(
                "version {}:v{}: its {} object is recorded as kind {}",
                r.text(0)?,
                r.int(1)?,
                r.text(3)?,
                r.text(2)?
            ));
        }
        for r in self.rows(
            "SELECT d.name, count(v.id), coalesce(max(v.seq), 0) FROM datasets d
             LEFT JOIN versions v ON v.dataset_id = d.id GROUP BY d.id, d.name
             HAVING count(v.id) != coalesce(max(v.seq), 0)",
            &[],
        )? {
            out.push(format!(
                "dataset {}: {} versions but numbers go up to {} (a version is missing)",
                r.text(0)?,
                r.int(1)?,
                r.int(2)?
            ));
        }
        Ok(out)
    }

    /// The rows a committed selector names now, as (rowid, canonical encoding); an error when
    /// the table is gone or unreadable.
    pub fn selected_rows(&self, sel: &Selector) -> Result<Vec<(i64, Vec<u8>)>> {
        super::audit::select_rows(self.db.as_ref(), sel)
    }

    /// Every rowid of one of [`super::audit::TABLES`].
    pub fn rowids(&self, table: &str) -> Result<Vec<i64>> {
        super::audit::rowids(self.db.as_ref(), table)
    }

    /// The tables, views and triggers the database holds (names and types), besides the
    /// backend's own.
    pub fn schema_objects(&self) -> Result<Vec<(String, String)>> {
        self.db.schema_objects()
    }
}

/// The version queries: one column list, each with its own condition and order.
macro_rules! version_query {
    ($tail:literal) => {
        concat!(
            "SELECT v.id, d.name, v.seq, v.hash, v.row_index, v.n_rows, v.n_cols, v.n_bytes,
                    v.header, v.dialect, v.null_tokens, v.created_at, v.step_id, v.storage
             FROM versions v JOIN datasets d ON d.id = v.dataset_id ",
            $tail
        )
    };
}

/// What [`Lineage::copy_into`] did: the audit entries the target held, and how many it gained.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Copied {
    pub entries_before: u64,
    pub entries_copied: u64,
}

/// Why `theirs` (the target's chain) is not a beginning of `ours`, if it is not: the first
/// entry where they part, named in full.
fn moved_on(ours: &[AuditEntry], theirs: &[AuditEntry], from: &str, to: &str) -> Option<String> {
    let describe = |e: &AuditEntry| {
        format!(
            "audit entry {} ({} {} by {} at {}, {})",
            e.seq,
            e.action,
            e.subject,
            e.agent,
            e.at,
            crate::model::short_hash(&e.hash)
        )
    };
    for (i, t) in theirs.iter().enumerate() {
        match ours.get(i) {
            Some(o) if o.hash == t.hash => continue,
            Some(o) if i == 0 => {
                return Some(format!(
                    "{to} and {from} are different stores: their first audit entries differ (there {}, here {}); nothing was copied. Copy a store only into a new shared store (`sluice publish --to DIR --lineage-server CONN`) or into the one it was borrowed from",
                    describe(t),
                    describe(o)
                ))
            }
            Some(o) => {
                return Some(format!(
                    "{to} and {from} part at audit entry {}: there it is {}, here {}; nothing was copied. The histories differ from that entry on and are never merged: take a fresh copy of {to} into a new folder, redo the work after entry {} there, then copy it",
                    t.seq,
                    describe(t),
                    describe(o),
                    t.seq.saturating_sub(1)
                ))
            }
            None => {
                return Some(format!(
                    "{to} moved on: it holds {} audit entries, this store {}, and its {} is not here; nothing was copied. Take a fresh copy of {to} into a new folder, redo the work there, then copy it",
                    theirs.len(),
                    ours.len(),
                    describe(t)
                ))
            }
        }
    }
    None
}

const VERSIONS_OF: &str = version_query!("WHERE d.name = ?1 ORDER BY v.seq");
const LATEST_VERSION: &str = version_query!("WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1");
const VERSION_BY_SEQ: &str = version_query!("WHERE d.name = ?1 AND v.seq = ?2");
const VERSION_BY_ID: &str = version_query!("WHERE v.id = ?1");
const STEP_OUTPUTS: &str = version_query!("WHERE v.step_id = ?1 ORDER BY v.id");
const VERSIONS_BY_PREFIX: &str =
    version_query!("WHERE v.hash >= ?1 AND v.hash < ?2 ORDER BY d.name, v.seq");
const VERSIONS_OF_OBJECT: &str =
    version_query!("WHERE v.hash = ?1 OR v.row_index = ?1 ORDER BY v.id");
const ALL_VERSIONS: &str = version_query!("ORDER BY d.name, v.seq");

/// The step queries: one column list, each with its own condition and order.
macro_rules! step_query {
    ($tail:literal) => {
        concat!(
            "SELECT s.id, s.kind, s.operation, s.params, a.identity, s.tool_version, s.reason,
                    s.started_at, s.ended_at, s.rows_in, s.rows_out, s.lineage, s.source, s.code,
                    s.repeats_step, s.reverts_step
             FROM steps s JOIN agents a ON a.id = s.agent_id ",
            $tail
        )
    };
}

const STEP_BY_ID: &str = step_query!("WHERE s.id = ?1");
const ALL_STEPS: &str = step_query!("ORDER BY s.id DESC");
const STEPS_OF_DATASET: &str = step_query!(
    "WHERE s.id IN (
        SELECT v.step_id FROM versions v JOIN datasets d ON d.id = v.dataset_id WHERE d.name = ?1
        UNION
        SELECT i.step_id FROM step_inputs i JOIN versions v ON v.id = i.version_id
            JOIN datasets d ON d.id = v.dataset_id WHERE d.name = ?1)
     ORDER BY s.id DESC"
);

fn read_versions(rows: &[Row]) -> Result<Vec<Version>> {
    let mut out = Vec::with_capacity(rows.len());
    for r in rows {
        let storage = r.opt_text(13)?;
        out.push(Version {
            id: r.int(0)?,
            dataset: r.text(1)?,
            seq: u(r.int(2)?),
            hash: r.text(3)?,
            row_index: r.text(4)?,
            n_rows: u(r.int(5)?),
            n_cols: u(r.int(6)?),
            n_bytes: u(r.int(7)?),
            header: parse_json_field(&r.text(8)?, "versions.header")?,
            dialect: parse_json_field::<Dialect>(&r.text(9)?, "versions.dialect")?,
            null_tokens: parse_json_field(&r.text(10)?, "versions.null_tokens")?,
            created_at: r.text(11)?,
            step_id: r.int(12)?,
            storage: Storage::from_column(storage.as_deref())
                .ok_or_else(|| bad_field("versions.storage", storage.as_deref().unwrap_or("")))?,
        });
    }
    Ok(out)
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
/// An open write transaction. `journal` names the rows written since the last audit entry; the
/// next entry commits to them (see [`super::audit`]).
pub struct Tx<'c> {
    pub(super) db: &'c dyn Database,
    journal: Vec<Selector>,
    /// The objects this transaction names (`insert_object`), for the check that they are
    /// still where the store keeps them before it commits.
    objects: Vec<String>,
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

    fn exec(&self, sql: &str, p: &[backend::Value]) -> Result<u64> {
        self.db.execute(sql, p)
    }

    fn first(&self, sql: &str, p: &[backend::Value]) -> Result<Option<Row>> {
        Ok(self.db.query(sql, p)?.into_iter().next())
    }

    /// The one integer a query that always returns a row returns (an id it made).
    fn int(&self, sql: &str, p: &[backend::Value]) -> Result<i64> {
        match self.first(sql, p)? {
            Some(r) => r.int(0),
            None => Err(ErrorKind::Internal(format!("no row from {sql}")).into()),
        }
    }

    pub(super) fn agent_id(&mut self, agent: &Agent) -> Result<i64> {
        // Ids are given as the highest so far plus one, inside the write transaction that
        // holds the writers' lock: gap-free and in commit order on both backends.
        self.exec(
            "INSERT INTO agents (id, identity, kind, source)
             SELECT coalesce(max(id), 0) + 1, ?1, 'person', ?2 FROM agents WHERE true
             ON CONFLICT (identity) DO NOTHING",
            vals![agent.identity(), agent.source.as_str()],
        )?;
        let id = self.int(
            "SELECT id FROM agents WHERE identity = ?1",
            vals![agent.identity()],
        )?;
        self.wrote("agents", "id", Key::Int(id));
        Ok(id)
    }

    pub fn insert_step(&mut self, s: &NewStep<'_>) -> Result<i64> {
        let agent_id = self.agent_id(s.agent)?;
        let source = match s.source {
            Some(src) => Some(serde_json::to_string(src).map_err(|e| Error::usage(e.to_string()))?),
            None => None,
        };
        let step_id = self.int(
            "INSERT INTO steps (id, kind, operation, params, agent_id, tool_version, reason,
                started_at, ended_at, rows_in, rows_out, lineage, source, provenance, code,
                repeats_step)
             SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12,
                ?13, ?14, ?15 FROM steps
             RETURNING id",
            vals![
                s.kind.as_str(),
                s.operation,
                canonical_json(&s.params),
                agent_id,
                crate::TOOL_VERSION,
                s.reason,
                s.started_at.as_str(),
                s.ended_at.as_str(),
                s.rows_in.map(|v| v as i64),
                s.rows_out.map(|v| v as i64),
                s.lineage.as_str(),
                source,
                s.provenance,
                s.code.map(canonical_json),
                s.repeats_step,
            ],
        )?;
        self.wrote("steps", "id", Key::Int(step_id));
        self.wrote("step_inputs", "step_id", Key::Int(step_id));
        for (pos, (vid, role)) in s.inputs.iter().enumerate() {
            self.exec(
                "INSERT INTO step_inputs (step_id, position, version_id, role) VALUES (?1, ?2, ?3, ?4)",
                vals![step_id, pos as i64, *vid, *role],
            )?;
        }
        Ok(step_id)
    }

    /// Marks `step_id` as the revert of `reverted` (`steps.reverts_step`).
    pub fn set_reverts_step(&mut self, step_id: i64, reverted: i64) -> Result<()> {
        self.exec(
            "UPDATE steps SET reverts_step = ?1 WHERE id = ?2",
            vals![reverted, step_id],
        )?;
        self.wrote("steps", "id", Key::Int(step_id));
        Ok(())
    }

    pub fn insert_object(&mut self, hash: &str, n_bytes: u64, kind: &str, at: &str) -> Result<()> {
        self.exec(
            "INSERT INTO objects (hash, n_bytes, kind, created_at) VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (hash) DO NOTHING",
            vals![hash, n_bytes as i64, kind, at],
        )?;
        self.wrote("objects", "hash", Key::Text(hash.to_string()));
        self.objects.push(hash.to_string());
        Ok(())
    }

    /// The objects this transaction has named so far.
    pub fn objects_named(&self) -> &[String] {
        &self.objects
    }

    pub fn latest_version_hash(&self, dataset: &str) -> Result<Option<String>> {
        match self.first(
            "SELECT v.hash FROM versions v JOIN datasets d ON d.id = v.dataset_id
             WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1",
            vals![dataset],
        )? {
            Some(r) => Ok(Some(r.text(0)?)),
            None => Ok(None),
        }
    }

    /// The id of the latest version of `dataset`, inside the transaction.
    pub fn latest_version_id(&self, dataset: &str) -> Result<Option<i64>> {
        match self.first(
            "SELECT v.id FROM versions v JOIN datasets d ON d.id = v.dataset_id
             WHERE d.name = ?1 ORDER BY v.seq DESC LIMIT 1",
            vals![dataset],
        )? {
            Some(r) => Ok(Some(r.int(0)?)),
            None => Ok(None),
        }
    }

    /// Records a version (creating its dataset when new) with its objects and profile, and
    /// returns its id and 1-based number within the dataset.
    pub fn insert_version(&mut self, v: &NewVersion<'_>) -> Result<(i64, u64)> {
        self.refuse_erased_bytes(v.hash)?;
        let key_json = match v.key {
            Some(k) => Some(serde_json::to_string(k).map_err(|e| Error::usage(e.to_string()))?),
            None => None,
        };
        self.exec(
            "INSERT INTO datasets (id, name, key_columns, created_at)
             SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3 FROM datasets WHERE true
             ON CONFLICT (name) DO NOTHING",
            vals![v.dataset, key_json.clone(), v.created_at],
        )?;
        if let Some(k) = &key_json {
            self.exec(
                "UPDATE datasets SET key_columns = ?2 WHERE name = ?1",
                vals![v.dataset, k],
            )?;
        }
        let dataset_id = self.int("SELECT id FROM datasets WHERE name = ?1", vals![v.dataset])?;
        self.wrote("datasets", "id", Key::Int(dataset_id));
        let seq = self.int(
            "SELECT coalesce(max(seq), 0) + 1 FROM versions WHERE dataset_id = ?1",
            vals![dataset_id],
        )?;
        self.insert_object(v.hash, v.n_bytes, "table", v.created_at)?;
        self.insert_object(v.row_index, v.row_index_bytes, "row_index", v.created_at)?;
        let version_id = self.int(
            "INSERT INTO versions (id, dataset_id, seq, hash, row_index, step_id, n_rows, n_cols,
                n_bytes, header, dialect, null_tokens, created_at, storage)
             SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12,
                ?13 FROM versions
             RETURNING id",
            vals![
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
        )?;
        self.wrote("versions", "id", Key::Int(version_id));
        self.wrote("column_profiles", "version_id", Key::Int(version_id));
        let salts = RowSalts::new()?;
        for (i, p) in v.profiles.iter().enumerate() {
            self.exec(
                "INSERT INTO column_profiles (version_id, col_idx, name, inferred_type, n_blank,
                    n_distinct, distinct_exact, min_value, max_value, min_len, max_len, salt)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12)",
                &[
                    backend::Value::from(version_id),
                    backend::Value::from(i as i64),
                    backend::Value::from(p.name.as_str()),
                    backend::Value::from(p.inferred_type.as_str()),
                    backend::Value::from(p.n_blank as i64),
                    backend::Value::from(p.n_distinct as i64),
                    backend::Value::from(i64::from(p.distinct_exact)),
                    backend::Value::from(p.min.clone()),
                    backend::Value::from(p.max.clone()),
                    backend::Value::from(p.min_len.map(|x| x as i64)),
                    backend::Value::from(p.max_len.map(|x| x as i64)),
                    backend::Value::Blob(salts.salt(i as u64).to_vec()),
                ],
            )?;
        }
        Ok((version_id, seq as u64))
    }

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
        for (rule, passed, n, first) in results {
            ids.push(self.int(
                "INSERT INTO check_results (id, version_id, rule, passed, n_failing, first_failing,
                    agent_id, checked_at, gate)
                 SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8 FROM check_results
                 RETURNING id",
                vals![
                    version_id,
                    rule,
                    i64::from(*passed),
                    *n as i64,
                    first,
                    agent_id,
                    at,
                    i64::from(gate)
                ],
            )?);
        }
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
        let salts = RowSalts::new()?;
        for (i, (row, col, note)) in notes.iter().enumerate() {
            self.exec(
                "INSERT INTO cell_notes (step_id, output_id, row_idx, column_name, note, salt)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
                &[
                    backend::Value::from(step_id),
                    backend::Value::from(output_id),
                    backend::Value::from(*row as i64),
                    backend::Value::from(col),
                    backend::Value::from(note),
                    backend::Value::Blob(salts.salt(i as u64).to_vec()),
                ],
            )?;
        }
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
        for (out, inp) in sources {
            self.exec(
                "INSERT INTO column_sources (step_id, output_id, output_column, input_id, input_column)
                 VALUES (?1, ?2, ?3, ?4, ?5) ON CONFLICT DO NOTHING",
                vals![step_id, output_id, out, input_id, inp],
            )?;
        }
        if !sources.is_empty() {
            self.wrote("column_sources", "output_id", Key::Int(output_id));
        }
        Ok(())
    }

    /// Records that version `version_id`'s bytes are now kept, kept by request, or left to be
    /// recomputed; the next audit entry commits to the row anew.
    pub fn set_storage(&mut self, version_id: i64, storage: Storage) -> Result<()> {
        self.exec(
            "UPDATE versions SET storage = ?2 WHERE id = ?1",
            vals![version_id, storage.column()],
        )?;
        self.wrote("versions", "id", Key::Int(version_id));
        Ok(())
    }

    /// The hash of every object the database records as stored (`reclaim` keeps exactly
    /// these): all but those only recomputable versions name ([`Lineage::unstored_objects`]).
    pub fn object_hashes(&self) -> Result<Vec<String>> {
        // The complement of `UNSTORED_OBJECTS`, written out (SQL is never built with format!).
        self.db
            .query(
                "SELECT o.hash FROM objects o
                 WHERE NOT (EXISTS (SELECT 1 FROM versions v
                                    WHERE v.hash = o.hash OR v.row_index = o.hash)
                        AND NOT EXISTS (SELECT 1 FROM versions v
                                        WHERE (v.hash = o.hash OR v.row_index = o.hash)
                                          AND (v.storage IS NULL OR v.storage <> 'recomputable')))
                 ORDER BY o.hash",
                &[],
            )?
            .iter()
            .map(|r| r.text(0))
            .collect()
    }

    /// The last audit entry's sequence number and hash, inside the transaction.
    pub fn audit_head(&self) -> Result<Option<(u64, String)>> {
        match self.first(
            "SELECT seq, hash FROM audit_log ORDER BY seq DESC LIMIT 1",
            &[],
        )? {
            Some(r) => Ok(Some((u(r.int(0)?), r.text(1)?))),
            None => Ok(None),
        }
    }

    /// Records an endorsement (its `id` is ignored) and returns its id.
    pub fn insert_endorsement(&mut self, e: &Endorsement) -> Result<i64> {
        let id = self.int(
            "INSERT INTO endorsements (id, kind, subject, label, meaning, name, signed_at,
                fingerprint, public_key, admitted_key, statement, signature)
             SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11
             FROM endorsements
             RETURNING id",
            vals![
                &e.kind,
                &e.subject,
                &e.label,
                &e.meaning,
                &e.name,
                &e.signed_at,
                &e.fingerprint,
                &e.public_key,
                e.admitted_key.clone(),
                &e.statement,
                &e.signature
            ],
        )?;
        self.wrote("endorsements", "id", Key::Int(id));
        Ok(id)
    }

    /// Records a meaning the store declares; returns its id.
    pub fn insert_meaning(&mut self, m: &Meaning, at: &str) -> Result<i64> {
        let id = self.int(
            "INSERT INTO meanings (id, word, description, declared_at)
             SELECT coalesce(max(id), 0) + 1, ?1, ?2, ?3 FROM meanings
             RETURNING id",
            vals![&m.word, &m.description, at],
        )?;
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
        super::audit::append(self.db, agent, action, subject, details, at, journal)
    }
}

fn json<T: serde::Serialize + ?Sized>(x: &T) -> String {
    serde_json::to_string(x).unwrap_or_else(|_| "null".to_string())
}
