//! The diff by key. Per side, one pass keeps (key hash, row number) and a fingerprint per row;
//! the pairs are spread over parts by the top bits of their hash as they are pushed, each part
//! is sorted on its own (in the cache), and the parts of both sides are walked together. When
//! the headers are equal and the version is UTF-8, each row is cut out by the offset of its row
//! index (read once, for both passes) with only the fields up to the key split off (see
//! `scan::scan_keys`), and its fingerprint is a hash of its bytes when both sides share a
//! delimiter (the row index's own when both indexes hold them, or when the delimiters differ);
//! otherwise every row is parsed. A pair of rows with equal fingerprints is unchanged without
//! reading its values again; the others, and the removed and added rows, are read in a second
//! pass, where the keys of each pair are also confirmed on their values. When rows are cut out
//! by offset and both versions together are at most [`super::read::KEEP_BYTES`], the first pass keeps the
//! bytes of the rows the second may need (checked against each version's hash; the two sides
//! meet by fingerprint as they read, [`super::meet`]) and the second cuts its rows out of
//! them: each object is then decoded and hashed once, not twice.
//!
//! Keys are hashed with XXH3-64. Two rows of one side with the same hash are read again:
//! different key values are a collision, after which the pass is repeated with another seed;
//! equal ones are a duplicate key. Rows that share a key (raw data with exact duplicate rows,
//! a column that is not unique) are paired within their group: through the recorded lineage
//! when the versions are related, else in row order; the diff reports how many groups and rows
//! there are and the first few ([`DuplicateKeys`]). A pair across the sides whose key values
//! turn out to differ is reported as a removed and an added row.

use super::lineage::Link;
use super::listed::{compare_pairs, Listing};
use super::meet::{Ends, Meet, COPY_SHARE};
use super::read::{both, cuttable, each_row, free_aside, offsets, Cut};
use super::scan::{scan, scan_keys, Keep, KeyParts, Prints, Scan, ScanPlan};
use super::{
    pairs_that_differ, push_pair, Diff, DuplicateGroup, DuplicateKeys, Layout, MatchedBy,
    RowPairing,
};
use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;

/// How many seeds are tried before the keys are declared impossible to tell apart by hash
/// (each further try is needed with probability about n²/2⁶⁵).
const SEEDS: u64 = 4;

/// Key hashes with their key values as text, sorted by hash.
type KeyTexts = Vec<(u64, Vec<String>)>;

/// How many groups of rows sharing a key, and how many rows of each, a diff lists.
const GROUPS_SHOWN: usize = 5;
const ROWS_SHOWN: usize = 5;

#[allow(clippy::too_many_arguments)]
pub(super) fn run(
    store: &Store,
    a: &Version,
    b: &Version,
    layout: Layout,
    key: Vec<String>,
    ka: Vec<usize>,
    kb: Vec<usize>,
    link: Option<&Link>,
    (list, keep_bytes): (Listing, u64),
) -> Result<Diff> {
    let objects = &store.objects;
    let (cand_a, cand_b) = layout.candidates();
    let (fp_a, fp_b) = layout.fp_cols();
    // Whole rows fingerprinted and no rename candidates: rows are cut out by the offsets of
    // the row index, read once here for both passes.
    let index = |fp: &Option<Vec<usize>>, cand: &[usize], v: &Version| -> Result<Option<Index>> {
        if fp.is_some() || !cand.is_empty() || !cuttable(v) {
            return Ok(None);
        }
        let (stored, offsets) = offsets(objects, v)?;
        Ok(Some(Index {
            stored,
            cut: Cut::offsets(offsets),
        }))
    };
    let (mut ia, mut ib) = both(|| index(&fp_a, &cand_a, a), || index(&fp_b, &cand_b, b))?;
    let keep = ia.is_some() && ib.is_some() && a.n_bytes.saturating_add(b.n_bytes) <= keep_bytes;
    // The rows' own bytes are hashed as fingerprints when both sides are cut out in one
    // dialect, unless both indexes hold fingerprints already.
    let by_bytes = match (&ia, &ib) {
        (Some(x), Some(y)) => {
            !(x.stored.is_some() && y.stored.is_some())
                && a.dialect.delimiter_byte() == b.dialect.delimiter_byte()
        }
        _ => false,
    };
    let key_bits = KeyParts::bits_for(a.n_rows.max(b.n_rows));
    let budget = usize::try_from(keep_bytes / COPY_SHARE).unwrap_or(usize::MAX);
    let mut seed = 0u64;
    let (mut sa, mut sb, dup_texts) = loop {
        // A pass repeated with another seed reads every row again: bytes kept in part cannot
        // serve it, so it reads the object and meets the other side afresh.
        for ix in [&mut ia, &mut ib].into_iter().flatten() {
            if ix.cut.kept.as_ref().is_some_and(|k| !k.is_whole()) {
                ix.cut.kept = None;
            }
        }
        let meet = Meet::new(a.n_rows, b.n_rows, budget);
        let plan = |k: &'_ [usize],
                    fp: Option<&'_ [usize]>,
                    cand: &'_ [usize],
                    v: &Version,
                    index: &Option<Index>,
                    side: usize| {
            // However this side's pass ends, the other no longer waits for it.
            let _ends = Ends(&meet, side);
            let plan = ScanPlan {
                key: Some(k),
                fp_cols: fp,
                cand_cols: cand,
                seed,
                key_bits,
                null_tokens: &v.null_tokens,
            };
            let mut s = match index {
                Some(ix) => {
                    let prints = match &ix.stored {
                        _ if by_bytes => Prints::Bytes,
                        Some(fps) => Prints::Stored(fps),
                        None => Prints::Cells,
                    };
                    let how = (k, seed, v.null_tokens.as_slice(), key_bits);
                    let keep = if keep {
                        Keep::Met(&meet, side)
                    } else {
                        Keep::No
                    };
                    scan_keys(objects, v, &ix.cut, prints, how, keep)?
                }
                None => scan(objects, v, &plan)?,
            };
            s.keys.sort();
            Ok(s)
        };
        let (mut sa, mut sb) = both(
            || plan(&ka, fp_a.as_deref(), &cand_a, a, &ia, 0),
            || plan(&kb, fp_b.as_deref(), &cand_b, b, &ib, 1),
        )?;
        for (ix, s) in [(&mut ia, &mut sa), (&mut ib, &mut sb)] {
            if let (Some(ix), Some(k)) = (ix, s.kept.take()) {
                ix.cut.kept = Some(k);
            }
        }
        blank_keys(a, &key, &sa)?;
        blank_keys(b, &key, &sb)?;
        let dup_a = duplicate_keys(store, a, &ka, &sa)?;
        let dup_b = duplicate_keys(store, b, &kb, &sb)?;
        if let (Some(mut da), Some(db)) = (dup_a, dup_b) {
            da.extend(db);
            da.sort();
            da.dedup_by_key(|d| d.0);
            break (sa, sb, da);
        }
        seed += 1;
        if seed == SEEDS {
            return Err(ErrorKind::Data(format!(
                "the keys of {} and {} could not be told apart by hash after {SEEDS} tries; \
                 compare them by order (without a key) instead",
                a.label(),
                b.label()
            ))
            .into());
        }
    };

    // The merge walk: (row in A, row in B) for equal key hashes; rows sharing a key are paired
    // within their group. The two halves of the parts are walked at once and put together in
    // order, which is the order one walk of all of them gives.
    let Walked {
        pairs,
        mut removed,
        mut added,
        dups,
    } = walk_halves(sa.keys.parts(), sb.keys.parts(), link, &dup_texts)?;
    removed.sort_unstable();
    added.sort_unstable();
    drop(dup_texts);
    drop(std::mem::take(&mut sa.keys));
    drop(std::mem::take(&mut sb.keys));
    let Scan {
        fps: fps_a,
        cand: hash_a,
        ..
    } = sa;
    let Scan {
        fps: fps_b,
        cand: hash_b,
        ..
    } = sb;

    let super::Settled {
        compared,
        columns,
        to_compare,
    } = pairs_that_differ(
        (a, b),
        &layout,
        (&cand_a, &cand_b),
        (&hash_a, &hash_b),
        (&fps_a, &fps_b),
        &pairs,
    );
    drop(fps_a);
    drop(fps_b);

    // The second pass: the rows to look at again (keys confirmed on their values).
    let done = compare_pairs(
        objects,
        a,
        b,
        &compared,
        Some((&ka, &kb)),
        to_compare,
        &mut removed,
        &mut added,
        list,
        (ia.as_ref().map(|i| &i.cut), ib.as_ref().map(|i| &i.cut)),
    )?;
    // Nothing reads the versions again.
    free_aside((ia, ib));
    let changed_b = &done.changed_b;

    // The row map in the second version's order.
    // Each row of B's partner in A (`u64::MAX`: none), placed by row rather than sorted.
    let mut a_of_b: Vec<u64> = vec![u64::MAX; b.n_rows as usize];
    for &(x, y) in &pairs {
        match a_of_b.get_mut(y as usize) {
            Some(slot) => *slot = x,
            None => return Err(lost_row(a, b)),
        }
    }
    drop(pairs);
    let mut runs = Vec::new();
    let mut c = 0usize;
    let mut split = added.iter().peekable();
    for (y, &x) in a_of_b.iter().enumerate() {
        if x == u64::MAX {
            continue;
        }
        let y = y as u64;
        while split.next_if(|&&s| s < y).is_some() {}
        if split.next_if_eq(&&y).is_some() {
            // A pair split because its keys differed.
            continue;
        }
        let changed = changed_b.get(c) == Some(&y);
        if changed {
            c += 1;
        }
        push_pair(&mut runs, x, y, changed);
    }

    Ok(Diff {
        from: a.clone(),
        to: b.clone(),
        matched_by: MatchedBy::Key(key),
        columns,
        compared,
        pairing: RowPairing {
            runs,
            removed,
            added,
            cells: done.cells,
        },
        alignment: None,
        changes: done.changes,
        n_changes: done.n_changes,
        n_cells: done.n_cells,
        changed_by_column: done.changed_by_column,
        from_rows: done.from_rows,
        to_rows: done.to_rows,
        key_idx: (ka, kb),
        duplicates: (dups.groups > 0).then_some(dups),
    })
}

/// What walking some of the parts of both sides together found.
struct Walked {
    pairs: Vec<(u64, u64)>,
    removed: Vec<u64>,
    added: Vec<u64>,
    dups: DuplicateKeys,
}

/// The merge walk over matching parts of the two sides (the same part numbers): (row in A,
/// row in B) for equal key hashes, rows sharing a key paired within their group (through
/// `link` when the versions are related, else in row order), and the rows of either side
/// alone.
fn walk(
    parts_a: &[Vec<(u64, u64)>],
    parts_b: &[Vec<(u64, u64)>],
    link: Option<&Link>,
    dup_texts: &KeyTexts,
) -> Walked {
    let n: usize = parts_b.iter().map(Vec::len).sum();
    let mut pairs: Vec<(u64, u64)> = Vec::with_capacity(n);
    let mut removed: Vec<u64> = Vec::new();
    let mut added: Vec<u64> = Vec::new();
    let mut dups = DuplicateKeys {
        paired_by: if link.is_some() { "lineage" } else { "order" },
        groups: 0,
        rows_from: 0,
        rows_to: 0,
        first: Vec::new(),
    };
    for (part_a, part_b) in parts_a.iter().zip(parts_b) {
        let (mut i, mut j) = (0usize, 0usize);
        while i < part_a.len() || j < part_b.len() {
            let h = match (part_a.get(i), part_b.get(j)) {
                (Some(x), Some(y)) => x.0.min(y.0),
                (Some(x), None) => x.0,
                (None, Some(y)) => y.0,
                (None, None) => break,
            };
            let i2 = i + part_a[i..].iter().take_while(|k| k.0 == h).count();
            let j2 = j + part_b[j..].iter().take_while(|k| k.0 == h).count();
            let (ga, gb) = (&part_a[i..i2], &part_b[j..j2]);
            i = i2;
            j = j2;
            if ga.len() <= 1 && gb.len() <= 1 {
                match (ga.first(), gb.first()) {
                    (Some(x), Some(y)) => pairs.push((x.1, y.1)),
                    (Some(x), None) => removed.push(x.1),
                    (None, Some(y)) => added.push(y.1),
                    (None, None) => {}
                }
                continue;
            }
            let ga: Vec<u64> = ga.iter().map(|k| k.1).collect();
            let gb: Vec<u64> = gb.iter().map(|k| k.1).collect();
            dups.groups += 1;
            dups.rows_from += ga.len() as u64;
            dups.rows_to += gb.len() as u64;
            if dups.first.len() < GROUPS_SHOWN {
                let text = dup_texts
                    .binary_search_by_key(&h, |d| d.0)
                    .ok()
                    .map(|k| dup_texts[k].1.clone())
                    .unwrap_or_default();
                dups.first.push(DuplicateGroup {
                    key: text,
                    from_rows: ga.iter().take(ROWS_SHOWN).map(|r| r + 1).collect(),
                    n_from: ga.len() as u64,
                    to_rows: gb.iter().take(ROWS_SHOWN).map(|r| r + 1).collect(),
                    n_to: gb.len() as u64,
                });
            }
            match link {
                Some(l) => {
                    // The same row of the version both come from.
                    let mut taken = vec![false; ga.len()];
                    for &y in &gb {
                        let anc = l.b_rows().get(y as usize).copied().unwrap_or(u64::MAX);
                        let partner = (anc != u64::MAX)
                            .then(|| {
                                ga.iter().enumerate().position(|(k, &x)| {
                                    !taken[k] && l.a_rows().get(x as usize) == Some(&anc)
                                })
                            })
                            .flatten();
                        match partner {
                            Some(k) => {
                                taken[k] = true;
                                pairs.push((ga[k], y));
                            }
                            None => added.push(y),
                        }
                    }
                    removed.extend(ga.iter().zip(&taken).filter(|(_, &t)| !t).map(|(&x, _)| x));
                }
                None => {
                    // In row order: the first with the first, and so on.
                    let n = ga.len().min(gb.len());
                    pairs.extend(ga[..n].iter().copied().zip(gb[..n].iter().copied()));
                    removed.extend_from_slice(&ga[n..]);
                    added.extend_from_slice(&gb[n..]);
                }
            }
        }
    }
    Walked {
        pairs,
        removed,
        added,
        dups,
    }
}

/// [`walk`] of all the parts, done as two walks at once, one of each half of the parts, put
/// together in order: the same pairs, rows and groups in the same order as one walk.
fn walk_halves(
    parts_a: &[Vec<(u64, u64)>],
    parts_b: &[Vec<(u64, u64)>],
    link: Option<&Link>,
    dup_texts: &KeyTexts,
) -> Result<Walked> {
    let half = parts_a.len().min(parts_b.len()) / 2;
    let ((pa1, pa2), (pb1, pb2)) = (parts_a.split_at(half), parts_b.split_at(half));
    let (later, mut earlier) = both(
        || Ok(walk(pa2, pb2, link, dup_texts)),
        || Ok(walk(pa1, pb1, link, dup_texts)),
    )?;
    earlier.pairs.extend(later.pairs);
    earlier.removed.extend(later.removed);
    earlier.added.extend(later.added);
    let dups = &mut earlier.dups;
    dups.groups += later.dups.groups;
    dups.rows_from += later.dups.rows_from;
    dups.rows_to += later.dups.rows_to;
    let room = GROUPS_SHOWN.saturating_sub(dups.first.len());
    dups.first.extend(later.dups.first.into_iter().take(room));
    Ok(earlier)
}

/// A side's row index, read once for both passes: its row offsets and, for an index of format
/// 1, its fingerprints.
struct Index {
    stored: Option<Vec<u64>>,
    cut: Cut,
}

fn lost_row(a: &Version, b: &Version) -> Error {
    ErrorKind::Inconsistent(format!(
        "{} or {} has fewer rows than the store records; run `sluice verify`",
        a.label(),
        b.label()
    ))
    .into()
}

fn blank_keys(v: &Version, key: &[String], s: &Scan) -> Result<()> {
    if s.n_blank == 0 {
        return Ok(());
    }
    let rows: Vec<String> = s.blank.iter().map(|r| (r + 1).to_string()).collect();
    let more = s.n_blank.saturating_sub(s.blank.len() as u64);
    Err(Error::usage(format!(
        "{}: blank key {} in {} data row{} ({}{}); a diff by key needs a value in every row: \
         pass --key with other columns",
        v.label(),
        key.join(", "),
        s.n_blank,
        if s.n_blank == 1 { "" } else { "s" },
        rows.join(", "),
        if more > 0 {
            format!(" and {more} more")
        } else {
            String::new()
        }
    )))
}

/// The key hashes that two or more rows of `v` share with equal key values, with those values
/// (sorted by hash); `None` when two different keys share a hash (a collision: try another
/// seed).
fn duplicate_keys(
    store: &Store,
    v: &Version,
    kcols: &[usize],
    s: &Scan,
) -> Result<Option<KeyTexts>> {
    let mut suspects: Vec<(u64, u64)> = Vec::new();
    for w in s.keys.parts().iter().flat_map(|p| p.windows(2)) {
        if w[0].0 == w[1].0 {
            suspects.push((w[0].1, w[0].0));
            suspects.push((w[1].1, w[1].0));
        }
    }
    if suspects.is_empty() {
        return Ok(Some(Vec::new()));
    }
    suspects.sort_unstable();
    suspects.dedup();
    // Read the suspects' key values: (hash, values), in row order.
    let mut found: Vec<(u64, Vec<Vec<u8>>)> = Vec::with_capacity(suspects.len());
    let mut next = 0usize;
    each_row(&store.objects, v, |row, r| {
        if next < suspects.len() && suspects[next].0 == row {
            found.push((
                suspects[next].1,
                kcols.iter().map(|&c| r.field(c).to_vec()).collect(),
            ));
            next += 1;
        }
        Ok(())
    })?;
    found.sort();
    found.dedup();
    let mut out: Vec<(u64, Vec<String>)> = Vec::new();
    for w in found.windows(2) {
        if w[0].0 == w[1].0 {
            // Two different key values under one hash.
            return Ok(None);
        }
    }
    for (h, values) in found {
        out.push((
            h,
            values
                .iter()
                .map(|f| String::from_utf8_lossy(f).into_owned())
                .collect(),
        ));
    }
    Ok(Some(out))
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn parts_of(pairs: &[(u64, u64)], bits: u32) -> KeyParts {
        let mut k = KeyParts::new(bits, pairs.len());
        for &(h, r) in pairs {
            k.push(h, r);
        }
        k.sort();
        k
    }

    proptest! {
        /// Walking the two halves of the parts at once and putting them together is the walk
        /// of all of them: the same pairs, removed and added rows, and groups of shared keys.
        #[test]
        fn the_halves_walked_at_once_are_the_whole_walk(
            a in proptest::collection::vec((0u64..40, 0u64..1000), 0..300),
            b in proptest::collection::vec((0u64..40, 0u64..1000), 0..300),
            bits in 0u32..4,
        ) {
            // Hashes spread over the whole range, so that every part gets some; few distinct
            // ones, so that keys repeat within and across the sides.
            let spread = |v: &[(u64, u64)]| -> Vec<(u64, u64)> {
                v.iter()
                    .enumerate()
                    .map(|(row, &(h, _))| (h.wrapping_mul(0x9e37_79b9_7f4a_7c15), row as u64))
                    .collect()
            };
            let (ka, kb) = (parts_of(&spread(&a), bits), parts_of(&spread(&b), bits));
            let texts: KeyTexts = Vec::new();
            let whole = walk(ka.parts(), kb.parts(), None, &texts);
            let halves = walk_halves(ka.parts(), kb.parts(), None, &texts).unwrap();
            prop_assert_eq!(&whole.pairs, &halves.pairs);
            prop_assert_eq!(&whole.removed, &halves.removed);
            prop_assert_eq!(&whole.added, &halves.added);
            prop_assert_eq!(format!("{:?}", whole.dups), format!("{:?}", halves.dups));
        }
    }
}
