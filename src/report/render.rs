//! The lineage report's three forms, pure functions of a [`Report`]: HTML (one self-contained
//! file: inline style sheet with a print style, page numbers and the report's own hash in the
//! printed footer, the lineage drawing inline in bands a page can hold, no scripts, fonts or
//! images from elsewhere), Markdown (the same content as text tables, without the drawing) and
//! JSON (the [`Report`] structure, `schema/report.schema.json`). Each writes
//! [`super::OWN_HASH_PLACEHOLDER`] where the report's own hash goes; [`super::seal`] fills it in.

use std::fmt::Write as _;

use super::{
    ColumnProfile, Figures, QualityComparison, Report, ReportStep, SignOffStatus, VersionRef,
};
use crate::model::StepKind;

/// The report as pretty JSON, ending in a newline.
pub fn json(report: &Report) -> String {
    let mut s = serde_json::to_string_pretty(report).unwrap_or_default();
    s.push('\n');
    s
}

// ---------------------------------------------------------------------------------------------
// What every form shows the same way

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

/// A recorded RFC 3339 UTC time as people read it, the zone said: `2026-07-01 09:30:00.125
/// UTC`. Anything else is shown as recorded.
pub fn utc(t: &str) -> String {
    match t.strip_suffix('Z') {
        Some(rest) if rest.len() >= 19 && rest.as_bytes().get(10) == Some(&b'T') => {
            format!("{} {} UTC", &rest[..10], &rest[11..])
        }
        _ => t.to_string(),
    }
}

/// White space and invisible characters as the marks of our own (DEVELOPERS.md, "Names of our
/// own"): a space `·`, a tab `→`, a no-break space `⍽`, a line break `↵`, a carriage return
/// `␍`; other control and invisible characters as `\u{..}`.
pub fn visible(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    for c in s.chars() {
        match c {
            ' ' => out.push('·'),
            '\t' => out.push('→'),
            '\u{a0}' => out.push('⍽'),
            '\n' => out.push('↵'),
            '\r' => out.push('␍'),
            c if c.is_control() || c.is_whitespace() || c == '\u{feff}' || c == '\u{200b}' => {
                let _ = write!(out, "\\u{{{:x}}}", c as u32);
            }
            c => out.push(c),
        }
    }
    out
}

const MARKS_NOTE: &str = "White space in values is shown by marks: · a space, → a tab, ⍽ a no-break space, ↵ a line break.";

fn versions(list: &[VersionRef]) -> String {
    list.iter()
        .map(|v| {
            let role = if v.role.is_empty() || v.role == "input" {
                String::new()
            } else {
                format!(" ({})", v.role)
            };
            format!(
                "{}{role}: {} rows × {} columns, blake3:{}",
                v.version,
                v.n_rows,
                v.n_cols,
                &v.hash[..16.min(v.hash.len())]
            )
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// A setting's value in words: lists joined with commas, yes and no, "none" for an empty list.
fn value_words(key: &str, v: &serde_json::Value) -> String {
    use serde_json::Value as V;
    match v {
        V::Null if key == "columns" => "every column".to_string(),
        V::Null => "none".to_string(),
        V::Bool(true) => "yes".to_string(),
        V::Bool(false) => "no".to_string(),
        V::Number(n) => n.to_string(),
        V::String(s) => format!("“{s}”"),
        V::Array(a) if a.is_empty() => "none".to_string(),
        V::Array(a) => a
            .iter()
            .map(|x| value_words("", x))
            .collect::<Vec<_>>()
            .join(if a.iter().any(|x| x.is_object()) {
                "; "
            } else {
                ", "
            }),
        V::Object(m) => m
            .iter()
            .map(|(k, x)| format!("{} {}", k.replace('_', " "), value_words(k, x)))
            .collect::<Vec<_>>()
            .join(", "),
    }
}

/// An operation's or intake's settings in words, one (name, value) pair per setting, in the
/// canonical (alphabetical) order; the store's `op` tag is left out (the operation is named).
fn settings(params: &serde_json::Value) -> Vec<(String, String)> {
    match params {
        serde_json::Value::Object(m) => m
            .iter()
            .filter(|(k, _)| k.as_str() != "op")
            .map(|(k, v)| (k.replace('_', " "), value_words(k, v)))
            .collect(),
        serde_json::Value::Null => Vec::new(),
        other => vec![("value".to_string(), value_words("", other))],
    }
}

/// What a step did, as (label, text) pairs every form shows the same way.
fn facts(s: &ReportStep) -> Vec<(&'static str, String)> {
    let when = if s.started_at == s.ended_at {
        utc(&s.started_at)
    } else {
        format!("{} to {}", utc(&s.started_at), utc(&s.ended_at))
    };
    let mut f = vec![
        ("who", s.agent.clone()),
        ("when", when),
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
                                format!("modified since that commit: {}", files.join(", "))
                            } else {
                                "unmodified".to_string()
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
                            .map(|m| format!(", modified {}", utc(m)))
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
            "inferred" => "inferred afterwards by a comparison".to_string(),
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

/// The range of a column in two versions, each end shown by `code` with its white space
/// visible (white space at either end of a value is part of what the data holds).
fn range_cell(
    raw: Option<&ColumnProfile>,
    subject: Option<&ColumnProfile>,
    code: impl Fn(&str) -> String,
) -> String {
    let one = |p: Option<&ColumnProfile>| -> String {
        match p.map(|p| (&p.min, &p.max)) {
            None => "-".to_string(),
            Some((Some(a), Some(b))) if a == b => code(&visible(a)),
            Some((Some(a), Some(b))) => format!("{} … {}", code(&visible(a)), code(&visible(b))),
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
    crate::checks::describe_stored(rule)
}

fn reason_steps(ids: &[i64]) -> String {
    let list: Vec<String> = ids.iter().map(|i| i.to_string()).collect();
    format!(
        "step{} {}",
        if ids.len() == 1 { "" } else { "s" },
        list.join(", ")
    )
}

/// The summary's lines, as (label, text).
fn summary_lines(r: &Report) -> Vec<(&'static str, String)> {
    let s = &r.summary;
    let data: Vec<String> = s
        .raw
        .iter()
        .filter(|x| x.role == "data")
        .map(|x| format!("{} {}", x.version, x.n_rows))
        .collect();
    let tables: Vec<String> = s
        .raw
        .iter()
        .filter(|x| x.role == "table")
        .map(|x| format!("{} {}", x.version, x.n_rows))
        .collect();
    let mut raw = format!("{} ({})", s.raw_rows_in, data.join(", "));
    if !tables.is_empty() {
        let _ = write!(raw, "; reference tables: {}", tables.join(", "));
    }
    let dropped = if s.dropped.is_empty() {
        "none".to_string()
    } else {
        format!(
            "{}: {}",
            s.rows_dropped,
            s.dropped
                .iter()
                .map(|d| format!("{} {}, {}", d.rows, d.reason, reason_steps(&d.steps)))
                .collect::<Vec<_>>()
                .join("; ")
        )
    };
    let checks = match (s.checks_passed, s.checks_failed) {
        (0, 0) => "none recorded".to_string(),
        (p, 0) => format!("{p} passed, none failed"),
        (p, f) => format!("{p} passed, {f} failed"),
    };
    let reproduced = match s.reproduction.as_str() {
        "reproduced" => {
            "yes: computed again from the raw inputs, every step gave its recorded bytes"
        }
        "not_reproduced" => "no: a step gave other bytes when computed again (see Verification)",
        "partly" => {
            "in part: the built-in steps gave their recorded bytes; outside work was not run again"
        }
        _ => "not checked (the report was made without --reproduce)",
    };
    let signed = if r.signoffs.is_empty() {
        "no sign-off recorded".to_string()
    } else {
        let ok = r
            .signoffs
            .iter()
            .filter(|x| x.status == SignOffStatus::Verified)
            .count();
        format!(
            "{} sign-off{}, {ok} with a verified signature",
            r.signoffs.len(),
            if r.signoffs.len() == 1 { "" } else { "s" }
        )
    };
    vec![
        ("raw rows in", raw),
        (
            "rows out",
            format!("{} ({})", s.rows_out, r.subject.version),
        ),
        ("rows dropped", dropped),
        ("cells changed", s.cells_changed.to_string()),
        ("checks", checks),
        ("reproduced", reproduced.to_string()),
        ("signed", signed),
        (
            "verification",
            verdict_words(&r.verification.verdict).1.to_string(),
        ),
    ]
}

/// The verification's look and words: (class, label, short words).
fn verdict_words(verdict: &str) -> (&'static str, &'static str) {
    match verdict {
        "passed" => ("Verified", "passed: store intact and the version computed again to its bytes"),
        "failed" => ("Failed", "FAILED: problems found (listed under Verification)"),
        _ => ("Not fully checked", "not fully checked: the store is intact, but the version is not shown to follow from its raw data"),
    }
}

fn verdict_class(verdict: &str) -> &'static str {
    match verdict {
        "passed" => "passed",
        "failed" => "failed",
        _ => "unchecked",
    }
}

/// The parts of the verification, each with its own verdict: (what, verdict, words).
fn verification_parts(r: &Report) -> Vec<(&'static str, &'static str, String)> {
    let v = &r.verification;
    let integrity = if v.intact {
        (
            "passed",
            format!(
                "{} objects re-hashed, {} versions and {} audit entries checked; nothing wrong",
                v.objects_checked, v.versions_checked, v.audit_entries_checked
            ),
        )
    } else {
        (
            "failed",
            format!("{} problems found (listed below)", v.problems.len()),
        )
    };
    let reproduction = match &v.replay {
        None => ("not checked", "not asked for (make the report with --reproduce)".to_string()),
        Some(x) if x.failed.is_some() => (
            "failed",
            format!("did not give the recorded bytes: {}", x.failed.as_deref().unwrap_or("")),
        ),
        Some(x) if x.reproduced => (
            "passed",
            format!("{} built-in steps gave their recorded bytes", x.steps_same),
        ),
        Some(x) => (
            "not checked",
            format!(
                "in part: {} built-in steps gave their recorded bytes; {} steps of outside work were not run again",
                x.steps_same, x.steps_not_rerun
            ),
        ),
    };
    let signatures = if r.signoffs.is_empty() {
        ("not checked", "no sign-off recorded".to_string())
    } else if r.signoffs.iter().any(|x| {
        matches!(
            x.status,
            SignOffStatus::BadSignature
                | SignOffStatus::MissingSignature
                | SignOffStatus::UnknownKey
        )
    }) {
        (
            "failed",
            "a signature does not verify (see Sign-off)".to_string(),
        )
    } else if r
        .signoffs
        .iter()
        .all(|x| x.status == SignOffStatus::Verified)
    {
        ("passed", "every signature verified".to_string())
    } else {
        (
            "not checked",
            "some signatures were not checked".to_string(),
        )
    };
    vec![
        ("store integrity", integrity.0, integrity.1),
        (
            "computed again from raw data",
            reproduction.0,
            reproduction.1,
        ),
        ("signatures", signatures.0, signatures.1),
    ]
}

/// The sections, as (anchor, title), in order.
fn contents(r: &Report) -> Vec<(&'static str, String)> {
    vec![
        ("verification", "Verification".to_string()),
        ("figures", figures_title(&r.figures, &r.subject.version)),
        ("lineage", "Lineage".to_string()),
        (
            "steps",
            format!(
                "Steps from the raw inputs to {} ({} steps)",
                r.subject.version,
                r.steps.len()
            ),
        ),
        ("excluded", "Rows excluded".to_string()),
        ("checks", "Checks".to_string()),
        (
            "quality",
            "Data quality: each raw input and what it became".to_string(),
        ),
        ("hashes", "Hashes".to_string()),
        ("signoff", "Sign-off".to_string()),
    ]
}

fn figures_title(f: &Figures, version: &str) -> String {
    if f.summary {
        format!("The published figures: {version}")
    } else {
        format!("The data: {version}")
    }
}

fn figures_note(f: &Figures) -> String {
    if f.rows.len() as u64 >= f.n_rows {
        if f.summary {
            format!("All {} rows of the summary, as stored.", f.n_rows)
        } else {
            format!("All {} rows, as stored.", f.n_rows)
        }
    } else {
        format!(
            "The first {} of {} rows, as stored; `sluice retrieve` gives them all.",
            f.rows.len(),
            f.n_rows
        )
    }
}

/// "Step 29 is" or "Steps 25 to 26 are", for a note on step numbers not on the way.
fn steps_between(first: i64, last: i64) -> String {
    if first == last {
        format!("Step {first} is")
    } else {
        format!("Steps {first} to {last} are")
    }
}

fn other_steps_text(r: &Report) -> Vec<String> {
    r.other_steps
        .iter()
        .map(|o| {
            let which = steps_between(o.first, o.last);
            if o.made.is_empty() {
                format!("{which} not part of this version's history: they made no version on its way.")
            } else {
                format!(
                    "{which} not part of this version's history: {} {}, which {} does not come from.",
                    if o.first == o.last { "it made" } else { "they made" },
                    o.made.join(", "),
                    r.subject.version
                )
            }
        })
        .collect()
}

/// The cells that name an excluded row, values with their white space visible.
fn key_words(key: &[(String, String)]) -> String {
    key.iter()
        .map(|(c, v)| format!("{c} = {}", visible(v)))
        .collect::<Vec<_>>()
        .join(", ")
}

fn more_rows(n: u64) -> String {
    format!(
        "And {n} more row{} dropped by this step, not listed here (the count above is complete).",
        if n == 1 { "" } else { "s" }
    )
}

fn own_hash_words() -> &'static str {
    "This report's own hash is the BLAKE3 of this file with the hash itself written as 64 zeros; to check it, replace the hash wherever it appears in the file by 64 zeros and hash the result with any BLAKE3 tool. The audit entry that recorded the report holds it too, with the hash of the file as written."
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
        .replace('`', "\\`")
        .replace(['\r', '\n'], " ")
}

fn md_code(s: &str) -> String {
    let fence = if s.contains('`') { "``" } else { "`" };
    format!("{fence}{}{fence}", s.replace('|', "\\|").replace('\n', " "))
}

fn md_value(v: &Option<String>) -> String {
    match v {
        Some(s) if s.is_empty() => "(empty)".to_string(),
        Some(s) => md_code(&visible(s)),
        None => "(none)".to_string(),
    }
}

/// The report as Markdown.
pub fn markdown(r: &Report) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "# Lineage report: {}\n", md(&r.subject.version));
    let _ = writeln!(o, "| | |\n| --- | --- |");
    let _ = writeln!(o, "| dataset | {} |", md(&r.subject.dataset));
    let _ = writeln!(
        o,
        "| version | {}{} |",
        md(&r.subject.version),
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
    let _ = writeln!(o, "| recorded | {} |", utc(&r.subject.recorded_at));
    let _ = writeln!(
        o,
        "| generated | {} by {} with {} |\n",
        utc(&r.generated.at),
        md(&r.generated.by),
        r.generated.tool_version
    );
    let _ = writeln!(
        o,
        "Times are Coordinated Universal Time (UTC, offset +00:00).\n"
    );

    let _ = writeln!(o, "## Summary\n\n| | |\n| --- | --- |");
    for (k, v) in summary_lines(r) {
        let _ = writeln!(o, "| {k} | {} |", md(&v));
    }
    o.push('\n');
    let _ = writeln!(o, "## Contents\n");
    for (i, (_, title)) in contents(r).iter().enumerate() {
        let _ = writeln!(o, "{}. {}", i + 1, md(title));
    }
    o.push('\n');
    let _ = writeln!(o, "**[Caution]** {}\n", r.caution);

    let _ = writeln!(o, "## Verification\n");
    let (label, _) = verdict_words(&r.verification.verdict);
    let _ = writeln!(o, "**[{label}]**\n");
    for (what, verdict, words) in verification_parts(r) {
        let _ = writeln!(o, "- {what}: **{verdict}**; {}", md(&words));
    }
    let _ = writeln!(o, "\n{}\n", r.verification.statement);
    let _ = writeln!(
        o,
        "Audit chain head when generated: entry {}, `{}`.\n",
        r.verification.audit_head_seq, r.verification.audit_head_hash
    );
    if !r.verification.problems.is_empty() {
        let _ = writeln!(o, "Problems found:\n");
        for p in &r.verification.problems {
            let _ = writeln!(o, "- {}", md(p));
        }
        o.push('\n');
    }

    if !r.erasures.is_empty() {
        let _ = writeln!(o, "## Erasures\n");
        for e in &r.erasures {
            let _ = writeln!(
                o,
                "**[Erased]** erasure order {} ({}), carried out {} by {}: cells were emptied in the versions below; their values are not in this report or in the store. Every other cell of them is proved unchanged by the commitment recorded before the erasure (`sluice verify`).\n\n| version | cells erased | summary cells kept as published, no longer recomputable |\n| --- | ---: | ---: |",
                e.order,
                md(&e.request),
                utc(&e.ordered_at),
                md(&e.by)
            );
            for (v, n, k) in &e.versions {
                let _ = writeln!(o, "| {} | {n} | {k} |", md(v));
            }
            o.push('\n');
        }
    }

    let _ = writeln!(
        o,
        "## {}\n",
        md(&figures_title(&r.figures, &r.subject.version))
    );
    figures_md(&mut o, &r.figures);

    let _ = writeln!(o, "## Lineage\n");
    let _ = writeln!(
        o,
        "The drawing is in the HTML form of this report (`sluice lineage {} --format svg` draws it too); the steps below list every version read and made.\n",
        r.subject.version
    );

    let _ = writeln!(
        o,
        "## Steps from the raw inputs to {} ({} steps)\n",
        md(&r.subject.version),
        r.steps.len()
    );
    for line in other_steps_text(r) {
        let _ = writeln!(o, "{}\n", md(&line));
    }
    let _ = writeln!(o, "{MARKS_NOTE}\n");
    let mut previous: Option<i64> = None;
    for s in &r.steps {
        if let Some(p) = previous {
            if s.id > p + 1 {
                let _ = writeln!(
                    o,
                    "*{} not on this version's way (see above).*\n",
                    steps_between(p + 1, s.id - 1)
                );
            }
        }
        previous = Some(s.id);
        let _ = writeln!(o, "### {}\n", step_title(s));
        let _ = writeln!(o, "| | |\n| --- | --- |");
        for (k, v) in facts(s) {
            if k == "command" {
                let _ = writeln!(o, "| {k} | {} |", md_code(&v));
            } else {
                let _ = writeln!(o, "| {k} | {} |", md(&v));
            }
        }
        let set = settings(&s.params);
        if !set.is_empty() {
            let _ = writeln!(
                o,
                "| settings | {} |",
                set.iter()
                    .map(|(k, v)| format!("{}: {}", md(k), md(v)))
                    .collect::<Vec<_>>()
                    .join("; ")
            );
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
                "Rows dropped: {} in all (listed under Rows excluded).\n\n| reason | rows |\n| --- | ---: |",
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
                    md(&c.version),
                    c.row,
                    md(&c.column),
                    md_value(&c.old),
                    md_value(&c.new)
                );
            }
            o.push('\n');
        }
    }

    let _ = writeln!(o, "## Rows excluded\n");
    let dropping: Vec<&ReportStep> = r.steps.iter().filter(|s| s.rows_dropped > 0).collect();
    if dropping.is_empty() {
        let _ = writeln!(o, "No step on the way dropped a row.\n");
    }
    for s in dropping {
        let _ = writeln!(
            o,
            "### Step {} ({} rows dropped)\n\n| version | row | named by | reason |\n| --- | ---: | --- | --- |",
            s.id, s.rows_dropped
        );
        for x in &s.excluded {
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} |",
                md(&x.version),
                x.row,
                md(&key_words(&x.key)),
                md(&x.reason)
            );
        }
        let rest = s.rows_dropped.saturating_sub(s.excluded.len() as u64);
        if rest > 0 {
            let _ = writeln!(o, "\n{}", more_rows(rest));
        }
        o.push('\n');
    }

    let _ = writeln!(o, "## Checks\n");
    if r.checks.is_empty() {
        let _ = writeln!(o, "No checks were recorded on the versions of the way.\n");
    }
    for vc in &r.checks {
        let _ = writeln!(
            o,
            "### {} (`{}`)\n\n| rule | result | failing rows | by | at | hold point |\n| --- | --- | ---: | --- | --- | --- |",
            md(&vc.version),
            &vc.hash[..16.min(vc.hash.len())]
        );
        for c in &vc.checks {
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} | {} | {} |",
                md(&rule_text(&c.rule)),
                if c.passed { "passed" } else { "**failed**" },
                c.n_failing,
                md(&c.agent),
                utc(&c.checked_at),
                if c.hold_point { "yes" } else { "no" }
            );
        }
        o.push('\n');
    }

    let _ = writeln!(o, "## Data quality: each raw input and what it became\n");
    for q in &r.quality {
        let _ = writeln!(o, "### {}\n", md(&quality_title(q)));
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
    let _ = writeln!(o, "{}\n", QUALITY_NOTE);

    let _ = writeln!(o, "## Hashes ({})\n", r.hashes.algorithm.to_uppercase());
    let _ = writeln!(
        o,
        "| version | file taken in | bytes | hash |\n| --- | --- | ---: | --- |"
    );
    for h in &r.hashes.raw {
        let _ = writeln!(
            o,
            "| {} | {} | {} | `{}` |",
            md(&h.version),
            md(h.file.as_deref().unwrap_or("-")),
            h.n_bytes,
            h.hash
        );
    }
    let _ = writeln!(
        o,
        "| {} (this report's subject) | - | {} | `{}` |\n",
        md(&r.subject.version),
        r.subject.n_bytes,
        r.hashes.subject
    );
    let _ = writeln!(
        o,
        "Any BLAKE3 tool can check a file against these hashes; `sluice retrieve VERSION` gives a version's exact bytes.\n"
    );

    let _ = writeln!(o, "## Sign-off\n");
    if r.signoffs.is_empty() {
        let _ = writeln!(
            o,
            "No sign-off recorded: nobody has signed this version or report in this store.\n"
        );
    } else {
        let _ = writeln!(
            o,
            "| meaning | name | time | key | signature |\n| --- | --- | --- | --- | --- |"
        );
        for x in &r.signoffs {
            let _ = writeln!(
                o,
                "| {} | {} | {} | `{}` | {} |",
                md(&x.meaning),
                md(&x.name),
                utc(&x.at),
                x.fingerprint,
                super::status_words(x.status)
            );
        }
        o.push('\n');
    }
    let _ = writeln!(
        o,
        "---\n\nOwn hash (BLAKE3): `{}`. {}",
        r.own_hash,
        own_hash_words()
    );
    o
}

fn figures_md(o: &mut String, f: &Figures) {
    let _ = writeln!(o, "{}\n", figures_note(f));
    let _ = writeln!(
        o,
        "| row | {} |\n| ---: |{}",
        f.header
            .iter()
            .map(|h| md(h))
            .collect::<Vec<_>>()
            .join(" | "),
        " --- |".repeat(f.header.len())
    );
    for (i, row) in f.rows.iter().enumerate() {
        let _ = writeln!(
            o,
            "| {} | {} |",
            i + 1,
            row.iter().map(|c| md(c)).collect::<Vec<_>>().join(" | ")
        );
    }
    o.push('\n');
}

fn quality_title(q: &QualityComparison) -> String {
    if q.raw.version == q.subject.version {
        format!(
            "{} ({} rows), unchanged on the way",
            q.raw.version, q.raw.n_rows
        )
    } else {
        format!(
            "{} ({} rows) became {} ({} rows)",
            q.raw.version, q.raw.n_rows, q.subject.version, q.subject.n_rows
        )
    }
}

const QUALITY_NOTE: &str = "Each raw input is compared with the last version of its own dataset on the way (what it became before it was combined with other data or summarised), column by column, renamed columns followed. A → B: the raw input, then what it became; -: the column is not in that version.";

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

/// Text with `backticks` shown as code.
fn esc_code_marks(s: &str) -> String {
    esc(s)
        .split('`')
        .enumerate()
        .map(|(i, part)| {
            if i % 2 == 1 {
                format!("<code>{part}</code>")
            } else {
                part.to_string()
            }
        })
        .collect()
}

const STYLE: &str = r#"
:root {
  --ink: #23272b; --muted: #5f6368; --rule: #cfd0c9; --band: #f1f0ea; --paper: #ffffff;
  --slate: #34576b; --moss: #3d6b3a; --brick: #9b3b2f; --umber: #7a5a2b; --ash: #6b6b66;
}
* { box-sizing: border-box; }
body { font: 14px/1.5 Georgia, "Iowan Old Style", "Palatino Linotype", Palatino, serif; color: var(--ink); background: var(--paper); margin: 0 auto; max-width: 60rem; padding: 1.5rem; }
h1, h2, h3, th, .stamp-label, table.facts th, nav, .verdict { font-family: "Gill Sans", "Gill Sans MT", Optima, Candara, "Trebuchet MS", sans-serif; }
h1 { font-size: 1.6rem; margin: 0 0 .5rem; font-weight: 600; }
h2 { font-size: 1.2rem; margin: 2.2rem 0 .6rem; padding-bottom: .15rem; border-bottom: 1px solid var(--slate); color: var(--slate); font-weight: 600; letter-spacing: .01em; }
h3 { font-size: 1.02rem; margin: 1.4rem 0 .4rem; font-weight: 600; }
table { border-collapse: collapse; width: 100%; margin: .4rem 0 .8rem; }
th, td { text-align: left; vertical-align: top; padding: .25rem .5rem; border-bottom: 1px solid var(--rule); }
th { background: var(--band); font-weight: 600; font-size: .92em; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
table.facts th { width: 9.5rem; background: none; color: var(--muted); font-weight: 500; }
table.figures td { font-variant-numeric: tabular-nums; }
code { white-space: pre-wrap; overflow-wrap: break-word; }
code, .hash { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, "DejaVu Sans Mono", monospace; font-size: .84em; }
.hash { overflow-wrap: anywhere; }
dl.settings { margin: 0; display: grid; grid-template-columns: max-content 1fr; gap: 0 .8rem; }
dl.settings dt { color: var(--muted); }
dl.settings dd { margin: 0; }
.stamp { border: 2px solid var(--umber); border-radius: 3px; outline: 1px solid var(--umber); outline-offset: 2px; padding: .55rem .85rem; margin: 1.1rem 3px; color: var(--ink); }
.stamp p { margin: .3rem 0 0; }
.stamp p:first-of-type { display: inline; }
.stamp-label { display: inline-block; margin-right: .6rem; padding: 0 .4rem; border: 1px solid currentColor; font-size: .74rem; font-weight: 600; letter-spacing: .12em; text-transform: uppercase; color: var(--umber); vertical-align: .1em; }
.stamp.passed { border-color: var(--moss); outline-color: var(--moss); }
.stamp.passed .stamp-label { color: var(--moss); }
.stamp.failed { border: 4px double var(--brick); outline: 2px solid var(--brick); background: #fbf1ef; }
.stamp.failed .stamp-label { color: #fff; background: var(--brick); border-color: var(--brick); }
.stamp.unchecked { border: 2px dashed var(--ash); outline: none; }
.stamp.unchecked .stamp-label { color: var(--ash); }
ul.parts { list-style: none; padding: 0; margin: .5rem 0 .2rem; }
ul.parts li { margin: .15rem 0; }
.verdict { display: inline-block; min-width: 8.8rem; font-size: .8rem; font-weight: 600; letter-spacing: .06em; text-transform: uppercase; }
.verdict.passed { color: var(--moss); }
.verdict.passed::before { content: "✓ "; }
.verdict.failed { color: var(--brick); }
.verdict.failed::before { content: "✗ "; }
.verdict.unchecked { color: var(--ash); }
.verdict.unchecked::before { content: "○ "; }
.muted { color: var(--muted); }
.note { color: var(--muted); font-style: italic; }
.step { border-top: 1px solid var(--rule); padding: .2rem 0 .6rem; margin: .8rem 0; }
nav ol { columns: 2; margin: .3rem 0 0; }
nav a { color: var(--slate); }
.lineage { border: 1px solid var(--rule); padding: .5rem; overflow-x: auto; }
.lineage svg { display: block; margin: 0 auto; max-width: 100%; height: auto; }
.bar { vertical-align: middle; }
.pass { color: var(--moss); font-weight: 600; }
.fail { color: var(--brick); font-weight: 600; }
footer .own { font-size: .8em; color: var(--muted); }
@media print {
  @page {
    margin: 14mm 12mm 16mm;
    @bottom-left { content: "Lineage report TITLE · own hash blake3:OWNHASH"; font: 7pt "DejaVu Sans Mono", monospace; color: #5f6368; }
    @bottom-right { content: "page " counter(page) " of " counter(pages); font: 8pt sans-serif; color: #5f6368; }
  }
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  nav ol { columns: 2; }
  #lineage { break-before: page; }
  .lineage { border: none; padding: 0; overflow: visible; }
  .lineage svg { break-inside: avoid; page-break-inside: avoid; }
  h2, h3 { break-after: avoid; page-break-after: avoid; }
  tr, .stamp, dl.settings { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
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
            "<rect x=\"0\" y=\"{y}\" width=\"{w:.0}\" height=\"5\" fill=\"#ebeae4\"/>"
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
                if i == 0 { "#a3a29a" } else { colour }
            );
        }
    }
    o.push_str("</svg>");
    o
}

fn quality_html(o: &mut String, q: &QualityComparison) {
    let _ = writeln!(o, "<h3>{}</h3>", esc(&quality_title(q)));
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
            "#9b3b2f",
        );
        let distinct_bars = bars(
            &[
                (c.raw.as_ref().map(|p| p.n_distinct), q.raw.n_rows),
                (c.subject.as_ref().map(|p| p.n_distinct), q.subject.n_rows),
            ],
            "#34576b",
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

/// The heights (in the drawing's units) of the bands the drawing is cut into: each at most
/// `first` (the first, under the section's heading) or `rest` high, cut only where no node is.
fn bands(d: &crate::graph::Drawing, first: f64, rest: f64) -> Vec<(f64, f64)> {
    let mut out = Vec::new();
    let mut top = 0.0;
    while top < d.height - 0.5 {
        let limit = if out.is_empty() { first } else { rest };
        let bottom = if d.height - top <= limit {
            d.height
        } else {
            // The lowest cut that keeps the band within its limit; else the first cut below
            // (a band taller than a page rather than a node cut in two).
            d.cuts
                .iter()
                .copied()
                .rev()
                .find(|&c| c > top + 1.0 && c <= top + limit)
                .or_else(|| d.cuts.iter().copied().find(|&c| c > top + 1.0))
                .unwrap_or(d.height)
        };
        out.push((top, bottom - top));
        top = bottom;
    }
    out
}

/// The most a band of the drawing may be high, in its units, so that it fits a printed page
/// (A4 or Letter, less the margins, at the drawing's printed scale, which is never above 1).
const BAND_FIRST: f64 = 780.0;
const BAND_REST: f64 = 880.0;

fn lineage_html(o: &mut String, r: &Report) {
    let d = &r.lineage;
    let _ = writeln!(o, "<section id=\"lineage\"><h2>Lineage</h2>");
    let _ = writeln!(
        o,
        "<p class=\"muted\">What {} comes from: each arrow leads from a version to the step that read it, or from a step to the version it made; an arrow that skips rows runs down the left margin. Hover over a shape for its details. In print the drawing is cut between rows of shapes to fit the pages.</p>",
        esc(&r.subject.version)
    );
    let _ = writeln!(o, "<div class=\"lineage\">");
    for (i, (top, h)) in bands(d, BAND_FIRST, BAND_REST).iter().enumerate() {
        if i == 0 {
            o.push_str(&crate::graph::svg_open(
                d.width,
                *top,
                d.width,
                *h,
                " class=\"band\" role=\"img\" aria-label=\"lineage drawing\"",
            ));
            let _ = write!(o, "<g id=\"lineage-drawing\">\n{}</g></svg>\n", d.body);
        } else {
            o.push_str(&crate::graph::svg_open(
                d.width,
                *top,
                d.width,
                *h,
                " class=\"band\" aria-hidden=\"true\"",
            ));
            o.push_str("<use href=\"#lineage-drawing\"/></svg>\n");
        }
    }
    let _ = writeln!(o, "</div>\n</section>");
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
    // The print footer names the report and its own hash (CSS string: no quotes or
    // backslashes in either).
    let title = r.subject.version.replace(['"', '\\'], "");
    let style = STYLE
        .replace("TITLE", &title)
        .replace("OWNHASH", &r.own_hash);
    let _ = writeln!(
        o,
        "<title>Lineage report: {}</title>\n<style>{style}</style>\n</head>\n<body>",
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
        ("recorded", esc(&utc(&r.subject.recorded_at))),
        (
            "generated",
            format!(
                "{} by {} with {}",
                esc(&utc(&r.generated.at)),
                esc(&r.generated.by),
                esc(&r.generated.tool_version)
            ),
        ),
    ];
    for (k, v) in rows {
        let _ = writeln!(o, "<tr><th>{k}</th><td>{v}</td></tr>");
    }
    let _ = writeln!(
        o,
        "</tbody></table>\n<p class=\"muted\">Times are Coordinated Universal Time (UTC, offset +00:00).</p></header>"
    );

    let _ = writeln!(
        o,
        "<section id=\"summary\"><h2>Summary</h2>\n<table class=\"facts\"><tbody>"
    );
    for (k, v) in summary_lines(r) {
        let shown = if k == "verification" {
            format!(
                "<span class=\"verdict {}\">{}</span> {}",
                verdict_class(&r.verification.verdict),
                esc(verdict_words(&r.verification.verdict).0),
                esc(v.split_once(": ").map_or(v.as_str(), |x| x.1))
            )
        } else {
            esc(&v)
        };
        let _ = writeln!(o, "<tr><th>{k}</th><td>{shown}</td></tr>");
    }
    let _ = writeln!(o, "</tbody></table>");
    let _ = writeln!(o, "<nav><h3>Contents</h3><ol>");
    for (id, title) in contents(r) {
        let _ = writeln!(o, "<li><a href=\"#{id}\">{}</a></li>", esc(&title));
    }
    let _ = writeln!(o, "</ol></nav></section>");
    let _ = writeln!(
        o,
        "<div class=\"stamp caution\"><span class=\"stamp-label\">Caution</span><p>{}</p></div>",
        esc(&r.caution)
    );

    let verdict = &r.verification.verdict;
    let _ = writeln!(o, "<section id=\"verification\"><h2>Verification</h2>");
    let _ = writeln!(
        o,
        "<div class=\"stamp {}\"><span class=\"stamp-label\">{}</span><p>{}</p>",
        verdict_class(verdict),
        verdict_words(verdict).0,
        esc(verdict_words(verdict).1)
    );
    let _ = writeln!(o, "<ul class=\"parts\">");
    for (what, v, words) in verification_parts(r) {
        let class = match v {
            "passed" => "passed",
            "failed" => "failed",
            _ => "unchecked",
        };
        let _ = writeln!(
            o,
            "<li><span class=\"verdict {class}\">{v}</span> {what}: {}</li>",
            esc(&words)
        );
    }
    let _ = writeln!(o, "</ul>");
    let _ = writeln!(o, "<p>{}</p></div>", esc(&r.verification.statement));
    let _ = writeln!(
        o,
        "<p class=\"muted\">Audit chain head when generated: entry {}, <span class=\"hash\">{}</span>.</p>",
        r.verification.audit_head_seq,
        esc(&r.verification.audit_head_hash)
    );
    if !r.verification.problems.is_empty() {
        let _ = writeln!(o, "<h3>Problems found</h3><ul class=\"problems\">");
        for p in &r.verification.problems {
            let _ = writeln!(o, "<li>{}</li>", esc(p));
        }
        let _ = writeln!(o, "</ul>");
    }
    let _ = writeln!(o, "</section>");

    if !r.erasures.is_empty() {
        let _ = writeln!(o, "<section id=\"erasures\"><h2>Erasures</h2>");
        for e in &r.erasures {
            let _ = writeln!(
                o,
                "<div class=\"stamp caution\"><span class=\"stamp-label\">Erased</span><p>Erasure order {} ({}), carried out {} by {}: cells were emptied in the versions below; their values are not in this report or in the store. Every other cell of them is proved unchanged by the commitment recorded before the erasure.</p></div>",
                e.order,
                esc(&e.request),
                esc(&utc(&e.ordered_at)),
                esc(&e.by)
            );
            let _ = writeln!(o, "<table><thead><tr><th>version</th><th>cells erased</th><th>summary cells kept as published, no longer recomputable</th></tr></thead><tbody>");
            for (v, n, k) in &e.versions {
                let _ = writeln!(o, "<tr><td>{}</td><td>{n}</td><td>{k}</td></tr>", esc(v));
            }
            let _ = writeln!(o, "</tbody></table>");
        }
        let _ = writeln!(o, "</section>");
    }

    let f = &r.figures;
    let _ = writeln!(
        o,
        "<section id=\"figures\"><h2>{}</h2>\n<p class=\"muted\">{}</p>",
        esc(&figures_title(f, &r.subject.version)),
        esc_code_marks(&figures_note(f))
    );
    let _ = write!(
        o,
        "<table class=\"figures\"><thead><tr><th class=\"n\">row</th>"
    );
    let numeric = |c: &str| !c.is_empty() && c.parse::<f64>().is_ok();
    for (i, h) in f.header.iter().enumerate() {
        let all_numbers =
            !f.rows.is_empty() && f.rows.iter().all(|r| r.get(i).is_some_and(|c| numeric(c)));
        let _ = write!(
            o,
            "<th{}>{}</th>",
            if all_numbers { " class=\"n\"" } else { "" },
            esc(h)
        );
    }
    let _ = writeln!(o, "</tr></thead><tbody>");
    for (i, row) in f.rows.iter().enumerate() {
        let _ = write!(o, "<tr><td class=\"n\">{}</td>", i + 1);
        for c in row {
            let _ = write!(
                o,
                "<td{}>{}</td>",
                if numeric(c) { " class=\"n\"" } else { "" },
                esc(c)
            );
        }
        let _ = writeln!(o, "</tr>");
    }
    let _ = writeln!(o, "</tbody></table></section>");

    lineage_html(&mut o, r);

    let _ = writeln!(
        o,
        "<section id=\"steps\"><h2>Steps from the raw inputs to {} ({} steps)</h2>",
        esc(&r.subject.version),
        r.steps.len()
    );
    for line in other_steps_text(r) {
        let _ = writeln!(o, "<p class=\"note\">{}</p>", esc(&line));
    }
    let _ = writeln!(o, "<p class=\"muted\">{}</p>", esc(MARKS_NOTE));
    let mut previous: Option<i64> = None;
    for s in &r.steps {
        if let Some(p) = previous {
            if s.id > p + 1 {
                let _ = writeln!(
                    o,
                    "<p class=\"note\">{} not on this version's way (see above).</p>",
                    steps_between(p + 1, s.id - 1)
                );
            }
        }
        previous = Some(s.id);
        let _ = writeln!(
            o,
            "<div class=\"step\" id=\"step-{}\"><h3>{}</h3>\n<table class=\"facts\"><tbody>",
            s.id,
            esc_code_marks(&step_title(s))
        );
        for (k, v) in facts(s) {
            let shown = if k == "command" {
                format!("<code>{}</code>", esc(&v))
            } else {
                esc(&v)
            };
            let _ = writeln!(o, "<tr><th>{k}</th><td>{shown}</td></tr>");
        }
        let set = settings(&s.params);
        if !set.is_empty() {
            let _ = write!(o, "<tr><th>settings</th><td><dl class=\"settings\">");
            for (k, v) in set {
                let _ = write!(o, "<dt>{}</dt><dd>{}</dd>", esc(&k), esc(&v));
            }
            let _ = writeln!(o, "</dl></td></tr>");
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
                "<table><thead><tr><th>reason a row was dropped (the rows: <a href=\"#excluded-{}\">Rows excluded</a>)</th><th class=\"n\">rows ({} in all)</th></tr></thead><tbody>",
                s.id, s.rows_dropped
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
                Some(s) if s.is_empty() => "<span class=\"muted\">(empty)</span>".to_string(),
                Some(s) => format!("<code>{}</code>", esc(&visible(s))),
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

    let _ = writeln!(o, "<section id=\"excluded\"><h2>Rows excluded</h2>");
    let dropping: Vec<&ReportStep> = r.steps.iter().filter(|s| s.rows_dropped > 0).collect();
    if dropping.is_empty() {
        let _ = writeln!(o, "<p>No step on the way dropped a row.</p>");
    } else {
        let _ = writeln!(
            o,
            "<p class=\"muted\">Each row a step dropped, named by its dataset's declared key (else its first column) and its 1-based row in the version it was dropped from.</p>"
        );
    }
    for s in dropping {
        let _ = writeln!(
            o,
            "<h3 id=\"excluded-{}\">Step {} ({} rows dropped)</h3>",
            s.id, s.id, s.rows_dropped
        );
        let _ = writeln!(
            o,
            "<table><thead><tr><th>version</th><th class=\"n\">row</th><th>named by</th><th>reason</th></tr></thead><tbody>"
        );
        for x in &s.excluded {
            let _ = writeln!(
                o,
                "<tr><td>{}</td><td class=\"n\">{}</td><td><code>{}</code></td><td>{}</td></tr>",
                esc(&x.version),
                x.row,
                esc(&key_words(&x.key)),
                esc(&x.reason)
            );
        }
        let _ = writeln!(o, "</tbody></table>");
        let rest = s.rows_dropped.saturating_sub(s.excluded.len() as u64);
        if rest > 0 {
            let _ = writeln!(o, "<p class=\"muted\">{}</p>", more_rows(rest));
        }
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(o, "<section id=\"checks\"><h2>Checks</h2>");
    if r.checks.is_empty() {
        let _ = writeln!(
            o,
            "<p>No checks were recorded on the versions of the way.</p>"
        );
    }
    for vc in &r.checks {
        let _ = writeln!(
            o,
            "<h3>{} <span class=\"hash muted\">{}</span></h3>",
            esc(&vc.version),
            esc(&vc.hash[..16.min(vc.hash.len())])
        );
        let _ = writeln!(
            o,
            "<table><thead><tr><th>rule</th><th>result</th><th class=\"n\">failing rows</th><th>by</th><th>at</th><th>hold point</th></tr></thead><tbody>"
        );
        for c in &vc.checks {
            let _ = writeln!(
                o,
                "<tr><td>{}</td><td class=\"{}\">{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(&rule_text(&c.rule)),
                if c.passed { "pass" } else { "fail" },
                if c.passed { "passed" } else { "failed" },
                c.n_failing,
                esc(&c.agent),
                esc(&utc(&c.checked_at)),
                if c.hold_point { "yes" } else { "no" }
            );
        }
        let _ = writeln!(o, "</tbody></table>");
    }
    let _ = writeln!(o, "</section>");

    let _ = writeln!(
        o,
        "<section id=\"quality\"><h2>Data quality: each raw input and what it became</h2>"
    );
    let _ = writeln!(
        o,
        "<p class=\"muted\">{} Bars: the upper (grey) the raw input, the lower what it became, each as a share of its rows.</p>",
        esc(QUALITY_NOTE)
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

    let _ = writeln!(o, "<section id=\"signoff\"><h2>Sign-off</h2>");
    if r.signoffs.is_empty() {
        let _ = writeln!(
            o,
            "<div class=\"stamp unchecked\"><span class=\"stamp-label\">No sign-off recorded</span><p>Nobody has signed this version or this report in this store.</p></div>"
        );
    } else {
        let _ = writeln!(
            o,
            "<table><thead><tr><th>meaning</th><th>name</th><th>time</th><th>key</th><th>signature</th></tr></thead><tbody>"
        );
        for x in &r.signoffs {
            let class = match x.status {
                SignOffStatus::Verified => "passed",
                SignOffStatus::BadSignature
                | SignOffStatus::MissingSignature
                | SignOffStatus::UnknownKey => "failed",
                SignOffStatus::NotChecked => "unchecked",
            };
            let _ = writeln!(
                o,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"hash\">{}</td><td><span class=\"verdict {class}\">{}</span></td></tr>",
                esc(&x.meaning),
                esc(&x.name),
                esc(&utc(&x.at)),
                esc(&x.fingerprint),
                esc(super::status_words(x.status))
            );
        }
        let _ = writeln!(o, "</tbody></table>");
    }
    let _ = writeln!(o, "</section>");
    let _ = writeln!(
        o,
        "<footer><div class=\"stamp caution\"><span class=\"stamp-label\">Caution</span><p>{}</p></div>\n<p class=\"own\">Own hash (BLAKE3): <span class=\"hash\">{}</span>. {}</p></footer>\n</body>\n</html>",
        esc(&r.caution),
        esc(&r.own_hash),
        esc(own_hash_words())
    );
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn white_space_is_shown_by_our_marks() {
        assert_eq!(visible("Brake Tune  "), "Brake·Tune··");
        assert_eq!(visible("a\tb\u{a0}c\r\n"), "a→b⍽c␍↵");
        assert_eq!(visible("\u{200b}x"), "\\u{200b}x");
    }

    #[test]
    fn times_say_their_zone() {
        assert_eq!(
            utc("2026-07-01T09:30:00.125Z"),
            "2026-07-01 09:30:00.125 UTC"
        );
        assert_eq!(utc("yesterday"), "yesterday");
    }

    /// A report of one intake, with the sign-off lines given.
    fn small_report(signoffs: Vec<super::super::SignOffLine>) -> Report {
        use super::super::*;
        let hash = "ab".repeat(32);
        let at = "2026-07-01T09:30:00.000Z".to_string();
        Report {
            sluice_report: REPORT_FORMAT,
            generated: Generated {
                at: at.clone(),
                by: "Wren Alder".into(),
                tool_version: "sluice test".into(),
            },
            subject: Subject {
                version: "orders:v1".into(),
                dataset: "orders".into(),
                hash: hash.clone(),
                n_rows: 1,
                n_cols: 1,
                n_bytes: 4,
                recorded_at: at.clone(),
                latest: true,
            },
            summary: Summary {
                raw: Vec::new(),
                raw_rows_in: 1,
                rows_out: 1,
                dropped: Vec::new(),
                rows_dropped: 0,
                cells_changed: 0,
                checks_passed: 0,
                checks_failed: 0,
                reproduction: "not_checked".into(),
            },
            figures: Figures {
                summary: false,
                header: vec!["a".into()],
                rows: vec![vec!["1".into()]],
                n_rows: 1,
            },
            steps: Vec::new(),
            other_steps: Vec::new(),
            checks: Vec::new(),
            quality: Vec::new(),
            hashes: Hashes {
                algorithm: "blake3".into(),
                raw: Vec::new(),
                subject: hash.clone(),
            },
            verification: Verification {
                intact: true,
                objects_checked: 1,
                bytes_checked: 4,
                versions_checked: 1,
                audit_entries_checked: 1,
                audit_head_seq: 1,
                audit_head_hash: hash,
                problems: Vec::new(),
                replay: None,
                verdict: "not_checked".into(),
                statement: "checked".into(),
            },
            signoffs,
            erasures: Vec::new(),
            caution: CAUTION.into(),
            own_hash: OWN_HASH_PLACEHOLDER.into(),
            lineage: crate::graph::Drawing::default(),
        }
    }

    #[test]
    fn sign_offs_are_shown_in_every_form_and_their_absence_is_said() {
        use super::super::{SignOffLine, SignOffStatus};
        let none = small_report(Vec::new());
        assert!(html(&none).contains("No sign-off recorded"));
        assert!(markdown(&none).contains("No sign-off recorded"));
        assert!(json(&none).contains("\"signoffs\": []"));
        let line = |meaning: &str, status| SignOffLine {
            meaning: meaning.into(),
            name: "Wren Alder".into(),
            at: "2026-07-02T10:00:00.000Z".into(),
            fingerprint: "SHA256:fingerprint-of-the-key".into(),
            status,
        };
        let signed = small_report(vec![
            line("prepared", SignOffStatus::Verified),
            line("approved", SignOffStatus::BadSignature),
        ]);
        let (h, m, j) = (html(&signed), markdown(&signed), json(&signed));
        for text in [&h, &m] {
            assert!(!text.contains("No sign-off recorded"));
            assert!(text.contains("2026-07-02 10:00:00.000 UTC"));
            assert!(text.contains("SHA256:fingerprint-of-the-key"));
            assert!(text.contains("signature verified") && text.contains("bad signature"));
        }
        assert!(h.contains("<span class=\"verdict failed\">bad signature</span>"));
        assert!(j.contains("\"status\": \"bad_signature\""));
        // A bad signature fails the signatures' part of the verification.
        assert!(h.contains("<span class=\"verdict failed\">failed</span> signatures"));
    }

    #[test]
    fn the_drawing_is_cut_only_between_rows_and_within_a_page() {
        let d = crate::graph::Drawing {
            width: 500.0,
            height: 2000.0,
            body: String::new(),
            cuts: (1..20).map(|i| i as f64 * 100.0 + 50.0).collect(),
        };
        let b = bands(&d, 780.0, 880.0);
        assert_eq!(b.first().map(|x| x.0), Some(0.0));
        let mut top = 0.0;
        for (i, (t, h)) in b.iter().enumerate() {
            assert_eq!(*t, top, "bands follow one another");
            assert!(*h <= if i == 0 { 780.0 } else { 880.0 });
            top += h;
            assert!(top == d.height || d.cuts.contains(&top), "cut at {top}");
        }
        assert_eq!(top, d.height);
    }

    #[test]
    fn settings_read_as_words() {
        let p = serde_json::json!({"op": "trim", "columns": null, "inner": true,
            "aggregates": [{"column": "parts_cost", "func": "sum"}], "null_tokens": []});
        assert_eq!(
            settings(&p),
            [
                (
                    "aggregates".to_string(),
                    "column “parts_cost”, func “sum”".to_string()
                ),
                ("columns".to_string(), "every column".to_string()),
                ("inner".to_string(), "yes".to_string()),
                ("null tokens".to_string(), "none".to_string()),
            ]
        );
    }
}
