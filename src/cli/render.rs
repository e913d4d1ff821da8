//! Rendering engine results for people (aligned text) and machines (`--json`, pretty-printed,
//! the structures documented in README.md).

use std::io::{self, Write};
use std::path::Path;

use serde::Serialize;
use serde_json::json;

use serde_json::Value;
use sluice::demo::DemoReport;
use sluice::diff::MatchedBy;
use sluice::explain::Explanation;
use sluice::history::{LogEntry, VersionDetail};
use sluice::inferred::{HandEditOutcome, InferredLineage, RecordedSuccessor};
use sluice::intake::IngestOutcome;
use sluice::model::{LineageKind, Step, Version};
use sluice::ops::apply::ApplyOutcome;
use sluice::ops::Operation;
use sluice::plan::Done;
use sluice::trace::{End, Trail};
use sluice::verify::VerifyReport;

pub fn json<T: Serialize>(out: &mut impl Write, value: &T) -> io::Result<()> {
    serde_json::to_writer_pretty(&mut *out, value).map_err(io::Error::other)?;
    writeln!(out)
}

/// 1234567 -> "1,234,567".
pub fn count(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{} {}", count(n), if n == 1 { one } else { many })
}

fn shape(v: &Version) -> String {
    format!(
        "{} × {}",
        plural(v.n_rows, "row", "rows"),
        plural(v.n_cols, "column", "columns")
    )
}

pub fn ingest_outcome(out: &mut impl Write, file: &Path, o: &IngestOutcome) -> io::Result<()> {
    match o {
        IngestOutcome::Recorded { version, .. } => {
            writeln!(
                out,
                "recorded {} ({}): {}, {}",
                version.label(),
                &version.hash[..12],
                shape(version),
                plural(version.n_bytes, "byte", "bytes")
            )?;
            writeln!(out, "next: `sluice show {}`", version.label())
        }
        IngestOutcome::Unchanged { version } => writeln!(
            out,
            "unchanged: {} has the same bytes as {} ({}); nothing recorded",
            file.display(),
            version.label(),
            &version.hash[..12]
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
                &version.hash[..12],
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
            writeln!(out, "next: `sluice show {}`", version.label())
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
            &output_hash[..12],
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
                &version.hash[..12]
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

fn step_line(s: &Step) -> String {
    let mut what = match &s.operation {
        Some(op) => format!("{} {op}", s.kind.as_str()),
        None => s.kind.as_str().to_string(),
    };
    if s.lineage == LineageKind::Inferred {
        let by = match s.params.get("inferred_by") {
            Some(b) if b["diff"] == "key" => format!(
                " by key {}",
                b["key"]
                    .as_array()
                    .map(|k| k
                        .iter()
                        .filter_map(|c| c.as_str())
                        .collect::<Vec<_>>()
                        .join(", "))
                    .unwrap_or_default()
            ),
            Some(b) if b["diff"] == "order" => " by order".to_string(),
            _ => String::new(),
        };
        what.push_str(&format!(" · lineage inferred{by}"));
    }
    if let Some(r) = s.repeats_step {
        what.push_str(&format!(" · repeats step {r}"));
    }
    if let Some(r) = s.reverts_step {
        what.push_str(&format!(" · reverts step {r}"));
    }
    format!("step {} · {what} · {} · {}", s.id, s.ended_at, s.agent)
}

/// The lines saying what code an outside command ran: the command line, where, the git state
/// and the exit status. `pad` is the label column's width.
fn code_lines(out: &mut impl Write, code: &Value, indent: &str, pad: usize) -> io::Result<()> {
    let words = |v: &Value| {
        v.as_array()
            .map(|a| {
                a.iter()
                    .filter_map(|w| w.as_str())
                    .map(shell_word)
                    .collect::<Vec<_>>()
                    .join(" ")
            })
            .unwrap_or_default()
    };
    if code.get("command").is_some() {
        writeln!(out, "{indent}{:pad$}{}", "run", words(&code["command"]))?;
    }
    if let Some(cwd) = code["cwd"].as_str() {
        writeln!(out, "{indent}{:pad$}{cwd}", "in")?;
    }
    let git = &code["git"];
    if git.is_object() {
        let commit = git["commit"].as_str().unwrap_or("no commit yet");
        let branch = git["branch"]
            .as_str()
            .map_or_else(|| "detached HEAD".to_string(), |b| format!("branch {b}"));
        let modified: Vec<&str> = git["modified"]
            .as_array()
            .map(|a| a.iter().filter_map(|m| m.as_str()).collect())
            .unwrap_or_default();
        let state = if modified.is_empty() {
            "clean".to_string()
        } else {
            format!("dirty: {}", modified.join(", "))
        };
        writeln!(
            out,
            "{indent}{:pad$}git {commit} ({branch}, {state})",
            "code"
        )?;
    } else if let Some(p) = code["git_problem"].as_str() {
        writeln!(out, "{indent}{:pad$}unknown ({p})", "code")?;
    } else if code.get("command").is_some() {
        writeln!(out, "{indent}{:pad$}not in a git repository", "code")?;
    }
    if let Some(st) = code.get("exit_status").filter(|s| !s.is_null()) {
        writeln!(
            out,
            "{indent}{:pad$}status {st}, from {} to {}",
            "exit",
            code["started_at"].as_str().unwrap_or("?"),
            code["ended_at"].as_str().unwrap_or("?")
        )?;
    }
    Ok(())
}

/// A word of a command line as a shell would need it typed.
fn shell_word(w: &str) -> String {
    let plain = !w.is_empty()
        && w.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./:=@%+,{}".contains(c));
    if plain {
        w.to_string()
    } else {
        format!("'{}'", w.replace('\'', "'\\''"))
    }
}

/// What the diff inferred, in one line.
fn inferred_summary(l: &InferredLineage) -> String {
    let per_column: Vec<String> = l
        .changed_by_column
        .iter()
        .map(|(c, n)| format!("{c} {}", count(*n)))
        .collect();
    let mut parts = vec![
        format!(
            "{} kept",
            plural(l.n_unchanged + l.n_changed_rows, "row", "rows")
        ),
        format!(
            "{}{}",
            plural(l.n_changed_cells(), "cell changed", "cells changed"),
            if per_column.is_empty() {
                String::new()
            } else {
                format!(" ({})", per_column.join(", "))
            }
        ),
        format!("{} removed", plural(l.n_removed, "row", "rows")),
        format!("{} added", plural(l.n_added, "row", "rows")),
    ];
    if !l.columns_added.is_empty() {
        parts.push(format!("columns added: {}", l.columns_added.join(", ")));
    }
    if !l.columns_removed.is_empty() {
        parts.push(format!("columns removed: {}", l.columns_removed.join(", ")));
    }
    for (new, old) in &l.renamed {
        parts.push(format!("{old} renamed to {new}"));
    }
    let by = match &l.matched_by {
        MatchedBy::Key(k) => format!("by key {}", k.join(", ")),
        MatchedBy::Order => "by order".to_string(),
    };
    format!("lineage inferred {by}: {}", parts.join(", "))
}

pub fn hand_edit_outcome(out: &mut impl Write, file: &Path, o: &HandEditOutcome) -> io::Result<()> {
    match o {
        HandEditOutcome::Recorded { recorded: r, .. } => {
            writeln!(
                out,
                "recorded {} ({}) from {}: hand edit; {}",
                r.version.label(),
                &r.version.hash[..12],
                r.from.label(),
                shape(&r.version)
            )?;
            writeln!(out, "{}", inferred_summary(&r.lineage))?;
            writeln!(
                out,
                "next: `sluice diff {} {}`",
                r.from.label(),
                r.version.label()
            )
        }
        HandEditOutcome::Unchanged { version } => writeln!(
            out,
            "unchanged: {} has the same bytes as {} ({}); nothing recorded",
            file.display(),
            version.label(),
            &version.hash[..12]
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
            "recorded {} ({}) from {}: command; {}",
            r.version.label(),
            &r.version.hash[..12],
            r.from.label(),
            shape(&r.version)
        )?;
        writeln!(out, "  {}", inferred_summary(&r.lineage))?;
    }
    for v in unchanged {
        writeln!(
            out,
            "unchanged: the command wrote the same bytes as {} ({}); nothing recorded for it",
            v.label(),
            &v.hash[..12]
        )?;
    }
    code_lines(out, code, "  ", 9)?;
    if let Some(r) = recorded.first() {
        writeln!(out, "next: `sluice show {}`", r.version.label())?;
    }
    Ok(())
}

pub fn log(out: &mut impl Write, entries: &[LogEntry]) -> io::Result<()> {
    if entries.is_empty() {
        return writeln!(
            out,
            "no steps yet; take a file in with `sluice ingest FILE --as NAME`"
        );
    }
    for (i, e) in entries.iter().enumerate() {
        if i > 0 {
            writeln!(out)?;
        }
        writeln!(out, "{}", step_line(&e.step))?;
        if let Some(why) = &e.step.reason {
            writeln!(out, "  why   {why}")?;
        }
        if !e.step.inputs.is_empty() {
            writeln!(out, "  read  {}", e.step.inputs.join(", "))?;
        }
        if let Some(src) = &e.step.source {
            writeln!(out, "  from  {}", src.path)?;
        }
        if let Some(c) = conversion_line(&e.step) {
            writeln!(out, "  conv  {c}")?;
        }
        if let Some(code) = &e.step.code {
            code_lines(out, code, "  ", 6)?;
        }
        for v in &e.produced {
            writeln!(
                out,
                "  made  {}  {}  {}",
                v.label(),
                &v.hash[..12],
                shape(v)
            )?;
        }
    }
    Ok(())
}

pub fn show(out: &mut impl Write, d: &VersionDetail) -> io::Result<()> {
    let v = &d.version;
    writeln!(
        out,
        "{}{}",
        v.label(),
        if d.is_latest { "  (latest)" } else { "" }
    )?;
    writeln!(out, "  hash         {}", v.hash)?;
    writeln!(out, "  size         {}", plural(v.n_bytes, "byte", "bytes"))?;
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
    writeln!(out, "  row index    {}", v.row_index)?;
    for c in &d.checks {
        writeln!(
            out,
            "  {}         {} {} · {} · {}",
            if c.gate { "gate " } else { "check" },
            if c.passed { "pass" } else { "FAIL" },
            c.rule,
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
    table(out, &rows, &[false, false, true, true, false, false, true])
}

fn table<const N: usize>(
    out: &mut impl Write,
    rows: &[[String; N]],
    right: &[bool; N],
) -> io::Result<()> {
    let mut w = [0usize; N];
    for r in rows {
        for (i, c) in r.iter().enumerate() {
            w[i] = w[i].max(c.chars().count());
        }
    }
    for r in rows {
        let mut line = String::from("  ");
        for (i, c) in r.iter().enumerate() {
            let pad = w[i] - c.chars().count();
            if right[i] {
                line.push_str(&" ".repeat(pad));
                line.push_str(c);
            } else {
                line.push_str(c);
                if i + 1 < N {
                    line.push_str(&" ".repeat(pad));
                }
            }
            if i + 1 < N {
                line.push_str("  ");
            }
        }
        writeln!(out, "{}", line.trim_end())?;
    }
    Ok(())
}

pub fn check(out: &mut impl Write, r: &sluice::checks::CheckReport) -> io::Result<()> {
    let failed = r.results.iter().filter(|c| !c.passed).count() as u64;
    writeln!(
        out,
        "{} ({}): {} of {} passed",
        r.version,
        &r.hash[..12],
        plural(r.results.len() as u64 - failed, "rule", "rules"),
        r.results.len()
    )?;
    for c in &r.results {
        let rule = serde_json::to_string(&c.rule).unwrap_or_default();
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

pub fn reclaim(out: &mut impl Write, r: &sluice::store::objects::Reclaimed) -> io::Result<()> {
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
    )
}

pub fn verify(out: &mut impl Write, r: &VerifyReport) -> io::Result<()> {
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
            "damaged: {} found ({} objects, {} versions, {} audit entries examined)",
            plural(r.problems.len() as u64, "problem", "problems"),
            count(r.objects_checked),
            count(r.versions_checked),
            count(r.audit_entries_checked),
        )?;
        for p in &r.problems {
            writeln!(out, "  {}  {}: {}", p.kind, p.subject, p.detail)?;
        }
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

/// What `render` writes, each line indented by two spaces.
fn indented(
    out: &mut impl Write,
    render: impl FnOnce(&mut Vec<u8>) -> io::Result<()>,
) -> io::Result<()> {
    let mut lines = Vec::new();
    render(&mut lines)?;
    for line in String::from_utf8_lossy(&lines).lines() {
        writeln!(out, "  {line}")?;
    }
    Ok(())
}

pub fn demo(out: &mut impl Write, r: &DemoReport) -> io::Result<()> {
    writeln!(out, "demo store created in {}", r.dir.display())?;
    writeln!(out, "{}", r.scenario)?;
    writeln!(out)?;
    writeln!(
        out,
        "ran the plan {}: each export taken in, then every step recorded with its reason and every changed cell:",
        r.plan.display()
    )?;
    indented(out, |o| run_done(o, &r.done))?;
    writeln!(out)?;
    writeln!(
        out,
        "then work outside sluice, recorded with its reason and with row lineage inferred by a diff:"
    )?;
    for (what, r) in &r.outside {
        writeln!(out, "  {what}")?;
        writeln!(
            out,
            "    recorded {} ({}) from {}; {}",
            r.version.label(),
            &r.version.hash[..12],
            r.from.label(),
            inferred_summary(&r.lineage)
        )?;
    }
    writeln!(out)?;
    writeln!(out, "where did this amount come from?")?;
    writeln!(out, "  $ {}", r.traced.0)?;
    indented(out, |o| trail(o, &r.traced.1))?;
    writeln!(out)?;
    writeln!(out, "why is this total what it is?")?;
    writeln!(out, "  $ {}", r.explained.0)?;
    indented(out, |o| explanation(o, &r.explained.1))?;
    writeln!(out)?;
    writeln!(
        out,
        "can the quarter's figures be reproduced from the raw exports?"
    )?;
    writeln!(out, "  $ {}", r.replayed.0)?;
    let rp = &r.replayed.1;
    let rerun = rp
        .steps
        .iter()
        .filter(|s| matches!(s.result.as_str(), "same" | "restored"))
        .count() as u64;
    if rp.reproduced {
        writeln!(
            out,
            "  reproduced {} ({}): {} run again from {} gave the recorded bytes",
            rp.version,
            &rp.hash[..12],
            plural(rerun, "step", "steps"),
            plural(
                rp.steps.iter().filter(|s| s.result == "raw_intact").count() as u64,
                "raw input",
                "raw inputs"
            )
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
                &version.hash[..12],
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
                        &h[..h.len().min(12)]
                    )?;
                }
            }
            Done::Applied { step, op, outcome } => {
                writeln!(out, "step {step}: {}", apply_line(op, outcome)?)?
            }
            Done::Checked { step, gate, report } => {
                let failed = report.results.iter().filter(|c| !c.passed).count();
                writeln!(
                    out,
                    "step {step}: {} on {}: {}{}",
                    if *gate { "gate" } else { "check" },
                    report.version,
                    if failed == 0 {
                        format!(
                            "all {} passed",
                            plural(report.results.len() as u64, "rule", "rules")
                        )
                    } else {
                        format!("{} of {} rules failed", failed, report.results.len())
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
                                    sluice::plan::rule_summary(&c.rule),
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

/// The JSON form of what a plan run did.
pub fn run_json(done: &[Done], stopped: Option<(&str, &str)>) -> serde_json::Value {
    let version = |v: &Version| json!({"version": v.label(), "hash": v.hash});
    let items: Vec<serde_json::Value> = done
        .iter()
        .map(|d| match d {
            Done::Bound { name, version: v } => {
                json!({"kind": "input", "name": name, "bound": true, "recorded": false, "output": version(v)})
            }
            Done::TookIn {
                name,
                path,
                outcome,
                differs_from,
            } => {
                let (v, recorded) = match &**outcome {
                    IngestOutcome::Recorded { version, .. } => (version, true),
                    IngestOutcome::Unchanged { version } => (version, false),
                };
                json!({"kind": "input", "name": name, "bound": false, "file": path.display().to_string(),
                       "recorded": recorded, "output": version(v), "differs_from_plan": differs_from})
            }
            Done::Applied { step, op, outcome } => {
                match &**outcome {
                    ApplyOutcome::Recorded { input, version: v, .. } => {
                        json!({"kind": "apply", "step": step, "op": op.name(), "recorded": true,
                               "input": version(input), "output": version(v)})
                    }
                    ApplyOutcome::Unchanged { input, version: v, .. } => {
                        json!({"kind": "apply", "step": step, "op": op.name(), "recorded": false,
                               "input": version(input), "output": version(v)})
                    }
                    ApplyOutcome::Replayed { input, output_hash, .. } => {
                        json!({"kind": "apply", "step": step, "op": op.name(), "recorded": false,
                               "input": version(input), "output": {"hash": output_hash}})
                    }
                }
            }
            Done::Checked { step, gate, report } => json!({
                "kind": "check", "step": step, "gate": gate, "version": report.version,
                "hash": report.hash, "passed": report.passed,
                "failed_rules": report.results.iter().filter(|c| !c.passed).count(),
            }),
        })
        .collect();
    json!({
        "completed": stopped.is_none(),
        "stopped_at": stopped.map(|s| s.0),
        "error": stopped.map(|s| s.1),
        "done": items,
    })
}

/// A value in quotes, with white space and control characters visible.
fn shown(v: &str) -> String {
    format!("{v:?}")
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
                        g.operation.as_deref().unwrap_or(g.kind.as_str())
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
            h.operation.as_deref().unwrap_or(h.kind.as_str()),
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
                "{pad}  revert  took out step {r}: {} is {}'s table from before that step",
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
            writeln!(
                out,
                "{pad}raw     {} ({}{}), taken in {} by {}",
                o.path.as_deref().unwrap_or("(no path recorded)"),
                &raw_hash[..12.min(raw_hash.len())],
                match o.format.as_str() {
                    "csv" => "",
                    "jsonl" => ", JSON Lines",
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
                        "{pad}        taken in as {} column {}: {}",
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
                        "{pad}        taken in as {} column {}: {}",
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
            let rows: Vec<String> = d.first.iter().map(|r| r.to_string()).collect();
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
    }
    Ok(())
}

/// What depends on a version.
pub fn impact(out: &mut impl Write, i: &sluice::graph::Impact) -> io::Result<()> {
    if i.steps.is_empty() {
        return writeln!(out, "nothing depends on {} ({})", i.version, &i.hash[..12]);
    }
    writeln!(
        out,
        "{} ({}) is read, directly or through others, by {} making {}:",
        i.version,
        &i.hash[..12],
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
                operation.as_deref().unwrap_or(step_kind),
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

/// The JSON form of a revert: what was recorded, or the conflicts that refused it.
#[derive(serde::Serialize)]
pub struct RevertJson<'a> {
    pub recorded: bool,
    pub reverted: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub report: Option<&'a sluice::revert::RevertReport>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub conflicts: Option<&'a [sluice::revert::Conflict]>,
}

impl<'a> From<&'a sluice::revert::RevertOutcome> for RevertJson<'a> {
    fn from(o: &'a sluice::revert::RevertOutcome) -> Self {
        match o {
            sluice::revert::RevertOutcome::Recorded(r) => RevertJson {
                recorded: true,
                reverted: &r.reverted,
                report: Some(r),
                conflicts: None,
            },
            sluice::revert::RevertOutcome::Refused {
                reverted,
                conflicts,
            } => RevertJson {
                recorded: false,
                reverted,
                report: None,
                conflicts: Some(conflicts),
            },
        }
    }
}

fn conflict_line(out: &mut impl Write, c: &sluice::revert::Conflict) -> io::Result<()> {
    writeln!(out, "  step {} ({}): {}", c.step, c.version, c.detail)?;
    writeln!(out, "    with --force: {}", c.when_forced)
}

/// What a revert recorded, or why it was refused.
pub fn revert(out: &mut impl Write, o: &sluice::revert::RevertOutcome) -> io::Result<()> {
    match o {
        sluice::revert::RevertOutcome::Refused {
            reverted,
            conflicts,
        } => {
            writeln!(
                out,
                "not reverted: taking out the step that made {reverted} conflicts with {} after it; nothing was recorded",
                plural(conflicts.len() as u64, "change", "changes")
            )?;
            for c in conflicts {
                conflict_line(out, c)?;
            }
            writeln!(
                out,
                "resolve them by hand first, or run the revert again with --force to apply the rules shown"
            )
        }
        sluice::revert::RevertOutcome::Recorded(r) => {
            writeln!(
                out,
                "reverted step {} (it made {}): {} is now {} ({})",
                r.reverted_step,
                r.reverted,
                r.latest.split('@').next().unwrap_or(&r.latest),
                r.latest,
                &r.hash[..12]
            )?;
            for l in &r.recorded {
                writeln!(
                    out,
                    "  step {}: recorded {} ({}), {}; {}",
                    l.step,
                    l.version,
                    &l.hash[..12],
                    plural(l.rows, "row", "rows"),
                    l.what
                )?;
            }
            for u in &r.unchanged {
                writeln!(out, "  {u}")?;
            }
            if !r.forced.is_empty() {
                writeln!(
                    out,
                    "resolved by --force ({}), recorded with the revert step:",
                    plural(r.forced.len() as u64, "conflict", "conflicts")
                )?;
                for c in &r.forced {
                    conflict_line(out, c)?;
                }
            }
            writeln!(
                out,
                "nothing was deleted: {} and the versions after it stay as they were",
                r.reverted
            )?;
            if !r.untouched_downstream.is_empty() {
                writeln!(
                    out,
                    "not changed by the revert, though made from the history it replaced: {}",
                    r.untouched_downstream.join(", ")
                )?;
            }
            Ok(())
        }
    }
}

/// The outside commands `replay --allow-exec` will run, before any runs.
pub fn planned_commands(
    out: &mut impl Write,
    planned: &[sluice::replay::PlannedCommand],
) -> io::Result<()> {
    if planned.is_empty() {
        return writeln!(
            out,
            "no outside commands on the way; nothing will be executed"
        );
    }
    writeln!(
        out,
        "--allow-exec: replay will run {}, each in a temporary checkout of its recorded commit:",
        plural(planned.len() as u64, "outside command", "outside commands")
    )?;
    for p in planned {
        match (&p.not_runnable, &p.commit) {
            (None, Some(commit)) => writeln!(
                out,
                "  step {} · {}\n    in {} at commit {}",
                p.step,
                p.command,
                p.cwd,
                &commit[..commit.len().min(12)]
            )?,
            _ => writeln!(
                out,
                "  step {} · {}\n    will not run: {}",
                p.step,
                p.command,
                p.not_runnable
                    .as_deref()
                    .unwrap_or("no commit was recorded")
            )?,
        }
    }
    Ok(())
}

/// What a replay found.
pub fn replay(out: &mut impl Write, r: &sluice::replay::ReplayReport) -> io::Result<()> {
    for s in &r.steps {
        let what = s.operation.as_deref().unwrap_or(s.kind.as_str());
        let result = match s.result.as_str() {
            "same" => "gave the recorded bytes".to_string(),
            "restored" => "gave the recorded bytes; the missing object was restored".to_string(),
            "raw_intact" => "raw data, intact".to_string(),
            "reapplied" => {
                "re-applied from its recorded lineage; equals the recorded output cell for cell"
                    .to_string()
            }
            other => other.replace('_', " "),
        };
        writeln!(
            out,
            "  step {} · {what} -> {} ({}): {result}",
            s.step,
            s.produced,
            &s.recorded_hash[..12]
        )?;
        for w in &s.warnings {
            writeln!(out, "    warning: {w}")?;
        }
        if let Some(d) = &s.detail {
            writeln!(out, "    {d}")?;
        }
        if let Some(d) = &s.difference {
            replay_difference(out, d)?;
        }
    }
    let rerun = r
        .steps
        .iter()
        .filter(|s| matches!(s.result.as_str(), "same" | "restored" | "reapplied"))
        .count() as u64;
    if r.reproduced {
        writeln!(
            out,
            "reproduced {} ({}): every one of {} gave the recorded bytes",
            r.version,
            &r.hash[..12],
            plural(rerun, "step", "steps")
        )
    } else {
        writeln!(
            out,
            "not reproduced: {} ({}) could not be shown to come from its raw data (see above)",
            r.version,
            &r.hash[..12]
        )
    }
}

/// Recorded against recomputed, in a few lines.
fn replay_difference(out: &mut impl Write, d: &sluice::replay::Difference) -> io::Result<()> {
    writeln!(
        out,
        "    recorded {} has {}; recomputed{} has {} (rows matched by {})",
        d.recorded,
        plural(d.recorded_rows, "row", "rows"),
        d.computed_hash
            .as_deref()
            .map(|h| format!(" ({})", &h[..12]))
            .unwrap_or_default(),
        plural(d.computed_rows, "row", "rows"),
        d.matched_by
    )?;
    writeln!(
        out,
        "    {} changed, {} only in the recorded output, {} only in the recomputed one",
        plural(d.rows_changed, "row", "rows"),
        count(d.rows_only_recorded),
        count(d.rows_only_computed)
    )?;
    if !d.columns_only_recorded.is_empty() {
        writeln!(
            out,
            "    columns only in the recorded output: {}",
            d.columns_only_recorded.join(", ")
        )?;
    }
    if !d.columns_only_computed.is_empty() {
        writeln!(
            out,
            "    columns only in the recomputed output: {}",
            d.columns_only_computed.join(", ")
        )?;
    }
    if !d.changed_cells.is_empty() {
        let per: Vec<String> = d
            .changed_cells
            .iter()
            .map(|c| format!("{} {}", c.column, count(c.cells)))
            .collect();
        writeln!(out, "    changed cells by column: {}", per.join(", "))?;
    }
    for e in &d.examples {
        let cells: Vec<String> = e
            .cells
            .iter()
            .map(|c| match (&c.recorded, &c.computed) {
                (Some(a), Some(b)) => format!("{}: {a:?} recorded, {b:?} recomputed", c.column),
                (Some(a), None) | (None, Some(a)) => format!("{} {a:?}", c.column),
                (None, None) => c.column.clone(),
            })
            .collect();
        let at = match (e.kind.as_str(), e.recorded_row, e.computed_row) {
            ("only_recorded", Some(r), _) => format!("recorded row {r}, missing now"),
            ("only_computed", _, Some(c)) => format!("recomputed row {c}, not recorded"),
            (_, Some(r), Some(c)) if r == c => format!("row {r}"),
            (_, Some(r), Some(c)) => format!("recorded row {r} (recomputed row {c})"),
            _ => "a row".into(),
        };
        writeln!(out, "    e.g. {at}: {}", cells.join("; "))?;
    }
    Ok(())
}

fn ingest_outcome_short(out: &mut impl Write, o: &IngestOutcome) -> io::Result<()> {
    match o {
        IngestOutcome::Recorded { version, .. } => writeln!(
            out,
            "recorded {} ({}), {}, delimiter \"{}\", {}",
            version.label(),
            &version.hash[..12],
            shape(version),
            if version.dialect.delimiter == "\t" {
                "tab"
            } else {
                &version.dialect.delimiter
            },
            version.dialect.line_ending
        ),
        IngestOutcome::Unchanged { version } => {
            writeln!(out, "unchanged ({})", version.label())
        }
    }
}

/// What an intake converted, for `log` and `show`: the format, the sheet, the raw object and
/// the formulas and error values taken in.
fn conversion_line(step: &sluice::model::Step) -> Option<String> {
    let c = step.params.get("convert")?;
    let raw = c.pointer("/raw/hash")?.as_str()?;
    let format = c.get("format")?.as_str()?;
    let mut text = match c.get("sheet").and_then(|s| s.as_str()) {
        Some(sheet) => format!("{format} sheet \"{sheet}\""),
        None => "JSON Lines".to_string(),
    };
    text.push_str(&format!(
        " into canonical CSV; raw object {}",
        &raw[..12.min(raw.len())]
    ));
    let count = |key: &str| {
        c.get(key)
            .and_then(|v| v.as_array())
            .map_or(0, |a| a.len() as u64)
    };
    let formulas = count("formulas");
    if formulas > 0 {
        text.push_str(&format!(
            ", {} (saved results taken in)",
            plural(formulas, "formula", "formulas")
        ));
    }
    let errors = count("errors");
    if errors > 0 {
        text.push_str(&format!(
            ", {}",
            plural(errors, "error value", "error values")
        ));
    }
    Some(text)
}

#[cfg(test)]
mod tests {
    #[test]
    fn thousands() {
        assert_eq!(super::count(0), "0");
        assert_eq!(super::count(999), "999");
        assert_eq!(super::count(1000), "1,000");
        assert_eq!(super::count(1234567), "1,234,567");
    }
}
