//! `retain`, `recompute` and `evict`: which versions' bytes the store keeps. Each change is
//! an audit entry of its own (action `storage`); no hash is ever lost, since a version that is
//! not stored keeps its hash, recipe, shape and profile and is computed again when read.

use std::io::{self, Write};

use serde::Serialize;
use sluice::model::Storage;
use sluice::recompute::{self, StorageChange};

use super::text::{json, plural};
use super::{Context, ExitCode};

/// What `retain`, `recompute` and `evict` print with `--json` (schema/output/retain.schema.json
/// and its two siblings).
#[derive(Serialize)]
struct StorageJson {
    changes: Vec<StorageChange>,
}

/// `retain` (`to` = kept) and `recompute` (`to` = stored): each version's bytes computed when
/// they are not stored, then its storage recorded.
pub fn retain(
    ctx: &Context<'_>,
    references: &[String],
    to: Storage,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let versions = references
        .iter()
        .map(|r| sluice::refs::resolve(&store.lineage, r))
        .collect::<sluice::Result<Vec<_>>>()?;
    let mut changes = Vec::new();
    for v in &versions {
        changes.push(recompute::store_bytes(&mut store, v, to, &agent)?);
    }
    report(out, changes, as_json)?;
    Ok(0)
}

/// `evict`: the versions named (or with `all`, every version the policy allows) recorded as
/// recomputable.
pub fn evict(
    ctx: &Context<'_>,
    references: &[String],
    all: bool,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let mut store = ctx.open_store()?;
    let agent = ctx.agent(Some(&store))?;
    let versions = if all {
        let mut v = Vec::new();
        for x in store.lineage.all_versions()? {
            if x.storage != Storage::Recomputable
                && recompute::must_stay_stored(&store, &x)?.is_none()
            {
                v.push(x);
            }
        }
        v
    } else {
        references
            .iter()
            .map(|r| sluice::refs::resolve(&store.lineage, r))
            .collect::<sluice::Result<Vec<_>>>()?
    };
    // Every named version is checked before any is changed.
    for v in &versions {
        if let Some(why) = recompute::must_stay_stored(&store, v)? {
            return Err(sluice::Error::usage(format!("{} stays stored: {why}", v.label())).into());
        }
    }
    let mut changes = Vec::new();
    for v in &versions {
        changes.push(recompute::release_bytes(&mut store, v, &agent)?);
    }
    report(out, changes, as_json)?;
    Ok(0)
}

fn report(out: &mut impl Write, changes: Vec<StorageChange>, as_json: bool) -> io::Result<()> {
    if as_json {
        return json(out, &StorageJson { changes });
    }
    if changes.is_empty() {
        return writeln!(out, "no version changed");
    }
    for c in &changes {
        let what = match (c.before == c.after, c.after, c.computed) {
            (true, _, _) => format!("already {}", c.after.as_str()),
            (false, Storage::Recomputable, _) => {
                "now recomputable (its bytes go at the next `sluice reclaim`)".to_string()
            }
            (false, to, true) => format!(
                "computed from its recipe, hash checked, now {}",
                to.as_str()
            ),
            (false, to, false) => format!("now {}", to.as_str()),
        };
        writeln!(
            out,
            "{} ({}): {what}",
            c.version,
            sluice::model::short_hash(&c.hash)
        )?;
    }
    let n = changes.iter().filter(|c| c.audit_entry.is_some()).count() as u64;
    writeln!(out, "{} recorded", plural(n, "change", "changes"))
}
