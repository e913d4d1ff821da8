//! Differences between two versions of a table: which rows were added, removed or changed,
//! every changed cell with its old and new value, and which columns were added, removed,
//! renamed or reordered. Returns data ([`Diff`]); the command line renders it.
//!
//! Rows are matched in one of three ways:
//!
//! - **by lineage** ([`lineage`]), when the two versions come from one version through recorded
//!   steps (one descends from the other, or both from a common one): each side's rows are
//!   carried back through the steps' row maps, and rows from the same row are the same row.
//!   This is the truth the steps recorded, so it is preferred to a declared key; an explicit
//!   key (`KeyChoice::Columns`) still matches by key.
//! - **by key** ([`keyed`]), when a key is given or declared on the dataset: rows with equal key
//!   values are the same row. Each side keeps its (key hash, row number) pairs sorted by hash
//!   (in parts that fit the cache) and the two are walked together; only rows whose fingerprints differ are read again to compare
//!   cells. A blank key is an error; rows that share a key are paired within their group (by
//!   lineage when the versions are related, else in order) and reported ([`DuplicateKeys`]).
//! - **by order** ([`aligned`]), for unrelated versions without a key: the two sequences of row fingerprints are aligned
//!   by a minimal edit script (Myers' O(ND) algorithm, from the `similar` crate), rows matched
//!   by fingerprint are confirmed on their values, and inside each block of removed and added
//!   rows a removed row and an added row are paired as one *changed* row when at least half of
//!   their compared cells are equal (see [`aligned::PAIR_WINDOW`]). This is a heuristic and
//!   the diff says so; it never pairs two rows whose values differ in a column declared as a
//!   key on any dataset of either version's history.
//!
//! Columns are matched by name; a column only in the first version and a column only in the
//! second are reported as a rename when they hold equal values in every pair of matched rows.
//! Cells are compared over the columns the versions share (renamed ones under their new name).
//!
//! The row pairing ([`RowPairing`]) is the diff's edit script: applying it to the first
//! version (take the rows of each run, apply the cell changes, insert the added rows) gives
//! the second, over the compared columns. Lineage inferred for outside work is built from it.

pub mod aligned;
pub mod chars;
pub mod keyed;
pub mod lineage;
pub mod listed;
mod meet;
pub mod read;
mod scan;

use serde::Serialize;

use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::refs;
use crate::store::Store;

pub use listed::Listing;
pub use read::{RowRef, RowStore};

/// How rows are matched.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum KeyChoice {
    /// The key declared on the second version's dataset, else on the first's; by order when
    /// neither declares one.
    Declared,
    /// These key columns.
    Columns(Vec<String>),
    /// Without a key, even when one is declared: by lineage when the versions are related,
    /// else by order, and then without the declared key columns guarding the pairing (for
    /// outside work that rewrites key values, `capture --match-by-order`).
    Unkeyed,
}

#[derive(Debug, Clone)]
pub struct DiffOptions {
    pub key: KeyChoice,
}

/// A run of matched rows: rows `b_start..b_start+len` of the second version are rows
/// `a_start..a_start+len` of the first (0-based), unchanged or, when `changed`, with the cell
/// changes of [`RowPairing::cells`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct PairRun {
    pub a_start: u64,
    pub b_start: u64,
    pub len: u64,
    pub changed: bool,
}

/// One changed cell of a changed row (0-based rows; the column under its name in the second
/// version).
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct CellDiff {
    pub a_row: u64,
    pub b_row: u64,
    pub column: String,
    pub old: String,
    pub new: String,
}

/// The row pairing: the edit script from the first version to the second.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RowPairing {
    /// Matched rows, in the order of the second version's rows.
    pub runs: Vec<PairRun>,
    /// Rows of the first version no row of the second comes from (0-based, ascending).
    pub removed: Vec<u64>,
    /// Rows of the second version that come from no row of the first (0-based, ascending).
    pub added: Vec<u64>,
    /// Every changed cell, ordered by the second version's row, then its column order.
    pub cells: Vec<CellDiff>,
}

/// Column differences. Names are those of the header of each version.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct ColumnChanges {
    pub added: Vec<String>,
    pub removed: Vec<String>,
    /// (old name, new name).
    pub renamed: Vec<(String, String)>,
    /// The compared columns are in another relative order in the second version.
    pub reordered: bool,
}

/// How the rows were matched.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum MatchedBy {
    Key(Vec<String>),
    /// By the similarity heuristic, for versions no recorded steps relate.
    Order,
    /// Through the row maps of recorded steps.
    Lineage {
        /// The version (`name@seq`) both sides' rows were carried back to.
        ancestor: String,
        /// The steps between it and each side, oldest first.
        steps: Vec<i64>,
        /// Whether any of them has lineage inferred by a diff (outside work, hand edits).
        inferred: bool,
        /// The key declared on the dataset, shown beside each row.
        key: Option<Vec<String>>,
    },
}

impl MatchedBy {
    /// `lineage`, `key` or `order`.
    pub fn method(&self) -> &'static str {
        match self {
            MatchedBy::Key(_) => "key",
            MatchedBy::Order => "order",
            MatchedBy::Lineage { .. } => "lineage",
        }
    }

    /// The key columns shown beside each row, if any.
    pub fn key(&self) -> Option<&[String]> {
        match self {
            MatchedBy::Key(k) => Some(k),
            MatchedBy::Lineage { key, .. } => key.as_deref(),
            MatchedBy::Order => None,
        }
    }

    /// One sentence on how the rows were paired, for people.
    pub fn describe(&self) -> String {
        match self {
            MatchedBy::Key(k) => format!("rows paired by key {}", k.join(", ")),
            MatchedBy::Order => "rows paired by order (no key); no recorded steps relate the \
                                 versions, so a removed and an added row are paired as changed \
                                 when at least half their cells agree (a guess)"
                .to_string(),
            MatchedBy::Lineage {
                ancestor,
                steps,
                inferred,
                ..
            } => {
                let through = if steps.is_empty() {
                    "the same rows".to_string()
                } else {
                    format!(
                        "the row maps of step{} {}",
                        if steps.len() == 1 { "" } else { "s" },
                        steps
                            .iter()
                            .map(|s| s.to_string())
                            .collect::<Vec<_>>()
                            .join(", ")
                    )
                };
                format!(
                    "rows paired through the recorded lineage: {through}, back to {ancestor}{}",
                    if *inferred {
                        " (some of it inferred when outside work was recorded)"
                    } else {
                        ""
                    }
                )
            }
        }
    }
}

/// Rows that share a key value in a diff by key, paired within their group.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct DuplicateKeys {
    /// How rows inside a group were paired: `lineage` or `order`.
    pub paired_by: &'static str,
    /// Key values that occur more than once on either side.
    pub groups: u64,
    /// Rows in those groups, per side.
    pub rows_from: u64,
    pub rows_to: u64,
    /// The first few groups: key values and their first few 1-based data rows per side.
    pub first: Vec<DuplicateGroup>,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct DuplicateGroup {
    pub key: Vec<String>,
    pub from_rows: Vec<u64>,
    pub n_from: u64,
    pub to_rows: Vec<u64>,
    pub n_to: u64,
}

/// For a diff by order: the size of the minimal edit script by fingerprint, before removed and
/// added rows are paired into changed ones. `edit_distance` (D) counts row deletions plus
/// insertions; `common_rows` is the length of the longest common subsequence. A changed row
/// counts as one deletion and one insertion here.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Alignment {
    pub edit_distance: u64,
    pub common_rows: u64,
}

/// One listed change.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ChangeKind {
    Changed,
    Removed,
    Added,
}

/// One entry of the listing, in display order; `cells` is a range of [`RowPairing::cells`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Change {
    pub kind: ChangeKind,
    pub a_row: Option<u64>,
    pub b_row: Option<u64>,
    pub cells: std::ops::Range<usize>,
}

/// The differences between two versions.
#[derive(Debug, Clone)]
pub struct Diff {
    pub from: Version,
    pub to: Version,
    pub matched_by: MatchedBy,
    pub columns: ColumnChanges,
    /// The compared columns as (index in the first header, index in the second), in the
    /// second version's order.
    pub compared: Vec<(usize, usize)>,
    pub pairing: RowPairing,
    pub alignment: Option<Alignment>,
    /// Changed rows, removed rows, added rows, in display order: all of them, or with
    /// [`Listing::First`] the first ones (`pairing.cells`, `from_rows` and `to_rows` then hold
    /// only what these need).
    pub changes: Vec<Change>,
    /// How many changes there are, listed or not.
    pub n_changes: u64,
    /// How many cells changed, listed or not.
    pub n_cells: u64,
    /// Changed cells per compared column (second version's names and order), zero counts
    /// included.
    pub changed_by_column: Vec<(String, u64)>,
    /// The rows the diff read again (removed, added and changed ones), for display.
    pub from_rows: RowStore,
    pub to_rows: RowStore,
    /// Key column indices in the first and second header (empty for a diff by order).
    pub key_idx: (Vec<usize>, Vec<usize>),
    /// In a diff by key: the rows that share a key value, paired within their group.
    pub duplicates: Option<DuplicateKeys>,
}

impl Diff {
    pub fn n_changed(&self) -> u64 {
        self.pairing
            .runs
            .iter()
            .filter(|r| r.changed)
            .map(|r| r.len)
            .sum()
    }

    pub fn n_unchanged(&self) -> u64 {
        self.pairing
            .runs
            .iter()
            .filter(|r| !r.changed)
            .map(|r| r.len)
            .sum()
    }

    pub fn n_removed(&self) -> u64 {
        self.pairing.removed.len() as u64
    }

    pub fn n_added(&self) -> u64 {
        self.pairing.added.len() as u64
    }

    pub fn is_empty(&self) -> bool {
        self.n_changed() == 0
            && self.pairing.removed.is_empty()
            && self.pairing.added.is_empty()
            && self.columns == ColumnChanges::default()
            && self.from.header.len() == self.to.header.len()
    }

    /// The key values of a listed change, from whichever side holds the row.
    pub fn key_of(&self, c: &Change) -> Option<Vec<String>> {
        if self.key_idx.0.is_empty() {
            return None;
        }
        let (row, idx) = match (c.b_row, c.a_row) {
            (Some(b), _) => (self.to_rows.get(b)?, &self.key_idx.1),
            (None, Some(a)) => (self.from_rows.get(a)?, &self.key_idx.0),
            (None, None) => return None,
        };
        Some(idx.iter().map(|&i| row.text(i)).collect())
    }
}

/// Compares the versions `from` and `to` name (see [`crate::refs`]).
pub fn diff(store: &Store, from: &str, to: &str, opts: &DiffOptions) -> Result<Diff> {
    let a = refs::resolve(&store.lineage, from)?;
    let b = refs::resolve(&store.lineage, to)?;
    diff_versions(store, &a, &b, opts)
}

/// How many changes `compare` lists when no `--limit` is given: 50,000. Their values are held
/// in memory (some 2 KB a change as JSON), so a comparison in which millions of rows changed
/// lists the first ones and counts the rest; `--limit` asks for more or fewer.
pub const LISTED_BY_DEFAULT: usize = 50_000;

/// Compares the versions `from` and `to` name, keeping values only for the first `n` changes
/// of the listing (for rows paired by key or through the lineage; by order everything is
/// kept), so that memory per changed row stays a few words (see [`listed`]).
pub fn diff_listed(
    store: &Store,
    from: &str,
    to: &str,
    opts: &DiffOptions,
    n: usize,
) -> Result<Diff> {
    let a = refs::resolve(&store.lineage, from)?;
    let b = refs::resolve(&store.lineage, to)?;
    diff_with(store, &a, &b, opts, Listing::First(n))
}

/// Compares two versions already resolved.
pub fn diff_versions(store: &Store, a: &Version, b: &Version, opts: &DiffOptions) -> Result<Diff> {
    diff_with(store, a, b, opts, Listing::All)
}

fn diff_with(
    store: &Store,
    a: &Version,
    b: &Version,
    opts: &DiffOptions,
    list: Listing,
) -> Result<Diff> {
    diff_keeping(store, a, b, opts, list, read::KEEP_BYTES)
}

/// [`diff_with`], keeping both versions' bytes between the passes of a comparison by key or by
/// order when together they are at most `keep_bytes`.
fn diff_keeping(
    store: &Store,
    a: &Version,
    b: &Version,
    opts: &DiffOptions,
    list: Listing,
    keep_bytes: u64,
) -> Result<Diff> {
    let declared = || -> Result<Option<Vec<String>>> {
        Ok(
            match store.lineage.dataset(&b.dataset)?.and_then(|d| d.key) {
                Some(k) => Some(k),
                None => store.lineage.dataset(&a.dataset)?.and_then(|d| d.key),
            },
        )
    };
    let layout = Layout::new(a, b);
    let link = lineage::link(store, a, b)?;
    match (&opts.key, link) {
        (KeyChoice::Columns(k), link) => {
            let k = k.clone();
            check_key(&k)?;
            let ka = key_indices(a, &k)?;
            let kb = key_indices(b, &k)?;
            let how = (list, keep_bytes);
            keyed::run(store, a, b, layout, k, ka, kb, link.as_ref(), how)
        }
        (KeyChoice::Declared | KeyChoice::Unkeyed, Some(link)) => {
            // The key is only shown beside each row, when both versions have its columns.
            let key = match (&opts.key, declared()?) {
                (KeyChoice::Declared, Some(k)) => match (key_indices(a, &k), key_indices(b, &k)) {
                    (Ok(ka), Ok(kb)) => Some((k, ka, kb)),
                    _ => None,
                },
                _ => None,
            };
            lineage::run(store, a, b, layout, link, key, list)
        }
        (KeyChoice::Declared, None) => match declared()? {
            Some(k) => {
                check_key(&k)?;
                let ka = key_indices(a, &k)?;
                let kb = key_indices(b, &k)?;
                keyed::run(store, a, b, layout, k, ka, kb, None, (list, keep_bytes))
            }
            None => {
                let guard = history_key_columns(store, a, b)?;
                aligned::run(store, a, b, layout, &guard, keep_bytes)
            }
        },
        // Asked for explicitly (outside work that rewrites key values): no key column
        // guards the pairing either.
        (KeyChoice::Unkeyed, None) => aligned::run(store, a, b, layout, &[], keep_bytes),
    }
}

fn check_key(k: &[String]) -> Result<()> {
    if k.is_empty() || k.iter().any(|c| c.trim().is_empty()) {
        return Err(Error::usage(
            "--key needs at least one column name, e.g. --key order_id",
        ));
    }
    Ok(())
}

/// The columns declared as a key on any dataset of either version's history that both headers
/// have, as (index in A, index in B): the heuristic pairing never pairs rows that differ in
/// one of them.
fn history_key_columns(store: &Store, a: &Version, b: &Version) -> Result<Vec<(usize, usize)>> {
    let mut names: Vec<String> = Vec::new();
    for v in [a, b] {
        for d in lineage::datasets_behind(store, v)? {
            if let Some(k) = store.lineage.dataset(&d)?.and_then(|d| d.key) {
                names.extend(k);
            }
        }
    }
    names.sort();
    names.dedup();
    Ok(names
        .iter()
        .filter_map(|n| {
            let i = a.header.iter().position(|h| h == n)?;
            let j = b.header.iter().position(|h| h == n)?;
            Some((i, j))
        })
        .collect())
}

fn key_indices(v: &Version, key: &[String]) -> Result<Vec<usize>> {
    let missing: Vec<&String> = key.iter().filter(|k| !v.header.contains(k)).collect();
    if !missing.is_empty() {
        return Err(ErrorKind::Usage(format!(
            "key column{} {} not in {}; its columns are: {}; pass --key with columns both versions have",
            if missing.len() == 1 { "" } else { "s" },
            missing
                .iter()
                .map(|m| format!("\"{m}\""))
                .collect::<Vec<_>>()
                .join(", "),
            v.label(),
            v.header.join(", ")
        ))
        .into());
    }
    Ok(key
        .iter()
        .filter_map(|k| v.header.iter().position(|h| h == k))
        .collect())
}

/// At most this many columns on each side are considered as renamed ones (each costs 8 bytes
/// per row while the diff runs).
pub const MAX_RENAME_CANDIDATES: usize = 16;

/// How the two headers relate before any row is read.
#[derive(Debug, Clone)]
pub struct Layout {
    /// The headers are equal: fingerprints cover whole rows.
    pub identical: bool,
    /// Columns with the same name on both sides: (index in A, index in B), in A's order.
    pub by_name: Vec<(usize, usize)>,
    /// Columns only in A, only in B (indices).
    pub only_a: Vec<usize>,
    pub only_b: Vec<usize>,
}

impl Layout {
    pub fn new(a: &Version, b: &Version) -> Layout {
        let by_name: Vec<(usize, usize)> = a
            .header
            .iter()
            .enumerate()
            .filter_map(|(i, n)| b.header.iter().position(|m| m == n).map(|j| (i, j)))
            .collect();
        let only_a = (0..a.header.len())
            .filter(|i| !by_name.iter().any(|p| p.0 == *i))
            .collect();
        let only_b = (0..b.header.len())
            .filter(|j| !by_name.iter().any(|p| p.1 == *j))
            .collect();
        Layout {
            identical: a.header == b.header,
            by_name,
            only_a,
            only_b,
        }
    }

    /// The rename candidates on each side (none unless both sides have columns of their own).
    pub fn candidates(&self) -> (Vec<usize>, Vec<usize>) {
        if self.only_a.is_empty() || self.only_b.is_empty() {
            return (Vec::new(), Vec::new());
        }
        let cap = |v: &[usize]| v.iter().copied().take(MAX_RENAME_CANDIDATES).collect();
        (cap(&self.only_a), cap(&self.only_b))
    }

    pub fn fp_cols(&self) -> (Option<Vec<usize>>, Option<Vec<usize>>) {
        if self.identical {
            (None, None)
        } else {
            (
                Some(self.by_name.iter().map(|p| p.0).collect()),
                Some(self.by_name.iter().map(|p| p.1).collect()),
            )
        }
    }
}

/// Calls its argument with every matched pair (row in A, row in B) while it returns true;
/// true when it did for all of them.
pub(crate) type PairCheck<'a> = dyn FnMut(&mut dyn FnMut(u64, u64) -> bool) -> bool + 'a;

/// The per-row hashes of each compared column pair whose columns are candidates on both sides,
/// so that renamed columns are compared too: a pair is unchanged only when their cells agree.
pub(crate) fn compared_hashes<'h>(
    compared: &[(usize, usize)],
    cand: (&[usize], &[usize]),
    hashes: (&'h [Vec<u64>], &'h [Vec<u64>]),
) -> Vec<(&'h Vec<u64>, &'h Vec<u64>)> {
    compared
        .iter()
        .filter_map(|&(ci, cj)| {
            let x = cand.0.iter().position(|&c| c == ci)?;
            let y = cand.1.iter().position(|&c| c == cj)?;
            Some((&hashes.0[x], &hashes.1[y]))
        })
        .collect()
}

/// For rows paired by key or lineage: the columns compared and their changes
/// ([`settle_columns`] over `pairs`), and the pairs whose rows differ, by their fingerprints or
/// by the cells of a renamed column, which the second pass reads again.
pub(crate) fn pairs_that_differ(
    (a, b): (&Version, &Version),
    layout: &Layout,
    cand: (&[usize], &[usize]),
    hashes: (&[Vec<u64>], &[Vec<u64>]),
    (fps_a, fps_b): (&[u64], &[u64]),
    pairs: &[(u64, u64)],
) -> Settled {
    let (compared, columns) = settle_columns(a, b, layout, cand, hashes, &mut |check| {
        pairs.iter().all(|&(x, y)| check(x, y))
    });
    let renamed_hashes = compared_hashes(&compared, cand, hashes);
    let differs = |&(x, y): &(u64, u64)| {
        fps_a[x as usize] != fps_b[y as usize]
            || renamed_hashes
                .iter()
                .any(|(ha, hb)| ha[x as usize] != hb[y as usize])
    };
    // Many pairs: both halves at once (each pair a random read of two fingerprints).
    let to_compare = read::each_in_halves(pairs, 1 << 16, |p| differs(p).then_some(*p));
    Settled {
        compared,
        columns,
        to_compare,
    }
}

/// What [`pairs_that_differ`] finds.
pub(crate) struct Settled {
    /// The compared column pairs (A's column, B's column), in B's order.
    pub compared: Vec<(usize, usize)>,
    pub columns: ColumnChanges,
    /// The pairs (row in A, row in B) whose rows differ.
    pub to_compare: Vec<(u64, u64)>,
}

/// Decides renames from the per-row hashes of the candidate columns over the matched pairs
/// `pairs` (row in A, row in B), greedily in header order; returns the compared columns (in B's
/// order) and the column changes.
pub(crate) fn settle_columns(
    a: &Version,
    b: &Version,
    layout: &Layout,
    cand: (&[usize], &[usize]),
    hashes: (&[Vec<u64>], &[Vec<u64>]),
    pairs: &mut PairCheck<'_>,
) -> (Vec<(usize, usize)>, ColumnChanges) {
    let mut renamed: Vec<(usize, usize)> = Vec::new();
    let mut taken = vec![false; cand.1.len()];
    for (x, &ca) in cand.0.iter().enumerate() {
        for (y, &cb) in cand.1.iter().enumerate() {
            if taken[y] {
                continue;
            }
            let (ha, hb) = (&hashes.0[x], &hashes.1[y]);
            let mut any = false;
            let all = pairs(&mut |ra, rb| {
                any = true;
                ha[ra as usize] == hb[rb as usize]
            });
            if all && any {
                taken[y] = true;
                renamed.push((ca, cb));
                break;
            }
        }
    }
    let mut compared: Vec<(usize, usize)> = layout.by_name.clone();
    compared.extend(renamed.iter().copied());
    compared.sort_by_key(|p| p.1);
    let reordered = compared.windows(2).any(|w| w[0].0 > w[1].0);
    let changes = ColumnChanges {
        added: layout
            .only_b
            .iter()
            .filter(|j| !renamed.iter().any(|r| r.1 == **j))
            .map(|&j| b.header[j].clone())
            .collect(),
        removed: layout
            .only_a
            .iter()
            .filter(|i| !renamed.iter().any(|r| r.0 == **i))
            .map(|&i| a.header[i].clone())
            .collect(),
        renamed: renamed
            .iter()
            .map(|&(i, j)| (a.header[i].clone(), b.header[j].clone()))
            .collect(),
        reordered,
    };
    (compared, changes)
}

/// The cells of `ra` and `rb` that differ, over the compared columns.
pub(crate) fn cell_diffs(
    compared: &[(usize, usize)],
    b_header: &[String],
    (a_row, ra): (u64, RowRef<'_>),
    (b_row, rb): (u64, RowRef<'_>),
    out: &mut Vec<CellDiff>,
) -> usize {
    let mut n = 0;
    for &(i, j) in compared {
        if ra.field(i) != rb.field(j) {
            out.push(CellDiff {
                a_row,
                b_row,
                column: b_header[j].clone(),
                old: ra.text(i),
                new: rb.text(j),
            });
            n += 1;
        }
    }
    n
}

/// How many compared cells of the two rows are equal.
pub(crate) fn equal_cells(compared: &[(usize, usize)], ra: RowRef<'_>, rb: RowRef<'_>) -> usize {
    compared
        .iter()
        .filter(|&&(i, j)| ra.field(i) == rb.field(j))
        .count()
}
/// The listing of a comparison: changed and added rows in the second version's order (each
/// changed row with its run of `cells`, which are sorted by the second version's row), then
/// removed rows.
pub(crate) fn listing(
    changed_b: &[u64],
    added: &[u64],
    removed: &[u64],
    cells: &[CellDiff],
) -> Vec<Change> {
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
    changes
}

/// Changed cells per compared column, in the second version's column order.
pub(crate) fn count_by_column(
    compared: &[(usize, usize)],
    b: &Version,
    cells: &[CellDiff],
) -> Vec<(String, u64)> {
    let mut counts: Vec<(String, u64)> = compared
        .iter()
        .map(|&(_, j)| (b.header[j].clone(), 0))
        .collect();
    for c in cells {
        if let Some(e) = counts.iter_mut().find(|e| e.0 == c.column) {
            e.1 += 1;
        }
    }
    counts
}

/// Appends `b_row ← a_row` to the runs, extending the last run when it continues.
pub(crate) fn push_pair(runs: &mut Vec<PairRun>, a_row: u64, b_row: u64, changed: bool) {
    if let Some(r) = runs.last_mut() {
        if r.changed == changed && r.a_start + r.len == a_row && r.b_start + r.len == b_row {
            r.len += 1;
            return;
        }
    }
    runs.push(PairRun {
        a_start: a_row,
        b_start: b_row,
        len: 1,
        changed,
    });
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::intake::{ingest, IngestOptions};
    use crate::model::Agent;

    /// How the second of [`two_versions`] orders its rows.
    #[derive(Debug, Clone, Copy, PartialEq)]
    enum Order {
        /// As the first does.
        Same,
        /// Backwards: no row meets its equal where the first pass would look for it.
        Reversed,
        /// After 20,000 new rows: every equal lies far behind its proportional place.
        AfterNew,
    }

    /// Two versions of one keyed table with changed, removed, added, quoted and repeated-key
    /// rows, a multi-line cell and CRLF line endings in the second, its rows in `order`; about
    /// a megabyte each, so that each is stored in several frames and rows cross from one frame
    /// into the next.
    fn two_versions(dir: &std::path::Path, order: Order) -> (Store, Version, Version) {
        let mut first = String::from("id,shop,amount,note\n");
        let mut second = String::new();
        if order == Order::AfterNew {
            for i in 0..20_000u32 {
                second.push_str(&format!("A{i:05},Ferry Lane,{}.25,early\r\n", i % 89));
            }
        }
        for i in 0..30_000u32 {
            let note = match i % 5 {
                0 => "\"said \"\"later\"\"\"".to_string(),
                1 => "\"two\nlines\"".to_string(),
                _ => format!("n{}", i % 7),
            };
            let row = format!("K{i:05},Mill Row,{}.50,{note}", i % 97);
            first.push_str(&row);
            first.push('\n');
            match i % 11 {
                // Removed.
                3 => {}
                // A changed amount.
                4 => second.push_str(&format!("K{i:05},Mill Row,{}.75,{note}\r\n", i % 97)),
                // The same values, quoted where they were not.
                5 => second.push_str(&format!(
                    "\"K{i:05}\",\"Mill Row\",{}.50,{note}\r\n",
                    i % 97
                )),
                _ => {
                    second.push_str(&row);
                    second.push_str("\r\n");
                }
            }
            if i == 100 {
                // Two rows sharing a key, swapped: paired in order, each pair differs though
                // each row has an equal on the other side, so the first pass may have let
                // them go and the second must read them again.
                let (x, y) = ("D00100,Mill Row,1.00,x", "D00100,Mill Row,2.00,y");
                first.push_str(&format!("{x}\n{y}\n"));
                second.push_str(&format!("{y}\r\n{x}\r\n"));
            }
            if i % 13 == 0 {
                // Added rows, one of them repeating a key.
                second.push_str(&format!("N{i:05},Ferry Lane,1.00,new\r\n"));
            }
        }
        second.push_str("K00007,Ferry Lane,2.00,again\r\n");
        if order == Order::Reversed {
            // Rows hold quoted line breaks: reversed record by record, not line by line.
            let mut records = Vec::new();
            let mut rest = second.as_str();
            while !rest.is_empty() {
                let mut quoted = false;
                let end = rest
                    .char_indices()
                    .find(|&(_, c)| {
                        if c == '"' {
                            quoted = !quoted;
                        }
                        c == '\n' && !quoted
                    })
                    .map_or(rest.len(), |(i, _)| i + 1);
                records.push(&rest[..end]);
                rest = &rest[end..];
            }
            second = records.into_iter().rev().collect();
        }
        let second = format!("id,shop,amount,note\r\n{second}");
        std::fs::write(dir.join("first.csv"), first).unwrap();
        std::fs::write(dir.join("second.csv"), second).unwrap();
        let agent = Agent::new("Robin Example", Some("robin@example.org"), "option");
        let mut store = Store::init_recorded(dir, &agent).unwrap();
        let mut take = |file: &str| {
            let opts = IngestOptions {
                dataset: "orders".into(),
                key: None,
                reason: Some("test".into()),
                delimiter: None,
                has_header: true,
                encoding: None,
                null_tokens: vec![],
                agent: agent.clone(),
            };
            match ingest(&mut store, &dir.join(file), &opts).unwrap() {
                crate::intake::IngestOutcome::Recorded { version, .. } => version,
                crate::intake::IngestOutcome::Unchanged { version } => version,
            }
        };
        let (a, b) = (take("first.csv"), take("second.csv"));
        (store, a, b)
    }

    /// Keeping the versions' bytes between the passes is only a way of reading them: a
    /// comparison by key (listed in full or in part) and one by order give the same answer with
    /// them kept, with only the rows that met no equal kept (in the same order, reversed, or
    /// far from their places; with room to copy them all, or too little, so that the rest is
    /// kept whole), and with every row read again.
    #[test]
    fn a_comparison_is_the_same_whether_or_not_its_bytes_are_kept() {
        for order in [Order::Same, Order::Reversed, Order::AfterNew] {
            same_whether_or_not_kept(order);
        }
    }

    fn same_whether_or_not_kept(order: Order) {
        let dir = tempfile::tempdir().unwrap();
        let (store, a, b) = two_versions(dir.path(), order);
        let by_key = DiffOptions {
            key: KeyChoice::Columns(vec!["id".into()]),
        };
        let by_order = DiffOptions {
            key: KeyChoice::Unkeyed,
        };
        // The rows of the second in another order concern only the first pass by key (the one
        // whose sides meet); compared by order they would only be slow.
        let ways: &[(&DiffOptions, Listing)] = match order {
            Order::Same => &[
                (&by_key, Listing::All),
                (&by_key, Listing::First(25)),
                (&by_order, Listing::All),
            ],
            _ => &[(&by_key, Listing::All)],
        };
        for &(opts, list) in ways {
            assert!(a.n_bytes > 3 * u64::from(crate::store::segments::FRAME_SIZE));
            let kept = diff_keeping(&store, &a, &b, opts, list, u64::MAX).unwrap();
            let again = diff_keeping(&store, &a, &b, opts, list, 0).unwrap();
            assert_eq!(format!("{kept:?}"), format!("{again:?}"), "{order:?}");
            if matches!(opts.key, KeyChoice::Columns(_)) {
                // Room for both versions, and a thirty-second of that for copied rows: about
                // 65 KB, less than the rows that meet no equal in any of the orders.
                let tight =
                    diff_keeping(&store, &a, &b, opts, list, a.n_bytes + b.n_bytes).unwrap();
                assert_eq!(format!("{tight:?}"), format!("{again:?}"), "{order:?}");
            }
            assert!(kept.n_changes > 500, "{}", kept.n_changes);
            assert_eq!(
                kept.duplicates.is_some(),
                matches!(opts.key, KeyChoice::Columns(_))
            );
        }
    }
}
