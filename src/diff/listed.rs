//! The second pass of a comparison whose pairs are known (by key, or through the lineage):
//! each pair whose fingerprints differ is compared cell by cell, then the removed and added
//! rows are read for their values.
//!
//! In full ([`Listing::All`], for lineage inferred from outside work and for replay's summary of
//! a difference) every such row of both sides is read and kept, with every changed cell's old
//! and new text. For a listing ([`Listing::First`], `compare`), when the rows to compare, remove
//! and add fit [`HELD_BYTES`] per side, both sides' rows are read once, on two threads, with
//! their values, compared in memory, and the listing is taken from them. Past that bound memory
//! does not hold values: both sides' rows to compare are read at once, in their orders, and
//! only a hash of each compared cell (and key cell) is kept (8 bytes per cell), so that a
//! changed row costs a few words whatever its values; the hashes are then compared pair by
//! pair, and only the rows of the first `n` listed changes are read again for their values. Two
//! cells with equal 64-bit hashes are taken as equal, as equal row fingerprints already are.

use xxhash_rust::xxh3::xxh3_64_with_seed;

use super::read::{both, each_wanted, rows_at, Cut, RowStore};
use super::{cell_diffs, count_by_column, listing, CellDiff, Change};
use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::store::objects::Objects;

/// How much of a comparison's detail is kept.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Listing {
    /// Every changed cell with its values, every removed and added row.
    All,
    /// Counts of everything, values only for the first `n` changes in listing order.
    First(usize),
}

/// What the second pass found.
pub(super) struct Compared {
    /// The changed cells of the listed changes (all of them with [`Listing::All`]).
    pub cells: Vec<CellDiff>,
    /// Every changed row of the second version, ascending.
    pub changed_b: Vec<u64>,
    pub from_rows: RowStore,
    pub to_rows: RowStore,
    /// The listed changes.
    pub changes: Vec<Change>,
    pub changed_by_column: Vec<(String, u64)>,
    pub n_cells: u64,
    pub n_changes: u64,
}

/// What the first pass left about each side: its row offsets, when the caller read its row
/// index already, and its bytes when they were kept.
pub(super) type Known<'k> = (Option<&'k Cut>, Option<&'k Cut>);

/// The seed of the per-cell hashes (any fixed value; not the key hash's).
const CELL_SEED: u64 = 0x636f_6d70_6172_6564;

/// Compares the cells of the pairs `to_compare` (row in A, row in B; any order) over the
/// `compared` columns. With `keys`, a pair whose key values differ (two keys that share a
/// hash) is split into a removed and an added row. `removed` and `added` are sorted on return.
/// `known`: each side's row offsets when the caller read its row index already (and its bytes
/// when the first pass kept them).
#[allow(clippy::too_many_arguments)]
pub(super) fn compare_pairs(
    objects: &Objects,
    a: &Version,
    b: &Version,
    compared: &[(usize, usize)],
    keys: Option<(&[usize], &[usize])>,
    mut to_compare: Vec<(u64, u64)>,
    removed: &mut Vec<u64>,
    added: &mut Vec<u64>,
    list: Listing,
    known: Known<'_>,
) -> Result<Compared> {
    let lost = || lost(a, b);
    let n = match list {
        Listing::All => {
            return compare_all(
                objects, a, b, compared, keys, to_compare, removed, added, known,
            )
        }
        Listing::First(n) => n,
    };
    let (ka, kb): (&[usize], &[usize]) = keys.unwrap_or((&[], &[]));
    let held = {
        let (want_a, want_b) = wanted_rows(removed, added, &to_compare);
        (fits(a, want_a.len()) && fits(b, want_b.len())).then_some((want_a, want_b))
    };
    if let Some((want_a, want_b)) = held {
        let rows = both(
            || rows_at(objects, a, known.0, &want_a),
            || rows_at(objects, b, known.1, &want_b),
        )?;
        return compare_held(a, b, compared, keys, to_compare, removed, added, n, rows);
    }
    let cols_a: Vec<usize> = compared
        .iter()
        .map(|p| p.0)
        .chain(ka.iter().copied())
        .collect();
    let cols_b: Vec<usize> = compared
        .iter()
        .map(|p| p.1)
        .chain(kb.iter().copied())
        .collect();
    let width = cols_a.len();

    // Each side, on a core of its own: the hash of each compared cell (and key cell) of each
    // row to compare, in its row order.
    let hash_cells =
        |v: &Version, known: Option<&Cut>, want: &[u64], cols: &[usize]| -> Result<Vec<u64>> {
            let mut hashes: Vec<u64> = Vec::with_capacity(want.len() * width);
            each_wanted(objects, v, known, want, |_, r| {
                hashes.extend(
                    cols.iter()
                        .map(|&c| xxh3_64_with_seed(r.field(c), CELL_SEED)),
                );
            })?;
            if hashes.len() != want.len() * width {
                return Err(lost());
            }
            Ok(hashes)
        };
    let mut want_a: Vec<u64> = to_compare.iter().map(|p| p.0).collect();
    want_a.sort_unstable();
    to_compare.sort_unstable_by_key(|p| p.1);
    let want_b: Vec<u64> = to_compare.iter().map(|p| p.1).collect();
    let (hashes_a, hashes_b) = both(
        || hash_cells(a, known.0, &want_a, &cols_a),
        || hash_cells(b, known.1, &want_b, &cols_b),
    )?;

    // The pairs in B's order, each row's hashes against its partner's.
    let mut counts = vec![0u64; compared.len()];
    let mut changed_b: Vec<u64> = Vec::new();
    let mut split: Vec<(u64, u64)> = Vec::new();
    for (at, &(x, y)) in to_compare.iter().enumerate() {
        let Ok(i) = want_a.binary_search(&x) else {
            return Err(lost());
        };
        let ha = &hashes_a[i * width..(i + 1) * width];
        let hb = &hashes_b[at * width..(at + 1) * width];
        if (compared.len()..width).any(|k| ha[k] != hb[k]) {
            split.push((x, y));
            continue;
        }
        let mut any = false;
        for (k, count) in counts.iter_mut().enumerate() {
            if ha[k] != hb[k] {
                *count += 1;
                any = true;
            }
        }
        if any {
            changed_b.push(y);
        }
    }
    drop(hashes_a);
    drop(hashes_b);
    drop(want_a);
    drop(want_b);
    let tally = Tally {
        counts,
        changed_b,
        split,
    };
    finish(
        a,
        b,
        compared,
        &to_compare,
        tally,
        removed,
        added,
        n,
        |want_a, want_b| {
            both(
                || rows_at(objects, a, known.0, want_a),
                || rows_at(objects, b, known.1, want_b),
            )
        },
    )
}

/// What comparing the pairs' cells found.
struct Tally {
    /// Changed cells per compared column.
    counts: Vec<u64>,
    /// The changed rows of B, ascending.
    changed_b: Vec<u64>,
    /// Pairs whose key values turned out to differ.
    split: Vec<(u64, u64)>,
}

/// How many bytes of memory the rows of `v` held by [`compare_held`] may take, per side: up to
/// this the rows to compare are read once, with their values, and the listing comes from them;
/// past it only cell hashes are kept and the listed rows are read again.
const HELD_BYTES: u64 = 16 << 20;

/// Whether `n` rows of `v` held in a [`RowStore`] stay within [`HELD_BYTES`] (estimated from
/// its average row: its bytes, an 8-byte end per field, and the store's 24 bytes per row).
fn fits(v: &Version, n: usize) -> bool {
    let per_row = v.n_bytes / v.n_rows.max(1) + 8 * v.header.len() as u64 + 24;
    (n as u64).saturating_mul(per_row) <= HELD_BYTES
}

/// [`compare_pairs`] when the rows to compare, remove and add were read once with their values
/// (`rows`: both sides' rows, each side read on a core of its own): compared cell by cell, and
/// the listing taken from the same rows.
#[allow(clippy::too_many_arguments)]
fn compare_held(
    a: &Version,
    b: &Version,
    compared: &[(usize, usize)],
    keys: Option<(&[usize], &[usize])>,
    mut to_compare: Vec<(u64, u64)>,
    removed: &mut Vec<u64>,
    added: &mut Vec<u64>,
    n: usize,
    (from_rows, to_rows): (RowStore, RowStore),
) -> Result<Compared> {
    to_compare.sort_unstable_by_key(|p| p.1);
    let mut tally = Tally {
        counts: vec![0u64; compared.len()],
        changed_b: Vec::new(),
        split: Vec::new(),
    };
    for &(x, y) in &to_compare {
        let (Some(ra), Some(rb)) = (from_rows.get(x), to_rows.get(y)) else {
            return Err(lost(a, b));
        };
        if let Some((ka, kb)) = keys {
            if ka.iter().zip(kb).any(|(&i, &j)| ra.field(i) != rb.field(j)) {
                // Different keys that share a hash.
                tally.split.push((x, y));
                continue;
            }
        }
        let mut any = false;
        for (count, &(i, j)) in tally.counts.iter_mut().zip(compared) {
            if ra.field(i) != rb.field(j) {
                *count += 1;
                any = true;
            }
        }
        if any {
            tally.changed_b.push(y);
        }
    }
    finish(
        a,
        b,
        compared,
        &to_compare,
        tally,
        removed,
        added,
        n,
        |_, _| Ok((from_rows, to_rows)),
    )
}

/// The end of [`compare_pairs`]: the split pairs counted as removed and added rows, the first
/// `n` changes chosen in listing order, and their cells taken from the rows `read` gives for
/// the listed rows of A and of B. `to_compare` is sorted by B's row.
#[allow(clippy::too_many_arguments)]
fn finish(
    a: &Version,
    b: &Version,
    compared: &[(usize, usize)],
    to_compare: &[(u64, u64)],
    Tally {
        counts,
        changed_b,
        split,
    }: Tally,
    removed: &mut Vec<u64>,
    added: &mut Vec<u64>,
    n: usize,
    read: impl FnOnce(&[u64], &[u64]) -> Result<(RowStore, RowStore)>,
) -> Result<Compared> {
    let lost = || lost(a, b);
    removed.extend(split.iter().map(|p| p.0));
    added.extend(split.iter().map(|p| p.1));
    removed.sort_unstable();
    added.sort_unstable();
    let n_changes = (changed_b.len() + added.len() + removed.len()) as u64;

    // The first n changes in listing order: changed and added rows in B's order, then removed.
    let (mut ci, mut ai) = (0usize, 0usize);
    while ci + ai < n && (ci < changed_b.len() || ai < added.len()) {
        match (changed_b.get(ci), added.get(ai)) {
            (Some(x), Some(y)) if x < y => ci += 1,
            (Some(_), None) => ci += 1,
            _ => ai += 1,
        }
    }
    let ri = n.saturating_sub(ci + ai).min(removed.len());
    let listed_changed = &changed_b[..ci];
    let listed_added = &added[..ai];
    let listed_removed = &removed[..ri];
    let partner = |y: u64| -> Option<u64> {
        to_compare
            .binary_search_by_key(&y, |p| p.1)
            .ok()
            .map(|i| to_compare[i].0)
    };
    let mut listed_pairs: Vec<(u64, u64)> = Vec::with_capacity(ci);
    for &y in listed_changed {
        listed_pairs.push((partner(y).ok_or_else(lost)?, y));
    }
    let mut want_a: Vec<u64> = listed_pairs.iter().map(|p| p.0).collect();
    want_a.extend_from_slice(listed_removed);
    want_a.sort_unstable();
    want_a.dedup();
    let mut want_b: Vec<u64> = listed_changed.to_vec();
    want_b.extend_from_slice(listed_added);
    want_b.sort_unstable();
    want_b.dedup();
    let (from_rows, to_rows) = read(&want_a, &want_b)?;
    let mut cells = Vec::new();
    for &(x, y) in &listed_pairs {
        let (Some(ra), Some(rb)) = (from_rows.get(x), to_rows.get(y)) else {
            return Err(lost());
        };
        cell_diffs(compared, &b.header, (x, ra), (y, rb), &mut cells);
    }
    let changes = listing(listed_changed, listed_added, listed_removed, &cells);
    let changed_by_column = compared
        .iter()
        .zip(&counts)
        .map(|(&(_, j), &c)| (b.header[j].clone(), c))
        .collect();
    Ok(Compared {
        cells,
        changed_b,
        from_rows,
        to_rows,
        changes,
        changed_by_column,
        n_cells: counts.iter().sum(),
        n_changes,
    })
}

fn lost(a: &Version, b: &Version) -> crate::error::Error {
    ErrorKind::Inconsistent(format!(
        "{} or {} has fewer rows than the store records; run `sluice verify`",
        a.label(),
        b.label()
    ))
    .into()
}

/// Every changed cell with its values, every row of both sides kept.
#[allow(clippy::too_many_arguments)]
fn compare_all(
    objects: &Objects,
    a: &Version,
    b: &Version,
    compared: &[(usize, usize)],
    keys: Option<(&[usize], &[usize])>,
    mut to_compare: Vec<(u64, u64)>,
    removed: &mut Vec<u64>,
    added: &mut Vec<u64>,
    known: Known<'_>,
) -> Result<Compared> {
    let (want_a, want_b) = wanted_rows(removed, added, &to_compare);
    let (from_rows, to_rows) = both(
        || rows_at(objects, a, known.0, &want_a),
        || rows_at(objects, b, known.1, &want_b),
    )?;
    drop(want_a);
    drop(want_b);
    // Compare the cells of each pair, in the second version's row order.
    to_compare.sort_unstable_by_key(|p| p.1);
    let mut cells = Vec::new();
    let mut changed_b: Vec<u64> = Vec::new();
    for &(x, y) in &to_compare {
        let (Some(ra), Some(rb)) = (from_rows.get(x), to_rows.get(y)) else {
            return Err(ErrorKind::Inconsistent(format!(
                "{} or {} has fewer rows than the store records; run `sluice verify`",
                a.label(),
                b.label()
            ))
            .into());
        };
        if let Some((ka, kb)) = keys {
            if ka.iter().zip(kb).any(|(&i, &j)| ra.field(i) != rb.field(j)) {
                // Different keys that share a hash.
                removed.push(x);
                added.push(y);
                continue;
            }
        }
        // No cell differs when only columns outside the comparison did.
        if cell_diffs(compared, &b.header, (x, ra), (y, rb), &mut cells) > 0 {
            changed_b.push(y);
        }
    }
    removed.sort_unstable();
    added.sort_unstable();
    let changes = listing(&changed_b, added, removed, &cells);
    let changed_by_column = count_by_column(compared, b, &cells);
    Ok(Compared {
        n_cells: cells.len() as u64,
        n_changes: changes.len() as u64,
        cells,
        changed_b,
        from_rows,
        to_rows,
        changes,
        changed_by_column,
    })
}

/// The rows each side must read to list a comparison: A's removed rows and the A side of every
/// pair to compare, B's added rows and the B side, each sorted without repeats.
fn wanted_rows(removed: &[u64], added: &[u64], to_compare: &[(u64, u64)]) -> (Vec<u64>, Vec<u64>) {
    let side = |own: &[u64], pick: fn(&(u64, u64)) -> u64| {
        let mut want: Vec<u64> = own.to_vec();
        want.extend(to_compare.iter().map(pick));
        want.sort_unstable();
        want.dedup();
        want
    };
    (side(removed, |p| p.0), side(added, |p| p.1))
}
