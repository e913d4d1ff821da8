//! Deliveries: a retrieved file recorded as handed over to someone (the version, the form it
//! was written in, the file's own BLAKE3 hash and size, who and why), one audit entry each.
//! A delivered version's bytes stay stored (see `recompute::must_stay_stored`), and `identify`
//! names a delivered file by its hash even when its bytes are not the version's own (a
//! Parquet, Arrow, TSV or JSON Lines rendering).

use std::io::Write;

use serde::Serialize;

use crate::error::{Error, Result};
use crate::model::{Agent, AuditEntry, Storage, Version};
use crate::store::Store;

/// The audit action of a delivery.
pub const AUDIT_ACTION: &str = "delivery";

/// One recorded delivery, as the audit entry holds it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Delivery {
    /// The audit entry that records it.
    pub audit_entry: u64,
    /// When (RFC 3339, UTC).
    pub at: String,
    /// Who, as the audit entry names them.
    pub by: String,
    /// The version delivered, `NAME:vN`.
    pub version: String,
    /// Its hash, 64 hex digits.
    pub version_hash: String,
    /// The form it was written in: `stored bytes`, `csv`, `tsv`, `jsonl`, `parquet`, `arrow`.
    pub format: String,
    /// The column types given for a columnar file (`COLUMN=TYPE`), in the order given.
    pub column_types: Vec<String>,
    /// The file name as given (`-` for standard output).
    pub file: String,
    /// The BLAKE3 hash of the bytes written, 64 hex digits.
    pub file_hash: String,
    /// How many bytes were written.
    pub bytes: u64,
    /// The reason the person gave.
    pub why: String,
}

/// What a delivery is about, before it is recorded.
pub struct Handover<'a> {
    pub version: &'a Version,
    pub format: &'a str,
    pub column_types: &'a [String],
    pub file: &'a str,
    /// 64 hex digits.
    pub file_hash: &'a str,
    pub bytes: u64,
    pub why: &'a str,
}

/// A writer that passes bytes on and, for a delivery, hashes them (BLAKE3) as they go, so the
/// record holds the hash of exactly what was written.
pub struct Tally<W: Write> {
    inner: W,
    hasher: Option<blake3::Hasher>,
    bytes: u64,
}

impl<W: Write> Tally<W> {
    /// Passes bytes on to `inner`; hashes them only when `hash`.
    pub fn new(inner: W, hash: bool) -> Self {
        Tally {
            inner,
            hasher: hash.then(blake3::Hasher::new),
            bytes: 0,
        }
    }

    /// The hash (64 hex digits; empty when not hashing) and the number of bytes written.
    pub fn finish(&self) -> (String, u64) {
        let hex = self
            .hasher
            .as_ref()
            .map_or_else(String::new, |h| h.finalize().to_hex().to_string());
        (hex, self.bytes)
    }
}

impl<W: Write> Write for Tally<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        if let Some(h) = self.hasher.as_mut() {
            h.update(&buf[..n]);
        }
        self.bytes += n as u64;
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Checks a delivery's reason before any byte is written: it must say something.
pub fn check_reason(why: &str) -> Result<()> {
    if why.trim().is_empty() {
        return Err(Error::usage(
            "--deliver needs a reason: say who receives the file and what for (for example --deliver \"Q3 figures for the board pack\")",
        ));
    }
    Ok(())
}

/// Records `h` in the audit chain. A recomputable version is first computed and stored (its
/// own `storage` entry), so that what was delivered can always be retrieved again as it was.
pub fn record(store: &mut Store, h: &Handover<'_>, agent: &Agent) -> Result<Delivery> {
    check_reason(h.why)?;
    if h.version.storage == Storage::Recomputable {
        crate::recompute::store_bytes(store, h.version, Storage::Stored, agent)?;
    }
    let at = crate::clock::now_rfc3339();
    let details = serde_json::json!({
        "version": h.version.hash,
        "label": h.version.label(),
        "format": h.format,
        "column_types": h.column_types,
        "file": h.file,
        "file_hash": h.file_hash,
        "bytes": h.bytes,
        "why": h.why,
    });
    let subject = h.version.audit_subject();
    let entry = store.write(|tx| tx.audit(agent, AUDIT_ACTION, &subject, &details, &at))?;
    from_entry(&entry).ok_or_else(|| {
        crate::error::ErrorKind::Internal(format!(
            "audit entry {} was written as a delivery but does not read back as one",
            entry.seq
        ))
        .into()
    })
}

/// The delivery an audit entry records, if it records one.
pub fn from_entry(e: &AuditEntry) -> Option<Delivery> {
    if e.action != AUDIT_ACTION {
        return None;
    }
    let d: serde_json::Value = serde_json::from_str(&e.details).ok()?;
    let text = |k: &str| d.get(k).and_then(|x| x.as_str()).map(str::to_string);
    Some(Delivery {
        audit_entry: e.seq,
        at: e.at.clone(),
        by: Agent::parse_identity(&e.agent, "store").identity(),
        version: text("label")?,
        version_hash: text("version")?,
        format: text("format")?,
        column_types: d
            .get("column_types")
            .and_then(|x| x.as_array())
            .map(|a| {
                a.iter()
                    .filter_map(|x| x.as_str().map(str::to_string))
                    .collect()
            })
            .unwrap_or_default(),
        file: text("file")?,
        file_hash: text("file_hash")?,
        bytes: d.get("bytes").and_then(|x| x.as_u64())?,
        why: text("why")?,
    })
}

/// Every recorded delivery, oldest first.
pub fn all(store: &Store) -> Result<Vec<Delivery>> {
    Ok(store
        .lineage
        .audit_entries()?
        .iter()
        .filter_map(from_entry)
        .collect())
}

/// The deliveries of a file whose bytes hash to `hex` (64 hex digits).
pub fn of_file(store: &Store, hex: &str) -> Result<Vec<Delivery>> {
    Ok(all(store)?
        .into_iter()
        .filter(|d| d.file_hash == hex)
        .collect())
}

/// The deliveries of version `v`.
pub fn of_version(store: &Store, v: &Version) -> Result<Vec<Delivery>> {
    Ok(all(store)?
        .into_iter()
        .filter(|d| d.version_hash == v.hash && d.version == v.label())
        .collect())
}
