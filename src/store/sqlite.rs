//! The SQLite backend of the lineage database: the file `lineage.db` in the store folder, in
//! WAL mode, migrated with the embedded SQLite migrations in `schema/`. Writers are put in one
//! order by `BEGIN IMMEDIATE`, which takes the database's one write lock before the first read
//! (a second writer waits, up to the busy timeout).

use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::types::ValueRef;
use rusqlite::{Connection, OpenFlags};

use super::backend::{Database, Kind, Row, Value};
use crate::error::{Error, ErrorKind, Result};

/// The migrations, in order. Each entry is (schema version it produces, SQL).
pub const MIGRATIONS: &[(i64, &str)] = &[
    (1, include_str!("../../schema/0001_lineage.sql")),
    (2, include_str!("../../schema/0002_cell_notes.sql")),
    (3, include_str!("../../schema/0003_check_gate.sql")),
    (4, include_str!("../../schema/0004_step_provenance.sql")),
    (5, include_str!("../../schema/0005_endorsements.sql")),
    (6, include_str!("../../schema/0006_storage.sql")),
    (7, include_str!("../../schema/0007_erasure.sql")),
    (8, include_str!("../../schema/0008_row_salts.sql")),
    (9, include_str!("../../schema/0009_blocked_run_sets.sql")),
];

/// How long a command waits for another command's write transaction before giving up.
const BUSY_TIMEOUT: Duration = Duration::from_secs(60);

pub struct Sqlite {
    conn: Connection,
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

fn bind(v: &Value) -> rusqlite::types::Value {
    use rusqlite::types::Value as V;
    match v {
        Value::Null => V::Null,
        Value::Int(i) => V::Integer(*i),
        Value::Real(f) => V::Real(*f),
        Value::Text(t) => V::Text(t.clone()),
        Value::Blob(b) => V::Blob(b.clone()),
    }
}

fn read(v: ValueRef<'_>) -> Value {
    match v {
        ValueRef::Null => Value::Null,
        ValueRef::Integer(i) => Value::Int(i),
        ValueRef::Real(f) => Value::Real(f),
        ValueRef::Text(t) => Value::Text(String::from_utf8_lossy(t).into_owned()),
        ValueRef::Blob(b) => Value::Blob(b.to_vec()),
    }
}

impl Sqlite {
    /// Opens (with `create`, creates) the database at `path`, set up as sluice needs it. The
    /// caller migrates it.
    pub fn connect(path: &Path, create: bool) -> Result<Sqlite> {
        let flags = if create {
            OpenFlags::SQLITE_OPEN_READ_WRITE | OpenFlags::SQLITE_OPEN_CREATE
        } else {
            OpenFlags::SQLITE_OPEN_READ_WRITE
        };
        let conn = Connection::open_with_flags(path, flags).map_err(|e| corrupt(path, e))?;
        conn.busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| corrupt(path, e))?;
        // Reading the schema first turns "file is not a database" into a clear error.
        conn.query_row("SELECT count(*) FROM sqlite_master", [], |r| {
            r.get::<_, i64>(0)
        })
        .map_err(|e| corrupt(path, e))?;
        let mode: String = conn
            .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
            .map_err(|e| corrupt(path, e))?;
        if !mode.eq_ignore_ascii_case("wal") {
            return Err(ErrorKind::Sqlite(format!(
                "could not switch the lineage database to WAL mode (got {mode})"
            ))
            .into());
        }
        conn.execute_batch("PRAGMA foreign_keys = ON; PRAGMA synchronous = FULL;")
            .map_err(|e| corrupt(path, e))?;
        Ok(Sqlite {
            conn,
            path: path.to_path_buf(),
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Writes a copy of the database as it is now (one snapshot) to the new file `path`.
    fn vacuum_into(&self, path: &Path) -> Result<()> {
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

impl Database for Sqlite {
    fn kind(&self) -> Kind {
        Kind::Sqlite
    }

    fn describe(&self) -> String {
        self.path.display().to_string()
    }

    fn query(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>> {
        Ok(self.query_named(sql, params)?.1)
    }

    fn query_named(&self, sql: &str, params: &[Value]) -> Result<(Vec<String>, Vec<Row>)> {
        let mut st = self.conn.prepare_cached(sql).map_err(db_err)?;
        let names: Vec<String> = st.column_names().iter().map(|n| n.to_string()).collect();
        let n = names.len();
        let bound: Vec<rusqlite::types::Value> = params.iter().map(bind).collect();
        let rows = st
            .query_map(rusqlite::params_from_iter(bound.iter()), |r| {
                let mut row = Vec::with_capacity(n);
                for i in 0..n {
                    row.push(read(r.get_ref(i)?));
                }
                Ok(Row(row))
            })
            .map_err(db_err)?;
        let rows = rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)?;
        Ok((names, rows))
    }

    fn batch(&self, sql: &str) -> Result<()> {
        self.conn.execute_batch(sql).map_err(db_err)
    }

    fn execute(&self, sql: &str, params: &[Value]) -> Result<u64> {
        let mut st = self.conn.prepare_cached(sql).map_err(db_err)?;
        let bound: Vec<rusqlite::types::Value> = params.iter().map(bind).collect();
        let n = st
            .execute(rusqlite::params_from_iter(bound.iter()))
            .map_err(db_err)?;
        Ok(n as u64)
    }

    fn begin_write(&self) -> Result<()> {
        self.conn.execute_batch("BEGIN IMMEDIATE").map_err(db_err)
    }

    fn commit(&self) -> Result<()> {
        self.conn.execute_batch("COMMIT").map_err(db_err)
    }

    fn rollback(&self) -> Result<()> {
        if self.conn.is_autocommit() {
            return Ok(());
        }
        self.conn.execute_batch("ROLLBACK").map_err(db_err)
    }

    fn begin_snapshot(&self) -> Result<()> {
        self.conn.execute_batch("BEGIN DEFERRED").map_err(db_err)?;
        // The snapshot starts at the first read.
        self.conn
            .query_row("SELECT count(*) FROM sqlite_master", [], |r| {
                r.get::<_, i64>(0)
            })
            .map_err(db_err)?;
        Ok(())
    }

    fn end_snapshot(&self) -> Result<()> {
        self.conn.execute_batch("COMMIT").map_err(db_err)
    }

    fn schema_version(&self) -> Result<i64> {
        self.conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(|e| corrupt(&self.path, e))
    }

    fn migrate(&self) -> Result<()> {
        let known = MIGRATIONS[MIGRATIONS.len() - 1].0;
        let found = self.schema_version()?;
        if found > known {
            return Err(ErrorKind::SchemaTooNew {
                path: self.path.clone(),
                found,
                known,
            }
            .into());
        }
        if found == known {
            return Ok(());
        }
        self.begin_write()?;
        let out = (|| {
            // Another process may have migrated while we waited for the write lock.
            let now = self.schema_version()?;
            for (v, sql) in MIGRATIONS {
                if *v > now {
                    self.conn.execute_batch(sql).map_err(|e| {
                        Error::from(ErrorKind::Sqlite(format!(
                            "applying schema migration {v}: {}",
                            e.to_string().to_lowercase()
                        )))
                    })?;
                    self.conn
                        .execute_batch(&format!("PRAGMA user_version = {v}"))
                        .map_err(db_err)?;
                }
            }
            Ok(())
        })();
        match out {
            Ok(()) => self.commit(),
            Err(e) => {
                let _ = self.rollback();
                Err(e)
            }
        }
    }

    fn integrity_problems(&self) -> Result<Vec<String>> {
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

    fn copy_file(&self, path: &Path) -> Result<bool> {
        self.vacuum_into(path)?;
        Ok(true)
    }

    fn schema_objects(&self) -> Result<Vec<(String, String)>> {
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
}
