//! Explaining a cell of a group summary: which input rows make it, the exact arithmetic (done
//! again from the stored input and checked against the stored value), and what happened
//! upstream to rows that would have been in the group: the rows each earlier step dropped, and
//! the cells of the aggregated column earlier steps changed or noted. This answers "why does the
//! cleaned total differ from the raw export".
//!
//! "Would have fallen in this group" is decided like this: a row a step dropped counts for the
//! group when its values in the group columns, as they were in the version it was dropped from
//! (under their names there, following renames back), equal the group's values. Later steps'
//! cell changes are not applied to dropped rows. When a group column did not exist yet where
//! a step dropped rows (it was made by a later step, e.g. looked up or extracted), those drops
//! cannot be placed in a group; they are counted as undecided, not guessed.

use serde::Serialize;

use crate::diff::read::rows_of;
use crate::error::{Error, ErrorKind, Result};
use crate::model::{StepKind, Version};
use crate::ops::summarize::{AggFunc, AggState, NotAdded};
use crate::ops::Operation;
use crate::refs;
use crate::store::Store;
use crate::trace::RowPick;

/// How many rows a listing shows unless asked otherwise.
pub const DEFAULT_LIMIT: usize = 10;

#[derive(Debug, Clone, Serialize)]
pub struct Explanation {
    pub version: String,
    pub hash: String,
    /// 1-based data row of the summary.
    pub row: u64,
    pub column: String,
    pub value: String,
    /// The group: (column, value) of the summary's `by` columns.
    pub group: Vec<(String, String)>,
    /// "count", "sum", "mean", "min" or "max".
    pub aggregate: String,
    /// The column aggregated (none for `count`).
    pub of_column: Option<String>,
    /// The arithmetic in words: "sum of 412 values = 48210.50".
    pub arithmetic: String,
    /// The value computed again from the stored input.
    pub recomputed: String,
    /// Whether it equals the stored value.
    pub agrees: bool,
    /// The stored value is kept as published under an erasure order that erased values it
    /// aggregated: computed again from what the store holds now, it is not expected to agree.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub kept_as_published: Option<crate::erasure::CellErasure>,
    /// The summary's input version.
    pub input: String,
    pub contributing: Contributing,
    /// Every earlier step, newest first, that dropped rows of this group or changed or noted
    /// cells of the aggregated column in its rows.
    pub upstream: Vec<Upstream>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Contributing {
    /// Rows of the input in the group.
    pub rows: u64,
    /// Of them, rows with a value in the aggregated column.
    pub with_value: u64,
    /// The first rows (1-based data rows of the input) with their values.
    pub first: Vec<(u64, String)>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Upstream {
    pub step: i64,
    pub operation: Option<String>,
    pub why: Option<String>,
    /// The version the step made and the one it read.
    pub produced: String,
    pub read: String,
    /// Rows of the group the step dropped, one entry per reason (every duplicate under one
    /// reason, whatever row it duplicated), at most `limit` reasons.
    pub dropped: Vec<DroppedFor>,
    /// Reasons beyond the listed ones, and the rows dropped for them.
    pub more_reasons: u64,
    pub more_reason_rows: u64,
    /// Rows the step dropped that cannot be placed in a group (a group column did not exist
    /// yet in the version it read).
    pub undecided: u64,
    /// Cells of the aggregated column, in rows of the group, the step changed.
    pub changed_cells: u64,
    /// Cells of the aggregated column, in rows of the group, the step noted, per note (at most
    /// `limit` notes).
    pub noted: Vec<(String, u64)>,
    /// Notes beyond the listed ones, and the cells they were made on.
    pub more_notes: u64,
    pub more_note_cells: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct DroppedFor {
    pub reason: String,
    pub rows: u64,
    /// The first rows, 1-based data rows of the version the step read.
    pub first: Vec<u64>,
    /// For duplicates: the row each of `first` duplicated (1-based, same version), in the
    /// same order; empty for other reasons.
    pub first_duplicate_of: Vec<u64>,
}

/// Explains cell `column` of the summary row `row` of `reference`.
pub fn explain(
    store: &Store,
    reference: &str,
    row: &RowPick,
    column: &str,
    limit: usize,
) -> Result<Explanation> {
    let v = refs::resolve(&store.lineage, reference)?;
    let step = store.lineage.step(v.step_id)?.ok_or_else(|| lost(&v))?;
    let Ok(Operation::Summarize { by, aggregates }) =
        serde_json::from_value::<Operation>(step.params.clone())
    else {
        return Err(Error::usage(format!(
            "{} was not made by summarize, so its cells are not totals; follow a cell with `sluice trace {} --row N --column COL`",
            v.label(),
            v.label()
        )));
    };
    let (func, of_column) = if column == "count" {
        (None, None)
    } else {
        let a = aggregates
            .iter()
            .find(|a| a.output_name() == column)
            .ok_or_else(|| {
                Error::usage(format!(
                    "column \"{column}\" of {} is not an aggregate; its aggregates are: count{}",
                    v.label(),
                    aggregates
                        .iter()
                        .map(|a| format!(", {}", a.output_name()))
                        .collect::<String>()
                ))
            })?;
        (Some(a.func), Some(a.column.clone()))
    };
    let r = match row {
        RowPick::Number(n) if *n >= 1 && *n <= v.n_rows => n - 1,
        RowPick::Number(n) => {
            return Err(Error::usage(format!(
                "{} has data rows 1 to {}; there is no row {n} (rows count from 1 after the header, as `sluice retrieve {}` writes them)",
                v.label(),
                v.n_rows,
                v.label()
            )))
        }
        RowPick::Key(_) => crate::trace::row_of(store, &v, row)?,
    };
    let summary_row = rows_of(&store.objects, &v, &[r])?;
    let cells = summary_row.get(r).ok_or_else(|| lost(&v))?.texts();
    let at = |name: &str| {
        v.header
            .iter()
            .position(|h| h == name)
            .map(|i| cells[i].clone())
            .unwrap_or_default()
    };
    let value = at(column);
    let group: Vec<(String, String)> = by.iter().map(|c| (c.clone(), at(c))).collect();

    let input = store
        .lineage
        .step_input_versions(step.id)?
        .into_iter()
        .find(|(role, _)| role == "input")
        .map(|(_, i)| i)
        .ok_or_else(|| lost(&v))?;
    let col_idx = |ver: &Version, name: &str| ver.header.iter().position(|h| h == name);
    let by_idx: Vec<usize> = by
        .iter()
        .map(|c| col_idx(&input, c).ok_or_else(|| lost(&input)))
        .collect::<Result<_>>()?;
    let agg_idx = match &of_column {
        Some(c) => Some(col_idx(&input, c).ok_or_else(|| lost(&input))?),
        None => None,
    };
    let blank_tokens: Vec<Vec<u8>> = input
        .null_tokens
        .iter()
        .map(|t| t.as_bytes().to_vec())
        .collect();
    let blank = |b: &[u8]| b.is_empty() || blank_tokens.iter().any(|t| t.as_slice() == b);

    // The group's rows in the input, and the aggregate computed again.
    let mut members: Vec<u64> = Vec::new();
    let mut first: Vec<(u64, String)> = Vec::new();
    let mut agg = AggState::default();
    let mut overflow = false;
    store.objects.each_row(&input, |row, rec| {
        if !by_idx
            .iter()
            .zip(&group)
            .all(|(&c, (_, want))| rec.field(c) == want.as_bytes())
        {
            return Ok(());
        }
        members.push(row);
        if first.len() < limit {
            let text = agg_idx
                .map(|c| String::from_utf8_lossy(rec.field(c)).into_owned())
                .unwrap_or_default();
            first.push((row + 1, text));
        }
        if let Some(c) = agg_idx {
            let b = rec.field(c);
            // The summary refused values that are not numbers; it recorded none.
            if !blank(b) && matches!(agg.add(b), Err(NotAdded::Overflow)) {
                overflow = true;
            }
        }
        Ok(())
    })?;
    if overflow {
        return Err(ErrorKind::Data(format!(
            "the sum of the group in {} does not fit in 38 significant digits",
            input.label()
        ))
        .into());
    }
    let count = members.len() as u64;
    let (aggregate, recomputed, arithmetic) = match func {
        None => (
            "count".to_string(),
            count.to_string(),
            format!("count of rows = {count}"),
        ),
        Some(f) => {
            let of = of_column.clone().unwrap_or_default();
            let (n_values, sum) = (agg.n_values, agg.sum);
            let name = f.name();
            let result = agg.value(f);
            let values = if n_values == 1 { "value" } else { "values" };
            let words = match f {
                AggFunc::Mean => format!(
                    "mean of {n_values} {values} of {of} = {sum} / {n_values} = {result} (half to even, 6 places)"
                ),
                _ => format!("{name} of {n_values} {values} of {of} = {result}"),
            };
            let blanks = count - n_values;
            let words = if blanks > 0 {
                format!("{words}; {blanks} of the {count} rows have no value")
            } else {
                words
            };
            (name.to_string(), result, words)
        }
    };

    let upstream = upstream(store, &input, &members, &group, of_column.as_deref(), limit)?;
    let kept_as_published = crate::erasure::cell_erasure(store, &v, r, column)?;
    Ok(Explanation {
        kept_as_published,
        version: v.label(),
        hash: v.hash.clone(),
        row: r + 1,
        column: column.to_string(),
        agrees: recomputed == value,
        value,
        group,
        aggregate,
        of_column,
        arithmetic,
        recomputed,
        input: input.label(),
        contributing: Contributing {
            rows: count,
            with_value: agg.n_values,
            first,
        },
        upstream,
    })
}

fn lost(v: &Version) -> Error {
    ErrorKind::Inconsistent(format!(
        "the record of {} is incomplete; run `sluice verify`",
        v.label()
    ))
    .into()
}

/// Walks from `start` back to the raw data along the row maps, carrying the group's rows back
/// through each step (into both sources of an append) and the group and aggregated columns'
/// names back through renames.
fn upstream(
    store: &Store,
    start: &Version,
    members: &[u64],
    group: &[(String, String)],
    of_column: Option<&str>,
    limit: usize,
) -> Result<Vec<Upstream>> {
    let mut out = Vec::new();
    let names: Vec<Option<String>> = group.iter().map(|(c, _)| Some(c.clone())).collect();
    walk(
        store,
        start.clone(),
        members.to_vec(),
        names,
        of_column.map(str::to_string),
        group,
        limit,
        &mut out,
        0,
    )?;
    Ok(out)
}

/// Operations whose column sources are renames (same values, another name); the sources of
/// other operations make new values (split, combine, extract, lookup, summarize).
fn renames(operation: Option<&str>) -> bool {
    matches!(operation, Some("rename" | "select" | "append"))
}

#[allow(clippy::too_many_arguments)]
fn walk(
    store: &Store,
    v: Version,
    rows: Vec<u64>,
    names: Vec<Option<String>>,
    of_name: Option<String>,
    group: &[(String, String)],
    limit: usize,
    out: &mut Vec<Upstream>,
    depth: usize,
) -> Result<()> {
    if depth > 256 || rows.is_empty() {
        return Ok(());
    }
    let step = store.lineage.step(v.step_id)?.ok_or_else(|| lost(&v))?;
    if step.kind == StepKind::Ingest {
        return Ok(());
    }
    let inputs = store.lineage.step_input_versions(step.id)?;
    let sources = store.lineage.column_sources_from(v.id)?;
    let back = |name: &Option<String>, input: &Version| -> Option<String> {
        let name = name.as_ref()?;
        let mine: Vec<&(String, i64, String)> =
            sources.iter().filter(|(o, _, _)| o == name).collect();
        if mine.is_empty() {
            return input.header.contains(name).then(|| name.clone());
        }
        if !renames(step.operation.as_deref()) {
            // Made from other values: the column did not exist before this step.
            return None;
        }
        match mine.iter().find(|(_, id, _)| *id == input.id) {
            Some((_, _, i)) => Some(i.clone()),
            // Renamed from another input only (an append's other source): this one has it
            // under its own name.
            None => input.header.contains(name).then(|| name.clone()),
        }
    };

    // Changed and noted cells of the aggregated column in the group's rows.
    let mut changed_cells = 0;
    let mut noted: Vec<(String, u64)> = Vec::new();
    if let Some(of) = &of_name {
        // Both lists are in increasing order: count the rows they share in one walk.
        for (col, changed) in crate::provenance::cell_changes_rows(store, &v)? {
            if col == *of {
                let (mut i, mut j) = (0, 0);
                while i < rows.len() && j < changed.len() {
                    match rows[i].cmp(&changed[j]) {
                        std::cmp::Ordering::Less => i += 1,
                        std::cmp::Ordering::Greater => j += 1,
                        std::cmp::Ordering::Equal => {
                            changed_cells += 1;
                            i += 1;
                            j += 1;
                        }
                    }
                }
            }
        }
        for (row, col, note) in store.lineage.cell_notes(v.id)? {
            if col == *of && rows.binary_search(&row).is_ok() {
                match noted.iter_mut().find(|(n, _)| *n == note) {
                    Some((_, k)) => *k += 1,
                    None => noted.push((note, 1)),
                }
            }
        }
    }

    // The rows the step dropped from its main input, placed in the group or not.
    let mut dropped: Vec<DroppedFor> = Vec::new();
    let mut undecided = 0;
    let main = inputs
        .iter()
        .find(|(role, _)| role == "input")
        .map(|(_, i)| i.clone());
    if let Some(input) = &main {
        let drops = crate::provenance::drops(store, step.id, input.id)?;
        let at_input: Vec<Option<String>> = names.iter().map(|n| back(n, input)).collect();
        if !drops.is_empty() {
            if at_input.iter().all(Option::is_some) {
                let idx: Vec<usize> = at_input
                    .iter()
                    .map(|n| {
                        n.as_ref()
                            .and_then(|n| input.header.iter().position(|h| h == n))
                            .ok_or_else(|| lost(input))
                    })
                    .collect::<Result<_>>()?;
                let wanted: Vec<u64> = drops.iter().map(|d| d.row_idx).collect();
                let got = rows_of(&store.objects, input, &wanted)?;
                for d in &drops {
                    let Some(rec) = got.get(d.row_idx) else {
                        continue;
                    };
                    let in_group = idx
                        .iter()
                        .zip(group)
                        .all(|(&c, (_, want))| rec.field(c) == want.as_bytes());
                    if !in_group {
                        continue;
                    }
                    let reason = grouped_reason(d);
                    match dropped.iter_mut().find(|x| x.reason == reason) {
                        Some(x) => {
                            x.rows += 1;
                            if x.first.len() < limit {
                                x.first.push(d.row_idx + 1);
                                x.first_duplicate_of.extend(d.duplicate_of.map(|r| r + 1));
                            }
                        }
                        None => dropped.push(DroppedFor {
                            reason,
                            rows: 1,
                            first: if limit > 0 {
                                vec![d.row_idx + 1]
                            } else {
                                Vec::new()
                            },
                            first_duplicate_of: if limit > 0 {
                                d.duplicate_of.map(|r| r + 1).into_iter().collect()
                            } else {
                                Vec::new()
                            },
                        }),
                    }
                }
            } else {
                undecided = drops.len() as u64;
            }
        }
    }
    if !dropped.is_empty() || undecided > 0 || changed_cells > 0 || !noted.is_empty() {
        // The most frequent reasons and notes first; the rest counted.
        dropped.sort_by_key(|d| std::cmp::Reverse(d.rows));
        let rest = dropped.split_off(limit.min(dropped.len()));
        let (more_reasons, more_reason_rows) =
            (rest.len() as u64, rest.iter().map(|d| d.rows).sum());
        noted.sort_by_key(|n| std::cmp::Reverse(n.1));
        let rest = noted.split_off(limit.min(noted.len()));
        let (more_notes, more_note_cells) = (rest.len() as u64, rest.iter().map(|n| n.1).sum());
        out.push(Upstream {
            step: step.id,
            operation: step.operation.clone(),
            why: step.reason.clone(),
            produced: v.label(),
            read: main.as_ref().map(Version::label).unwrap_or_default(),
            dropped,
            more_reasons,
            more_reason_rows,
            undecided,
            changed_cells,
            noted,
            more_notes,
            more_note_cells,
        });
    }

    // The group's rows, back in each input that carries some of them.
    for (_, input) in &inputs {
        let runs = crate::provenance::row_runs(store, &v, input.id)?;
        if runs.is_empty() {
            continue;
        }
        let mut prev: Vec<u64> = Vec::new();
        for &r in &rows {
            if let Some(row) = crate::model::input_of(&runs, r) {
                prev.push(row);
            }
        }
        if prev.is_empty() {
            continue;
        }
        prev.sort_unstable();
        let names_there: Vec<Option<String>> = names.iter().map(|n| back(n, input)).collect();
        let of_there = back(&of_name, input);
        walk(
            store,
            input.clone(),
            prev,
            names_there,
            of_there,
            group,
            limit,
            out,
            depth + 1,
        )?;
    }
    Ok(())
}

/// The reason a drop is listed under: a duplicate's reason without the row it duplicated, so
/// that every duplicate a step dropped is one line.
fn grouped_reason(d: &crate::model::Drop) -> String {
    match d.duplicate_of {
        Some(of) => {
            let stored = d
                .reason
                .strip_prefix(&format!("duplicate of data row {}", of + 1))
                .unwrap_or("")
                .trim();
            if stored.is_empty() {
                "duplicate of an earlier row".to_string()
            } else {
                format!("duplicate of an earlier row {stored}")
            }
        }
        None => d.reason.clone(),
    }
}
