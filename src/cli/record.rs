//! The recording commands: `setup`, `receive`, `clean`, `inspect`, `run` and `capture`, their
//! arguments turned into the engine's options, and what they print (text, or with `--json` the
//! records described by `schema/output/`).

use std::io::{self, Write};
use std::path::{Path, PathBuf};

use anyhow::anyhow;
use serde_json::Value;

use super::args::{
    CaptureArgs, CaseArg, CleanArgs, KeepArg, OnErrorArg, OpCommand, OrderArg, ReceiveArgs,
};
use super::text::*;
use super::{read_text, Context, ExitCode};
use sluice::inferred::{HandEditOutcome, RecordedSuccessor};
use sluice::intake::{self, IngestOptions, IngestOutcome};
use sluice::model::{Agent, Version};
use sluice::ops::apply::{self as apply_op, ApplyOptions, ApplyOutcome};
use sluice::ops::date::DateOrder;
use sluice::ops::summarize::{AggFunc, Aggregate};
use sluice::ops::{CaseTo, KeepWhich, OnError, Operation, Renaming};
use sluice::outcome::{CaptureJson, CleanJson, ReceiveJson, RunJson, SuccessorJson};
use sluice::plan::Done;
use sluice::store::{SetUp, Store};

/// Arguments together with who is acting: what an engine option is made from.
pub struct Acting<'a, A> {
    pub args: &'a A,
    pub agent: Agent,
    pub cwd: &'a Path,
}

pub fn setup(
    ctx: &Context<'_>,
    dir: Option<&Path>,
    lineage_server: Option<&str>,
    object_bucket: Option<&str>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let project = ctx.new_store_folder(dir, "DIR", || ctx.cwd.clone())?;
    let agent = ctx.agent(None)?;
    let at = sluice::store::location::Location {
        lineage: lineage_server.map(str::to_string),
        objects: object_bucket.map(str::to_string),
        ..Default::default()
    };
    let (store, how) = Store::set_up(&project, &agent, &at)?;
    match how {
        SetUp::Made => writeln!(out, "set up a store in {}", store.dir().display())?,
        SetUp::Joined { entries } => writeln!(
            out,
            "joined the shared store on {} ({entries} audit entries there) from {}; nothing recorded",
            store.lineage.describe(),
            store.dir().display()
        )?,
    }
    if lineage_server.is_some() {
        writeln!(
            out,
            "its lineage is on the server {}",
            store.lineage.describe()
        )?;
    }
    if let Some(url) = object_bucket {
        writeln!(out, "its objects are kept in the bucket {url}")?;
    }
    writeln!(
        out,
        "next: receive a file with `sluice receive FILE --as NAME --why \"...\"`"
    )?;
    Ok(0)
}

/// `receive FILE --as NAME`, or with `--hand-edit-of REF` a hand edit of a stored version.
pub fn receive(
    ctx: &Context<'_>,
    a: &ReceiveArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let opts = IngestOptions::try_from(Acting {
        args: a,
        agent,
        cwd: &ctx.cwd,
    })?;
    let source = intake::SourceOptions {
        sheet: a.sheet.clone(),
    };
    let warnings = if let Some(from) = a.hand_edit_of.as_deref() {
        if opts.reason.as_deref().is_none_or(|r| r.trim().is_empty()) {
            return Err(anyhow!(
                "a hand edit needs a reason: add --why TEXT (what was changed by hand, and why)"
            ));
        }
        let outcome =
            sluice::inferred::ingest_hand_edit_from(&mut store, &a.file, &opts, &source, from)?;
        if a.json {
            json(out, &ReceiveJson::from_hand_edit(&outcome))?;
        } else {
            hand_edit_outcome(out, &a.file, &outcome)?;
        }
        match outcome {
            HandEditOutcome::Recorded { warnings, .. } => warnings,
            HandEditOutcome::Unchanged { .. } => Vec::new(),
        }
    } else {
        let outcome = intake::ingest_from(&mut store, &a.file, &opts, &source)?;
        if a.json {
            json(out, &ReceiveJson::from_intake(&outcome))?;
        } else {
            ingest_outcome(out, &a.file, &outcome)?;
        }
        match outcome {
            IngestOutcome::Recorded { warnings, .. } => warnings,
            IngestOutcome::Unchanged { .. } => Vec::new(),
        }
    };
    for w in warnings {
        eprintln!("warning: {w}");
    }
    Ok(0)
}

impl TryFrom<Acting<'_, ReceiveArgs>> for IngestOptions {
    type Error = anyhow::Error;

    fn try_from(a: Acting<'_, ReceiveArgs>) -> anyhow::Result<IngestOptions> {
        Ok(IngestOptions {
            dataset: a.args.dataset.clone(),
            key: a.args.key.clone(),
            reason: a.args.why.clone(),
            delimiter: a
                .args
                .delimiter
                .as_deref()
                .map(parse_delimiter)
                .transpose()?,
            has_header: !a.args.no_header,
            encoding: a.args.encoding.clone(),
            null_tokens: a.args.null_tokens.clone(),
            agent: a.agent,
        })
    }
}

pub fn clean(ctx: &Context<'_>, a: &CleanArgs, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let opts = ApplyOptions::try_from(Acting {
        args: a,
        agent,
        cwd: &ctx.cwd,
    })?;
    let outcome = apply_op::apply(&mut store, &a.reference, &opts)?;
    if a.json {
        json(out, &CleanJson::new(&opts.op, &outcome))?;
    } else {
        apply_outcome(out, &opts.op, &outcome)?;
    }
    Ok(0)
}

impl TryFrom<Acting<'_, CleanArgs>> for ApplyOptions {
    type Error = anyhow::Error;

    fn try_from(a: Acting<'_, CleanArgs>) -> anyhow::Result<ApplyOptions> {
        let op = Operation::try_from(&a.args.op)?;
        let step = a.args.op.step();
        // A mapping table given as a file is received with the step, so it is part of the
        // lineage, and recorded only if the step succeeds.
        let mut map_table_file = None;
        if let Operation::Map { table, .. } | Operation::Lookup { table, .. } = &op {
            let path = Path::new(table.as_str()).to_path_buf();
            if path.is_file() {
                map_table_file = Some((
                    path.clone(),
                    IngestOptions {
                        dataset: dataset_name_for(&path),
                        key: None,
                        reason: Some(format!("table for `{}` on {}", op.name(), a.args.reference)),
                        delimiter: None,
                        has_header: true,
                        encoding: None,
                        null_tokens: Vec::new(),
                        agent: a.agent.clone(),
                    },
                ));
            }
        }
        Ok(ApplyOptions {
            op,
            reason: step.why.clone(),
            output_dataset: step.dataset.clone(),
            agent: a.agent,
            map_table_file,
            replay: None,
            repeats: None,
        })
    }
}

impl OpCommand {
    /// What every operation takes: the reason and the dataset to record into.
    pub fn step(&self) -> &super::args::StepArgs {
        match self {
            OpCommand::Trim { step, .. }
            | OpCommand::Case { step, .. }
            | OpCommand::Replace { step, .. }
            | OpCommand::Map { step, .. }
            | OpCommand::Lookup { step, .. }
            | OpCommand::Append { step, .. }
            | OpCommand::Fill { step, .. }
            | OpCommand::Number { step, .. }
            | OpCommand::Date { step, .. }
            | OpCommand::Split { step, .. }
            | OpCommand::Combine { step, .. }
            | OpCommand::Extract { step, .. }
            | OpCommand::Rename { step, .. }
            | OpCommand::Select { step, .. }
            | OpCommand::Summarize { step, .. }
            | OpCommand::Keep { step, .. }
            | OpCommand::Drop { step, .. }
            | OpCommand::Dedupe { step, .. }
            | OpCommand::Sort { step, .. } => step,
        }
    }
}

impl From<OnErrorArg> for OnError {
    fn from(a: OnErrorArg) -> OnError {
        match a {
            OnErrorArg::Fail => OnError::Fail,
            OnErrorArg::Keep => OnError::Keep,
            OnErrorArg::Blank => OnError::Blank,
        }
    }
}

impl From<OrderArg> for DateOrder {
    fn from(o: OrderArg) -> DateOrder {
        match o {
            OrderArg::Dmy => DateOrder::Dmy,
            OrderArg::Mdy => DateOrder::Mdy,
            OrderArg::Ymd => DateOrder::Ymd,
        }
    }
}

impl From<CaseArg> for CaseTo {
    fn from(c: CaseArg) -> CaseTo {
        match c {
            CaseArg::Lower => CaseTo::Lower,
            CaseArg::Upper => CaseTo::Upper,
            CaseArg::Title => CaseTo::Title,
        }
    }
}

impl From<KeepArg> for KeepWhich {
    fn from(k: KeepArg) -> KeepWhich {
        match k {
            KeepArg::First => KeepWhich::First,
            KeepArg::Last => KeepWhich::Last,
        }
    }
}

impl TryFrom<&OpCommand> for Operation {
    type Error = anyhow::Error;

    fn try_from(c: &OpCommand) -> anyhow::Result<Operation> {
        Ok(match c {
            OpCommand::Summarize {
                by,
                sum,
                mean,
                min,
                max,
                ..
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
                Operation::Summarize {
                    by: by.clone(),
                    aggregates,
                }
            }
            OpCommand::Append { other, map, .. } => Operation::Append {
                other: other.clone(),
                map: renamings(map, "append --map")?,
            },
            OpCommand::Lookup {
                table,
                on,
                table_on,
                take,
                fail_unmatched,
                ..
            } => Operation::Lookup {
                table: table.clone(),
                on: on.clone(),
                table_on: table_on.clone(),
                take: take.clone(),
                unmatched_fail: *fail_unmatched,
            },
            OpCommand::Split {
                column, on, into, ..
            } => Operation::Split {
                column: column.clone(),
                on: on.clone(),
                into: into.clone(),
            },
            OpCommand::Combine {
                columns,
                with,
                into,
                ..
            } => Operation::Combine {
                columns: columns.clone(),
                with: with.clone(),
                into: into.clone(),
            },
            OpCommand::Extract {
                column,
                into,
                from,
                len,
                regex,
                ..
            } => Operation::Extract {
                column: column.clone(),
                into: into.clone(),
                from: *from,
                len: *len,
                regex: regex.clone(),
            },
            OpCommand::Map {
                columns,
                table,
                from,
                to,
                unmatched,
                ..
            } => Operation::Map {
                columns: columns.clone(),
                table: table.clone(),
                from: from.clone(),
                to: to.clone(),
                unmatched: (*unmatched).into(),
            },
            OpCommand::Replace {
                columns,
                find,
                with,
                regex,
                ..
            } => Operation::Replace {
                columns: columns.clone(),
                find: find.clone(),
                with: with.clone(),
                regex: *regex,
            },
            OpCommand::Fill {
                columns,
                value,
                from,
                ..
            } => Operation::Fill {
                columns: columns.clone(),
                value: value.clone(),
                from: from.clone(),
            },
            OpCommand::Number {
                columns,
                decimal_comma,
                on_error,
                ..
            } => Operation::Number {
                columns: columns.clone(),
                decimal_comma: *decimal_comma,
                on_error: (*on_error).into(),
            },
            OpCommand::Date {
                columns,
                order,
                on_error,
                ..
            } => Operation::Date {
                columns: columns.clone(),
                order: order.map(Into::into),
                on_error: (*on_error).into(),
            },
            OpCommand::Rename { pairs, .. } => Operation::Rename {
                columns: renamings(pairs, "rename")?,
            },
            OpCommand::Select { columns, .. } => Operation::Select {
                columns: columns.clone(),
            },
            OpCommand::Trim { columns, inner, .. } => Operation::Trim {
                columns: columns.clone(),
                inner: *inner,
            },
            OpCommand::Case { columns, to, .. } => Operation::Case {
                columns: columns.clone(),
                to: (*to).into(),
            },
            OpCommand::Keep { predicate, .. } => Operation::KeepRows {
                predicate: predicate.clone(),
            },
            OpCommand::Drop { predicate, .. } => Operation::DropRows {
                predicate: predicate.clone(),
            },
            OpCommand::Dedupe { key, keep, .. } => Operation::Dedupe {
                key: key.clone(),
                keep: (*keep).into(),
            },
            OpCommand::Sort { by, .. } => Operation::Sort {
                by: by.iter().map(|k| sort_key(k)).collect(),
            },
        })
    }
}

/// `COL`, `COL:asc` or `COL:desc` as a sort key (a column whose name ends in `:desc` is written
/// `NAME:desc:asc`).
fn sort_key(text: &str) -> sluice::ops::sort::SortKey {
    use sluice::ops::sort::{Direction, SortKey};
    let (column, direction) = match text.rsplit_once(':') {
        Some((c, "desc" | "descending")) => (c, Direction::Descending),
        Some((c, "asc" | "ascending")) => (c, Direction::Ascending),
        _ => (text, Direction::Ascending),
    };
    SortKey {
        column: column.to_string(),
        direction,
    }
}

pub fn inspect(
    ctx: &Context<'_>,
    reference: &str,
    rules: &Path,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let text = read_text(
        rules,
        "the rules file",
        "sluice inspect --help",
        sluice::plan::MAX_PLAN_BYTES,
    )?;
    let parsed = sluice::checks::parse_rules(&text, &rules.display().to_string())?;
    let report = sluice::checks::check(&mut store, reference, &parsed, false, &agent)?;
    if as_json {
        json(out, &report)?;
    } else {
        check(out, &report)?;
    }
    Ok(if report.passed { 0 } else { 1 })
}

pub fn run(
    ctx: &Context<'_>,
    plan: &Path,
    inputs: &[String],
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let text = read_text(
        plan,
        "the plan",
        "sluice run --help",
        sluice::plan::MAX_PLAN_BYTES,
    )?;
    let parsed = sluice::plan::parse(&text, &plan.display().to_string())?;
    let bindings = inputs
        .iter()
        .map(|i| binding(i, &ctx.cwd))
        .collect::<anyhow::Result<Vec<_>>>()?;
    let opts = sluice::plan::RunOptions {
        plan_dir: plan
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .map(Path::to_path_buf)
            .unwrap_or_else(|| ctx.cwd.clone()),
        bindings,
        agent,
    };
    finish_run(out, as_json, sluice::plan::run(&mut store, &parsed, &opts))
}

/// `NAME=FILE|REF`: an existing file is received; anything else must name a stored version.
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

/// Renders the end of a plan run (also of `rerun`) and picks the exit code.
pub fn finish_run(
    out: &mut impl Write,
    as_json: bool,
    result: Result<sluice::plan::RunReport, sluice::plan::RunFailure>,
) -> anyhow::Result<ExitCode> {
    match result {
        Ok(report) => {
            if as_json {
                json(out, &RunJson::new(&report.done, None))?;
            } else {
                run_done(out, &report.done)?;
                if report.failed_checks > 0 {
                    writeln!(
                        out,
                        "done, with {} failing (not at a hold point: the run went on; the results are recorded)",
                        if report.failed_checks == 1 {
                            "1 inspection".to_string()
                        } else {
                            format!("{} inspections", report.failed_checks)
                        },
                    )?;
                } else {
                    writeln!(out, "done: every step recorded")?;
                }
            }
            Ok(if report.failed_checks > 0 { 1 } else { 0 })
        }
        Err(failure) => {
            let at = sluice::outcome::stopped_at(&failure.at);
            let kept: Vec<String> = failure
                .done
                .iter()
                .filter_map(|d| d.recorded().map(|v| v.label()))
                .collect();
            if as_json {
                let msg = failure.error.to_string();
                json(out, &RunJson::new(&failure.done, Some((&at, &msg))))?;
            } else {
                run_done(out, &failure.done)?;
            }
            out.flush()?;
            let kept = if kept.is_empty() {
                "nothing was recorded".to_string()
            } else {
                format!("the store keeps what came before: {}", kept.join(", "))
            };
            Err(anyhow::Error::from(failure.error)
                .context(format!("the run stopped at {at}; {kept}")))
        }
    }
}

pub fn capture(
    ctx: &Context<'_>,
    a: &CaptureArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let opts = sluice::exec::ExecOptions::try_from(Acting {
        args: a,
        agent,
        cwd: &ctx.cwd,
    })?;
    match sluice::exec::exec(&mut store, &opts)? {
        sluice::exec::ExecOutcome::Recorded {
            recorded,
            unchanged,
            code,
        } => {
            if a.json {
                json(
                    out,
                    &CaptureJson {
                        recorded: recorded.iter().map(SuccessorJson::from).collect(),
                        unchanged: &unchanged,
                        code: &code,
                    },
                )?;
            } else {
                exec_recorded(out, &recorded, &unchanged, &code)?;
            }
            Ok(0)
        }
        sluice::exec::ExecOutcome::Failed { failure, .. } => {
            eprintln!(
                "error: {}; nothing was recorded but an audit entry of the failure; fix the command and run `sluice capture` again",
                failure.describe()
            );
            Ok(failure.exit_code())
        }
    }
}

impl TryFrom<Acting<'_, CaptureArgs>> for sluice::exec::ExecOptions {
    type Error = anyhow::Error;

    /// `NAME[=REF]` inputs, `NAME=FILE` outputs (relative files are relative to the working
    /// directory).
    fn try_from(a: Acting<'_, CaptureArgs>) -> anyhow::Result<Self> {
        let inputs = a
            .args
            .inputs
            .iter()
            .map(|i| match i.split_once('=') {
                Some((n, r)) if !n.is_empty() && !r.is_empty() => {
                    Ok((n.to_string(), r.to_string()))
                }
                Some(_) => Err(anyhow!(
                    "--input {i}: expected NAME or NAME=REF, e.g. --input orders or --input orders=orders:v2"
                )),
                None => Ok((i.clone(), i.clone())),
            })
            .collect::<anyhow::Result<Vec<_>>>()?;
        let outputs = a
            .args
            .outputs
            .iter()
            .map(|o| match o.split_once('=') {
                Some((n, f)) if !n.is_empty() && !f.is_empty() => {
                    Ok((n.to_string(), PathBuf::from(f)))
                }
                _ => Err(anyhow!(
                    "--output {o}: expected NAME=FILE, the dataset and the file the command writes, e.g. --output orders=clean.csv"
                )),
            })
            .collect::<anyhow::Result<Vec<_>>>()?;
        Ok(sluice::exec::ExecOptions {
            inputs,
            outputs,
            command: a.args.command.clone(),
            cwd: a.cwd.to_path_buf(),
            reason: a.args.why.clone(),
            agent: a.agent,
            match_by_order: a.args.match_by_order,
        })
    }
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

/// A dataset name for a file received on the way (a mapping table): its stem, with anything
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

pub fn ingest_outcome(out: &mut impl Write, file: &Path, o: &IngestOutcome) -> io::Result<()> {
    match o {
        IngestOutcome::Recorded { version, .. } => {
            writeln!(
                out,
                "recorded {} ({}): {}, {}",
                version.label(),
                short_hash(&version.hash),
                shape(version),
                plural(version.n_bytes, "byte", "bytes")
            )?;
            writeln!(out, "next: `sluice about {}`", version.label())
        }
        IngestOutcome::Unchanged { version } => writeln!(
            out,
            "unchanged: {} has the same bytes as {} ({}); nothing recorded",
            file.display(),
            version.label(),
            short_hash(&version.hash)
        ),
    }
}

pub fn apply_outcome(out: &mut impl Write, op: &Operation, o: &ApplyOutcome) -> io::Result<()> {
    match o {
        ApplyOutcome::Recorded {
            input,
            version,
            n_changed,
            changed_by_column,
            n_dropped,
            n_noted,
            table_taken_in,
            ..
        } => {
            if let Some(t) = table_taken_in {
                writeln!(out, "took in the table as {t}")?;
            }
            let per_column: Vec<String> = changed_by_column
                .iter()
                .map(|(c, n)| format!("{c} {}", count(*n)))
                .collect();
            let what = if op.changes_cells() {
                format!(
                    "changed {}{}",
                    plural(*n_changed, "cell", "cells"),
                    if per_column.is_empty() {
                        String::new()
                    } else {
                        format!(" ({})", per_column.join(", "))
                    }
                )
            } else if matches!(op, Operation::Rename { .. } | Operation::Select { .. }) {
                "reshaped the columns".to_string()
            } else if let Some(new) = match op {
                Operation::Split { into, .. } => Some(into.join(", ")),
                Operation::Combine { into, .. } | Operation::Extract { into, .. } => {
                    Some(into.clone())
                }
                Operation::Lookup { take, .. } => Some(take.join(", ")),
                _ => None,
            } {
                format!("derived {new}")
            } else if matches!(op, Operation::Append { .. }) {
                format!(
                    "added {}",
                    plural(
                        version.n_rows - input.n_rows.min(version.n_rows),
                        "row",
                        "rows"
                    )
                )
            } else if let Operation::Sort { by } = op {
                let keys: Vec<String> = by
                    .iter()
                    .map(|k| match k.direction {
                        sluice::ops::sort::Direction::Ascending => k.column.clone(),
                        sluice::ops::sort::Direction::Descending => {
                            format!("{} (descending)", k.column)
                        }
                    })
                    .collect();
                format!("put the rows in order by {}", keys.join(", "))
            } else if matches!(op, Operation::Summarize { .. }) {
                format!(
                    "made {} from {}",
                    plural(version.n_rows, "group", "groups"),
                    plural(input.n_rows, "row", "rows")
                )
            } else {
                format!("dropped {}", plural(*n_dropped, "row", "rows"))
            };
            writeln!(
                out,
                "recorded {} ({}) from {}: {} {what}; {}",
                version.label(),
                short_hash(&version.hash),
                input.label(),
                op.name(),
                shape(version)
            )?;
            if *n_noted > 0 {
                writeln!(
                    out,
                    "noted: {} left as asked (kept or blanked, each noted with the step)",
                    plural(*n_noted, "cell", "cells")
                )?;
            }
            writeln!(out, "next: `sluice about {}`", version.label())
        }
        ApplyOutcome::Replayed {
            input,
            output_hash,
            matches,
            ..
        } => writeln!(
            out,
            "computed {} again from {}: {} ({})",
            op.name(),
            input.label(),
            short_hash(output_hash),
            if *matches {
                "the recorded bytes"
            } else {
                "NOT the recorded bytes"
            }
        ),
        ApplyOutcome::Unchanged {
            input,
            version,
            notes,
        } => {
            writeln!(
                out,
                "unchanged: {} of {} gives the same bytes as {} ({}); nothing recorded",
                op.name(),
                input.label(),
                version.label(),
                short_hash(&version.hash)
            )?;
            if !notes.is_empty() {
                let shown: Vec<String> = notes
                    .iter()
                    .take(5)
                    .map(|(row, col, note)| format!("data row {} {col}: {note}", row + 1))
                    .collect();
                writeln!(
                    out,
                    "note: {}: {}{}",
                    plural(
                        notes.len() as u64,
                        "cell was left alone",
                        "cells were left alone"
                    ),
                    shown.join("; "),
                    if notes.len() > 5 { "; ..." } else { "" }
                )?;
            }
            Ok(())
        }
    }
}

pub fn hand_edit_outcome(out: &mut impl Write, file: &Path, o: &HandEditOutcome) -> io::Result<()> {
    match o {
        HandEditOutcome::Recorded { recorded: r, .. } => {
            writeln!(
                out,
                "recorded {} ({}) from {}: hand edit; {}",
                r.version.label(),
                short_hash(&r.version.hash),
                r.from.label(),
                shape(&r.version)
            )?;
            writeln!(out, "{}", inferred_summary(&r.lineage))?;
            writeln!(
                out,
                "next: `sluice compare {} {}`",
                r.from.label(),
                r.version.label()
            )
        }
        HandEditOutcome::Unchanged { version } => writeln!(
            out,
            "unchanged: {} has the same bytes as {} ({}); nothing recorded",
            file.display(),
            version.label(),
            short_hash(&version.hash)
        ),
    }
}

pub fn exec_recorded(
    out: &mut impl Write,
    recorded: &[RecordedSuccessor],
    unchanged: &[Version],
    code: &Value,
) -> io::Result<()> {
    for r in recorded {
        writeln!(
            out,
            "recorded {} ({}) from {}: capture; {}",
            r.version.label(),
            short_hash(&r.version.hash),
            r.from.label(),
            shape(&r.version)
        )?;
        writeln!(out, "  {}", inferred_summary(&r.lineage))?;
        if let Some(k) = r.lineage.key_rewritten() {
            writeln!(
                out,
                "  no row kept its key {}: if the command rewrote the key values, run it again matching rows by order (`sluice capture ... --match-by-order`)",
                k.join(", ")
            )?;
        }
    }
    for v in unchanged {
        writeln!(
            out,
            "unchanged: the command wrote the same bytes as {} ({}); nothing recorded for it",
            v.label(),
            short_hash(&v.hash)
        )?;
    }
    code_lines(out, code, "  ", 9)?;
    if let Some(r) = recorded.first() {
        writeln!(out, "next: `sluice about {}`", r.version.label())?;
    }
    Ok(())
}

pub fn check(out: &mut impl Write, r: &sluice::checks::CheckReport) -> io::Result<()> {
    let failed = r.results.iter().filter(|c| !c.passed).count() as u64;
    writeln!(
        out,
        "{} ({}): {} of {} passed",
        r.version,
        short_hash(&r.hash),
        plural(r.results.len() as u64 - failed, "rule", "rules"),
        r.results.len()
    )?;
    for c in &r.results {
        let rule = c.rule.describe();
        if c.passed {
            writeln!(out, "  pass  {rule}")?;
        } else {
            let rows: Vec<String> = c.first_failing.iter().map(|n| n.to_string()).collect();
            writeln!(
                out,
                "  FAIL  {rule}: {} (data rows {}{})",
                plural(c.n_failing, "row", "rows"),
                rows.join(", "),
                if c.n_failing as usize > rows.len() {
                    ", ..."
                } else {
                    ""
                }
            )?;
        }
    }
    writeln!(out, "the results are recorded on {}", r.version)
}

/// The first line of an operation's outcome (the "next" hint left out).
fn apply_line(op: &Operation, outcome: &ApplyOutcome) -> io::Result<String> {
    let mut line = Vec::new();
    apply_outcome(&mut line, op, outcome)?;
    let text = String::from_utf8_lossy(&line);
    Ok(text.lines().next().unwrap_or("").to_string())
}

/// What a plan run did, one line per input and step.
pub fn run_done(out: &mut impl Write, done: &[Done]) -> io::Result<()> {
    for d in done {
        match d {
            Done::Bound { name, version } => writeln!(
                out,
                "input {name}: bound to {} ({}), {}",
                version.label(),
                short_hash(&version.hash),
                shape(version)
            )?,
            Done::TookIn {
                name,
                path,
                outcome,
                differs_from,
            } => {
                write!(out, "input {name} from {}: ", path.display())?;
                ingest_outcome_short(out, outcome)?;
                if let Some(h) = differs_from {
                    writeln!(
                        out,
                        "  (other data than the plan was made from, {}: the steps run on it as written)",
                        short_hash(h)
                    )?;
                }
            }
            Done::Applied { step, op, outcome } => match &**outcome {
                ApplyOutcome::Recorded { step_id, .. } => {
                    writeln!(out, "step {step_id}: {}", apply_line(op, outcome)?)?
                }
                _ => writeln!(out, "plan entry {step}: {}", apply_line(op, outcome)?)?,
            },
            Done::Checked {
                step,
                hold_point,
                report,
            } => {
                let failed = report.results.iter().filter(|c| !c.passed).count();
                writeln!(
                    out,
                    "plan entry {step}: {} on {}: {}{}",
                    if *hold_point {
                        "inspection at a hold point"
                    } else {
                        "inspection"
                    },
                    report.version,
                    if failed == 0 {
                        format!(
                            "all {} passed",
                            plural(report.results.len() as u64, "rule", "rules")
                        )
                    } else {
                        format!(
                            "{} of {} failed",
                            count(failed as u64),
                            plural(report.results.len() as u64, "rule", "rules")
                        )
                    },
                    if failed == 0 {
                        String::new()
                    } else {
                        let names: Vec<String> = report
                            .results
                            .iter()
                            .filter(|c| !c.passed)
                            .map(|c| {
                                format!(
                                    "{} fails on {}",
                                    c.rule.describe(),
                                    plural(c.n_failing, "row", "rows")
                                )
                            })
                            .collect();
                        format!("; {}", names.join("; "))
                    }
                )?
            }
        }
    }
    Ok(())
}
