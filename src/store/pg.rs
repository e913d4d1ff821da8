//! The PostgreSQL backend of the lineage database: a store shared by a team keeps its lineage on
//! a server, named by a connection string in `sluice-store/location.json`. Credentials come
//! from where PostgreSQL's own programs take them, in libpq's order (a password in the
//! connection string is refused: it would be written into the store), handed in by the binary
//! ([`use_client_env`]) since the engine reads no environment variables: `PGPASSWORD`, then the
//! password file (`PGPASSFILE`, else `~/.pgpass`).
//!
//! Writers are put in one order by a transaction-level advisory lock taken as the first
//! statement of every write transaction (see DEVELOPERS.md, "Backends"); the schema is
//! `schema/postgres/`, with the append-only audit log's trigger and the roles of
//! [`super::roles`].

use std::cell::RefCell;
use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::OnceLock;

use bytes::BytesMut;
use postgres::types::{to_sql_checked, IsNull, ToSql, Type};
use postgres::{Client, Config, NoTls, Statement};

use super::backend::{Database, Kind, Row, Value};
use crate::error::{Error, ErrorKind, Result};

/// The migrations of the PostgreSQL schema, in order: (schema version it produces, SQL). A
/// database on a server starts at the schema the SQLite migrations reach at version 6.
pub const MIGRATIONS: &[(i64, &str)] = &[
    (6, include_str!("../../schema/postgres/0006_lineage.sql")),
    (7, include_str!("../../schema/postgres/0007_erasure.sql")),
    (8, include_str!("../../schema/postgres/0008_row_salts.sql")),
    (
        9,
        include_str!("../../schema/postgres/0009_blocked_run_sets.sql"),
    ),
];

/// The advisory lock every write transaction takes first: the bytes of `sluice-w`.
pub const WRITE_LOCK: i64 = 0x736c_7569_6365_2d77;

/// What the binary read from the environment for the PostgreSQL client.
#[derive(Debug, Clone, Default)]
pub struct ClientEnv {
    /// `PGPASSWORD`.
    pub password: Option<String>,
    /// `PGPASSFILE`, else `~/.pgpass`.
    pub passfile: Option<PathBuf>,
    /// `PGUSER`, else the operating-system user: the role to log in as when the connection
    /// string names none.
    pub user: Option<String>,
    /// `PGSERVICEFILE`, else `~/.pg_service.conf`: where `service=NAME` is looked up.
    pub service_file: Option<PathBuf>,
}

static CLIENT_ENV: OnceLock<ClientEnv> = OnceLock::new();

/// Installs what the binary read from the environment (once per process; later calls are
/// ignored).
pub fn use_client_env(env: ClientEnv) {
    let _ = CLIENT_ENV.set(env);
}

pub(super) fn server_err(e: postgres::Error) -> Error {
    let text = match e.as_db_error() {
        Some(db) => format!("{} ({})", db.message(), db.code().code()),
        None => e.to_string(),
    };
    ErrorKind::Server(text.to_lowercase()).into()
}

/// The SQLSTATE of a server error, when it is one.
pub fn sqlstate(e: &postgres::Error) -> Option<String> {
    e.code().map(|c| c.code().to_string())
}

/// Turns the shared SQL's numbered placeholders (`?1`) into PostgreSQL's (`$1`).
pub fn placeholders(sql: &str) -> String {
    let mut out = String::with_capacity(sql.len());
    let mut chars = sql.chars().peekable();
    while let Some(c) = chars.next() {
        if c == '?' && chars.peek().is_some_and(char::is_ascii_digit) {
            out.push('$');
        } else {
            out.push(c);
        }
    }
    out
}

impl ToSql for Value {
    fn to_sql(
        &self,
        ty: &Type,
        out: &mut BytesMut,
    ) -> std::result::Result<IsNull, Box<dyn std::error::Error + Sync + Send>> {
        match self {
            Value::Null => Ok(IsNull::Yes),
            Value::Int(i) => match *ty {
                Type::INT8 => i.to_sql(ty, out),
                Type::INT4 => i32::try_from(*i)?.to_sql(ty, out),
                Type::INT2 => i16::try_from(*i)?.to_sql(ty, out),
                Type::BOOL => (*i != 0).to_sql(ty, out),
                Type::FLOAT8 => (*i as f64).to_sql(ty, out),
                _ => i.to_string().to_sql(ty, out),
            },
            Value::Real(f) => f.to_sql(ty, out),
            Value::Text(t) => t.as_str().to_sql(ty, out),
            Value::Blob(b) => b.as_slice().to_sql(ty, out),
        }
    }

    fn accepts(_: &Type) -> bool {
        true
    }

    to_sql_checked!();
}

fn read(row: &postgres::Row, i: usize) -> std::result::Result<Value, postgres::Error> {
    let ty = row.columns()[i].type_().clone();
    Ok(match ty {
        Type::INT8 => Value::from(row.try_get::<_, Option<i64>>(i)?),
        Type::INT4 => Value::from(row.try_get::<_, Option<i32>>(i)?.map(i64::from)),
        Type::INT2 => Value::from(row.try_get::<_, Option<i16>>(i)?.map(i64::from)),
        Type::BOOL => Value::from(row.try_get::<_, Option<bool>>(i)?.map(i64::from)),
        Type::FLOAT8 => row
            .try_get::<_, Option<f64>>(i)?
            .map_or(Value::Null, Value::Real),
        Type::FLOAT4 => row
            .try_get::<_, Option<f32>>(i)?
            .map_or(Value::Null, |f| Value::Real(f64::from(f))),
        Type::BYTEA => row
            .try_get::<_, Option<Vec<u8>>>(i)?
            .map_or(Value::Null, Value::Blob),
        _ => Value::from(row.try_get::<_, Option<String>>(i)?),
    })
}

/// The password file's entry for this connection (libpq's format: `host:port:database:user:
/// password`, `*` matching anything, `\` escaping `:` and `\`).
pub fn passfile_password(
    text: &str,
    host: &str,
    port: &str,
    db: &str,
    user: &str,
) -> Option<String> {
    for line in text.lines() {
        if line.starts_with('#') || line.trim().is_empty() {
            continue;
        }
        let mut fields = Vec::new();
        let mut cur = String::new();
        let mut chars = line.chars();
        while let Some(c) = chars.next() {
            match c {
                '\\' => {
                    if let Some(n) = chars.next() {
                        cur.push(n);
                    }
                }
                ':' if fields.len() < 4 => fields.push(std::mem::take(&mut cur)),
                _ => cur.push(c),
            }
        }
        fields.push(cur);
        if fields.len() != 5 {
            continue;
        }
        let wanted = [host, port, db, user];
        if fields[..4]
            .iter()
            .zip(wanted)
            .all(|(f, w)| f == "*" || f == w)
        {
            return Some(fields[4].clone());
        }
    }
    None
}

/// The pairs of a connection string in libpq's keyword form (`key=value`, a value in single
/// quotes when it holds spaces, `\'` and `\\` escaped); `None` for the URL form.
pub fn keywords(conn: &str) -> Option<Vec<(String, String)>> {
    if conn.starts_with("postgresql://") || conn.starts_with("postgres://") {
        return None;
    }
    let mut out = Vec::new();
    let mut chars = conn.chars().peekable();
    loop {
        while chars.peek().is_some_and(|c| c.is_whitespace()) {
            chars.next();
        }
        if chars.peek().is_none() {
            return Some(out);
        }
        let mut key = String::new();
        while let Some(&c) = chars.peek() {
            if c == '=' || c.is_whitespace() {
                break;
            }
            key.push(c);
            chars.next();
        }
        while chars.peek().is_some_and(|c| c.is_whitespace()) {
            chars.next();
        }
        if chars.next() != Some('=') {
            return Some(out);
        }
        while chars.peek().is_some_and(|c| c.is_whitespace()) {
            chars.next();
        }
        let mut value = String::new();
        if chars.peek() == Some(&'\'') {
            chars.next();
            while let Some(c) = chars.next() {
                match c {
                    '\\' => value.extend(chars.next()),
                    '\'' => break,
                    _ => value.push(c),
                }
            }
        } else {
            while let Some(&c) = chars.peek() {
                if c.is_whitespace() {
                    break;
                }
                if c == '\\' {
                    chars.next();
                    value.extend(chars.next());
                    continue;
                }
                value.push(c);
                chars.next();
            }
        }
        out.push((key, value));
    }
}

/// One service's settings in a connection service file (`[NAME]`, then `key=value` lines;
/// `#` starts a comment line).
pub fn service_settings(text: &str, name: &str) -> Option<Vec<(String, String)>> {
    let mut inside = false;
    let mut found = None;
    for line in text.lines() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        if let Some(section) = line.strip_prefix('[').and_then(|l| l.strip_suffix(']')) {
            inside = section.trim() == name;
            if inside {
                found.get_or_insert_with(Vec::new);
            }
            continue;
        }
        if inside {
            if let Some((k, v)) = line.split_once('=') {
                found
                    .get_or_insert_with(Vec::new)
                    .push((k.trim().to_string(), v.trim().to_string()));
            }
        }
    }
    found
}

fn quoted(v: &str) -> String {
    format!("'{}'", v.replace('\\', "\\\\").replace('\'', "\\'"))
}

/// Reads a connection string, refusing one that holds a password. `service=NAME` is looked
/// up in the service file as libpq does (the string's own settings win over the service's);
/// a password the service file gives is returned beside the settings, never stored.
pub fn parse_connection(conn: &str) -> Result<Config> {
    Ok(parse_with_service(conn)?.0)
}

fn parse_with_service(conn: &str) -> Result<(Config, Option<String>)> {
    let mut text = conn.to_string();
    let mut service_password = None;
    if let Some(pairs) = keywords(conn) {
        if pairs.iter().any(|(k, _)| k == "password") {
            return Err(password_refused());
        }
        if let Some((_, name)) = pairs.iter().find(|(k, _)| k == "service") {
            let env = CLIENT_ENV.get().cloned().unwrap_or_default();
            let settings = env
                .service_file
                .as_ref()
                .and_then(|f| std::fs::read_to_string(f).ok())
                .and_then(|t| service_settings(&t, name))
                .ok_or_else(|| {
                    Error::from(ErrorKind::Usage(format!(
                        "the service {name:?} is not in the connection service file (PGSERVICEFILE, else ~/.pg_service.conf); add a [{name}] section there, or name the server with host=, port=, dbname= and user="
                    )))
                })?;
            let mut merged: Vec<(String, String)> = Vec::new();
            for (k, v) in settings {
                if k == "password" {
                    service_password = Some(v);
                } else {
                    merged.push((k, v));
                }
            }
            for (k, v) in pairs.into_iter().filter(|(k, _)| k != "service") {
                merged.retain(|(m, _)| *m != k);
                merged.push((k, v));
            }
            text = merged
                .iter()
                .map(|(k, v)| format!("{k}={}", quoted(v)))
                .collect::<Vec<_>>()
                .join(" ");
        }
    }
    let config: Config = text.parse().map_err(|e: postgres::Error| {
        Error::from(ErrorKind::Usage(format!(
            "the lineage server's connection string cannot be read ({e}); write it as `host=HOST port=PORT dbname=DB user=ROLE`, `service=NAME` or `postgresql://ROLE@HOST:PORT/DB`"
        )))
    })?;
    if config.get_password().is_some() {
        return Err(password_refused());
    }
    Ok((config, service_password))
}

fn password_refused() -> Error {
    ErrorKind::Usage(
        "the lineage server's connection string holds a password, which would be written into the store; take it out and keep the password in ~/.pgpass (or PGPASSFILE, PGPASSWORD or a service file)".into(),
    )
    .into()
}

/// The connection's host, port and database as the password file and messages name them.
fn target(config: &Config, user: &str) -> (String, String, String) {
    let host = match config.get_hosts().first() {
        Some(postgres::config::Host::Tcp(h)) => h.clone(),
        _ => "localhost".to_string(),
    };
    let port = config
        .get_ports()
        .first()
        .copied()
        .unwrap_or(5432)
        .to_string();
    let db = config.get_dbname().unwrap_or(user).to_string();
    (host, port, db)
}

pub struct Pg {
    client: RefCell<Client>,
    statements: RefCell<HashMap<String, Statement>>,
    describe: String,
}

impl Pg {
    /// Connects to the server the connection string `conn` names. The caller migrates.
    pub fn connect(conn: &str) -> Result<Pg> {
        let (mut config, service_password) = parse_with_service(conn)?;
        let env = CLIENT_ENV.get().cloned().unwrap_or_default();
        if config.get_user().is_none() {
            if let Some(u) = &env.user {
                config.user(u);
            }
        }
        let user = config.get_user().unwrap_or("").to_string();
        let (host, port, db) = target(&config, &user);
        if let Some(p) = service_password.as_ref().or(env.password.as_ref()) {
            config.password(p);
        } else if let Some(file) = &env.passfile {
            if let Ok(text) = std::fs::read_to_string(file) {
                if let Some(p) = passfile_password(&text, &host, &port, &db, &user) {
                    config.password(p);
                }
            }
        }
        config.application_name("sluice");
        let describe = format!("postgresql://{user}@{host}:{port}/{db}");
        let client = config.connect(NoTls).map_err(|e| {
            Error::from(ErrorKind::Server(format!(
                "cannot reach {describe}: {}; check the connection string in sluice-store/location.json and that the server runs",
                server_err(e)
            )))
        })?;
        Ok(Pg {
            client: RefCell::new(client),
            statements: RefCell::new(HashMap::new()),
            describe,
        })
    }

    fn statement(&self, sql: &str) -> Result<Statement> {
        if let Some(st) = self.statements.borrow().get(sql) {
            return Ok(st.clone());
        }
        let st = self
            .client
            .borrow_mut()
            .prepare(&placeholders(sql))
            .map_err(server_err)?;
        self.statements
            .borrow_mut()
            .insert(sql.to_string(), st.clone());
        Ok(st)
    }
}

fn refs(params: &[Value]) -> Vec<&(dyn ToSql + Sync)> {
    params.iter().map(|v| v as &(dyn ToSql + Sync)).collect()
}

impl Database for Pg {
    fn kind(&self) -> Kind {
        Kind::Postgres
    }

    fn describe(&self) -> String {
        self.describe.clone()
    }

    fn query(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>> {
        Ok(self.query_named(sql, params)?.1)
    }

    fn query_named(&self, sql: &str, params: &[Value]) -> Result<(Vec<String>, Vec<Row>)> {
        let st = self.statement(sql)?;
        let names = st.columns().iter().map(|c| c.name().to_string()).collect();
        let rows = self
            .client
            .borrow_mut()
            .query(&st, &refs(params))
            .map_err(server_err)?;
        let mut out = Vec::with_capacity(rows.len());
        for r in &rows {
            let mut row = Vec::with_capacity(r.len());
            for i in 0..r.len() {
                row.push(read(r, i).map_err(server_err)?);
            }
            out.push(Row(row));
        }
        Ok((names, out))
    }

    fn batch(&self, sql: &str) -> Result<()> {
        self.client
            .borrow_mut()
            .batch_execute(sql)
            .map_err(server_err)
    }

    fn execute(&self, sql: &str, params: &[Value]) -> Result<u64> {
        let st = self.statement(sql)?;
        self.client
            .borrow_mut()
            .execute(&st, &refs(params))
            .map_err(server_err)
    }

    fn begin_write(&self) -> Result<()> {
        self.batch("BEGIN ISOLATION LEVEL READ COMMITTED")?;
        let locked = self.execute(
            "SELECT pg_advisory_xact_lock(?1)",
            &[Value::Int(WRITE_LOCK)],
        );
        if let Err(e) = locked {
            let _ = self.rollback();
            return Err(e);
        }
        Ok(())
    }

    fn commit(&self) -> Result<()> {
        self.batch("COMMIT")
    }

    fn rollback(&self) -> Result<()> {
        self.batch("ROLLBACK")
    }

    fn begin_snapshot(&self) -> Result<()> {
        self.batch("BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY")
    }

    fn end_snapshot(&self) -> Result<()> {
        self.batch("COMMIT")
    }

    fn schema_version(&self) -> Result<i64> {
        let rows = self.query("SELECT coalesce(max(version), 0) FROM sluice_schema", &[]);
        match rows {
            Ok(rows) => rows.first().map_or(Ok(0), |r| r.int(0)),
            // No table yet: an empty database.
            Err(_) => {
                self.statements.borrow_mut().clear();
                Ok(0)
            }
        }
    }

    fn migrate(&self) -> Result<()> {
        let known = MIGRATIONS[MIGRATIONS.len() - 1].0;
        let found = self.schema_version()?;
        if found > known {
            return Err(ErrorKind::SchemaTooNew {
                path: PathBuf::from(&self.describe),
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
            self.batch("CREATE TABLE IF NOT EXISTS sluice_schema (version BIGINT NOT NULL)")?;
            // Another process may have migrated while we waited for the lock.
            let now = self
                .query("SELECT coalesce(max(version), 0) FROM sluice_schema", &[])?
                .first()
                .map_or(Ok(0), |r| r.int(0))?;
            for (v, sql) in MIGRATIONS {
                if *v > now {
                    self.batch(sql).map_err(|e| {
                        Error::from(ErrorKind::Server(format!(
                            "applying schema migration {v}: {e}"
                        )))
                    })?;
                    self.execute("DELETE FROM sluice_schema", &[])?;
                    self.execute(
                        "INSERT INTO sluice_schema (version) VALUES (?1)",
                        &[Value::Int(*v)],
                    )?;
                }
            }
            Ok(())
        })();
        self.statements.borrow_mut().clear();
        match out {
            Ok(()) => self.commit(),
            Err(e) => {
                let _ = self.rollback();
                Err(e)
            }
        }
    }

    fn integrity_problems(&self) -> Result<Vec<String>> {
        // The server checks structure and foreign keys at every write; what it can report is
        // a constraint left unchecked (added NOT VALID, outside sluice).
        let rows = self.query(
            "SELECT conrelid::regclass::text, conname FROM pg_constraint
             WHERE NOT convalidated AND connamespace = current_schema()::regnamespace
             ORDER BY 1, 2",
            &[],
        )?;
        rows.iter()
            .map(|r| {
                Ok(format!(
                    "table {} has the constraint {} unchecked (added outside sluice)",
                    r.text(0)?,
                    r.text(1)?
                ))
            })
            .collect()
    }

    fn schema_objects(&self) -> Result<Vec<(String, String)>> {
        let rows = self.query(
            "SELECT 'table', table_name::text FROM information_schema.tables
                 WHERE table_schema = current_schema() AND table_type = 'BASE TABLE'
                   AND table_name <> 'sluice_schema'
             UNION ALL
             SELECT 'view', table_name::text FROM information_schema.views
                 WHERE table_schema = current_schema()
             UNION ALL
             SELECT DISTINCT 'trigger', trigger_name::text FROM information_schema.triggers
                 WHERE trigger_schema = current_schema()
                   AND trigger_name NOT IN ('audit_log_append_only', 'audit_log_no_truncate')
             ORDER BY 2",
            &[],
        )?;
        rows.iter().map(|r| Ok((r.text(0)?, r.text(1)?))).collect()
    }
}

/// Whether `path` looks like a connection string rather than a folder (for messages).
pub fn is_connection_string(s: &str) -> bool {
    s.starts_with("postgresql://") || s.starts_with("postgres://") || s.contains('=')
}

#[cfg(test)]
mod tests {
    use super::*;

    /// libpq's password file format (PostgreSQL documentation, "The Password File").
    #[test]
    fn the_password_file_is_read_as_libpq_reads_it() {
        let text =
            "# comment\nother:5432:*:ada:nope\nlocalhost:5433:lineage:ada:se\\:cret\n*:*:*:*:any\n";
        assert_eq!(
            passfile_password(text, "localhost", "5433", "lineage", "ada").as_deref(),
            Some("se:cret")
        );
        assert_eq!(
            passfile_password(text, "db.example", "1", "x", "y").as_deref(),
            Some("any")
        );
    }

    /// libpq's keyword form and connection service file (PostgreSQL documentation,
    /// "Connection Strings" and "The Connection Service File").
    #[test]
    fn keyword_strings_and_service_files_are_read_as_libpq_reads_them() {
        let pairs =
            keywords("host=db.example  dbname = 'q3 lineage' user=ada application_name='it\\'s'")
                .unwrap();
        assert_eq!(
            pairs,
            [
                ("host".into(), "db.example".into()),
                ("dbname".into(), "q3 lineage".into()),
                ("user".into(), "ada".into()),
                ("application_name".into(), "it's".into()),
            ]
        );
        assert_eq!(keywords("postgresql://ada@db/q3"), None);
        let file = "# team servers\n[three_rivers]\nhost=db.example\nport=5433\npassword=s3cret\n\n[other]\nhost=elsewhere\n";
        assert_eq!(
            service_settings(file, "three_rivers").unwrap(),
            [
                ("host".into(), "db.example".into()),
                ("port".into(), "5433".into()),
                ("password".into(), "s3cret".into()),
            ]
        );
        assert_eq!(service_settings(file, "missing"), None);
        assert_eq!(quoted("it's a\\b"), "'it\\'s a\\\\b'");
    }

    #[test]
    fn placeholders_become_the_servers_own() {
        assert_eq!(
            placeholders("SELECT a FROM t WHERE b = ?1 AND c IN (?2, ?12)"),
            "SELECT a FROM t WHERE b = $1 AND c IN ($2, $12)"
        );
    }
}
