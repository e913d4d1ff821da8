//! The records the recording commands and `compare` return (receive, clean, capture, run and
//! rerun, withdraw, compare), as serde types built from the engine's outcomes: the binary prints
//! them with `--json` (described by `schema/output/`) and the Python package returns the same
//! records, so both give the same fields.

use serde::Serialize;

use crate::diff::chars::{pieces, Piece};
use crate::diff::{ChangeKind, Diff, MatchedBy};
use crate::inferred::{HandEditOutcome, RecordedSuccessor};
use crate::intake::IngestOutcome;
use crate::labelled::LabelledOutcome;
use crate::model::Version;
use crate::ops::apply::ApplyOutcome;
use crate::ops::Operation;
use crate::plan::Done;

/// What `receive --json` prints (schema/output/receive.schema.json).
#[derive(Serialize)]
pub struct ReceiveJson<'a> {
    /// Whether a new version was recorded (false: the bytes equal the latest version).
    pub recorded: bool,
    /// The store-wide number of the step that recorded it.
    pub step: Option<i64>,
    pub version: &'a Version,
    /// For a hand edit: the version it was made from.
    pub hand_edit_of: Option<&'a Version>,
    pub warnings: &'a [String],
}

impl<'a> ReceiveJson<'a> {
    pub fn from_intake(o: &'a IngestOutcome) -> Self {
        match o {
            IngestOutcome::Recorded {
                version,
                step_id,
                warnings,
            } => ReceiveJson {
                recorded: true,
                step: Some(*step_id),
                version,
                hand_edit_of: None,
                warnings,
            },
            IngestOutcome::Unchanged { version } => ReceiveJson {
                recorded: false,
                step: None,
                version,
                hand_edit_of: None,
                warnings: &[],
            },
        }
    }

    pub fn from_hand_edit(o: &'a HandEditOutcome) -> Self {
        match o {
            HandEditOutcome::Recorded { recorded, warnings } => ReceiveJson {
                recorded: true,
                step: Some(recorded.version.step_id),
                version: &recorded.version,
                hand_edit_of: Some(&recorded.from),
                warnings,
            },
            HandEditOutcome::Unchanged { version } => ReceiveJson {
                recorded: false,
                step: None,
                version,
                hand_edit_of: None,
                warnings: &[],
            },
        }
    }
}

/// What `clean --json` prints (schema/output/clean.schema.json).
#[derive(Serialize)]
pub struct CleanJson<'a> {
    pub operation: &'a str,
    pub recorded: bool,
    /// The store-wide number of the step that recorded it.
    pub step: Option<i64>,
    pub input: &'a Version,
    pub version: Option<&'a Version>,
    pub changed_cells: u64,
    pub changed_by_column: Vec<ColumnCount<'a>>,
    pub dropped_rows: u64,
    pub noted_cells: u64,
    pub table_received: Option<&'a str>,
}

#[derive(Serialize)]
pub struct ColumnCount<'a> {
    pub column: &'a str,
    pub cells: u64,
}

impl<'a> CleanJson<'a> {
    pub fn new(op: &'a Operation, o: &'a ApplyOutcome) -> Self {
        let mut j = CleanJson {
            operation: op.name(),
            recorded: false,
            step: None,
            input: match o {
                ApplyOutcome::Recorded { input, .. }
                | ApplyOutcome::Replayed { input, .. }
                | ApplyOutcome::Unchanged { input, .. } => input,
            },
            version: None,
            changed_cells: 0,
            changed_by_column: Vec::new(),
            dropped_rows: 0,
            noted_cells: 0,
            table_received: None,
        };
        match o {
            ApplyOutcome::Recorded {
                version,
                step_id,
                n_changed,
                changed_by_column,
                n_dropped,
                n_noted,
                table_taken_in,
                ..
            } => {
                j.recorded = true;
                j.step = Some(*step_id);
                j.version = Some(version);
                j.changed_cells = *n_changed;
                j.changed_by_column = changed_by_column
                    .iter()
                    .map(|(c, n)| ColumnCount {
                        column: c,
                        cells: *n,
                    })
                    .collect();
                j.dropped_rows = *n_dropped;
                j.noted_cells = *n_noted;
                j.table_received = table_taken_in.as_deref();
            }
            ApplyOutcome::Unchanged { version, notes, .. } => {
                j.version = Some(version);
                j.noted_cells = notes.len() as u64;
            }
            ApplyOutcome::Replayed { .. } => {}
        }
        j
    }
}

/// What `capture --json` prints (schema/output/capture.schema.json).
#[derive(Serialize)]
pub struct CaptureJson<'a> {
    pub recorded: Vec<SuccessorJson<'a>>,
    /// Outputs whose bytes equal the dataset's latest version: nothing recorded for them.
    pub unchanged: &'a [Version],
    /// What ran and where, as recorded with each step.
    pub code: &'a serde_json::Value,
}

/// A version recorded as the successor of another, with the lineage inferred between them.
#[derive(Serialize)]
pub struct SuccessorJson<'a> {
    /// The store-wide number of the step that recorded it.
    pub step: i64,
    pub version: &'a Version,
    pub from: &'a Version,
    pub rows_kept: u64,
    pub rows_added: u64,
    pub rows_removed: u64,
    pub changed_cells: u64,
    pub matched_by: String,
}

impl<'a> From<&'a RecordedSuccessor> for SuccessorJson<'a> {
    fn from(r: &'a RecordedSuccessor) -> Self {
        let l = &r.lineage;
        SuccessorJson {
            step: r.version.step_id,
            version: &r.version,
            from: &r.from,
            rows_kept: l.n_unchanged + l.n_changed_rows,
            rows_added: l.n_added,
            rows_removed: l.n_removed,
            changed_cells: l.n_changed_cells(),
            matched_by: match &l.matched_by {
                crate::diff::MatchedBy::Key(k) => format!("key {}", k.join(", ")),
                crate::diff::MatchedBy::Order => "order".to_string(),
                crate::diff::MatchedBy::Lineage { ancestor, .. } => {
                    format!("lineage through {ancestor}")
                }
            },
        }
    }
}

/// What `run --json` and `rerun --json` print (schema/output/run.schema.json).
#[derive(Serialize)]
pub struct RunJson<'a> {
    pub completed: bool,
    pub stopped_at: Option<&'a str>,
    pub error: Option<&'a str>,
    pub done: Vec<DoneJson<'a>>,
}

/// A version as `run --json` names it.
#[derive(Serialize)]
pub struct VersionRef<'a> {
    #[serde(skip_serializing_if = "Option::is_none")]
    pub version: Option<String>,
    pub hash: &'a str,
}

impl<'a> From<&'a Version> for VersionRef<'a> {
    fn from(v: &'a Version) -> Self {
        VersionRef {
            version: Some(v.label()),
            hash: &v.hash,
        }
    }
}

/// One item of a run: an input received or bound, a clean step, or an inspection.
#[derive(Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum DoneJson<'a> {
    Input {
        name: &'a str,
        bound: bool,
        #[serde(skip_serializing_if = "Option::is_none")]
        file: Option<String>,
        recorded: bool,
        /// The store-wide step number, when the intake was recorded.
        step: Option<i64>,
        output: VersionRef<'a>,
        #[serde(skip_serializing_if = "Option::is_none")]
        differs_from_plan: Option<&'a str>,
    },
    Clean {
        /// The store-wide step number, when the step was recorded.
        step: Option<i64>,
        /// The step's place in the plan (1-based).
        plan_entry: usize,
        op: &'a str,
        recorded: bool,
        input: VersionRef<'a>,
        output: VersionRef<'a>,
    },
    Inspect {
        plan_entry: usize,
        hold_point: bool,
        version: &'a str,
        hash: &'a str,
        passed: bool,
        failed_rules: usize,
    },
}

impl<'a> RunJson<'a> {
    pub fn new(done: &'a [Done], stopped: Option<(&'a str, &'a str)>) -> Self {
        RunJson {
            completed: stopped.is_none(),
            stopped_at: stopped.map(|s| s.0),
            error: stopped.map(|s| s.1),
            done: done.iter().map(DoneJson::from).collect(),
        }
    }
}

impl<'a> From<&'a Done> for DoneJson<'a> {
    fn from(d: &'a Done) -> Self {
        match d {
            Done::Bound { name, version } => DoneJson::Input {
                name,
                bound: true,
                file: None,
                recorded: false,
                step: None,
                output: version.into(),
                differs_from_plan: None,
            },
            Done::TookIn {
                name,
                path,
                outcome,
                differs_from,
            } => {
                let (v, step) = match &**outcome {
                    IngestOutcome::Recorded {
                        version, step_id, ..
                    } => (version, Some(*step_id)),
                    IngestOutcome::Unchanged { version } => (version, None),
                };
                DoneJson::Input {
                    name,
                    bound: false,
                    file: Some(path.display().to_string()),
                    recorded: step.is_some(),
                    step,
                    output: v.into(),
                    differs_from_plan: differs_from.as_deref(),
                }
            }
            Done::Applied { step, op, outcome } => {
                let (input, output, recorded) = match &**outcome {
                    ApplyOutcome::Recorded {
                        input,
                        version,
                        step_id,
                        ..
                    } => (input, VersionRef::from(version), Some(*step_id)),
                    ApplyOutcome::Unchanged { input, version, .. } => {
                        (input, VersionRef::from(version), None)
                    }
                    ApplyOutcome::Replayed {
                        input, output_hash, ..
                    } => (
                        input,
                        VersionRef {
                            version: None,
                            hash: output_hash,
                        },
                        None,
                    ),
                };
                DoneJson::Clean {
                    step: recorded,
                    plan_entry: *step,
                    op: op.name(),
                    recorded: recorded.is_some(),
                    input: input.into(),
                    output,
                }
            }
            Done::Checked {
                step,
                hold_point,
                report,
            } => DoneJson::Inspect {
                plan_entry: *step,
                hold_point: *hold_point,
                version: &report.version,
                hash: &report.hash,
                passed: report.passed,
                failed_rules: report.results.iter().filter(|c| !c.passed).count(),
            },
        }
    }
}

/// What `withdraw --json` prints (schema/output/withdraw.schema.json): what was recorded, or
/// the conflicts that refused it.
#[derive(Serialize)]
pub struct WithdrawJson<'a> {
    pub recorded: bool,
    /// The version whose step was withdrawn.
    pub withdrawn: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub report: Option<&'a crate::revert::RevertReport>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub conflicts: Option<&'a [crate::revert::Conflict]>,
}

impl<'a> From<&'a crate::revert::RevertOutcome> for WithdrawJson<'a> {
    fn from(o: &'a crate::revert::RevertOutcome) -> Self {
        match o {
            crate::revert::RevertOutcome::Recorded(r) => WithdrawJson {
                recorded: true,
                withdrawn: &r.reverted,
                report: Some(r),
                conflicts: None,
            },
            crate::revert::RevertOutcome::Refused {
                reverted,
                conflicts,
            } => WithdrawJson {
                recorded: false,
                withdrawn: reverted,
                report: None,
                conflicts: Some(conflicts),
            },
        }
    }
}

#[derive(Serialize)]
pub struct JsonVersion<'a> {
    pub version: String,
    pub hash: &'a str,
}

#[derive(Serialize)]
pub struct JsonRows {
    pub from: u64,
    pub to: u64,
    pub unchanged: u64,
    pub changed: u64,
    pub removed: u64,
    pub added: u64,
}

#[derive(Serialize)]
pub struct JsonColumnCount<'a> {
    pub column: &'a str,
    pub changed: u64,
}

#[derive(Serialize)]
pub struct JsonCells<'a> {
    pub changed: u64,
    pub by_column: Vec<JsonColumnCount<'a>>,
}

#[derive(Serialize)]
pub struct JsonRename<'a> {
    pub from: &'a str,
    pub to: &'a str,
}

#[derive(Serialize)]
pub struct JsonColumns<'a> {
    pub added: &'a [String],
    pub removed: &'a [String],
    pub renamed: Vec<JsonRename<'a>>,
    pub reordered: bool,
}

#[derive(Serialize)]
pub struct JsonCell<'a> {
    pub column: &'a str,
    pub old: &'a str,
    pub new: &'a str,
    pub pieces: Vec<Piece>,
}

#[derive(Serialize)]
pub struct JsonChange<'a> {
    pub kind: ChangeKind,
    pub from_row: Option<u64>,
    pub to_row: Option<u64>,
    pub key: Option<Vec<String>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub cells: Option<Vec<JsonCell<'a>>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub values: Option<Vec<String>>,
}

/// What `compare --json` prints (schema/output/compare.schema.json).
#[derive(Serialize)]
pub struct CompareJson<'a> {
    pub from: JsonVersion<'a>,
    pub to: JsonVersion<'a>,
    pub paired_by: &'static str,
    /// How the rows were paired, in a sentence.
    pub pairing: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub lineage_steps: Option<&'a Vec<i64>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub duplicates: Option<&'a crate::diff::DuplicateKeys>,
    pub key: Option<&'a [String]>,
    pub rows: JsonRows,
    pub alignment: Option<crate::diff::Alignment>,
    pub cells: JsonCells<'a>,
    pub columns: JsonColumns<'a>,
    pub n_changes: u64,
    pub listed: usize,
    pub changes: Vec<JsonChange<'a>>,
}

impl<'a> CompareJson<'a> {
    /// The comparison with at most `limit` of its changes listed (none for counts only).
    pub fn new(d: &'a Diff, limit: usize) -> Self {
        let changes: Vec<JsonChange<'_>> = d
            .changes
            .iter()
            .take(limit)
            .map(|c| {
                let cells = (c.kind == ChangeKind::Changed).then(|| {
                    d.pairing.cells[c.cells.clone()]
                        .iter()
                        .map(|x| JsonCell {
                            column: &x.column,
                            old: &x.old,
                            new: &x.new,
                            pieces: pieces(&x.old, &x.new),
                        })
                        .collect()
                });
                let values = match c.kind {
                    ChangeKind::Removed => c.a_row.and_then(|r| d.from_rows.get(r)),
                    ChangeKind::Added => c.b_row.and_then(|r| d.to_rows.get(r)),
                    ChangeKind::Changed => None,
                }
                .map(|r| r.texts());
                JsonChange {
                    kind: c.kind,
                    from_row: c.a_row.map(|r| r + 1),
                    to_row: c.b_row.map(|r| r + 1),
                    key: d.key_of(c),
                    cells,
                    values,
                }
            })
            .collect();
        CompareJson {
            from: JsonVersion {
                version: d.from.label(),
                hash: &d.from.hash,
            },
            to: JsonVersion {
                version: d.to.label(),
                hash: &d.to.hash,
            },
            paired_by: d.matched_by.method(),
            pairing: d.matched_by.describe(),
            lineage_steps: match &d.matched_by {
                MatchedBy::Lineage { steps, .. } => Some(steps),
                _ => None,
            },
            duplicates: d.duplicates.as_ref(),
            key: d.matched_by.key(),
            rows: JsonRows {
                from: d.from.n_rows,
                to: d.to.n_rows,
                unchanged: d.n_unchanged(),
                changed: d.n_changed(),
                removed: d.n_removed(),
                added: d.n_added(),
            },
            alignment: d.alignment,
            cells: JsonCells {
                changed: d.n_cells,
                by_column: d
                    .changed_by_column
                    .iter()
                    .map(|(c, n)| JsonColumnCount {
                        column: c,
                        changed: *n,
                    })
                    .collect(),
            },
            columns: JsonColumns {
                added: &d.columns.added,
                removed: &d.columns.removed,
                renamed: d
                    .columns
                    .renamed
                    .iter()
                    .map(|(a, b)| JsonRename { from: a, to: b })
                    .collect(),
                reordered: d.columns.reordered,
            },
            n_changes: d.n_changes,
            listed: changes.len(),
            changes,
        }
    }
}

/// What the Python package's `Store.record` returns: a frame the caller's code made, recorded
/// as the successor of the version it read, with whether its row map is exact (from the row
/// labels) or inferred by a diff, and why the labels could not be used.
#[derive(Serialize)]
pub struct FrameJson<'a> {
    pub recorded: bool,
    /// The store-wide number of the step that recorded it.
    pub step: Option<i64>,
    pub version: &'a Version,
    pub from: Option<&'a Version>,
    /// `exact` (from the labels) or `inferred` (by a diff); none when nothing was recorded.
    pub lineage: Option<&'static str>,
    pub fallback: Option<&'a str>,
    pub rows_kept: u64,
    pub rows_added: u64,
    pub rows_removed: u64,
    pub changed_cells: u64,
    pub changed_by_column: Vec<ColumnCount<'a>>,
}

impl<'a> From<&'a LabelledOutcome> for FrameJson<'a> {
    fn from(o: &'a LabelledOutcome) -> Self {
        match o {
            LabelledOutcome::Recorded {
                recorded,
                exact,
                fallback,
            } => {
                let l = &recorded.lineage;
                FrameJson {
                    recorded: true,
                    step: Some(recorded.version.step_id),
                    version: &recorded.version,
                    from: Some(&recorded.from),
                    lineage: Some(if *exact { "exact" } else { "inferred" }),
                    fallback: fallback.as_deref(),
                    rows_kept: l.n_unchanged + l.n_changed_rows,
                    rows_added: l.n_added,
                    rows_removed: l.n_removed,
                    changed_cells: l.n_changed_cells(),
                    changed_by_column: l
                        .changed_by_column
                        .iter()
                        .map(|(c, n)| ColumnCount {
                            column: c,
                            cells: *n,
                        })
                        .collect(),
                }
            }
            LabelledOutcome::Unchanged { version } => FrameJson {
                recorded: false,
                step: None,
                version,
                from: None,
                lineage: None,
                fallback: None,
                rows_kept: 0,
                rows_added: 0,
                rows_removed: 0,
                changed_cells: 0,
                changed_by_column: Vec::new(),
            },
        }
    }
}

/// Where a plan run stopped, as `run --json` names it: the plan calls its entries "step N",
/// but steps are called by their store-wide number everywhere, so a plan's own places are
/// plan entries.
pub fn stopped_at(failure_at: &str) -> String {
    match failure_at.strip_prefix("step ") {
        Some(rest) => format!("plan entry {rest}"),
        None => failure_at.to_string(),
    }
}

/// What `publish --json` and `borrow --json` print (schema/output/publish.schema.json and
/// borrow.schema.json): where the copy went from and to, and what it moved.
#[derive(Serialize)]
pub struct MovedJson {
    /// The store copied from: a folder, or a server's database (never a password).
    pub from: String,
    /// The store copied into, named the same way.
    pub to: String,
    pub objects_copied: u64,
    pub bytes_copied: u64,
    pub objects_present: u64,
    pub entries_before: u64,
    pub entries_copied: u64,
}

impl MovedJson {
    pub fn new(from: String, to: String, m: &crate::sharing::Moved) -> MovedJson {
        MovedJson {
            from,
            to,
            objects_copied: m.objects_copied,
            bytes_copied: m.bytes_copied,
            objects_present: m.objects_present,
            entries_before: m.entries_before,
            entries_copied: m.entries_copied,
        }
    }
}
