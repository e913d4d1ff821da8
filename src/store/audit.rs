//! The audit log: an append-only table in the lineage database whose entries form a BLAKE3
//! hash chain. Each entry's hash covers its own fields and the previous entry's hash, so an
//! edited, removed, reordered or inserted entry breaks the chain at a place `verify` can name.
//!
//! Canonical encoding of an entry (what is hashed): the ASCII tag `sluice-audit-v1`, then each of
//! seq (decimal), at, agent, action, subject, details, prev_hash, in that order, each as its byte
//! length (8 bytes, little-endian) followed by its UTF-8 bytes. The first entry's prev_hash is 64
//! zeros.
//!
//! Row commitments: every row a command writes is part of what its entry's hash covers. The
//! write transaction keeps a journal of the rows it wrote ([`Selector`]s: a table, a column and
//! a range of its values); when the entry is appended, each selector's rows are read back,
//! encoded canonically ([`encode_row`]) and hashed ([`rows_digest`]), and the list lands in the
//! entry's details as `rows` (`[{table, by, from, to, n, digest}]`). `verify` reads the same rows
//! again and recomputes each digest, and counts every row of every table against the
//! selectors, so a row no entry commits to is named too. The first entry written after entries
//! without commitments (a store from an earlier build) records `legacy_rows`, each table's
//! highest rowid at that moment: rows up to there predate the commitments.

use rusqlite::{params, Connection, OptionalExtension};
use serde_json::Value;

use super::lineage::db_err;
use crate::error::{ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{canonical_json, Agent, AuditEntry};

pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// The hash of an entry's canonical encoding (see the module documentation).
pub fn entry_hash(
    seq: u64,
    at: &str,
    agent: &str,
    action: &str,
    subject: &str,
    details: &str,
    prev_hash: &str,
) -> Hash {
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-audit-v1");
    let seq_text = seq.to_string();
    for field in [
        seq_text.as_str(),
        at,
        agent,
        action,
        subject,
        details,
        prev_hash,
    ] {
        h.update(&(field.len() as u64).to_le_bytes());
        h.update(field.as_bytes());
    }
    Hash::from_bytes(*h.finalize().as_bytes())
}

pub(super) fn append(
    conn: &Connection,
    agent: &Agent,
    action: &str,
    subject: &str,
    details: &Value,
    at: &str,
    journal: Vec<Selector>,
) -> Result<AuditEntry> {
    let last: Option<(i64, String)> = conn
        .query_row(
            "SELECT seq, hash FROM audit_log ORDER BY seq DESC LIMIT 1",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .optional()
        .map_err(db_err)?;
    let (seq, prev_hash) = match last {
        Some((s, h)) => (s as u64 + 1, h),
        None => (1, GENESIS.to_string()),
    };
    let mut details = details.clone();
    let Some(map) = details.as_object_mut() else {
        return Err(ErrorKind::Internal("audit details must be a JSON object".into()).into());
    };
    let mut rows = Vec::new();
    for sel in merge(journal) {
        let found = select_rows(conn, &sel)?;
        rows.push(sel.to_json(found.len() as u64, &rows_digest(&sel, &found)));
    }
    map.insert("rows".into(), Value::Array(rows));
    if let Some((_, prev_details)) = &last_details(conn)? {
        if !has_commitments(prev_details) {
            let mut bounds = serde_json::Map::new();
            for t in TABLES {
                bounds.insert((*t).into(), Value::from(max_rowid(conn, t)?));
            }
            map.insert("legacy_rows".into(), Value::Object(bounds));
        }
    }
    let details = canonical_json(&details);
    let hash = entry_hash(
        seq,
        at,
        &agent.identity(),
        action,
        subject,
        &details,
        &prev_hash,
    )
    .hex();
    conn.execute(
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
        params![
            seq as i64,
            at,
            agent.identity(),
            action,
            subject,
            details,
            prev_hash,
            hash
        ],
    )
    .map_err(db_err)?;
    Ok(AuditEntry {
        seq,
        at: at.to_string(),
        agent: agent.identity(),
        action: action.to_string(),
        subject: subject.to_string(),
        details,
        prev_hash,
        hash,
    })
}

pub(super) fn entries(conn: &Connection) -> Result<Vec<AuditEntry>> {
    let mut st = conn
        .prepare(
            "SELECT seq, at, agent, action, subject, details, prev_hash, hash
             FROM audit_log ORDER BY rowid",
        )
        .map_err(db_err)?;
    let rows = st
        .query_map([], |r| {
            Ok(AuditEntry {
                seq: r.get::<_, i64>(0)? as u64,
                at: r.get(1)?,
                agent: r.get(2)?,
                action: r.get(3)?,
                subject: r.get(4)?,
                details: r.get(5)?,
                prev_hash: r.get(6)?,
                hash: r.get(7)?,
            })
        })
        .map_err(db_err)?;
    rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
}

/// Walks the chain from the first entry and describes every break: a recomputed hash that
/// differs (an edited entry), a prev_hash that does not match the entry before (a removed,
/// reordered or inserted entry), or a gap in the sequence numbers.
pub fn chain_problems(entries: &[AuditEntry]) -> Vec<String> {
    let mut out = Vec::new();
    let mut prev = GENESIS.to_string();
    let mut expected_seq = 1u64;
    for e in entries {
        if e.seq != expected_seq {
            out.push(format!(
                "audit entry {}: expected sequence number {expected_seq} here (an entry was removed, inserted or reordered)",
                e.seq
            ));
        }
        if e.prev_hash != prev {
            out.push(format!(
                "audit entry {}: does not follow the entry before it (its previous-hash field does not match; an entry before it was removed, inserted or changed)",
                e.seq
            ));
        }
        let actual = entry_hash(
            e.seq,
            &e.at,
            &e.agent,
            &e.action,
            &e.subject,
            &e.details,
            &e.prev_hash,
        )
        .hex();
        if actual != e.hash {
            out.push(format!(
                "audit entry {}: its content does not match its hash (the entry was edited)",
                e.seq
            ));
        }
        prev = e.hash.clone();
        expected_seq = e.seq + 1;
    }
    out
}

// ---- row commitments ------------------------------------------------------------------

/// Every table of the lineage database except the audit log itself, in a fixed order. A table
/// the database holds that is not here is reported by `verify`.
pub const TABLES: &[&str] = &[
    "agents",
    "cell_changes",
    "cell_notes",
    "check_results",
    "column_profiles",
    "column_sources",
    "datasets",
    "drops",
    "endorsements",
    "erased_versions",
    "erasure_orders",
    "meanings",
    "objects",
    "row_runs",
    "step_inputs",
    "steps",
    "versions",
];

/// One end of a selector's range: an integer id or a text key (an object's hash).
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub enum Key {
    Int(i64),
    Text(String),
}

impl Key {
    fn to_json(&self) -> Value {
        match self {
            Key::Int(i) => Value::from(*i),
            Key::Text(t) => Value::from(t.clone()),
        }
    }

    fn from_json(v: &Value) -> Option<Key> {
        match v {
            Value::Number(n) => n.as_i64().map(Key::Int),
            Value::String(s) => Some(Key::Text(s.clone())),
            _ => None,
        }
    }

    fn encode(&self, h: &mut blake3::Hasher) {
        match self {
            Key::Int(i) => {
                h.update(&[1]);
                h.update(&i.to_le_bytes());
            }
            Key::Text(t) => {
                h.update(&[3]);
                h.update(&(t.len() as u64).to_le_bytes());
                h.update(t.as_bytes());
            }
        }
    }
}

/// The rows of `table` whose column `by` lies in `from..=to`: what an entry commits to.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct Selector {
    pub table: &'static str,
    pub by: &'static str,
    pub from: Key,
    pub to: Key,
}

/// The (table, column) pairs a selector may name, each with its query (constant SQL; the
/// column values are bound). `rowid` comes first so that `verify` can count coverage.
const SELECTABLE: &[(&str, &str, &str)] = &[
    (
        "agents",
        "id",
        "SELECT rowid, * FROM agents WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "datasets",
        "id",
        "SELECT rowid, * FROM datasets WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "steps",
        "id",
        "SELECT rowid, * FROM steps WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "step_inputs",
        "step_id",
        "SELECT rowid, * FROM step_inputs WHERE step_id BETWEEN ?1 AND ?2",
    ),
    (
        "versions",
        "id",
        "SELECT rowid, * FROM versions WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "column_profiles",
        "version_id",
        "SELECT rowid, * FROM column_profiles WHERE version_id BETWEEN ?1 AND ?2",
    ),
    (
        "objects",
        "hash",
        "SELECT rowid, * FROM objects WHERE hash BETWEEN ?1 AND ?2",
    ),
    (
        "check_results",
        "id",
        "SELECT rowid, * FROM check_results WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "cell_notes",
        "output_id",
        "SELECT rowid, * FROM cell_notes WHERE output_id BETWEEN ?1 AND ?2",
    ),
    (
        "column_sources",
        "output_id",
        "SELECT rowid, * FROM column_sources WHERE output_id BETWEEN ?1 AND ?2",
    ),
    (
        "endorsements",
        "id",
        "SELECT rowid, * FROM endorsements WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "meanings",
        "id",
        "SELECT rowid, * FROM meanings WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "erasure_orders",
        "id",
        "SELECT rowid, * FROM erasure_orders WHERE id BETWEEN ?1 AND ?2",
    ),
    (
        "erased_versions",
        "order_id",
        "SELECT rowid, * FROM erased_versions WHERE order_id BETWEEN ?1 AND ?2",
    ),
];

impl Selector {
    /// A selector of one value.
    pub fn one(table: &'static str, by: &'static str, key: Key) -> Selector {
        Selector {
            table,
            by,
            from: key.clone(),
            to: key,
        }
    }

    fn to_json(&self, n: u64, digest: &str) -> Value {
        serde_json::json!({
            "table": self.table,
            "by": self.by,
            "from": self.from.to_json(),
            "to": self.to.to_json(),
            "n": n,
            "digest": digest,
        })
    }

    /// Reads a selector back from an entry's `rows`; `None` when it names a table or column
    /// sluice never commits to (a forged entry).
    pub fn from_json(v: &Value) -> Option<(Selector, u64, String)> {
        let table = v.get("table")?.as_str()?;
        let by = v.get("by")?.as_str()?;
        let (t, b, _) = SELECTABLE
            .iter()
            .find(|(t, b, _)| *t == table && *b == by)?;
        Some((
            Selector {
                table: t,
                by: b,
                from: Key::from_json(v.get("from")?)?,
                to: Key::from_json(v.get("to")?)?,
            },
            v.get("n")?.as_u64()?,
            v.get("digest")?.as_str()?.to_string(),
        ))
    }

    fn sql(&self) -> &'static str {
        SELECTABLE
            .iter()
            .find(|(t, b, _)| *t == self.table && *b == self.by)
            .map_or("SELECT NULL WHERE 0", |(_, _, q)| q)
    }
}

/// Sorts, removes repeats and joins adjacent integer ranges of one table and column.
fn merge(mut journal: Vec<Selector>) -> Vec<Selector> {
    journal.sort();
    journal.dedup();
    let mut out: Vec<Selector> = Vec::with_capacity(journal.len());
    for s in journal {
        if let Some(last) = out.last_mut() {
            if let (Key::Int(end), Key::Int(from), Key::Int(to)) = (&last.to, &s.from, &s.to) {
                if last.table == s.table && last.by == s.by && *from <= end.saturating_add(1) {
                    if to > end {
                        last.to = Key::Int(*to);
                    }
                    continue;
                }
            }
        }
        out.push(s);
    }
    out
}

/// The canonical encoding of one row: its non-NULL columns sorted by name, each as the name's
/// length (u64 LE) and bytes, a type tag (1 integer, 2 real, 3 text, 4 blob) and the value
/// (i64 LE; the f64's bits LE; length and bytes). A NULL column is left out, so NULL and an
/// empty text differ, and a column a later schema adds with NULL in old rows changes nothing.
/// `skip` leading result columns (the rowid) are not part of the row.
pub fn encode_row(row: &rusqlite::Row<'_>, skip: usize) -> rusqlite::Result<Vec<u8>> {
    use rusqlite::types::ValueRef;
    let stmt = row.as_ref();
    let mut cols: Vec<(&str, ValueRef<'_>)> = Vec::new();
    for i in skip..stmt.column_count() {
        let v = row.get_ref(i)?;
        if v != ValueRef::Null {
            cols.push((stmt.column_name(i)?, v));
        }
    }
    cols.sort_by(|a, b| a.0.cmp(b.0));
    let mut out = Vec::new();
    for (name, v) in cols {
        out.extend_from_slice(&(name.len() as u64).to_le_bytes());
        out.extend_from_slice(name.as_bytes());
        match v {
            ValueRef::Null => {}
            ValueRef::Integer(i) => {
                out.push(1);
                out.extend_from_slice(&i.to_le_bytes());
            }
            ValueRef::Real(f) => {
                out.push(2);
                out.extend_from_slice(&f.to_bits().to_le_bytes());
            }
            ValueRef::Text(t) => {
                out.push(3);
                out.extend_from_slice(&(t.len() as u64).to_le_bytes());
                out.extend_from_slice(t);
            }
            ValueRef::Blob(b) => {
                out.push(4);
                out.extend_from_slice(&(b.len() as u64).to_le_bytes());
                out.extend_from_slice(b);
            }
        }
    }
    Ok(out)
}

/// The rows a selector names now, as (rowid, canonical encoding).
pub(super) fn select_rows(conn: &Connection, sel: &Selector) -> Result<Vec<(i64, Vec<u8>)>> {
    let mut st = conn.prepare_cached(sel.sql()).map_err(db_err)?;
    let bind = |k: &Key| match k {
        Key::Int(i) => rusqlite::types::Value::Integer(*i),
        Key::Text(t) => rusqlite::types::Value::Text(t.clone()),
    };
    let rows = st
        .query_map(params![bind(&sel.from), bind(&sel.to)], |r| {
            Ok((r.get::<_, i64>(0)?, encode_row(r, 1)?))
        })
        .map_err(db_err)?;
    rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
}

/// BLAKE3 over the tag `sluice-rows-v1`, the selector (table, column, range) and the rows'
/// encodings in byte order, each with its length: independent of rowids and of row order.
pub fn rows_digest(sel: &Selector, rows: &[(i64, Vec<u8>)]) -> String {
    let mut encoded: Vec<&[u8]> = rows.iter().map(|(_, e)| e.as_slice()).collect();
    encoded.sort_unstable();
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-rows-v1");
    for name in [sel.table, sel.by] {
        h.update(&(name.len() as u64).to_le_bytes());
        h.update(name.as_bytes());
    }
    sel.from.encode(&mut h);
    sel.to.encode(&mut h);
    h.update(&(encoded.len() as u64).to_le_bytes());
    for e in encoded {
        h.update(&(e.len() as u64).to_le_bytes());
        h.update(e);
    }
    h.finalize().to_hex().to_string()
}

/// Whether an entry's details carry row commitments (entries of earlier builds do not).
pub fn has_commitments(details: &str) -> bool {
    serde_json::from_str::<Value>(details)
        .ok()
        .is_some_and(|d| d.get("rows").is_some_and(Value::is_array))
}

fn last_details(conn: &Connection) -> Result<Option<(i64, String)>> {
    conn.query_row(
        "SELECT seq, details FROM audit_log ORDER BY seq DESC LIMIT 1",
        [],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )
    .optional()
    .map_err(db_err)
}

/// The highest rowid of a known table (0 when empty or missing).
pub(super) fn max_rowid(conn: &Connection, table: &str) -> Result<i64> {
    let sql = match table {
        "agents" => "SELECT coalesce(max(rowid), 0) FROM agents",
        "cell_changes" => "SELECT coalesce(max(rowid), 0) FROM cell_changes",
        "cell_notes" => "SELECT coalesce(max(rowid), 0) FROM cell_notes",
        "check_results" => "SELECT coalesce(max(rowid), 0) FROM check_results",
        "column_profiles" => "SELECT coalesce(max(rowid), 0) FROM column_profiles",
        "column_sources" => "SELECT coalesce(max(rowid), 0) FROM column_sources",
        "datasets" => "SELECT coalesce(max(rowid), 0) FROM datasets",
        "drops" => "SELECT coalesce(max(rowid), 0) FROM drops",
        "endorsements" => "SELECT coalesce(max(rowid), 0) FROM endorsements",
        "meanings" => "SELECT coalesce(max(rowid), 0) FROM meanings",
        "erasure_orders" => "SELECT coalesce(max(rowid), 0) FROM erasure_orders",
        "erased_versions" => "SELECT coalesce(max(rowid), 0) FROM erased_versions",
        "objects" => "SELECT coalesce(max(rowid), 0) FROM objects",
        "row_runs" => "SELECT coalesce(max(rowid), 0) FROM row_runs",
        "step_inputs" => "SELECT coalesce(max(rowid), 0) FROM step_inputs",
        "steps" => "SELECT coalesce(max(rowid), 0) FROM steps",
        "versions" => "SELECT coalesce(max(rowid), 0) FROM versions",
        _ => return Ok(0),
    };
    conn.query_row(sql, [], |r| r.get(0)).map_err(db_err)
}

/// Every rowid of a known table, ascending.
pub(super) fn rowids(conn: &Connection, table: &str) -> Result<Vec<i64>> {
    let sql = match table {
        "agents" => "SELECT rowid FROM agents ORDER BY rowid",
        "cell_changes" => "SELECT rowid FROM cell_changes ORDER BY rowid",
        "cell_notes" => "SELECT rowid FROM cell_notes ORDER BY rowid",
        "check_results" => "SELECT rowid FROM check_results ORDER BY rowid",
        "column_profiles" => "SELECT rowid FROM column_profiles ORDER BY rowid",
        "column_sources" => "SELECT rowid FROM column_sources ORDER BY rowid",
        "datasets" => "SELECT rowid FROM datasets ORDER BY rowid",
        "drops" => "SELECT rowid FROM drops ORDER BY rowid",
        "endorsements" => "SELECT rowid FROM endorsements ORDER BY rowid",
        "meanings" => "SELECT rowid FROM meanings ORDER BY rowid",
        "erasure_orders" => "SELECT rowid FROM erasure_orders ORDER BY rowid",
        "erased_versions" => "SELECT rowid FROM erased_versions ORDER BY rowid",
        "objects" => "SELECT rowid FROM objects ORDER BY rowid",
        "row_runs" => "SELECT rowid FROM row_runs ORDER BY rowid",
        "step_inputs" => "SELECT rowid FROM step_inputs ORDER BY rowid",
        "steps" => "SELECT rowid FROM steps ORDER BY rowid",
        "versions" => "SELECT rowid FROM versions ORDER BY rowid",
        _ => return Ok(Vec::new()),
    };
    let mut st = conn.prepare(sql).map_err(db_err)?;
    let rows = st.query_map([], |r| r.get(0)).map_err(db_err)?;
    rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chain(n: u64) -> Vec<AuditEntry> {
        let mut v = Vec::new();
        let mut prev = GENESIS.to_string();
        for seq in 1..=n {
            let hash = entry_hash(
                seq,
                "2026-01-01T00:00:00.000Z",
                "a",
                "ingest",
                "x",
                "{}",
                &prev,
            )
            .hex();
            v.push(AuditEntry {
                seq,
                at: "2026-01-01T00:00:00.000Z".into(),
                agent: "a".into(),
                action: "ingest".into(),
                subject: "x".into(),
                details: "{}".into(),
                prev_hash: prev.clone(),
                hash: hash.clone(),
            });
            prev = hash;
        }
        v
    }

    #[test]
    fn intact_chain_has_no_problems() {
        assert!(chain_problems(&chain(5)).is_empty());
    }

    #[test]
    fn edited_removed_and_reordered_entries_are_named() {
        let mut c = chain(5);
        c[2].subject = "y".into();
        let p = chain_problems(&c);
        assert!(
            p.iter()
                .any(|m| m.starts_with("audit entry 3: its content")),
            "{p:?}"
        );

        let mut c = chain(5);
        c.remove(1);
        let p = chain_problems(&c);
        assert!(
            p.iter()
                .any(|m| m.starts_with("audit entry 3: expected sequence number 2")),
            "{p:?}"
        );

        let mut c = chain(5);
        c.swap(1, 2);
        assert!(!chain_problems(&c).is_empty());
    }

    /// The row encoding: columns by name whatever their order in the table, typed values
    /// (an integer differs from its text), NULL distinct from an empty text, and a column that
    /// is NULL the same as one that is not there (what a later migration adds).
    #[test]
    fn row_encoding_is_canonical() {
        let c = Connection::open_in_memory().unwrap();
        c.execute_batch(
            "CREATE TABLE ab (a, b); CREATE TABLE ba (b, a); CREATE TABLE abc (a, b, c);
             INSERT INTO ab VALUES (1, 'x'), (1, ''), (1, NULL), ('1', 'x');
             INSERT INTO ba VALUES ('x', 1);
             INSERT INTO abc VALUES (1, 'x', NULL);",
        )
        .unwrap();
        let rows = |sql: &str| -> Vec<Vec<u8>> {
            c.prepare(sql)
                .unwrap()
                .query_map([], |r| encode_row(r, 0))
                .unwrap()
                .map(|r| r.unwrap())
                .collect()
        };
        let ab = rows("SELECT * FROM ab ORDER BY rowid");
        assert_eq!(rows("SELECT * FROM ba")[0], ab[0]);
        assert_eq!(rows("SELECT * FROM abc")[0], ab[0]);
        assert_ne!(ab[0], ab[3], "an integer differs from its text");
        assert_ne!(ab[1], ab[2], "NULL differs from an empty text");
        assert_ne!(ab[0], ab[1]);
    }

    #[test]
    fn encoding_is_unambiguous() {
        // Moving a byte between two adjacent fields must change the hash.
        let a = entry_hash(1, "t", "ab", "c", "s", "{}", GENESIS);
        let b = entry_hash(1, "t", "a", "bc", "s", "{}", GENESIS);
        assert_ne!(a, b);
    }
}
