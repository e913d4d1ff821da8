//! Text pieces every command family shares: JSON output, counts with thousands separators,
//! aligned tables, one-line summaries of steps, code and inferred lineage.

use std::io::{self, Write};

use serde::Serialize;
use serde_json::Value;
use sluice::diff::MatchedBy;
use sluice::inferred::InferredLineage;
use sluice::intake::IngestOutcome;
pub use sluice::model::short_hash;
use sluice::model::{LineageKind, Step, Version};

pub fn json<T: Serialize>(out: &mut impl Write, value: &T) -> io::Result<()> {
    // serde_json gives back the writer's own error (a closed pipe stays a closed pipe).
    serde_json::to_writer_pretty(&mut *out, value).map_err(io::Error::from)?;
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

pub fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{} {}", count(n), if n == 1 { one } else { many })
}

pub fn shape(v: &Version) -> String {
    format!(
        "{} × {}",
        plural(v.n_rows, "row", "rows"),
        plural(v.n_cols, "column", "columns")
    )
}

/// A step in one line, as `about` names the step that made a version:
/// `step 12: clean trim, 2026-10-01T09:14:03.120Z, by Ada Moss (ada@example.org)`.
pub fn step_line(s: &Step) -> String {
    let mut what = match &s.operation {
        Some(op) => format!("{} {op}", sluice::history::action_of(s.kind)),
        None => sluice::history::action_of(s.kind).to_string(),
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
        what.push_str(&format!(" (lineage inferred{by})"));
    }
    if let Some(r) = s.repeats_step {
        what.push_str(&format!(", repeating step {r}"));
    }
    if let Some(r) = s.reverts_step {
        what.push_str(&format!(", withdrawing step {r}"));
    }
    let by = sluice::model::Agent::parse_identity(&s.agent, "store").identity();
    format!("step {}: {what}, {}, by {by}", s.id, s.ended_at)
}

/// The lines saying what code an outside command ran: the command line, where, the git state
/// and the exit status. `pad` is the label column's width.
pub fn code_lines(out: &mut impl Write, code: &Value, indent: &str, pad: usize) -> io::Result<()> {
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
pub fn shell_word(w: &str) -> String {
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
pub fn inferred_summary(l: &InferredLineage) -> String {
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
        MatchedBy::Lineage { ancestor, .. } => format!("by lineage through {ancestor}"),
    };
    format!("lineage inferred {by}: {}", parts.join(", "))
}

pub fn table<const N: usize>(
    out: &mut impl Write,
    rows: &[[String; N]],
    right: &[bool; N],
) -> io::Result<()> {
    // Each cell's width in characters, counted once.
    let widths: Vec<[usize; N]> = rows
        .iter()
        .map(|r| std::array::from_fn(|i| r[i].chars().count()))
        .collect();
    let mut w = [0usize; N];
    for cw in &widths {
        for (m, &c) in w.iter_mut().zip(cw) {
            *m = (*m).max(c);
        }
    }
    let mut line = String::new();
    for (r, cw) in rows.iter().zip(&widths) {
        line.clear();
        line.push_str("  ");
        for (i, c) in r.iter().enumerate() {
            let pad = w[i] - cw[i];
            if right[i] {
                line.extend(std::iter::repeat_n(' ', pad));
                line.push_str(c);
            } else {
                line.push_str(c);
                if i + 1 < N {
                    line.extend(std::iter::repeat_n(' ', pad));
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

/// What `render` writes, each line indented by two spaces.
pub fn indented(
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

/// A value in quotes, with white space and control characters visible.
pub fn shown(v: &str) -> String {
    format!("{v:?}")
}

/// What an intake converted, for `log` and `show`: the format, the sheet, the raw object and
/// the formulas and error values taken in.
pub fn conversion_line(step: &sluice::model::Step) -> Option<String> {
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

pub fn ingest_outcome_short(out: &mut impl Write, o: &IngestOutcome) -> io::Result<()> {
    match o {
        IngestOutcome::Recorded { version, .. } => writeln!(
            out,
            "recorded {} ({}), {}, delimiter \"{}\", {}",
            version.label(),
            short_hash(&version.hash),
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

/// An erasure order as commands name it: "erasure order N (REQUEST, WHEN)" (never a value).
pub fn order_named(order: i64, request: &str, ordered_at: &str) -> String {
    format!("erasure order {order} ({request}, {ordered_at})")
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
