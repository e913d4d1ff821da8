//! `compare`: two versions side by side. The text screen states how rows were paired, the
//! counts, then a table of changed cells (row | key | column | before | after) and the rows
//! removed and added; `--counts` stops after a per-column table of changed cells; `--json`
//! prints the structure documented in examples/reference.md, "JSON output".
//!
//! In the before and after columns white space is made visible: a space is `·`, a tab `→`, a
//! no-break space `⍽`, a line break `↵` (a carriage return `␍`); other control characters and
//! unusual white space are written as `\u{2003}`. The characters that changed are wrapped in
//! `«` and `»` in both columns (and coloured, removed red and added green, only when asked).

use std::io::{self, Write};

use super::args::CompareArgs;
use super::text::*;
use super::{Context, ExitCode};
use sluice::diff::chars::{pieces, Piece};
use sluice::diff::{Change, ChangeKind, Diff, RowRef};

/// How to render.
pub struct How {
    /// Counts only.
    pub counts: bool,
    /// List at most this many changes.
    pub limit: Option<usize>,
    pub colour: bool,
}

const RED: &str = "\x1b[31m";
const GREEN: &str = "\x1b[32m";
const BOLD: &str = "\x1b[1m";
const RESET: &str = "\x1b[0m";

pub fn compare(
    ctx: &Context<'_>,
    a: &CompareArgs,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let key = match &a.key {
        Some(cols) => sluice::diff::KeyChoice::Columns(cols.clone()),
        None => sluice::diff::KeyChoice::Declared,
    };
    // Values are kept only for the changes listed; everything else is counted.
    let listed = if a.counts {
        0
    } else {
        a.limit.unwrap_or(sluice::diff::LISTED_BY_DEFAULT)
    };
    let d = sluice::diff::diff_listed(
        &store,
        &a.from,
        &a.to,
        &sluice::diff::DiffOptions { key },
        listed,
    )?;
    // Colour only for a person at a terminal (or when asked with --color always).
    let how = How {
        counts: a.counts,
        limit: a.limit,
        colour: ctx.colour(),
    };
    let mut buffered = std::io::BufWriter::new(out);
    if a.json {
        let limit = if how.counts {
            0
        } else {
            how.limit.unwrap_or(usize::MAX)
        };
        json(&mut buffered, &sluice::outcome::CompareJson::new(&d, limit))?;
    } else {
        compare_text(&mut buffered, &d, &how)?;
    }
    buffered.flush()?;
    Ok(0)
}

/// A character as shown in the before and after columns.
fn push_visible(out: &mut String, c: char) {
    match c {
        ' ' => out.push('·'),
        '\t' => out.push('→'),
        '\u{a0}' => out.push('⍽'),
        '\n' => out.push('↵'),
        '\r' => out.push('␍'),
        c if c.is_control() || c.is_whitespace() || c == '\u{feff}' || c == '\u{200b}' => {
            out.push_str(&format!("\\u{{{:x}}}", c as u32))
        }
        c => out.push(c),
    }
}

fn visible(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    for c in s.chars() {
        push_visible(&mut out, c);
    }
    out
}

/// The before and after values with their changed characters wrapped in « and ».
fn marked_pair(old: &str, new: &str, colour: bool) -> (String, String) {
    let (mut o, mut n) = (String::new(), String::new());
    let mark = |out: &mut String, text: &str, col: &str| {
        if colour {
            out.push_str(col);
        }
        out.push('«');
        out.push_str(&visible(text));
        out.push('»');
        if colour {
            out.push_str(RESET);
        }
    };
    for p in pieces(old, new) {
        match p {
            Piece::Same(t) => {
                let t = visible(&t);
                o.push_str(&t);
                n.push_str(&t);
            }
            Piece::Removed(t) => mark(&mut o, &t, RED),
            Piece::Added(t) => mark(&mut n, &t, GREEN),
        }
    }
    (o, n)
}

/// Rows that share a key value, paired within their group: how many, and the first groups with
/// their 1-based data rows on each side.
fn duplicates_line(out: &mut impl Write, dup: &sluice::diff::DuplicateKeys) -> io::Result<()> {
    let rows = |rs: &[u64], n: u64| {
        let mut t: Vec<String> = rs.iter().map(|r| r.to_string()).collect();
        if n > rs.len() as u64 {
            t.push(format!("and {} more", count(n - rs.len() as u64)));
        }
        if t.is_empty() {
            "-".to_string()
        } else {
            t.join(", ")
        }
    };
    let mut groups: Vec<String> = dup
        .first
        .iter()
        .map(|g| {
            format!(
                "\"{}\" rows {} → {}",
                g.key.join(", "),
                rows(&g.from_rows, g.n_from),
                rows(&g.to_rows, g.n_to)
            )
        })
        .collect();
    if dup.groups > dup.first.len() as u64 {
        groups.push(format!(
            "and {} more",
            count(dup.groups - dup.first.len() as u64)
        ));
    }
    writeln!(
        out,
        "  shared keys: {} shared by several rows ({} before, {} after), paired within each group by {}: {}",
        plural(dup.groups, "key value is", "key values are"),
        count(dup.rows_from),
        count(dup.rows_to),
        dup.paired_by,
        groups.join("; ")
    )
}

fn summary(out: &mut impl Write, d: &Diff, colour: bool) -> io::Result<()> {
    let (b, r) = if colour { (BOLD, RESET) } else { ("", "") };
    writeln!(
        out,
        "{b}compared {} with {}{r}; {}",
        d.from.label(),
        d.to.label(),
        d.matched_by.describe()
    )?;
    if let Some(dup) = &d.duplicates {
        duplicates_line(out, dup)?;
    }
    writeln!(
        out,
        "  rows: {} before, {} after; {} kept ({} of them changed), {} removed, {} added",
        count(d.from.n_rows),
        count(d.to.n_rows),
        count(d.n_unchanged() + d.n_changed()),
        count(d.n_changed()),
        count(d.n_removed()),
        count(d.n_added()),
    )?;
    if let Some(al) = &d.alignment {
        writeln!(
            out,
            "  order: {} removed or added by fingerprint before pairing, {} in common",
            plural(al.edit_distance, "row", "rows"),
            count(al.common_rows)
        )?;
    }
    writeln!(out, "  cells: {} changed", count(d.n_cells))?;
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
            .map(|(a, b)| format!("{a} now {b}"))
            .collect();
        parts.push(format!("renamed {}", r.join(", ")));
    }
    if c.reordered {
        parts.push(format!("reordered ({})", d.to.header.join(", ")));
    }
    if parts.is_empty() {
        writeln!(out, "  columns: as before")?;
    } else {
        writeln!(out, "  columns: {}", parts.join("; "))?;
    }
    Ok(())
}

fn row_values(row: Option<RowRef<'_>>) -> String {
    match row {
        Some(r) => r
            .texts()
            .iter()
            .map(|v| visible(v))
            .collect::<Vec<_>>()
            .join(" | "),
        None => String::new(),
    }
}

/// The key of a change, as `41003` (or `41003, north` for several key columns).
fn key_text(d: &Diff, c: &Change) -> String {
    d.key_of(c)
        .map(|k| k.join(", "))
        .unwrap_or_else(|| "-".into())
}

/// A row position on screen: 1-based; `3 (was 2)` when the row moved. Row numbers are written
/// as every screen writes a data row, without thousands separators (they name a row; counts
/// have separators).
fn row_text(c: &Change) -> String {
    match (c.a_row, c.b_row) {
        (Some(a), Some(b)) if a == b => (b + 1).to_string(),
        (Some(a), Some(b)) => format!("{} (was {})", b + 1, a + 1),
        (Some(a), None) => (a + 1).to_string(),
        (None, Some(b)) => (b + 1).to_string(),
        (None, None) => "-".into(),
    }
}

/// `f` of every item, in order; a long listing (tens of thousands of changes) is built in two
/// halves at once.
fn built<T: Sync, R: Send>(items: &[T], f: impl Fn(&T) -> R + Sync) -> Vec<R> {
    sluice::diff::read::each_in_halves(items, 4096, |x| Some(f(x)))
}

pub fn compare_text(out: &mut impl Write, d: &Diff, how: &How) -> io::Result<()> {
    summary(out, d, how.colour)?;
    if how.counts {
        writeln!(out)?;
        let mut rows = vec![["column".to_string(), "changed cells".to_string()]];
        for (c, n) in &d.changed_by_column {
            rows.push([c.clone(), count(*n)]);
        }
        if rows.len() == 1 {
            writeln!(out, "  no cell changed")?;
        } else {
            table(out, &rows, &[false, true])?;
        }
        return Ok(());
    }
    if d.n_changes == 0 {
        if d.is_empty() {
            writeln!(out, "no differences")?;
        }
        return Ok(());
    }
    let limit = how.limit.unwrap_or(usize::MAX);
    let listed: Vec<&Change> = d.changes.iter().take(limit).collect();
    // Rows paired by order have no key: the table then has no key column. Rows paired through
    // the lineage show the declared key, if any.
    let key_names = d.matched_by.key().map(|k| k.join(", "));
    let keyed = key_names.is_some();
    let mut cells: Vec<Vec<String>> = Vec::new();
    let mut header = vec!["row".to_string()];
    if let Some(k) = key_names {
        header.push(k);
    }
    header.extend(["column", "before", "after"].map(String::from));
    cells.push(header);
    let changed: Vec<(&Change, &sluice::diff::CellDiff)> = listed
        .iter()
        .filter(|c| c.kind == ChangeKind::Changed)
        .flat_map(|&c| {
            d.pairing.cells[c.cells.clone()]
                .iter()
                .map(move |cell| (c, cell))
        })
        .collect();
    cells.extend(built(&changed, |&(c, cell)| {
        let (o, n) = marked_pair(&cell.old, &cell.new, how.colour);
        let mut row = vec![row_text(c)];
        if keyed {
            row.push(key_text(d, c));
        }
        row.extend([cell.column.clone(), o, n]);
        row
    }));
    if cells.len() > 1 {
        writeln!(out)?;
        if keyed {
            let rows: Vec<[String; 5]> = cells
                .into_iter()
                .map(|r| r.try_into().unwrap_or_default())
                .collect();
            table(out, &rows, &[true, false, false, false, false])?;
        } else {
            let rows: Vec<[String; 4]> = cells
                .into_iter()
                .map(|r| r.try_into().unwrap_or_default())
                .collect();
            table(out, &rows, &[true, false, false, false])?;
        }
    }
    for (kind, title, col) in [
        (ChangeKind::Removed, "removed rows", RED),
        (ChangeKind::Added, "added rows", GREEN),
    ] {
        let these: Vec<&&Change> = listed.iter().filter(|c| c.kind == kind).collect();
        if these.is_empty() {
            continue;
        }
        writeln!(out)?;
        let (s, e) = if how.colour { (col, RESET) } else { ("", "") };
        writeln!(out, "{s}{title}{e}")?;
        let lines = built(&these, |c| {
            let values = match kind {
                ChangeKind::Removed => c.a_row.and_then(|r| d.from_rows.get(r)),
                _ => c.b_row.and_then(|r| d.to_rows.get(r)),
            };
            if keyed {
                format!(
                    "  row {}, key {}: {}",
                    row_text(c),
                    key_text(d, c),
                    row_values(values)
                )
            } else {
                format!("  row {}: {}", row_text(c), row_values(values))
            }
        });
        for line in lines {
            writeln!(out, "{line}")?;
        }
    }
    if d.n_changes > listed.len() as u64 {
        let rest = d.n_changes - listed.len() as u64;
        let why = match how.limit {
            Some(n) => format!("--limit {n}"),
            None => format!(
                "at most {} are listed unless --limit asks for more",
                count(sluice::diff::LISTED_BY_DEFAULT as u64)
            ),
        };
        writeln!(
            out,
            "… and {} not listed ({why})",
            plural(rest, "more change", "more changes")
        )?;
    }
    Ok(())
}
