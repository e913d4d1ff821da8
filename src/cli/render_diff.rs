//! Rendering a diff: a text form for people (summary first, then each change with its rows in
//! both versions, its key and what changed inside each cell) and `--json` for machines (the
//! structure documented in examples/reference.md, "JSON output").
//!
//! Inside a changed cell, removed characters are wrapped in `[-…]` and added ones in `[+…]`;
//! inside those marks a space is shown as `␣` and a no-break space as `⍽`, so that a removed
//! trailing space can be seen. Tabs, line breaks, other control characters and unusual white
//! space are always escaped (`\t`, `\n`, `\r`, `\u{2003}`), and a backslash is doubled. Colour
//! (red for removed, green for added) is added only when the caller says so.

use std::io::{self, Write};

use serde::Serialize;

use super::render::count;
use sluice::diff::chars::{pieces, Piece};
use sluice::diff::{Change, ChangeKind, Diff, MatchedBy, RowRef};

/// How to render.
pub struct How {
    /// Counts only.
    pub stat: bool,
    /// List at most this many changes.
    pub limit: Option<usize>,
    pub colour: bool,
}

const RED: &str = "\x1b[31m";
const GREEN: &str = "\x1b[32m";
const BOLD: &str = "\x1b[1m";
const RESET: &str = "\x1b[0m";

/// A character as shown: escaped when it would be invisible or break the line.
fn push_visible(out: &mut String, c: char, marked: bool) {
    match c {
        '\\' => out.push_str("\\\\"),
        '\t' => out.push_str("\\t"),
        '\n' => out.push_str("\\n"),
        '\r' => out.push_str("\\r"),
        ' ' if marked => out.push('␣'),
        ' ' => out.push(' '),
        '\u{a0}' if marked => out.push('⍽'),
        c if c.is_control() || c.is_whitespace() || c == '\u{feff}' || c == '\u{200b}' => {
            out.push_str(&format!("\\u{{{:x}}}", c as u32))
        }
        c => out.push(c),
    }
}

fn visible(s: &str, marked: bool) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    for c in s.chars() {
        push_visible(&mut out, c, marked);
    }
    out
}

/// A whole value in quotes (an inner quote doubled), white space made visible.
fn quoted(s: &str) -> String {
    format!("\"{}\"", visible(s, false).replace('"', "\"\""))
}

/// The old and the new value, each in quotes with its removed or added characters marked.
fn marked_pair(old: &str, new: &str, colour: bool) -> (String, String) {
    let (mut o, mut n) = (String::from("\""), String::from("\""));
    let mark = |out: &mut String, sign: char, text: &str, col: &str| {
        if colour {
            out.push_str(col);
        }
        out.push('[');
        out.push(sign);
        out.push_str(&visible(text, true).replace('"', "\"\""));
        out.push(']');
        if colour {
            out.push_str(RESET);
        }
    };
    for p in pieces(old, new) {
        match p {
            Piece::Same(t) => {
                let t = visible(&t, false).replace('"', "\"\"");
                o.push_str(&t);
                n.push_str(&t);
            }
            Piece::Removed(t) => mark(&mut o, '-', &t, RED),
            Piece::Added(t) => mark(&mut n, '+', &t, GREEN),
        }
    }
    o.push('"');
    n.push('"');
    (o, n)
}

fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{} {}", count(n), if n == 1 { one } else { many })
}

fn summary(out: &mut impl Write, d: &Diff, colour: bool) -> io::Result<()> {
    let how = d.matched_by.describe();
    let (b, r) = if colour { (BOLD, RESET) } else { ("", "") };
    writeln!(out, "{b}{} → {}{r}, {how}", d.from.label(), d.to.label())?;
    if let Some(dup) = &d.duplicates {
        let first: Vec<String> = dup
            .first
            .iter()
            .map(|g| {
                let rows = |rs: &[u64], n: u64| {
                    let mut t: Vec<String> = rs.iter().map(|r| count(*r)).collect();
                    if n > rs.len() as u64 {
                        t.push(format!("and {} more", count(n - rs.len() as u64)));
                    }
                    if t.is_empty() {
                        "-".to_string()
                    } else {
                        t.join(", ")
                    }
                };
                format!(
                    "\"{}\" rows {} → {}",
                    g.key.join(", "),
                    rows(&g.from_rows, g.n_from),
                    rows(&g.to_rows, g.n_to)
                )
            })
            .collect();
        writeln!(
            out,
            "shared   {} shared by several rows ({} before, {} after), paired within each group by {}: {}{}",
            plural(dup.groups, "key value is", "key values are"),
            count(dup.rows_from),
            count(dup.rows_to),
            dup.paired_by,
            first.join("; "),
            if dup.groups > dup.first.len() as u64 {
                format!("; and {} more", count(dup.groups - dup.first.len() as u64))
            } else {
                String::new()
            }
        )?;
    }
    writeln!(
        out,
        "rows     {} → {}: {} changed, {} removed, {} added, {} unchanged",
        count(d.from.n_rows),
        count(d.to.n_rows),
        count(d.n_changed()),
        count(d.n_removed()),
        count(d.n_added()),
        count(d.n_unchanged())
    )?;
    if let Some(al) = &d.alignment {
        writeln!(
            out,
            "script   {} removed or added by fingerprint before pairing, {} in common",
            plural(al.edit_distance, "row", "rows"),
            count(al.common_rows)
        )?;
    }
    let n_cells = d.pairing.cells.len() as u64;
    let by: Vec<String> = d
        .changed_by_column
        .iter()
        .filter(|c| c.1 > 0)
        .map(|(c, n)| format!("{c} {}", count(*n)))
        .collect();
    if by.is_empty() {
        writeln!(out, "cells    {} changed", count(n_cells))?;
    } else {
        writeln!(
            out,
            "cells    {} changed: {}",
            count(n_cells),
            by.join(", ")
        )?;
    }
    let c = &d.columns;
    let mut parts = Vec::new();
    if !c.added.is_empty() {
        parts.push(format!("added {}", c.added.join(", ")));
    }
    if !c.removed.is_empty() {
        parts.push(format!("removed {}", c.removed.join(", ")));
    }
    if !c.renamed.is_empty() {
        let r: Vec<String> = c
            .renamed
            .iter()
            .map(|(a, b)| format!("{a} → {b}"))
            .collect();
        parts.push(format!("renamed {}", r.join(", ")));
    }
    if c.reordered {
        parts.push(format!("reordered ({})", d.to.header.join(", ")));
    }
    if parts.is_empty() {
        writeln!(out, "columns  the same")?;
    } else {
        writeln!(out, "columns  {}", parts.join("; "))?;
    }
    Ok(())
}

fn row_values(row: Option<RowRef<'_>>) -> String {
    match row {
        Some(r) => r
            .texts()
            .iter()
            .map(|v| quoted(v))
            .collect::<Vec<_>>()
            .join(", "),
        None => String::new(),
    }
}

fn change(out: &mut impl Write, d: &Diff, c: &Change, colour: bool) -> io::Result<()> {
    let key = d
        .key_of(c)
        .map(|k| {
            let names = d.matched_by.key().map(|k| k.join(", ")).unwrap_or_default();
            format!("  {names} {}", k.join(", "))
        })
        .unwrap_or_default();
    let pos = |r: Option<u64>| r.map_or("-".to_string(), |r| count(r + 1));
    match c.kind {
        ChangeKind::Changed => {
            writeln!(out, "changed  row {} → {}{key}", pos(c.a_row), pos(c.b_row))?;
            let cells = &d.pairing.cells[c.cells.clone()];
            let width = cells
                .iter()
                .map(|x| x.column.chars().count())
                .max()
                .unwrap_or(0);
            for cell in cells {
                let (o, n) = marked_pair(&cell.old, &cell.new, colour);
                writeln!(out, "    {:<width$}  {o} → {n}", cell.column)?;
            }
        }
        ChangeKind::Removed => {
            let (s, e) = if colour { (RED, RESET) } else { ("", "") };
            writeln!(out, "{s}removed{e}  row {}{key}", pos(c.a_row))?;
            let values = c.a_row.and_then(|r| d.from_rows.get(r));
            writeln!(out, "    {}", row_values(values))?;
        }
        ChangeKind::Added => {
            let (s, e) = if colour { (GREEN, RESET) } else { ("", "") };
            writeln!(out, "{s}added{e}    row {}{key}", pos(c.b_row))?;
            let values = c.b_row.and_then(|r| d.to_rows.get(r));
            writeln!(out, "    {}", row_values(values))?;
        }
    }
    Ok(())
}

pub fn text(out: &mut impl Write, d: &Diff, how: &How) -> io::Result<()> {
    summary(out, d, how.colour)?;
    if how.stat {
        if !d.changed_by_column.is_empty() {
            writeln!(out)?;
            writeln!(out, "changed cells per column")?;
            let width = d
                .changed_by_column
                .iter()
                .map(|c| c.0.chars().count())
                .max()
                .unwrap_or(0);
            let digits = d
                .changed_by_column
                .iter()
                .map(|c| count(c.1).len())
                .max()
                .unwrap_or(1);
            for (c, n) in &d.changed_by_column {
                writeln!(out, "  {c:<width$}  {:>digits$}", count(*n))?;
            }
        }
        return Ok(());
    }
    if d.changes.is_empty() {
        if d.is_empty() {
            writeln!(out, "no differences")?;
        }
        return Ok(());
    }
    writeln!(out)?;
    let limit = how.limit.unwrap_or(usize::MAX);
    for c in d.changes.iter().take(limit) {
        change(out, d, c, how.colour)?;
    }
    if d.changes.len() > limit {
        let rest = (d.changes.len() - limit) as u64;
        writeln!(
            out,
            "… and {} not listed (--limit {limit})",
            plural(rest, "more change", "more changes")
        )?;
    }
    Ok(())
}

#[derive(Serialize)]
struct JsonVersion<'a> {
    version: String,
    hash: &'a str,
}

#[derive(Serialize)]
struct JsonRows {
    from: u64,
    to: u64,
    unchanged: u64,
    changed: u64,
    removed: u64,
    added: u64,
}

#[derive(Serialize)]
struct JsonColumnCount<'a> {
    column: &'a str,
    changed: u64,
}

#[derive(Serialize)]
struct JsonCells<'a> {
    changed: u64,
    by_column: Vec<JsonColumnCount<'a>>,
}

#[derive(Serialize)]
struct JsonRename<'a> {
    from: &'a str,
    to: &'a str,
}

#[derive(Serialize)]
struct JsonColumns<'a> {
    added: &'a [String],
    removed: &'a [String],
    renamed: Vec<JsonRename<'a>>,
    reordered: bool,
}

#[derive(Serialize)]
struct JsonCell<'a> {
    column: &'a str,
    old: &'a str,
    new: &'a str,
    pieces: Vec<Piece>,
}

#[derive(Serialize)]
struct JsonChange<'a> {
    kind: ChangeKind,
    from_row: Option<u64>,
    to_row: Option<u64>,
    key: Option<Vec<String>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    cells: Option<Vec<JsonCell<'a>>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    values: Option<Vec<String>>,
}

#[derive(Serialize)]
struct JsonDiff<'a> {
    from: JsonVersion<'a>,
    to: JsonVersion<'a>,
    matched_by: &'static str,
    /// How the rows were paired, in a sentence.
    pairing: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    lineage_steps: Option<&'a Vec<i64>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    duplicates: Option<&'a sluice::diff::DuplicateKeys>,
    key: Option<&'a [String]>,
    rows: JsonRows,
    alignment: Option<sluice::diff::Alignment>,
    cells: JsonCells<'a>,
    columns: JsonColumns<'a>,
    n_changes: usize,
    listed: usize,
    changes: Vec<JsonChange<'a>>,
}

pub fn json(out: &mut impl Write, d: &Diff, how: &How) -> io::Result<()> {
    let limit = if how.stat {
        0
    } else {
        how.limit.unwrap_or(usize::MAX)
    };
    let changes: Vec<JsonChange<'_>> = d
        .changes
        .iter()
        .take(limit)
        .map(|c| {
            let cells = (c.kind == ChangeKind::Changed).then(|| {
                d.pairing.cells[c.cells.clone()]
                    .iter()
                    .map(|x| JsonCell {
                        column: &x.column,
                        old: &x.old,
                        new: &x.new,
                        pieces: pieces(&x.old, &x.new),
                    })
                    .collect()
            });
            let values = match c.kind {
                ChangeKind::Removed => c.a_row.and_then(|r| d.from_rows.get(r)),
                ChangeKind::Added => c.b_row.and_then(|r| d.to_rows.get(r)),
                ChangeKind::Changed => None,
            }
            .map(|r| r.texts());
            JsonChange {
                kind: c.kind,
                from_row: c.a_row.map(|r| r + 1),
                to_row: c.b_row.map(|r| r + 1),
                key: d.key_of(c),
                cells,
                values,
            }
        })
        .collect();
    let value = JsonDiff {
        from: JsonVersion {
            version: d.from.label(),
            hash: &d.from.hash,
        },
        to: JsonVersion {
            version: d.to.label(),
            hash: &d.to.hash,
        },
        matched_by: d.matched_by.method(),
        pairing: d.matched_by.describe(),
        lineage_steps: match &d.matched_by {
            MatchedBy::Lineage { steps, .. } => Some(steps),
            _ => None,
        },
        duplicates: d.duplicates.as_ref(),
        key: d.matched_by.key(),
        rows: JsonRows {
            from: d.from.n_rows,
            to: d.to.n_rows,
            unchanged: d.n_unchanged(),
            changed: d.n_changed(),
            removed: d.n_removed(),
            added: d.n_added(),
        },
        alignment: d.alignment,
        cells: JsonCells {
            changed: d.pairing.cells.len() as u64,
            by_column: d
                .changed_by_column
                .iter()
                .map(|(c, n)| JsonColumnCount {
                    column: c,
                    changed: *n,
                })
                .collect(),
        },
        columns: JsonColumns {
            added: &d.columns.added,
            removed: &d.columns.removed,
            renamed: d
                .columns
                .renamed
                .iter()
                .map(|(a, b)| JsonRename { from: a, to: b })
                .collect(),
            reordered: d.columns.reordered,
        },
        n_changes: d.changes.len(),
        listed: changes.len(),
        changes,
    };
    super::render::json(out, &value)
}
