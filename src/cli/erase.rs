//! `erase`: an erasure order's dry run, the screen and `--json` record of every cell it
//! reaches forward through the lineage and of the summary cells it leaves unrecomputable.

use std::collections::BTreeMap;
use std::io::Write;

use serde::Serialize;

use super::args::EraseArgs;
use super::text::{json, plural};
use super::{Context, ExitCode};
use sluice::erasure::{self, carry::Carried, reach::Reach, Order, Target};
use sluice::model::short_hash;

#[derive(Serialize)]
struct CellJson<'a> {
    /// 1-based data row.
    row: u64,
    column: &'a str,
}

#[derive(Serialize)]
struct VersionJson<'a> {
    version: String,
    hash: &'a str,
    erased: Vec<CellJson<'a>>,
    kept_unrecomputable: Vec<CellJson<'a>>,
}

#[derive(Serialize)]
struct NotFollowedJson<'a> {
    step: i64,
    version: &'a str,
    why: &'a str,
}

#[derive(Serialize)]
struct SurveyJson<'a> {
    dry_run: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    carried_out: Option<&'a Carried>,
    version: String,
    hash: &'a str,
    names: &'a Target,
    request: &'a str,
    cells_erased: u64,
    versions: Vec<VersionJson<'a>>,
    not_followed: Vec<NotFollowedJson<'a>>,
    /// Reached versions whose column profiles were committed to by an unsalted digest.
    #[serde(skip_serializing_if = "<[String]>::is_empty")]
    profiles_committed_unsalted: &'a [String],
}

fn target(a: &EraseArgs) -> anyhow::Result<Target> {
    if let Some(p) = &a.rows_where {
        return Ok(Target::RowsWhere(p.clone()));
    }
    if !a.key.is_empty() {
        let pairs = a
            .key
            .iter()
            .map(|kv| {
                kv.split_once('=')
                    .map(|(k, v)| (k.to_string(), v.to_string()))
                    .ok_or_else(|| anyhow::anyhow!("--key takes COLUMN=VALUE, not \"{kv}\""))
            })
            .collect::<anyhow::Result<_>>()?;
        return Ok(Target::RowsWithKey(pairs));
    }
    if !a.cell.is_empty() {
        let cells = a
            .cell
            .iter()
            .map(|rc| {
                rc.split_once(':')
                    .and_then(|(r, c)| Some((r.parse::<u64>().ok()?, c.to_string())))
                    .ok_or_else(|| {
                        anyhow::anyhow!(
                            "--cell takes ROW:COLUMN (a 1-based data row), not \"{rc}\""
                        )
                    })
            })
            .collect::<anyhow::Result<_>>()?;
        return Ok(Target::Cells(cells));
    }
    Ok(Target::Columns(a.column.clone()))
}

pub fn erase(ctx: &Context<'_>, a: &EraseArgs, out: &mut impl Write) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let version = sluice::refs::resolve(&store.lineage, &a.reference)?;
    if a.request.trim().is_empty() {
        anyhow::bail!("--request is empty; name the request or its legal basis (a reference a data-protection officer can find again)");
    }
    let order = Order {
        version,
        target: target(a)?,
        request: a.request.clone(),
    };
    if a.carry_out {
        let mut store = store;
        let agent = ctx.agent(Some(&store))?;
        let at = sluice::clock::now_rfc3339();
        let (reach, done) = erasure::carry::carry_out(&mut store, &order, &agent, &at)?;
        if a.json {
            let mut j = survey_json(&order, &reach);
            j.dry_run = false;
            j.carried_out = Some(&done);
            json(out, &j)?;
        } else {
            carried_text(out, &order, &reach, &done)?;
        }
        return Ok(0);
    }
    let reach = erasure::survey(&store, &order)?;
    if a.json {
        json(out, &survey_json(&order, &reach))?;
    } else {
        survey_text(out, &order, &reach)?;
    }
    Ok(0)
}

fn carried_text(
    out: &mut impl Write,
    order: &Order,
    reach: &Reach,
    done: &Carried,
) -> std::io::Result<()> {
    writeln!(
        out,
        "erasure order {} carried out: recorded as audit entry {}, cells erased in audit entry {}",
        done.order, done.ordered_entry, done.erased_entry
    )?;
    order_lines(out, order)?;
    writeln!(
        out,
        "erased {} in {}; each keeps its name, and a salted commitment recorded before the erasure proves every other cell:",
        plural(reach.n_erased(), "cell", "cells"),
        plural(done.versions.len() as u64, "version", "versions")
    )?;
    for v in &done.versions {
        let note = if v.was_recomputable {
            "  (was recomputable: no longer, its erased form is stored)"
        } else {
            ""
        };
        writeln!(
            out,
            "  {:<24} {:>6} erased  {:>4} kept, no longer recomputable{note}",
            v.version, v.cells_erased, v.cells_kept_unrecomputable
        )?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "database: {} overwritten, then rebuilt and its write-ahead log emptied",
        plural(done.database_fields_overwritten, "field", "fields")
    )?;
    writeln!(
        out,
        "segments: {} before, {} after; the old bytes are gone from the store",
        done.removed.segments_before, done.removed.segments_after
    )?;
    unsalted_lines(out, reach)?;
    not_followed_lines(out, reach, "; nothing was erased there")?;
    writeln!(out)?;
    writeln!(
        out,
        "this supports an erasure request; what must be erased and what kept is for the data-protection officer to decide under local law"
    )?;
    Ok(())
}

fn cells_json<'a>(
    header: &'a [String],
    cells: &sluice::erasure::reach::Cells,
) -> Vec<CellJson<'a>> {
    cells
        .iter()
        .map(|&(r, c)| CellJson {
            row: r + 1,
            column: header.get(c).map_or("", |s| s.as_str()),
        })
        .collect()
}

fn survey_json<'a>(order: &'a Order, reach: &'a Reach) -> SurveyJson<'a> {
    SurveyJson {
        dry_run: true,
        carried_out: None,
        version: order.version.label(),
        hash: &order.version.hash,
        names: &order.target,
        request: &order.request,
        cells_erased: reach.n_erased(),
        versions: reach
            .versions
            .iter()
            .map(|r| VersionJson {
                version: r.version.label(),
                hash: &r.version.hash,
                erased: cells_json(&r.version.header, &r.erased),
                kept_unrecomputable: cells_json(&r.version.header, &r.kept_unrecomputable),
            })
            .collect(),
        not_followed: reach
            .not_followed
            .iter()
            .map(|n| NotFollowedJson {
                step: n.step,
                version: &n.version,
                why: &n.why,
            })
            .collect(),
        profiles_committed_unsalted: &reach.profiles_committed_unsalted,
    }
}

/// One line per row: `NAME:vN row R: col, col, ...`.
fn rows_text(
    out: &mut impl Write,
    label: &str,
    header: &[String],
    cells: &sluice::erasure::reach::Cells,
) -> std::io::Result<()> {
    let mut rows: BTreeMap<u64, Vec<&str>> = BTreeMap::new();
    for &(r, c) in cells {
        rows.entry(r)
            .or_default()
            .push(header.get(c).map_or("", |s| s.as_str()));
    }
    for (r, cols) in rows {
        let what = if cols.len() == header.len() {
            "every column".to_string()
        } else {
            cols.join(", ")
        };
        writeln!(out, "  {label} row {}: {what}", r + 1)?;
    }
    Ok(())
}

/// What an order names, as both screens show it: the raw version, the cells, the request.
fn order_lines(out: &mut impl Write, order: &Order) -> std::io::Result<()> {
    writeln!(
        out,
        "  raw version  {} ({})",
        order.version.label(),
        short_hash(&order.version.hash)
    )?;
    writeln!(out, "  names        {}", order.target.describe())?;
    writeln!(out, "  request      {}", order.request)?;
    writeln!(out)?;
    Ok(())
}

fn survey_text(out: &mut impl Write, order: &Order, reach: &Reach) -> std::io::Result<()> {
    writeln!(
        out,
        "erasure order, dry run: nothing was recorded and nothing erased"
    )?;
    order_lines(out, order)?;
    writeln!(
        out,
        "it reaches {} in {}:",
        plural(reach.n_erased(), "cell", "cells"),
        plural(reach.versions.len() as u64, "version", "versions")
    )?;
    for r in &reach.versions {
        writeln!(
            out,
            "  {:<24} {:>6} to erase  {:>4} to keep, no longer recomputable",
            r.version.label(),
            r.erased.len(),
            r.kept_unrecomputable.len()
        )?;
    }
    writeln!(out)?;
    writeln!(out, "cells to erase:")?;
    for r in &reach.versions {
        rows_text(out, &r.version.label(), &r.version.header, &r.erased)?;
    }
    if reach
        .versions
        .iter()
        .any(|r| !r.kept_unrecomputable.is_empty())
    {
        writeln!(out)?;
        writeln!(
            out,
            "summary cells that aggregated an erased value (kept as published, marked as no longer recomputable):"
        )?;
        for r in &reach.versions {
            rows_text(
                out,
                &r.version.label(),
                &r.version.header,
                &r.kept_unrecomputable,
            )?;
        }
    }
    unsalted_lines(out, reach)?;
    not_followed_lines(out, reach, "")?;
    Ok(())
}

/// The reached versions whose column profiles were recorded by an earlier build, whose audit
/// entries committed to them without a salt.
/// The steps whose outputs the reach could not follow, when there are any; `after` ends the
/// advice in the heading.
fn not_followed_lines(out: &mut impl Write, reach: &Reach, after: &str) -> std::io::Result<()> {
    if reach.not_followed.is_empty() {
        return Ok(());
    }
    writeln!(out)?;
    writeln!(
        out,
        "steps the lineage does not let sluice follow (check their outputs by hand{after}):"
    )?;
    for n in &reach.not_followed {
        writeln!(out, "  step {} making {}: {}", n.step, n.version, n.why)?;
    }
    Ok(())
}

fn unsalted_lines(out: &mut impl Write, reach: &Reach) -> std::io::Result<()> {
    if reach.profiles_committed_unsalted.is_empty() {
        return Ok(());
    }
    writeln!(out)?;
    writeln!(
        out,
        "column profiles recorded by an earlier sluice, committed to without a salt: if an erased value was a column's smallest or largest, a guess of it with the profile's other fields can still be confirmed against the audit entry that recorded the version:"
    )?;
    writeln!(out, "  {}", reach.profiles_committed_unsalted.join(", "))?;
    Ok(())
}
