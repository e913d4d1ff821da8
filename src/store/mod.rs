//! The store: a project's `.sluice/` folder, holding immutable objects ([`objects`]) and one
//! SQLite lineage database ([`lineage`], with its hash-chained audit log in [`audit`]).
//!
//! This is the only module that touches SQLite. Everything that changes the store goes through
//! [`Store::write`], one `BEGIN IMMEDIATE` transaction per command, so concurrent commands wait
//! for each other (busy timeout) and readers never see half a step. Objects are made durable
//! before the transaction that references them commits; an object no row references is harmless.

pub mod audit;
pub mod lineage;
pub mod objects;
pub mod reclaim;
pub mod segments;

use std::fs;
use std::path::{Path, PathBuf};

use crate::error::{Error, ErrorKind, Result};
pub use lineage::{Lineage, NewStep, NewVersion, Tx};
pub use objects::{FsBackend, ObjectBackend, Objects};

/// The name of the store folder inside a project.
pub const STORE_DIR: &str = ".sluice";
/// The lineage database file inside the store folder.
pub const DB_FILE: &str = "lineage.db";

/// An open store.
pub struct Store {
    dir: PathBuf,
    pub objects: Objects,
    pub lineage: Lineage,
}

impl Store {
    /// Creates a new store in `project/.sluice`. Fails if one is already there.
    pub fn init(project: &Path) -> Result<Store> {
        let dir = project.join(STORE_DIR);
        if dir.join(DB_FILE).exists() {
            return Err(ErrorKind::StoreExists { path: dir }.into());
        }
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
        let lineage = Lineage::create(&dir.join(DB_FILE))?;
        Ok(Store {
            objects: Objects::new(Box::new(FsBackend::new(&dir))),
            lineage,
            dir,
        })
    }

    /// Creates a new store and records its creation as the first audit entry.
    pub fn init_recorded(project: &Path, agent: &crate::model::Agent) -> Result<Store> {
        let mut store = Store::init(project)?;
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
        Ok(store)
    }

    /// Opens the store whose folder is `dir` (the `.sluice` folder itself, or a project folder
    /// containing one).
    pub fn open(dir: &Path) -> Result<Store> {
        let dir = if dir.file_name().is_some_and(|n| n == STORE_DIR) {
            dir.to_path_buf()
        } else if dir.join(STORE_DIR).is_dir() {
            dir.join(STORE_DIR)
        } else {
            dir.to_path_buf()
        };
        let db = dir.join(DB_FILE);
        if !db.is_file() {
            // `sluice init` takes the project folder, the one that holds `.sluice`.
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
        // The store never follows a symbolic link out of `.sluice/`: a received store whose
        // database, object folder or temporary folder is a link could make sluice read or
        // write anywhere. (`.sluice` itself may be a link the user made.)
        for part in [
            DB_FILE,
            "objects",
            segments::SEGMENTS_DIR,
            "tmp",
            objects::WRITERS_LOCK,
        ] {
            let p = dir.join(part);
            if fs::symlink_metadata(&p).is_ok_and(|m| m.file_type().is_symlink()) {
                return Err(ErrorKind::Database(format!(
                    "{} is a symbolic link; a store's lineage.db, segments/, objects/, tmp/ and writers.lock must be inside its folder, never links out of it; replace the link with what it points to, then run `sluice verify`",
                    p.display()
                ))
                .into());
            }
        }
        let lineage = Lineage::open(&db)?;
        Ok(Store {
            objects: Objects::new(Box::new(FsBackend::new(&dir))),
            lineage,
            dir,
        })
    }

    /// Like [`Store::open`], but with another object backend (tests use this to inject faults).
    pub fn open_with_backend(dir: &Path, backend: Box<dyn ObjectBackend>) -> Result<Store> {
        let mut s = Store::open(dir)?;
        s.objects = Objects::new(backend);
        Ok(s)
    }

    /// Finds the store for a command: `explicit` (from --store or SLUICE_STORE) when given,
    /// else the nearest `.sluice` folder in `start` or a parent of it.
    pub fn discover(explicit: Option<&Path>, start: &Path) -> Result<Store> {
        if let Some(p) = explicit {
            return Store::open(p);
        }
        let mut cur = Some(start);
        while let Some(d) = cur {
            if d.join(STORE_DIR).join(DB_FILE).is_file() {
                return Store::open(&d.join(STORE_DIR));
            }
            cur = d.parent();
        }
        Err(ErrorKind::NoStore {
            start: start.to_path_buf(),
        }
        .into())
    }

    /// The `.sluice` folder.
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

    /// Runs `f` in one write transaction; commits when it returns `Ok`, rolls back otherwise.
    pub fn write<T>(&mut self, f: impl FnOnce(&mut Tx<'_>) -> Result<T>) -> Result<T> {
        self.lineage.write(f)
    }
}
