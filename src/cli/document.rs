//! Commands that document a version for other people and tools: `export` (a plan or W3C PROV),
//! `report` (the lineage report, recorded in the audit chain) and `identify` (which recorded
//! version or report a file is).

use std::io::Write;
use std::path::Path;

use anyhow::Context as _;
use serde::Serialize;

use super::args::{ExportFormat, ReportArgs, ReportFormat};
use super::text::*;
use super::{write_text_to, Context, ExitCode};
use sluice::model::{Agent, Version};

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
        excluded: a.excluded,
        agent: agent.identity(),
    };
    let format = match format {
        ReportFormat::Html => sluice::report::Format::Html,
        ReportFormat::Md => sluice::report::Format::Markdown,
        ReportFormat::Json => sluice::report::Format::Json,
    };
    let written = sluice::report::write(&mut store, &agent, &a.reference, format, output, &opts)?;
    let (report, hash, entry) = (&written.report, &written.hash, &written.entry);
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
    writeln!(out, "  own hash blake3:{}", written.own_hash)?;
    writeln!(out, "  {}", report.verification.statement)?;
    Ok(if report.verification.failed() { 1 } else { 0 })
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
    /// The recorded deliveries of a file with these bytes (`retrieve --deliver`).
    pub deliveries: Vec<sluice::delivery::Delivery>,
    /// The sign-offs over these bytes (a version's or a report's), signatures checked.
    pub sign_offs: Vec<sluice::endorse::SignOff>,
    /// The erasure orders that reached those versions: the file still holds what they erased
    /// from the store.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub erasures: Vec<sluice::erasure::VersionErasure>,
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
    let deliveries = sluice::delivery::of_file(&store, &hex)?;
    let found = !versions.is_empty() || report.is_some() || !deliveries.is_empty();
    let id = Identified {
        file: file.display().to_string(),
        hash: format!("blake3:{hex}"),
        versions: &versions,
        report,
        deliveries,
        sign_offs: sluice::endorse::sign_offs(&store, &hex, true)?,
        erasures: versions
            .iter()
            .map(|v| sluice::erasure::orders_reaching(&store, v))
            .collect::<sluice::Result<Vec<_>>>()?
            .into_iter()
            .flatten()
            .collect(),
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
        for e in &id.erasures {
            let order = order_named(e.order, &e.request, &e.ordered_at);
            if e.cells_erased > 0 {
                writeln!(
                    out,
                    "  {} lost {} under {order}: this file still holds what the order erased from the store",
                    e.version,
                    plural(e.cells_erased, "cell", "cells"),
                )?;
            } else {
                writeln!(
                    out,
                    "  {} keeps {} as published under {order}, which erased values they aggregated",
                    e.version,
                    plural(e.cells_kept_as_published, "summary cell", "summary cells"),
                )?;
            }
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
    }
    if !as_json && !id.deliveries.is_empty() {
        if versions.is_empty() && id.report.is_none() {
            writeln!(
                out,
                "{} is a delivered rendering of {} ({})",
                id.file,
                id.deliveries[0].version,
                short_hash(&id.deliveries[0].version_hash)
            )?;
        }
        for d in &id.deliveries {
            let types = if d.column_types.is_empty() {
                String::new()
            } else {
                format!(", column types {}", d.column_types.join(" "))
            };
            writeln!(
                out,
                "  delivered as {} ({}{types}) at {} by {}: {} (audit entry {})",
                d.file, d.format, d.at, d.by, d.why, d.audit_entry
            )?;
        }
    }
    if found && !as_json {
        super::endorse::sign_off_lines(out, &id.sign_offs)?;
    }
    if !found && !as_json {
        eprintln!(
            "error: no version, report or delivered file with these bytes ({}, {}) is recorded in this store; \
             it was changed after it was written, or comes from another store",
            id.file, id.hash
        );
    }
    Ok(if found { 0 } else { 1 })
}
