//! The lineage report's renderings: HTML (one self-contained file: inline style sheet with a
//! print style, the lineage SVG and bar charts inline, no scripts, fonts or images from
//! elsewhere), Markdown (the same content as text tables) and JSON (the [`Report`] structure,
//! `schema/report.schema.json`). Pure functions from the report to text; the caller writes
//! the file.

use std::fmt::Write as _;

use sluice::model::{canonical_json, ColumnProfile, StepKind};
use sluice::report::{QualityComparison, Report, ReportStep};

/// The report as pretty JSON, ending in a newline.
pub fn json(report: &Report) -> String {
    let mut s = serde_json::to_string_pretty(report).unwrap_or_default();
    s.push('\n');
    s
}

fn kind_word(k: StepKind) -> &'static str {
    match k {
        StepKind::Ingest => "intake",
        StepKind::Operation => "operation",
        StepKind::Command => "outside command",
        StepKind::HandEdit => "hand edit",
        StepKind::Revert => "revert",
        StepKind::Replay => "replay",
    }
}

fn step_title(s: &ReportStep) -> String {
    match &s.operation {
        Some(op) => format!("Step {} · {} `{op}`", s.id, kind_word(s.kind)),
        None => format!("Step {} · {}", s.id, kind_word(s.kind)),
    }
}

fn versions(list: &[sluice::report::VersionRef]) -> String {
    list.iter()
        .map(|v| {
            let role = if v.role.is_empty() || v.role == "input" {
                String::new()
            } else {
                format!(" ({})", v.role)
            };
            format!(
                "{}{role} {} · {} × {}",
                v.version,
                &v.hash[..12.min(v.hash.len())],
                v.n_rows,
                v.n_cols
            )
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// What a step did, as (label, text) pairs every rendering shows the same way.
fn facts(s: &ReportStep) -> Vec<(&'static str, String)> {
    let mut f = vec![
        ("who", s.agent.clone()),
        ("when", format!("{} to {}", s.started_at, s.ended_at)),
        (
            "why",
            s.reason
                .clone()
                .unwrap_or_else(|| "(no reason recorded)".to_string()),
        ),
    ];
    match s.kind {
        StepKind::Command => {
            if let Some(code) = &s.code {
                let line = code["command"]
                    .as_array()
                    .map(|a| {
                        a.iter()
                            .map(|x| x.as_str().unwrap_or_default().to_string())
                            .collect::<Vec<_>>()
                            .join(" ")
                    })
                    .unwrap_or_default();
                f.push(("command", line));
                if let Some(cwd) = code["cwd"].as_str() {
                    f.push(("ran in", cwd.to_string()));
                }
                let git = &code["git"];
                f.push((
                    "code",
                    if git.is_null() {
                        "not in a git repository".to_string()
                    } else {
                        format!(
                            "commit {} on {}, {}",
                            git["commit"].as_str().unwrap_or("(no commit yet)"),
                            git["branch"].as_str().unwrap_or("a detached HEAD"),
                            if git["dirty"].as_bool().unwrap_or(false) {
                                let files: Vec<&str> = git["modified"]
                                    .as_array()
                                    .map(|a| a.iter().filter_map(|x| x.as_str()).collect())
                                    .unwrap_or_default();
                                format!("dirty (modified: {})", files.join(", "))
                            } else {
                                "clean".to_string()
                            }
                        )
                    },
                ));
                if let Some(status) = code["exit_status"].as_i64() {
                    f.push(("exit status", status.to_string()));
                }
            }
        }
        StepKind::Ingest | StepKind::HandEdit => {
            if let Some(src) = &s.source {
                f.push((
                    "file",
                    format!(
                        "{} ({} bytes{})",
                        src.path,
                        src.n_bytes,
                        src.modified
                            .as_deref()
                            .map(|m| format!(", modified {m}"))
                            .unwrap_or_default()
                    ),
                ));
            }
        }
        _ => {}
    }
    if let Some(op) = &s.operation {
        f.push(("operation", op.clone()));
    }
    if !s.params.is_null() {
        f.push(("parameters", canonical_json(&s.params)));
    }
    if !s.inputs.is_empty() {
        f.push(("read", versions(&s.inputs)));
    }
    f.push(("made", versions(&s.outputs)));
    let rows = match (s.rows_in, s.rows_out) {
        (Some(a), Some(b)) => format!("{a} in, {b} out"),
        (None, Some(b)) => format!("{b} out"),
        (Some(a), None) => format!("{a} in"),
        (None, None) => "not recorded".to_string(),
    };
    f.push(("rows", rows));
    f.push((
        "lineage",
        match s.lineage.as_str() {
            "exact" => "exact (recorded by the operation as it ran)".to_string(),
            "inferred" => "inferred afterwards by a diff".to_string(),
            "none" => "none (raw data taken in)".to_string(),
            other => other.to_string(),
        },
    ));
    if let Some(r) = s.repeats_step {
        f.push(("repeats", format!("step {r} on new data")));
    }
    f.push(("recorded by", s.tool_version.clone()));
    f
}

/// The range of a column in the raw input and the subject, each end shown by `code` (white
/// space at either end of a value is part of what the data holds).
fn range_cell(
    raw: Option<&ColumnProfile>,
    subject: Option<&ColumnProfile>,
    code: impl Fn(&str) -> String,
) -> String {
    let one = |p: Option<&ColumnProfile>| -> String {
        match p.map(|p| (&p.min, &p.max)) {
            None => "-".to_string(),
            Some((Some(a), Some(b))) if a == b => code(a),
            Some((Some(a), Some(b))) => format!("{} … {}", code(a), code(b)),
            Some(_) => "(all blank)".to_string(),
        }
    };
    let (a, b) = (one(raw), one(subject));
    if a == b {
        a
    } else {
        format!("{a} → {b}")
    }
}

fn distinct(p: &ColumnProfile) -> String {
    if p.distinct_exact {
        p.n_distinct.to_string()
    } else {
        format!("≈{}", p.n_distinct)
    }
}

fn rule_text(rule: &serde_json::Value) -> String {
    canonical_json(rule)
}

// ---------------------------------------------------------------------------------------------
// Markdown

fn md(s: &str) -> String {
    s.replace('\\', "\\\\")
        .replace('|', "\\|")
        .replace('<', "\\<")
        .replace('>', "\\>")
        .replace('*', "\\*")
        .replace('_', "\\_")
        .replace(['\r', '\n'], " ")
}

fn md_code(s: &str) -> String {
    let fence = if s.contains('`') { "``" } else { "`" };
    format!(
        "{fence} {} {fence}",
        s.replace('|', "\\|").replace('\n', " ")
    )
}

fn md_value(v: &Option<String>) -> String {
    match v {
        Some(s) => md_code(s),
        None => "(none)".to_string(),
    }
}

/// The report as Markdown.
pub fn markdown(r: &Report) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "# Lineage report: {}\n", r.subject.version);
    let _ = writeln!(o, "| | |\n| --- | --- |");
    let _ = writeln!(o, "| dataset | {} |", md(&r.subject.dataset));
    let _ = writeln!(
        o,
        "| version | {}{} |",
        r.subject.version,
        if r.subject.latest {
            " (latest)"
        } else {
            " (a later version exists)"
        }
    );
    let _ = writeln!(o, "| BLAKE3 | `{}` |", r.subject.hash);
    let _ = writeln!(
        o,
        "| size | {} rows × {} columns, {} bytes |",
        r.subject.n_rows, r.subject.n_cols, r.subject.n_bytes
    );
    let _ = writeln!(o, "| recorded | {} |", r.subject.recorded_at);
    let _ = writeln!(
        o,
        "| generated | {} by {} with {} |\n",
        r.generated.at,
        md(&r.generated.by),
        r.generated.tool_version
    );
    let _ = writeln!(o, "> **Caution.** {}\n", r.caution);

    let _ = writeln!(o, "## Verification\n");
    let _ = writeln!(
        o,
        "**{}.** {}\n",
        if r.verification.intact
            && r.verification
                .replay
                .as_ref()
                .is_none_or(|x| x.failed.is_none())
        {
            "Verified"
        } else {
            "Problems found"
        },
        r.verification.statement
    );
    let _ = writeln!(
        o,
        "Audit chain head when generated: entry {}, `{}`.\n",
        r.verification.audit_head_seq, r.verification.audit_head_hash
    );
    for p in &r.verification.problems {
        let _ = writeln!(o, "- {}", md(p));
    }
    if !r.verification.problems.is_empty() {
        o.push('\n');
    }

    let _ = writeln!(
        o,
        "## Steps from the raw inputs to {} ({} steps)\n",
        r.subject.version,
        r.steps.len()
    );
    for s in &r.steps {
        let _ = writeln!(o, "### {}\n", step_title(s));
        let _ = writeln!(o, "| | |\n| --- | --- |");
        for (k, v) in facts(s) {
            if k == "parameters" || k == "command" {
                let _ = writeln!(o, "| {k} | {} |", md_code(&v));
            } else {
                let _ = writeln!(o, "| {k} | {} |", md(&v));
            }
        }
        o.push('\n');
        if !s.cells_changed.is_empty() {
            let _ = writeln!(
                o,
                "Cells changed: {} in all.\n\n| column | cells changed |\n| --- | ---: |",
                s.cells_changed_total
            );
            for c in &s.cells_changed {
                let _ = writeln!(o, "| {} | {} |", md(&c.column), c.cells);
            }
            o.push('\n');
        }
        if !s.drops.is_empty() {
            let _ = writeln!(
                o,
                "Rows dropped: {} in all.\n\n| reason | rows |\n| --- | ---: |",
                s.rows_dropped
            );
            for d in &s.drops {
                let _ = writeln!(o, "| {} | {} |", md(&d.reason), d.rows);
            }
            o.push('\n');
        }
        if !s.sample.is_empty() {
            let _ = writeln!(
                o,
                "First {} changed cells:\n\n| version | row | column | old | new |\n| --- | ---: | --- | --- | --- |",
                s.sample.len()
            );
            for c in &s.sample {
                let _ = writeln!(
                    o,
                    "| {} | {} | {} | {} | {} |",
                    c.version,
                    c.row,
                    md(&c.column),
                    md_value(&c.old),
                    md_value(&c.new)
                );
            }
            o.push('\n');
        }
    }

    let _ = writeln!(o, "## Checks recorded on the versions of the way\n");
    if r.checks.is_empty() {
        let _ = writeln!(o, "No checks were recorded on these versions.\n");
    }
    for vc in &r.checks {
        let _ = writeln!(
            o,
            "### {} (`{}`)\n\n| rule | result | failing rows | by | at | gate |\n| --- | --- | ---: | --- | --- | --- |",
            vc.version,
            &vc.hash[..12.min(vc.hash.len())]
        );
        for c in &vc.checks {
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} | {} | {} |",
                md_code(&rule_text(&c.rule)),
                if c.passed { "passed" } else { "failed" },
                c.n_failing,
                md(&c.agent),
                c.checked_at,
                if c.gate { "yes" } else { "no" }
            );
        }
        o.push('\n');
    }

    let _ = writeln!(o, "## Data quality: raw inputs and {}\n", r.subject.version);
    for q in &r.quality {
        let _ = writeln!(
            o,
            "### {} ({} rows) and {} ({} rows)\n",
            q.raw.version, q.raw.n_rows, q.subject.version, q.subject.n_rows
        );
        let _ = writeln!(
            o,
            "| column | type | blanks | distinct | range |\n| --- | --- | ---: | ---: | --- |"
        );
        for c in &q.columns {
            let cell = |f: &dyn Fn(&ColumnProfile) -> String| -> String {
                let a = c.raw.as_ref().map_or("-".to_string(), f);
                let b = c.subject.as_ref().map_or("-".to_string(), f);
                if a == b {
                    md(&a)
                } else {
                    format!("{} → {}", md(&a), md(&b))
                }
            };
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} | {} |",
                md(&c.column),
                cell(&|p| p.inferred_type.clone()),
                cell(&|p| p.n_blank.to_string()),
                cell(&distinct),
                range_cell(c.raw.as_ref(), c.subject.as_ref(), md_code),
            );
        }
        o.push('\n');
    }
    let _ = writeln!(
        o,
        "A → B: raw input, then {}; `-`: the column is not in that version (dropped, renamed or added on the way).\n",
        r.subject.version
    );

    let _ = writeln!(o, "## Hashes ({})\n", r.hashes.algorithm.to_uppercase());
    let _ = writeln!(
        o,
        "| version | file taken in | bytes | hash |\n| --- | --- | ---: | --- |"
    );
    for h in &r.hashes.raw {
        let _ = writeln!(
            o,
            "| {} | {} | {} | `{}` |",
            h.version,
            md(h.file.as_deref().unwrap_or("-")),
            h.n_bytes,
            h.hash
        );
    }
    let _ = writeln!(
        o,
        "| {} (this report's subject) | - | {} | `{}` |\n",
        r.subject.version, r.subject.n_bytes, r.hashes.subject
    );
    let _ = writeln!(
        o,
        "Any BLAKE3 tool can check a file against these hashes; `sluice retrieve VERSION` gives a version's exact bytes."
    );
    o
}

// ---------------------------------------------------------------------------------------------
// HTML

fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

const STYLE: &str = r#"
:root { --ink: #1d2733; --muted: #5b6773; --line: #d5dbe1; --band: #f3f5f7; --accent: #1f5f99; --ok: #23744a; --bad: #a3271f; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; color: var(--ink); margin: 0 auto; max-width: 60rem; padding: 1.5rem; }
h1 { font-size: 1.6rem; margin: 0 0 .5rem; }
h2 { font-size: 1.25rem; margin: 2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--accent); }
h3 { font-size: 1.05rem; margin: 1.4rem 0 .4rem; }
table { border-collapse: collapse; width: 100%; margin: .4rem 0 .8rem; }
th, td { text-align: left; vertical-align: top; padding: .25rem .5rem; border-bottom: 1px solid var(--line); }
th { background: var(--band); font-weight: 600; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
table.facts th { width: 9rem; background: none; color: var(--muted); font-weight: 500; }
code { white-space: pre-wrap; }
code, .hash { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: .86em; overflow-wrap: anywhere; }
.caution { border-left: 4px solid #b7791f; background: #fdf6e7; padding: .6rem .9rem; margin: 1rem 0; }
.verdict { border-left: 4px solid var(--ok); background: #ecf6f0; padding: .6rem .9rem; }
.verdict.bad { border-left-color: var(--bad); background: #fbeceb; }
.muted { color: var(--muted); }
.step { border: 1px solid var(--line); border-radius: 4px; padding: .2rem .9rem .6rem; margin: .8rem 0; }
.lineage svg { max-width: 100%; height: auto; display: block; margin: 0 auto; }
.lineage { border: 1px solid var(--line); padding: .5rem; overflow: auto; max-height: 50rem; }
.bar { vertical-align: middle; }
.pass { color: var(--ok); font-weight: 600; }
.fail { color: var(--bad); font-weight: 600; }
@media print {
  @page { margin: 14mm 12mm; }
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  .lineage { max-height: none; overflow: visible; border: none; }
  .lineage svg { max-height: 240mm; width: auto; }
  h2 { break-after: avoid; page-break-after: avoid; }
  h3 { break-after: avoid; page-break-after: avoid; }
  tr, .caution, .verdict { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  .step { border: none; padding: 0; }
  a { color: inherit; text-decoration: none; }
}
"#;

/// A small inline bar chart: one bar per value (raw, subject), each the share of its row count.
fn bars(values: &[(Option<u64>, u64)], colour: &str) -> String {
    let w = 90.0;
    let mut o = format!(
        "<svg class=\"bar\" width=\"{w:.0}\" height=\"{}\" viewBox=\"0 0 {w:.0} {}\" role=\"img\">",
        values.len() * 7,
        values.len() * 7
    );
    for (i, (v, of)) in values.iter().enumerate() {
        let y = i * 7;
        let _ = write!(
            o,
            "<rect x=\"0\" y=\"{y}\" width=\"{w:.0}\" height=\"5\" fill=\"#e4e8ec\"/>"
        );
        if let Some(v) = v {
            let share = if *of == 0 {
                0.0
            } else {
                (*v as f64 / *of as f64).min(1.0)
            };
            let _ = write!(
                o,
                "<rect x=\"0\" y=\"{y}\" width=\"{:.1}\" height=\"5\" fill=\"{}\"/>",
                share * w,
                if i == 0 { "#9aa7b4" } else { colour }
            );
        }
    }
    o.push_str("</svg>");
    o
}

fn quality_html(o: &mut String, q: &QualityComparison) {
    let _ = writeln!(
        o,
        "<h3>{} ({} rows) and {} ({} rows)</h3>",
        esc(&q.raw.version),
        q.raw.n_rows,
        esc(&q.subject.version),
        q.subject.n_rows
    );
    let _ = writeln!(
        o,
        "<table><thead><tr><th>column</th><th>type</th><th class=\"n\">blanks</th><th></th><th class=\"n\">distinct</th><th></th><th>range</th></tr></thead><tbody>"
    );
    for c in &q.columns {
        let both = |f: &dyn Fn(&ColumnProfile) -> String| -> String {
            let a = c.raw.as_ref().map_or("-".to_string(), f);
            let b = c.subject.as_ref().map_or("-".to_string(), f);
            if a == b {
                esc(&a)
            } else {
                format!("{} → {}", esc(&a), esc(&b))
            }
        };
        let blank_bars = bars(
            &[
                (c.raw.as_ref().map(|p| p.n_blank), q.raw.n_rows),
                (c.subject.as_ref().map(|p| p.n_blank), q.subject.n_rows),
            ],
            "#c0504d",
        );
        let distinct_bars = bars(
            &[
                (c.raw.as_ref().map(|p| p.n_distinct), q.raw.n_rows),
                (c.subject.as_ref().map(|p| p.n_distinct), q.subject.n_rows),
            ],
            "#1f5f99",
        );
        let _ = writeln!(
            o,
            "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td><td>{blank_bars}</td><td class=\"n\">{}</td><td>{distinct_bars}</td><td>{}</td></tr>",
            esc(&c.column),
            both(&|p| p.inferred_type.clone()),
            both(&|p| p.n_blank.to_string()),
            both(&distinct),
            range_cell(c.raw.as_ref(), c.subject.as_ref(), |v| format!("<code>{}</code>", esc(v))),
        );
    }
    let _ = writeln!(o, "</tbody></table>");
}

/// The report as one self-contained HTML file.
pub fn html(r: &Report) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">"
    );
    let _ = writeln!(
        o,
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n<meta name=\"generator\" content=\"{}\">",
        esc(&r.generated.tool_version)
    );
    let _ = writeln!(
        o,
        "<title>Lineage report: {}</title>\n<style>{STYLE}</style>\n</head>\n<body>",
        esc(&r.subject.version)
    );
    let _ = writeln!(
        o,
        "<header><h1>Lineage report: {}</h1>",
        esc(&r.subject.version)
    );
    let _ = writeln!(o, "<table class=\"facts\"><tbody>");
    let rows: Vec<(&str, String)> = vec![
        ("dataset", esc(&r.subject.dataset)),
        (
            "version",
            format!(
                "{}{}",
                esc(&r.subject.version),
                if r.subject.latest {
                    " (latest)"
                } else {
                    " (a later version exists)"
                }
            ),
        ),
        (
            "BLAKE3",
            format!("<span class=\"hash\">{}</span>", esc(&r.subject.hash)),
        ),
        (
            "size",
            format!(
                "{} rows × {} columns, {} bytes",
                r.subject.n_rows, r.subject.n_cols, r.subject.n_bytes
            ),
        ),
        ("recorded", esc(&r.subject.recorded_at)),
        (
            "generated",
            format!(
                "{} by {} with {}",
                esc(&r.generated.at),
                esc(&r.generated.by),
                esc(&r.generated.tool_version)
            ),
        ),
    ];
    for (k, v) in rows {
        let _ = writeln!(o, "<tr><th>{k}</th><td>{v}</td></tr>");
    }
    let _ = writeln!(o, "</tbody></table></header>");
    let _ = writeln!(
        o,
        "<p class=\"caution\"><strong>Caution.</strong> {}</p>",
        esc(&r.caution)
    );

    let ok = r.verification.intact
        && r.verification
            .replay
            .as_ref()
            .is_none_or(|x| x.failed.is_none());
    let _ = writeln!(o, "<section id=\"verification\"><h2>Verification</h2>");
    let _ = writeln!(
        o,
        "<p class=\"verdict{}\"><strong>{}.</strong> {}</p>",
        if ok { "" } else { " bad" },
        if ok { "Verified" } else { "Problems found" },
        esc(&r.verification.statement)
    );
    let _ = writeln!(
        o,
        "<p class=\"muted\">Audit chain head when generated: entry {}, <span class=\"hash\">{}</span>.</p>",
        r.verification.audit_head_seq,
        esc(&r.verification.audit_head_hash)
    );
    if !r.verification.problems.is_empty() {
        let _ = writeln!(o, "<ul>");
        for p in &r.verification.problems {
            let _ = writeln!(o, "<li>{}</li>", esc(p));
        }
        let _ = writeln!(o, "</ul>");
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(
        o,
        "<section id=\"lineage\"><h2>Lineage</h2>\n<div class=\"lineage\">{}</div>\n</section>",
        r.lineage_svg.trim()
    );

    let _ = writeln!(
        o,
        "<section id=\"steps\"><h2>Steps from the raw inputs to {} ({} steps)</h2>",
        esc(&r.subject.version),
        r.steps.len()
    );
    for s in &r.steps {
        let title = esc(&step_title(s));
        // Backticks in the title mark the operation's name.
        let title = title
            .split('`')
            .enumerate()
            .map(|(i, part)| {
                if i % 2 == 1 {
                    format!("<code>{part}</code>")
                } else {
                    part.to_string()
                }
            })
            .collect::<String>();
        let _ = writeln!(
            o,
            "<div class=\"step\" id=\"step-{}\"><h3>{title}</h3>\n<table class=\"facts\"><tbody>",
            s.id
        );
        for (k, v) in facts(s) {
            let shown = if k == "parameters" || k == "command" {
                format!("<code>{}</code>", esc(&v))
            } else {
                esc(&v)
            };
            let _ = writeln!(o, "<tr><th>{k}</th><td>{shown}</td></tr>");
        }
        let _ = writeln!(o, "</tbody></table>");
        if !s.cells_changed.is_empty() {
            let _ = writeln!(
                o,
                "<table><thead><tr><th>column</th><th class=\"n\">cells changed ({} in all)</th></tr></thead><tbody>",
                s.cells_changed_total
            );
            for c in &s.cells_changed {
                let _ = writeln!(
                    o,
                    "<tr><td>{}</td><td class=\"n\">{}</td></tr>",
                    esc(&c.column),
                    c.cells
                );
            }
            let _ = writeln!(o, "</tbody></table>");
        }
        if !s.drops.is_empty() {
            let _ = writeln!(
                o,
                "<table><thead><tr><th>reason a row was dropped</th><th class=\"n\">rows ({} in all)</th></tr></thead><tbody>",
                s.rows_dropped
            );
            for d in &s.drops {
                let _ = writeln!(
                    o,
                    "<tr><td>{}</td><td class=\"n\">{}</td></tr>",
                    esc(&d.reason),
                    d.rows
                );
            }
            let _ = writeln!(o, "</tbody></table>");
        }
        if !s.sample.is_empty() {
            let _ = writeln!(
                o,
                "<table><thead><tr><th>version</th><th class=\"n\">row</th><th>column</th><th>old</th><th>new</th></tr></thead><tbody>"
            );
            let show = |v: &Option<String>| match v {
                Some(s) => format!("<code>{}</code>", esc(s)),
                None => "<span class=\"muted\">(none)</span>".to_string(),
            };
            for c in &s.sample {
                let _ = writeln!(
                    o,
                    "<tr><td>{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                    esc(&c.version),
                    c.row,
                    esc(&c.column),
                    show(&c.old),
                    show(&c.new)
                );
            }
            let _ = writeln!(
                o,
                "</tbody></table><p class=\"muted\">The first {} changed cells; <code>sluice compare</code> lists them all.</p>",
                s.sample.len()
            );
        }
        let _ = writeln!(o, "</div>");
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(
        o,
        "<section id=\"checks\"><h2>Checks recorded on the versions of the way</h2>"
    );
    if r.checks.is_empty() {
        let _ = writeln!(o, "<p>No checks were recorded on these versions.</p>");
    }
    for vc in &r.checks {
        let _ = writeln!(
            o,
            "<h3>{} <span class=\"hash muted\">{}</span></h3>",
            esc(&vc.version),
            esc(&vc.hash[..12.min(vc.hash.len())])
        );
        let _ = writeln!(
            o,
            "<table><thead><tr><th>rule</th><th>result</th><th class=\"n\">failing rows</th><th>by</th><th>at</th><th>gate</th></tr></thead><tbody>"
        );
        for c in &vc.checks {
            let _ = writeln!(
                o,
                "<tr><td><code>{}</code></td><td class=\"{}\">{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(&rule_text(&c.rule)),
                if c.passed { "pass" } else { "fail" },
                if c.passed { "passed" } else { "failed" },
                c.n_failing,
                esc(&c.agent),
                esc(&c.checked_at),
                if c.gate { "yes" } else { "no" }
            );
        }
        let _ = writeln!(o, "</tbody></table>");
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(
        o,
        "<section id=\"quality\"><h2>Data quality: raw inputs and {}</h2>",
        esc(&r.subject.version)
    );
    let _ = writeln!(
        o,
        "<p class=\"muted\">A → B: raw input, then {}; “-”: the column is not in that version. Bars: grey the raw input, colour {}, each as a share of its rows.</p>",
        esc(&r.subject.version),
        esc(&r.subject.version)
    );
    for q in &r.quality {
        quality_html(&mut o, q);
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(
        o,
        "<section id=\"hashes\"><h2>Hashes ({})</h2>",
        esc(&r.hashes.algorithm.to_uppercase())
    );
    let _ = writeln!(
        o,
        "<table><thead><tr><th>version</th><th>file taken in</th><th class=\"n\">bytes</th><th>hash</th></tr></thead><tbody>"
    );
    for h in &r.hashes.raw {
        let _ = writeln!(
            o,
            "<tr><td>{}</td><td>{}</td><td class=\"n\">{}</td><td class=\"hash\">{}</td></tr>",
            esc(&h.version),
            esc(h.file.as_deref().unwrap_or("-")),
            h.n_bytes,
            esc(&h.hash)
        );
    }
    let _ = writeln!(
        o,
        "<tr><td>{} (this report's subject)</td><td>-</td><td class=\"n\">{}</td><td class=\"hash\">{}</td></tr>",
        esc(&r.subject.version),
        r.subject.n_bytes,
        esc(&r.hashes.subject)
    );
    let _ = writeln!(
        o,
        "</tbody></table>\n<p class=\"muted\">Any BLAKE3 tool can check a file against these hashes; <code>sluice retrieve VERSION</code> gives a version's exact bytes.</p>\n</section>"
    );
    let _ = writeln!(
        o,
        "<footer><p class=\"caution\"><strong>Caution.</strong> {}</p></footer>\n</body>\n</html>",
        esc(&r.caution)
    );
    o
}
