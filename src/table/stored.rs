//! The one reader of a stored version's rows: a version's bytes, re-hashed as they are read
//! (a damaged object is an error after the last row, before its reader acts on the result),
//! parsed in the version's dialect, the header skipped. Every stage that reads a version's
//! rows (operations, diff, checks, trace, explain, export, withdrawals) goes through here;
//! the store opens the bytes ([`crate::store::Objects::each_row`]).

use std::io::{self, Read};
use std::path::Path;

use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Dialect, Version};
use crate::progress::{Task, Unit};
use crate::table::{for_each_record, RawRecord, ReadSettings};

/// A reader that hashes what passes through it and reports how far it is.
struct Hashing<R> {
    inner: R,
    hasher: blake3::Hasher,
    progress: Task,
}

impl<R: Read> Read for Hashing<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.hasher.update(&buf[..n]);
        self.progress.add(n as u64);
        Ok(n)
    }
}

/// What is being read, for the parser's messages and the progress bar.
pub struct Source<'a> {
    /// The BLAKE3 the bytes must have (hex).
    pub hash: &'a str,
    pub dialect: &'a Dialect,
    /// How messages name it (`orders:v3`).
    pub label: &'a str,
    /// Its size, for the progress bar.
    pub n_bytes: Option<u64>,
    /// What the progress bar says is done with it ("reading", "comparing").
    pub doing: &'a str,
}

impl<'a> Source<'a> {
    /// A stored version, read for an operation or a query.
    pub fn version(v: &'a Version, label: &'a str) -> Self {
        Source {
            hash: &v.hash,
            dialect: &v.dialect,
            label,
            n_bytes: Some(v.n_bytes),
            doing: "reading",
        }
    }
}

/// Calls `f` with every data row of `reader` (0-based row and record) in order; the bytes must
/// hash to `source.hash`, which is checked after the last row.
pub fn each_row(
    reader: impl Read,
    source: &Source<'_>,
    mut f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    let expected: Hash = source
        .hash
        .parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
    let mut checked = Hashing {
        inner: reader,
        hasher: blake3::Hasher::new(),
        progress: Task::begin(
            || format!("{} {}", source.doing, source.label),
            source.n_bytes,
            Unit::Bytes,
        ),
    };
    let settings = ReadSettings::for_dialect(source.dialect)?;
    let mut header_seen = !source.dialect.has_header;
    let mut row = 0u64;
    for_each_record(Path::new(source.label), &mut checked, &settings, |r| {
        if !header_seen {
            header_seen = true;
            return Ok(());
        }
        row += 1;
        f(row - 1, r)
    })?;
    let actual = Hash::from_bytes(*checked.hasher.finalize().as_bytes());
    if actual != expected {
        return Err(ErrorKind::ObjectCorrupt {
            hash: expected.hex(),
            actual: actual.hex(),
        }
        .into());
    }
    Ok(())
}
