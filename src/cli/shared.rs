//! `publish`, `borrow` and `roles`: moving work between a store of one's own and a shared one,
//! and the roles a shared store's server enforces.

use std::io::Write;
use std::path::Path;

use super::{Context, ExitCode};
use sluice::sharing::Moved;
use sluice::store::{roles, Store};

fn moved_text(out: &mut impl Write, m: &Moved) -> std::io::Result<()> {
    writeln!(
        out,
        "  objects  {} copied ({} bytes, each re-hashed), {} there already",
        m.objects_copied, m.bytes_copied, m.objects_present
    )?;
    writeln!(
        out,
        "  lineage  {} audit entries copied after the {} there already",
        m.entries_copied, m.entries_before
    )
}

pub fn publish(
    ctx: &Context<'_>,
    to: &Path,
    lineage_server: Option<&str>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let local = ctx.open_store()?;
    let shared = match lineage_server {
        // A new shared store for this one: made without an entry of its own, so that its
        // history is this store's, entry for entry.
        Some(conn) => Store::init_with(to, Some(conn))?,
        None => Store::open(to)?,
    };
    let m = sluice::sharing::publish(&local, &shared)?;
    if m.entries_copied == 0 {
        writeln!(
            out,
            "nothing to publish: {} holds this store's whole history ({} audit entries)",
            shared.lineage.describe(),
            m.entries_before
        )?;
    } else {
        writeln!(out, "published to {}", shared.lineage.describe())?;
    }
    moved_text(out, &m)?;
    Ok(0)
}

pub fn borrow(
    ctx: &Context<'_>,
    from: &Path,
    into: Option<&Path>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let shared = Store::open(from)?;
    let project = into.map_or_else(|| ctx.cwd.clone(), Path::to_path_buf);
    let (local, m) = sluice::sharing::borrow(&shared, &project)?;
    writeln!(
        out,
        "a working copy of {} in {}",
        shared.lineage.describe(),
        local.dir().display()
    )?;
    moved_text(out, &m)?;
    writeln!(
        out,
        "next: record there, then `sluice publish --to {}`",
        from.display()
    )?;
    Ok(0)
}

pub fn roles(
    ctx: &Context<'_>,
    set_up: bool,
    give: Option<&str>,
    to: Option<&str>,
    of: Option<&str>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let mut did = false;
    if set_up {
        roles::set_up(&store)?;
        writeln!(
            out,
            "roles set up on {}: {}",
            store.lineage.describe(),
            roles::ROLES
                .iter()
                .map(|(ours, theirs)| format!("{ours} ({theirs})"))
                .collect::<Vec<_>>()
                .join(", ")
        )?;
        did = true;
    }
    if let (Some(role), Some(login)) = (give, to) {
        roles::give(&store, role, login)?;
        writeln!(out, "{login} now has the role {role}")?;
        did = true;
    }
    if let Some(login) = of {
        let has = roles::of(&store, login)?;
        if has.is_empty() {
            writeln!(out, "{login} has none of sluice's roles")?;
        } else {
            writeln!(out, "{login}: {}", has.join(", "))?;
        }
        did = true;
    }
    if !did {
        anyhow::bail!(sluice::Error::usage(
            "say what to do: --set-up, --give ROLE --to LOGIN, or --of LOGIN"
        ));
    }
    Ok(0)
}
