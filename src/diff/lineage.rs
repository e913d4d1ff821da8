//! The diff by recorded lineage. When two versions come from one version through recorded
//! steps (one descends from the other, or both from a common version), each side's rows are
//! carried back through the steps' row maps to that version, and two rows are the same row
//! exactly when they come from the same row of it. Nothing is guessed: a row the steps
//! brought in is added, a row they dropped is removed, and a row whose values changed out of
//! all recognition is still the row it was.
//!
//! Each side's chain follows the main input of each step (role `input`) back to its root: an
//! intake, or a version whose step keeps no row map (a `summarize`, whose rows are groups, not
//! input rows). Two chains that meet are related; the nearest version they share is the one
//! rows are carried back to.

use super::listed::{compare_pairs, Listing};
use super::read::{both, row_index};
use super::scan::scan_both;
use super::{pairs_that_differ, push_pair, Diff, Layout, MatchedBy, RowPairing};
use crate::error::{ErrorKind, Result};
use crate::model::{LineageKind, StepKind, Version};
use crate::provenance;
use crate::store::Store;

/// No row: the row came from no row of the version the chains meet at.
const NONE: u64 = u64::MAX;

/// How two versions are related through recorded steps.
#[derive(Debug, Clone)]
pub struct Link {
    /// The nearest version both descend from (one of the two when one descends from the other).
    pub ancestor: Version,
    /// The steps between the ancestor and each side, oldest first (the first version's, then
    /// the second's).
    pub steps: Vec<i64>,
    /// Whether any of those steps has lineage inferred by a diff (outside work, hand edits).
    pub inferred: bool,
    /// Per row of each side, its row in the ancestor (`u64::MAX`: none).
    a_rows: Vec<u64>,
    b_rows: Vec<u64>,
}

/// The chain of versions a version comes from through the main inputs of their steps, the
/// version itself first, ending at a root.
fn chain(store: &Store, v: &Version) -> Result<Vec<Version>> {
    let mut out = vec![v.clone()];
    while let Some(last) = out.last() {
        let Some(step) = store.lineage.step(last.step_id)? else {
            break;
        };
        if step.kind == StepKind::Ingest
            || step.lineage == LineageKind::None
            || step.operation.as_deref() == Some("summarize")
        {
            break;
        }
        let input = store
            .lineage
            .step_input_versions(last.step_id)?
            .into_iter()
            .find(|(role, _)| role == "input")
            .map(|(_, v)| v);
        match input {
            // Inputs are always older than what a step makes; the guard keeps a damaged
            // database from looping.
            Some(i) if i.id < last.id => out.push(i),
            _ => break,
        }
    }
    Ok(out)
}

/// Each row of `chain[0]`'s row in the chain's last version, through every step's row map.
fn carry_back(store: &Store, chain: &[Version]) -> Result<Vec<u64>> {
    let Some(first) = chain.first() else {
        return Ok(Vec::new());
    };
    let mut rows: Vec<u64> = (0..first.n_rows).collect();
    for w in chain.windows(2) {
        let (out, input) = (&w[0], &w[1]);
        let mut back = vec![NONE; out.n_rows as usize];
        for r in provenance::row_runs(store, out, input.id)? {
            for k in 0..r.len {
                if let Some(slot) = back.get_mut((r.out_start + k) as usize) {
                    *slot = r.in_start + k;
                }
            }
        }
        for row in rows.iter_mut() {
            if *row != NONE {
                *row = back.get(*row as usize).copied().unwrap_or(NONE);
            }
        }
    }
    Ok(rows)
}

/// How `a` and `b` are related through recorded steps, if they are.
pub fn link(store: &Store, a: &Version, b: &Version) -> Result<Option<Link>> {
    let ca = chain(store, a)?;
    let cb = chain(store, b)?;
    let Some((ib, ia)) = cb
        .iter()
        .enumerate()
        .find_map(|(j, v)| ca.iter().position(|x| x.id == v.id).map(|i| (j, i)))
    else {
        return Ok(None);
    };
    let (ca, cb) = (&ca[..=ia], &cb[..=ib]);
    let mut steps: Vec<i64> = ca[..ia].iter().rev().map(|v| v.step_id).collect();
    steps.extend(cb[..ib].iter().rev().map(|v| v.step_id));
    let mut inferred = false;
    for &s in &steps {
        if let Some(step) = store.lineage.step(s)? {
            inferred |= step.lineage == LineageKind::Inferred;
        }
    }
    Ok(Some(Link {
        ancestor: ca[ia].clone(),
        steps,
        inferred,
        a_rows: carry_back(store, ca)?,
        b_rows: carry_back(store, cb)?,
    }))
}

impl Link {
    /// The matched pairs (row in the first version, row in the second), in the second's row
    /// order. A row of the ancestor that reaches one side more than once (a step that copied
    /// it) pairs with the first such row of the other side once; the other copies are added.
    pub fn pairs(&self) -> Vec<(u64, u64)> {
        let mut by_anc: Vec<(u64, u64)> = self
            .a_rows
            .iter()
            .enumerate()
            .filter(|(_, &r)| r != NONE)
            .map(|(x, &r)| (r, x as u64))
            .collect();
        by_anc.sort_unstable();
        by_anc.dedup_by_key(|p| p.0);
        let mut taken = vec![false; by_anc.len()];
        let mut out = Vec::new();
        for (y, &r) in self.b_rows.iter().enumerate() {
            if r == NONE {
                continue;
            }
            if let Ok(i) = by_anc.binary_search_by_key(&r, |p| p.0) {
                if !taken[i] {
                    taken[i] = true;
                    out.push((by_anc[i].1, y as u64));
                }
            }
        }
        out
    }

    /// Per row of the first version, its row in the ancestor (`u64::MAX`: none).
    pub fn a_rows(&self) -> &[u64] {
        &self.a_rows
    }

    /// Per row of the second version, its row in the ancestor (`u64::MAX`: none).
    pub fn b_rows(&self) -> &[u64] {
        &self.b_rows
    }
}

/// The diff with rows paired by the lineage `link`.
pub(super) fn run(
    store: &Store,
    a: &Version,
    b: &Version,
    layout: Layout,
    link: Link,
    key: Option<(Vec<String>, Vec<usize>, Vec<usize>)>,
    list: Listing,
) -> Result<Diff> {
    let pairs = link.pairs();
    let (key, key_idx) = match key {
        Some((k, ka, kb)) => (Some(k), (ka, kb)),
        None => (None, (Vec::new(), Vec::new())),
    };
    let matched_by = MatchedBy::Lineage {
        ancestor: link.ancestor.label(),
        steps: link.steps.clone(),
        inferred: link.inferred,
        key,
    };
    assemble(store, a, b, layout, pairs, matched_by, key_idx, list)
}

/// A diff from known pairs (row in A, row in B) in B's row order: rows of A in no pair are
/// removed, rows of B in no pair added, and the cells of every pair compared.
#[allow(clippy::too_many_arguments)]
pub(super) fn assemble(
    store: &Store,
    a: &Version,
    b: &Version,
    layout: Layout,
    pairs: Vec<(u64, u64)>,
    matched_by: MatchedBy,
    key_idx: (Vec<usize>, Vec<usize>),
    list: Listing,
) -> Result<Diff> {
    let objects = &store.objects;
    let (cand_a, cand_b) = layout.candidates();
    let (fp_a, fp_b) = layout.fp_cols();
    let (fps_a, fps_b, hash_a, hash_b) = if layout.identical && cand_a.is_empty() {
        let ((fa, _), (fb, _)) = both(|| row_index(objects, a), || row_index(objects, b))?;
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
    let lost = || -> crate::error::Error {
        ErrorKind::Inconsistent(format!(
            "{} or {} has fewer rows than the store records; run `sluice verify`",
            a.label(),
            b.label()
        ))
        .into()
    };
    if fps_a.len() as u64 != a.n_rows || fps_b.len() as u64 != b.n_rows {
        return Err(lost());
    }
    if pairs.iter().any(|&(x, y)| x >= a.n_rows || y >= b.n_rows) {
        return Err(lost());
    }
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
    let mut in_pair_a = vec![false; a.n_rows as usize];
    let mut in_pair_b = vec![false; b.n_rows as usize];
    for &(x, y) in &pairs {
        in_pair_a[x as usize] = true;
        in_pair_b[y as usize] = true;
    }
    let removed: Vec<u64> = (0..a.n_rows).filter(|&x| !in_pair_a[x as usize]).collect();
    let added: Vec<u64> = (0..b.n_rows).filter(|&y| !in_pair_b[y as usize]).collect();
    drop(in_pair_a);
    drop(in_pair_b);

    drop(fps_a);
    drop(fps_b);
    let mut removed = removed;
    let mut added = added;
    let done = compare_pairs(
        objects,
        a,
        b,
        &compared,
        None,
        to_compare,
        &mut removed,
        &mut added,
        list,
        (None, None),
    )?;
    let changed_b = &done.changed_b;
    let mut runs = Vec::new();
    let mut c = 0usize;
    for &(x, y) in &pairs {
        let changed = changed_b.get(c) == Some(&y);
        if changed {
            c += 1;
        }
        push_pair(&mut runs, x, y, changed);
    }

    Ok(Diff {
        from: a.clone(),
        to: b.clone(),
        matched_by,
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
        key_idx,
        duplicates: None,
    })
}

/// The datasets of every version `v` comes from through recorded steps (every input, not only
/// the main one), `v`'s own first. Walked with a work list, not recursion.
pub fn datasets_behind(store: &Store, v: &Version) -> Result<Vec<String>> {
    let mut names = vec![v.dataset.clone()];
    let mut seen: std::collections::HashSet<i64> = std::collections::HashSet::new();
    let mut todo = vec![v.clone()];
    while let Some(x) = todo.pop() {
        if !seen.insert(x.id) {
            continue;
        }
        if !names.contains(&x.dataset) {
            names.push(x.dataset.clone());
        }
        for (_, i) in store.lineage.step_input_versions(x.step_id)? {
            if i.id < x.id && !seen.contains(&i.id) {
                todo.push(i);
            }
        }
    }
    Ok(names)
}
