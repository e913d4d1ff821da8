//! The row index: one small object per version that says, for every data row, where its record
//! starts in the version's bytes and on which line; row fingerprints are defined here too. Diff
//! aligns rows by fingerprint; trace goes from a row number to the raw line by offset, in
//! near-constant time, without re-reading the file.
//!
//! Two formats are read; the current one (2) is written. All integers little-endian.
//!
//! Format 2 (compact): `SLRX`, u32 2; then per data row one token, a LEB128 varint of
//! `gap * 2 + spans`, where `gap` is the byte distance from the previous row's first byte (for
//! the first row, from the start of the bytes), and `spans` is 1 when the row does not start
//! on the line after the previous row's (for the first row: on line 1), in which case a second
//! varint holds the extra lines (`line - previous line - 1`; first row: `line - 1`); then a
//! checkpoint every `stride` rows (row 0, stride, 2·stride, ...): u64 byte offset and u64
//! 1-based line, 16 bytes each; then a 32-byte tail: u64 number of rows, u64 length of the
//! tokens, u32 stride, u32 0, `SLRXTAIL`. Fingerprints are not stored: they are recomputed from
//! the version's bytes when a diff needs them. A reader by row goes to the checkpoint at or
//! before the row and parses at most `stride` records from there.
//!
//! Format 1 (stores written before): `SLRX`, u32 1, then 24 bytes per data row: u64 byte
//! offset, u64 1-based line, u64 fingerprint. The number of rows is (length - 8) / 24.
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
/// Format 1 (24 bytes per row), still read; [`header`] and [`encode_entry`] write it.
pub const FORMAT_VERSION: u32 = 1;
/// Format 2, the compact one, written by [`Builder`].
pub const COMPACT_FORMAT: u32 = 2;
pub const HEADER_LEN: usize = 8;
/// The bytes of one row in format 1.
pub const ENTRY_LEN: usize = 24;
/// Rows between two checkpoints of format 2 (recorded in each index's tail, so it can change
/// without touching old indexes): a read by row parses at most this many records.
pub const STRIDE: u32 = 128;
pub const CHECKPOINT_LEN: usize = 16;
pub const TAIL_LEN: usize = 32;
pub const TAIL_MAGIC: &[u8; 8] = b"SLRXTAIL";

/// One row's entry in format 1.
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

/// The header of format 1 (see [`Builder`] for the compact format written now).
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

fn invalid(why: impl Into<String>) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidData, why.into())
}

/// The format of a row index from its first 8 bytes: 1 or 2.
pub fn format_of(head: &[u8]) -> io::Result<u32> {
    if head.len() < HEADER_LEN || &head[..4] != MAGIC {
        return Err(invalid("not a row index (bad magic)"));
    }
    match u32::from_le_bytes([head[4], head[5], head[6], head[7]]) {
        v @ (FORMAT_VERSION | COMPACT_FORMAT) => Ok(v),
        v => Err(invalid(format!(
            "row index format {v} is not known to this build"
        ))),
    }
}

/// Checks a whole row index, of either format, and returns its number of rows. Format 2 is
/// decoded in full: its tokens must fill exactly the length the tail gives, and its checkpoints
/// must be the positions the tokens give.
pub fn validate(data: &[u8]) -> io::Result<u64> {
    if format_of(data)? == FORMAT_VERSION {
        let body = data.len() - HEADER_LEN;
        if !body.is_multiple_of(ENTRY_LEN) {
            return Err(invalid("row index length is not a whole number of rows"));
        }
        return Ok((body / ENTRY_LEN) as u64);
    }
    Ok(positions(data)?.len() as u64)
}

/// The tail of a format 2 index.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Tail {
    pub n_rows: u64,
    /// Bytes of the row tokens (they start right after the 8-byte header).
    pub tokens_len: u64,
    pub stride: u32,
}

impl Tail {
    /// Reads the last [`TAIL_LEN`] bytes of a format 2 index of `total` bytes, checking that the
    /// sections it describes fill the index exactly.
    pub fn read(b: &[u8], total: u64) -> io::Result<Tail> {
        if b.len() != TAIL_LEN || &b[24..32] != TAIL_MAGIC {
            return Err(invalid("row index tail not found"));
        }
        let u = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap_or([0; 8]));
        let t = Tail {
            n_rows: u(0),
            tokens_len: u(8),
            stride: u32::from_le_bytes(b[16..20].try_into().unwrap_or([0; 4])),
        };
        let expected = (HEADER_LEN as u64)
            .checked_add(t.tokens_len)
            .zip(t.n_checkpoints().checked_mul(CHECKPOINT_LEN as u64))
            .and_then(|(a, b)| a.checked_add(b))
            .and_then(|a| a.checked_add(TAIL_LEN as u64));
        if t.stride == 0 || expected != Some(total) {
            return Err(invalid("row index sections do not add up to its length"));
        }
        Ok(t)
    }

    pub fn n_checkpoints(&self) -> u64 {
        self.n_rows.div_ceil(u64::from(self.stride.max(1)))
    }

    /// Where checkpoint `i` (of rows `i * stride ..`) lies in the index.
    pub fn checkpoint_at(&self, i: u64) -> u64 {
        HEADER_LEN as u64 + self.tokens_len + i * CHECKPOINT_LEN as u64
    }
}

/// A checkpoint's byte offset and 1-based line.
pub fn checkpoint(b: &[u8]) -> Option<(u64, u64)> {
    let b = b.get(..CHECKPOINT_LEN)?;
    let u = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap_or([0; 8]));
    Some((u(0), u(8)))
}

fn put_varint(mut n: u64, out: &mut Vec<u8>) {
    while n >= 0x80 {
        out.push((n as u8) | 0x80);
        n >>= 7;
    }
    out.push(n as u8);
}

fn get_varint(data: &[u8], at: &mut usize) -> Option<u64> {
    let mut n = 0u64;
    for shift in (0..64).step_by(7) {
        let b = *data.get(*at)?;
        *at += 1;
        n |= u64::from(b & 0x7f) << shift;
        if b & 0x80 == 0 {
            return Some(n);
        }
    }
    None
}

/// Writes a format 2 index row by row: [`Builder::start`] first, one [`Builder::push`] per
/// data row in order, then [`Builder::finish`]. Holds the checkpoints until the end (16 bytes
/// per [`STRIDE`] rows).
#[derive(Debug, Clone)]
pub struct Builder {
    stride: u32,
    n_rows: u64,
    prev: (u64, u64),
    tokens_len: u64,
    checkpoints: Vec<u8>,
}

impl Default for Builder {
    fn default() -> Self {
        Builder::with_stride(STRIDE)
    }
}

impl Builder {
    pub fn new() -> Builder {
        Builder::default()
    }

    /// A builder with a checkpoint every `stride` rows (at least 1).
    pub fn with_stride(stride: u32) -> Builder {
        Builder {
            stride: stride.max(1),
            n_rows: 0,
            prev: (0, 0),
            tokens_len: 0,
            checkpoints: Vec::new(),
        }
    }

    /// The header, written before the first row.
    pub fn start() -> [u8; HEADER_LEN] {
        let mut h = [0u8; HEADER_LEN];
        h[..4].copy_from_slice(MAGIC);
        h[4..].copy_from_slice(&COMPACT_FORMAT.to_le_bytes());
        h
    }

    /// Appends to `out` the token of the next data row, whose record starts at `byte` on 1-based
    /// `line`; rows come in order, so both grow.
    pub fn push(&mut self, byte: u64, line: u64, out: &mut Vec<u8>) {
        debug_assert!(self.n_rows == 0 || (byte > self.prev.0 && line > self.prev.1));
        if self.n_rows.is_multiple_of(u64::from(self.stride)) {
            self.checkpoints.extend_from_slice(&byte.to_le_bytes());
            self.checkpoints.extend_from_slice(&line.to_le_bytes());
        }
        let before = out.len();
        let gap = byte.saturating_sub(self.prev.0);
        let extra = line.saturating_sub(self.prev.1 + 1);
        put_varint(gap * 2 + u64::from(extra != 0), out);
        if extra != 0 {
            put_varint(extra, out);
        }
        self.tokens_len += (out.len() - before) as u64;
        self.prev = (byte, line);
        self.n_rows += 1;
    }

    pub fn n_rows(&self) -> u64 {
        self.n_rows
    }

    /// Appends the checkpoints and the tail.
    pub fn finish(self, out: &mut Vec<u8>) {
        out.extend_from_slice(&self.checkpoints);
        out.extend_from_slice(&self.n_rows.to_le_bytes());
        out.extend_from_slice(&self.tokens_len.to_le_bytes());
        out.extend_from_slice(&self.stride.to_le_bytes());
        out.extend_from_slice(&0u32.to_le_bytes());
        out.extend_from_slice(TAIL_MAGIC);
    }
}

/// The whole format 2 index of rows given as (byte offset, 1-based line), in order: the one
/// function that writes a row index from rows (the writers stream the same through
/// [`Builder`]).
pub fn encode(rows: impl IntoIterator<Item = (u64, u64)>) -> Vec<u8> {
    let mut out = Builder::start().to_vec();
    let mut b = Builder::new();
    for (byte, line) in rows {
        b.push(byte, line, &mut out);
    }
    b.finish(&mut out);
    out
}

/// The (byte offset, 1-based line) of every data row of a whole row index of either format.
pub fn positions(data: &[u8]) -> io::Result<Vec<(u64, u64)>> {
    let mut out = Vec::new();
    each_position(
        data,
        &mut out,
        |o, n| o.reserve(n.min(1 << 24) as usize),
        |o, byte, line| o.push((byte, line)),
    )?;
    Ok(out)
}

/// The byte offset of every data row of a whole row index of either format (8 bytes a row
/// held, where [`positions`] holds 16).
pub fn offsets(data: &[u8]) -> io::Result<Vec<u64>> {
    let mut out = Vec::new();
    each_position(
        data,
        &mut out,
        |o, n| o.reserve(n.min(1 << 24) as usize),
        |o, byte, _| o.push(byte),
    )?;
    Ok(out)
}

/// Calls `each` with the byte offset and 1-based line of every data row of a whole row index of
/// either format, in order, after `count` with how many rows it holds; both get `out`.
fn each_position<T>(
    data: &[u8],
    out: &mut T,
    count: impl FnOnce(&mut T, u64),
    mut each: impl FnMut(&mut T, u64, u64),
) -> io::Result<()> {
    if format_of(data)? == FORMAT_VERSION {
        let n = validate(data)?;
        count(out, n);
        for e in (0..n).filter_map(|i| entry(data, i)) {
            each(out, e.byte, e.line);
        }
        return Ok(());
    }
    let tail_at = data
        .len()
        .checked_sub(TAIL_LEN)
        .filter(|&t| t >= HEADER_LEN)
        .ok_or_else(|| invalid("row index too short for its tail"))?;
    let tail = Tail::read(&data[tail_at..], data.len() as u64)?;
    let tokens_end = HEADER_LEN + tail.tokens_len as usize;
    count(out, tail.n_rows);
    let mut at = HEADER_LEN;
    let (mut byte, mut line) = (0u64, 0u64);
    let stride = u64::from(tail.stride);
    let bad = || invalid("row index tokens are damaged");
    for i in 0..tail.n_rows {
        let t = get_varint(&data[..tokens_end], &mut at).ok_or_else(bad)?;
        let extra = if t & 1 == 1 {
            get_varint(&data[..tokens_end], &mut at).ok_or_else(bad)?
        } else {
            0
        };
        byte = byte.checked_add(t >> 1).ok_or_else(bad)?;
        line = line.checked_add(1 + extra).ok_or_else(bad)?;
        if i % stride == 0 {
            let at = tail.checkpoint_at(i / stride) as usize;
            if checkpoint(&data[at..]) != Some((byte, line)) {
                return Err(invalid(format!(
                    "row index checkpoint of data row {} does not match its rows",
                    i + 1
                )));
            }
        }
        each(out, byte, line);
    }
    if at != tokens_end {
        return Err(bad());
    }
    Ok(())
}

/// The (byte offset, 1-based line) of 0-based data row `row` in a whole row index of either
/// format.
pub fn position(data: &[u8], row: u64) -> Option<(u64, u64)> {
    if format_of(data).ok()? == FORMAT_VERSION {
        return entry(data, row).map(|e| (e.byte, e.line));
    }
    positions(data)
        .ok()?
        .get(usize::try_from(row).ok()?)
        .copied()
}

/// The entry of 0-based data row `row_idx` in a whole row index of format 1 (its fingerprint
/// included); [`position`] reads either format.
pub fn entry(data: &[u8], row_idx: u64) -> Option<RowEntry> {
    if format_of(data).ok()? != FORMAT_VERSION {
        return None;
    }
    let start = HEADER_LEN + (row_idx as usize).checked_mul(ENTRY_LEN)?;
    let b = data.get(start..start + ENTRY_LEN)?;
    let u = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap_or([0; 8]));
    Some(RowEntry {
        byte: u(0),
        line: u(8),
        fingerprint: u(16),
    })
}

/// Finds a row in the bytes of its checkpoint's stretch: `bytes` start at the checkpoint's
/// record (`at`: its byte offset and line) and run to the next checkpoint's record or the end
/// of the version; the row is the `skip`-th record parsed there (0: the checkpoint's own).
/// Returns its byte offset, line, and where the next record starts (the end of the bytes when
/// it is the last one).
pub fn find_in_stretch(
    parser: &mut crate::table::parse::Parser,
    bytes: &[u8],
    at: (u64, u64),
    skip: u64,
) -> Option<(u64, u64, u64)> {
    parser.restart(at.0);
    let mut found: Option<(u64, u64)> = None;
    let mut next: Option<u64> = None;
    let mut seen = 0u64;
    let mut on = |r: RawRecord<'_>| -> Result<(), ()> {
        if seen == skip {
            found = Some((r.byte, at.1 + r.line - 1));
        } else if seen == skip + 1 {
            next = Some(r.byte);
            return Err(());
        }
        seen += 1;
        Ok(())
    };
    if parser.feed(bytes, &mut on).is_ok() {
        let _ = parser.finish(&mut on);
    }
    let (byte, line) = found?;
    Some((byte, line, next.unwrap_or(at.0 + bytes.len() as u64)))
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
    #[test]
    fn varints_are_leb128() {
        // The worked example of unsigned LEB128 in the DWARF 4 standard, section 7.6 (from
        // memory: 624485 encodes as E5 8E 26), and the one-byte boundary.
        let mut out = Vec::new();
        put_varint(624_485, &mut out);
        assert_eq!(out, [0xe5, 0x8e, 0x26]);
        out.clear();
        put_varint(127, &mut out);
        put_varint(128, &mut out);
        assert_eq!(out, [0x7f, 0x80, 0x01]);
        let mut at = 0;
        assert_eq!(get_varint(&out, &mut at), Some(127));
        assert_eq!(get_varint(&out, &mut at), Some(128));
        assert_eq!(get_varint(&out, &mut at), None);
    }

    #[test]
    fn compact_index_round_trips_and_reads_by_row() {
        // Rows on lines 2, 3, 6 (a record over three lines before it), 7, ...; offsets grow by
        // 10, 300 and 5 bytes in turn; 300 rows cross two checkpoints of 128.
        let mut rows = Vec::new();
        let (mut byte, mut line) = (12u64, 2u64);
        for i in 0..300u64 {
            rows.push((byte, line));
            byte += [10, 300, 5][(i % 3) as usize];
            line += if i % 7 == 1 { 3 } else { 1 };
        }
        let data = encode(rows.iter().copied());
        assert_eq!(validate(&data).unwrap(), 300);
        assert_eq!(positions(&data).unwrap(), rows);
        assert_eq!(position(&data, 299), Some(rows[299]));
        assert_eq!(position(&data, 300), None);
        let tail = Tail::read(&data[data.len() - TAIL_LEN..], data.len() as u64).unwrap();
        assert_eq!(
            (tail.n_rows, tail.stride, tail.n_checkpoints()),
            (300, STRIDE, 3)
        );
        let cp = tail.checkpoint_at(2) as usize;
        assert_eq!(checkpoint(&data[cp..]), Some(rows[256]));
        // A flipped checkpoint, a truncated index and a lost byte are refused.
        let mut bad = data.clone();
        bad[cp] ^= 1;
        assert!(validate(&bad).is_err());
        assert!(validate(&data[..data.len() - 1]).is_err());
        let mut short = data.clone();
        short.remove(HEADER_LEN + 3);
        assert!(validate(&short).is_err());
        // No rows at all: a header and a tail.
        let empty = encode(std::iter::empty());
        assert_eq!(empty.len(), HEADER_LEN + TAIL_LEN);
        assert_eq!(validate(&empty).unwrap(), 0);
    }

    #[test]
    fn a_row_is_found_in_its_stretch() {
        // RFC 4180 section 2, rule 6: a quoted field may hold a line break. The stretch starts
        // at byte 100 on line 8.
        let bytes = b"a,\"x\r\ny\"\r\nb,c\r\n\r\nd,e";
        let mut p = crate::table::parse::Parser::new(b',', 0);
        assert_eq!(
            find_in_stretch(&mut p, bytes, (100, 8), 0),
            Some((100, 8, 110))
        );
        assert_eq!(
            find_in_stretch(&mut p, bytes, (100, 8), 1),
            Some((110, 10, 117))
        );
        assert_eq!(
            find_in_stretch(&mut p, bytes, (100, 8), 2),
            Some((117, 12, 120))
        );
        assert_eq!(find_in_stretch(&mut p, bytes, (100, 8), 3), None);
    }

    proptest::proptest! {
        #[test]
        fn any_rows_round_trip(steps in proptest::collection::vec((1u64..100_000, 1u64..5), 0..700)) {
            let mut rows = Vec::new();
            let (mut byte, mut line) = (0u64, 0u64);
            for (gap, lines) in steps {
                byte += gap;
                line += lines;
                rows.push((byte, line));
            }
            let data = encode(rows.iter().copied());
            proptest::prop_assert_eq!(positions(&data).unwrap(), rows);
        }
    }
}
