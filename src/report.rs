//! The lineage report: one document that shows what was done to a version's data, by whom,
//! when and why, and how it can be checked. This module gathers it as plain data ([`Report`]);
//! the command line renders it as HTML, Markdown or JSON (all three from this one structure)
//! and writes the file, and [`record`] appends the report's hash to the audit chain so a
//! printed report can later be matched to the store state that produced it ([`find`]).
//!
//! Everything in a report is read from the store and is deterministic, except the generation
//! time, the agent who asked for it, and the audit chain's head (whose entries carry times):
//! the same store gives the same report apart from those. The verification in it is done at
//! report time: every object re-hashed and the audit chain checked (`verify`), and, when asked,
//! the version computed again from its raw inputs (`replay`).

use serde::Serialize;
use serde_json::json;

use crate::error::Result;
use crate::history::{self, CheckRecord, StepBehind};
use crate::model::{AuditEntry, ColumnProfile, SourceFile, StepKind, Version};
use crate::provenance;
use crate::refs;
use crate::replay;
use crate::store::Store;
use crate::verify;

/// The number of the report's JSON structure (`schema/report.schema.json`).
pub const REPORT_FORMAT: u32 = 1;

/// The audit action a written report is recorded under.
pub const AUDIT_ACTION: &str = "report_written";

/// The caution every rendering carries.
pub const CAUTION: &str = "This report documents what sluice recorded about this data: the steps \
taken, by whom, when and why, and the checks made when the report was generated. It is not legal \
or regulatory advice and does not certify compliance with any rule. Record-keeping obligations \
(audit trails for electronic records, retention periods, personal-data law) differ by jurisdiction \
and industry; defer to your organisation's compliance staff and to the rules that apply where \
you work.";

/// What a report is asked for.
#[derive(Debug, Clone)]
pub struct ReportOptions {
    /// Changed cells listed per step (the counts stay complete).
    pub sample: usize,
    /// Also compute the version again from its raw inputs (`replay`).
    pub replay: bool,
    /// Who asks for the report.
    pub agent: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// The structure's number ([`REPORT_FORMAT`]).
    pub sluice_report: u32,
    pub generated: Generated,
    pub subject: Subject,
    /// Every step from the raw inputs to the subject, in recording order.
    pub steps: Vec<ReportStep>,
    /// The checks recorded on every version of the way, in the steps' order.
    pub checks: Vec<VersionChecks>,
    /// Per raw input, its columns' quality against the subject's.
    pub quality: Vec<QualityComparison>,
    pub hashes: Hashes,
    pub verification: Verification,
    pub caution: String,
    /// The lineage diagram (`sluice lineage REF --format svg`); in the HTML only.
    #[serde(skip)]
    pub lineage_svg: String,
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
    /// The result in one paragraph.
    pub statement: String,
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
        steps.push(step_of(store, sb, opts.sample)?);
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

    let subject_profile = store.lineage.profiles(target.id)?;
    let mut quality = Vec::new();
    for (v, _) in &raw {
        let raw_profile = store.lineage.profiles(v.id)?;
        let mut columns: Vec<ColumnQuality> = raw_profile
            .iter()
            .map(|p| ColumnQuality {
                column: p.name.clone(),
                raw: Some(p.clone()),
                subject: subject_profile.iter().find(|s| s.name == p.name).cloned(),
            })
            .collect();
        for s in &subject_profile {
            if !raw_profile.iter().any(|p| p.name == s.name) {
                columns.push(ColumnQuality {
                    column: s.name.clone(),
                    raw: None,
                    subject: Some(s.clone()),
                });
            }
        }
        quality.push(QualityComparison {
            raw: vref(v, ""),
            subject: vref(&target, ""),
            columns,
        });
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
            format!("{} problems were found (listed below)", problems.len())
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
        steps,
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
            statement,
        },
        caution: CAUTION.to_string(),
        lineage_svg: crate::graph::svg(store, Some(reference))?,
    })
}

fn step_of(store: &Store, sb: &StepBehind, sample: usize) -> Result<ReportStep> {
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
    for (_, input) in &sb.inputs {
        for d in provenance::drops(store, s.id, input.id)? {
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
    })
}

/// Records a written report in the audit chain: its format, BLAKE3 hash and size, the version
/// it documents, and the audit entry it was made after.
pub fn record(
    store: &mut Store,
    agent: &crate::model::Agent,
    report: &Report,
    format: &str,
    bytes: &[u8],
    file: &str,
) -> Result<AuditEntry> {
    let hash = blake3::hash(bytes).to_hex().to_string();
    let at = crate::clock::now_rfc3339();
    let details = json!({
        "format": format,
        "report": hash,
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
