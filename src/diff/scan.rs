//! The first pass over a version: per row, the hash of its key, the fingerprint of the cells
//! the two versions share, and the hash of each column that might be a renamed one. All of it
//! fixed-size numbers, so this pass keeps a few words per row and no values.

use xxhash_rust::xxh3::xxh3_64_with_seed;

use super::read::{each_row, offsets, plain_fingerprint, RawRows};
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
    pub null_tokens: &'a [String],
}

/// How many rows with a blank key are listed in an error.
pub const SHOWN: usize = 5;

#[derive(Debug, Default)]
pub struct Scan {
    /// (key hash, row), one per row, in row order until sorted.
    pub keys: Vec<(u64, u64)>,
    pub fps: Vec<u64>,
    /// Per candidate column, per row.
    pub cand: Vec<Vec<u64>>,
    /// The first rows whose key is blank, and how many there are.
    pub blank: Vec<u64>,
    pub n_blank: u64,
}

/// A length-prefixed concatenation of some cells, hashed: different cell splits never give the
/// same bytes.
pub fn cells_hash(r: &RawRecord<'_>, cols: &[usize], seed: u64, scratch: &mut Vec<u8>) -> u64 {
    hash_fields(|c| r.field(c), cols, seed, scratch)
}

fn hash_fields<'f>(
    field: impl Fn(usize) -> &'f [u8],
    cols: &[usize],
    seed: u64,
    scratch: &mut Vec<u8>,
) -> u64 {
    scratch.clear();
    for &c in cols {
        let v = field(c);
        scratch.extend_from_slice(&(v.len() as u64).to_le_bytes());
        scratch.extend_from_slice(v);
    }
    xxh3_64_with_seed(scratch, seed)
}

/// The first pass when the fingerprints are the row index's own definition (whole rows, no
/// rename candidates) and rows can be cut out by offset: each row, cut out by the offsets of
/// the row index, is split directly off its bytes (parsed only when it holds a quote), and its
/// key hashed and fingerprint computed from the pieces; a row index of format 1 gives the
/// fingerprints, and then only the fields up to the last key column are split. The same
/// numbers as [`scan`], without running the parser over every row.
pub fn scan_keys(
    objects: &Objects,
    v: &Version,
    key: &[usize],
    seed: u64,
    null_tokens: &[String],
) -> Result<Scan> {
    let (stored, offsets) = offsets(objects, v)?;
    let n = offsets.len() as u64;
    let need_fps = stored.is_none();
    let mut s = Scan {
        keys: Vec::with_capacity(n as usize),
        fps: stored.unwrap_or_else(|| Vec::with_capacity(n as usize)),
        ..Scan::default()
    };
    let last = key.iter().copied().max().unwrap_or(0);
    let mut raw = RawRows::new(objects, v, offsets)?;
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
        s.keys.push((hash_fields(field, key, seed, scratch), row));
    }
    let how = (key, seed, null_tokens);
    for row in 0..n {
        let bytes = if need_fps {
            raw.plain_row(row, &mut ends)?.filter(|_| ends.len() > last)
        } else {
            raw.plain_prefix(row, last, &mut ends)?
        };
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
    }
    raw.finish()?;
    Ok(s)
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
                null_tokens: &v.null_tokens,
            },
        )
    };
    super::read::both(|| plan(fp_a, cand_a, a), || plan(fp_b, cand_b, b))
}

pub fn scan(objects: &Objects, v: &Version, plan: &ScanPlan<'_>) -> Result<Scan> {
    let n = v.n_rows as usize;
    let mut s = Scan {
        keys: Vec::with_capacity(if plan.key.is_some() { n } else { 0 }),
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
            s.keys
                .push((cells_hash(&r, k, plan.seed, &mut scratch), row));
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
