//! Lineage inferred for work done outside sluice: a file that an outside command wrote, or that
//! someone edited by hand, is recorded as the successor of a version, and its row map, changed
//! cells and removed rows are inferred by comparing the two with the diff engine
//! ([`crate::diff`]): by the dataset's declared key when it has one, else by order. The result
//! is stored in the same provenance object a built-in step writes ([`crate::provenance`]), and
//! the step is marked `inferred` rather than `exact`: a diff sees what changed, not why or how.
//!
//! Rows of the new file that no run covers are the rows the outside work added; rows of the old
//! version that no run covers are recorded as dropped, with a reason saying the diff found them
//! removed.

use std::path::Path;

use serde_json::json;

use crate::diff::{self, DiffOptions, KeyChoice, MatchedBy};
use crate::error::{Error, ErrorKind, Result};
use crate::intake::{self, IngestOptions, Prepared, PreparedIngest, Succession};
use crate::model::{LineageKind, RowRun, StepKind, Version};
use crate::provenance::{self, ChangeLog, DropLog};
use crate::refs;
use crate::store::Store;

/// What the diff found between a version and its successor.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InferredLineage {
    /// How rows were matched.
    pub matched_by: MatchedBy,
    /// Rows carried over unchanged, carried over with changed cells, removed, added.
    pub n_unchanged: u64,
    pub n_changed_rows: u64,
    pub n_removed: u64,
    pub n_added: u64,
    /// Changed cells per column (new version's names), only columns with changes.
    pub changed_by_column: Vec<(String, u64)>,
    /// Columns added and removed by the outside work.
    pub columns_added: Vec<String>,
    pub columns_removed: Vec<String>,
    /// Renamed columns: (new name, old name).
    pub renamed: Vec<(String, String)>,
    /// Rows were matched by order because it was asked for (`capture --match-by-order`), though a
    /// key is declared.
    pub order_asked: bool,
}

impl InferredLineage {
    pub fn n_changed_cells(&self) -> u64 {
        self.changed_by_column.iter().map(|c| c.1).sum()
    }

    /// Whether matching by key kept no row although rows were removed and added: what outside
    /// work that rewrote the key values looks like. The key columns, if so.
    pub fn key_rewritten(&self) -> Option<&[String]> {
        match &self.matched_by {
            MatchedBy::Key(k)
                if self.n_unchanged + self.n_changed_rows == 0
                    && self.n_removed > 0
                    && self.n_added > 0 =>
            {
                Some(k)
            }
            _ => None,
        }
    }

    /// How rows were matched, as recorded in the step's parameters.
    pub fn inferred_by(&self) -> serde_json::Value {
        match &self.matched_by {
            MatchedBy::Key(k) => json!({"diff": "key", "key": k}),
            MatchedBy::Order if self.order_asked => json!({"diff": "order", "asked": true}),
            MatchedBy::Order => json!({"diff": "order"}),
            MatchedBy::Lineage { ancestor, .. } => json!({"diff": "lineage", "through": ancestor}),
        }
    }
}

/// An outside file ready to be recorded as the successor of `from`: read and checked, its
/// objects and provenance object durable, nothing referenced yet.
pub struct Successor {
    pub prepared: Box<PreparedIngest>,
    pub from: Version,
    /// Other versions the step read (an outside command's other inputs).
    pub others: Vec<Version>,
    pub lineage: InferredLineage,
    provenance: Option<(String, u64)>,
    /// Set when the row map came from row labels (`crate::labelled`): how the rows were
    /// matched, recorded instead of the diff's method, and the step marked exact.
    pub(crate) labels: Option<serde_json::Value>,
}

/// Compares `from` with the version `prepared` will be and writes the provenance object;
/// `drop_reason` is the reason given to each removed row.
pub fn infer(
    store: &Store,
    prepared: Box<PreparedIngest>,
    from: Version,
    others: Vec<Version>,
    drop_reason: &str,
) -> Result<Successor> {
    infer_matching(
        store,
        prepared,
        from,
        others,
        drop_reason,
        KeyChoice::Declared,
    )
}

/// [`infer`], with the rows matched as `key` says (`KeyChoice::Unkeyed`: by order even when a
/// key is declared, for outside work that rewrites key values).
pub fn infer_matching(
    store: &Store,
    mut prepared: Box<PreparedIngest>,
    from: Version,
    others: Vec<Version>,
    drop_reason: &str,
    key: KeyChoice,
) -> Result<Successor> {
    let asked_order = key == KeyChoice::Unkeyed;
    let to = prepared.draft(store)?;
    let d = diff::diff_versions(store, &from, &to, &DiffOptions { key })?;
    let mut map = crate::model::RowMap::default();
    for r in &d.pairing.runs {
        // Changed and unchanged stretches that continue each other are one run of the row map.
        map.push_run(r.b_start, r.a_start, r.len);
    }
    let runs = map.into_runs();
    let mut changes = ChangeLog::new(to.header.len());
    for c in &d.pairing.cells {
        let col = to
            .header
            .iter()
            .position(|h| *h == c.column)
            .ok_or_else(|| {
                Error::from(ErrorKind::Inconsistent(format!(
                    "the diff named a column \"{}\" that {} does not have",
                    c.column,
                    to.label()
                )))
            })?;
        changes.push(col, c.b_row);
    }
    let mut drops = DropLog::default();
    for &row in &d.pairing.removed {
        drops.push(row, drop_reason, None);
    }
    let provenance = write_provenance(store, &to.header, &runs, &changes, &drops)?;
    let lineage = InferredLineage {
        n_unchanged: d.n_unchanged(),
        n_changed_rows: d.n_changed(),
        n_removed: d.n_removed(),
        n_added: d.n_added(),
        changed_by_column: d
            .changed_by_column
            .iter()
            .filter(|c| c.1 > 0)
            .cloned()
            .collect(),
        columns_added: d.columns.added.clone(),
        columns_removed: d.columns.removed.clone(),
        renamed: d
            .columns
            .renamed
            .iter()
            .map(|(old, new)| (new.clone(), old.clone()))
            .collect(),
        matched_by: d.matched_by,
        order_asked: asked_order,
    };
    Ok(Successor {
        prepared,
        from,
        others,
        lineage,
        provenance,
        labels: None,
    })
}

/// Writes the provenance object of a successor (none when there is nothing to say); durable,
/// not yet referenced.
pub(crate) fn write_provenance(
    store: &Store,
    header: &[String],
    runs: &[RowRun],
    changes: &ChangeLog,
    drops: &DropLog,
) -> Result<Option<(String, u64)>> {
    let run_sets: Vec<(u32, &[RowRun])> = if runs.is_empty() {
        Vec::new()
    } else {
        vec![(0, runs)]
    };
    provenance::write(store, header, changes, drops, &run_sets)
}

impl Successor {
    /// A successor whose row map, changes and drops were found from row labels, not a diff.
    pub(crate) fn labelled(
        prepared: Box<PreparedIngest>,
        from: Version,
        lineage: InferredLineage,
        provenance: Option<(String, u64)>,
        labels: serde_json::Value,
    ) -> Successor {
        Successor {
            prepared,
            from,
            others: Vec::new(),
            lineage,
            provenance,
            labels: Some(labels),
        }
    }
}

/// One successor as recorded.
#[derive(Debug, Clone)]
pub struct RecordedSuccessor {
    pub version: Version,
    pub from: Version,
    pub step_id: i64,
    pub lineage: InferredLineage,
}

/// Records every successor in one transaction, each as a step of `kind` (with `code`, when
/// given, in `steps.code`) that began at `started_at`, with one audit entry each, after the
/// entries `before` appends (an outside command's own entry). A successor whose bytes another
/// command recorded meanwhile is left out of the result.
pub fn record(
    store: &mut Store,
    successors: &mut [Successor],
    kind: StepKind,
    code: Option<&serde_json::Value>,
    started_at: &str,
    blobs: &[(String, u64)],
) -> Result<Vec<RecordedSuccessor>> {
    let store_dir = store.dir().to_path_buf();
    let ids = store.write(|tx| {
        // Objects the step's record names besides its versions (the files an outside
        // command's arguments named).
        for (hash, n) in blobs {
            tx.insert_object(hash, *n, "blob", started_at)?;
        }
        let mut ids = Vec::with_capacity(successors.len());
        for s in successors.iter_mut() {
            let mut inputs = vec![(s.from.id, "input")];
            inputs.extend(s.others.iter().map(|o| (o.id, "other")));
            let succession = Succession {
                kind,
                inputs,
                from_hash: &s.from.hash,
                rows_in: s.from.n_rows,
                started_at: started_at.to_string(),
                provenance: s.provenance.as_ref().map(|(h, n)| (h.as_str(), *n)),
                code,
                inferred_by: s.labels.clone().unwrap_or_else(|| s.lineage.inferred_by()),
                column_sources: s.lineage.renamed.clone(),
                lineage: if s.labels.is_some() {
                    LineageKind::Exact
                } else {
                    LineageKind::Inferred
                },
            };
            ids.push(s.prepared.commit_as(&store_dir, tx, Some(&succession))?);
        }
        Ok(ids)
    })?;
    let mut out = Vec::new();
    for (s, id) in successors.iter().zip(ids) {
        let Some((version_id, step_id)) = id else {
            continue;
        };
        let version = store.lineage.version_by_id(version_id)?.ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent("the new version vanished".into()))
        })?;
        out.push(RecordedSuccessor {
            version,
            from: s.from.clone(),
            step_id,
            lineage: s.lineage.clone(),
        });
    }
    Ok(out)
}

/// What `sluice receive FILE --hand-edit-of REF` did.
#[derive(Debug, Clone)]
pub enum HandEditOutcome {
    Recorded {
        recorded: Box<RecordedSuccessor>,
        warnings: Vec<String>,
    },
    /// The bytes equal the dataset's latest version: nothing was recorded.
    Unchanged { version: Box<Version> },
}

/// Records the file at `path` as a hand-edited successor of the version `from` names: a step of
/// kind `hand_edit` whose lineage is inferred by a diff.
pub fn ingest_hand_edit(
    store: &mut Store,
    path: &Path,
    opts: &IngestOptions,
    from: &str,
) -> Result<HandEditOutcome> {
    ingest_hand_edit_from(store, path, opts, &intake::SourceOptions::default(), from)
}

/// [`ingest_hand_edit`] with the options of formats other than delimited text (a workbook's
/// sheet).
pub fn ingest_hand_edit_from(
    store: &mut Store,
    path: &Path,
    opts: &IngestOptions,
    source: &intake::SourceOptions,
    from: &str,
) -> Result<HandEditOutcome> {
    let base = refs::resolve(&store.lineage, from)?;
    let started_at = crate::clock::now_rfc3339();
    let prepared = match intake::prepare_from(store, path, opts, source)? {
        Prepared::Unchanged(version) => return Ok(HandEditOutcome::Unchanged { version }),
        Prepared::Ready(p) => p,
    };
    let warnings = prepared.warnings().to_vec();
    let mut s = [infer(
        store,
        prepared,
        base,
        Vec::new(),
        "removed by hand (inferred by diff)",
    )?];
    let mut recorded = record(store, &mut s, StepKind::HandEdit, None, &started_at, &[])?;
    match recorded.pop() {
        Some(r) => Ok(HandEditOutcome::Recorded {
            recorded: Box::new(r),
            warnings,
        }),
        None => {
            let version = store
                .lineage
                .latest_version(&opts.dataset)?
                .ok_or_else(|| {
                    Error::from(ErrorKind::Inconsistent(
                        "the latest version vanished".into(),
                    ))
                })?;
            Ok(HandEditOutcome::Unchanged {
                version: Box::new(version),
            })
        }
    }
}
