//! Erasure orders: what a request to erase personal data names in a raw version (rows matching a
//! predicate or a key, given cells, whole columns), who asks, why and under which request, and
//! everything that reaches forward from it ([`reach`]). The salted cell commitments that keep
//! the proof of the rest are [`crate::commitment`].

pub mod carry;
pub mod reach;

use serde::Serialize;

use crate::error::{Error, Result};
use crate::model::{StepKind, Version};
use crate::ops::predicate::Predicate;
use crate::store::Store;

/// What an order names in its raw version.
#[derive(Debug, Clone, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Target {
    /// Every cell of the rows where the predicate holds (the predicate language of `keep` and
    /// `drop`).
    RowsWhere(String),
    /// Every cell of the rows whose columns hold these values.
    RowsWithKey(Vec<(String, String)>),
    /// Single cells: 1-based data row and column name.
    Cells(Vec<(u64, String)>),
    /// Every cell of these columns.
    Columns(Vec<String>),
}

impl Target {
    /// In words, for the dry run and the audit entry.
    pub fn describe(&self) -> String {
        match self {
            Target::RowsWhere(p) => format!("the rows where {p}"),
            Target::RowsWithKey(pairs) => format!(
                "the rows with {}",
                pairs
                    .iter()
                    .map(|(c, v)| format!("{c} = \"{v}\""))
                    .collect::<Vec<_>>()
                    .join(" and ")
            ),
            Target::Cells(cells) => format!(
                "the cells {}",
                cells
                    .iter()
                    .map(|(r, c)| format!("row {r} {c}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            Target::Columns(cols) => format!("the columns {}", cols.join(", ")),
        }
    }
}

/// An erasure order as asked: its raw version, what it names, the request it answers.
#[derive(Debug, Clone)]
pub struct Order {
    pub version: Version,
    pub target: Target,
    /// A free-text reference to the request or its legal basis.
    pub request: String,
}

/// The raw version an order may name: one received from outside (an intake), not a version
/// made from others (erasing there would leave the raw copy whole).
pub fn raw_version(store: &Store, v: &Version) -> Result<()> {
    let step = store.lineage.step(v.step_id)?;
    match step {
        Some(s) if s.kind == StepKind::Ingest => Ok(()),
        _ => Err(Error::usage(format!(
            "{} was made by a step, not received; an erasure order names the raw version the data came in with (find it with `sluice trace`)",
            v.label()
        ))),
    }
}

fn column(v: &Version, name: &str) -> Result<usize> {
    v.header.iter().position(|h| h == name).ok_or_else(|| {
        Error::usage(format!(
            "{} has no column \"{name}\"; its columns are: {}",
            v.label(),
            v.header.join(", ")
        ))
    })
}

/// The cells of the raw version the order names (0-based row, column).
pub fn named_cells(store: &Store, order: &Order) -> Result<reach::Cells> {
    let v = &order.version;
    let n_cols = v.header.len();
    let mut cells = reach::Cells::new();
    match &order.target {
        Target::RowsWhere(text) => {
            let p = Predicate::parse(text, &v.header)?;
            let nulls: Vec<&[u8]> = v.null_tokens.iter().map(|t| t.as_bytes()).collect();
            let blank = |x: &[u8]| x.is_empty() || nulls.contains(&x);
            store.objects.each_row(v, |row, r| {
                if p.holds(&r, &blank) {
                    cells.extend((0..n_cols).map(|c| (row, c)));
                }
                Ok(())
            })?;
        }
        Target::RowsWithKey(pairs) => {
            let cols: Vec<usize> = pairs
                .iter()
                .map(|(c, _)| column(v, c))
                .collect::<Result<_>>()?;
            store.objects.each_row(v, |row, r| {
                if cols
                    .iter()
                    .zip(pairs)
                    .all(|(&c, (_, want))| r.field(c) == want.as_bytes())
                {
                    cells.extend((0..n_cols).map(|c| (row, c)));
                }
                Ok(())
            })?;
        }
        Target::Cells(list) => {
            for (row, name) in list {
                if *row == 0 || *row > v.n_rows {
                    return Err(Error::usage(format!(
                        "{} has data rows 1 to {}; row {row} is not one of them",
                        v.label(),
                        v.n_rows
                    )));
                }
                cells.insert((row - 1, column(v, name)?));
            }
        }
        Target::Columns(names) => {
            let cols: Vec<usize> = names.iter().map(|c| column(v, c)).collect::<Result<_>>()?;
            for row in 0..v.n_rows {
                cells.extend(cols.iter().map(|&c| (row, c)));
            }
        }
    }
    if cells.is_empty() {
        return Err(Error::usage(format!(
            "no cell of {} is {}; check the values with `sluice retrieve {}`",
            v.label(),
            order.target.describe(),
            v.label()
        )));
    }
    Ok(cells)
}

/// What the order reaches, found without changing anything: the dry run. Cells earlier orders
/// erased (or kept as published) are left out, and so is a version with nothing left to do.
pub fn survey(store: &Store, order: &Order) -> Result<reach::Reach> {
    raw_version(store, &order.version)?;
    let cells = named_cells(store, order)?;
    let mut reach = reach::walk(store, &order.version, cells)?;
    let earlier = store.lineage.erased_versions()?;
    if !earlier.is_empty() {
        for r in &mut reach.versions {
            let n_cols = r.version.header.len() as u64;
            let mut erased = std::collections::BTreeSet::new();
            let mut marked = std::collections::BTreeSet::new();
            for e in earlier.iter().filter(|e| e.version_id == r.version.id) {
                erased.extend(
                    e.kept
                        .chunks_exact(40)
                        .filter_map(|c| Some(u64::from_le_bytes(c[..8].try_into().ok()?))),
                );
                marked.extend(
                    e.marked
                        .chunks_exact(8)
                        .filter_map(|c| Some(u64::from_le_bytes(c.try_into().ok()?))),
                );
            }
            r.erased
                .retain(|&(row, c)| !erased.contains(&(row * n_cols + c as u64)));
            r.kept_unrecomputable.retain(|&(row, c)| {
                let i = row * n_cols + c as u64;
                !erased.contains(&i) && !marked.contains(&i)
            });
        }
        let start = order.version.id;
        if !reach
            .versions
            .iter()
            .any(|r| r.version.id == start && !r.erased.is_empty())
        {
            return Err(Error::usage(format!(
                "every cell of {} that is {} was erased already by an earlier erasure order; `sluice verify` names the orders",
                order.version.label(),
                order.target.describe()
            )));
        }
        reach
            .versions
            .retain(|r| !r.erased.is_empty() || !r.kept_unrecomputable.is_empty());
    }
    for r in &reach.versions {
        if store.lineage.profile_unsalted(r.version.id)? {
            reach.profiles_committed_unsalted.push(r.version.label());
        }
    }
    Ok(reach)
}

/// A step that cannot be reproduced past an erasure, and why.
#[derive(Debug, Clone, Serialize)]
pub struct Unreproducible {
    pub step: i64,
    /// The version whose cells were erased: the step's input, or its own output for a
    /// version received from outside.
    pub version: String,
    pub order: i64,
    pub why: String,
}

/// The steps among `steps` (store-wide numbers) that read, or received, a version an erasure
/// order reached: computed again now they would read its erased form and cannot give the
/// recorded hash, and the bytes they read as recorded exist nowhere.
pub fn unreproducible(
    store: &Store,
    steps: impl IntoIterator<Item = i64>,
) -> Result<Vec<Unreproducible>> {
    let mut out = Vec::new();
    let erased = store.lineage.erased_versions()?;
    for id in steps {
        let mut read: Vec<Version> = store
            .lineage
            .step_input_versions(id)?
            .into_iter()
            .map(|(_, v)| v)
            .collect();
        let received = store
            .lineage
            .step(id)?
            .is_some_and(|s| s.kind == StepKind::Ingest);
        if received {
            read.extend(store.lineage.step_outputs(id)?);
        }
        for v in read {
            let orders: Vec<_> = erased.iter().filter(|e| e.version_id == v.id).collect();
            let Some(last) = orders.last() else {
                continue;
            };
            let n: u64 = orders.iter().map(|e| e.n_erased).sum();
            let what = if received { "received" } else { "read" };
            let numbers: Vec<String> = orders.iter().map(|e| e.order_id.to_string()).collect();
            out.push(Unreproducible {
                step: id,
                version: v.label(),
                order: last.order_id,
                why: format!(
                    "the {} it {what} lost {} under erasure order{} {}; its recorded bytes exist nowhere now",
                    v.label(),
                    if n == 1 {
                        "1 cell".to_string()
                    } else {
                        format!("{n} cells")
                    },
                    if numbers.len() == 1 { "" } else { "s" },
                    numbers.join(", ")
                ),
            });
            break;
        }
    }
    Ok(out)
}

/// The message a command gives when steps cannot be reproduced past an erasure.
pub fn unreproducible_message(what: &str, blocked: &[Unreproducible]) -> String {
    let lines: Vec<String> = blocked
        .iter()
        .map(|b| format!("  step {}: {}", b.step, b.why))
        .collect();
    format!(
        "{what} cannot be reproduced past an erasure: {} on the way read data an erasure order removed\n{}\n(the versions keep their names and `sluice verify` proves their remaining cells; the erased values are gone by design)",
        if blocked.len() == 1 {
            "1 step".to_string()
        } else {
            format!("{} steps", blocked.len())
        },
        lines.join("\n")
    )
}

/// What erasure orders did to one cell of a version, as the commands that show cells say it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct CellErasure {
    /// `erased`: the value is gone from the store; `kept_as_published`: a summary cell that
    /// aggregated erased values, kept as it was published and no longer computable again.
    pub what: &'static str,
    /// The order that did it, its request and when it was carried out.
    pub order: i64,
    pub request: String,
    pub ordered_at: String,
}

/// What the orders did to cell (`row`, 0-based data row; `column`) of `v`, if anything: the
/// first order whose record of `v` names the cell as erased, or as a summary cell kept as
/// published.
pub fn cell_erasure(
    store: &Store,
    v: &Version,
    row: u64,
    column: &str,
) -> Result<Option<CellErasure>> {
    let Some(col) = v.header.iter().position(|h| h == column) else {
        return Ok(None);
    };
    let cell = row
        .checked_mul(v.header.len() as u64)
        .and_then(|c| c.checked_add(col as u64));
    let Some(cell) = cell else {
        return Ok(None);
    };
    // Kept leaves are a cell number (u64 LE) and a leaf each; marked cells, numbers alone.
    let names = |b: &[u8], width: usize| {
        b.chunks_exact(width)
            .any(|c| c.get(..8).and_then(|n| n.try_into().ok()) == Some(cell.to_le_bytes()))
    };
    let found = store
        .lineage
        .erasures_of_version(v.id)?
        .into_iter()
        .find_map(|e| {
            if names(&e.kept, 40) {
                Some((e.order_id, "erased"))
            } else if names(&e.marked, 8) {
                Some((e.order_id, "kept_as_published"))
            } else {
                None
            }
        });
    let Some((order, what)) = found else {
        return Ok(None);
    };
    let o = store
        .lineage
        .erasure_orders()?
        .into_iter()
        .find(|o| o.id == order)
        .ok_or_else(|| order_missing(order, v))?;
    Ok(Some(CellErasure {
        what,
        order,
        request: o.request,
        ordered_at: o.ordered_at,
    }))
}

/// One order that reached a version: how many of the version's cells it erased (beyond those
/// earlier orders erased) and how many summary cells it kept as published.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct VersionErasure {
    pub version: String,
    pub order: i64,
    pub request: String,
    pub ordered_at: String,
    pub cells_erased: u64,
    pub cells_kept_as_published: u64,
}

/// Every order that reached `v`, oldest first (none for a version no order reached).
pub fn orders_reaching(store: &Store, v: &Version) -> Result<Vec<VersionErasure>> {
    let records = store.lineage.erasures_of_version(v.id)?;
    if records.is_empty() {
        return Ok(Vec::new());
    }
    let orders = store.lineage.erasure_orders()?;
    let mut out: Vec<VersionErasure> = Vec::new();
    // Each record keeps the erased cells of every order up to its own.
    let (mut erased_before, mut kept_before) = (0u64, 0u64);
    for e in records {
        let (erased, kept) = ((e.kept.len() / 40) as u64, (e.marked.len() / 8) as u64);
        let o = orders
            .iter()
            .find(|o| o.id == e.order_id)
            .ok_or_else(|| order_missing(e.order_id, v))?;
        out.push(VersionErasure {
            version: v.label(),
            order: o.id,
            request: o.request.clone(),
            ordered_at: o.ordered_at.clone(),
            cells_erased: erased.saturating_sub(erased_before),
            cells_kept_as_published: kept.saturating_sub(kept_before),
        });
        (erased_before, kept_before) = (erased.max(erased_before), kept.max(kept_before));
    }
    Ok(out)
}

fn order_missing(order: i64, v: &Version) -> Error {
    crate::error::ErrorKind::Inconsistent(format!(
        "erasure order {order}, named by the record of {}, is missing; run `sluice verify`",
        v.label()
    ))
    .into()
}
