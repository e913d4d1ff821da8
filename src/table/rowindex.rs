//! The row index: one small object per version that says, for every data row, where its record
//! starts in the version's bytes, on which line, and its fingerprint. Diff aligns rows by
//! fingerprint; trace goes from a row number to the raw line through the offset, in constant
//! time, without re-reading the file.
//!
//! Format (little-endian): the 4 bytes `SLRX`, a u32 format version (1), then 24 bytes per data
//! row in order: u64 byte offset of the record's first byte, u64 1-based line number, u64
//! fingerprint. The number of rows is (length - 8) / 24.
//!
//! The fingerprint is XXH3-64 (seed 0) over the record's field bytes concatenated, followed by
//! each field's end offset within that concatenation as a u32 little-endian. It depends only on
//! the field values (not on quoting or the delimiter), so the same row has the same fingerprint
//! in a raw file and in sluice's canonical output. It is not a security hash: equal fingerprints
//! are confirmed by comparing values wherever a decision depends on them.

use std::io;

use xxhash_rust::xxh3::xxh3_64;

use super::parse::RawRecord;

pub const MAGIC: &[u8; 4] = b"SLRX";
pub const FORMAT_VERSION: u32 = 1;
pub const HEADER_LEN: usize = 8;
pub const ENTRY_LEN: usize = 24;

/// One row's entry.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RowEntry {
    pub byte: u64,
    pub line: u64,
    pub fingerprint: u64,
}

/// The fingerprint of a record (see the module documentation). `scratch` is reused between
/// calls: hashing one contiguous buffer in one call is several times faster than feeding the
/// streaming hasher piece by piece, and gives the same digest.
pub fn fingerprint(rec: &RawRecord<'_>, scratch: &mut Vec<u8>) -> u64 {
    fingerprint_parts(rec.fields, rec.ends, scratch)
}

pub fn fingerprint_parts(fields: &[u8], ends: &[usize], scratch: &mut Vec<u8>) -> u64 {
    scratch.clear();
    scratch.extend_from_slice(fields);
    for e in ends {
        scratch.extend_from_slice(&(*e as u32).to_le_bytes());
    }
    xxh3_64(scratch)
}

pub fn header() -> [u8; HEADER_LEN] {
    let mut h = [0u8; HEADER_LEN];
    h[..4].copy_from_slice(MAGIC);
    h[4..].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
    h
}

pub fn encode_entry(e: &RowEntry, out: &mut Vec<u8>) {
    out.extend_from_slice(&e.byte.to_le_bytes());
    out.extend_from_slice(&e.line.to_le_bytes());
    out.extend_from_slice(&e.fingerprint.to_le_bytes());
}

/// Checks the header and length of a whole row index and returns its number of rows.
pub fn validate(data: &[u8]) -> io::Result<u64> {
    if data.len() < HEADER_LEN || &data[..4] != MAGIC {
        return Err(io::Error::new(
            io::ErrorKind::InvalidData,
            "not a row index (bad magic)",
        ));
    }
    let v = u32::from_le_bytes([data[4], data[5], data[6], data[7]]);
    if v != FORMAT_VERSION {
        return Err(io::Error::new(
            io::ErrorKind::InvalidData,
            format!("row index format {v} is not known to this build"),
        ));
    }
    let body = data.len() - HEADER_LEN;
    if !body.is_multiple_of(ENTRY_LEN) {
        return Err(io::Error::new(
            io::ErrorKind::InvalidData,
            "row index length is not a whole number of rows",
        ));
    }
    Ok((body / ENTRY_LEN) as u64)
}

/// The entry of 0-based data row `row_idx` in a whole row index.
pub fn entry(data: &[u8], row_idx: u64) -> Option<RowEntry> {
    let start = HEADER_LEN + (row_idx as usize).checked_mul(ENTRY_LEN)?;
    let b = data.get(start..start + ENTRY_LEN)?;
    let u = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap_or([0; 8]));
    Some(RowEntry {
        byte: u(0),
        line: u(8),
        fingerprint: u(16),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fingerprint_separates_fields() {
        let mut s = Vec::new();
        // "ab","c" and "a","bc" hold the same bytes but are different rows.
        let a = fingerprint_parts(b"abc", &[2, 3], &mut s);
        assert_ne!(a, fingerprint_parts(b"abc", &[1, 3], &mut s));
        assert_eq!(a, fingerprint_parts(b"abc", &[2, 3], &mut s));
        // The definition: XXH3-64 of the field bytes, then each end offset as u32 LE.
        let mut streamed = xxhash_rust::xxh3::Xxh3::new();
        streamed.update(b"abc");
        streamed.update(&[2, 0, 0, 0, 3, 0, 0, 0]);
        assert_eq!(a, streamed.digest());
    }

    #[test]
    fn round_trip() {
        let mut data = header().to_vec();
        let e = RowEntry {
            byte: 17,
            line: 3,
            fingerprint: 0xdead_beef,
        };
        encode_entry(&e, &mut data);
        assert_eq!(validate(&data).unwrap(), 1);
        assert_eq!(entry(&data, 0), Some(e));
        assert_eq!(entry(&data, 1), None);
    }
}
