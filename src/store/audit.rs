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
//! encoded canonically ([`encode_row`]), each encoding hashed into a leaf ([`row_leaf`]) and
//! the leaves into a digest ([`leaves_digest`], form 2; entries of earlier builds hold
//! [`rows_digest`], form 1), and the list lands in the entry's details as `rows`
//! (`[{table, by, from, to, n, digest, form}]`). Rows that can hold a cell's value carry a random
//! salt ([`RowSalts`]) so that their leaves confirm no guess of it. `verify` reads the same rows
//! again and recomputes each digest, and counts every row of every table against the
//! selectors, so a row no entry commits to is named too. The first entry written after entries
//! without commitments (a store from an earlier build) records `legacy_rows`, each table's
//! highest rowid at that moment: rows up to there predate the commitments.

use serde_json::Value;

use super::backend::{self, Database};
use crate::error::{ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{canonical_json, Agent, AuditEntry};
use crate::vals;

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
    conn: &dyn Database,
    agent: &Agent,
    action: &str,
    subject: &str,
    details: &Value,
    at: &str,
    journal: Vec<Selector>,
) -> Result<AuditEntry> {
    let last: Option<(i64, String)> = match conn
        .query(
            "SELECT seq, hash FROM audit_log ORDER BY seq DESC LIMIT 1",
            &[],
        )?
        .first()
    {
        Some(r) => Some((r.int(0)?, r.text(1)?)),
        None => None,
    };
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
        let leaves: Vec<[u8; 32]> = found.iter().map(|(_, e)| row_leaf(e)).collect();
        rows.push(sel.to_json(found.len() as u64, &leaves_digest(&sel, &leaves)));
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
        vals![
            seq as i64,
            at,
            agent.identity(),
            action,
            subject,
            details.as_str(),
            prev_hash.as_str(),
            hash.as_str()
        ],
    )?;
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

pub(super) fn entries(conn: &dyn Database) -> Result<Vec<AuditEntry>> {
    conn.query(
        "SELECT seq, at, agent, action, subject, details, prev_hash, hash
         FROM audit_log ORDER BY seq",
        &[],
    )?
    .iter()
    .map(|r| {
        Ok(AuditEntry {
            seq: r.int(0)? as u64,
            at: r.text(1)?,
            agent: r.text(2)?,
            action: r.text(3)?,
            subject: r.text(4)?,
            details: r.text(5)?,
            prev_hash: r.text(6)?,
            hash: r.text(7)?,
        })
    })
    .collect()
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

    /// As an entry's `rows` holds it; `form` 2 says the digest is [`leaves_digest`].
    fn to_json(&self, n: u64, digest: &str) -> Value {
        serde_json::json!({
            "table": self.table,
            "by": self.by,
            "from": self.from.to_json(),
            "to": self.to.to_json(),
            "n": n,
            "digest": digest,
            "form": 2,
        })
    }

    /// Whether the selector's range holds the integer `key`.
    pub fn covers(&self, key: i64) -> bool {
        matches!((&self.from, &self.to), (Key::Int(a), Key::Int(b)) if *a <= key && key <= *b)
    }

    /// Reads a selector back from an entry's `rows`, with its count, digest and form (1: the
    /// digest is [`rows_digest`], written by earlier builds; 2: [`leaves_digest`]); `None`
    /// when it names a table or column sluice never commits to (a forged entry).
    pub fn from_json(v: &Value) -> Option<(Selector, u64, String, u64)> {
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
            v.get("form").map_or(Some(1), Value::as_u64)?,
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
/// `skip` leading result columns (the rowid) are not part of the row, nor is a column named
/// `rowid` (a server's stand-in for SQLite's own), so a row encodes alike on both backends.
pub fn encode_row(names: &[String], row: &backend::Row, skip: usize) -> Vec<u8> {
    use backend::Value as V;
    let mut cols: Vec<(&str, &V)> = Vec::new();
    for (i, v) in row.0.iter().enumerate().skip(skip) {
        let name = names.get(i).map_or("", String::as_str);
        if *v != V::Null && name != "rowid" {
            cols.push((name, v));
        }
    }
    cols.sort_by(|a, b| a.0.cmp(b.0));
    let mut out = Vec::new();
    for (name, v) in cols {
        out.extend_from_slice(&(name.len() as u64).to_le_bytes());
        out.extend_from_slice(name.as_bytes());
        match v {
            V::Null => {}
            V::Int(i) => {
                out.push(1);
                out.extend_from_slice(&i.to_le_bytes());
            }
            V::Real(f) => {
                out.push(2);
                out.extend_from_slice(&f.to_bits().to_le_bytes());
            }
            V::Text(t) => {
                out.push(3);
                out.extend_from_slice(&(t.len() as u64).to_le_bytes());
                out.extend_from_slice(t.as_bytes());
            }
            V::Blob(b) => {
                out.push(4);
                out.extend_from_slice(&(b.len() as u64).to_le_bytes());
                out.extend_from_slice(b);
            }
        }
    }
    out
}

/// The rows a selector names now, as (rowid, canonical encoding).
pub(super) fn select_rows(conn: &dyn Database, sel: &Selector) -> Result<Vec<(i64, Vec<u8>)>> {
    let bind = |k: &Key| match k {
        Key::Int(i) => backend::Value::Int(*i),
        Key::Text(t) => backend::Value::Text(t.clone()),
    };
    let (names, rows) = conn.query_named(sel.sql(), &[bind(&sel.from), bind(&sel.to)])?;
    rows.iter()
        .map(|r| Ok((r.int(0)?, encode_row(&names, r, 1))))
        .collect()
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

/// One row's leaf in a commitment of form 2: BLAKE3 over the tag `sluice-row-v2` and the row's
/// canonical encoding. A row that can hold a cell's value (a profile's extremes, a cell's note)
/// carries a random salt column, so its leaf cannot be found again from a guess of the value
/// and the row's other fields; an erasure that overwrites the value empties the salt and keeps
/// the leaf from before (see [`leaves_digest`]).
pub fn row_leaf(encoded: &[u8]) -> [u8; 32] {
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-row-v2");
    h.update(encoded);
    *h.finalize().as_bytes()
}

/// The digest of form 2: BLAKE3 over the tag `sluice-rows-v2`, the selector (as in
/// [`rows_digest`]), the count and the rows' leaves ([`row_leaf`]) in byte order. Unlike form
/// 1 it is computed from one hash per row, so a row the store no longer holds as it was
/// (overwritten by an erasure) can be stood in for by the leaf the erasure kept, and every
/// other row of the selector is still checked against the entry that first committed to it.
pub fn leaves_digest(sel: &Selector, leaves: &[[u8; 32]]) -> String {
    let mut sorted = leaves.to_vec();
    sorted.sort_unstable();
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-rows-v2");
    for name in [sel.table, sel.by] {
        h.update(&(name.len() as u64).to_le_bytes());
        h.update(name.as_bytes());
    }
    sel.from.encode(&mut h);
    sel.to.encode(&mut h);
    h.update(&(sorted.len() as u64).to_le_bytes());
    for l in &sorted {
        h.update(l);
    }
    h.finalize().to_hex().to_string()
}

/// Per-row salts for one write of rows that can hold a cell's value: a fresh random key from
/// the operating system, each row's salt the keyed BLAKE3 of its position among the rows
/// written. The key is dropped with this value, so one row's salt says nothing of another's.
pub struct RowSalts {
    key: [u8; 32],
}

impl RowSalts {
    pub fn new() -> Result<RowSalts> {
        let key = crate::commitment::random_seed()
            .map_err(|e| crate::Error::io(std::path::Path::new("getrandom"), e))?;
        Ok(RowSalts { key })
    }

    pub fn salt(&self, i: u64) -> [u8; 32] {
        *blake3::keyed_hash(&self.key, &i.to_le_bytes()).as_bytes()
    }
}

/// Whether an entry's details carry row commitments (entries of earlier builds do not).
pub fn has_commitments(details: &str) -> bool {
    serde_json::from_str::<Value>(details)
        .ok()
        .is_some_and(|d| d.get("rows").is_some_and(Value::is_array))
}

fn last_details(conn: &dyn Database) -> Result<Option<(i64, String)>> {
    match conn
        .query(
            "SELECT seq, details FROM audit_log ORDER BY seq DESC LIMIT 1",
            &[],
        )?
        .first()
    {
        Some(r) => Ok(Some((r.int(0)?, r.text(1)?))),
        None => Ok(None),
    }
}

/// The highest rowid of a known table (0 when empty or missing).
pub(super) fn max_rowid(conn: &dyn Database, table: &str) -> Result<i64> {
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
    conn.query(sql, &[])?.first().map_or(Ok(0), |r| r.int(0))
}

/// Every rowid of a known table, ascending.
pub(super) fn rowids(conn: &dyn Database, table: &str) -> Result<Vec<i64>> {
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
    conn.query(sql, &[])?.iter().map(|r| r.int(0)).collect()
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
        use backend::{Row, Value as V};
        let names = |n: &[&str]| -> Vec<String> { n.iter().map(|s| s.to_string()).collect() };
        let row = |v: Vec<V>| Row(v);
        let ab = names(&["a", "b"]);
        let enc = |n: &[String], v: Vec<V>| encode_row(n, &row(v), 0);
        let first = enc(&ab, vec![V::Int(1), V::Text("x".into())]);
        assert_eq!(
            enc(&names(&["b", "a"]), vec![V::Text("x".into()), V::Int(1)]),
            first,
            "columns by name, whatever their order"
        );
        assert_eq!(
            enc(
                &names(&["a", "b", "c"]),
                vec![V::Int(1), V::Text("x".into()), V::Null]
            ),
            first,
            "a NULL column is as if it were not there"
        );
        assert_eq!(
            enc(
                &names(&["a", "b", "rowid"]),
                vec![V::Int(1), V::Text("x".into()), V::Int(7)]
            ),
            first,
            "a server's rowid column is not part of the row"
        );
        assert_ne!(
            enc(&ab, vec![V::Text("1".into()), V::Text("x".into())]),
            first,
            "an integer differs from its text"
        );
        assert_ne!(
            enc(&ab, vec![V::Int(1), V::Text(String::new())]),
            enc(&ab, vec![V::Int(1), V::Null]),
            "NULL differs from an empty text"
        );
    }

    #[test]
    fn encoding_is_unambiguous() {
        // Moving a byte between two adjacent fields must change the hash.
        let a = entry_hash(1, "t", "ab", "c", "s", "{}", GENESIS);
        let b = entry_hash(1, "t", "a", "bc", "s", "{}", GENESIS);
        assert_ne!(a, b);
    }
}
