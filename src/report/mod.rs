//! The lineage report: one document that shows what was done to a version's data, by whom,
//! when and why, and how it can be checked. This module gathers it as plain data ([`Report`]),
//! renders it ([`render`]: HTML, Markdown and JSON, pure functions of the one value, so the
//! three cannot disagree) and writes it ([`write`]): the file made durable beside its target,
//! its hash appended to the audit chain ([`record`]), then the file renamed into place, so a
//! printed report can later be matched to the store state that produced it ([`find`]).
//!
//! Everything in a report is read from the store and is deterministic, except the generation
//! time, the agent who asked for it, and the audit chain's head (whose entries carry times):
//! the same store gives the same report apart from those. The verification in it is done at
//! report time: every object re-hashed and the audit chain checked (`verify`), and, when asked,
//! the version computed again from its raw inputs (`replay`).

pub mod render;

use std::io::Write as _;
use std::path::Path;

use serde::Serialize;
use serde_json::json;

use crate::error::{Error, Result};
use crate::history::{self, CheckRecord, StepBehind};
use crate::model::{AuditEntry, ColumnProfile, Drop, SourceFile, StepKind, Version};
use crate::provenance;
use crate::refs;
use crate::replay;
use crate::store::Store;
use crate::verify;

/// The number of the report's JSON structure (`schema/report.schema.json`).
pub const REPORT_FORMAT: u32 = 2;

/// The audit action a written report is recorded under.
pub const AUDIT_ACTION: &str = "report_written";

/// The caution every rendering carries.
pub const CAUTION: &str = "This report documents what sluice recorded about this data: the steps \
taken, by whom, when and why, and the checks made when the report was generated. It is not legal \
or regulatory advice and does not certify compliance with any rule. Record-keeping obligations \
(audit trails for electronic records, signatures, retention periods, personal-data law) differ by \
jurisdiction and industry; defer to the rules that apply where you work and to your \
organisation's compliance and data-protection staff.";

/// What a rendering writes where its own hash goes; [`write`] puts the hash in its place. The
/// report's own hash is the BLAKE3 of the file with this placeholder in place of the hash, so
/// anyone can check it: write 64 zeros over the hash in the file and hash the result.
pub const OWN_HASH_PLACEHOLDER: &str =
    "0000000000000000000000000000000000000000000000000000000000000000";

/// How many rows of the subject a report shows: all of a summary's (up to this many), the
/// first few of any other version.
pub const FIGURES_MAX_ROWS: usize = 200;
pub const DATA_FIRST_ROWS: usize = 10;

/// What a report is asked for.
#[derive(Debug, Clone)]
pub struct ReportOptions {
    /// Changed cells listed per step (the counts stay complete).
    pub sample: usize,
    /// Also compute the version again from its raw inputs (`replay`).
    pub replay: bool,
    /// Excluded (dropped) rows listed per step (the counts stay complete).
    pub excluded: usize,
    /// Who asks for the report.
    pub agent: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// The structure's number ([`REPORT_FORMAT`]).
    pub sluice_report: u32,
    pub generated: Generated,
    pub subject: Subject,
    /// The report in figures, for its first page.
    pub summary: Summary,
    /// The subject's own table: all of it when it is a summary (the published figures, up to
    /// [`FIGURES_MAX_ROWS`]), else its first rows.
    pub figures: Figures,
    /// Every step from the raw inputs to the subject, in recording order.
    pub steps: Vec<ReportStep>,
    /// The step numbers between the first and last step of the way that are not part of it,
    /// and what they made instead.
    pub other_steps: Vec<OtherSteps>,
    /// The checks recorded on every version of the way, in the steps' order.
    pub checks: Vec<VersionChecks>,
    /// Per raw input, its columns' quality against the subject's.
    pub quality: Vec<QualityComparison>,
    pub hashes: Hashes,
    pub verification: Verification,
    /// Signatures recorded over the subject or over this kind of report: who, in what role,
    /// when, and whether each verifies. Empty when none is recorded.
    pub signoffs: Vec<SignOffLine>,
    /// Erasure orders that emptied cells of the subject or of versions it comes from: where
    /// and under which order, never the values. Left out when there are none.
    #[serde(skip_serializing_if = "Vec::is_empty", default)]
    pub erasures: Vec<ErasureLine>,
    pub caution: String,
    /// The report's own hash: the BLAKE3 of the written file with [`OWN_HASH_PLACEHOLDER`] in
    /// place of these digits. A built report holds the placeholder until [`write`] seals it.
    pub own_hash: String,
    /// The lineage drawing (what the subject comes from); in the HTML only.
    #[serde(skip)]
    pub lineage: crate::graph::Drawing,
}

/// One erasure order as the report names it.
#[derive(Debug, Clone, Serialize)]
pub struct ErasureLine {
    pub order: i64,
    pub request: String,
    pub ordered_at: String,
    pub by: String,
    /// Each version of the way it reached: `NAME:vN`, cells erased, summary cells kept as
    /// published and no longer recomputable.
    pub versions: Vec<(String, u64, u64)>,
}

/// The erasure orders that reached the subject or a version it comes from.
fn erasure_lines(store: &Store, target: &crate::model::Version) -> Result<Vec<ErasureLine>> {
    let orders = store.lineage.erasure_orders()?;
    if orders.is_empty() {
        return Ok(Vec::new());
    }
    let mut way = std::collections::BTreeSet::from([target.id]);
    for id in crate::plan::steps_behind(store, target)? {
        way.extend(store.lineage.step_outputs(id)?.iter().map(|v| v.id));
        way.extend(
            store
                .lineage
                .step_input_versions(id)?
                .iter()
                .map(|(_, v)| v.id),
        );
    }
    let erased = store.lineage.erased_versions()?;
    let mut out = Vec::new();
    for o in orders {
        let mut versions = Vec::new();
        for e in erased
            .iter()
            .filter(|e| e.order_id == o.id && way.contains(&e.version_id))
        {
            if let Some(v) = store.lineage.version_by_id(e.version_id)? {
                versions.push((v.label(), e.n_erased, (e.marked.len() / 8) as u64));
            }
        }
        if !versions.is_empty() {
            out.push(ErasureLine {
                order: o.id,
                request: o.request,
                ordered_at: o.ordered_at,
                by: o.agent,
                versions,
            });
        }
    }
    Ok(out)
}

/// The report's first page in figures.
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    /// Each raw input, with its rows and whether it is data or a reference table (read by a
    /// `map` or `lookup` step, directly or after steps of its own).
    pub raw: Vec<RawCount>,
    /// Rows of the raw data inputs (reference tables not counted).
    pub raw_rows_in: u64,
    pub rows_out: u64,
    /// Rows dropped on the way, by reason, with the steps that dropped them.
    pub dropped: Vec<DroppedBy>,
    pub rows_dropped: u64,
    pub cells_changed: u64,
    pub checks_passed: u64,
    pub checks_failed: u64,
    /// "reproduced", "not_reproduced" (a step gave other bytes), "partly" (outside work not
    /// run again) or "not_checked" (no replay asked for).
    pub reproduction: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct RawCount {
    pub version: String,
    pub n_rows: u64,
    /// "data" or "table".
    pub role: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct DroppedBy {
    pub reason: String,
    pub rows: u64,
    pub steps: Vec<i64>,
}

/// The subject's table as text.
#[derive(Debug, Clone, Serialize)]
pub struct Figures {
    /// Whether the subject is a summary (`summarize`): its rows are the published figures.
    pub summary: bool,
    pub header: Vec<String>,
    pub rows: Vec<Vec<String>>,
    /// The subject's rows in all (more than `rows` holds when it was cut).
    pub n_rows: u64,
}

/// Step numbers skipped between two steps of the way.
#[derive(Debug, Clone, Serialize)]
pub struct OtherSteps {
    pub first: i64,
    pub last: i64,
    /// What those steps made (versions, as `NAME:vN`), or nothing (a failed or reading step).
    pub made: Vec<String>,
}

/// A sign-off: a person's signature, with its stated meaning, and whether it verifies.
#[derive(Debug, Clone, Serialize)]
pub struct SignOffLine {
    /// "prepared", "reviewed", "approved" or a meaning the organisation declares.
    pub meaning: String,
    /// The printed name of the person who signed.
    pub name: String,
    /// RFC 3339 UTC.
    pub at: String,
    /// The signing key's fingerprint.
    pub fingerprint: String,
    pub status: SignOffStatus,
}

/// How a sign-off's signature checks out: the sign-off module's own verdict.
pub use crate::endorse::SignatureStatus as SignOffStatus;

/// A signature's verdict in the report's words.
pub fn status_words(status: SignOffStatus) -> &'static str {
    match status {
        SignOffStatus::Verified => "signature verified",
        SignOffStatus::BadSignature => "bad signature",
        SignOffStatus::MissingSignature => "signature missing",
        SignOffStatus::UnknownKey => "unknown key",
        SignOffStatus::NotChecked => "not checked",
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct Generated {
    /// RFC 3339 UTC.
    pub at: String,
    /// Who asked for it.
    pub by: String,
    /// The sluice build that wrote it.
    pub tool_version: String,
}

/// The version the report is about.
#[derive(Debug, Clone, Serialize)]
pub struct Subject {
    pub version: String,
    pub dataset: String,
    pub hash: String,
    pub n_rows: u64,
    pub n_cols: u64,
    pub n_bytes: u64,
    pub recorded_at: String,
    /// Whether it is still its dataset's latest version.
    pub latest: bool,
}

/// A version as a report names it.
#[derive(Debug, Clone, Serialize)]
pub struct VersionRef {
    pub version: String,
    pub hash: String,
    pub n_rows: u64,
    pub n_cols: u64,
    /// For a step's inputs: "input", "table" (a mapping or lookup table), "other" (the second
    /// source of an append); empty for outputs.
    #[serde(skip_serializing_if = "String::is_empty")]
    pub role: String,
}

fn vref(v: &Version, role: &str) -> VersionRef {
    VersionRef {
        version: v.label(),
        hash: v.hash.clone(),
        n_rows: v.n_rows,
        n_cols: v.n_cols,
        role: role.to_string(),
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct ColumnCount {
    pub column: String,
    pub cells: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct DropCount {
    /// The reason as recorded; duplicates are counted together whatever row they repeat.
    pub reason: String,
    pub rows: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct SampleChange {
    pub version: String,
    /// 1-based data row of the output version, as `sluice retrieve` shows it.
    pub row: u64,
    pub column: String,
    pub old: Option<String>,
    pub new: Option<String>,
}

/// One step of the way.
#[derive(Debug, Clone, Serialize)]
pub struct ReportStep {
    pub id: i64,
    /// "ingest", "operation", "command", "hand_edit", "revert", "replay".
    pub kind: StepKind,
    pub operation: Option<String>,
    /// The operation's parameters as recorded (canonical JSON).
    pub params: serde_json::Value,
    pub agent: String,
    pub started_at: String,
    pub ended_at: String,
    pub reason: Option<String>,
    pub tool_version: String,
    /// "exact" (recorded by the operation), "inferred" (by a diff), "none" (an intake).
    pub lineage: String,
    pub inputs: Vec<VersionRef>,
    pub outputs: Vec<VersionRef>,
    pub rows_in: Option<u64>,
    pub rows_out: Option<u64>,
    /// For an intake or hand edit: the outside file read.
    pub source: Option<SourceFile>,
    /// For outside work: the command line, working directory, code commit and modified files.
    pub code: Option<serde_json::Value>,
    pub repeats_step: Option<i64>,
    pub cells_changed: Vec<ColumnCount>,
    pub cells_changed_total: u64,
    pub drops: Vec<DropCount>,
    pub rows_dropped: u64,
    /// The first changed cells (at most the sample size per step).
    pub sample: Vec<SampleChange>,
    /// The first dropped rows (at most [`ReportOptions::excluded`] per step), each named.
    pub excluded: Vec<ExcludedRow>,
}

/// A row a step dropped, named by its key (the dataset's declared key, else its first column)
/// and its place in the step's input.
#[derive(Debug, Clone, Serialize)]
pub struct ExcludedRow {
    /// The input version it was dropped from.
    pub version: String,
    /// 1-based data row of that version.
    pub row: u64,
    /// The (column, value) pairs that name the row.
    pub key: Vec<(String, String)>,
    pub reason: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct VersionChecks {
    pub version: String,
    pub hash: String,
    pub checks: Vec<CheckRecord>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ColumnQuality {
    pub column: String,
    /// The column in the raw input (absent when the subject's column is not there).
    pub raw: Option<ColumnProfile>,
    /// The column in the subject (absent when the raw column was dropped or renamed).
    pub subject: Option<ColumnProfile>,
}

/// A raw input's columns against the subject's, matched by name.
#[derive(Debug, Clone, Serialize)]
pub struct QualityComparison {
    pub raw: VersionRef,
    pub subject: VersionRef,
    pub columns: Vec<ColumnQuality>,
}

#[derive(Debug, Clone, Serialize)]
pub struct RawInput {
    pub version: String,
    pub hash: String,
    pub n_bytes: u64,
    /// The file as given at intake.
    pub file: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Hashes {
    /// "blake3".
    pub algorithm: String,
    pub raw: Vec<RawInput>,
    pub subject: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct ReplaySummary {
    /// Every step was shown to give (or, raw data, to have) its recorded bytes.
    pub reproduced: bool,
    pub steps_checked: u64,
    /// Built-in steps run again that gave their recorded bytes.
    pub steps_same: u64,
    /// Outside work that was not run again.
    pub steps_not_rerun: u64,
    /// The first step that did not give its bytes, and why.
    pub failed: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Verification {
    pub intact: bool,
    pub objects_checked: u64,
    pub bytes_checked: u64,
    pub versions_checked: u64,
    pub audit_entries_checked: u64,
    /// The last audit entry when the report was made: the report's own entry follows it.
    pub audit_head_seq: u64,
    pub audit_head_hash: String,
    pub problems: Vec<String>,
    pub replay: Option<ReplaySummary>,
    /// "passed" (the store intact and, when asked, the subject computed again to its bytes),
    /// "failed" (a problem found, or a step gave other bytes) or "not_checked" (intact, but
    /// the subject not shown to follow from its raw data: no replay asked for, or outside
    /// work not run again).
    pub verdict: String,
    /// The result in one paragraph.
    pub statement: String,
}

impl Verification {
    /// Whether nothing failed (a report that is "not checked" in part has not failed).
    pub fn failed(&self) -> bool {
        self.verdict == "failed"
    }
}

/// Gathers the report of `reference`. Reads only, except that a replay may restore a missing
/// intermediate object from recomputed bytes of the same hash (as `sluice reproduce` does).
pub fn build(store: &mut Store, reference: &str, opts: &ReportOptions) -> Result<Report> {
    let target = refs::resolve(&store.lineage, reference)?;
    let behind = history::behind(store, &target)?;
    let latest = store.lineage.latest_version(&target.dataset)?;

    let mut steps = Vec::with_capacity(behind.len());
    let mut checks = Vec::new();
    let mut raw: Vec<(Version, Option<SourceFile>)> = Vec::new();
    for sb in &behind {
        steps.push(step_of(store, sb, opts)?);
        for v in &sb.outputs {
            let c = history::checks_of(store, v.id)?;
            if !c.is_empty() {
                checks.push(VersionChecks {
                    version: v.label(),
                    hash: v.hash.clone(),
                    checks: c,
                });
            }
            if sb.step.kind == StepKind::Ingest {
                raw.push((v.clone(), sb.step.source.clone()));
            }
        }
    }

    // Each raw input against what it became: the last version of its own dataset on the way
    // (before it was combined with others or summarised), its columns followed through
    // renames by the recorded column sources.
    let mut quality = Vec::new();
    for (v, _) in &raw {
        let became = behind
            .iter()
            .rev()
            .flat_map(|sb| sb.outputs.iter().rev())
            .find(|o| o.dataset == v.dataset)
            .cloned()
            .unwrap_or_else(|| v.clone());
        quality.push(compare_columns(store, &behind, v, &became)?);
    }

    let hashes = Hashes {
        algorithm: "blake3".to_string(),
        raw: raw
            .iter()
            .map(|(v, src)| RawInput {
                version: v.label(),
                hash: v.hash.clone(),
                n_bytes: v.n_bytes,
                file: src.as_ref().map(|s| s.path.clone()),
            })
            .collect(),
        subject: target.hash.clone(),
    };

    let roles = raw_roles(&behind, &target);
    let figures = figures_of(store, &target, behind.last())?;
    let other_steps = other_steps_of(store, &steps)?;

    let checked = verify::verify(store)?;
    let entries = store.lineage.audit_entries()?;
    let head = entries.last();
    let replay = if opts.replay {
        let r = replay::replay(
            store,
            reference,
            &replay::ReplayOptions { allow_exec: false },
        )?;
        let count = |want: &[&str]| {
            r.steps
                .iter()
                .filter(|s| want.contains(&s.result.as_str()))
                .count() as u64
        };
        Some(ReplaySummary {
            reproduced: r.reproduced,
            steps_checked: r.steps.len() as u64,
            steps_same: count(&["same", "restored", "reapplied"]),
            steps_not_rerun: count(&["not_rerun"]),
            failed: r
                .steps
                .iter()
                .find(|s| {
                    !["same", "restored", "reapplied", "raw_intact", "not_rerun"]
                        .contains(&s.result.as_str())
                })
                .map(|s| {
                    format!(
                        "step {} ({}): {}{}",
                        s.step,
                        s.result,
                        s.produced,
                        s.detail
                            .as_deref()
                            .map(|d| format!(", {d}"))
                            .unwrap_or_default()
                    )
                }),
        })
    } else {
        None
    };
    let problems: Vec<String> = checked
        .problems
        .iter()
        .map(|p| format!("{} {}: {}", p.kind, p.subject, p.detail))
        .collect();
    let generated_at = crate::clock::now_rfc3339();
    let mut statement = format!(
        "When this report was generated, sluice re-hashed {} stored objects ({} bytes), checked {} versions' row indexes and {} audit entries from the first to entry {}: {}.",
        checked.objects_checked,
        checked.bytes_checked,
        checked.versions_checked,
        checked.audit_entries_checked,
        head.map_or(0, |e| e.seq),
        if checked.intact {
            "every object matched its name and the audit chain is unbroken".to_string()
        } else {
            match problems.len() {
                1 => "1 problem was found (listed below)".to_string(),
                n => format!("{n} problems were found (listed below)"),
            }
        }
    );
    if let Some(r) = &replay {
        statement.push_str(&if r.reproduced {
            format!(
                " {} was computed again from its raw inputs: all {} built-in steps gave their recorded bytes.",
                target.label(),
                r.steps_same
            )
        } else if r.failed.is_none() {
            format!(
                " {} was computed again from its raw inputs as far as sluice can: {} built-in steps gave their recorded bytes; {} steps of outside work were not run again (their recorded outputs are intact), so the version is not shown to follow from the raw data alone.",
                target.label(),
                r.steps_same,
                r.steps_not_rerun
            )
        } else {
            format!(
                " {} could not be computed again from its raw inputs: {}.",
                target.label(),
                r.failed.as_deref().unwrap_or("a step did not give its recorded bytes")
            )
        });
    }
    statement.push_str(&format!(
        " The report itself is recorded as audit entry {} ({AUDIT_ACTION}), with its BLAKE3 hash.",
        head.map_or(1, |e| e.seq + 1)
    ));

    let (verdict, reproduction) = match &replay {
        _ if !checked.intact => ("failed", reproduction_word(replay.as_ref())),
        Some(r) if r.failed.is_some() => ("failed", "not_reproduced"),
        Some(r) if r.reproduced => ("passed", "reproduced"),
        Some(_) => ("not_checked", "partly"),
        None => ("not_checked", "not_checked"),
    };
    let mut dropped: Vec<DroppedBy> = Vec::new();
    for st in &steps {
        for d in &st.drops {
            match dropped.iter_mut().find(|x| x.reason == d.reason) {
                Some(x) => {
                    x.rows += d.rows;
                    x.steps.push(st.id);
                }
                None => dropped.push(DroppedBy {
                    reason: d.reason.clone(),
                    rows: d.rows,
                    steps: vec![st.id],
                }),
            }
        }
    }
    let summary = Summary {
        raw: raw
            .iter()
            .map(|(v, _)| RawCount {
                version: v.label(),
                n_rows: v.n_rows,
                role: if roles.contains(&v.id) {
                    "data"
                } else {
                    "table"
                }
                .to_string(),
            })
            .collect(),
        raw_rows_in: raw
            .iter()
            .filter(|(v, _)| roles.contains(&v.id))
            .map(|(v, _)| v.n_rows)
            .sum(),
        rows_out: target.n_rows,
        rows_dropped: dropped.iter().map(|d| d.rows).sum(),
        dropped,
        cells_changed: steps.iter().map(|s| s.cells_changed_total).sum(),
        checks_passed: checks
            .iter()
            .flat_map(|c| &c.checks)
            .filter(|c| c.passed)
            .count() as u64,
        checks_failed: checks
            .iter()
            .flat_map(|c| &c.checks)
            .filter(|c| !c.passed)
            .count() as u64,
        reproduction: reproduction.to_string(),
    };

    Ok(Report {
        sluice_report: REPORT_FORMAT,
        generated: Generated {
            at: generated_at,
            by: opts.agent.clone(),
            tool_version: crate::TOOL_VERSION.to_string(),
        },
        subject: Subject {
            version: target.label(),
            dataset: target.dataset.clone(),
            hash: target.hash.clone(),
            n_rows: target.n_rows,
            n_cols: target.n_cols,
            n_bytes: target.n_bytes,
            recorded_at: target.created_at.clone(),
            latest: latest.is_some_and(|l| l.id == target.id),
        },
        summary,
        figures,
        steps,
        other_steps,
        checks,
        quality,
        hashes,
        verification: Verification {
            intact: checked.intact,
            objects_checked: checked.objects_checked,
            bytes_checked: checked.bytes_checked,
            versions_checked: checked.versions_checked,
            audit_entries_checked: checked.audit_entries_checked,
            audit_head_seq: head.map_or(0, |e| e.seq),
            audit_head_hash: head.map(|e| e.hash.clone()).unwrap_or_default(),
            problems,
            replay,
            verdict: verdict.to_string(),
            statement,
        },
        signoffs: sign_off_lines(store, &target)?,
        erasures: erasure_lines(store, &target)?,
        caution: CAUTION.to_string(),
        own_hash: OWN_HASH_PLACEHOLDER.to_string(),
        lineage: crate::graph::drawing(store, Some(reference), true)?,
    })
}

/// The sign-offs of the subject version, each signature checked against the store's signatories.
fn sign_off_lines(store: &Store, target: &Version) -> Result<Vec<SignOffLine>> {
    Ok(crate::endorse::sign_offs_of_version(store, target, true)?
        .into_iter()
        .map(|x| SignOffLine {
            meaning: x.meaning,
            name: x.name,
            at: x.at,
            fingerprint: x.fingerprint,
            status: x.status,
        })
        .collect())
}

fn step_of(store: &Store, sb: &StepBehind, opts: &ReportOptions) -> Result<ReportStep> {
    let sample = opts.sample;
    let s = &sb.step;
    let mut cells_changed: Vec<ColumnCount> = Vec::new();
    let mut samples = Vec::new();
    for out in &sb.outputs {
        for (column, n) in provenance::change_counts(store, out)? {
            match cells_changed.iter_mut().find(|c| c.column == column) {
                Some(c) => c.cells += n,
                None => cells_changed.push(ColumnCount { column, cells: n }),
            }
        }
        if samples.len() < sample {
            for c in provenance::cell_changes_sample(store, out, sample - samples.len())? {
                samples.push(SampleChange {
                    version: out.label(),
                    row: c.row_idx + 1,
                    column: c.column,
                    old: c.old,
                    new: c.new,
                });
            }
        }
    }
    let mut drops: Vec<DropCount> = Vec::new();
    let mut excluded: Vec<ExcludedRow> = Vec::new();
    for (_, input) in &sb.inputs {
        let dropped = provenance::drops(store, s.id, input.id)?;
        let listed = opts
            .excluded
            .saturating_sub(excluded.len())
            .min(dropped.len());
        excluded.extend(excluded_rows(store, input, &dropped[..listed])?);
        for d in dropped {
            // A duplicate's text names the row it repeats; count duplicates by the stored
            // reason alone.
            let reason = match d.duplicate_of {
                Some(of) => {
                    let named = provenance::reason_text("", Some(of));
                    match d.reason.strip_prefix(named.as_str()) {
                        Some(stored) => format!("duplicate of another row {stored}"),
                        None => d.reason,
                    }
                }
                None => d.reason,
            };
            match drops.iter_mut().find(|c| c.reason == reason) {
                Some(c) => c.rows += 1,
                None => drops.push(DropCount { reason, rows: 1 }),
            }
        }
    }
    Ok(ReportStep {
        id: s.id,
        kind: s.kind,
        operation: s.operation.clone(),
        params: s.params.clone(),
        agent: s.agent.clone(),
        started_at: s.started_at.clone(),
        ended_at: s.ended_at.clone(),
        reason: s.reason.clone(),
        tool_version: s.tool_version.clone(),
        lineage: s.lineage.as_str().to_string(),
        inputs: sb.inputs.iter().map(|(role, v)| vref(v, role)).collect(),
        outputs: sb.outputs.iter().map(|v| vref(v, "")).collect(),
        rows_in: s.rows_in,
        rows_out: s.rows_out,
        source: s.source.clone(),
        code: s.code.clone(),
        repeats_step: s.repeats_step,
        cells_changed_total: cells_changed.iter().map(|c| c.cells).sum(),
        cells_changed,
        rows_dropped: drops.iter().map(|d| d.rows).sum(),
        drops,
        sample: samples,
        excluded,
    })
}

/// The rows `drops` names in `input`, each with the cells that name it.
fn excluded_rows(store: &Store, input: &Version, drops: &[Drop]) -> Result<Vec<ExcludedRow>> {
    if drops.is_empty() {
        return Ok(Vec::new());
    }
    let key = store
        .lineage
        .dataset(&input.dataset)?
        .and_then(|d| d.key)
        .filter(|k| !k.is_empty())
        .unwrap_or_else(|| input.header.iter().take(1).cloned().collect());
    let cols: Vec<(usize, &str)> = key
        .iter()
        .filter_map(|k| {
            input
                .header
                .iter()
                .position(|h| h == k)
                .map(|i| (i, k.as_str()))
        })
        .collect();
    let mut wanted: Vec<(u64, usize)> = drops
        .iter()
        .enumerate()
        .map(|(i, d)| (d.row_idx, i))
        .collect();
    wanted.sort();
    let mut named: Vec<Vec<(String, String)>> = vec![Vec::new(); drops.len()];
    let mut at = 0;
    // The whole version is read (and re-hashed), as every reader of stored rows does.
    store.objects.each_row(input, |row_idx, rec| {
        while at < wanted.len() && wanted[at].0 == row_idx {
            named[wanted[at].1] = cols
                .iter()
                .map(|(i, name)| {
                    let cell: &[u8] = if *i < rec.len() { rec.field(*i) } else { b"" };
                    (name.to_string(), String::from_utf8_lossy(cell).into_owned())
                })
                .collect();
            at += 1;
        }
        Ok(())
    })?;
    Ok(drops
        .iter()
        .zip(named)
        .map(|(d, key)| ExcludedRow {
            version: input.label(),
            row: d.row_idx + 1,
            key,
            reason: d.reason.clone(),
        })
        .collect())
}

/// The raw versions whose rows flow into the subject as data (not only as a reference table
/// that a `map` or `lookup` reads): found by walking back from the subject through every
/// input but tables.
fn raw_roles(behind: &[StepBehind], target: &Version) -> std::collections::BTreeSet<i64> {
    let mut data = std::collections::BTreeSet::from([target.id]);
    for sb in behind.iter().rev() {
        if sb.outputs.iter().any(|o| data.contains(&o.id)) {
            for (role, v) in &sb.inputs {
                if role != "table" {
                    data.insert(v.id);
                }
            }
        }
    }
    data
}

/// The subject's rows as text: all of a summary's (up to [`FIGURES_MAX_ROWS`]), else the
/// first [`DATA_FIRST_ROWS`].
fn figures_of(store: &Store, target: &Version, made_by: Option<&StepBehind>) -> Result<Figures> {
    let summary = made_by.is_some_and(|sb| {
        sb.step.operation.as_deref() == Some("summarize")
            && sb.outputs.iter().any(|o| o.id == target.id)
    });
    let limit = if summary {
        FIGURES_MAX_ROWS
    } else {
        DATA_FIRST_ROWS
    };
    let mut rows: Vec<Vec<String>> = Vec::new();
    store.objects.each_row(target, |_, rec| {
        if rows.len() >= limit {
            return Ok(());
        }
        rows.push(
            rec.iter()
                .map(|f| String::from_utf8_lossy(f).into_owned())
                .collect(),
        );
        Ok(())
    })?;
    Ok(Figures {
        summary,
        header: target.header.clone(),
        rows,
        n_rows: target.n_rows,
    })
}

/// The runs of step numbers between the way's first and last step that are not on it.
fn other_steps_of(store: &Store, steps: &[ReportStep]) -> Result<Vec<OtherSteps>> {
    let mut ids: Vec<i64> = steps.iter().map(|s| s.id).collect();
    ids.sort_unstable();
    let mut out = Vec::new();
    for w in ids.windows(2) {
        if w[1] > w[0] + 1 {
            let mut made = Vec::new();
            for id in w[0] + 1..w[1] {
                if let Some(st) = store.lineage.step(id)? {
                    made.extend(st.outputs);
                }
            }
            out.push(OtherSteps {
                first: w[0] + 1,
                last: w[1] - 1,
                made,
            });
        }
    }
    Ok(out)
}

/// A raw input's columns against the version it became, each raw column followed through the
/// renames recorded on the way (`column_sources`).
fn compare_columns(
    store: &Store,
    behind: &[StepBehind],
    raw: &Version,
    became: &Version,
) -> Result<QualityComparison> {
    // The name each raw column has now: follow the chain of this dataset's versions.
    let mut names: Vec<(String, Option<String>)> = raw
        .header
        .iter()
        .map(|h| (h.clone(), Some(h.clone())))
        .collect();
    for sb in behind {
        for out in sb
            .outputs
            .iter()
            .filter(|o| o.dataset == raw.dataset && o.id != raw.id)
        {
            if out.seq > became.seq {
                continue;
            }
            let sources = store.lineage.column_sources(out.id)?;
            for (_, now) in names.iter_mut() {
                let Some(n) = now.clone() else { continue };
                let renamed = sources
                    .iter()
                    .find(|(_, input)| *input == n)
                    .map(|(o, _)| o.clone());
                *now = match renamed {
                    Some(o) => Some(o),
                    None if out.header.contains(&n) => Some(n),
                    None => None,
                };
            }
        }
    }
    let raw_profile = store.lineage.profiles(raw.id)?;
    let became_profile = store.lineage.profiles(became.id)?;
    let mut columns: Vec<ColumnQuality> = names
        .iter()
        .map(|(was, now)| ColumnQuality {
            column: match now {
                Some(n) if n != was => format!("{was} → {n}"),
                _ => was.clone(),
            },
            raw: raw_profile.iter().find(|p| &p.name == was).cloned(),
            subject: now
                .as_ref()
                .and_then(|n| became_profile.iter().find(|p| &p.name == n).cloned()),
        })
        .collect();
    for p in &became_profile {
        if !names
            .iter()
            .any(|(_, now)| now.as_deref() == Some(p.name.as_str()))
        {
            columns.push(ColumnQuality {
                column: p.name.clone(),
                raw: None,
                subject: Some(p.clone()),
            });
        }
    }
    Ok(QualityComparison {
        raw: vref(raw, ""),
        subject: vref(became, ""),
        columns,
    })
}

fn reproduction_word(r: Option<&ReplaySummary>) -> &'static str {
    match r {
        None => "not_checked",
        Some(r) if r.failed.is_some() => "not_reproduced",
        Some(r) if r.reproduced => "reproduced",
        Some(_) => "partly",
    }
}

/// The forms a report is written in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Html,
    Markdown,
    Json,
}

impl Format {
    /// The name recorded in the audit entry.
    pub fn name(self) -> &'static str {
        match self {
            Format::Html => "html",
            Format::Markdown => "md",
            Format::Json => "json",
        }
    }
}

/// The report in one of its forms, with [`OWN_HASH_PLACEHOLDER`] where its own hash goes.
pub fn render(report: &Report, format: Format) -> String {
    match format {
        Format::Html => render::html(report),
        Format::Markdown => render::markdown(report),
        Format::Json => render::json(report),
    }
}

/// The rendered text with its own hash in place of every [`OWN_HASH_PLACEHOLDER`], and that
/// hash: the BLAKE3 of the text as rendered. Writing zeros over every occurrence of the hash in
/// the sealed text gives the rendered text back, so the hash can be checked from the file
/// alone.
pub fn seal(rendered: &str) -> (String, String) {
    let own = blake3::hash(rendered.as_bytes()).to_hex().to_string();
    (rendered.replace(OWN_HASH_PLACEHOLDER, &own), own)
}

/// A report written and recorded.
#[derive(Debug)]
pub struct Written {
    pub report: Report,
    /// The BLAKE3 of the file's bytes.
    pub hash: String,
    /// The report's own hash (see [`seal`]).
    pub own_hash: String,
    pub entry: AuditEntry,
}

/// Builds the report of `reference`, renders it, and writes it to `output`: the text goes to a
/// temporary file beside the target and is synced, then its audit entry is appended, then the
/// file is renamed into place. The report exists under its name only when it was recorded; a
/// failure before the rename removes the temporary file, so store and folder stay as they
/// were.
pub fn write(
    store: &mut Store,
    agent: &crate::model::Agent,
    reference: &str,
    format: Format,
    output: &Path,
    opts: &ReportOptions,
) -> Result<Written> {
    let mut report = build(store, reference, opts)?;
    let (text, own_hash) = seal(&render(&report, format));
    let dir = output
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = output.file_name().ok_or_else(|| {
        Error::usage(format!(
            "{}: not a file name; give -o a file path",
            output.display()
        ))
    })?;
    if !dir.is_dir() {
        return Err(Error::usage(format!(
            "cannot write {}: the folder {} does not exist; create it first or give another path",
            output.display(),
            dir.display()
        )));
    }
    let tmp = dir.join(format!(".{}.sluice-part", name.to_string_lossy()));
    let written = std::fs::File::create(&tmp)
        .and_then(|mut f| f.write_all(text.as_bytes()).and_then(|_| f.sync_all()));
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(Error::io(output, e));
    }
    let shown = output.display().to_string();
    let entry = match record(
        store,
        agent,
        &report,
        format.name(),
        text.as_bytes(),
        &own_hash,
        &shown,
    ) {
        Ok(e) => e,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
    };
    std::fs::rename(&tmp, output).map_err(|e| {
        Error::io(
            output,
            std::io::Error::new(
                e.kind(),
                format!(
                    "cannot move the report into place (it was recorded in the audit log; its text is in {}): {e}",
                    tmp.display()
                ),
            ),
        )
    })?;
    report.own_hash = own_hash.clone();
    Ok(Written {
        report,
        hash: blake3::hash(text.as_bytes()).to_hex().to_string(),
        own_hash,
        entry,
    })
}

/// Records a written report in the audit chain: its format, BLAKE3 hash and size, its own hash
/// ([`seal`]), the version it documents, and the audit entry it was made after.
pub fn record(
    store: &mut Store,
    agent: &crate::model::Agent,
    report: &Report,
    format: &str,
    bytes: &[u8],
    own_hash: &str,
    file: &str,
) -> Result<AuditEntry> {
    let hash = blake3::hash(bytes).to_hex().to_string();
    let at = crate::clock::now_rfc3339();
    let details = json!({
        "format": format,
        "report": hash,
        "own_hash": own_hash,
        "bytes": bytes.len(),
        "file": file,
        "version": report.subject.hash,
        "generated_at": report.generated.at,
        "after_entry": report.verification.audit_head_seq,
    });
    store.write(|tx| tx.audit(agent, AUDIT_ACTION, &report.subject.version, &details, &at))
}

/// The audit entry that recorded a report with these bytes, if any.
pub fn find(store: &Store, bytes: &[u8]) -> Result<Option<AuditEntry>> {
    let hash = blake3::hash(bytes).to_hex().to_string();
    Ok(store.lineage.audit_entries()?.into_iter().find(|e| {
        e.action == AUDIT_ACTION
            && serde_json::from_str::<serde_json::Value>(&e.details)
                .ok()
                .is_some_and(|d| d["report"] == hash.as_str())
    }))
}
