//! Steps recorded from dataframe code (the Python package's `Store.record`): the frame the code
//! produced, written to a file, recorded as the successor of the version the code read, with
//! the row map taken from the row labels the frame kept (each output row's 0-based row of the
//! input version, as pandas' index or a row-id column carries it). When the labels are there,
//! unique and inside the input, the row map is exact, changed cells are found by comparing the
//! rows the labels pair, column by column name, and the step is marked `exact`; otherwise the
//! lineage is inferred by a diff ([`crate::inferred`]) and the step says why.
//!
//! The step is of kind `command`; its code record names the calling file and line, the source
//! of the function or cell when known, and the code state of the repository it lies in
//! ([`crate::code::code_state`]), as for outside commands.

use std::collections::HashMap;
use std::path::Path;

use serde_json::json;

use crate::diff::MatchedBy;
use crate::error::Result;
use crate::inferred::{self, InferredLineage, RecordedSuccessor, Successor};
use crate::intake::{self, IngestOptions, Prepared};
use crate::model::{RowRun, StepKind, Version};
use crate::provenance::{ChangeLog, DropLog};
use crate::refs;
use crate::store::Store;

/// What the Python side knows of the code that made the frame.
#[derive(Debug, Clone, Default)]
pub struct CallingCode {
    /// The file and 1-based line of the call, and the folder the file is in (for git).
    pub file: String,
    pub line: u64,
    pub folder: std::path::PathBuf,
    /// The function's or notebook cell's source, when Python could read it.
    pub source: Option<String>,
    /// Where the labels came from, e.g. "pandas index" or "column sluice_row".
    pub labels_from: String,
}

/// How to record the frame.
#[derive(Debug, Clone)]
pub struct LabelledOptions {
    /// The dataset, reason and agent of the new version.
    pub ingest: IngestOptions,
    /// The version the code read.
    pub from: String,
    /// Per output row, the 0-based input row its label names; `None` when the labels were lost.
    pub labels: Option<Vec<i64>>,
    pub code: CallingCode,
}

/// What [`record`] did.
#[derive(Debug, Clone)]
pub enum LabelledOutcome {
    Recorded {
        recorded: Box<RecordedSuccessor>,
        /// Whether the row map came from the labels (exact) or a diff (inferred).
        exact: bool,
        /// Why the labels could not be used, when they could not.
        fallback: Option<String>,
    },
    /// The bytes equal the dataset's latest version: nothing was recorded.
    Unchanged { version: Box<Version> },
}

/// Why labels cannot make a row map, or `None` when they can.
fn unusable(labels: Option<&[i64]>, n_out: u64, n_in: u64) -> Option<String> {
    let Some(labels) = labels else {
        return Some("the frame carries no row labels from the version it was read from (the index was reset or the row-id column dropped)".into());
    };
    if labels.len() as u64 != n_out {
        return Some(format!("{} labels for {n_out} rows", labels.len()));
    }
    let mut seen = vec![false; n_in as usize];
    for (j, &l) in labels.iter().enumerate() {
        if l < 0 || l as u64 >= n_in {
            return Some(format!(
                "row {} has label {l}, not a row of the input (0 to {})",
                j + 1,
                n_in.saturating_sub(1)
            ));
        }
        if std::mem::replace(&mut seen[l as usize], true) {
            return Some(format!(
                "label {l} is on more than one row (row {} and an earlier one)",
                j + 1
            ));
        }
    }
    None
}

fn rows_of(store: &Store, v: &Version) -> Result<Vec<Vec<String>>> {
    let mut rows = Vec::with_capacity(v.n_rows as usize);
    store.objects.each_row(v, |_, r| {
        rows.push(
            r.iter()
                .map(|f| String::from_utf8_lossy(f).into_owned())
                .collect(),
        );
        Ok(())
    })?;
    Ok(rows)
}

/// Records the file at `path` (the frame, as the Python side wrote it) as the successor of
/// `opts.from`, exactly by its labels when they allow it, else by a diff.
pub fn record(store: &mut Store, path: &Path, opts: &LabelledOptions) -> Result<LabelledOutcome> {
    let base = refs::resolve(&store.lineage, &opts.from)?;
    let started_at = crate::clock::now_rfc3339();
    let prepared =
        match intake::prepare_from(store, path, &opts.ingest, &intake::SourceOptions::default())? {
            Prepared::Unchanged(version) => return Ok(LabelledOutcome::Unchanged { version }),
            Prepared::Ready(p) => p,
        };
    let mut prepared = prepared;
    let to = prepared.draft(store)?;
    let fallback = unusable(opts.labels.as_deref(), to.n_rows, base.n_rows);
    let git = crate::code::code_state(&opts.code.folder);
    let code = json!({
        "python": {
            "file": opts.code.file,
            "line": opts.code.line,
            "source": opts.code.source,
        },
        "cwd": opts.code.folder.display().to_string(),
        "git": git.as_ref().ok().cloned().flatten(),
        "git_problem": git.as_ref().err(),
        "labels": if fallback.is_none() { json!(opts.code.labels_from) } else { json!(null) },
    });
    let mut successor = match (&fallback, &opts.labels) {
        (None, Some(labels)) => exact(store, prepared, base, &to, labels, &opts.code)?,
        _ => inferred::infer(
            store,
            prepared,
            base,
            Vec::new(),
            "removed by the dataframe code (inferred by diff)",
        )?,
    };
    let exact = fallback.is_none();
    let mut recorded = inferred::record(
        store,
        std::slice::from_mut(&mut successor),
        StepKind::Command,
        Some(&code),
        &started_at,
        &[],
    )?;
    match recorded.pop() {
        Some(r) => Ok(LabelledOutcome::Recorded {
            recorded: Box::new(r),
            exact,
            fallback,
        }),
        None => {
            let version = refs::resolve(&store.lineage, &opts.ingest.dataset)?;
            Ok(LabelledOutcome::Unchanged {
                version: Box::new(version),
            })
        }
    }
}

/// The successor with its row map from `labels`, cells compared through them.
fn exact(
    store: &Store,
    prepared: Box<intake::PreparedIngest>,
    base: Version,
    to: &Version,
    labels: &[i64],
    code: &CallingCode,
) -> Result<Successor> {
    let before = rows_of(store, &base)?;
    let after = rows_of(store, to)?;
    let mut runs: Vec<RowRun> = Vec::new();
    for (j, &l) in labels.iter().enumerate() {
        let (out, inp) = (j as u64, l as u64);
        match runs.last_mut() {
            Some(r) if r.out_start + r.len == out && r.in_start + r.len == inp => r.len += 1,
            _ => runs.push(RowRun {
                out_start: out,
                in_start: inp,
                len: 1,
            }),
        }
    }
    let in_col: HashMap<&str, usize> = base
        .header
        .iter()
        .enumerate()
        .map(|(i, h)| (h.as_str(), i))
        .collect();
    let shared: Vec<(usize, usize)> = to
        .header
        .iter()
        .enumerate()
        .filter_map(|(c, h)| in_col.get(h.as_str()).map(|&i| (i, c)))
        .collect();
    let mut changes = ChangeLog::new(to.header.len());
    let mut by_column = vec![0u64; to.header.len()];
    let mut changed_rows = 0u64;
    for (j, &l) in labels.iter().enumerate() {
        let (a, b) = (&before[l as usize], &after[j]);
        let mut changed = false;
        for &(i, c) in &shared {
            if a.get(i) != b.get(c) {
                changes.push(c, j as u64);
                by_column[c] += 1;
                changed = true;
            }
        }
        changed_rows += u64::from(changed);
    }
    let mut kept = vec![false; before.len()];
    for &l in labels {
        kept[l as usize] = true;
    }
    let mut drops = DropLog::default();
    let mut n_removed = 0;
    for (row, k) in kept.iter().enumerate() {
        if !k {
            drops.push(
                row as u64,
                "removed by the dataframe code (its row label is gone)",
                None,
            );
            n_removed += 1;
        }
    }
    let provenance = inferred::write_provenance(store, &to.header, &runs, &changes, &drops)?;
    let lineage = InferredLineage {
        matched_by: MatchedBy::Order,
        n_unchanged: labels.len() as u64 - changed_rows,
        n_changed_rows: changed_rows,
        n_removed,
        n_added: 0,
        changed_by_column: to
            .header
            .iter()
            .zip(by_column)
            .filter(|(_, n)| *n > 0)
            .map(|(h, n)| (h.clone(), n))
            .collect(),
        columns_added: to
            .header
            .iter()
            .filter(|h| !in_col.contains_key(h.as_str()))
            .cloned()
            .collect(),
        columns_removed: base
            .header
            .iter()
            .filter(|h| !to.header.contains(h))
            .cloned()
            .collect(),
        renamed: Vec::new(),
        order_asked: false,
    };
    Ok(Successor::labelled(
        prepared,
        base,
        lineage,
        provenance,
        json!({"labels": code.labels_from}),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_that_cannot_make_a_row_map_say_why() {
        assert!(unusable(None, 2, 3).is_some());
        assert!(unusable(Some(&[0, 2]), 2, 3).is_none());
        assert!(unusable(Some(&[0, 0]), 2, 3)
            .unwrap()
            .contains("more than one row"));
        assert!(unusable(Some(&[0, 3]), 2, 3)
            .unwrap()
            .contains("not a row of the input"));
        assert!(unusable(Some(&[0]), 2, 3).is_some());
    }
}
