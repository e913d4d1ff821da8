//! `erase`: an erasure order's dry run, the screen and `--json` record of every cell it
//! reaches forward through the lineage and of the summary cells it leaves unrecomputable.

use std::collections::BTreeMap;
use std::io::Write;

use serde::Serialize;

use super::args::EraseArgs;
use super::text::{json, plural};
use super::{Context, ExitCode};
use sluice::erasure::{self, reach::Reach, Order, Target};
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
    version: String,
    hash: &'a str,
    names: &'a Target,
    request: &'a str,
    cells_erased: u64,
    versions: Vec<VersionJson<'a>>,
    not_followed: Vec<NotFollowedJson<'a>>,
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
    let reach = erasure::survey(&store, &order)?;
    if a.json {
        json(out, &survey_json(&order, &reach))?;
    } else {
        survey_text(out, &order, &reach)?;
    }
    Ok(0)
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

fn survey_text(out: &mut impl Write, order: &Order, reach: &Reach) -> std::io::Result<()> {
    writeln!(
        out,
        "erasure order, dry run: nothing was recorded and nothing erased"
    )?;
    writeln!(
        out,
        "  raw version  {} ({})",
        order.version.label(),
        short_hash(&order.version.hash)
    )?;
    writeln!(out, "  names        {}", order.target.describe())?;
    writeln!(out, "  request      {}", order.request)?;
    writeln!(out)?;
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
    if !reach.not_followed.is_empty() {
        writeln!(out)?;
        writeln!(
            out,
            "steps the lineage does not let sluice follow (check their outputs by hand):"
        )?;
        for n in &reach.not_followed {
            writeln!(out, "  step {} making {}: {}", n.step, n.version, n.why)?;
        }
    }
    Ok(())
}
