//! The command line: argument definitions ([`args`]), turning them into engine calls (this
//! file), and rendering results as text or JSON ([`render`]). This is the only place that
//! prints, reads the environment or picks exit codes.

pub mod args;
pub mod render;
pub mod render_diff;
pub mod render_report;
pub mod shell;
pub mod term;

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, Context};

use args::{
    ApplyArgs, CaseArg, CatFormat, Cli, Command, ExecArgs, IngestArgs, KeepArg, OnErrorArg,
    OpCommand, OrderArg,
};
use sluice::intake::{self, IngestOptions, IngestOutcome};
use sluice::model::Agent;
use sluice::ops::apply::{self as apply_op, ApplyOptions};
use sluice::ops::date::DateOrder;
use sluice::ops::summarize::{AggFunc, Aggregate};
use sluice::ops::{CaseTo, KeepWhich, OnError, Operation, Renaming};
use sluice::store::Store;
use sluice::{agent, demo, history, refs, verify};

/// What a command asks the process to exit with.
pub type ExitCode = i32;

fn cwd() -> anyhow::Result<PathBuf> {
    std::env::current_dir().context("cannot read the working directory")
}

fn resolve_agent(cli: &Cli, cwd: &Path) -> Agent {
    let env_agent = std::env::var("SLUICE_AGENT").ok();
    let os_user = ["USER", "LOGNAME", "USERNAME"]
        .iter()
        .find_map(|k| std::env::var(k).ok().filter(|v| !v.is_empty()));
    agent::resolve(
        cli.agent.as_deref(),
        env_agent.as_deref(),
        os_user.as_deref(),
        cwd,
    )
}

fn open_store(cli: &Cli, cwd: &Path) -> anyhow::Result<Store> {
    Ok(Store::discover(cli.store.as_deref(), cwd)?)
}

/// In debug builds only (the crash tests' binary): `SLUICE_TEST_IO_POINT=stop:N` ends the
/// process at the Nth I/O point of its object writes as a kill would, `fail:N` makes that
/// point fail (`store::objects::Countdown`).
fn install_test_countdown() {
    if !cfg!(debug_assertions) {
        return;
    }
    let Ok(v) = std::env::var("SLUICE_TEST_IO_POINT") else {
        return;
    };
    let Some((mode, n)) = v.split_once(':') else {
        return;
    };
    if let Ok(n) = n.parse::<u64>() {
        sluice::store::objects::install_countdown(std::sync::Arc::new(
            sluice::store::objects::Countdown::new(n, mode == "stop"),
        ));
    }
}

/// Runs a parsed command line; returns the exit code.
pub fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    install_test_countdown();
    let cwd = cwd()?;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    match &cli.command {
        Command::Init { dir } => {
            let project = dir.clone().unwrap_or_else(|| cwd.clone());
            let agent = resolve_agent(&cli, &cwd);
            let store = Store::init_recorded(&project, &agent)?;
            writeln!(out, "created a store in {}", store.dir().display())?;
            writeln!(
                out,
                "next: take a file in with `sluice ingest FILE --as NAME --why \"...\"`"
            )?;
            Ok(0)
        }
        Command::Ingest(a) if a.from.is_some() => {
            let mut store = open_store(&cli, &cwd)?;
            let opts = ingest_options(a, resolve_agent(&cli, &cwd))?;
            let from = a.from.as_deref().unwrap_or_default();
            if opts.reason.as_deref().is_none_or(|r| r.trim().is_empty()) {
                return Err(anyhow!(
                    "a hand edit needs a reason: add --why TEXT (what was changed by hand, and why)"
                ));
            }
            let source = intake::SourceOptions {
                sheet: a.sheet.clone(),
            };
            let outcome =
                sluice::inferred::ingest_hand_edit_from(&mut store, &a.file, &opts, &source, from)?;
            render::hand_edit_outcome(&mut out, &a.file, &outcome)?;
            if let sluice::inferred::HandEditOutcome::Recorded { warnings, .. } = &outcome {
                for w in warnings {
                    eprintln!("warning: {w}");
                }
            }
            Ok(0)
        }
        Command::Exec(a) => {
            let mut store = open_store(&cli, &cwd)?;
            let opts = exec_options(a, &cwd, resolve_agent(&cli, &cwd))?;
            match sluice::exec::exec(&mut store, &opts)? {
                sluice::exec::ExecOutcome::Recorded {
                    recorded,
                    unchanged,
                    code,
                } => {
                    render::exec_recorded(&mut out, &recorded, &unchanged, &code)?;
                    Ok(0)
                }
                sluice::exec::ExecOutcome::Failed { failure, .. } => {
                    eprintln!(
                        "error: {}; nothing was recorded but an audit entry of the failure; fix the command and run `sluice exec` again",
                        failure.describe()
                    );
                    Ok(failure.exit_code())
                }
            }
        }
        Command::Ingest(a) => {
            let mut store = open_store(&cli, &cwd)?;
            let opts = ingest_options(a, resolve_agent(&cli, &cwd))?;
            let source = intake::SourceOptions {
                sheet: a.sheet.clone(),
            };
            let outcome = intake::ingest_from(&mut store, &a.file, &opts, &source)?;
            render::ingest_outcome(&mut out, &a.file, &outcome)?;
            if let IngestOutcome::Recorded { warnings, .. } = &outcome {
                for w in warnings {
                    eprintln!("warning: {w}");
                }
            }
            Ok(0)
        }
        Command::Apply(a) => {
            let mut store = open_store(&cli, &cwd)?;
            let agent = resolve_agent(&cli, &cwd);
            let mut opts = apply_options(a, agent.clone())?;
            // A mapping table given as a file is taken in with the step, so it is part of the
            // lineage, and recorded only if the step succeeds.
            if let Operation::Map { table, .. } | Operation::Lookup { table, .. } = &opts.op {
                let path = Path::new(table.as_str()).to_path_buf();
                if path.is_file() {
                    opts.map_table_file = Some((
                        path.clone(),
                        IngestOptions {
                            dataset: dataset_name_for(&path),
                            key: None,
                            reason: Some(format!(
                                "table for `{}` on {}",
                                opts.op.name(),
                                a.reference
                            )),
                            delimiter: None,
                            has_header: true,
                            encoding: None,
                            null_tokens: Vec::new(),
                            agent,
                        },
                    ));
                }
            }
            let outcome = apply_op::apply(&mut store, &a.reference, &opts)?;
            render::apply_outcome(&mut out, &opts.op, &outcome)?;
            Ok(0)
        }
        Command::Check {
            reference,
            rules,
            json,
        } => {
            let mut store = open_store(&cli, &cwd)?;
            let text = read_text(rules, "the rules file", "sluice check --help")?;
            let parsed = sluice::checks::parse_rules(&text, &rules.display().to_string())?;
            let report = sluice::checks::check(
                &mut store,
                reference,
                &parsed,
                false,
                &resolve_agent(&cli, &cwd),
            )?;
            if *json {
                render::json(&mut out, &report)?;
            } else {
                render::check(&mut out, &report)?;
            }
            Ok(if report.passed { 0 } else { 1 })
        }
        Command::Run { plan, inputs, json } => {
            let mut store = open_store(&cli, &cwd)?;
            let text = read_text(plan, "the plan", "sluice run --help")?;
            let parsed = sluice::plan::parse(&text, &plan.display().to_string())?;
            let bindings = inputs
                .iter()
                .map(|i| binding(i, &cwd))
                .collect::<anyhow::Result<Vec<_>>>()?;
            let opts = sluice::plan::RunOptions {
                plan_dir: plan
                    .parent()
                    .filter(|p| !p.as_os_str().is_empty())
                    .map(Path::to_path_buf)
                    .unwrap_or_else(|| cwd.clone()),
                bindings,
                agent: resolve_agent(&cli, &cwd),
            };
            finish_run(
                &mut out,
                *json,
                sluice::plan::run(&mut store, &parsed, &opts),
            )
        }
        Command::Export {
            reference,
            format: args::ExportFormat::Plan,
            output,
        } => {
            let store = open_store(&cli, &cwd)?;
            let base = match output {
                Some(o) => std::path::absolute(o)
                    .ok()
                    .and_then(|a| a.parent().map(Path::to_path_buf))
                    .unwrap_or_else(|| cwd.clone()),
                None => cwd.clone(),
            };
            let plan = sluice::plan::export(&store, reference, &base)?;
            let mut text = serde_json::to_string_pretty(&plan)?;
            text.push('\n');
            match output {
                None => out.write_all(text.as_bytes())?,
                Some(path) => {
                    write_file_atomically(path, |f| Ok(f.write_all(text.as_bytes())?))?;
                    writeln!(
                        out,
                        "wrote the plan of {} ({} inputs, {} steps) to {}",
                        reference,
                        plan.inputs.len(),
                        plan.steps.len(),
                        path.display()
                    )?;
                }
            }
            Ok(0)
        }
        Command::Export {
            reference,
            format: format @ (args::ExportFormat::ProvJson | args::ExportFormat::ProvN),
            output,
        } => {
            let store = open_store(&cli, &cwd)?;
            let doc = sluice::prov::document(&store, reference)?;
            let text = match format {
                args::ExportFormat::ProvN => sluice::prov::to_provn(&doc),
                _ => sluice::prov::to_json(&doc),
            };
            match output {
                None => out.write_all(text.as_bytes())?,
                Some(path) => {
                    write_file_atomically(path, |f| Ok(f.write_all(text.as_bytes())?))?;
                    writeln!(
                        out,
                        "wrote the lineage of {} in W3C PROV ({} entities, {} activities, {} agents, {} relations) to {}",
                        doc.subject,
                        doc.count(sluice::prov::ElementKind::Entity),
                        doc.count(sluice::prov::ElementKind::Activity),
                        doc.count(sluice::prov::ElementKind::Agent),
                        doc.relations.len(),
                        path.display()
                    )?;
                }
            }
            Ok(0)
        }
        Command::Report(a) if a.find.is_some() => {
            let store = open_store(&cli, &cwd)?;
            let file = a.find.as_deref().unwrap_or(Path::new(""));
            let bytes =
                std::fs::read(file).with_context(|| format!("cannot read {}", file.display()))?;
            let hash = blake3::hash(&bytes).to_hex();
            match sluice::report::find(&store, &bytes)? {
                Some(e) => {
                    let d: serde_json::Value = serde_json::from_str(&e.details).unwrap_or_default();
                    writeln!(
                        out,
                        "{} is the lineage report ({}) of {} (version {})",
                        file.display(),
                        d["format"].as_str().unwrap_or("?"),
                        e.subject,
                        d["version"].as_str().unwrap_or("?")
                    )?;
                    writeln!(
                        out,
                        "  recorded as audit entry {} at {} by {}, made after audit entry {}",
                        e.seq, e.at, e.agent, d["after_entry"]
                    )?;
                    writeln!(out, "  BLAKE3 {hash}")?;
                    Ok(0)
                }
                None => {
                    eprintln!(
                        "error: no report with these bytes ({}, BLAKE3 {hash}) is recorded in this store; \
                         it was changed after it was written, or written from another store",
                        file.display()
                    );
                    Ok(1)
                }
            }
        }
        Command::Report(a) => {
            let mut store = open_store(&cli, &cwd)?;
            let agent = resolve_agent(&cli, &cwd);
            let (Some(reference), Some(output)) = (a.reference.as_deref(), a.output.as_deref())
            else {
                return Err(anyhow!(
                    "sluice report needs a version and -o FILE, e.g. sluice report q3_by_shop -o report.html"
                ));
            };
            let format =
                a.format
                    .unwrap_or_else(|| match output.extension().and_then(|e| e.to_str()) {
                        Some("md" | "markdown") => args::ReportFormat::Md,
                        Some("json") => args::ReportFormat::Json,
                        _ => args::ReportFormat::Html,
                    });
            let opts = sluice::report::ReportOptions {
                sample: a.sample,
                replay: a.replay,
                agent: agent.identity.clone(),
            };
            let (report, hash, entry) =
                write_report(&mut store, &agent, reference, format, output, &opts)?;
            writeln!(
                out,
                "wrote the lineage report of {} ({} steps) to {}",
                report.subject.version,
                report.steps.len(),
                output.display()
            )?;
            writeln!(
                out,
                "  BLAKE3 {hash}, recorded as audit entry {}",
                entry.seq
            )?;
            writeln!(out, "  {}", report.verification.statement)?;
            Ok(
                if report.verification.intact
                    && report
                        .verification
                        .replay
                        .as_ref()
                        .is_none_or(|r| r.failed.is_none())
                {
                    0
                } else {
                    1
                },
            )
        }
        Command::Trace {
            reference,
            row,
            key,
            column,
            json,
        } => {
            let store = open_store(&cli, &cwd)?;
            let pick = row_pick(*row, key)?;
            let trail = sluice::trace::trace(&store, reference, &pick, column)?;
            if *json {
                render::json(&mut out, &trail)?;
            } else {
                render::trail(&mut out, &trail)?;
            }
            Ok(0)
        }
        Command::Explain {
            reference,
            row,
            key,
            column,
            limit,
            json,
        } => {
            let store = open_store(&cli, &cwd)?;
            let pick = row_pick(*row, key)?;
            let e = sluice::explain::explain(&store, reference, &pick, column, *limit)?;
            if *json {
                render::json(&mut out, &e)?;
            } else {
                render::explanation(&mut out, &e)?;
            }
            // A stored value that the input does not give again is damage, not a usage error.
            Ok(if e.agrees { 0 } else { 1 })
        }
        Command::Impact { reference, json } => {
            let store = open_store(&cli, &cwd)?;
            let i = sluice::graph::impact(&store, reference)?;
            if *json {
                render::json(&mut out, &i)?;
            } else {
                render::impact(&mut out, &i)?;
            }
            Ok(0)
        }
        Command::Graph {
            reference,
            format,
            output,
        } => {
            let store = open_store(&cli, &cwd)?;
            let text = match format {
                args::GraphFormat::Dot => sluice::graph::dot(&store, reference.as_deref())?,
                args::GraphFormat::Svg => sluice::graph::svg(&store, reference.as_deref())?,
            };
            match output {
                None => out.write_all(text.as_bytes())?,
                Some(path) => {
                    write_file_atomically(path, |f| Ok(f.write_all(text.as_bytes())?))?;
                    writeln!(out, "wrote the lineage graph to {}", path.display())?;
                }
            }
            Ok(0)
        }
        Command::Replay {
            reference,
            onto: Some(onto),
            why,
            json,
            ..
        } => {
            let mut store = open_store(&cli, &cwd)?;
            let (name, file) = onto.split_once('=').ok_or_else(|| {
                anyhow!("--onto {onto}: expected NAME=FILE, e.g. --onto quillby_orders=exports/quillby_2026q4.csv")
            })?;
            let result = sluice::replay::onto(
                &mut store,
                reference,
                name,
                &cwd.join(file),
                why.clone(),
                &resolve_agent(&cli, &cwd),
            )?;
            finish_run(&mut out, *json, result)
        }
        Command::Replay {
            reference,
            onto: None,
            json,
            allow_exec,
            ..
        } => {
            let mut store = open_store(&cli, &cwd)?;
            if *allow_exec {
                // Every command line is shown before anything runs (on standard error with
                // --json, so that standard output stays one JSON document).
                let planned = sluice::replay::planned_commands(&store, reference)?;
                if *json {
                    render::planned_commands(&mut std::io::stderr().lock(), &planned)?;
                } else {
                    render::planned_commands(&mut out, &planned)?;
                    out.flush()?;
                }
            }
            let options = sluice::replay::ReplayOptions {
                allow_exec: *allow_exec,
            };
            let r = sluice::replay::replay(&mut store, reference, &options)?;
            if *json {
                render::json(&mut out, &r)?;
            } else {
                render::replay(&mut out, &r)?;
            }
            Ok(if r.reproduced { 0 } else { 1 })
        }
        Command::Revert {
            reference,
            why,
            force,
            json,
        } => {
            let mut store = open_store(&cli, &cwd)?;
            let opts = sluice::revert::RevertOptions {
                reason: why.clone(),
                force: *force,
                agent: resolve_agent(&cli, &cwd),
            };
            let outcome = sluice::revert::revert(&mut store, reference, &opts)?;
            if *json {
                render::json(&mut out, &render::RevertJson::from(&outcome))?;
            } else {
                render::revert(&mut out, &outcome)?;
            }
            Ok(match outcome {
                sluice::revert::RevertOutcome::Recorded(_) => 0,
                sluice::revert::RevertOutcome::Refused { .. } => 1,
            })
        }
        Command::Cat {
            reference,
            output,
            format: Some(format),
        } => {
            let store = open_store(&cli, &cwd)?;
            let version = refs::resolve(&store.lineage, reference)?;
            let format = match format {
                CatFormat::Csv => sluice::export::TextFormat::Csv,
                CatFormat::Tsv => sluice::export::TextFormat::Tsv,
                CatFormat::Jsonl => sluice::export::TextFormat::Jsonl,
            };
            match output {
                None => {
                    sluice::export::write_as(&store, &version, format, &mut out)?;
                    out.flush()?;
                }
                Some(path) => write_file_atomically(path, |f| {
                    sluice::export::write_as(&store, &version, format, f)?;
                    Ok(())
                })?,
            }
            Ok(0)
        }
        Command::Cat {
            reference, output, ..
        } => {
            let store = open_store(&cli, &cwd)?;
            let version = refs::resolve(&store.lineage, reference)?;
            let hash = version.hash.parse().map_err(|e| {
                anyhow!(
                    "the store holds a malformed hash for {}: {e}",
                    version.label()
                )
            })?;
            match output {
                None => {
                    store.objects.copy_to(&hash, &mut out)?;
                    out.flush()?;
                }
                Some(path) => write_file_atomically(path, |f| {
                    store.objects.copy_to(&hash, f)?;
                    Ok(())
                })?,
            }
            Ok(0)
        }
        Command::Log { dataset, json } => {
            let store = open_store(&cli, &cwd)?;
            let entries = history::log(&store, dataset.as_deref())?;
            if *json {
                render::json(&mut out, &entries)?;
            } else {
                render::log(&mut out, &entries)?;
            }
            Ok(0)
        }
        Command::Show { reference, json } => {
            let store = open_store(&cli, &cwd)?;
            let detail = history::show(&store, reference)?;
            if *json {
                render::json(&mut out, &detail)?;
            } else {
                render::show(&mut out, &detail)?;
            }
            Ok(0)
        }
        Command::Verify { json } => {
            let store = open_store(&cli, &cwd)?;
            let report = verify::verify(&store)?;
            if *json {
                render::json(&mut out, &report)?;
            } else {
                render::verify(&mut out, &report)?;
            }
            Ok(if report.intact { 0 } else { 1 })
        }
        Command::Reclaim { json } => {
            let agent = resolve_agent(&cli, &cwd);
            let mut store = open_store(&cli, &cwd)?;
            let done = store.reclaim(&agent, &sluice::clock::now_rfc3339())?;
            if *json {
                render::json(&mut out, &done)?;
            } else {
                render::reclaim(&mut out, &done)?;
            }
            Ok(0)
        }
        Command::Diff(a) => {
            let store = open_store(&cli, &cwd)?;
            let key = match &a.key {
                Some(cols) => sluice::diff::KeyChoice::Columns(cols.clone()),
                None => sluice::diff::KeyChoice::Declared,
            };
            let d = sluice::diff::diff(&store, &a.from, &a.to, &sluice::diff::DiffOptions { key })?;
            // Colour only for a person at a terminal (or when asked with --color always).
            let colour = term::colour_stdout(cli.color);
            let how = render_diff::How {
                stat: a.stat,
                limit: a.limit,
                colour,
            };
            let mut buffered = std::io::BufWriter::new(&mut out);
            if a.json {
                render_diff::json(&mut buffered, &d, &how)?;
            } else {
                render_diff::text(&mut buffered, &d, &how)?;
            }
            buffered.flush()?;
            Ok(0)
        }
        Command::Demo { dir } => {
            let agent = resolve_agent(&cli, &cwd);
            let target = match dir {
                Some(d) => d.clone(),
                None => demo::fresh_folder(&cwd),
            };
            let report = demo::run(&target, &agent)?;
            render::demo(&mut out, &report)?;
            // Documented for an audit: the report of the cooperative's Q3 figures (replayed from
            // the raw exports) and their lineage in W3C PROV, written beside the demo's store.
            let mut store = Store::open(&report.dir)?;
            let reference = "q3_by_shop";
            let html = report.dir.join("q3_by_shop-report.html");
            let opts = sluice::report::ReportOptions {
                sample: 5,
                replay: true,
                agent: agent.identity.clone(),
            };
            let (doc, hash, entry) = write_report(
                &mut store,
                &agent,
                reference,
                args::ReportFormat::Html,
                &html,
                &opts,
            )?;
            let prov_path = report.dir.join("q3_by_shop.prov.json");
            let prov = sluice::prov::document(&store, reference)?;
            let prov_text = sluice::prov::to_json(&prov);
            write_file_atomically(&prov_path, |f| Ok(f.write_all(prov_text.as_bytes())?))?;
            writeln!(out)?;
            writeln!(out, "documented for an audit:")?;
            writeln!(
                out,
                "  {}  the lineage report of {} ({} steps; open it in a browser, or print it)",
                html.display(),
                doc.subject.version,
                doc.steps.len()
            )?;
            writeln!(
                out,
                "    BLAKE3 {}…, recorded as audit entry {}; {}",
                &hash[..16],
                entry.seq,
                if doc.verification.intact {
                    "the store verified intact when it was written"
                } else {
                    "the store did NOT verify; see the report"
                }
            )?;
            writeln!(
                out,
                "  {}  its lineage in W3C PROV (PROV-JSON: {} entities, {} activities, {} agents)",
                prov_path.display(),
                prov.count(sluice::prov::ElementKind::Entity),
                prov.count(sluice::prov::ElementKind::Activity),
                prov.count(sluice::prov::ElementKind::Agent)
            )?;
            render::demo_next(&mut out, &report)?;
            Ok(0)
        }
        Command::Completions { shell } => {
            shell::completions(*shell, &mut out)?;
            Ok(0)
        }
        Command::Manual { dir: None } => {
            shell::top_page(&mut out)?;
            Ok(0)
        }
        Command::Manual { dir: Some(dir) } => {
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
    }
}

/// `sluice exec`'s arguments as the engine's options: `NAME[=REF]` inputs, `NAME=FILE`
/// outputs (relative files are relative to the working directory).
fn exec_options(
    a: &ExecArgs,
    cwd: &Path,
    agent: Agent,
) -> anyhow::Result<sluice::exec::ExecOptions> {
    let inputs = a
        .inputs
        .iter()
        .map(|i| match i.split_once('=') {
            Some((n, r)) if !n.is_empty() && !r.is_empty() => Ok((n.to_string(), r.to_string())),
            Some(_) => Err(anyhow!(
                "--input {i}: expected NAME or NAME=REF, e.g. --input orders or --input orders=orders@2"
            )),
            None => Ok((i.clone(), i.clone())),
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    let outputs = a
        .outputs
        .iter()
        .map(|o| match o.split_once('=') {
            Some((n, f)) if !n.is_empty() && !f.is_empty() => Ok((n.to_string(), PathBuf::from(f))),
            _ => Err(anyhow!(
                "--output {o}: expected NAME=FILE, the dataset and the file the command writes, e.g. --output orders=clean.csv"
            )),
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    Ok(sluice::exec::ExecOptions {
        inputs,
        outputs,
        command: a.command.clone(),
        cwd: cwd.to_path_buf(),
        reason: a.why.clone(),
        agent,
    })
}

fn apply_options(a: &ApplyArgs, agent: Agent) -> anyhow::Result<ApplyOptions> {
    let (op, step) = match &a.op {
        OpCommand::Summarize {
            by,
            sum,
            mean,
            min,
            max,
            step,
        } => {
            let mut aggregates = Vec::new();
            for (func, cols) in [
                (AggFunc::Sum, sum),
                (AggFunc::Mean, mean),
                (AggFunc::Min, min),
                (AggFunc::Max, max),
            ] {
                for c in cols {
                    aggregates.push(Aggregate {
                        func,
                        column: c.clone(),
                    });
                }
            }
            (
                Operation::Summarize {
                    by: by.clone(),
                    aggregates,
                },
                step,
            )
        }
        OpCommand::Append { other, map, step } => (
            Operation::Append {
                other: other.clone(),
                map: renamings(map, "append --map")?,
            },
            step,
        ),
        OpCommand::Lookup {
            table,
            on,
            table_on,
            take,
            fail_unmatched,
            step,
        } => (
            Operation::Lookup {
                table: table.clone(),
                on: on.clone(),
                table_on: table_on.clone(),
                take: take.clone(),
                unmatched_fail: *fail_unmatched,
            },
            step,
        ),
        OpCommand::Split {
            column,
            on,
            into,
            step,
        } => (
            Operation::Split {
                column: column.clone(),
                on: on.clone(),
                into: into.clone(),
            },
            step,
        ),
        OpCommand::Combine {
            columns,
            with,
            into,
            step,
        } => (
            Operation::Combine {
                columns: columns.clone(),
                with: with.clone(),
                into: into.clone(),
            },
            step,
        ),
        OpCommand::Extract {
            column,
            into,
            from,
            len,
            regex,
            step,
        } => (
            Operation::Extract {
                column: column.clone(),
                into: into.clone(),
                from: *from,
                len: *len,
                regex: regex.clone(),
            },
            step,
        ),
        OpCommand::Map {
            columns,
            table,
            from,
            to,
            unmatched,
            step,
        } => (
            Operation::Map {
                columns: columns.clone(),
                table: table.clone(),
                from: from.clone(),
                to: to.clone(),
                unmatched: on_error_of(*unmatched),
            },
            step,
        ),
        OpCommand::Replace {
            columns,
            find,
            with,
            regex,
            step,
        } => (
            Operation::Replace {
                columns: columns.clone(),
                find: find.clone(),
                with: with.clone(),
                regex: *regex,
            },
            step,
        ),
        OpCommand::Fill {
            columns,
            value,
            from,
            step,
        } => (
            Operation::Fill {
                columns: columns.clone(),
                value: value.clone(),
                from: from.clone(),
            },
            step,
        ),
        OpCommand::Number {
            columns,
            decimal_comma,
            on_error,
            step,
        } => (
            Operation::Number {
                columns: columns.clone(),
                decimal_comma: *decimal_comma,
                on_error: on_error_of(*on_error),
            },
            step,
        ),
        OpCommand::Date {
            columns,
            order,
            on_error,
            step,
        } => (
            Operation::Date {
                columns: columns.clone(),
                order: order.map(|o| match o {
                    OrderArg::Dmy => DateOrder::Dmy,
                    OrderArg::Mdy => DateOrder::Mdy,
                    OrderArg::Ymd => DateOrder::Ymd,
                }),
                on_error: on_error_of(*on_error),
            },
            step,
        ),
        OpCommand::Rename { pairs, step } => (
            Operation::Rename {
                columns: renamings(pairs, "rename")?,
            },
            step,
        ),
        OpCommand::Select { columns, step } => (
            Operation::Select {
                columns: columns.clone(),
            },
            step,
        ),
        OpCommand::Trim {
            columns,
            inner,
            step,
        } => (
            Operation::Trim {
                columns: columns.clone(),
                inner: *inner,
            },
            step,
        ),
        OpCommand::Case { columns, to, step } => (
            Operation::Case {
                columns: columns.clone(),
                to: match to {
                    CaseArg::Lower => CaseTo::Lower,
                    CaseArg::Upper => CaseTo::Upper,
                    CaseArg::Title => CaseTo::Title,
                },
            },
            step,
        ),
        OpCommand::Keep { predicate, step } => (
            Operation::KeepRows {
                predicate: predicate.clone(),
            },
            step,
        ),
        OpCommand::Drop { predicate, step } => (
            Operation::DropRows {
                predicate: predicate.clone(),
            },
            step,
        ),
        OpCommand::Dedupe { key, keep, step } => (
            Operation::Dedupe {
                key: key.clone(),
                keep: match keep {
                    KeepArg::First => KeepWhich::First,
                    KeepArg::Last => KeepWhich::Last,
                },
            },
            step,
        ),
    };
    Ok(ApplyOptions {
        op,
        reason: step.why.clone(),
        output_dataset: step.dataset.clone(),
        agent,
        map_table_file: None,
        replay: None,
        repeats: None,
    })
}

/// Parses `OLD=NEW` pairs.
fn renamings(pairs: &[String], what: &str) -> anyhow::Result<Vec<Renaming>> {
    pairs
        .iter()
        .map(|p| {
            let (from, to) = p.split_once('=').ok_or_else(|| {
                anyhow!("{what} takes OLD=NEW pairs, e.g. \"order no=order_id\"; got \"{p}\"")
            })?;
            Ok(Renaming {
                from: from.to_string(),
                to: to.to_string(),
            })
        })
        .collect()
}

/// A dataset name for a file taken in on the way (a mapping table): its stem, with anything
/// a name cannot hold turned into `_`.
fn dataset_name_for(path: &Path) -> String {
    let stem = path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let mut name: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .take(60)
        .collect();
    if !name.starts_with(|c: char| c.is_ascii_alphabetic()) {
        name.insert_str(0, "t_");
    }
    if name.len() >= 6 && name.chars().all(|c| c.is_ascii_hexdigit()) {
        name.push_str("_table");
    }
    name
}

fn on_error_of(a: OnErrorArg) -> OnError {
    match a {
        OnErrorArg::Fail => OnError::Fail,
        OnErrorArg::Keep => OnError::Keep,
        OnErrorArg::Blank => OnError::Blank,
    }
}

fn parse_delimiter(s: &str) -> anyhow::Result<u8> {
    let b = match s {
        "tab" | "\\t" | "\t" => b'\t',
        _ if s.len() == 1 => s.as_bytes()[0],
        _ => {
            return Err(anyhow!(
                "--delimiter takes one ASCII character (e.g. ';') or \"tab\", not \"{s}\""
            ))
        }
    };
    if !b.is_ascii() || b == b'"' || b == b'\n' || b == b'\r' {
        return Err(anyhow!(
            "--delimiter cannot be a quote, a line break or a non-ASCII character"
        ));
    }
    Ok(b)
}

/// Renders the end of a plan run (also of `replay --onto`) and picks the exit code.
fn finish_run(
    out: &mut impl Write,
    json: bool,
    result: Result<sluice::plan::RunReport, sluice::plan::RunFailure>,
) -> anyhow::Result<ExitCode> {
    match result {
        Ok(report) => {
            if json {
                render::json(out, &render::run_json(&report.done, None))?;
            } else {
                render::run_done(out, &report.done)?;
                if report.failed_checks > 0 {
                    writeln!(
                        out,
                        "done, with {} failing (not {}: the run went on; the results are recorded)",
                        if report.failed_checks == 1 {
                            "1 check".to_string()
                        } else {
                            format!("{} checks", report.failed_checks)
                        },
                        if report.failed_checks == 1 {
                            "a gate"
                        } else {
                            "gates"
                        }
                    )?;
                } else {
                    writeln!(out, "done: every step recorded")?;
                }
            }
            Ok(if report.failed_checks > 0 { 1 } else { 0 })
        }
        Err(failure) => {
            let kept: Vec<String> = failure
                .done
                .iter()
                .filter_map(|d| d.recorded().map(|v| v.label()))
                .collect();
            if json {
                let msg = failure.error.to_string();
                render::json(
                    out,
                    &render::run_json(&failure.done, Some((&failure.at, &msg))),
                )?;
            } else {
                render::run_done(out, &failure.done)?;
            }
            out.flush()?;
            let kept = if kept.is_empty() {
                "nothing was recorded".to_string()
            } else {
                format!("the store keeps what came before: {}", kept.join(", "))
            };
            Err(anyhow::Error::from(failure.error)
                .context(format!("the run stopped at {}; {kept}", failure.at)))
        }
    }
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

/// `NAME=FILE|REF`: an existing file is taken in; anything else must name a stored version.
fn binding(text: &str, cwd: &Path) -> anyhow::Result<(String, sluice::plan::Binding)> {
    let (name, value) = text.split_once('=').ok_or_else(|| {
        anyhow!("--input {text}: expected NAME=FILE or NAME=REF, e.g. --input quillby_orders=exports/q4.csv")
    })?;
    if name.is_empty() || value.is_empty() {
        return Err(anyhow!(
            "--input {text}: expected NAME=FILE or NAME=REF with both parts given"
        ));
    }
    let path = cwd.join(value);
    Ok((
        name.to_string(),
        if path.is_file() {
            sluice::plan::Binding::File(path)
        } else {
            sluice::plan::Binding::Version(value.to_string())
        },
    ))
}

fn ingest_options(a: &IngestArgs, agent: Agent) -> anyhow::Result<IngestOptions> {
    Ok(IngestOptions {
        dataset: a.dataset.clone(),
        key: a.key.clone(),
        reason: a.why.clone(),
        delimiter: a.delimiter.as_deref().map(parse_delimiter).transpose()?,
        has_header: !a.no_header,
        encoding: a.encoding.clone(),
        null_tokens: a.null_tokens.clone(),
        agent,
    })
}

/// Builds the report of `reference`, renders it, writes it to `output` and records it in the
/// audit chain; returns the report, the written file's BLAKE3 and the audit entry.
fn write_report(
    store: &mut Store,
    agent: &Agent,
    reference: &str,
    format: args::ReportFormat,
    output: &Path,
    opts: &sluice::report::ReportOptions,
) -> anyhow::Result<(sluice::report::Report, String, sluice::model::AuditEntry)> {
    let report = sluice::report::build(store, reference, opts)?;
    let (text, name) = match format {
        args::ReportFormat::Html => (render_report::html(&report), "html"),
        args::ReportFormat::Md => (render_report::markdown(&report), "md"),
        args::ReportFormat::Json => (render_report::json(&report), "json"),
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
    let tmp = dir.join(format!(".{}.sluice-part", name.to_string_lossy()));
    let written = std::fs::File::create(&tmp)
        .and_then(|mut f| f.write_all(bytes).and_then(|_| f.sync_all()))
        .with_context(|| format!("cannot write {}", tmp.display()));
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

/// Reads a file the user named (a plan, a rules file); a failure names the file, says what is
/// wrong in the engine's words (no such file, permission denied) and where the format is.
fn read_text(path: &Path, what: &str, format_help: &str) -> anyhow::Result<String> {
    std::fs::read_to_string(path).map_err(|e| {
        let detail = if e.kind() == std::io::ErrorKind::InvalidData {
            format!("{}: not UTF-8 text", path.display())
        } else {
            sluice::Error::io(path, e).to_string()
        };
        anyhow!(sluice::Error::usage(format!(
            "cannot read {what}: {detail} (its format: `{format_help}`)"
        )))
    })
}

/// Writes through a temporary file beside `path` and renames it into place only when `fill`
/// succeeds, so a failed `cat -o` never leaves a partial file under the requested name.
fn write_file_atomically(
    path: &Path,
    fill: impl FnOnce(&mut std::fs::File) -> anyhow::Result<()>,
) -> anyhow::Result<()> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .ok_or_else(|| anyhow!("{}: not a file name", path.display()))?;
    let tmp = dir.join(format!(".{}.sluice-part", name.to_string_lossy()));
    let mut f =
        std::fs::File::create(&tmp).with_context(|| format!("cannot create {}", tmp.display()))?;
    let result = fill(&mut f).and_then(|_| f.sync_all().map_err(Into::into));
    drop(f);
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    std::fs::rename(&tmp, path).with_context(|| format!("cannot write {}", path.display()))?;
    Ok(())
}
