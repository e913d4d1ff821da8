//! The row- and cell-level provenance of a built-in step, kept compact: its row map (as runs),
//! which output cells it changed and which input rows it dropped, and why. It is stored as one immutable object per
//! step (named by its BLAKE3 hash like every object, so `verify` re-hashes it and any edit is
//! found), and the old and new values of a changed cell are read back from the step's input and
//! output versions, which are immutable too: the old value is the input cell the row map points
//! at, the new value the output cell. So a step that changes 600,000 cells stores about one or
//! two bytes per cell instead of the values twice, and provenance still grows with what
//! changed, never with the rows left alone.
//!
//! Format (all integers LEB128 varints unless said):
//!
//! ```text
//! "SLPV" u32-le format 2, u64-le byte length of the run sets
//! the run sets: n_run_sets, then per input the runs were taken from: its position among the
//!   step's inputs, n_runs, runs_per_block (at least 1), then a block table of
//!   ceil(n_runs / runs_per_block) entries of 16 bytes (u64-le the output row where the
//!   block's first run starts, u64-le where the block ends, in bytes from the end of the
//!   table), then the blocks: each holds runs_per_block runs in output order (the last one
//!   the rest), per run out_start as a difference from the previous run's end, in_start as a
//!   zigzag-encoded difference from the previous run's input end, len, the differences of
//!   each block's first run taken from 0
//! n_columns, then per column with changes: name (length, UTF-8 bytes), count, and the
//!   0-based output rows in increasing order as differences (the first from 0)
//! n_reasons, then each reason text (length, UTF-8 bytes)
//! n_drops, then per dropped input row, in increasing order: the row as a difference from the
//!   previous one, its reason's number, and the row it duplicated plus one (0 for none)
//! ```
//!
//! The run sets come first, after their length, so that a trail reads only them, and in blocks
//! behind a table, so that it finds one row's run by reading the table and one block
//! ([`input_row`]) however many runs the step made: a filter that drops one row in fifty of
//! 5,000,000 makes about 100,000 runs. Format 1 (written before) held the runs of a set as one
//! sequence without the table; it is read as ever, whole. The reason of
//! a duplicate is stored without the row it duplicates, which the drop holds anyway, so all the
//! duplicates of one step share one reason text: "(the whole row)" is read back as "duplicate
//! of data row 8 (the whole row)".
//!
//! Steps recorded by schema 3 and earlier kept their row maps, cell changes and drops in the
//! database's `row_runs`, `cell_changes` and `drops` tables; the readers here return those too.

use std::collections::HashMap;

use crate::error::{Error, ErrorKind, Result};
use crate::model::{CellChange, Drop, RowRun, Version};
use crate::store::Store;

const MAGIC: &[u8; 4] = b"SLPV";
/// The format this build writes; it reads [`FORMAT_SEQUENTIAL`] too.
const FORMAT: u32 = 2;
/// Format 1: the runs of a set as one sequence, without a block table.
const FORMAT_SEQUENTIAL: u32 = 1;
/// Runs per block of a run set. A trail decodes one block to find a row: at 128 runs of 3 to
/// 12 bytes, under 2 KiB; the table costs 16 bytes per block, an eighth of a byte per run.
const RUNS_PER_BLOCK: usize = 128;
/// Bytes of one entry of a block table.
const BLOCK_ENTRY: usize = 16;

/// The cells a step changed, as output rows per output column, gathered while it runs. Each
/// column keeps its rows already in the form the provenance object stores them (the gaps
/// between increasing rows as variable-length integers, one or two bytes for most), not as
/// 8 bytes a row, so that a long plan's steps in one pass hold little for millions of changes.
#[derive(Debug, Default, Clone)]
pub struct ChangeLog {
    /// Per output column (by position).
    columns: Vec<ColumnChanges>,
}

#[derive(Debug, Default, Clone)]
struct ColumnChanges {
    n: u64,
    last: u64,
    gaps: Vec<u8>,
}

impl ChangeLog {
    pub fn new(n_columns: usize) -> Self {
        ChangeLog {
            columns: vec![ColumnChanges::default(); n_columns],
        }
    }

    /// Records that output row `row` of column `column` was changed. Rows come in order.
    pub fn push(&mut self, column: usize, row: u64) {
        if column >= self.columns.len() {
            self.columns.resize(column + 1, ColumnChanges::default());
        }
        let c = &mut self.columns[column];
        debug_assert!(c.n == 0 || row > c.last);
        put_varint(&mut c.gaps, row - c.last);
        c.last = row;
        c.n += 1;
    }

    pub fn len(&self) -> usize {
        self.columns.iter().map(|c| c.n as usize).sum()
    }

    pub fn is_empty(&self) -> bool {
        self.columns.iter().all(|c| c.n == 0)
    }
}

/// The input rows a step dropped, with their reasons kept once each. The drops are kept in the
/// provenance object's own form as they come (the gap from the row before, the reason's
/// number, the row duplicated plus one or 0, each a variable-length integer), a few bytes a
/// drop rather than 24.
#[derive(Debug, Default, Clone)]
pub struct DropLog {
    reasons: Vec<String>,
    index: HashMap<String, u32>,
    n: usize,
    last: u64,
    entries: Vec<u8>,
}

impl DropLog {
    /// Records that input row `row` was dropped. For a duplicate, `reason` is what follows
    /// "duplicate of data row N" (see [`reason_text`]). Rows come in order.
    pub fn push(&mut self, row: u64, reason: &str, duplicate_of: Option<u64>) {
        let n = match self.index.get(reason) {
            Some(&n) => n,
            None => {
                let n = self.reasons.len() as u32;
                self.reasons.push(reason.to_string());
                self.index.insert(reason.to_string(), n);
                n
            }
        };
        debug_assert!(self.n == 0 || row > self.last);
        put_varint(&mut self.entries, row - self.last);
        put_varint(&mut self.entries, u64::from(n));
        put_varint(&mut self.entries, duplicate_of.map_or(0, |d| d + 1));
        self.last = row;
        self.n += 1;
    }

    pub fn len(&self) -> usize {
        self.n
    }

    pub fn is_empty(&self) -> bool {
        self.n == 0
    }

    /// Every drop, in order of input row.
    pub fn drops(&self) -> Vec<Drop> {
        let mut r = Reader::new(&self.entries, 0, "being written");
        let mut row = 0u64;
        let mut out = Vec::with_capacity(self.n);
        for _ in 0..self.n {
            // Written just above by `push`: always whole.
            let (Ok(gap), Ok(n), Ok(dup)) = (r.varint(), r.varint(), r.varint()) else {
                break;
            };
            row += gap;
            let dup = dup.checked_sub(1);
            out.push(Drop {
                row_idx: row,
                reason: reason_text(self.reasons.get(n as usize).map_or("", String::as_str), dup),
                duplicate_of: dup,
            });
        }
        out
    }
}

/// A drop's reason as people read it: a duplicate's stored reason follows the row it
/// duplicates (1-based, as `cat` shows it).
pub fn reason_text(stored: &str, duplicate_of: Option<u64>) -> String {
    match duplicate_of {
        Some(d) => format!("duplicate of data row {} {stored}", d + 1),
        None => stored.to_string(),
    }
}

fn put_varint(out: &mut Vec<u8>, mut v: u64) {
    while v >= 0x80 {
        out.push((v as u8) | 0x80);
        v >>= 7;
    }
    out.push(v as u8);
}

fn put_text(out: &mut Vec<u8>, s: &str) {
    put_varint(out, s.len() as u64);
    out.extend_from_slice(s.as_bytes());
}

/// Runs in output order, each as the difference of its output start from the previous run's
/// end, the zigzag difference of its input start from the previous run's input end, and its
/// length; the first run's differences taken from 0.
fn put_runs(out: &mut Vec<u8>, runs: &[RowRun]) {
    let (mut out_end, mut in_end) = (0u64, 0u64);
    for r in runs {
        put_varint(out, r.out_start - out_end);
        let d = r.in_start as i64 - in_end as i64;
        put_varint(out, ((d << 1) ^ (d >> 63)) as u64);
        put_varint(out, r.len);
        out_end = r.out_start + r.len;
        in_end = r.in_start + r.len;
    }
}

/// The object's bytes for a step's changes (named by `header`, the output columns), drops and
/// row maps (each with the position of its input among the step's inputs).
pub fn encode(
    header: &[String],
    changes: &ChangeLog,
    drops: &DropLog,
    runs: &[(u32, &[RowRun])],
) -> Vec<u8> {
    let mut out = Vec::with_capacity(16 + changes.len() * 2 + drops.len() * 3);
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&FORMAT.to_le_bytes());
    // The run sets first, after their length, so that a reader of the row map (trace) reads
    // only them.
    let mut run_bytes = Vec::new();
    put_varint(&mut run_bytes, runs.len() as u64);
    for (position, set) in runs {
        put_varint(&mut run_bytes, u64::from(*position));
        put_varint(&mut run_bytes, set.len() as u64);
        put_varint(&mut run_bytes, RUNS_PER_BLOCK as u64);
        let mut table = Vec::with_capacity(set.len().div_ceil(RUNS_PER_BLOCK) * BLOCK_ENTRY);
        let mut blocks = Vec::new();
        for block in set.chunks(RUNS_PER_BLOCK) {
            table.extend_from_slice(&block[0].out_start.to_le_bytes());
            put_runs(&mut blocks, block);
            table.extend_from_slice(&(blocks.len() as u64).to_le_bytes());
        }
        run_bytes.extend_from_slice(&table);
        run_bytes.extend_from_slice(&blocks);
    }
    out.extend_from_slice(&(run_bytes.len() as u64).to_le_bytes());
    out.extend_from_slice(&run_bytes);
    let columns: Vec<(usize, &ColumnChanges)> = changes
        .columns
        .iter()
        .enumerate()
        .filter(|(_, c)| c.n > 0)
        .collect();
    put_varint(&mut out, columns.len() as u64);
    for (c, changed) in columns {
        put_text(&mut out, header.get(c).map(String::as_str).unwrap_or(""));
        put_varint(&mut out, changed.n);
        // The gaps between changed rows, the first from row 0, as they were gathered.
        out.extend_from_slice(&changed.gaps);
    }
    put_varint(&mut out, drops.reasons.len() as u64);
    for r in &drops.reasons {
        put_text(&mut out, r);
    }
    put_varint(&mut out, drops.n as u64);
    // The drops as they were gathered: each row's gap from the one before, reason, duplicate.
    out.extend_from_slice(&drops.entries);
    out
}

/// Encodes a step's provenance (as [`encode`]) and writes it as an object in frames meant for
/// reading by offset: durable, not yet referenced. `None` when there is nothing to record.
pub fn write(
    store: &Store,
    header: &[String],
    changes: &ChangeLog,
    drops: &DropLog,
    runs: &[(u32, &[RowRun])],
) -> Result<Option<(String, u64)>> {
    if changes.is_empty() && drops.is_empty() && runs.is_empty() {
        return Ok(None);
    }
    let bytes = encode(header, changes, drops, runs);
    let store_io = |e: std::io::Error| Error::io(&store.dir().join("tmp"), e);
    let mut w = store.objects.random_access_writer().map_err(store_io)?;
    w.write(&bytes).map_err(store_io)?;
    let (hash, n) = w.finish().map_err(store_io)?;
    Ok(Some((hash.hex(), n)))
}

/// A decoded provenance object.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Decoded {
    /// (output column name, changed output rows in increasing order).
    pub changes: Vec<(String, Vec<u64>)>,
    pub drops: Vec<Drop>,
    /// (position of the input among the step's inputs, its runs in output order).
    pub runs: Vec<(u32, Vec<RowRun>)>,
}

struct Reader<'a> {
    bytes: &'a [u8],
    at: usize,
    what: &'a str,
    /// Where `bytes` start in the object (a part read by offset), for the byte errors name.
    base: u64,
}

/// The error for provenance object `what`, malformed at byte `at` of it.
fn malformed(what: &str, at: u64, why: &str) -> Error {
    ErrorKind::Inconsistent(format!(
        "the provenance object {what} is malformed at byte {at} ({why}); run `sluice verify`"
    ))
    .into()
}

impl<'a> Reader<'a> {
    /// A reader of `bytes`, which are the object's bytes from offset `base`.
    fn new(bytes: &'a [u8], base: u64, what: &'a str) -> Self {
        Reader {
            bytes,
            at: 0,
            what,
            base,
        }
    }

    fn bad(&self, why: &str) -> Error {
        malformed(self.what, self.base + self.at as u64, why)
    }

    fn varint(&mut self) -> Result<u64> {
        let mut v = 0u64;
        for shift in (0..64).step_by(7) {
            let b = *self
                .bytes
                .get(self.at)
                .ok_or_else(|| self.bad("it ends early"))?;
            self.at += 1;
            v |= u64::from(b & 0x7f) << shift;
            if b & 0x80 == 0 {
                return Ok(v);
            }
        }
        Err(self.bad("a number is too long"))
    }

    fn text(&mut self) -> Result<String> {
        let n = self.varint()? as usize;
        let end = self
            .at
            .checked_add(n)
            .filter(|&e| e <= self.bytes.len())
            .ok_or_else(|| self.bad("a text runs past the end"))?;
        let s = std::str::from_utf8(&self.bytes[self.at..end])
            .map_err(|_| self.bad("a text is not UTF-8"))?
            .to_string();
        self.at = end;
        Ok(s)
    }

    /// A count of items that each take at least one byte, so a damaged count cannot ask for
    /// more memory than the object has bytes.
    fn count(&mut self) -> Result<usize> {
        let n = self.varint()?;
        if n > (self.bytes.len() - self.at) as u64 {
            return Err(self.bad("a count is larger than the object"));
        }
        Ok(n as usize)
    }
}

/// Reads a provenance object; `what` names it in errors.
pub fn decode(bytes: &[u8], what: &str) -> Result<Decoded> {
    let mut r = Reader::new(bytes, 0, what);
    if bytes.len() < HEADER_LEN || &bytes[..4] != MAGIC {
        return Err(r.bad("it does not start with SLPV"));
    }
    let format = format_of(bytes, &r)?;
    let runs_end = runs_end(bytes, &r)?;
    r.at = HEADER_LEN;
    let runs = run_sets(&mut r, format)?;
    if r.at != runs_end {
        return Err(r.bad("the run sets are not as long as the header says"));
    }
    let n_columns = r.count()?;
    let mut changes = Vec::with_capacity(n_columns);
    for _ in 0..n_columns {
        let name = r.text()?;
        let n = r.count()?;
        let mut rows = Vec::with_capacity(n);
        let mut prev = 0u64;
        for i in 0..n {
            let d = r.varint()?;
            if i > 0 && d == 0 {
                return Err(r.bad("a changed row is listed twice"));
            }
            prev = prev
                .checked_add(d)
                .ok_or_else(|| r.bad("a row number overflows"))?;
            rows.push(prev);
        }
        changes.push((name, rows));
    }
    let n_reasons = r.count()?;
    let reasons = (0..n_reasons)
        .map(|_| r.text())
        .collect::<Result<Vec<_>>>()?;
    let n_drops = r.count()?;
    let mut drops = Vec::with_capacity(n_drops);
    let mut prev = 0u64;
    for i in 0..n_drops {
        let d = r.varint()?;
        if i > 0 && d == 0 {
            return Err(r.bad("a dropped row is listed twice"));
        }
        prev = prev
            .checked_add(d)
            .ok_or_else(|| r.bad("a row number overflows"))?;
        let n = r.varint()? as usize;
        let stored = reasons
            .get(n)
            .ok_or_else(|| r.bad("a drop names a reason that is not there"))?;
        let duplicate_of = r.varint()?.checked_sub(1);
        drops.push(Drop {
            row_idx: prev,
            reason: reason_text(stored, duplicate_of),
            duplicate_of,
        });
    }
    if r.at != bytes.len() {
        return Err(r.bad("bytes follow the last drop"));
    }
    Ok(Decoded {
        changes,
        drops,
        runs,
    })
}

/// Run sets: (position of the input among the step's inputs, its runs in output order).
pub type RunSets = Vec<(u32, Vec<RowRun>)>;

/// The magic, the format and the byte length of the run sets.
const HEADER_LEN: usize = 16;

/// The byte length of the run sets, from the header (None when the header is cut short).
fn runs_len(bytes: &[u8]) -> Option<u64> {
    bytes
        .get(8..HEADER_LEN)
        .and_then(|b| b.try_into().ok())
        .map(u64::from_le_bytes)
}

/// Where the run sets end, from the header of a provenance object.
fn runs_end(bytes: &[u8], r: &Reader<'_>) -> Result<usize> {
    let len = runs_len(bytes).ok_or_else(|| r.bad("the header is cut short"))?;
    usize::try_from(len)
        .ok()
        .and_then(|l| l.checked_add(HEADER_LEN))
        .filter(|&e| e <= bytes.len())
        .ok_or_else(|| r.bad("the run sets run past the end"))
}

/// The format of a provenance object whose first bytes (at least [`HEADER_LEN`]) are `bytes`,
/// if this build reads it.
fn format_of(bytes: &[u8], r: &Reader<'_>) -> Result<u32> {
    let format = u32::from_le_bytes([bytes[4], bytes[5], bytes[6], bytes[7]]);
    if format != FORMAT && format != FORMAT_SEQUENTIAL {
        return Err(r.bad(&format!(
            "format {format}, this build reads {FORMAT_SEQUENTIAL} and {FORMAT}; upgrade sluice"
        )));
    }
    Ok(format)
}

/// Decodes `n` runs in output order, the differences taken from `(out_end, in_end)` = (0, 0),
/// appending them to `set`; a run must not start before `floor`, the end of the run before
/// it. Returns the end of the last run.
fn runs_from(r: &mut Reader<'_>, n: usize, floor: u64, set: &mut Vec<RowRun>) -> Result<u64> {
    let (mut out_end, mut in_end) = (0u64, 0u64);
    let mut floor = floor;
    for _ in 0..n {
        let out_start = out_end
            .checked_add(r.varint()?)
            .ok_or_else(|| r.bad("a row number overflows"))?;
        if out_start < floor {
            return Err(r.bad("a run starts before the end of the run before it"));
        }
        let z = r.varint()?;
        let d = ((z >> 1) as i64) ^ -((z & 1) as i64);
        let in_start = u64::try_from(in_end as i64 + d)
            .map_err(|_| r.bad("a run starts before the first input row"))?;
        let len = r.varint()?;
        if len == 0 {
            return Err(r.bad("a run of no rows"));
        }
        set.push(RowRun {
            out_start,
            in_start,
            len,
        });
        out_end = out_start
            .checked_add(len)
            .ok_or_else(|| r.bad("a row number overflows"))?;
        in_end = in_start
            .checked_add(len)
            .ok_or_else(|| r.bad("a row number overflows"))?;
        floor = out_end;
    }
    Ok(floor)
}

/// The head of a run set of format 2: (position, n_runs, runs_per_block, n_blocks), the
/// reader left at the block table; `bytes_left` is how many bytes of run sets follow the
/// head's start, which bounds the counts.
fn set_head(r: &mut Reader<'_>, bytes_left: u64) -> Result<(u32, usize, usize, usize)> {
    let position =
        u32::try_from(r.varint()?).map_err(|_| r.bad("an input position is too large"))?;
    // Every run takes at least 3 bytes, so a damaged count cannot ask for more memory than
    // the run sets have bytes.
    let n = r.varint()?;
    if n > bytes_left / 3 {
        return Err(r.bad("a count is larger than the object"));
    }
    let per_block = r.varint()?;
    if per_block == 0 {
        return Err(r.bad("a block of no runs"));
    }
    let n = n as usize;
    let per_block = usize::try_from(per_block)
        .unwrap_or(usize::MAX)
        .min(n.max(1));
    let n_blocks = n.div_ceil(per_block);
    if (n_blocks as u64).saturating_mul(BLOCK_ENTRY as u64) > bytes_left {
        return Err(r.bad("the block table runs past the end"));
    }
    Ok((position, n, per_block, n_blocks))
}

/// One entry of a block table: (output row of the block's first run, the block's end).
fn block_entry(table: &[u8], k: usize) -> (u64, u64) {
    let e = &table[k * BLOCK_ENTRY..(k + 1) * BLOCK_ENTRY];
    let word = |b: &[u8]| u64::from_le_bytes(b.try_into().unwrap_or([0; 8]));
    (word(&e[..8]), word(&e[8..]))
}

fn run_sets(r: &mut Reader<'_>, format: u32) -> Result<RunSets> {
    let n_sets = r.count()?;
    let mut runs = Vec::with_capacity(n_sets);
    for _ in 0..n_sets {
        if format == FORMAT_SEQUENTIAL {
            let position =
                u32::try_from(r.varint()?).map_err(|_| r.bad("an input position is too large"))?;
            let n = r.count()?;
            let mut set = Vec::with_capacity(n);
            runs_from(r, n, 0, &mut set)?;
            runs.push((position, set));
            continue;
        }
        let left = (r.bytes.len() - r.at) as u64;
        let (position, n, per_block, n_blocks) = set_head(r, left)?;
        let table_at = r.at;
        let blocks_at = table_at + n_blocks * BLOCK_ENTRY;
        if blocks_at > r.bytes.len() {
            return Err(r.bad("the block table runs past the end"));
        }
        let table = &r.bytes[table_at..blocks_at];
        r.at = blocks_at;
        let mut set = Vec::with_capacity(n);
        let mut floor = 0u64;
        for k in 0..n_blocks {
            let (first, end) = block_entry(table, k);
            let from = set.len();
            floor = runs_from(r, per_block.min(n - k * per_block), floor, &mut set)?;
            if set[from].out_start != first {
                return Err(r.bad("a block does not start where its table entry says"));
            }
            if (r.at - blocks_at) as u64 != end {
                return Err(r.bad("a block does not end where its table entry says"));
            }
        }
        runs.push((position, set));
    }
    Ok(runs)
}

/// Output row `row`'s input row in the run sets of a provenance object of `size` bytes, read
/// by offset through `read` (offset, length), in the sets whose input position `wanted`
/// accepts; `None` when no run holds it. Format 2 reads the head of each set, the block table
/// of a wanted one and the one block that may hold the row: a few KiB, however many runs the
/// step made. Format 1 is decoded whole.
fn find_input_row(
    read: &mut dyn FnMut(u64, usize) -> Result<Vec<u8>>,
    size: u64,
    what: &str,
    wanted: &dyn Fn(u32) -> bool,
    row: u64,
) -> Result<Option<u64>> {
    let head = read(0, HEADER_LEN)?;
    let r = Reader::new(&head, 0, what);
    if head.len() < HEADER_LEN || &head[..4] != MAGIC {
        return Err(r.bad("it does not start with SLPV"));
    }
    let format = format_of(&head, &r)?;
    let end = runs_len(&head)
        .and_then(|l| l.checked_add(HEADER_LEN as u64))
        .filter(|&e| e <= size)
        .ok_or_else(|| r.bad("the run sets run past the end"))?;
    if format == FORMAT_SEQUENTIAL {
        let prefix = read(0, end as usize)?;
        for (position, set) in decode_runs(&prefix, what)? {
            if wanted(position) {
                if let Some(i) = crate::model::input_of(&set, row) {
                    return Ok(Some(i));
                }
            }
        }
        return Ok(None);
    }
    // The varints before the first set's table, and those of one set's head: at most 10
    // bytes each.
    const HEAD_WINDOW: u64 = 40;
    let window = |read: &mut dyn FnMut(u64, usize) -> Result<Vec<u8>>, at: u64| {
        read(at, HEAD_WINDOW.min(end - at) as usize)
    };
    let mut at = HEADER_LEN as u64;
    let first = window(read, at)?;
    let mut r = Reader::new(&first, at, what);
    let n_sets = r.varint()?;
    at += r.at as u64;
    for _ in 0..n_sets {
        if at >= end {
            return Err(malformed(what, at, "a run set runs past the end"));
        }
        let bytes = window(read, at)?;
        let mut r = Reader::new(&bytes, at, what);
        let (position, n, per_block, n_blocks) = set_head(&mut r, end - at)?;
        let table_at = at + r.at as u64;
        let blocks_at = table_at + (n_blocks * BLOCK_ENTRY) as u64;
        if blocks_at > end {
            return Err(r.bad("the block table runs past the end"));
        }
        if n_blocks == 0 {
            at = blocks_at;
            continue;
        }
        let damaged = |why: &str| malformed(what, table_at, why);
        if !wanted(position) {
            // Only the last entry: where this set's blocks end.
            let last = read(
                table_at + ((n_blocks - 1) * BLOCK_ENTRY) as u64,
                BLOCK_ENTRY,
            )?;
            if last.len() < BLOCK_ENTRY {
                return Err(damaged("the block table is cut short"));
            }
            at = blocks_at
                .checked_add(block_entry(&last, 0).1)
                .filter(|&e| e <= end)
                .ok_or_else(|| damaged("a block runs past the end"))?;
            continue;
        }
        let table = read(table_at, n_blocks * BLOCK_ENTRY)?;
        if table.len() < n_blocks * BLOCK_ENTRY {
            return Err(damaged("the block table is cut short"));
        }
        let set_end = blocks_at
            .checked_add(block_entry(&table, n_blocks - 1).1)
            .filter(|&e| e <= end)
            .ok_or_else(|| damaged("a block runs past the end"))?;
        // The last block whose first run starts at or before the row.
        let (mut lo, mut hi) = (0, n_blocks);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if block_entry(&table, mid).0 <= row {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        let k = lo;
        if k > 0 {
            let k = k - 1;
            let start = if k == 0 {
                0
            } else {
                block_entry(&table, k - 1).1
            };
            let stop = block_entry(&table, k).1;
            if start > stop || blocks_at + stop > set_end {
                return Err(damaged("a block ends before it starts"));
            }
            let block = read(blocks_at + start, (stop - start) as usize)?;
            let mut r = Reader::new(&block, blocks_at + start, what);
            let count = per_block.min(n - k * per_block);
            let mut runs = Vec::with_capacity(count.min(block.len() / 3));
            runs_from(&mut r, count, 0, &mut runs)?;
            if r.at != block.len() {
                return Err(r.bad("a block does not end where its table entry says"));
            }
            if let Some(i) = crate::model::input_of(&runs, row) {
                return Ok(Some(i));
            }
        }
        at = set_end;
    }
    Ok(None)
}

/// Reads the run sets of a provenance object from its first bytes alone (the header and the
/// run sets): what a trail needs, without the changed cells and drops after them.
pub fn decode_runs(prefix: &[u8], what: &str) -> Result<RunSets> {
    let mut r = Reader::new(prefix, 0, what);
    if prefix.len() < HEADER_LEN || &prefix[..4] != MAGIC {
        return Err(r.bad("it does not start with SLPV"));
    }
    let format = format_of(prefix, &r)?;
    let end = runs_end(prefix, &r)?;
    r.at = HEADER_LEN;
    let runs = run_sets(&mut r, format)?;
    if r.at != end {
        return Err(r.bad("the run sets are not as long as the header says"));
    }
    Ok(runs)
}

/// The hash of a step's provenance object, as text and parsed, if it has one.
fn object_of(store: &Store, step_id: i64) -> Result<Option<(String, crate::hash::Hash)>> {
    let Some(hex) = store.lineage.step_provenance(step_id)? else {
        return Ok(None);
    };
    let hash = hex.parse().map_err(|e| {
        ErrorKind::Inconsistent(format!(
            "step {step_id}: malformed provenance hash {hex}: {e}"
        ))
    })?;
    Ok(Some((hex, hash)))
}

fn load(store: &Store, step_id: i64) -> Result<Option<Decoded>> {
    let Some((hex, hash)) = object_of(store, step_id)? else {
        return Ok(None);
    };
    let bytes = store.objects.read_all(&hash)?;
    decode(&bytes, &hex).map(Some)
}

/// The row map of `output` from input version `input_id`, as runs in output order.
pub fn row_runs(store: &Store, output: &Version, input_id: i64) -> Result<Vec<RowRun>> {
    let mut out = store.lineage.row_runs(output.id, input_id)?;
    if let Some(runs) = load_runs(store, output.step_id)? {
        let inputs = store.lineage.step_input_versions(output.step_id)?;
        for (position, set) in runs {
            if inputs
                .get(position as usize)
                .is_some_and(|(_, v)| v.id == input_id)
            {
                out.extend(set);
            }
        }
    }
    out.sort_by_key(|r| r.out_start);
    Ok(out)
}

/// The input row of `input_id` that output row `row` of `output` came from, or `None` when
/// it came from no row of that input. What a trail asks at each step: it reads the step's
/// block table and one block of runs (format 2), not the whole row map.
pub fn input_row(store: &Store, output: &Version, input_id: i64, row: u64) -> Result<Option<u64>> {
    let mut legacy = store.lineage.row_runs(output.id, input_id)?;
    if !legacy.is_empty() {
        legacy.sort_by_key(|r| r.out_start);
        if let Some(i) = crate::model::input_of(&legacy, row) {
            return Ok(Some(i));
        }
    }
    let Some((hex, hash)) = object_of(store, output.step_id)? else {
        return Ok(None);
    };
    let inputs = store.lineage.step_input_versions(output.step_id)?;
    let wanted = |position: u32| {
        inputs
            .get(position as usize)
            .is_some_and(|(_, v)| v.id == input_id)
    };
    let size = store.objects.size(&hash)?;
    find_input_row(
        &mut |offset, len| store.objects.read_range(&hash, offset, len),
        size,
        &hex,
        &wanted,
        row,
    )
}

/// The run sets of a step's provenance object, read from its first bytes only.
fn load_runs(store: &Store, step_id: i64) -> Result<Option<RunSets>> {
    let Some((hex, hash)) = object_of(store, step_id)? else {
        return Ok(None);
    };
    let head = store.objects.read_range(&hash, 0, HEADER_LEN)?;
    // A damaged length must not ask for more memory than the object has.
    let size = store.objects.size(&hash)?;
    let len = runs_len(&head).unwrap_or(0).min(size) as usize;
    let prefix = store
        .objects
        .read_range(&hash, 0, HEADER_LEN.saturating_add(len))?;
    decode_runs(&prefix, &hex).map(Some)
}

/// Every input row the step dropped from input `input_id`, in order, with its reason.
pub fn drops(store: &Store, step_id: i64, input_id: i64) -> Result<Vec<Drop>> {
    let mut out = store.lineage.drops(step_id, input_id)?;
    let is_main = store
        .lineage
        .step_input_versions(step_id)?
        .iter()
        .any(|(role, v)| role == "input" && v.id == input_id);
    if is_main {
        if let Some(d) = load(store, step_id)? {
            out.extend(d.drops);
        }
    }
    out.sort_by_key(|d| d.row_idx);
    Ok(out)
}

/// How many cells the step that made `output` changed per column, in the object's column
/// order, without reading any values.
pub fn change_counts(store: &Store, output: &Version) -> Result<Vec<(String, u64)>> {
    let mut counts: Vec<(String, u64)> = Vec::new();
    for c in store.lineage.cell_changes(output.id)? {
        match counts.iter_mut().find(|(n, _)| *n == c.column) {
            Some((_, k)) => *k += 1,
            None => counts.push((c.column, 1)),
        }
    }
    if let Some(d) = load(store, output.step_id)? {
        for (name, rows) in d.changes {
            counts.push((name, rows.len() as u64));
        }
    }
    Ok(counts)
}

/// The rows the step that made `output` changed, per column (name, increasing output rows),
/// without reading any values.
pub fn cell_changes_rows(store: &Store, output: &Version) -> Result<Vec<(String, Vec<u64>)>> {
    let mut out: Vec<(String, Vec<u64>)> = Vec::new();
    for c in store.lineage.cell_changes(output.id)? {
        match out.iter_mut().find(|(n, _)| *n == c.column) {
            Some((_, rows)) => rows.push(c.row_idx),
            None => out.push((c.column, vec![c.row_idx])),
        }
    }
    if let Some(d) = load(store, output.step_id)? {
        out.extend(d.changes);
    }
    Ok(out)
}

/// Every cell the step that made `output` changed, ordered by row then column order, with its
/// old value (the input cell the row map points at) and new value (the output cell).
pub fn cell_changes(store: &Store, output: &Version) -> Result<Vec<CellChange>> {
    let mut out = store.lineage.cell_changes(output.id)?;
    if let Some(d) = load(store, output.step_id)? {
        let input = changed_input(store, output)?;
        let runs = row_runs(store, output, input.id)?;
        out.extend(values_of(store, output, &input, &runs, &d.changes)?);
    }
    let order: HashMap<&str, usize> = output
        .header
        .iter()
        .enumerate()
        .map(|(i, h)| (h.as_str(), i))
        .collect();
    out.sort_by_key(|c| (c.row_idx, order.get(c.column.as_str()).copied()));
    Ok(out)
}

/// The first `limit` cells the step that made `output` changed, in row then column order, with
/// their old and new values: like [`cell_changes`], but reading values for those cells only
/// (the report's sample).
pub fn cell_changes_sample(
    store: &Store,
    output: &Version,
    limit: usize,
) -> Result<Vec<CellChange>> {
    let order: HashMap<&str, usize> = output
        .header
        .iter()
        .enumerate()
        .map(|(i, h)| (h.as_str(), i))
        .collect();
    let mut out = store.lineage.cell_changes(output.id)?;
    out.sort_by_key(|c| (c.row_idx, order.get(c.column.as_str()).copied()));
    out.truncate(limit);
    if let Some(d) = load(store, output.step_id)? {
        // The first `limit` rows of each column hold the first `limit` cells overall.
        let mut first: Vec<(u64, usize, &str)> = d
            .changes
            .iter()
            .flat_map(|(name, rows)| {
                let c = order.get(name.as_str()).copied().unwrap_or(usize::MAX);
                rows.iter().take(limit).map(move |&r| (r, c, name.as_str()))
            })
            .collect();
        first.sort();
        first.truncate(limit);
        let mut picked: Vec<(String, Vec<u64>)> = Vec::new();
        for (r, _, name) in first {
            match picked.iter_mut().find(|(n, _)| n == name) {
                Some((_, rows)) => rows.push(r),
                None => picked.push((name.to_string(), vec![r])),
            }
        }
        if !picked.is_empty() {
            let input = changed_input(store, output)?;
            let runs = row_runs(store, output, input.id)?;
            out.extend(values_of(store, output, &input, &runs, &picked)?);
        }
    }
    out.sort_by_key(|c| (c.row_idx, order.get(c.column.as_str()).copied()));
    out.truncate(limit);
    Ok(out)
}

/// What the step's versions hold at the cells of `output` its legacy `cell_changes` rows (schema
/// 3 and earlier) name: the old value from the input cell the row map points at, the new value
/// from the output cell, in the same order as `Lineage::cell_changes`. `verify` compares the two,
/// so an edited, added or moved row is found.
pub fn legacy_changes_as_versions_hold_them(
    store: &Store,
    output: &Version,
) -> Result<Option<(Vec<CellChange>, Vec<CellChange>)>> {
    let recorded = store.lineage.cell_changes(output.id)?;
    if recorded.is_empty() {
        return Ok(None);
    }
    let Some(input) = store
        .lineage
        .step_input_versions(output.step_id)?
        .into_iter()
        .find(|(role, _)| role == "input")
        .map(|(_, v)| v)
    else {
        return Ok(Some((recorded, Vec::new())));
    };
    let runs = row_runs(store, output, input.id)?;
    let mut by_column: Vec<(String, Vec<u64>)> = Vec::new();
    for c in &recorded {
        match by_column.iter_mut().find(|(n, _)| *n == c.column) {
            Some((_, rows)) => rows.push(c.row_idx),
            None => by_column.push((c.column.clone(), vec![c.row_idx])),
        }
    }
    let mut actual = values_of(store, output, &input, &runs, &by_column)?;
    actual.sort_by(|a, b| (a.row_idx, &a.column).cmp(&(b.row_idx, &b.column)));
    Ok(Some((recorded, actual)))
}

/// The main input of the step that made `output`, which its changed cells' old values come
/// from.
fn changed_input(store: &Store, output: &Version) -> Result<Version> {
    store
        .lineage
        .step_input_versions(output.step_id)?
        .into_iter()
        .find(|(role, _)| role == "input")
        .map(|(_, v)| v)
        .ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent(format!(
                "the step that made {} records cell changes but no input; run `sluice verify`",
                output.label()
            )))
        })
}

/// Reads the old and new values of changed cells from the two versions, each in one pass.
fn values_of(
    store: &Store,
    output: &Version,
    input: &Version,
    runs: &[RowRun],
    changes: &[(String, Vec<u64>)],
) -> Result<Vec<CellChange>> {
    let col = |v: &Version, name: &str| v.header.iter().position(|h| h == name);
    // (output row, input row, column name, output column, input column)
    type Wanted<'a> = (u64, Option<u64>, &'a str, Option<usize>, Option<usize>);
    let mut wanted: Vec<Wanted<'_>> = Vec::new();
    for (name, rows) in changes {
        let (oc, ic) = (col(output, name), col(input, name));
        for &r in rows {
            wanted.push((r, crate::model::input_of(runs, r), name, oc, ic));
        }
    }
    let mut new_values: HashMap<(u64, usize), String> = HashMap::new();
    let mut need_out: HashMap<u64, Vec<usize>> = HashMap::new();
    for w in &wanted {
        if let Some(oc) = w.3 {
            need_out.entry(w.0).or_default().push(oc);
        }
    }
    store.objects.each_row(output, |row, rec| {
        if let Some(cols) = need_out.get(&row) {
            for &c in cols {
                new_values.insert((row, c), String::from_utf8_lossy(rec.field(c)).into_owned());
            }
        }
        Ok(())
    })?;
    let mut old_values: HashMap<(u64, usize), String> = HashMap::new();
    let mut need_in: HashMap<u64, Vec<usize>> = HashMap::new();
    for w in &wanted {
        if let (Some(ir), Some(ic)) = (w.1, w.4) {
            need_in.entry(ir).or_default().push(ic);
        }
    }
    store.objects.each_row(input, |row, rec| {
        if let Some(cols) = need_in.get(&row) {
            for &c in cols {
                old_values.insert((row, c), String::from_utf8_lossy(rec.field(c)).into_owned());
            }
        }
        Ok(())
    })?;
    Ok(wanted
        .into_iter()
        .map(|(r, ir, name, oc, ic)| CellChange {
            row_idx: r,
            column: name.to_string(),
            old: ir.zip(ic).and_then(|k| old_values.get(&k).cloned()),
            new: oc.and_then(|c| new_values.get(&(r, c)).cloned()),
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encode_then_decode_gives_the_log_back() {
        let header: Vec<String> = ["id", "name", "email"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let mut c = ChangeLog::new(3);
        for r in [0u64, 5, 6, 300, 70_000] {
            c.push(1, r);
        }
        c.push(2, 9);
        let mut d = DropLog::default();
        d.push(3, "(the whole row)", Some(0));
        d.push(4, "matched the drop predicate: status = 'test'", None);
        d.push(200_000, "(the whole row)", Some(2));
        let runs = [
            RowRun {
                out_start: 0,
                in_start: 0,
                len: 3,
            },
            RowRun {
                out_start: 3,
                in_start: 5,
                len: 2,
            },
            RowRun {
                out_start: 9,
                in_start: 1,
                len: 1,
            },
        ];
        let bytes = encode(&header, &c, &d, &[(0, &runs[..]), (1, &runs[1..2])]);
        let back = decode(&bytes, "test").unwrap();
        assert_eq!(
            back.runs,
            vec![(0, runs.to_vec()), (1, runs[1..2].to_vec())]
        );
        assert_eq!(
            back.changes,
            vec![
                ("name".to_string(), vec![0, 5, 6, 300, 70_000]),
                ("email".to_string(), vec![9])
            ]
        );
        assert_eq!(back.drops, d.drops());
        // Duplicates share one stored reason and read back with the row they duplicate.
        assert_eq!(
            back.drops[0].reason,
            "duplicate of data row 1 (the whole row)"
        );
        assert_eq!(
            back.drops[2].reason,
            "duplicate of data row 3 (the whole row)"
        );
        // Cost follows change: a few bytes per changed cell, drop and run, besides the texts
        // (column names and the two reasons, kept once each), and 17 bytes per run set for
        // its block size and one entry of its block table.
        let texts: usize = ["name", "email"].iter().map(|t| t.len()).sum::<usize>()
            + "(the whole row)".len()
            + "matched the drop predicate: status = 'test'".len();
        assert!(bytes.len() - texts < 70 + 2 * 17, "{} bytes", bytes.len());
        // The run sets can be read from the first bytes alone.
        let head = 16 + u64::from_le_bytes(bytes[8..16].try_into().unwrap()) as usize;
        assert_eq!(decode_runs(&bytes[..head], "test").unwrap(), back.runs);
    }

    #[test]
    fn damaged_objects_are_refused_not_misread() {
        let header = vec!["a".to_string()];
        let mut c = ChangeLog::new(1);
        c.push(0, 1);
        c.push(0, 2);
        let bytes = encode(&header, &c, &DropLog::default(), &[]);
        for cut in 0..bytes.len() {
            assert!(decode(&bytes[..cut], "t").is_err(), "cut at {cut}");
        }
        let mut longer = bytes.clone();
        longer.push(0);
        assert!(decode(&longer, "t").is_err());
        let mut huge = bytes[..8].to_vec();
        huge.extend_from_slice(&[0xff, 0xff, 0xff, 0xff, 0x0f]);
        assert!(decode(&huge, "t").is_err());
    }

    /// The run sets as format 1 wrote them (one sequence per set, no block table), to check
    /// that objects written before format 2 are still read.
    fn sequential(runs: &[(u32, &[RowRun])]) -> Vec<u8> {
        let mut run_bytes = Vec::new();
        put_varint(&mut run_bytes, runs.len() as u64);
        for (position, set) in runs {
            put_varint(&mut run_bytes, u64::from(*position));
            put_varint(&mut run_bytes, set.len() as u64);
            put_runs(&mut run_bytes, set);
        }
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&FORMAT_SEQUENTIAL.to_le_bytes());
        out.extend_from_slice(&(run_bytes.len() as u64).to_le_bytes());
        out.extend_from_slice(&run_bytes);
        // No changed columns, no reasons, no drops.
        out.extend_from_slice(&[0, 0, 0]);
        out
    }

    /// Runs as a filter makes them: every row kept but those `drop` says, from `n` input rows.
    fn filter_runs(n: u64, drop: impl Fn(u64) -> bool) -> Vec<RowRun> {
        let mut map = crate::model::RowMap::default();
        let mut out = 0;
        for i in 0..n {
            if !drop(i) {
                map.push(out, i);
                out += 1;
            }
        }
        map.into_runs()
    }

    fn find(bytes: &[u8], wanted: &dyn Fn(u32) -> bool, row: u64) -> Result<Option<u64>> {
        find_input_row(
            &mut |offset, len| {
                let start = (offset as usize).min(bytes.len());
                let end = start.saturating_add(len).min(bytes.len());
                Ok(bytes[start..end].to_vec())
            },
            bytes.len() as u64,
            "test",
            wanted,
            row,
        )
    }

    #[test]
    fn one_row_is_found_by_its_block_in_both_formats() {
        // Two sets (an append: the first input's rows, then the second's), many blocks each;
        // every output row, and rows past the end, looked up by block against the whole map.
        let first = filter_runs(2_000, |i| i % 3 == 1 || i % 7 == 0);
        let shift = first.last().map(|r| r.out_start + r.len).unwrap_or(0);
        let second: Vec<RowRun> = filter_runs(900, |i| i % 2 == 0)
            .into_iter()
            .map(|r| RowRun {
                out_start: r.out_start + shift,
                ..r
            })
            .collect();
        assert!(first.len() > 3 * RUNS_PER_BLOCK && second.len() > 3 * RUNS_PER_BLOCK);
        let sets: [(u32, &[RowRun]); 2] = [(0, &first), (1, &second)];
        let blocked = encode(&[], &ChangeLog::new(0), &DropLog::default(), &sets);
        let old = sequential(&sets);
        assert_eq!(
            decode(&blocked, "t").unwrap().runs,
            decode(&old, "t").unwrap().runs
        );
        let end = second.last().map(|r| r.out_start + r.len).unwrap_or(0);
        for bytes in [&blocked, &old] {
            for row in 0..end + 5 {
                for position in 0..2u32 {
                    let set = if position == 0 { &first } else { &second };
                    let expected = crate::model::input_of(set, row);
                    assert_eq!(
                        find(bytes, &|p| p == position, row).unwrap(),
                        expected,
                        "row {row} of input {position}"
                    );
                }
            }
        }
        // A trail reads a few KiB, not the map: the table and one block.
        let mut read = 0usize;
        find_input_row(
            &mut |offset, len| {
                read += len;
                let start = offset as usize;
                Ok(blocked[start..(start + len).min(blocked.len())].to_vec())
            },
            blocked.len() as u64,
            "t",
            &|p| p == 1,
            end - 1,
        )
        .unwrap();
        let table_bytes = (first.len().div_ceil(RUNS_PER_BLOCK)
            + second.len().div_ceil(RUNS_PER_BLOCK))
            * BLOCK_ENTRY;
        assert!(
            read < table_bytes + 2 * 12 * RUNS_PER_BLOCK,
            "{read} of {} bytes read",
            blocked.len()
        );
    }

    #[test]
    fn errors_name_the_byte_of_the_object_not_of_the_part_read() {
        let runs = filter_runs(1_000, |i| i % 2 == 0 || i % 5 == 0);
        let mut bytes = encode(
            &[],
            &ChangeLog::new(0),
            &DropLog::default(),
            &[(0, &runs[..])],
        );
        let runs_end = 16 + u64::from_le_bytes(bytes[8..16].try_into().unwrap()) as usize;
        // The last run's length, the last byte of the run sets, made 0.
        assert!(bytes[runs_end - 1] < 0x80);
        bytes[runs_end - 1] = 0;
        let last_row = runs.last().map(|r| r.out_start).unwrap();
        let whole = decode(&bytes, "t").unwrap_err().to_string();
        let one = find(&bytes, &|_| true, last_row).unwrap_err().to_string();
        let named = format!("at byte {runs_end} (a run of no rows)");
        assert!(whole.contains(&named), "{whole}");
        assert!(one.contains(&named), "{one}");
    }

    proptest::proptest! {
        /// The law of format 2: for any row map (runs of any lengths, input starts that jump
        /// back and forth, as a sort or dedupe makes them) and any row, the one-row reader
        /// gives what the whole map gives, and the whole decode gives the map back; in both
        /// formats.
        #[test]
        fn one_row_reads_agree_with_the_whole_map(
            runs in proptest::collection::vec((0u64..4, 0u64..5_000, 1u64..6), 0..700),
            rows in proptest::collection::vec(0u64..3_000, 1..40),
        ) {
            let mut set = Vec::with_capacity(runs.len());
            let mut out = 0u64;
            for (gap, in_start, len) in runs {
                out += gap;
                set.push(RowRun { out_start: out, in_start, len });
                out += len;
            }
            let sets: [(u32, &[RowRun]); 1] = [(3, &set)];
            let blocked = encode(&[], &ChangeLog::new(0), &DropLog::default(), &sets);
            let old = sequential(&sets);
            proptest::prop_assert_eq!(&decode(&blocked, "t").unwrap().runs, &vec![(3, set.clone())]);
            proptest::prop_assert_eq!(&decode(&old, "t").unwrap().runs, &vec![(3, set.clone())]);
            for row in rows {
                let expected = crate::model::input_of(&set, row);
                proptest::prop_assert_eq!(find(&blocked, &|p| p == 3, row).unwrap(), expected);
                proptest::prop_assert_eq!(find(&old, &|p| p == 3, row).unwrap(), expected);
                proptest::prop_assert_eq!(find(&blocked, &|p| p == 0, row).unwrap(), None);
            }
        }
    }

    #[test]
    fn damaged_blocks_are_refused_or_misread_without_a_panic() {
        let runs = filter_runs(1_000, |i| i % 2 == 0 || i % 5 == 0);
        let bytes = encode(
            &[],
            &ChangeLog::new(0),
            &DropLog::default(),
            &[(0, &runs[..])],
        );
        let runs_end = 16 + u64::from_le_bytes(bytes[8..16].try_into().unwrap()) as usize;
        for cut in 0..bytes.len() {
            assert!(decode(&bytes[..cut], "t").is_err(), "cut at {cut}");
            if cut < runs_end {
                assert!(find(&bytes[..cut], &|_| true, 999).is_err(), "cut at {cut}");
            }
        }
        // Every byte of the run sets flipped: the whole decode refuses or reads a map still
        // in order; the one-row reader never panics.
        for at in 16..runs_end {
            let mut damaged = bytes.clone();
            damaged[at] ^= 0x5a;
            if let Ok(d) = decode(&damaged, "t") {
                for (_, set) in d.runs {
                    assert!(set
                        .windows(2)
                        .all(|w| w[0].out_start + w[0].len <= w[1].out_start));
                }
            }
            for row in [0, 100, 300, 10_000] {
                let _ = find(&damaged, &|_| true, row);
            }
        }
    }

    #[test]
    fn the_row_map_finds_input_rows() {
        let runs = [
            RowRun {
                out_start: 0,
                in_start: 0,
                len: 3,
            },
            RowRun {
                out_start: 3,
                in_start: 5,
                len: 2,
            },
        ];
        assert_eq!(crate::model::input_of(&runs, 0), Some(0));
        assert_eq!(crate::model::input_of(&runs, 2), Some(2));
        assert_eq!(crate::model::input_of(&runs, 3), Some(5));
        assert_eq!(crate::model::input_of(&runs, 4), Some(6));
        assert_eq!(crate::model::input_of(&runs, 5), None);
    }
}
