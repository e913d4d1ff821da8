//! Commands that document a version for other people and tools: `export` (a plan or W3C PROV),
//! `report` (the lineage report, recorded in the audit chain) and `identify` (which recorded
//! version or report a file is).

use std::io::Write;
use std::path::Path;

use anyhow::{anyhow, Context as _};
use serde::Serialize;

use super::args::{ExportFormat, ReportArgs, ReportFormat};
use super::text::*;
use super::{render_report, write_text_to, Context, ExitCode};
use sluice::model::{Agent, Version};
use sluice::store::Store;

pub fn export(
    ctx: &Context<'_>,
    reference: &str,
    format: ExportFormat,
    output: Option<&Path>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    match format {
        ExportFormat::Plan => {
            let base = match output {
                Some(o) => std::path::absolute(o)
                    .ok()
                    .and_then(|a| a.parent().map(Path::to_path_buf))
                    .unwrap_or_else(|| ctx.cwd.clone()),
                None => ctx.cwd.clone(),
            };
            let plan = sluice::plan::export(&store, reference, &base)?;
            let mut text = serde_json::to_string_pretty(&plan)?;
            text.push('\n');
            if let (true, Some(path)) = (write_text_to(output, &text, out)?, output) {
                writeln!(
                    out,
                    "wrote the plan of {} ({}, {}) to {}",
                    reference,
                    plural(plan.sources.len() as u64, "source", "sources"),
                    plural(plan.steps.len() as u64, "step", "steps"),
                    path.display()
                )?;
            }
        }
        ExportFormat::ProvJson | ExportFormat::ProvN => {
            let doc = sluice::prov::document(&store, reference)?;
            let text = match format {
                ExportFormat::ProvN => sluice::prov::to_provn(&doc),
                _ => sluice::prov::to_json(&doc),
            };
            if let (true, Some(path)) = (write_text_to(output, &text, out)?, output) {
                writeln!(
                    out,
                    "wrote the lineage of {} in W3C PROV ({}, {}, {}, {}) to {}",
                    doc.subject,
                    plural(
                        doc.count(sluice::prov::ElementKind::Entity) as u64,
                        "entity",
                        "entities"
                    ),
                    plural(
                        doc.count(sluice::prov::ElementKind::Activity) as u64,
                        "activity",
                        "activities"
                    ),
                    plural(
                        doc.count(sluice::prov::ElementKind::Agent) as u64,
                        "agent",
                        "agents"
                    ),
                    plural(doc.relations.len() as u64, "relation", "relations"),
                    path.display()
                )?;
            }
        }
    }
    Ok(0)
}

pub fn report(ctx: &Context<'_>, a: &ReportArgs, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let output = a.output.as_path();
    let format = a
        .format
        .unwrap_or_else(|| match output.extension().and_then(|e| e.to_str()) {
            Some("md" | "markdown") => ReportFormat::Md,
            Some("json") => ReportFormat::Json,
            _ => ReportFormat::Html,
        });
    let opts = sluice::report::ReportOptions {
        sample: a.sample,
        replay: a.reproduce,
        agent: agent.identity(),
    };
    let (report, hash, entry) =
        write_report(&mut store, &agent, &a.reference, format, output, &opts)?;
    writeln!(
        out,
        "wrote the lineage report of {} ({}) to {}",
        report.subject.version,
        plural(report.steps.len() as u64, "step", "steps"),
        output.display()
    )?;
    writeln!(
        out,
        "  blake3:{hash}, recorded as audit entry {}",
        entry.seq
    )?;
    writeln!(out, "  {}", report.verification.statement)?;
    let intact = report.verification.intact
        && report
            .verification
            .replay
            .as_ref()
            .is_none_or(|r| r.failed.is_none());
    Ok(if intact { 0 } else { 1 })
}

/// What `identify --json` prints.
#[derive(Serialize)]
pub struct Identified<'a> {
    pub file: String,
    /// The file's BLAKE3 hash, as `blake3:` and 64 hex digits.
    pub hash: String,
    /// The recorded versions with these bytes (several when the same bytes were recorded twice).
    pub versions: &'a [Version],
    /// The audit entry that recorded a report with these bytes.
    pub report: Option<ReportFound>,
}

#[derive(Serialize)]
pub struct ReportFound {
    pub format: String,
    pub subject: String,
    pub version_hash: String,
    pub audit_entry: u64,
    pub at: String,
    pub by: String,
    pub after_entry: serde_json::Value,
}

/// `identify FILE`: is this file a recorded version, or a report recorded in the audit chain?
pub fn identify(
    ctx: &Context<'_>,
    file: &Path,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let mut hasher = blake3::Hasher::new();
    let mut f = std::fs::File::open(file).map_err(|e| sluice::Error::io(file, e))?;
    std::io::copy(&mut f, &mut hasher)
        .with_context(|| format!("cannot read {}", file.display()))?;
    let hex = hasher.finalize().to_hex().to_string();
    let versions = store.lineage.versions_by_hash_prefix(&hex)?;
    let report = if versions.is_empty() {
        let bytes = std::fs::read(file).map_err(|e| sluice::Error::io(file, e))?;
        sluice::report::find(&store, &bytes)?.map(|e| {
            let d: serde_json::Value = serde_json::from_str(&e.details).unwrap_or_default();
            ReportFound {
                format: d["format"].as_str().unwrap_or("?").to_string(),
                subject: e.subject.clone(),
                version_hash: d["version"].as_str().unwrap_or("?").to_string(),
                audit_entry: e.seq,
                at: e.at.clone(),
                by: Agent::parse_identity(&e.agent, "store").identity(),
                after_entry: d["after_entry"].clone(),
            }
        })
    } else {
        None
    };
    let found = !versions.is_empty() || report.is_some();
    let id = Identified {
        file: file.display().to_string(),
        hash: format!("blake3:{hex}"),
        versions: &versions,
        report,
    };
    if as_json {
        json(out, &id)?;
    } else if !versions.is_empty() {
        let labels: Vec<String> = versions.iter().map(Version::label).collect();
        writeln!(
            out,
            "{} is the recorded version {} ({})",
            id.file,
            labels.join(" and "),
            short_hash(&hex)
        )?;
        for v in &versions {
            writeln!(
                out,
                "  {}: {}, recorded by step {}",
                v.label(),
                shape(v),
                v.step_id
            )?;
        }
    } else if let Some(r) = &id.report {
        writeln!(
            out,
            "{} is the lineage report ({}) of {} (version blake3:{})",
            id.file, r.format, r.subject, r.version_hash
        )?;
        writeln!(
            out,
            "  recorded as audit entry {} at {} by {}, made after audit entry {}",
            r.audit_entry, r.at, r.by, r.after_entry
        )?;
        writeln!(out, "  {}", id.hash)?;
    } else {
        eprintln!(
            "error: no version or report with these bytes ({}, {}) is recorded in this store; \
             it was changed after it was written, or comes from another store",
            id.file, id.hash
        );
    }
    Ok(if found { 0 } else { 1 })
}

/// Builds the report of `reference`, renders it, writes it to `output` and records it in the
/// audit chain; returns the report, the written file's BLAKE3 and the audit entry.
pub fn write_report(
    store: &mut Store,
    agent: &Agent,
    reference: &str,
    format: ReportFormat,
    output: &Path,
    opts: &sluice::report::ReportOptions,
) -> anyhow::Result<(sluice::report::Report, String, sluice::model::AuditEntry)> {
    let report = sluice::report::build(store, reference, opts)?;
    let (text, name) = match format {
        ReportFormat::Html => (render_report::html(&report), "html"),
        ReportFormat::Md => (render_report::markdown(&report), "md"),
        ReportFormat::Json => (render_report::json(&report), "json"),
    };
    let shown = output.display().to_string();
    let entry = write_file_recorded(output, text.as_bytes(), || {
        Ok(sluice::report::record(
            store,
            agent,
            &report,
            name,
            text.as_bytes(),
            &shown,
        )?)
    })?;
    let hash = blake3::hash(text.as_bytes()).to_hex().to_string();
    Ok((report, hash, entry))
}

/// Writes `bytes` to a temporary file beside `path`, then runs `record` (the audit entry), then
/// renames the file into place: the report exists under its name only when it was recorded,
/// and a failure to record removes it again.
fn write_file_recorded<T>(
    path: &Path,
    bytes: &[u8],
    record: impl FnOnce() -> anyhow::Result<T>,
) -> anyhow::Result<T> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .ok_or_else(|| anyhow!("{}: not a file name; give -o a file path", path.display()))?;
    super::folder_exists(path, dir)?;
    let tmp = dir.join(format!(".{}.sluice-part", name.to_string_lossy()));
    let written = std::fs::File::create(&tmp)
        .and_then(|mut f| f.write_all(bytes).and_then(|_| f.sync_all()))
        .with_context(|| format!("cannot write {}", path.display()));
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    let recorded = match record() {
        Ok(r) => r,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
    };
    std::fs::rename(&tmp, path).with_context(|| {
        format!(
            "cannot move the report into place at {} (it was recorded in the audit log; its text is in {})",
            path.display(),
            tmp.display()
        )
    })?;
    Ok(recorded)
}
