//! The diff by order, for versions without a key. The two sequences of row fingerprints (from
//! the row index objects, or over the shared columns when the headers differ) are aligned by a
//! minimal edit script with Myers' algorithm ("An O(ND) Difference Algorithm and Its
//! Variations", Algorithmica 1, 1986; the `similar` crate's implementation). Rows whose
//! fingerprint does not occur on the other side at all are set aside first: they can be in no
//! common subsequence, so the script stays minimal, and Myers then only works on what the two
//! versions share, which keeps it fast when the changes are spread over a large table.
//!
//! One pass then reads both versions to confirm every matched pair on its values and to keep
//! the rows between matches. When the headers are equal and both versions are UTF-8 in the same
//! dialect, a pair is confirmed by comparing its record bytes (cut out by the row index's
//! offsets; equal bytes hold equal values) and only the other rows are parsed; otherwise both
//! versions are parsed at once, the first on another thread. Inside each block of
//! removed and added rows, rows are paired greedily in order into changed rows: a removed row is
//! paired with the first of the next [`PAIR_WINDOW`] unpaired added rows of the block with which
//! at least half of its compared cells are equal, and none of the columns declared as a key in
//! either version's history differs. A one-column table therefore never pairs: its rows differ
//! in their only cell. This pairing is a guess, used only for versions no recorded steps relate
//! (see [`super::lineage`]), and the diff says so.

use std::collections::HashSet;
use std::convert::Infallible;
use std::sync::mpsc::{sync_channel, Receiver};

use similar::algorithms::{myers, DiffHook};

use super::read::{both, cuttable, each_row, free_aside, row_index_cut, RawRows, RowRef, RowStore};
use super::scan::scan_both;
use super::{
    cell_diffs, count_by_column, equal_cells, push_pair, settle_columns, Alignment, Change,
    ChangeKind, Diff, Layout, MatchedBy, RowPairing,
};
use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;

/// How many added rows ahead a removed row looks for its partner.
pub const PAIR_WINDOW: u64 = 32;

/// Rows handed from the reading thread at a time.
const BATCH_ROWS: usize = 4096;

/// Fingerprints are already uniform hashes: a set of them needs no further hashing.
type FpSet = HashSet<u64, crate::hash::AsIsBuild>;

/// Runs of matched rows (start in A, start in B, length), in order.
struct Runs<'a> {
    ia: &'a [usize],
    ib: &'a [usize],
    out: Vec<(u64, u64, u64)>,
}

impl DiffHook for Runs<'_> {
    type Error = Infallible;

    fn equal(&mut self, old: usize, new: usize, len: usize) -> Result<(), Infallible> {
        for k in 0..len {
            let (x, y) = (self.ia[old + k] as u64, self.ib[new + k] as u64);
            match self.out.last_mut() {
                Some(r) if r.0 + r.2 == x && r.1 + r.2 == y => r.2 += 1,
                _ => self.out.push((x, y, 1)),
            }
        }
        Ok(())
    }
}

/// A minimal alignment of two fingerprint sequences: the runs of matched rows (start in A,
/// start in B, length), in order. The matched rows form a longest common subsequence.
pub fn align(fa: &[u64], fb: &[u64]) -> Vec<(u64, u64, u64)> {
    if fa == fb {
        return if fa.is_empty() {
            Vec::new()
        } else {
            vec![(0, 0, fa.len() as u64)]
        };
    }
    let in_a: FpSet = fa.iter().copied().collect();
    let in_b: FpSet = fb.iter().copied().collect();
    let ia: Vec<usize> = (0..fa.len()).filter(|&i| in_b.contains(&fa[i])).collect();
    let ib: Vec<usize> = (0..fb.len()).filter(|&j| in_a.contains(&fb[j])).collect();
    drop(in_a);
    drop(in_b);
    let ra: Vec<u64> = ia.iter().map(|&i| fa[i]).collect();
    let rb: Vec<u64> = ib.iter().map(|&j| fb[j]).collect();
    let mut hook = Runs {
        ia: &ia,
        ib: &ib,
        out: Vec::new(),
    };
    // The hook never fails.
    let _ = myers::diff(&mut hook, &ra, 0..ra.len(), &rb, 0..rb.len());
    hook.out
}

/// Pulls the first version's rows, in order, from the reading thread.
struct Cursor {
    rx: Receiver<RowStore>,
    batch: RowStore,
    pos: usize,
}

impl Cursor {
    /// Moves to row `target` (or to the end when `None`), keeping every row passed on the way
    /// in `skipped`; returns the target row.
    fn advance(&mut self, target: Option<u64>, skipped: &mut RowStore) -> Option<RowRef<'_>> {
        loop {
            if self.pos == self.batch.len() {
                self.batch = self.rx.recv().ok()?;
                self.pos = 0;
                continue;
            }
            let row = self.batch.row_at(self.pos);
            self.pos += 1;
            if Some(row) == target {
                return Some(self.batch.at(self.pos - 1));
            }
            skipped.push_ref(row, self.batch.at(self.pos - 1));
        }
    }
}

/// `guard`: columns (index in A, index in B) declared as a key somewhere in the versions'
/// history; two rows that differ in one of them are never paired as a changed row.
pub(super) fn run(
    store: &Store,
    a: &Version,
    b: &Version,
    layout: Layout,
    guard: &[(usize, usize)],
    keep_bytes: u64,
) -> Result<Diff> {
    let objects = &store.objects;
    let (cand_a, cand_b) = layout.candidates();
    let (fp_a, fp_b) = layout.fp_cols();
    // With equal headers and both versions UTF-8 in the same dialect, equal record bytes mean
    // equal values: matched pairs are confirmed by comparing bytes, and only the rows between
    // matches (or pairs whose bytes differ) are parsed.
    let by_bytes = layout.identical
        && cuttable(a)
        && cuttable(b)
        && a.dialect.delimiter == b.dialect.delimiter;
    // The bytes read for the fingerprints are kept for the pass that confirms the pairs, when
    // both versions together fit the budget.
    let keep = by_bytes && a.n_bytes.saturating_add(b.n_bytes) <= keep_bytes;
    let mut cuts = None;
    let (fa, fb, hash_a, hash_b) = if layout.identical {
        let ((fa, ca), (fb, cb)) = both(
            || row_index_cut(objects, a, keep),
            || row_index_cut(objects, b, keep),
        )?;
        cuts = by_bytes.then_some((ca, cb));
        (fa, fb, Vec::new(), Vec::new())
    } else {
        let (sa, sb) = scan_both(
            objects,
            (a, b),
            (fp_a.as_deref(), fp_b.as_deref()),
            (&cand_a, &cand_b),
        )?;
        (sa.fps, sb.fps, sa.cand, sb.cand)
    };
    let matched = align(&fa, &fb);
    let (na, nb) = (fa.len() as u64, fb.len() as u64);
    drop(fa);
    drop(fb);
    let common: u64 = matched.iter().map(|r| r.2).sum();
    let alignment = Alignment {
        edit_distance: na + nb - 2 * common,
        common_rows: common,
    };
    let (compared, columns) = settle_columns(
        a,
        b,
        &layout,
        (&cand_a, &cand_b),
        (&hash_a, &hash_b),
        &mut |check| {
            matched
                .iter()
                .all(|&(x, y, len)| (0..len).all(|k| check(x + k, y + k)))
        },
    );
    drop(hash_a);
    drop(hash_b);

    // One pass over both versions: confirm the matched pairs, keep the rows between them.
    let mut from_rows = RowStore::new();
    let mut to_rows = RowStore::new();
    // Matched pairs whose values differ after all (equal fingerprints of different rows).
    let mut unequal: Vec<(u64, u64)> = Vec::new();
    if let Some(cuts) = cuts {
        let mut raw_a = RawRows::cut(objects, a, &cuts.0)?;
        let mut raw_b = RawRows::cut(objects, b, &cuts.1)?;
        let (mut pa, mut pb) = (0u64, 0u64);
        for &(ma, mb, len) in matched.iter().chain(std::iter::once(&(na, nb, 0))) {
            for x in pa..ma {
                raw_a.parse_into(x, &mut from_rows)?;
            }
            for y in pb..mb {
                raw_b.parse_into(y, &mut to_rows)?;
            }
            for k in 0..len {
                let (x, y) = (ma + k, mb + k);
                if raw_a.bytes(x)? != raw_b.bytes(y)? {
                    // Different bytes may still hold equal values (quoting, line endings).
                    let mut one = (RowStore::new(), RowStore::new());
                    raw_a.parse_into(x, &mut one.0)?;
                    raw_b.parse_into(y, &mut one.1)?;
                    let (ra, rb) = (one.0.at(0), one.1.at(0));
                    if !ra.same_values(&rb) {
                        from_rows.push_ref(x, ra);
                        to_rows.push_ref(y, rb);
                        unequal.push((x, y));
                    }
                }
            }
            pa = ma + len;
            pb = mb + len;
        }
        raw_a.finish()?;
        raw_b.finish()?;
        // Nothing reads the versions again.
        free_aside(cuts);
    } else {
        confirm_by_values(
            objects,
            (a, b),
            &matched,
            &compared,
            layout.identical,
            (&mut from_rows, &mut to_rows),
            &mut unequal,
        )?;
    }

    // Walk the alignment: blocks between matched runs, then the runs themselves.
    let mut pairing = RowPairing::default();
    let mut changes = Vec::new();
    let n_compared = compared.len();
    let pair_up = |x: u64, y: u64| -> bool {
        match (from_rows.get(x), to_rows.get(y)) {
            (Some(ra), Some(rb)) => {
                n_compared > 0
                    && guard.iter().all(|&(i, j)| ra.field(i) == rb.field(j))
                    && 2 * equal_cells(&compared, ra, rb) >= n_compared
            }
            _ => false,
        }
    };
    let changed_pair = |pairing: &mut RowPairing, changes: &mut Vec<Change>, x, y| {
        let start = pairing.cells.len();
        let n = match (from_rows.get(x), to_rows.get(y)) {
            (Some(ra), Some(rb)) => {
                cell_diffs(&compared, &b.header, (x, ra), (y, rb), &mut pairing.cells)
            }
            _ => 0,
        };
        push_pair(&mut pairing.runs, x, y, n > 0);
        if n > 0 {
            changes.push(Change {
                kind: ChangeKind::Changed,
                a_row: Some(x),
                b_row: Some(y),
                cells: start..pairing.cells.len(),
            });
        }
    };
    let removed = |pairing: &mut RowPairing, changes: &mut Vec<Change>, x: u64| {
        pairing.removed.push(x);
        changes.push(Change {
            kind: ChangeKind::Removed,
            a_row: Some(x),
            b_row: None,
            cells: 0..0,
        });
    };
    let added = |pairing: &mut RowPairing, changes: &mut Vec<Change>, y: u64| {
        pairing.added.push(y);
        let at = pairing.cells.len();
        changes.push(Change {
            kind: ChangeKind::Added,
            a_row: None,
            b_row: Some(y),
            cells: at..at,
        });
    };
    let (mut pa, mut pb) = (0u64, 0u64);
    let mut unequal_i = 0usize;
    let ends = matched.iter().copied().chain(std::iter::once((na, nb, 0)));
    for (ma, mb, len) in ends {
        // The block [pa, ma) × [pb, mb): pair greedily in order.
        let mut next_b = pb;
        let mut ia = pa;
        for x in pa..ma {
            let limit = mb.min(next_b + PAIR_WINDOW);
            if let Some(y) = (next_b..limit).find(|&y| pair_up(x, y)) {
                while ia < x {
                    removed(&mut pairing, &mut changes, ia);
                    ia += 1;
                }
                while next_b < y {
                    added(&mut pairing, &mut changes, next_b);
                    next_b += 1;
                }
                changed_pair(&mut pairing, &mut changes, x, y);
                ia = x + 1;
                next_b = y + 1;
            }
        }
        while ia < ma {
            removed(&mut pairing, &mut changes, ia);
            ia += 1;
        }
        while next_b < mb {
            added(&mut pairing, &mut changes, next_b);
            next_b += 1;
        }
        for k in 0..len {
            let (x, y) = (ma + k, mb + k);
            if unequal.get(unequal_i) == Some(&(x, y)) {
                unequal_i += 1;
                changed_pair(&mut pairing, &mut changes, x, y);
            } else {
                push_pair(&mut pairing.runs, x, y, false);
            }
        }
        pa = ma + len;
        pb = mb + len;
    }
    let changed_by_column = count_by_column(&compared, b, &pairing.cells);
    let n_cells = pairing.cells.len() as u64;
    Ok(Diff {
        from: a.clone(),
        to: b.clone(),
        matched_by: MatchedBy::Order,
        columns,
        compared,
        pairing,
        alignment: Some(alignment),
        n_changes: changes.len() as u64,
        n_cells,
        changes,
        changed_by_column,
        from_rows,
        to_rows,
        key_idx: (Vec::new(), Vec::new()),
        duplicates: None,
    })
}

/// Confirms the matched pairs on their values and keeps the rows between matches, reading both
/// versions at once (the first on another thread) and parsing every row.
fn confirm_by_values(
    objects: &crate::store::objects::Objects,
    (a, b): (&Version, &Version),
    matched: &[(u64, u64, u64)],
    compared: &[(usize, usize)],
    identical: bool,
    (from_rows, to_rows): (&mut RowStore, &mut RowStore),
    unequal: &mut Vec<(u64, u64)>,
) -> Result<()> {
    std::thread::scope(|s| -> Result<()> {
        let (tx, rx) = sync_channel::<RowStore>(4);
        let reader = s.spawn(move || {
            let mut batch = RowStore::new();
            each_row(objects, a, |row, r| {
                batch.push(row, &r);
                if batch.len() == BATCH_ROWS {
                    let full = std::mem::take(&mut batch);
                    tx.send(full)
                        .map_err(|_| ErrorKind::Data("the diff stopped reading".into()))?;
                }
                Ok(())
            })?;
            if !batch.is_empty() {
                // The receiver is gone only when the other side already failed.
                let _ = tx.send(batch);
            }
            Ok(())
        });
        let mut cursor = Cursor {
            rx,
            batch: RowStore::new(),
            pos: 0,
        };
        let mut run_i = 0usize;
        let walked = each_row(objects, b, |y, r| {
            while run_i < matched.len() && matched[run_i].1 + matched[run_i].2 <= y {
                run_i += 1;
            }
            let target = matched
                .get(run_i)
                .filter(|m| m.1 <= y)
                .map(|m| m.0 + (y - m.1));
            let Some(x) = target else {
                to_rows.push(y, &r);
                return Ok(());
            };
            let rb = RowRef::from(&r);
            let Some(ra) = cursor.advance(Some(x), from_rows) else {
                return Err(ErrorKind::Inconsistent(format!(
                    "{} has fewer rows than the store records; run `sluice verify`",
                    a.label()
                ))
                .into());
            };
            let same = if identical {
                ra.same_values(&rb)
            } else {
                compared.iter().all(|&(i, j)| ra.field(i) == rb.field(j))
            };
            if !same {
                from_rows.push_ref(x, ra);
                to_rows.push(y, &r);
                unequal.push((x, y));
            }
            Ok(())
        });
        if walked.is_ok() {
            cursor.advance(None, from_rows);
        }
        drop(cursor);
        let read = reader
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        walked?;
        read
    })
}
