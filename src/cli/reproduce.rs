//! Commands that compute recorded work again: `reproduce` (check a version against its raw
//! ancestors, recording nothing), `rerun` (the same chain on new raw data, recorded) and
//! `withdraw` (take out the step that made a version, recorded).

use std::io::{self, Write};

use anyhow::anyhow;

use super::text::*;
use super::{Context, ExitCode};

pub fn reproduce(
    ctx: &Context<'_>,
    reference: &str,
    allow_exec: bool,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    if allow_exec {
        // Every command line is shown before anything runs (on standard error with --json, so
        // that standard output stays one JSON document).
        let planned = sluice::replay::planned_commands(&store, reference)?;
        if as_json {
            planned_commands(&mut std::io::stderr().lock(), &planned)?;
        } else {
            planned_commands(out, &planned)?;
            out.flush()?;
        }
    }
    let options = sluice::replay::ReplayOptions { allow_exec };
    let r = sluice::replay::replay(&mut store, reference, &options)?;
    if as_json {
        json(out, &r)?;
    } else {
        reproduce_text(out, &r)?;
    }
    Ok(if r.reproduced { 0 } else { 1 })
}

pub fn rerun(
    ctx: &Context<'_>,
    reference: &str,
    with: &str,
    why: Option<&str>,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let (name, file) = with.split_once('=').filter(|(n, f)| !n.is_empty() && !f.is_empty()).ok_or_else(|| {
        anyhow!("--with {with}: expected NAME=FILE, e.g. --with quillby_orders=exports/quillby_2026q4.csv")
    })?;
    let result = sluice::replay::onto(
        &mut store,
        reference,
        name,
        &ctx.cwd.join(file),
        why.map(str::to_string),
        &agent,
    )?;
    super::record::finish_run(out, as_json, result)
}

pub fn withdraw(
    ctx: &Context<'_>,
    reference: &str,
    why: &str,
    accept_conflicts: bool,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let opts = sluice::revert::RevertOptions {
        reason: why.to_string(),
        force: accept_conflicts,
        agent: ctx.agent(Some(&store))?,
    };
    let outcome = sluice::revert::revert(&mut store, reference, &opts)?;
    if as_json {
        json(out, &sluice::outcome::WithdrawJson::from(&outcome))?;
    } else {
        withdraw_text(out, &outcome)?;
    }
    Ok(match outcome {
        sluice::revert::RevertOutcome::Recorded(_) => 0,
        sluice::revert::RevertOutcome::Refused { .. } => 1,
    })
}

fn conflict_line(out: &mut impl Write, c: &sluice::revert::Conflict) -> io::Result<()> {
    writeln!(out, "  step {} ({}): {}", c.step, c.version, c.detail)?;
    writeln!(out, "    with --accept-conflicts: {}", c.when_forced)
}

/// What a withdrawal recorded, or why it was refused.
pub fn withdraw_text(out: &mut impl Write, o: &sluice::revert::RevertOutcome) -> io::Result<()> {
    match o {
        sluice::revert::RevertOutcome::Refused {
            reverted,
            conflicts,
        } => {
            writeln!(
                out,
                "not withdrawn: taking out the step that made {reverted} conflicts with {} after it; nothing was recorded",
                plural(conflicts.len() as u64, "change", "changes")
            )?;
            for c in conflicts {
                conflict_line(out, c)?;
            }
            writeln!(
                out,
                "resolve them by hand first, or withdraw again with --accept-conflicts to apply the rules shown"
            )
        }
        sluice::revert::RevertOutcome::Recorded(r) => {
            writeln!(
                out,
                "withdrew step {} (it made {}): {} is now {} ({})",
                r.reverted_step,
                r.reverted,
                r.latest.split(':').next().unwrap_or(&r.latest),
                r.latest,
                short_hash(&r.hash)
            )?;
            for l in &r.recorded {
                writeln!(
                    out,
                    "  step {}: recorded {} ({}), {}; {}",
                    l.step,
                    l.version,
                    short_hash(&l.hash),
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
                    "resolved by --accept-conflicts ({}), recorded with the withdrawal step:",
                    plural(r.forced.len() as u64, "conflict", "conflicts")
                )?;
                for c in &r.forced {
                    conflict_line(out, c)?;
                }
            }
            if !r.checks.is_empty() {
                writeln!(out, "inspections recorded on the old history, run again:")?;
                for c in &r.checks {
                    let outcome = if c.passed {
                        "passes".to_string()
                    } else {
                        format!(
                            "fails: {} (first: {})",
                            plural(c.n_failing, "row", "rows"),
                            c.first_failing
                                .iter()
                                .map(|x| x.to_string())
                                .collect::<Vec<_>>()
                                .join(", ")
                        )
                    };
                    writeln!(
                        out,
                        "  {} (as on {}{}): {} {outcome}",
                        c.version,
                        c.original,
                        if c.gate { ", a hold point" } else { "" },
                        sluice::checks::describe_stored(&c.rule)
                    )?;
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
                    "not changed by the withdrawal, though made from the history it replaced: {}",
                    r.untouched_downstream.join(", ")
                )?;
            }
            Ok(())
        }
    }
}

/// The outside commands `reproduce --allow-exec` will run, before any runs.
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
        "--allow-exec: reproduce will run {}, each in a temporary checkout of its recorded commit:",
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

/// What a reproduction found.
pub fn reproduce_text(out: &mut impl Write, r: &sluice::replay::ReplayReport) -> io::Result<()> {
    for s in &r.steps {
        let what = s
            .operation
            .as_deref()
            .unwrap_or(sluice::history::action_of(s.kind));
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
            short_hash(&s.recorded_hash)
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
    let raw = r.steps.iter().filter(|s| s.result == "raw_intact").count() as u64;
    let rerun = r
        .steps
        .iter()
        .filter(|s| matches!(s.result.as_str(), "same" | "restored" | "reapplied"))
        .count() as u64;
    if r.reproduced {
        writeln!(
            out,
            "reproduced {} ({}): all {} above check out ({} intact, {} run again gave the recorded bytes)",
            r.version,
            short_hash(&r.hash),
            plural(r.steps.len() as u64, "step", "steps"),
            plural(raw, "raw input", "raw inputs"),
            plural(rerun, "step", "steps")
        )
    } else {
        writeln!(
            out,
            "not reproduced: {} ({}) could not be shown to come from its raw data (see above)",
            r.version,
            short_hash(&r.hash)
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
            .map(|h| format!(" ({})", short_hash(h)))
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
