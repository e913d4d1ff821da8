//! Moving work between a store of one's own and a store shared by a team: `publish` copies a
//! local store into a shared one (objects, then the lineage in one server transaction), and
//! `borrow` copies a shared store into a new local working copy. Both first verify the store
//! they copy from (every object re-hashed, the audit chain and every row commitment checked)
//! and copy each object through its hash again; neither adds an audit entry, so the copy's
//! chain is the original's entry for entry and a later publish can tell whether the shared
//! store moved on meanwhile. A shared store that moved on is named, never merged.

use std::collections::{BTreeSet, HashSet};
use std::path::Path;

use crate::error::{ErrorKind, Result};
use crate::hash::Hash;
use crate::store::lineage::Copied;
use crate::store::Store;

/// What a copy moved.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Moved {
    /// Objects copied (those the target lacked), and their bytes.
    pub objects_copied: u64,
    pub bytes_copied: u64,
    /// Objects the target held already.
    pub objects_present: u64,
    /// Audit entries the target held before, and how many it gained.
    pub entries_before: u64,
    pub entries_copied: u64,
}

fn intact(store: &Store, which: &str) -> Result<()> {
    let report = crate::verify::verify(store)?;
    if !report.intact {
        let first: Vec<String> = report
            .problems
            .iter()
            .take(3)
            .map(|p| format!("{} {}: {}", p.kind, p.subject, p.detail))
            .collect();
        return Err(ErrorKind::Data(format!(
            "{which} ({}) does not verify intact ({} problems, the first: {}), so it is not copied; run `sluice verify` there to see them all",
            store.dir().display(),
            report.problems.len(),
            first.join("; ")
        ))
        .into());
    }
    Ok(())
}

/// Copies every stored object of `from` that `to` lacks (except those in `leave`), re-hashing
/// each as it is read and as it is written.
fn copy_objects(
    from: &Store,
    to: &Store,
    leave: &BTreeSet<String>,
    moved: &mut Moved,
) -> Result<()> {
    let unstored = from.lineage.unstored_objects()?;
    // Objects read a few bytes at a time by offset keep their small frames in the copy.
    let provenance = from.lineage.provenance_objects()?;
    for (hex, kind, _) in from.lineage.objects()? {
        if unstored.contains(&hex) || leave.contains(&hex) {
            continue;
        }
        let hash: Hash = hex.parse().map_err(|_| {
            crate::Error::from(ErrorKind::Inconsistent(format!(
                "the objects table names {hex:?}, which is not a BLAKE3 hash; run `sluice verify`"
            )))
        })?;
        // Left in the shared store by a borrow in part: `publish` checked that the target
        // holds it, and a trial copy's target is the working copy that lacks it too.
        if from.objects.is_left_in_shared(&hash) {
            continue;
        }
        // An erased version's own bytes and row index are gone; its erased forms are objects
        // of their own (in this listing), which the copy reads in their place, as this one does.
        if from.objects.is_erased(&hash) {
            continue;
        }
        if to.objects.exists(&hash) {
            moved.objects_present += 1;
            continue;
        }
        let dir = to.dir().to_path_buf();
        let io = |e| crate::Error::io(&dir, e);
        let mut w = if kind == "row_index" || provenance.contains(&hex) {
            to.objects.random_access_writer().map_err(io)?
        } else {
            to.objects.writer().map_err(io)?
        };
        let n = from.objects.copy_to(&hash, &mut WriteInto(&mut w), &dir)?;
        let (written, _) = w.finish().map_err(io)?;
        if written != hash {
            return Err(ErrorKind::ObjectCorrupt {
                hash: hash.hex(),
                actual: written.hex(),
            }
            .into());
        }
        moved.objects_copied += 1;
        moved.bytes_copied += n;
    }
    Ok(())
}

struct WriteInto<'a>(&'a mut crate::store::objects::ObjectWriter);

impl std::io::Write for WriteInto<'_> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.write(buf)?;
        Ok(buf.len())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

fn copy(from: &Store, to: &Store, leave: &BTreeSet<String>) -> Result<Moved> {
    let mut moved = Moved {
        objects_copied: 0,
        bytes_copied: 0,
        objects_present: 0,
        entries_before: 0,
        entries_copied: 0,
    };
    if let Some(problem) = from.lineage.copy_refused(&to.lineage)? {
        return Err(ErrorKind::MovedOn(problem).into());
    }
    // Objects first, each made durable before the transaction that names it commits (an
    // object nothing names yet is harmless, as after any interrupted command).
    copy_objects(from, to, leave, &mut moved)?;
    let Copied {
        entries_before,
        entries_copied,
    } = from.lineage.copy_into(&to.lineage)?;
    moved.entries_before = entries_before;
    moved.entries_copied = entries_copied;
    Ok(moved)
}

/// Copies the local store `local` into the shared store `shared` (a store folder whose
/// lineage is on a server): what `shared` lacks, when its chain is a beginning of `local`'s.
pub fn publish(local: &Store, shared: &Store) -> Result<Moved> {
    if local.lineage.kind() != crate::store::backend::Kind::Sqlite {
        return Err(ErrorKind::Usage(format!(
            "{} is a shared store itself; publish copies a store of your own (its lineage in its folder) into a shared one",
            local.dir().display()
        ))
        .into());
    }
    if shared.lineage.kind() != crate::store::backend::Kind::Postgres {
        return Err(ErrorKind::Usage(format!(
            "{} keeps its lineage in its folder; publish copies into a shared store (one set up with `sluice setup --lineage-server CONN`)",
            shared.dir().display()
        ))
        .into());
    }
    intact(local, "this store")?;
    // A working copy borrowed in part did not copy some objects; the shared store must still
    // hold them (it is the store they were left in).
    for (hex, _, _) in local.lineage.objects()? {
        if let Ok(hash) = hex.parse::<Hash>() {
            if local.objects.is_left_in_shared(&hash) && !shared.objects.exists(&hash) {
                return Err(ErrorKind::Data(format!(
                    "object {hex} was left in the shared store when this working copy was borrowed in part, but {} does not hold it; publish to the store it was borrowed from",
                    shared.dir().display()
                ))
                .into());
            }
        }
    }
    copy(local, shared, &BTreeSet::new())
}

/// Records in `store` what its trial copy `trial` ([`Store::trial`]) recorded: the objects it
/// wrote (each re-hashed as it is copied), then the trial's lineage in one transaction, as
/// `publish` copies a store. `Ok(None)` when `store` recorded something since the trial was
/// made (another writer): its lineage is then left as it was and the caller records afresh.
pub fn adopt_trial(trial: &Store, store: &Store) -> Result<Option<Moved>> {
    // The objects the store's own lineage names are there already (each was made durable
    // before the transaction that named it): only the trial's new ones are looked at, so a
    // store whose objects are in a bucket is not asked about every object it holds.
    let there: BTreeSet<String> = store
        .lineage
        .objects()?
        .into_iter()
        .map(|(hash, _, _)| hash)
        .collect();
    match copy(trial, store, &there) {
        Ok(moved) => Ok(Some(moved)),
        Err(e) if matches!(e.kind(), ErrorKind::MovedOn(_)) => Ok(None),
        Err(e) => Err(e),
    }
}

/// The objects a working copy of `datasets` does without: the bytes and row indexes (and
/// erased forms) of every version that is neither a version of one of `datasets` nor read,
/// directly or through earlier steps, by a step that made one; an object such a version
/// shares with a kept one is copied.
fn left_out(shared: &Store, datasets: &[String]) -> Result<BTreeSet<String>> {
    let mut kept: HashSet<i64> = HashSet::new();
    for name in datasets {
        let versions = shared.lineage.versions_of(name)?;
        if versions.is_empty() {
            let known: Vec<String> = shared
                .lineage
                .datasets()?
                .into_iter()
                .map(|d| d.name)
                .collect();
            return Err(ErrorKind::Usage(format!(
                "--dataset {name}: the shared store has no dataset of that name; it has: {}",
                known.join(", ")
            ))
            .into());
        }
        for v in versions {
            kept.insert(v.id);
            for step in crate::plan::steps_behind(shared, &v)? {
                for (_, input) in shared.lineage.step_input_versions(step)? {
                    kept.insert(input.id);
                }
                for output in shared.lineage.step_outputs(step)? {
                    kept.insert(output.id);
                }
            }
        }
    }
    let names = |v: &crate::model::Version| -> Vec<String> {
        let mut out = Vec::new();
        for hex in [&v.hash, &v.row_index] {
            out.push(hex.clone());
            if let Ok(h) = hex.parse::<Hash>() {
                out.push(shared.objects.form_of(&h).hex());
            }
        }
        out
    };
    let mut leave = BTreeSet::new();
    let mut needed = HashSet::new();
    for v in shared.lineage.all_versions()? {
        if kept.contains(&v.id) {
            needed.extend(names(&v));
        } else {
            leave.extend(names(&v));
        }
    }
    let unstored = shared.lineage.unstored_objects()?;
    leave.retain(|hex| !needed.contains(hex) && !unstored.contains(hex));
    Ok(leave)
}

/// Copies the shared store `shared` into a new local store in `project/sluice-store`, a
/// working copy whose lineage is in its folder; it verifies intact afterwards. With
/// `datasets`, only their versions' bytes and those of everything they are made from are
/// copied (see [`left_out`]); the working copy's location file names the rest as left in the
/// shared store.
pub fn borrow(shared: &Store, project: &Path, datasets: &[String]) -> Result<(Store, Moved)> {
    if shared.lineage.kind() != crate::store::backend::Kind::Postgres {
        return Err(ErrorKind::Usage(format!(
            "{} keeps its lineage in its folder; borrow copies from a shared store",
            shared.dir().display()
        ))
        .into());
    }
    intact(shared, "the shared store")?;
    let leave = if datasets.is_empty() {
        BTreeSet::new()
    } else {
        left_out(shared, datasets)?
    };
    let mut local = Store::init(project)?;
    let made = local.dir().to_path_buf();
    let copied = mark_left_in(&mut local, shared, datasets, &leave)
        .and_then(|()| copy(shared, &local, &leave))
        .and_then(|moved| {
            local.reload_erased_forms()?;
            intact(&local, "the working copy")?;
            Ok(moved)
        });
    match copied {
        Ok(moved) => Ok((local, moved)),
        Err(e) => {
            // The working copy was made by this command: a failed copy leaves nothing.
            drop(local);
            let _ = std::fs::remove_dir_all(&made);
            Err(e)
        }
    }
}

/// Writes down in `local`'s location file, and tells its objects, what a borrow in part
/// leaves in `shared` (nothing when it borrows everything).
fn mark_left_in(
    local: &mut Store,
    shared: &Store,
    datasets: &[String],
    leave: &BTreeSet<String>,
) -> Result<()> {
    if datasets.is_empty() {
        return Ok(());
    }
    let mut place = crate::store::location::Location::read(local.dir())?;
    place.left_in = Some(crate::store::location::LeftIn {
        shared_store: shared.lineage.describe(),
        datasets: datasets.to_vec(),
        objects: leave.iter().cloned().collect(),
    });
    place.write(local.dir())?;
    let set = leave
        .iter()
        .filter_map(|h| h.parse::<Hash>().ok())
        .collect();
    local.objects.read_left_in(shared.lineage.describe(), set);
    Ok(())
}
