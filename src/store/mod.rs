//! The store: a project's `sluice-store/` folder, holding immutable objects ([`objects`]) and one
//! SQLite lineage database ([`lineage`], with its hash-chained audit log in [`audit`]).
//!
//! A store shared by a team keeps its lineage on a PostgreSQL server instead, named in
//! `location.json` ([`location`]; the backends behind one trait in [`backend`]).
//!
//! This is the only module that touches SQLite or PostgreSQL. Everything that changes the store goes through
//! [`Store::write`], one `BEGIN IMMEDIATE` transaction per command, so concurrent commands wait
//! for each other (busy timeout) and readers never see half a step. Objects are made durable
//! before the transaction that references them commits; an object no row references is harmless.

pub mod audit;
pub mod backend;
pub mod bucket;
pub mod erasure_records;
pub mod lineage;
pub mod location;
pub mod objects;
pub mod pg;
pub mod reclaim;
pub mod roles;
pub mod rows;
pub mod segments;
pub mod sqlite;
pub mod transfer;
pub mod version_writer;

use std::fs;
use std::path::{Path, PathBuf};

use crate::error::{Error, ErrorKind, Result};
pub use lineage::{Lineage, NewStep, NewVersion, Tx};
pub use objects::{FsBackend, ObjectBackend, Objects};

/// The process id in the name of an entry sluice made in `tmp/` (`KIND-PID-...`).
fn leftover_pid(name: &str) -> Option<u32> {
    let mut parts = name.splitn(3, '-');
    let kind = parts.next()?;
    let pid = parts.next()?.parse::<u32>().ok()?;
    parts.next()?;
    [
        "obj",
        "reclaim",
        "exec",
        "replay",
        "revert",
        "compare",
        "recompute",
    ]
    .contains(&kind)
    .then_some(pid)
}

/// Whether process `pid` runs (exists and is not a zombie waiting to be reaped).
fn process_alive(proc_root: &Path, pid: u32) -> bool {
    match fs::read_to_string(proc_root.join(pid.to_string()).join("stat")) {
        // The state follows the command name, which is in parentheses and may hold any byte.
        Ok(stat) => stat
            .rsplit_once(')')
            .and_then(|(_, rest)| rest.trim_start().chars().next())
            .is_none_or(|state| state != 'Z' && state != 'X'),
        Err(_) => proc_root.join(pid.to_string()).exists(),
    }
}

/// The name of the store folder inside a project: visible, so that people see that the
/// project holds copies of its raw data.
pub const STORE_DIR: &str = "sluice-store";
/// The hidden folder name stores had before; recognised and refused with advice to rename it.
pub const LEGACY_STORE_DIR: &str = ".sluice";
/// The lineage database file inside the store folder.
pub const DB_FILE: &str = "lineage.db";

/// An open store.
/// How many of a shared store's objects a joining folder looks for ([`Store::set_up`]).
pub const JOIN_SAMPLE: usize = 3;

/// What `setup` did with the lineage it was given.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SetUp {
    /// A new store, its creation the first audit entry.
    Made,
    /// The folder joined the store already on the server (which holds `entries` audit
    /// entries); nothing was recorded.
    Joined { entries: usize },
}

pub struct Store {
    dir: PathBuf,
    pub objects: Objects,
    pub lineage: Lineage,
}

impl Store {
    /// Creates a new store in `project/sluice-store`. Fails if one is already there.
    pub fn init(project: &Path) -> Result<Store> {
        Store::init_with(project, None)
    }

    /// Creates a new store in `project/sluice-store` whose lineage is on the PostgreSQL server
    /// `lineage` names (a connection string without a password) when given: the folder then
    /// holds the objects and `location.json`. Fails if a store is already there.
    pub fn init_with(project: &Path, lineage: Option<&str>) -> Result<Store> {
        let dir = project.join(STORE_DIR);
        // A location file naming only a bucket is the one `init_recorded_at` wrote first.
        if dir.join(DB_FILE).exists() || location::Location::read(&dir)?.lineage.is_some() {
            return Err(ErrorKind::StoreExists { path: dir }.into());
        }
        // The server is reached (and its schema made) before anything is written here.
        let server = match lineage {
            Some(conn) => Some((conn, Lineage::connect_server(conn)?)),
            None => None,
        };
        fs::create_dir_all(project).map_err(|e| Error::io(project, e))?;
        for sub in [segments::SEGMENTS_DIR, "tmp"] {
            let p = dir.join(sub);
            fs::create_dir_all(&p).map_err(|e| Error::io(&p, e))?;
        }
        let readme = dir.join("README");
        fs::write(
            &readme,
            "This folder is a sluice store: immutable objects named by their BLAKE3 hash, kept\n\
             compressed (Zstandard) in the segment files under segments/, and the lineage\n\
             database lineage.db. It holds copies of raw data, personal data included:\n\
             keep it where only the people allowed to read that data can read it.\n\
             Do not edit anything here by hand; run `sluice verify` to check it.\n",
        )
        .map_err(|e| Error::io(&readme, e))?;
        let lineage = match server {
            None => Lineage::create(&dir.join(DB_FILE))?,
            Some((conn, l)) => {
                // The bucket, when one was named, is already in the file (`init_recorded_at`).
                let mut at = location::Location::read(&dir)?;
                at.lineage = Some(conn.to_string());
                at.write(&dir)?;
                l
            }
        };
        let mut store = Store {
            objects: Objects::new(object_backend(&dir)?),
            lineage,
            dir,
        };
        crate::recompute::on_demand(&mut store);
        Ok(store)
    }

    /// Like [`Store::init_recorded`], for a store whose lineage or objects live elsewhere
    /// (`location.json`, written before anything else; the bucket is checked first).
    pub fn init_recorded_at(
        project: &Path,
        agent: &crate::model::Agent,
        at: &location::Location,
    ) -> Result<Store> {
        Store::set_up(project, agent, at).map(|(store, _)| store)
    }

    /// [`Store::init_recorded_at`], saying whether the folder started a new store or joined
    /// the shared store already on the server (see [`SetUp`]).
    pub fn set_up(
        project: &Path,
        agent: &crate::model::Agent,
        at: &location::Location,
    ) -> Result<(Store, SetUp)> {
        Store::made_at(project, at, || {
            Store::init_recorded_how(project, at.lineage.as_deref(), agent)
        })
    }

    /// Creates a new store whose lineage or objects live where `at` says, recording nothing
    /// (`publish --lineage-server` makes its new shared store so: its history is then the
    /// published store's, entry for entry).
    pub fn init_at(project: &Path, at: &location::Location) -> Result<Store> {
        Store::made_at(project, at, || {
            Store::init_with(project, at.lineage.as_deref())
        })
    }

    /// Runs `make` (which creates the store in `project`) after writing down the bucket `at`
    /// names, checked reachable first; a refusal leaves no store folder behind.
    fn made_at<T>(
        project: &Path,
        at: &location::Location,
        make: impl FnOnce() -> Result<T>,
    ) -> Result<T> {
        if let Some(url) = &at.objects {
            bucket::check_reachable(url).map_err(|e| Error::io(Path::new(url), e))?;
        }
        let dir = project.join(STORE_DIR);
        if dir.join(DB_FILE).exists() {
            return Err(ErrorKind::StoreExists { path: dir }.into());
        }
        // The bucket is written down first, so the new store writes its objects there; the
        // server (checked, and its schema made, by `init_with`) is added after.
        let created = !dir.exists();
        if at.objects.is_some() || at.cache_bytes.is_some() {
            fs::create_dir_all(&dir).map_err(|e| Error::io(&dir, e))?;
            location::Location {
                lineage: None,
                ..at.clone()
            }
            .write(&dir)?;
        }
        let made = make();
        if made.is_err() && created {
            // A refused server (a password in its connection string, a wrong address) leaves
            // nothing behind.
            let _ = fs::remove_dir_all(&dir);
        }
        made
    }

    /// Creates a new store and records its creation as the first audit entry.
    pub fn init_recorded(project: &Path, agent: &crate::model::Agent) -> Result<Store> {
        Store::init_recorded_with(project, None, agent)
    }

    /// [`Store::init_with`], recording the creation as an audit entry (on a server that
    /// already holds a lineage, the folder joins it and records nothing).
    pub fn init_recorded_with(
        project: &Path,
        lineage: Option<&str>,
        agent: &crate::model::Agent,
    ) -> Result<Store> {
        Store::init_recorded_how(project, lineage, agent).map(|(store, _)| store)
    }

    fn init_recorded_how(
        project: &Path,
        lineage: Option<&str>,
        agent: &crate::model::Agent,
    ) -> Result<(Store, SetUp)> {
        let mut store = Store::init_with(project, lineage)?;
        let entries = store.lineage.audit_entries()?.len();
        if entries > 0 {
            store.check_joined_objects()?;
            return Ok((store, SetUp::Joined { entries }));
        }
        let at = crate::clock::now_rfc3339();
        let dir = store.dir.display().to_string();
        store.write(|tx| {
            tx.audit(
                agent,
                "init",
                &dir,
                &serde_json::json!({ "schema_version": lineage::SCHEMA_VERSION, "tool_version": crate::TOOL_VERSION }),
                &at,
            )
        })?;
        Ok((store, SetUp::Made))
    }

    /// A folder joining a shared store must read its objects where the store's other folders
    /// wrote them: some of the objects the lineage records as stored (up to
    /// [`JOIN_SAMPLE`] of them) must be found through this folder's own location, or the
    /// join is refused, naming where the folder looked.
    fn check_joined_objects(&self) -> Result<()> {
        let unstored = self.lineage.unstored_objects()?;
        let sample: Vec<String> = self
            .lineage
            .objects()?
            .into_iter()
            .map(|(hash, _, _)| hash)
            .filter(|h| !unstored.contains(h))
            .take(JOIN_SAMPLE)
            .collect();
        let found = sample
            .iter()
            .filter_map(|h| h.parse::<crate::hash::Hash>().ok())
            .any(|h| self.objects.exists(&h));
        if sample.is_empty() || found {
            return Ok(());
        }
        let place = location::Location::read(&self.dir)?
            .objects
            .unwrap_or_else(|| self.dir.join(segments::SEGMENTS_DIR).display().to_string());
        Err(ErrorKind::Usage(format!(
            "the shared store on {} keeps its objects elsewhere: none of its objects (such as {}) is in {place}; \
             set up this folder with the bucket its other folders name (\"objects\" in their sluice-store/location.json, given as --object-bucket URL)",
            self.lineage.describe(),
            sample[0]
        ))
        .into())
    }

    /// Opens the store whose folder is `dir` (the `sluice-store` folder itself, or a project
    /// folder containing one).
    pub fn open(dir: &Path) -> Result<Store> {
        let mut store = Store::open_plain(dir)?;
        // Whoever reads a recomputable version gets it computed from its recipe: the store
        // asks the engine for a missing object (the one call from the store into the engine).
        crate::recompute::on_demand(&mut store);
        // An erasure stopped after it was recorded is finished first: its old bytes go. (A
        // database too damaged to say opens as it is, for `verify` to name the damage.)
        if store.erasure_unfinished().unwrap_or(false) {
            let sluice = crate::model::Agent::new("sluice", None, "sluice");
            store.remove_erased_bytes(&sluice, &crate::clock::now_rfc3339())?;
        }
        Ok(store)
    }

    /// [`Store::open`] without computing recomputable versions: a missing object stays
    /// missing. The engine's own handle for computing them opens the store this way, so that
    /// computing never asks for more computing.
    pub fn open_plain(dir: &Path) -> Result<Store> {
        legacy_check(dir)?;
        let dir = if dir.file_name().is_some_and(|n| n == STORE_DIR) {
            dir.to_path_buf()
        } else if dir.join(STORE_DIR).is_dir() {
            dir.join(STORE_DIR)
        } else {
            dir.to_path_buf()
        };
        let db = dir.join(DB_FILE);
        let place = location::Location::read(&dir)?;
        if !db.is_file() && place.lineage.is_none() {
            // `sluice setup` takes the project folder, the one that holds `sluice-store`.
            let project = if dir.file_name().is_some_and(|n| n == STORE_DIR) {
                match dir.parent() {
                    Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
                    _ => PathBuf::from("."),
                }
            } else {
                dir.clone()
            };
            return Err(ErrorKind::NoStoreAt { path: dir, project }.into());
        }
        // The store never follows a symbolic link out of `sluice-store/`: a received store whose
        // database, object folder or temporary folder is a link could make sluice read or
        // write anywhere. (`sluice-store` itself may be a link the user made.)
        for part in [
            DB_FILE,
            "objects",
            segments::SEGMENTS_DIR,
            "tmp",
            objects::WRITERS_LOCK,
            bucket::CACHE_DIR,
        ] {
            let p = dir.join(part);
            if fs::symlink_metadata(&p).is_ok_and(|m| m.file_type().is_symlink()) {
                return Err(ErrorKind::Usage(format!(
                    "{} is a symbolic link; a store's lineage.db, segments/, objects/, tmp/ and writers.lock must be inside its folder, never links out of it; replace the link with what it points to, then run `sluice verify`",
                    p.display()
                ))
                .into());
            }
        }
        let lineage = match &place.lineage {
            Some(conn) => Lineage::connect_server(conn)?,
            None => Lineage::open(&db)?,
        };
        let objects = objects_of(&dir, object_backend(&dir)?, &lineage)?;
        Ok(Store {
            objects,
            lineage,
            dir,
        })
    }

    /// Like [`Store::open`], but with another object backend (tests use this to inject faults).
    pub fn open_with_backend(dir: &Path, backend: Box<dyn ObjectBackend>) -> Result<Store> {
        let mut s = Store::open(dir)?;
        s.objects = objects_of(&s.dir, backend, &s.lineage)?;
        crate::recompute::on_demand(&mut s);
        Ok(s)
    }

    /// Finds the store for a command: `explicit` (from --store or SLUICE_STORE) when given,
    /// else the `sluice-store` folder in `start` or the nearest parent that has one. A folder
    /// holding an old hidden `.sluice` store is refused with the advice to rename it.
    pub fn discover(explicit: Option<&Path>, start: &Path) -> Result<Store> {
        if let Some(p) = explicit {
            return Store::open(p);
        }
        let mut cur = Some(start);
        while let Some(d) = cur {
            if d.join(STORE_DIR).join(DB_FILE).is_file()
                || d.join(STORE_DIR).join(location::LOCATION_FILE).is_file()
            {
                return Store::open(&d.join(STORE_DIR));
            }
            legacy_check(d)?;
            cur = d.parent();
        }
        Err(ErrorKind::NoStore {
            start: start.to_path_buf(),
        }
        .into())
    }

    /// The bucket URL the store keeps its objects in (`location.json`), when it does.
    pub fn objects_bucket(&self) -> Result<Option<String>> {
        Ok(location::Location::read(&self.dir)?.objects)
    }

    /// Whether the store keeps `v`'s bytes (and row index), as recorded: the one answer to
    /// "is this version's content stored?". A version recorded as recomputable whose bytes
    /// are identical to a stored version's counts as stored. Its bytes can still be read when
    /// it is not: the engine computes them again (`crate::recompute`).
    pub fn bytes_stored(&self, v: &crate::model::Version) -> Result<bool> {
        if v.storage.holds_bytes() {
            return Ok(true);
        }
        self.lineage.hash_stored(&v.hash)
    }

    /// The `sluice-store` folder.
    /// Reads again which objects are erased versions' own, and their erased forms, after the
    /// lineage gained erasure records from a copy (`borrow`), so that readers get the forms.
    pub fn reload_erased_forms(&mut self) -> Result<()> {
        self.objects.read_erased_forms(erased_forms(&self.lineage)?);
        Ok(())
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Starts staging new objects in a fresh folder `tmp/WHAT-PID-NANOS` (see
    /// [`Objects::begin_stage`]); returns the folder. The caller ends it with
    /// `objects.publish_stage()` or `objects.discard_stage()`.
    pub fn begin_stage(&mut self, what: &str) -> Result<PathBuf> {
        let dir = self.dir.join("tmp").join(format!(
            "{what}-{}-{}",
            std::process::id(),
            std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |d| d.as_nanos())
        ));
        self.objects
            .begin_stage(dir.clone())
            .map_err(|e| crate::Error::io(&dir, e))?;
        Ok(dir)
    }

    /// A trial copy of this store, for work that must be seen to succeed before it is recorded:
    /// the database copied as it is now into a fresh folder `tmp/replay-PID-NANOS/`, objects
    /// read from this store, new ones staged in that folder and never published. Whatever is
    /// recorded in the trial goes when the folder is removed ([`Store::end_trial`]; an
    /// interrupted command's trial folder is swept like its other leftovers).
    pub fn trial(&self) -> Result<Store> {
        let dir = self.dir.join("tmp").join(format!(
            "replay-{}-{}",
            std::process::id(),
            std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |d| d.as_nanos())
        ));
        fs::create_dir_all(dir.join("tmp")).map_err(|e| Error::io(&dir, e))?;
        let db = dir.join(DB_FILE);
        self.lineage.copy_to(&db)?;
        let lineage = Lineage::open(&db)?;
        let objects = objects_of(&self.dir, object_backend(&self.dir)?, &lineage)?;
        let mut trial = Store {
            objects,
            lineage,
            dir,
        };
        let stage = trial.dir.join("stage");
        trial
            .objects
            .begin_stage(stage.clone())
            .map_err(|e| Error::io(&stage, e))?;
        Ok(trial)
    }

    /// Ends a trial made by [`Store::trial`]: its folder, database and staged objects removed.
    pub fn end_trial(mut self) {
        self.objects.discard_stage();
        let dir = self.dir.clone();
        drop(self);
        let _ = fs::remove_dir_all(dir);
    }

    /// Runs `f` in one write transaction; commits when it returns `Ok`, rolls back otherwise.
    /// Every command that records something comes here, so it first clears what interrupted
    /// commands left in `tmp/` ([`Store::sweep_tmp`]).
    pub fn write<T>(&mut self, f: impl FnOnce(&mut Tx<'_>) -> Result<T>) -> Result<T> {
        self.sweep_tmp();
        let objects = &self.objects;
        self.lineage.write(|tx| {
            let out = f(tx)?;
            // Last, inside the transaction and so in the writers' order: the objects it names
            // that this process found or put in a shared place are still there, and `reclaim`
            // (which removes only inside a write transaction of its own) cannot remove them
            // before this one commits.
            objects.confirm_present(tx.objects_named())?;
            Ok(out)
        })
    }

    /// Removes the temporary files and folders of commands that are no longer running: every
    /// name sluice gives in `tmp/` is `KIND-PID-...` (`obj-` for segments being written,
    /// `reclaim-` for the segment `reclaim` packs, `exec-`, `replay-`, `revert-`, `compare-` for folders), and an entry is removed only when
    /// its process is gone (no `/proc/PID`, or a zombie), so a concurrent writer's files are
    /// never touched. Where `/proc` cannot tell, nothing is removed. Best effort: a failure to
    /// remove is left for `verify` to count. Returns how many entries were removed.
    pub fn sweep_tmp(&self) -> u64 {
        let proc_root = Path::new("/proc");
        if !proc_root.join("self").exists() {
            return 0;
        }
        let Ok(entries) = fs::read_dir(self.dir.join("tmp")) else {
            return 0;
        };
        let me = std::process::id();
        let mut removed = 0;
        for e in entries.flatten() {
            let name = e.file_name();
            let Some(pid) = name.to_str().and_then(leftover_pid) else {
                continue;
            };
            if pid == me || process_alive(proc_root, pid) {
                continue;
            }
            let path = e.path();
            let gone = match e.file_type() {
                Ok(t) if t.is_dir() => fs::remove_dir_all(&path),
                Ok(_) => fs::remove_file(&path),
                Err(err) => Err(err),
            };
            if gone.is_ok() {
                removed += 1;
            }
        }
        removed
    }
}

/// The erased forms of the versions erasure orders reached, as the object reader takes them.
/// The store's objects through `backend`, reading erased versions' erased forms and knowing
/// which objects a working copy borrowed in part left in the shared store.
fn objects_of(dir: &Path, backend: Box<dyn ObjectBackend>, lineage: &Lineage) -> Result<Objects> {
    let mut objects = Objects::new(backend);
    objects.read_erased_forms(erased_forms(lineage)?);
    if let Some(left) = location::Location::read(dir)?.left_in {
        let mut set = std::collections::HashSet::new();
        for hex in &left.objects {
            set.insert(hex.parse::<crate::hash::Hash>().map_err(|_| {
                Error::from(ErrorKind::Usage(format!(
                    "{}: \"left_in\" names {hex:?}, which is not a BLAKE3 hash",
                    dir.join(location::LOCATION_FILE).display()
                )))
            })?);
        }
        objects.read_left_in(left.shared_store, set);
    }
    Ok(objects)
}

fn erased_forms(
    lineage: &Lineage,
) -> Result<std::collections::HashMap<crate::hash::Hash, crate::hash::Hash>> {
    // A database too damaged to say (a table dropped) gives none: the store still opens,
    // and `verify` names the damage; the erased versions' old bytes are gone from the
    // segments, so nothing erased can be read back through it.
    let mut out = std::collections::HashMap::new();
    for (own, form) in lineage.erased_forms().unwrap_or_default() {
        if let (Ok(a), Ok(b)) = (own.parse(), form.parse()) {
            out.insert(a, b);
        }
    }
    Ok(out)
}

/// The object backend of the store in `dir`: the bucket `location.json` names, else the
/// store's own segments.
pub fn object_backend(dir: &Path) -> Result<Box<dyn ObjectBackend>> {
    match location::Location::read(dir)? {
        location::Location {
            objects: Some(url),
            cache_bytes,
            ..
        } => Ok(Box::new(
            bucket::BucketBackend::new(dir, &url, cache_bytes)
                .map_err(|e| Error::io(&dir.join(location::LOCATION_FILE), e))?,
        )),
        _ => Ok(Box::new(FsBackend::new(dir))),
    }
}

/// Refuses a store in the old hidden folder (`dir` is that folder, or a project folder holding
/// it and no `sluice-store`), saying how to rename it.
fn legacy_check(dir: &Path) -> Result<()> {
    let (legacy, project) = if dir.file_name().is_some_and(|n| n == LEGACY_STORE_DIR) {
        (dir.to_path_buf(), dir.parent().map(Path::to_path_buf))
    } else if !dir.join(STORE_DIR).exists() && dir.join(LEGACY_STORE_DIR).join(DB_FILE).is_file() {
        (dir.join(LEGACY_STORE_DIR), Some(dir.to_path_buf()))
    } else {
        return Ok(());
    };
    if !legacy.join(DB_FILE).is_file() {
        return Ok(());
    }
    let project = project
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or_else(|| PathBuf::from("."));
    Err(ErrorKind::LegacyStore {
        path: legacy,
        project,
    }
    .into())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The sweep reads the process id out of every name the object writer and `reclaim` give
    /// their segments in `tmp/`, so it can tell a dead writer's file from a live one's.
    #[test]
    fn the_sweep_reads_the_pid_of_every_temporary_segment_name() {
        let me = std::process::id();
        for kind in ["obj", "reclaim"] {
            let name = objects::temp_name(kind);
            assert_eq!(leftover_pid(&name), Some(me), "{name}");
        }
        assert_eq!(leftover_pid("obj-12-0-000000001.part"), Some(12));
        assert_eq!(leftover_pid("notes-12-0.txt"), None);
        assert_eq!(leftover_pid("obj-x-0.part"), None);
        assert_eq!(leftover_pid("reclaim-12"), None);
    }
}
