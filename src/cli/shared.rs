//! `publish`, `borrow` and `roles`: moving work between a store of one's own and a shared one,
//! and the roles a shared store's server enforces.

use std::io::Write;
use std::path::Path;

use super::text::json;
use super::{Context, ExitCode};
use sluice::outcome::MovedJson;
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
    object_bucket: Option<&str>,
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let local = ctx.open_store()?;
    let shared = match (lineage_server, object_bucket) {
        // A new shared store for this one: made without an entry of its own, so that its
        // history is this store's, entry for entry.
        (Some(conn), bucket) => Store::init_at(
            to,
            &sluice::store::location::Location {
                lineage: Some(conn.to_string()),
                objects: bucket.map(str::to_string),
                ..Default::default()
            },
        )?,
        (None, Some(_)) => {
            return Err(sluice::Error::usage(
                "--object-bucket names where a new shared store keeps its objects; give it with --lineage-server CONN (an existing shared store already says where its objects are)",
            )
            .into())
        }
        (None, None) => Store::open(to)?,
    };
    let m = sluice::sharing::publish(&local, &shared)?;
    if as_json {
        let record = MovedJson::new(
            local.dir().display().to_string(),
            shared.lineage.describe(),
            &m,
        );
        json(out, &record)?;
        return Ok(0);
    }
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
    datasets: &[String],
    as_json: bool,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let project = ctx.new_store_folder(into, "--into", || ctx.cwd.clone())?;
    let shared = Store::open(from)?;
    let (local, m) = sluice::sharing::borrow(&shared, &project, datasets)?;
    if as_json {
        let record = MovedJson::new(
            shared.lineage.describe(),
            local.dir().display().to_string(),
            &m,
        );
        json(out, &record)?;
        return Ok(0);
    }
    writeln!(
        out,
        "a working copy of {} in {}",
        shared.lineage.describe(),
        local.dir().display()
    )?;
    moved_text(out, &m)?;
    if !datasets.is_empty() {
        writeln!(
            out,
            "borrowed in part: the bytes of {} and of what they are made from; the other versions are read in the shared store only",
            datasets.join(", ")
        )?;
    }
    writeln!(
        out,
        "next: record there, then `sluice publish --to {}`",
        from.display()
    )?;
    Ok(0)
}

/// What `roles` was asked to do.
pub struct RolesAsked<'a> {
    pub set_up: bool,
    pub give: Option<&'a str>,
    pub to: Option<&'a str>,
    pub of: Option<&'a str>,
    pub bucket_policy: Option<&'a Path>,
    pub bucket_principals: &'a [String],
}

pub fn roles(
    ctx: &Context<'_>,
    a: &RolesAsked<'_>,
    out: &mut impl Write,
) -> anyhow::Result<ExitCode> {
    let store = ctx.open_store()?;
    let mut did = false;
    if a.set_up {
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
    if let (Some(role), Some(login)) = (a.give, a.to) {
        roles::give(&store, role, login)?;
        writeln!(out, "{login} now has the role {role}")?;
        did = true;
    }
    if let Some(login) = a.of {
        let has = roles::of(&store, login)?;
        if has.is_empty() {
            writeln!(out, "{login} has none of sluice's roles")?;
        } else {
            writeln!(out, "{login}: {}", has.join(", "))?;
        }
        did = true;
    }
    if let Some(path) = a.bucket_policy {
        bucket_policy(&store, path, a.bucket_principals, out)?;
        did = true;
    }
    if !did {
        anyhow::bail!(sluice::Error::usage(
            "say what to do: --set-up, --give ROLE --to LOGIN, --of LOGIN, or --bucket-policy FILE"
        ));
    }
    Ok(0)
}

/// `roles --bucket-policy FILE`: the policy for the bucket the store's objects are in.
fn bucket_policy(
    store: &Store,
    path: &Path,
    principals: &[String],
    out: &mut impl Write,
) -> anyhow::Result<()> {
    let Some(url) = store.objects_bucket()? else {
        anyhow::bail!(sluice::Error::usage(
            "this store keeps its objects in its folder; a bucket policy is for a store whose objects are in a bucket \
             (`sluice setup --object-bucket URL`, or `sluice transfer --to-bucket URL`)"
        ));
    };
    let mut named = Vec::new();
    for p in principals {
        let Some((role, who)) = p.split_once('=') else {
            anyhow::bail!(sluice::Error::usage(format!(
                "--bucket-principal {p}: expected ROLE=PRINCIPAL, such as recording=arn:aws:iam::000000000000:user/ada"
            )));
        };
        named.push((role.trim().to_string(), who.trim().to_string()));
    }
    let policy = roles::bucket_policy(&url, &named)?;
    super::write_file_atomically(path, |f| {
        serde_json::to_writer_pretty(&mut *f, &policy)?;
        f.write_all(b"\n")?;
        Ok(())
    })?;
    writeln!(
        out,
        "wrote the bucket policy for {url} to {}: nobody may delete the store's objects{}",
        path.display(),
        if named.is_empty() {
            String::new()
        } else {
            format!(
                "; {} given their roles' actions",
                super::text::plural(named.len() as u64, "principal", "principals")
            )
        }
    )?;
    writeln!(
        out,
        "next: install it as the bucket's owner (S3 PutBucketPolicy); the server then refuses what a key's role does not allow"
    )?;
    Ok(())
}
