//! The diff by key. Per side, one pass keeps (key hash, row number) and a fingerprint per row;
//! both vectors are sorted by hash and walked together. When the headers are equal and the
//! version is UTF-8, the fingerprints are the row index's and each row is cut out by its offset
//! with only the fields up to the key split off (see `scan::scan_keys`); otherwise
//! every row is parsed. A pair of rows with equal fingerprints
//! is unchanged without reading its values again; the others, and the removed and added rows,
//! are read in a second pass, where the keys of each pair are also confirmed on their values.
//!
//! Keys are hashed with XXH3-64. Two rows of one side with the same hash are read again: equal
//! key values are a duplicate key (an error), different ones a collision, after which the pass
//! is repeated with another seed. A pair across the sides whose key values turn out to differ
//! is reported as a removed and an added row.

use super::read::{both, cuttable, each_row, rows_of};
use super::scan::{scan, scan_keys, Scan, ScanPlan, SHOWN};
use super::{
    cell_diffs, count_by_column, push_pair, settle_columns, Change, ChangeKind, Diff, Layout,
    MatchedBy, RowPairing,
};
use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;

/// How many seeds are tried before the keys are declared impossible to tell apart by hash
/// (each further try is needed with probability about n²/2⁶⁵).
const SEEDS: u64 = 4;

pub(super) fn run(
    store: &Store,
    a: &Version,
    b: &Version,
    layout: Layout,
    key: Vec<String>,
    ka: Vec<usize>,
    kb: Vec<usize>,
) -> Result<Diff> {
    let objects = &store.objects;
    let (cand_a, cand_b) = layout.candidates();
    let (fp_a, fp_b) = layout.fp_cols();
    let mut seed = 0u64;
    let (sa, sb) = loop {
        let plan = |k: &'_ [usize], fp: Option<&'_ [usize]>, cand: &'_ [usize], v: &Version| {
            let plan = ScanPlan {
                key: Some(k),
                fp_cols: fp,
                cand_cols: cand,
                seed,
                null_tokens: &v.null_tokens,
            };
            let mut s = if fp.is_none() && cand.is_empty() && cuttable(v) {
                scan_keys(objects, v, k, seed, &v.null_tokens)?
            } else {
                scan(objects, v, &plan)?
            };
            s.keys.sort_unstable();
            Ok(s)
        };
        let (sa, sb) = both(
            || plan(&ka, fp_a.as_deref(), &cand_a, a),
            || plan(&kb, fp_b.as_deref(), &cand_b, b),
        )?;
        blank_keys(a, &key, &sa)?;
        blank_keys(b, &key, &sb)?;
        let clean_a = unique_keys(store, a, &key, &ka, &sa)?;
        let clean_b = unique_keys(store, b, &key, &kb, &sb)?;
        if clean_a && clean_b {
            break (sa, sb);
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

    // The merge walk: (row in A, row in B) for equal key hashes.
    let mut pairs: Vec<(u64, u64)> = Vec::new();
    let mut removed: Vec<u64> = Vec::new();
    let mut added: Vec<u64> = Vec::new();
    let (mut i, mut j) = (0usize, 0usize);
    while i < sa.keys.len() || j < sb.keys.len() {
        match (sa.keys.get(i), sb.keys.get(j)) {
            (Some(x), Some(y)) if x.0 == y.0 => {
                pairs.push((x.1, y.1));
                i += 1;
                j += 1;
            }
            (Some(x), Some(y)) if x.0 < y.0 => {
                removed.push(x.1);
                i += 1;
            }
            (Some(x), None) => {
                removed.push(x.1);
                i += 1;
            }
            (_, Some(y)) => {
                added.push(y.1);
                j += 1;
            }
            (None, None) => break,
        }
    }
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

    let (compared, columns) = settle_columns(
        a,
        b,
        &layout,
        (&cand_a, &cand_b),
        (&hash_a, &hash_b),
        &mut |check| pairs.iter().all(|&(x, y)| check(x, y)),
    );
    // Renamed columns are compared too, so a pair is unchanged only when their cells agree.
    let renamed_hashes: Vec<(&Vec<u64>, &Vec<u64>)> = compared
        .iter()
        .filter_map(|&(ci, cj)| {
            let x = cand_a.iter().position(|&c| c == ci)?;
            let y = cand_b.iter().position(|&c| c == cj)?;
            Some((&hash_a[x], &hash_b[y]))
        })
        .collect();
    let differs = |&(x, y): &(u64, u64)| {
        fps_a[x as usize] != fps_b[y as usize]
            || renamed_hashes
                .iter()
                .any(|(ha, hb)| ha[x as usize] != hb[y as usize])
    };
    let mut to_compare: Vec<(u64, u64)> = pairs.iter().copied().filter(differs).collect();
    drop(fps_a);
    drop(fps_b);

    // The second pass: the rows to look at again.
    let mut want_a: Vec<u64> = removed.to_vec();
    want_a.extend(to_compare.iter().map(|p| p.0));
    want_a.sort_unstable();
    let mut want_b: Vec<u64> = added.to_vec();
    want_b.extend(to_compare.iter().map(|p| p.1));
    want_b.sort_unstable();
    let (from_rows, to_rows) = both(
        || rows_of(objects, a, &want_a),
        || rows_of(objects, b, &want_b),
    )?;
    drop(want_a);
    drop(want_b);

    // Compare the cells of each pair, in the second version's row order.
    to_compare.sort_unstable_by_key(|p| p.1);
    let mut cells = Vec::new();
    let mut changed_b: Vec<u64> = Vec::new();
    for &(x, y) in &to_compare {
        let (Some(ra), Some(rb)) = (from_rows.get(x), to_rows.get(y)) else {
            return Err(lost_row(a, b));
        };
        if ka
            .iter()
            .zip(&kb)
            .any(|(&i, &j)| ra.field(i) != rb.field(j))
        {
            // Different keys that share a hash.
            removed.push(x);
            added.push(y);
            continue;
        }
        // No cell differs when only columns outside the comparison did.
        if cell_diffs(&compared, &b.header, (x, ra), (y, rb), &mut cells) > 0 {
            changed_b.push(y);
        }
    }
    removed.sort_unstable();
    added.sort_unstable();

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
    for (y, &x) in a_of_b.iter().enumerate() {
        if x == u64::MAX {
            continue;
        }
        let y = y as u64;
        if added.binary_search(&y).is_ok() {
            // A pair split because its keys differed.
            continue;
        }
        let changed = changed_b.get(c) == Some(&y);
        if changed {
            c += 1;
        }
        push_pair(&mut runs, x, y, changed);
    }

    // The listing: changed and added rows in the second version's order, then removed rows.
    let mut changes = Vec::with_capacity(changed_b.len() + added.len() + removed.len());
    let (mut ci, mut ai, mut cell) = (0usize, 0usize, 0usize);
    while ci < changed_b.len() || ai < added.len() {
        let take_changed = match (changed_b.get(ci), added.get(ai)) {
            (Some(x), Some(y)) => x < y,
            (Some(_), None) => true,
            _ => false,
        };
        if take_changed {
            let y = changed_b[ci];
            let start = cell;
            while cell < cells.len() && cells[cell].b_row == y {
                cell += 1;
            }
            changes.push(Change {
                kind: ChangeKind::Changed,
                a_row: cells.get(start).map(|c| c.a_row),
                b_row: Some(y),
                cells: start..cell,
            });
            ci += 1;
        } else {
            changes.push(Change {
                kind: ChangeKind::Added,
                a_row: None,
                b_row: Some(added[ai]),
                cells: cell..cell,
            });
            ai += 1;
        }
    }
    changes.extend(removed.iter().map(|&x| Change {
        kind: ChangeKind::Removed,
        a_row: Some(x),
        b_row: None,
        cells: 0..0,
    }));
    let changed_by_column = count_by_column(&compared, b, &cells);
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
            cells,
        },
        alignment: None,
        changes,
        changed_by_column,
        from_rows,
        to_rows,
        key_idx: (ka, kb),
    })
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

/// `Ok(true)` when no two rows share a key hash; an error listing them when two rows share key
/// values; `Ok(false)` when only hashes collide.
fn unique_keys(
    store: &Store,
    v: &Version,
    key: &[String],
    kcols: &[usize],
    s: &Scan,
) -> Result<bool> {
    let mut suspects: Vec<u64> = Vec::new();
    for w in s.keys.windows(2) {
        if w[0].0 == w[1].0 {
            suspects.push(w[0].1);
            suspects.push(w[1].1);
        }
    }
    if suspects.is_empty() {
        return Ok(true);
    }
    suspects.sort_unstable();
    suspects.dedup();
    // Read the suspects' key values: (values, row), in row order.
    let mut found: Vec<(Vec<Vec<u8>>, u64)> = Vec::with_capacity(suspects.len());
    let mut next = 0usize;
    each_row(&store.objects, v, |row, r| {
        if next < suspects.len() && suspects[next] == row {
            found.push((kcols.iter().map(|&c| r.field(c).to_vec()).collect(), row));
            next += 1;
        }
        Ok(())
    })?;
    found.sort();
    let mut groups: Vec<(String, Vec<u64>)> = Vec::new();
    let mut n_groups = 0u64;
    let mut i = 0usize;
    while i < found.len() {
        let mut j = i + 1;
        while j < found.len() && found[j].0 == found[i].0 {
            j += 1;
        }
        if j - i > 1 {
            n_groups += 1;
            let text: Vec<String> = found[i]
                .0
                .iter()
                .map(|f| String::from_utf8_lossy(f).into_owned())
                .collect();
            groups.push((text.join(", "), found[i..j].iter().map(|f| f.1).collect()));
        }
        i = j;
    }
    if groups.is_empty() {
        return Ok(false);
    }
    // The groups in the order their first row appears.
    groups.sort_by_key(|g| g.1[0]);
    let shown: Vec<String> = groups
        .iter()
        .take(SHOWN)
        .map(|(k, rows)| {
            let rows: Vec<String> = rows.iter().map(|r| (r + 1).to_string()).collect();
            format!("\"{k}\" (data rows {})", rows.join(", "))
        })
        .collect();
    let more = n_groups.saturating_sub(SHOWN as u64);
    Err(Error::usage(format!(
        "{}: key {} is not unique: {}{}; a diff by key needs every key once: pass --key with \
         columns that identify each row",
        v.label(),
        key.join(", "),
        shown.join("; "),
        if more > 0 {
            format!("; and {more} more")
        } else {
            String::new()
        }
    )))
}
