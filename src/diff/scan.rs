//! The first pass over a version: per row, the hash of its key, the fingerprint of the cells
//! the two versions share, and the hash of each column that might be a renamed one. All of it
//! fixed-size numbers, so this pass keeps a few words per row and no values.

use std::collections::VecDeque;
use std::sync::Arc;

use xxhash_rust::xxh3::{xxh3_64, xxh3_64_with_seed};

use super::meet::{Meet, EVERY};
use super::read::{each_row, plain_fingerprint, Cut, RawRows};
use crate::error::Result;
use crate::model::Version;
use crate::store::objects::Objects;
use crate::table::rowindex::fingerprint;
use crate::table::RawRecord;

/// What to compute for each row of one side.
pub struct ScanPlan<'a> {
    /// Key columns (indices in this side's header); `None`: no key.
    pub key: Option<&'a [usize]>,
    /// The columns the fingerprint covers, in a common order; `None`: the whole row, with the
    /// row index's own fingerprint definition.
    pub fp_cols: Option<&'a [usize]>,
    /// Columns whose per-row cell hashes are kept (rename candidates).
    pub cand_cols: &'a [usize],
    /// The seed of the key hash (changed when two different keys share a hash).
    pub seed: u64,
    /// The key pairs are spread over `2^key_bits` parts ([`KeyParts`]).
    pub key_bits: u32,
    pub null_tokens: &'a [String],
}

/// How many rows with a blank key are listed in an error.
pub const SHOWN: usize = 5;

/// (key hash, row) of every row of one side, spread over parts by the top bits of the hash as
/// they are pushed, so that sorting them is the sort of many small parts, each of which fits
/// in the processor's cache (one sort of the whole vector missed the cache at almost every
/// move). Once sorted, the parts in their order are the pairs in hash order, and both sides of
/// a diff, split alike, hold any one hash in the part of the same number.
#[derive(Debug, Default)]
pub struct KeyParts {
    shift: u32,
    parts: Vec<Vec<(u64, u64)>>,
}

impl KeyParts {
    /// `2^bits` parts (at most 16 bits) for about `n` pairs.
    pub fn new(bits: u32, n: usize) -> KeyParts {
        let bits = bits.min(16);
        let count = 1usize << bits;
        let each = n / count + n / count / 8 + 16;
        KeyParts {
            shift: 64 - bits,
            parts: (0..count).map(|_| Vec::with_capacity(each)).collect(),
        }
    }

    /// How many bits of parts suit a diff whose larger side has `n` rows: about 4,000 pairs
    /// (64 KiB) a part, at most 256 parts.
    pub fn bits_for(n: u64) -> u32 {
        (64 - (n / 4096).leading_zeros()).min(8)
    }

    pub fn push(&mut self, hash: u64, row: u64) {
        // A shift by 64 (one part) would overflow: `checked_shr` gives part 0.
        let p = hash.checked_shr(self.shift).unwrap_or(0) as usize;
        self.parts[p].push((hash, row));
    }

    /// Sorts every part (by hash, then row).
    pub fn sort(&mut self) {
        let fixed = 64 - self.shift;
        for p in &mut self.parts {
            sort_part(p, fixed);
        }
    }

    pub fn parts(&self) -> &[Vec<(u64, u64)>] {
        &self.parts
    }
}

/// Sorts (key hash, row) pairs whose hashes agree in their top `fixed` bits into the order
/// `sort_unstable` gives, in fewer steps: key hashes are spread evenly, so one pass moves each
/// pair into the bucket of the hash's next bits (in place, by swapping, as in a radix sort
/// from the top digit) and each bucket, a handful of pairs on average, is then sorted on its
/// own. Many rows sharing a key make one large bucket, which is sorted as a whole.
fn sort_part(keys: &mut [(u64, u64)], fixed: u32) {
    let n = keys.len();
    if n < 256 {
        keys.sort_unstable();
        return;
    }
    // About 16 pairs a bucket, from the bits below the fixed ones.
    let bits = (usize::BITS - 1 - n.leading_zeros() - 4).clamp(4, 12);
    let shift = 64 - fixed - bits;
    let mask = (1usize << bits) - 1;
    let bucket = |k: &(u64, u64)| (k.0 >> shift) as usize & mask;
    let mut ends = vec![0usize; 1 << bits];
    for k in keys.iter() {
        ends[bucket(k)] += 1;
    }
    let mut heads = Vec::with_capacity(ends.len());
    let mut at = 0usize;
    for e in ends.iter_mut() {
        heads.push(at);
        at += *e;
        *e = at;
    }
    for b in 0..ends.len() {
        while heads[b] < ends[b] {
            let d = bucket(&keys[heads[b]]);
            if d == b {
                heads[b] += 1;
            } else {
                keys.swap(heads[b], heads[d]);
                heads[d] += 1;
            }
        }
    }
    let mut start = 0usize;
    for &end in &ends {
        keys[start..end].sort_unstable();
        start = end;
    }
}

#[derive(Debug, Default)]
pub struct Scan {
    /// (key hash, row), one per row.
    pub keys: KeyParts,
    pub fps: Vec<u64>,
    /// Per candidate column, per row.
    pub cand: Vec<Vec<u64>>,
    /// The first rows whose key is blank, and how many there are.
    pub blank: Vec<u64>,
    pub n_blank: u64,
    /// The version's bytes, when the pass was asked to keep them for the next.
    pub kept: Option<Arc<super::read::Kept>>,
}

/// A length-prefixed concatenation of some cells, hashed: different cell splits never give the
/// same bytes (a single cell is hashed as it is).
pub fn cells_hash(r: &RawRecord<'_>, cols: &[usize], seed: u64, scratch: &mut Vec<u8>) -> u64 {
    hash_fields(|c| r.field(c), cols, seed, scratch)
}

fn hash_fields<'f>(
    field: impl Fn(usize) -> &'f [u8],
    cols: &[usize],
    seed: u64,
    scratch: &mut Vec<u8>,
) -> u64 {
    if let [c] = cols {
        // One cell: nothing to tell apart, so its bytes are hashed as they are.
        return xxh3_64_with_seed(field(*c), seed);
    }
    scratch.clear();
    for &c in cols {
        let v = field(c);
        scratch.extend_from_slice(&(v.len() as u64).to_le_bytes());
        scratch.extend_from_slice(v);
    }
    xxh3_64_with_seed(scratch, seed)
}

/// How the first pass of a diff by key fingerprints the rows of one side.
#[derive(Debug, Clone, Copy)]
pub enum Prints<'p> {
    /// The row index's own fingerprints (an index of format 1 holds them).
    Stored(&'p [u64]),
    /// The row index's definition ([`fingerprint`]), computed from each row's cells.
    Cells,
    /// A hash of each row's bytes as stored, without its line ending: equal for rows written
    /// byte for byte alike, which hold equal values when both sides are read in one dialect.
    /// Rows with equal values written differently (one of them quoted, say) get different
    /// hashes and are compared cell by cell in the second pass, which finds them unchanged;
    /// so this is a cheaper filter, never a different answer. Only the fields up to the last
    /// key column are split.
    Bytes,
}

/// Whether a first pass keeps the bytes it reads for the second.
#[derive(Debug, Clone, Copy)]
pub enum Keep<'m> {
    No,
    /// The bytes of the rows that may have no equal on the other side, met there as side 0 or
    /// 1 ([`Meet`]); the rest of the version when too many rows do not meet in time.
    Met(&'m Meet, usize),
}

/// The first pass when the fingerprints are whole rows (no rename candidates) and rows can be
/// cut out by offset: each row, cut out by `offsets` (the row index's), has the fields up to
/// its last key column split directly off its bytes (parsed only when a quote comes first),
/// its key hashed from the pieces, and its fingerprint taken as `prints` says. The same key
/// hashes as [`scan`], without running the parser over every row. With `keep`, the version's
/// bytes (or those of its rows without an equal on the other side, [`Keep::Met`]) are kept
/// and handed over in [`Scan::kept`] (checked against its hash); rows are cut out of bytes
/// `cut` holds already, if any (a pass repeated with another seed: they must be whole).
pub fn scan_keys(
    objects: &Objects,
    v: &Version,
    cut: &Cut,
    prints: Prints<'_>,
    (key, seed, null_tokens, key_bits): (&[usize], u64, &[String], u32),
    keep: Keep<'_>,
) -> Result<Scan> {
    let n = cut.offsets.len() as u64;
    let mut s = Scan {
        keys: KeyParts::new(key_bits, n as usize),
        fps: match prints {
            Prints::Stored(fps) => fps.to_vec(),
            _ => Vec::with_capacity(n as usize),
        },
        ..Scan::default()
    };
    let last = key.iter().copied().max().unwrap_or(0);
    let mut raw = RawRows::open(objects, v, cut, !matches!(keep, Keep::No))?;
    let mut meeting = match keep {
        Keep::Met(meet, side) if cut.kept.is_none() => Some(Meeting::new(meet, side)),
        _ => None,
    };
    let delimiter = v.dialect.delimiter_byte();
    let mut scratch = Vec::new();
    let mut fp_scratch = Vec::new();
    let mut ends = Vec::new();
    // One row's key: its hash, and whether it is blank.
    fn note<'f>(
        s: &mut Scan,
        row: u64,
        field: impl Fn(usize) -> &'f [u8] + Copy,
        (key, seed, null_tokens): (&[usize], u64, &[String]),
        scratch: &mut Vec<u8>,
    ) {
        let blank = |b: &[u8]| b.is_empty() || null_tokens.iter().any(|t| t.as_bytes() == b);
        if key.iter().any(|&c| blank(field(c))) {
            if s.blank.len() < SHOWN {
                s.blank.push(row);
            }
            s.n_blank += 1;
        }
        s.keys.push(hash_fields(field, key, seed, scratch), row);
    }
    let how = (key, seed, null_tokens);
    for row in 0..n {
        let bytes = match prints {
            Prints::Cells => raw.plain_row(row, &mut ends)?.filter(|_| ends.len() > last),
            Prints::Stored(_) => raw.plain_prefix(row, last, &mut ends)?,
            Prints::Bytes => {
                let rec = trim_line_end(raw.bytes(row)?);
                s.fps.push(xxh3_64(rec));
                split_prefix(rec, last, delimiter, &mut ends).then_some(rec)
            }
        };
        let need_fps = matches!(prints, Prints::Cells);
        if let Some(bytes) = bytes {
            let ends = &ends;
            let field = |c: usize| {
                let start = if c == 0 { 0 } else { ends[c - 1] + 1 };
                &bytes[start..ends[c]]
            };
            note(&mut s, row, field, how, &mut scratch);
            if need_fps {
                s.fps.push(plain_fingerprint(bytes, ends, &mut fp_scratch));
            }
        } else {
            raw.with_record(row, |r| {
                note(&mut s, row, |c| r.field(c), how, &mut scratch);
                if need_fps {
                    s.fps.push(fingerprint(r, &mut fp_scratch));
                }
            })?;
        }
        if let Some(m) = &mut meeting {
            // Every row has its fingerprint by now (pushed above, or stored); a missing one
            // would only cost the meeting a row, which the second pass reads again.
            let fp = s.fps.get(row as usize).copied().unwrap_or_default();
            m.read(fp, row, &mut raw)?;
        }
    }
    if let Some(m) = &mut meeting {
        m.meet(n, &mut raw)?;
    }
    s.kept = raw.done()?;
    Ok(s)
}

/// One side's part in a [`Meet`]: the rows read since it last met the other side, and those
/// waiting for an equal there.
struct Meeting<'m> {
    meet: &'m Meet,
    side: usize,
    batch: Vec<(u64, u64)>,
    waiting: VecDeque<(u64, u64)>,
    /// False once a side spent its [`Meet::budget`]: the rest is kept whole.
    letting_go: bool,
}

impl<'m> Meeting<'m> {
    fn new(meet: &'m Meet, side: usize) -> Self {
        Meeting {
            meet,
            side,
            batch: Vec::with_capacity(EVERY),
            waiting: VecDeque::new(),
            letting_go: true,
        }
    }

    /// Row `row`, with fingerprint `fp`, was read; every [`EVERY`] rows the sides meet.
    fn read(&mut self, fp: u64, row: u64, raw: &mut RawRows) -> Result<()> {
        self.batch.push((fp, row));
        if self.batch.len() == EVERY {
            self.meet(row + 1, raw)?;
        }
        Ok(())
    }

    /// Publishes the rows read before `read`, then decides about the waiting rows the other
    /// side has read past: copies out those still waiting and gives back the frames they lay
    /// in.
    fn meet(&mut self, read: u64, raw: &mut RawRows) -> Result<()> {
        if !self.letting_go || self.meet.given_up() {
            // The rest of the version is kept whole.
            self.letting_go = false;
            self.batch.clear();
            self.waiting.clear();
            return Ok(());
        }
        self.meet
            .publish(self.side, &self.batch, read, &mut self.waiting);
        self.batch.clear();
        let bound = raw.held_from_row(self.meet.covered(self.side).min(read));
        let decided = self.waiting.partition_point(|w| w.1 < bound);
        let copy = self
            .meet
            .still_waiting(self.side, self.waiting.drain(..decided));
        raw.let_go(bound, &copy)?;
        if raw.copied_len() > self.meet.budget() {
            self.letting_go = false;
            self.meet.give_up();
        }
        Ok(())
    }
}

/// A row's bytes without its line ending (and any blank lines after it).
fn trim_line_end(bytes: &[u8]) -> &[u8] {
    let end = bytes
        .iter()
        .rposition(|&c| c != b'\n' && c != b'\r')
        .map_or(0, |i| i + 1);
    &bytes[..end]
}

/// Splits the fields `0..=last` off a record (without its line ending) when none of its bytes
/// up to the end of field `last` is a quote or a line break, so that csv_core would read
/// exactly the pieces between the delimiters: fills `ends` with each field's end. False when
/// the record needs parsing (a quote, or fewer fields).
fn split_prefix(rec: &[u8], last: usize, delimiter: u8, ends: &mut Vec<usize>) -> bool {
    ends.clear();
    if rec.is_empty() {
        return false;
    }
    for (i, &c) in rec.iter().enumerate() {
        if c == delimiter {
            ends.push(i);
            if ends.len() > last {
                return true;
            }
        } else if c == b'"' || c == b'\r' || c == b'\n' {
            return false;
        }
    }
    ends.push(rec.len());
    ends.len() > last
}

/// [`scan`] of both versions at once, without a key: each side's fingerprint columns (`None`:
/// the whole row) and candidate columns to hash.
pub fn scan_both(
    objects: &Objects,
    (a, b): (&Version, &Version),
    (fp_a, fp_b): (Option<&[usize]>, Option<&[usize]>),
    (cand_a, cand_b): (&[usize], &[usize]),
) -> Result<(Scan, Scan)> {
    let plan = |fp: Option<&[usize]>, cand: &[usize], v: &Version| {
        scan(
            objects,
            v,
            &ScanPlan {
                key: None,
                fp_cols: fp,
                cand_cols: cand,
                seed: 0,
                key_bits: 0,
                null_tokens: &v.null_tokens,
            },
        )
    };
    super::read::both(|| plan(fp_a, cand_a, a), || plan(fp_b, cand_b, b))
}

pub fn scan(objects: &Objects, v: &Version, plan: &ScanPlan<'_>) -> Result<Scan> {
    let n = v.n_rows as usize;
    let mut s = Scan {
        keys: if plan.key.is_some() {
            KeyParts::new(plan.key_bits, n)
        } else {
            KeyParts::default()
        },
        fps: Vec::with_capacity(n),
        cand: vec![Vec::with_capacity(n); plan.cand_cols.len()],
        ..Scan::default()
    };
    let mut scratch = Vec::new();
    let blank = |b: &[u8]| b.is_empty() || plan.null_tokens.iter().any(|t| t.as_bytes() == b);
    each_row(objects, v, |row, r| {
        if let Some(k) = plan.key {
            if k.iter().any(|&c| blank(r.field(c))) {
                if s.blank.len() < SHOWN {
                    s.blank.push(row);
                }
                s.n_blank += 1;
            }
            s.keys.push(cells_hash(&r, k, plan.seed, &mut scratch), row);
        }
        s.fps.push(match plan.fp_cols {
            None => fingerprint(&r, &mut scratch),
            Some(cols) => cells_hash(&r, cols, 0, &mut scratch),
        });
        for (i, &c) in plan.cand_cols.iter().enumerate() {
            s.cand[i].push(xxh3_64_with_seed(r.field(c), 0));
        }
        Ok(())
    })?;
    Ok(s)
}
