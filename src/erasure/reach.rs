//! The reach of an erasure: every cell derived from the cells an order names, found forward
//! through the recorded lineage (row maps, column sources, looked-up tables, appends, group
//! summaries, the inferred row maps of outside commands and hand edits). Versions are visited
//! in recording order from a work list, never by recursion: an output is always recorded after
//! its inputs, so when a version is taken from the list everything that reaches it is known.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use crate::error::{Error, ErrorKind, Result};
use crate::model::{Step, Version};
use crate::ops::Operation;
use crate::store::Store;

/// Cells of one version as (0-based data row, 0-based column).
pub type Cells = BTreeSet<(u64, usize)>;

/// What an order reaches in one version.
#[derive(Debug, Clone)]
pub struct Reached {
    pub version: Version,
    /// Cells holding an erased value or one derived from it: erased with the order.
    pub erased: Cells,
    /// Cells of group summaries (and what derives from them) that aggregated an erased value:
    /// kept as published, no longer recomputable from what remains.
    pub kept_unrecomputable: Cells,
}

/// A step the walk could not follow, and why (the cells it made are not in the reach).
#[derive(Debug, Clone)]
pub struct NotFollowed {
    pub step: i64,
    pub version: String,
    pub why: String,
}

/// Every version the order reaches, in recording order.
#[derive(Debug, Clone, Default)]
pub struct Reach {
    pub versions: Vec<Reached>,
    pub not_followed: Vec<NotFollowed>,
    /// Reached versions (`NAME:vN`) whose column profiles an earlier build recorded without
    /// a salt, so that their audit entries' digests still let a guess of an erased extreme be
    /// confirmed (filled by [`super::survey`]).
    pub profiles_committed_unsalted: Vec<String>,
}

impl Reach {
    pub fn n_erased(&self) -> u64 {
        self.versions.iter().map(|r| r.erased.len() as u64).sum()
    }
}

fn inconsistent(msg: String) -> Error {
    ErrorKind::Inconsistent(msg).into()
}

/// The cells reached from `start`'s cells `cells` (which must be in `start`), and from the
/// same cells of every version with the same bytes (see [`walk_with_twins`]).
pub fn walk(store: &Store, start: &Version, cells: Cells) -> Result<Reach> {
    walk_with_twins(store, vec![(start.clone(), cells)])
}

/// A version whose bytes are those of a reached version (the same file received twice, as two
/// datasets or twice into one; a step whose output equals another's) holds the same values in
/// the same cells, and one stored object is both: so its cells are reached too, and the walk is
/// made again from every such twin with the union of the cells reached in any of them, until
/// nothing more is reached (each round adds cells, of which there are finitely many).
pub fn walk_with_twins(store: &Store, starts: Vec<(Version, Cells)>) -> Result<Reach> {
    let all = store.lineage.all_versions()?;
    let mut starts: BTreeMap<i64, (Version, Cells)> =
        starts.into_iter().map(|(v, c)| (v.id, (v, c))).collect();
    loop {
        let reach = walk_from(store, starts.values().cloned().collect())?;
        let mut by_hash: HashMap<&str, Cells> = HashMap::new();
        for r in &reach.versions {
            by_hash
                .entry(r.version.hash.as_str())
                .or_default()
                .extend(r.erased.iter().copied());
        }
        let mut grew = false;
        for w in &all {
            let Some(cells) = by_hash.get(w.hash.as_str()) else {
                continue;
            };
            if cells.is_empty() {
                continue;
            }
            let slot = starts
                .entry(w.id)
                .or_insert_with(|| (w.clone(), Cells::new()));
            let before = slot.1.len();
            slot.1.extend(cells.iter().copied());
            grew |= slot.1.len() > before;
        }
        if !grew {
            return Ok(reach);
        }
    }
}

/// The walk from several versions' cells at once, in recording order.
fn walk_from(store: &Store, starts: Vec<(Version, Cells)>) -> Result<Reach> {
    // Which steps read each version, with the role it had.
    let mut readers: HashMap<i64, Vec<(Step, String)>> = HashMap::new();
    let mut steps = store.lineage.steps(None)?;
    steps.sort_by_key(|s| s.id);
    for s in steps {
        for (role, v) in store.lineage.step_input_versions(s.id)? {
            readers.entry(v.id).or_default().push((s.clone(), role));
        }
    }
    let mut todo: BTreeMap<i64, Reached> = BTreeMap::new();
    for (start, cells) in starts {
        todo.insert(
            start.id,
            Reached {
                version: start,
                erased: cells,
                kept_unrecomputable: Cells::new(),
            },
        );
    }
    let mut out = Reach::default();
    while let Some((_, here)) = todo.pop_first() {
        if here.erased.is_empty() && here.kept_unrecomputable.is_empty() {
            continue;
        }
        for (step, role) in readers.get(&here.version.id).into_iter().flatten() {
            for w in store.lineage.step_outputs(step.id)? {
                let (erased, marked) = match forward(store, step, role, &here, &w)? {
                    Ok(x) => x,
                    Err(why) => {
                        out.not_followed.push(NotFollowed {
                            step: step.id,
                            version: w.label(),
                            why,
                        });
                        continue;
                    }
                };
                let slot = todo.entry(w.id).or_insert_with(|| Reached {
                    version: w.clone(),
                    erased: Cells::new(),
                    kept_unrecomputable: Cells::new(),
                });
                slot.erased.extend(erased);
                slot.kept_unrecomputable.extend(marked);
            }
        }
        out.versions.push(here);
    }
    // A cell both erased (through one path) and marked (through another) is erased.
    for r in &mut out.versions {
        let erased = r.erased.clone();
        r.kept_unrecomputable.retain(|c| !erased.contains(c));
    }
    Ok(out)
}

type Found = std::result::Result<(Cells, Cells), String>;

/// The cells of output `w` of `step` derived from `here`'s reached cells; `Err` with a reason
/// when the step's record does not say.
fn forward(store: &Store, step: &Step, role: &str, here: &Reached, w: &Version) -> Result<Found> {
    let v = &here.version;
    let op: Option<Operation> = step
        .operation
        .as_ref()
        .and_then(|_| serde_json::from_value(step.params.clone()).ok());
    if let Some(Operation::Summarize { by, aggregates }) = &op {
        return summary(store, v, w, by, aggregates, here).map(Ok);
    }
    if role == "table" {
        return match &op {
            Some(Operation::Lookup { on, table_on, .. }) => {
                let table_on = table_on.clone().unwrap_or_else(|| on.clone());
                looked_up(store, v, w, on, &table_on, here).map(Ok)
            }
            _ => Ok(Err(format!(
                "the step used {} as a table of values; cells it changed through erased entries are not followed",
                v.label()
            ))),
        };
    }
    let runs = crate::provenance::row_runs(store, w, v.id)?;
    if runs.is_empty() && w.n_rows > 0 {
        return Ok(Err(format!(
            "the step recorded no row map from {}",
            v.label()
        )));
    }
    let cols = column_map(store, v, w)?;
    let map_cells = |cells: &Cells| -> Cells {
        let mut rows: BTreeMap<u64, Vec<usize>> = BTreeMap::new();
        for &(r, c) in cells {
            rows.entry(r).or_default().push(c);
        }
        let mut got = Cells::new();
        for run in &runs {
            for (&r, cs) in rows.range(run.in_start..run.in_start + run.len) {
                let o = run.out_start + (r - run.in_start);
                for c in cs {
                    for &oc in cols.get(c).into_iter().flatten() {
                        got.insert((o, oc));
                    }
                }
            }
        }
        got
    };
    Ok(Ok((
        map_cells(&here.erased),
        map_cells(&here.kept_unrecomputable),
    )))
}

/// For each column of `v`, the columns of `w` that come from it: those whose recorded sources
/// name it, and the column of the same name when `w`'s column names no source in `v` (the rule
/// `trace` follows backwards).
fn column_map(store: &Store, v: &Version, w: &Version) -> Result<HashMap<usize, Vec<usize>>> {
    let sources = store.lineage.column_sources_from(w.id)?;
    let mut map: HashMap<usize, Vec<usize>> = HashMap::new();
    for (oc, name) in w.header.iter().enumerate() {
        let from: Vec<&String> = sources
            .iter()
            .filter(|(out, id, _)| out == name && *id == v.id)
            .map(|(_, _, c)| c)
            .collect();
        let ins: Vec<usize> = if !from.is_empty() {
            from.iter()
                .filter_map(|c| v.header.iter().position(|h| h == *c))
                .collect()
        } else {
            v.header
                .iter()
                .position(|h| h == name)
                .into_iter()
                .collect()
        };
        for ic in ins {
            map.entry(ic).or_default().push(oc);
        }
    }
    Ok(map)
}

fn positions(v: &Version, names: &[String]) -> Result<Vec<usize>> {
    names
        .iter()
        .map(|n| {
            v.header.iter().position(|h| h == n).ok_or_else(|| {
                inconsistent(format!(
                    "{} has no column \"{n}\" that its step names; run `sluice verify`",
                    v.label()
                ))
            })
        })
        .collect()
}

/// Reads the values of `cols` in each of `rows` of `v` (one pass).
fn values_at(
    store: &Store,
    v: &Version,
    rows: &BTreeSet<u64>,
    cols: &[usize],
) -> Result<BTreeMap<u64, Vec<Vec<u8>>>> {
    let mut got = BTreeMap::new();
    if rows.is_empty() {
        return Ok(got);
    }
    store.objects.each_row(v, |row, r| {
        if rows.contains(&row) {
            got.insert(row, cols.iter().map(|&c| r.field(c).to_vec()).collect());
        }
        Ok(())
    })?;
    Ok(got)
}

/// A group summary: a group whose rows hold a reached cell keeps its aggregates, marked as no
/// longer recomputable; a grouping cell is erased when every row of its group has that cell
/// erased (the value then exists only through erased data).
fn summary(
    store: &Store,
    v: &Version,
    w: &Version,
    by: &[String],
    aggregates: &[crate::ops::summarize::Aggregate],
    here: &Reached,
) -> Result<(Cells, Cells)> {
    let in_by = positions(v, by)?;
    // Output column -> the input column it aggregates (none for a count of rows).
    let aggregated: HashMap<usize, usize> = aggregates
        .iter()
        .filter_map(|a| {
            let oc = w.header.iter().position(|h| *h == a.output_name())?;
            let ic = v.header.iter().position(|h| *h == a.column)?;
            Some((oc, ic))
        })
        .collect();
    let out_by = positions(w, by)?;
    let touched: BTreeSet<u64> = here
        .erased
        .iter()
        .chain(&here.kept_unrecomputable)
        .map(|&(r, _)| r)
        .collect();
    let keys = values_at(store, v, &touched, &in_by)?;
    let wanted: BTreeSet<&Vec<Vec<u8>>> = keys.values().collect();
    // Per affected group and grouping column: rows in the group, rows with that cell erased.
    // Also the input columns with a reached cell in the group.
    type Group = (u64, Vec<u64>, BTreeSet<usize>);
    let mut members: HashMap<Vec<Vec<u8>>, Group> = HashMap::new();
    let reached_cols = |row: u64| {
        here.erased
            .range((row, 0)..(row + 1, 0))
            .chain(here.kept_unrecomputable.range((row, 0)..(row + 1, 0)))
            .map(|&(_, c)| c)
            .collect::<Vec<usize>>()
    };
    store.objects.each_row(v, |row, r| {
        let key: Vec<Vec<u8>> = in_by.iter().map(|&c| r.field(c).to_vec()).collect();
        if wanted.contains(&key) {
            let e = members
                .entry(key)
                .or_insert_with(|| (0, vec![0; in_by.len()], BTreeSet::new()));
            e.0 += 1;
            e.2.extend(reached_cols(row));
            for (k, &c) in in_by.iter().enumerate() {
                if here.erased.contains(&(row, c)) {
                    e.1[k] += 1;
                }
            }
        }
        Ok(())
    })?;
    let mut erased = Cells::new();
    let mut marked = Cells::new();
    store.objects.each_row(w, |row, r| {
        let key: Vec<Vec<u8>> = out_by.iter().map(|&c| r.field(c).to_vec()).collect();
        if let Some((n, erased_by, cols)) = members.get(&key) {
            for c in 0..w.header.len() {
                match (out_by.iter().position(|&b| b == c), aggregated.get(&c)) {
                    (Some(k), _) if erased_by[k] == *n => {
                        erased.insert((row, c));
                    }
                    (Some(_), _) => {}
                    // An aggregate of a column none of the group's reached cells is in.
                    (None, Some(ic)) if !cols.contains(ic) => {}
                    (None, _) => {
                        marked.insert((row, c));
                    }
                }
            }
        }
        Ok(())
    })?;
    Ok((erased, marked))
}

/// A looked-up table: the output rows whose key finds a reached table row take its reached
/// cells in the columns taken from them.
fn looked_up(
    store: &Store,
    table: &Version,
    w: &Version,
    on: &[String],
    table_on: &[String],
    here: &Reached,
) -> Result<(Cells, Cells)> {
    let t_key = positions(table, table_on)?;
    let w_key = positions(w, on)?;
    let sources = store.lineage.column_sources_from(w.id)?;
    // Table column -> output columns taken from it.
    let mut taken: HashMap<usize, Vec<usize>> = HashMap::new();
    for (out, id, col) in &sources {
        if *id == table.id {
            if let (Some(tc), Some(oc)) = (
                table.header.iter().position(|h| h == col),
                w.header.iter().position(|h| h == out),
            ) {
                taken.entry(tc).or_default().push(oc);
            }
        }
    }
    let rows: BTreeSet<u64> = here
        .erased
        .iter()
        .chain(&here.kept_unrecomputable)
        .map(|&(r, _)| r)
        .collect();
    let keys = values_at(store, table, &rows, &t_key)?;
    let mut by_key: HashMap<&Vec<Vec<u8>>, Vec<u64>> = HashMap::new();
    for (r, k) in &keys {
        by_key.entry(k).or_default().push(*r);
    }
    let mut erased = Cells::new();
    let mut marked = Cells::new();
    store.objects.each_row(w, |row, r| {
        let key: Vec<Vec<u8>> = w_key.iter().map(|&c| r.field(c).to_vec()).collect();
        for tr in by_key.get(&key).into_iter().flatten() {
            for (set, into) in [
                (&here.erased, &mut erased),
                (&here.kept_unrecomputable, &mut marked),
            ] {
                for (&tc, ocs) in &taken {
                    if set.contains(&(*tr, tc)) {
                        into.extend(ocs.iter().map(|&oc| (row, oc)));
                    }
                }
            }
        }
        Ok(())
    })?;
    Ok((erased, marked))
}
