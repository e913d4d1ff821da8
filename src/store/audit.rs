//! The audit log: an append-only table in the lineage database whose entries form a BLAKE3
//! hash chain. Each entry's hash covers its own fields and the previous entry's hash, so an
//! edited, removed, reordered or inserted entry breaks the chain at a place `verify` can name.
//!
//! Canonical encoding of an entry (what is hashed): the ASCII tag `sluice-audit-v1`, then each of
//! seq (decimal), at, agent, action, subject, details, prev_hash, in that order, each as its byte
//! length (8 bytes, little-endian) followed by its UTF-8 bytes. The first entry's prev_hash is 64
//! zeros.

use rusqlite::{params, Connection, OptionalExtension};
use serde_json::Value;

use super::lineage::db_err;
use crate::error::Result;
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
    let details = canonical_json(details);
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

    #[test]
    fn encoding_is_unambiguous() {
        // Moving a byte between two adjacent fields must change the hash.
        let a = entry_hash(1, "t", "ab", "c", "s", "{}", GENESIS);
        let b = entry_hash(1, "t", "a", "bc", "s", "{}", GENESIS);
        assert_ne!(a, b);
    }
}
