//! The reading commands: `trace`, `explain`, `impact`, `lineage`, `timeline`, `about`,
//! `retrieve` and `verify`. They never change the store; what they print is rendered here.

use std::io::{self, Write};
use std::path::Path;

use anyhow::anyhow;

use super::args::{LineageFormat, RetrieveFormat, TimelineArgs};
use super::text::*;
use super::{write_text_to, Context, ExitCode};
use sluice::explain::Explanation;
use sluice::history::{TimelineEntry, TimelineFilter, VersionDetail};
use sluice::model::short_hash;
use sluice::trace::{End, Trail};
use sluice::verify::VerifyReport;

#[allow(clippy::too_many_arguments)]
pub fn trace(
    ctx: &Context<'_>,
    reference: &str,
    row: Option<u64>,
    key: &[String],
    column: &str,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let pick = row_pick(row, key)?;
    let t = sluice::trace::trace(&store, reference, &pick, column)?;
    if as_json {
        json(out, &t)?;
    } else {
        trail(out, &t)?;
    }
    Ok(0)
}

#[allow(clippy::too_many_arguments)]
pub fn explain(
    ctx: &Context<'_>,
    reference: &str,
    row: Option<u64>,
    key: &[String],
    column: &str,
    limit: usize,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let pick = row_pick(row, key)?;
    let e = sluice::explain::explain(&store, reference, &pick, column, limit)?;
    if as_json {
        json(out, &e)?;
    } else {
        explanation(out, &e)?;
    }
    // A stored value that the input does not give again is damage, not a usage error.
    // A summary cell kept as published under an erasure order is not expected to agree with
    // what the store holds now: that is what the order recorded, not a failure of the data.
    Ok(if e.agrees || e.kept_as_published.is_some() {
        0
    } else {
        1
    })
}

/// `--row N` or `--key COL=VAL,...` as a row pick.
fn row_pick(row: Option<u64>, key: &[String]) -> anyhow::Result<sluice::trace::RowPick> {
    Ok(match row {
        Some(n) => sluice::trace::RowPick::Number(n),
        None => sluice::trace::RowPick::Key(
            key.iter()
                .map(|kv| {
                    kv.split_once('=')
                        .map(|(k, v)| (k.to_string(), v.to_string()))
                        .ok_or_else(|| {
                            anyhow!("--key {kv}: expected COL=VAL, e.g. --key order_id=41012")
                        })
                })
                .collect::<anyhow::Result<Vec<_>>>()?,
        ),
    })
}

pub fn impact(
    ctx: &Context<'_>,
    reference: &str,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let i = sluice::graph::impact(&store, reference)?;
    if as_json {
        json(out, &i)?;
    } else {
        impact_text(out, &i)?;
    }
    Ok(0)
}

pub fn lineage(
    ctx: &Context<'_>,
    reference: Option<&str>,
    format: LineageFormat,
    output: Option<&Path>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let text = match format {
        LineageFormat::Dot => sluice::graph::dot(&store, reference)?,
        LineageFormat::Svg => sluice::graph::svg(&store, reference)?,
    };
    if write_text_to(output, &text, out)? {
        if let Some(path) = output {
            writeln!(out, "wrote the lineage graph to {}", path.display())?;
        }
    }
    Ok(0)
}

impl From<&TimelineArgs> for TimelineFilter {
    fn from(a: &TimelineArgs) -> TimelineFilter {
        TimelineFilter {
            dataset: a.dataset.clone(),
            by: a.by.clone(),
            since: a.since.clone(),
            until: a.until.clone(),
            limit: a.limit,
        }
    }
}

pub fn timeline(
    ctx: &Context<'_>,
    a: &TimelineArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let entries = sluice::history::timeline(&store, &TimelineFilter::from(a))?;
    if a.json {
        json(out, &entries)?;
    } else {
        timeline_text(out, &entries)?;
    }
    Ok(0)
}

/// The timeline as a table, oldest first, one line per step.
pub fn timeline_text(out: &mut impl Write, entries: &[TimelineEntry]) -> io::Result<()> {
    if entries.is_empty() {
        return writeln!(
            out,
            "no steps to show; receive a file with `sluice receive FILE --as NAME`, or widen the filters"
        );
    }
    let mut rows = vec![[
        "when (UTC)".to_string(),
        "step".to_string(),
        "action".to_string(),
        "made".to_string(),
        "by".to_string(),
        "reason".to_string(),
    ]];
    for e in entries {
        let s = &e.step;
        let when = s
            .started_at
            .get(..19)
            .unwrap_or(&s.started_at)
            .replace('T', " ");
        let action = match &s.operation {
            Some(op) => format!("{} {op}", e.action),
            None => e.action.clone(),
        };
        let made = if e.produced.is_empty() {
            "-".to_string()
        } else {
            e.produced
                .iter()
                .map(|v| v.label())
                .collect::<Vec<_>>()
                .join(", ")
        };
        let mut reason = s.reason.clone().unwrap_or_default();
        if let Some(r) = s.repeats_step {
            reason = format!("(repeats step {r}) {reason}");
        }
        if let Some(r) = s.reverts_step {
            reason = format!("(withdraws step {r}) {reason}");
        }
        rows.push([
            when,
            s.id.to_string(),
            action,
            made,
            e.by.name.clone(),
            reason.trim_end().replace(['\n', '\r'], " "),
        ]);
    }
    table(out, &rows, &[false, false, false, false, false, false])
}

pub fn about(
    ctx: &Context<'_>,
    reference: &str,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let detail = sluice::history::about(&store, reference)?;
    if as_json {
        json(out, &detail)?;
    } else {
        about_text(out, &detail)?;
    }
    Ok(0)
}

/// What `retrieve` was asked for.
pub struct Retrieval<'a> {
    pub reference: &'a str,
    pub output: Option<&'a Path>,
    pub format: Option<RetrieveFormat>,
    pub column_types: &'a [String],
    /// With `--deliver`: the reason, and the retrieval is recorded as a delivery.
    pub deliver: Option<&'a str>,
}

pub fn retrieve(
    ctx: &Context<'_>,
    r: Retrieval<'_>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let given = r
        .column_types
        .iter()
        .map(|p| sluice::columnar::write::parse_given(p).map_err(|e| anyhow!("--column-type {e}")))
        .collect::<anyhow::Result<Vec<_>>>()?;
    if !given.is_empty() && r.format.is_none() {
        return Err(anyhow!(
            "--column-type applies to --format parquet or --format arrow; add one of them"
        ));
    }
    if let Some(why) = r.deliver {
        sluice::delivery::check_reason(why)?;
    }
    let mut store = ctx.open_store()?;
    let version = sluice::refs::resolve(&store.lineage, r.reference)?;
    let agent = match r.deliver {
        Some(_) => Some(ctx.agent(Some(&store))?),
        None => None,
    };
    use sluice::columnar::write::OutFormat;
    use sluice::export::{Format, TextFormat};
    let format = r.format.map(|f| match f {
        RetrieveFormat::Csv => Format::Text(TextFormat::Csv),
        RetrieveFormat::Tsv => Format::Text(TextFormat::Tsv),
        RetrieveFormat::Jsonl => Format::Text(TextFormat::Jsonl),
        RetrieveFormat::Parquet => Format::Columnar(OutFormat::Parquet),
        RetrieveFormat::Arrow => Format::Columnar(OutFormat::ArrowIpc),
    });
    let hash: sluice::hash::Hash = version.hash.parse().map_err(|e| {
        anyhow!(
            "the store holds a malformed hash for {}: {e}",
            version.label()
        )
    })?;
    // Writes the version in the asked form into `w`, then, when it is a delivery, records it
    // with the hash of exactly the bytes written.
    let deliver_into = |store: &mut sluice::store::Store,
                        w: &mut dyn Write|
     -> anyhow::Result<Option<sluice::delivery::Delivery>> {
        let mut w = sluice::delivery::Tally::new(w, r.deliver.is_some());
        match format {
            Some(format) => sluice::export::write_in_with(store, &version, format, &given, &mut w)?,
            None => {
                let out_name = r.output.unwrap_or(Path::new("standard output"));
                store.objects.copy_to(&hash, &mut w, out_name)?;
            }
        }
        w.flush()?;
        let (Some(why), Some(agent)) = (r.deliver, agent.as_ref()) else {
            return Ok(None);
        };
        let (file_hash, bytes) = w.finish();
        let file = r
            .output
            .map_or("-".to_string(), |p| p.display().to_string());
        let form = r.format.map_or("stored bytes", RetrieveFormat::name);
        let handover = sluice::delivery::Handover {
            version: &version,
            format: form,
            column_types: r.column_types,
            file: &file,
            file_hash: &file_hash,
            bytes,
            why,
        };
        Ok(Some(sluice::delivery::record(store, &handover, agent)?))
    };
    let delivered = match r.output {
        None => deliver_into(&mut store, out)?,
        Some(path) => {
            let mut d = None;
            super::write_file_atomically(path, |f| {
                d = deliver_into(&mut store, f)?;
                Ok(())
            })?;
            d
        }
    };
    if let Some(d) = delivered {
        eprintln!(
            "delivered {} as {} ({}, blake3:{}, {}): recorded as audit entry {}",
            d.version,
            d.file,
            d.format,
            &d.file_hash[..16.min(d.file_hash.len())],
            plural(d.bytes, "byte", "bytes"),
            d.audit_entry
        );
    }
    Ok(0)
}

pub fn verify(
    ctx: &Context<'_>,
    deep: bool,
    endorsements: &[std::path::PathBuf],
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let mut report = sluice::verify::verify_with(&store, deep)?;
    for file in endorsements {
        let text = super::read_text(
            file,
            "the endorsement file",
            "sluice endorse --help; README.md, \"Sign-offs\"",
            // A statement and its armored signature take a few kilobytes.
            1 << 20,
        )?;
        let found = sluice::verify::endorsement_file(&store, &file.display().to_string(), &text)?;
        report.problems.extend(found);
    }
    report.intact = report.problems.is_empty();
    if as_json {
        json(out, &report)?;
    } else {
        verify_text(out, &report)?;
    }
    Ok(if report.intact { 0 } else { 1 })
}

pub fn about_text(out: &mut impl Write, d: &VersionDetail) -> io::Result<()> {
    let v = &d.version;
    writeln!(
        out,
        "{}{}",
        v.label(),
        if d.is_latest { "  (latest)" } else { "" }
    )?;
    writeln!(out, "  hash         blake3:{}", v.hash)?;
    writeln!(out, "  size         {}", plural(v.n_bytes, "byte", "bytes"))?;
    // Stored is the rule and goes unsaid; the exceptions are named.
    match d.storage {
        _ if !d.erasures.is_empty() => writeln!(
            out,
            "  storage      its erased form, stored; it is not computed from its recipe again"
        )?,
        sluice::model::Storage::Recomputable => writeln!(
            out,
            "  storage      recomputable: the bytes are computed from the recipe of step {} when read, and checked against the hash",
            v.step_id
        )?,
        sluice::model::Storage::Kept => writeln!(out, "  storage      kept (sluice retain)")?,
        sluice::model::Storage::Stored => {}
    }
    for e in &d.erasures {
        let order = order_named(e.order, &e.request, &e.ordered_at);
        if e.cells_erased > 0 {
            writeln!(
                out,
                "  erased       {} under {order}",
                plural(e.cells_erased, "cell", "cells")
            )?;
        }
        if e.cells_kept_as_published > 0 {
            writeln!(
                out,
                "  erased       {} kept as published under {order}, no longer computable again",
                plural(e.cells_kept_as_published, "summary cell", "summary cells")
            )?;
        }
    }
    writeln!(out, "  shape        {}", shape(v))?;
    let dl = &v.dialect;
    let delim = match dl.delimiter.as_str() {
        "\t" => "tab".to_string(),
        d => format!("\"{d}\""),
    };
    writeln!(
        out,
        "  dialect      delimiter {delim}{}, line ending {}, {}{}, {}",
        if dl.delimiter_detected {
            " (detected)"
        } else {
            ""
        },
        dl.line_ending,
        dl.encoding,
        if dl.bom { " with BOM" } else { "" },
        if dl.has_header {
            "header line"
        } else {
            "no header line"
        }
    )?;
    if let Some(k) = &d.key {
        writeln!(out, "  key          {}", k.join(", "))?;
    }
    if !v.null_tokens.is_empty() {
        writeln!(out, "  null tokens  {}", v.null_tokens.join(", "))?;
    }
    if let Some(s) = &d.step {
        writeln!(out, "  made by      {}", step_line(s))?;
        if let Some(why) = &s.reason {
            writeln!(out, "  why          {why}")?;
        }
        if let Some(src) = &s.source {
            writeln!(
                out,
                "  source       {} ({}, modified {})",
                src.absolute_path,
                plural(src.n_bytes, "byte", "bytes"),
                src.modified.as_deref().unwrap_or("unknown")
            )?;
        }
        if let Some(c) = conversion_line(s) {
            writeln!(out, "  converted    {c}")?;
        }
        if let Some(code) = &s.code {
            code_lines(out, code, "  ", 13)?;
        }
    }
    writeln!(out, "  row index    blake3:{}", v.row_index)?;
    if d.sign_offs.is_empty() {
        writeln!(out, "  signed off   no (unsigned)")?;
    }
    for s in &d.sign_offs {
        writeln!(
            out,
            "  signed off   {} · {} · {} · {} ({})",
            s.meaning,
            s.name,
            s.at,
            s.fingerprint,
            s.status.describe()
        )?;
    }
    for x in &d.deliveries {
        writeln!(
            out,
            "  delivered    {} ({}) · {} · {} · {} (audit entry {})",
            x.file, x.format, x.at, x.by, x.why, x.audit_entry
        )?;
    }
    for c in &d.checks {
        writeln!(
            out,
            "  {:<13}{} {} · {} · {}",
            if c.hold_point { "hold point" } else { "check" },
            if c.passed { "pass" } else { "FAIL" },
            sluice::checks::describe_stored(&c.rule),
            c.checked_at,
            c.agent
        )?;
    }
    writeln!(out)?;
    let mut rows = vec![[
        "column".to_string(),
        "type".to_string(),
        "blank".to_string(),
        "distinct".to_string(),
        "min".to_string(),
        "max".to_string(),
        "length".to_string(),
    ]];
    for p in &d.profile {
        let clip = |s: &Option<String>| {
            let s = s.clone().unwrap_or_else(|| "-".into());
            let s = if s.chars().count() > 24 {
                format!("{}…", s.chars().take(23).collect::<String>())
            } else {
                s
            };
            // Make stray white space at either end visible.
            if s.starts_with(char::is_whitespace) || s.ends_with(char::is_whitespace) {
                format!("\"{s}\"")
            } else {
                s
            }
        };
        rows.push([
            p.name.clone(),
            p.inferred_type.clone(),
            count(p.n_blank),
            format!(
                "{}{}",
                if p.distinct_exact { "" } else { "~" },
                count(p.n_distinct)
            ),
            clip(&p.min),
            clip(&p.max),
            match (p.min_len, p.max_len) {
                (Some(a), Some(b)) if a == b => a.to_string(),
                (Some(a), Some(b)) => format!("{a}-{b}"),
                _ => "-".into(),
            },
        ]);
    }
    table(out, &rows, &[false, false, true, true, false, false, true])?;
    let cut = d.profile.iter().any(|p| {
        [&p.min, &p.max]
            .into_iter()
            .flatten()
            .any(|v| v.len() > sluice::table::profile::KEPT_VALUE_BYTES && v.ends_with('\u{2026}'))
    });
    if cut {
        writeln!(
            out,
            "  (the profile keeps a min or max longer than {} bytes as its start and \u{2026}; the version holds the whole value)",
            sluice::table::profile::KEPT_VALUE_BYTES
        )?;
    }
    Ok(())
}

pub fn verify_text(out: &mut impl Write, r: &VerifyReport) -> io::Result<()> {
    if r.intact {
        writeln!(
            out,
            "intact: {} re-hashed ({}), {} checked, audit chain of {} verified; database structure and references sound",
            plural(r.objects_checked, "object", "objects"),
            plural(r.bytes_checked, "byte", "bytes"),
            plural(r.versions_checked, "version", "versions"),
            plural(r.audit_entries_checked, "entry", "entries"),
        )?;
    } else {
        writeln!(
            out,
            "damaged: {} found ({}, {}, {} examined)",
            plural(r.problems.len() as u64, "problem", "problems"),
            plural(r.objects_checked, "object", "objects"),
            plural(r.versions_checked, "version", "versions"),
            plural(r.audit_entries_checked, "audit entry", "audit entries"),
        )?;
        for p in &r.problems {
            writeln!(out, "  {}  {}: {}", p.kind, p.subject, p.detail)?;
        }
    }
    writeln!(
        out,
        "storage: {} stored, {} recomputable from {} (each recipe checked{})",
        plural(r.versions_stored, "version", "versions"),
        r.versions_recomputable,
        plural(r.recipes_checked, "recipe", "recipes"),
        if r.versions_recomputed > 0 {
            "; computed again with --deep"
        } else {
            "; computed again only with --deep"
        }
    )?;
    if r.objects_left_in_shared_store > 0 {
        writeln!(
            out,
            "borrowed in part: {} left in the shared store, not checked here (`sluice publish` finds them there)",
            plural(r.objects_left_in_shared_store, "object", "objects")
        )?;
    }
    for o in &r.erasure_orders {
        writeln!(
            out,
            "{}: {} erased in {}; every other cell of them proved unchanged by the commitment recorded before it",
            order_named(o.order, &o.request, &o.ordered_at),
            plural(o.cells_erased, "cell", "cells"),
            plural(o.versions_proved, "version", "versions")
        )?;
    }
    if r.endorsements_checked > 0 && r.intact {
        writeln!(
            out,
            "sign-offs: {} checked against the keys the store trusted when each was made",
            plural(r.endorsements_checked, "signature", "signatures")
        )?;
    }
    if r.versions_recomputed > 0 {
        writeln!(
            out,
            "deep: {} read again; row indexes and column profiles computed from the bytes{}",
            plural(r.versions_recomputed, "version", "versions"),
            if r.problems
                .iter()
                .any(|p| p.kind == "profile" || p.kind == "row_index")
            {
                " (differences listed above)"
            } else {
                " match what is stored"
            }
        )?;
    }
    if r.entries_without_row_commitments > 0 {
        writeln!(
            out,
            "note: audit entries 1-{} were written by an earlier sluice: they commit to their own fields and to the version hash, step, row index and provenance they name, not to every field of the {} they wrote; every later entry commits to every row its command wrote",
            r.entries_without_row_commitments,
            plural(r.rows_before_commitments, "database row", "database rows"),
        )?;
    }
    if r.unreferenced_objects > 0 || r.leftover_temp_files > 0 {
        writeln!(
            out,
            "note: {} and {} left by interrupted commands (harmless)",
            plural(
                r.unreferenced_objects,
                "unreferenced object",
                "unreferenced objects"
            ),
            plural(r.leftover_temp_files, "temporary file", "temporary files"),
        )?;
    }
    Ok(())
}

/// What an erasure order did to a cell, in one line (never its value).
fn erased_line(e: &sluice::erasure::CellErasure) -> String {
    let order = order_named(e.order, &e.request, &e.ordered_at);
    if e.what == "erased" {
        format!("erased by {order}: the store no longer holds its value")
    } else {
        format!(
            "kept as published under {order}, which erased values it aggregated: it can no longer be computed again"
        )
    }
}

/// A cell's trail, newest step first; steps that left the value alone folded into one line.
pub fn trail(out: &mut impl Write, t: &Trail) -> io::Result<()> {
    writeln!(
        out,
        "{} of {}, data row {}: {}",
        t.column,
        t.version,
        t.row,
        shown(&t.value)
    )?;
    trail_body(out, t, "  ")
}

fn trail_body(out: &mut impl Write, t: &Trail, pad: &str) -> io::Result<()> {
    if let Some(e) = &t.erased {
        writeln!(out, "{pad}{}", erased_line(e))?;
    }
    let mut i = 0;
    while i < t.hops.len() {
        let h = &t.hops[i];
        if !h.changed {
            let mut j = i;
            while j < t.hops.len() && !t.hops[j].changed {
                j += 1;
            }
            let group = &t.hops[i..j];
            let names: Vec<String> = group
                .iter()
                .map(|g| {
                    format!(
                        "{} {}",
                        g.step,
                        g.operation
                            .as_deref()
                            .unwrap_or(sluice::history::action_of(g.kind))
                    )
                })
                .collect();
            let last = &group[group.len() - 1];
            writeln!(
                out,
                "{pad}{} left it alone (step {}); {} row {} was {} row {}",
                plural(group.len() as u64, "step", "steps"),
                names.join(", step "),
                h.produced,
                h.row_after,
                last.read,
                last.row_before
            )?;
            i = j;
            continue;
        }
        writeln!(
            out,
            "{pad}step {} · {} ({}) · {} · {}",
            h.step,
            h.operation
                .as_deref()
                .unwrap_or(sluice::history::action_of(h.kind)),
            h.link,
            h.at,
            h.agent
        )?;
        if let Some(why) = &h.why {
            writeln!(out, "{pad}  why     {why}")?;
        }
        if let Some(r) = h.reverts_step {
            writeln!(
                out,
                "{pad}  withdrew step {r}: {} is {}'s table from before that step",
                h.produced, h.read
            )?;
        }
        writeln!(
            out,
            "{pad}  after   {} row {} {}: {}",
            h.produced,
            h.row_after,
            h.column_after,
            shown(&h.value_after)
        )?;
        if h.value_before.is_empty() && h.column_before.contains(" + ") {
            writeln!(
                out,
                "{pad}  before  {} row {} {}",
                h.read, h.row_before, h.column_before
            )?;
        } else {
            writeln!(
                out,
                "{pad}  before  {} row {} {}: {}",
                h.read,
                h.row_before,
                h.column_before,
                shown(&h.value_before)
            )?;
        }
        i += 1;
    }
    match &t.end {
        End::Raw(o) => {
            let raw_hash = o.raw_object.as_deref().unwrap_or(&o.hash);
            let erased = o
                .erased
                .as_ref()
                .map(|e| format!("{pad}        {}", erased_line(e)));
            writeln!(
                out,
                "{pad}raw     {} ({}{}), received {} by {}",
                o.path.as_deref().unwrap_or("(no path recorded)"),
                short_hash(raw_hash),
                match o.format.as_str() {
                    "csv" => "",
                    "jsonl" => ", JSON Lines",
                    "parquet" => ", Apache Parquet",
                    "arrow" => ", Arrow IPC",
                    "ods" => ", OpenDocument spreadsheet",
                    _ => ", Office Open XML workbook",
                },
                o.taken_in_at,
                o.agent
            )?;
            match (&o.cell, &o.raw_object) {
                (Some(cell), Some(_)) => {
                    writeln!(
                        out,
                        "{pad}        cell {cell} ({}): {}{}",
                        o.stored_kind.as_deref().unwrap_or("cell"),
                        shown(&o.raw_value),
                        o.formula
                            .as_deref()
                            .map(|f| format!(", the saved result of ={f}"))
                            .unwrap_or_default()
                    )?;
                    writeln!(
                        out,
                        "{pad}        received as {} column {}: {}",
                        o.version,
                        o.column,
                        shown(o.converted_value.as_deref().unwrap_or_default())
                    )?;
                }
                (None, Some(_)) => {
                    writeln!(
                        out,
                        "{pad}        line {}, key {}: {}",
                        o.line,
                        o.column,
                        if o.stored_kind.as_deref() == Some("missing") {
                            "(no such key on this line)".to_string()
                        } else {
                            o.raw_value.clone()
                        }
                    )?;
                    writeln!(out, "{pad}        {}", o.raw_line)?;
                    writeln!(
                        out,
                        "{pad}        received as {} column {}: {}",
                        o.version,
                        o.column,
                        shown(o.converted_value.as_deref().unwrap_or_default())
                    )?;
                }
                _ => {
                    writeln!(
                        out,
                        "{pad}        {} line {}, column {}: {}",
                        o.version,
                        o.line,
                        o.column,
                        shown(&o.raw_value)
                    )?;
                    writeln!(out, "{pad}        {}", o.raw_line)?;
                }
            }
            if let Some(line) = erased {
                writeln!(out, "{line}")?;
            }
        }
        End::Made {
            version,
            step,
            operation,
            why,
        } => writeln!(
            out,
            "{pad}made    by step {step} ({}) of {version}: {why}",
            operation.as_deref().unwrap_or("outside work")
        )?,
        End::Branches { sources } => {
            for b in sources {
                writeln!(out, "{pad}branch  {}:", b.via)?;
                let inner = format!("{pad}    ");
                writeln!(
                    out,
                    "{inner}{} of {}, data row {}: {}",
                    b.trail.column,
                    b.trail.version,
                    b.trail.row,
                    shown(&b.trail.value)
                )?;
                trail_body(out, &b.trail, &inner)?;
            }
        }
    }
    Ok(())
}

/// An explanation of a summary cell.
pub fn explanation(out: &mut impl Write, e: &Explanation) -> io::Result<()> {
    let group: Vec<String> = e
        .group
        .iter()
        .map(|(c, v)| format!("{c} {}", shown(v)))
        .collect();
    writeln!(
        out,
        "{} of {}, data row {} ({}): {}",
        e.column,
        e.version,
        e.row,
        group.join(", "),
        shown(&e.value)
    )?;
    writeln!(out, "  {}", e.arithmetic)?;
    if e.agrees {
        writeln!(
            out,
            "  computed again from {}: {} (agrees)",
            e.input,
            shown(&e.recomputed)
        )?;
    } else if let Some(k) = &e.kept_as_published {
        writeln!(
            out,
            "  computed again from {}: {}; the stored value is {}",
            e.input,
            shown(&e.recomputed),
            erased_line(k)
        )?;
    } else {
        writeln!(
            out,
            "  computed again from {}: {}, which DIFFERS from the stored value; run `sluice verify`",
            e.input,
            shown(&e.recomputed)
        )?;
    }
    writeln!(
        out,
        "  {} of {} in the group{}",
        plural(e.contributing.rows, "row", "rows"),
        e.input,
        match &e.of_column {
            Some(c) => format!(", {} with a value in {c}", count(e.contributing.with_value)),
            None => String::new(),
        }
    )?;
    for (row, v) in &e.contributing.first {
        match &e.of_column {
            Some(_) => writeln!(out, "    data row {row}: {}", shown(v))?,
            None => writeln!(out, "    data row {row}")?,
        }
    }
    if e.contributing.rows > e.contributing.first.len() as u64 {
        writeln!(
            out,
            "    ... (--limit N lists more; `sluice trace {} --row N --column COL` follows one)",
            e.input
        )?;
    }
    if e.upstream.is_empty() {
        writeln!(
            out,
            "  no earlier step dropped rows of this group or changed its values"
        )?;
    }
    for u in &e.upstream {
        writeln!(
            out,
            "  step {} · {} ({} from {}){}",
            u.step,
            u.operation.as_deref().unwrap_or("outside work"),
            u.produced,
            u.read,
            u.why
                .as_deref()
                .map(|w| format!(" · why: {w}"))
                .unwrap_or_default()
        )?;
        for d in &u.dropped {
            let rows: Vec<String> = d
                .first
                .iter()
                .enumerate()
                .map(|(i, r)| match d.first_duplicate_of.get(i) {
                    Some(of) => format!("{r} (of {of})"),
                    None => r.to_string(),
                })
                .collect();
            writeln!(
                out,
                "    dropped {} of this group: {} (data rows {}{} of {})",
                plural(d.rows, "row", "rows"),
                d.reason,
                rows.join(", "),
                if d.rows > d.first.len() as u64 {
                    ", ..."
                } else {
                    ""
                },
                u.read
            )?;
        }
        if u.more_reasons > 0 {
            writeln!(
                out,
                "    dropped {} of this group for {} (--limit N lists more)",
                plural(u.more_reason_rows, "row", "rows"),
                plural(u.more_reasons, "other reason", "other reasons")
            )?;
        }
        if u.undecided > 0 {
            writeln!(
                out,
                "    dropped {} before a group column existed (not placed in any group)",
                plural(u.undecided, "row", "rows")
            )?;
        }
        if u.changed_cells > 0 {
            writeln!(
                out,
                "    changed {} of the aggregated column in this group",
                plural(u.changed_cells, "cell", "cells")
            )?;
        }
        for (note, n) in &u.noted {
            writeln!(out, "    noted {}: {note}", plural(*n, "cell", "cells"))?;
        }
        if u.more_notes > 0 {
            writeln!(
                out,
                "    noted {} with {} (--limit N lists more)",
                plural(u.more_note_cells, "cell", "cells"),
                plural(u.more_notes, "other note", "other notes")
            )?;
        }
    }
    Ok(())
}

/// What depends on a version.
pub fn impact_text(out: &mut impl Write, i: &sluice::graph::Impact) -> io::Result<()> {
    if i.steps.is_empty() {
        return writeln!(
            out,
            "nothing depends on {} ({})",
            i.version,
            short_hash(&i.hash)
        );
    }
    writeln!(
        out,
        "{} ({}) is read, directly or through others, by {} making {}:",
        i.version,
        short_hash(&i.hash),
        plural(i.steps.len() as u64, "step", "steps"),
        plural(i.versions.len() as u64, "version", "versions")
    )?;
    for s in &i.steps {
        if let sluice::graph::Node::Step {
            id,
            step_kind,
            operation,
            at,
            agent,
            ..
        } = &s.step
        {
            let made: Vec<String> = s
                .made
                .iter()
                .map(|m| {
                    if i.current.contains(m) {
                        format!("{m} (latest)")
                    } else {
                        m.clone()
                    }
                })
                .collect();
            writeln!(
                out,
                "  step {id} · {} · {at} · {agent} -> {}",
                operation
                    .as_deref()
                    .unwrap_or(match sluice::model::StepKind::parse(step_kind) {
                        Some(k) => sluice::history::action_of(k),
                        None => step_kind.as_str(),
                    }),
                made.join(", ")
            )?;
        }
    }
    writeln!(
        out,
        "in use now (latest versions that depend on it): {}",
        if i.current.is_empty() {
            "none".to_string()
        } else {
            i.current.join(", ")
        }
    )
}
