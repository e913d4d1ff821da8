//! Commands about sluice itself and its setting: `demo`, `completions`, `manual`, `upgrade`
//! (old plan and rules files to the current form), `identity` (who is acting) and `reclaim`
//! (the space of objects nothing refers to).

use std::io::{self, Write};
use std::path::Path;

use serde::Serialize;

use super::args::ShellArg;
use super::text::*;
use super::{read_text, shell, write_file_atomically, Context, ExitCode};
use sluice::demo::DemoReport;
use sluice::model::Agent;

pub fn demo(
    ctx: &Context<'_>,
    dir: Option<&Path>,
    lineage_server: Option<&str>,
    object_bucket: Option<&str>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let agent = ctx.agent(None)?;
    let target = ctx.new_store_folder(dir, "DIR", || sluice::demo::fresh_folder(&ctx.cwd))?;
    let at = sluice::store::location::Location {
        lineage: lineage_server.map(str::to_string),
        objects: object_bucket.map(str::to_string),
        ..Default::default()
    };
    let report = sluice::demo::run_at(&target, &agent, &at)?;
    demo_text(out, &report)?;
    let d = &report.documented;
    let doc = &d.report.report;
    writeln!(out)?;
    writeln!(out, "documented for an audit:")?;
    writeln!(
        out,
        "  {}  the lineage report of {} ({}; open it in a browser, or print it)",
        d.report_file.display(),
        doc.subject.version,
        super::text::plural(doc.steps.len() as u64, "step", "steps")
    )?;
    writeln!(
        out,
        "    {}, recorded as audit entry {}; {}",
        short_hash(&d.report.hash),
        d.report.entry.seq,
        if doc.verification.intact {
            "the store verified intact when it was written"
        } else {
            "the store did NOT verify; see the report"
        }
    )?;
    writeln!(
        out,
        "  {}  its lineage in W3C PROV (PROV-JSON: {} entities, {} activities, {} agents)",
        d.prov_file.display(),
        d.prov_counts.0,
        d.prov_counts.1,
        d.prov_counts.2
    )?;
    demo_next(out, &report)?;
    Ok(0)
}

pub fn completions(shell: ShellArg, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    shell::completions(shell, out)?;
    Ok(0)
}

pub fn manual(dir: Option<&Path>, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    let Some(dir) = dir else {
        shell::top_page(out)?;
        return Ok(0);
    };
    let written = shell::write_pages(dir)?;
    writeln!(
        out,
        "wrote {} manual pages to {} (sluice.1 and one per command)",
        written.len(),
        dir.display()
    )?;
    writeln!(
        out,
        "next: `man -l {}`, or add the folder's parent to MANPATH and run `man sluice`",
        dir.join("sluice.1").display()
    )?;
    Ok(0)
}

/// `upgrade FILE [-o NEW]`: a plan or rules file of the old form in the current form.
pub fn upgrade(
    file: &Path,
    output: Option<&Path>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let text = read_text(
        file,
        "the file to upgrade",
        "sluice upgrade --help",
        sluice::plan::MAX_PLAN_BYTES,
    )?;
    let converted =
        sluice::plan::upgrade(&text).map_err(|e| anyhow::anyhow!("{}: {e}", file.display()))?;
    match output {
        None => out.write_all(converted.as_bytes())?,
        Some(path) => {
            write_file_atomically(path, |f| Ok(f.write_all(converted.as_bytes())?))?;
            writeln!(
                out,
                "wrote {} in the current form to {}",
                file.display(),
                path.display()
            )?;
        }
    }
    Ok(0)
}

/// What `identity --json` prints.
#[derive(Serialize)]
pub struct IdentityJson<'a> {
    pub acting: &'a Agent,
    /// The store's default person, if one is set (and a store is found).
    pub store_setting: Option<&'a Agent>,
    /// The audit entry that recorded a new setting, when this run set one.
    pub recorded_as_entry: Option<u64>,
}

/// `identity`: who is acting and why; with `--name` it sets the store's default person.
pub fn identity(
    ctx: &Context<'_>,
    name: Option<&str>,
    email: Option<&str>,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = match (name, ctx.open_store()) {
        (_, Ok(s)) => Some(s),
        (None, Err(_)) => None,
        (Some(_), Err(e)) => return Err(e),
    };
    let mut entry = None;
    if let (Some(name), Some(s)) = (name, store.as_mut()) {
        let by = ctx.agent(Some(s))?;
        let person = Agent::new(name, email, "store");
        entry = Some(sluice::agent::set_store_setting(s, &person, &by)?.seq);
    }
    let setting = match &store {
        Some(s) => sluice::agent::store_setting(s)?,
        None => None,
    };
    let acting = ctx.agent(store.as_ref())?;
    if as_json {
        json(
            out,
            &IdentityJson {
                acting: &acting,
                store_setting: setting.as_ref(),
                recorded_as_entry: entry,
            },
        )?;
        return Ok(0);
    }
    if let (Some(seq), Some(p)) = (entry, &setting) {
        writeln!(
            out,
            "the store's default person is now {} (audit entry {seq})",
            p.identity()
        )?;
    }
    let from = match acting.source.as_str() {
        "option" => "from --person",
        "environment" => "from SLUICE_PERSON",
        "store" => "the store's setting",
        _ => "the operating system user",
    };
    writeln!(out, "acting: {} ({from})", acting.identity())?;
    if acting.source != "store" {
        match &setting {
            Some(p) => writeln!(out, "store setting: {}", p.identity())?,
            None if store.is_some() => writeln!(
                out,
                "store setting: none (set one with `sluice identity --name NAME --email ADDRESS`)"
            )?,
            None => {}
        }
    }
    Ok(0)
}

pub fn demo_text(out: &mut impl Write, r: &DemoReport) -> io::Result<()> {
    writeln!(out, "demo store created in {}", r.dir.display())?;
    writeln!(out, "{}", r.scenario)?;
    writeln!(out)?;
    writeln!(
        out,
        "ran the plan {}: each export received, then every step recorded with its reason and every changed cell:",
        r.plan.display()
    )?;
    indented(out, |o| super::record::run_done(o, &r.done))?;
    writeln!(out)?;
    writeln!(
        out,
        "then work outside sluice, captured with its reason and with row lineage inferred by comparing versions:"
    )?;
    for (what, r) in &r.outside {
        writeln!(out, "  {what}")?;
        writeln!(
            out,
            "    recorded {} ({}) from {}; {}",
            r.version.label(),
            short_hash(&r.version.hash),
            r.from.label(),
            inferred_summary(&r.lineage)
        )?;
    }
    writeln!(out)?;
    writeln!(out, "where did this amount come from?")?;
    writeln!(out, "  $ {}", r.traced.0)?;
    indented(out, |o| super::query::trail(o, &r.traced.1))?;
    writeln!(out)?;
    writeln!(out, "why is this total what it is?")?;
    writeln!(out, "  $ {}", r.explained.0)?;
    indented(out, |o| super::query::explanation(o, &r.explained.1))?;
    writeln!(out)?;
    writeln!(
        out,
        "can the quarter's figures be reproduced from the raw exports?"
    )?;
    writeln!(out, "  $ {}", r.replayed.0)?;
    let rp = &r.replayed.1;
    if rp.reproduced {
        let raw = rp.steps.iter().filter(|s| s.result == "raw_intact").count() as u64;
        writeln!(
            out,
            "  reproduced {} ({}): all {} check out ({} intact, {} run again gave the recorded bytes)",
            rp.version,
            short_hash(&rp.hash),
            plural(rp.steps.len() as u64, "step", "steps"),
            plural(raw, "raw input", "raw inputs"),
            plural(rp.steps.len() as u64 - raw, "step", "steps")
        )?;
    } else {
        writeln!(out, "  not reproduced: {} (run it to see why)", rp.version)?;
    }
    Ok(())
}

/// The commands the demo suggests trying next, last in its output.
pub fn demo_next(out: &mut impl Write, r: &DemoReport) -> io::Result<()> {
    writeln!(out)?;
    writeln!(out, "try next:")?;
    for c in &r.next_commands {
        writeln!(out, "  {c}")?;
    }
    Ok(())
}

/// `transfer`: the store's objects copied into a bucket or back into its folder.
pub fn transfer(
    ctx: &Context<'_>,
    to_bucket: Option<&str>,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let done = store.transfer(to_bucket, &agent, &sluice::clock::now_rfc3339())?;
    if as_json {
        json(out, &done)?;
        return Ok(0);
    }
    writeln!(
        out,
        "copied {} ({}) from {} to {}, each re-hashed as it was read and again from its new place{}",
        super::text::plural(done.objects, "object", "objects"),
        super::text::plural(done.bytes, "byte", "bytes"),
        done.from,
        done.to,
        if done.already_there > 0 {
            format!(" ({} already there)", done.already_there)
        } else {
            String::new()
        }
    )?;
    writeln!(
        out,
        "the store now reads its objects from {}; the copy in {} was left as it was",
        done.to, done.from
    )?;
    Ok(0)
}

/// `reclaim`: removes objects nothing refers to and packs small segments (recorded in the
/// audit log).
pub fn reclaim(ctx: &Context<'_>, as_json: bool, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let done = store.reclaim(&agent, &sluice::clock::now_rfc3339())?;
    if as_json {
        json(out, &done)?;
    } else {
        reclaim_text(out, &done)?;
    }
    Ok(0)
}

pub fn reclaim_text(out: &mut impl Write, r: &sluice::store::objects::Reclaimed) -> io::Result<()> {
    writeln!(
        out,
        "reclaimed {}: {} removed, {} kept in {} (were {}, {}); {} of the earlier layout moved into a segment, {} removed",
        plural(r.bytes_before.saturating_sub(r.bytes_after), "byte", "bytes"),
        plural(r.objects_removed, "unreferenced object", "unreferenced objects"),
        plural(r.objects_kept, "object", "objects"),
        plural(r.segments_after, "segment", "segments"),
        plural(r.segments_before, "segment", "segments"),
        plural(r.bytes_before, "byte", "bytes"),
        plural(r.loose_converted, "loose object", "loose objects"),
        plural(r.temp_files_removed, "leftover temporary file", "leftover temporary files"),
    )?;
    if r.bucket_objects_removed > 0 {
        writeln!(
            out,
            "removed {} from the bucket ({} stored)",
            plural(
                r.bucket_objects_removed,
                "unreferenced object",
                "unreferenced objects"
            ),
            plural(r.bucket_bytes_removed, "byte", "bytes"),
        )?;
    }
    Ok(())
}
