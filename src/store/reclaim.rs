//! `reclaim`: giving back the space of objects nothing refers to (left by interrupted or
//! failed commands), packing small segments together and moving the loose objects of the
//! earlier layout into a segment. Recorded in the audit chain.
//!
//! Safe against a concurrent writer: a command that writes objects holds the writers' lock
//! (`writers.lock`) shared from its first object until it ends, so its objects cannot be taken
//! for garbage between their writing and the transaction that references them; `reclaim` takes
//! that lock exclusively, then works inside one `BEGIN IMMEDIATE` transaction, so no step is
//! recorded while it decides what is referenced. Every object it keeps is re-hashed and made
//! durable in its new segment before any old byte is removed: a `reclaim` killed at any point
//! leaves every referenced object readable (at worst twice, until the next `reclaim`).
//!
//! A store whose objects are in a bucket may have writers on other machines, which the local
//! lock does not reach. There `reclaim` removes the bucket's unreferenced objects inside its
//! write transaction (writers are ordered by it: SQLite's write lock, the server's advisory
//! lock), and every writer checks, inside its own transaction, that the objects it uploaded or
//! found are still in the bucket (`ObjectBackend::confirm_present`): an object removed before
//! that check fails the writer's command, which records nothing; one found by it cannot be
//! removed before the writer commits, and is referenced after.

use std::collections::HashSet;

use super::objects::{FsBackend, Reclaimed};
use super::Store;
use crate::error::{Error, Result};
use crate::hash::Hash;
use crate::model::Agent;

impl Store {
    /// Reclaims unreferenced space (see the module documentation); `at` is the audit time.
    pub fn reclaim(&mut self, agent: &Agent, at: &str) -> Result<Reclaimed> {
        let backend = FsBackend::new(self.dir());
        let lock_path = self.dir().join(super::objects::WRITERS_LOCK);
        let _guard = backend.exclusive().map_err(|e| Error::io(&lock_path, e))?;
        let dir = self.dir().to_path_buf();
        self.sweep_tmp();
        let objects = &self.objects;
        self.lineage.write(|tx| {
            let mut live = HashSet::new();
            for hex in tx.object_hashes()? {
                if let Ok(h) = hex.parse::<Hash>() {
                    live.insert(h);
                }
            }
            let mut done = backend
                .reclaim(&live)
                .map_err(|e| Error::io(&dir.join(super::segments::SEGMENTS_DIR), e))?;
            // A bucket's objects nothing refers to: removed inside this transaction, so that
            // no writer commits meanwhile; a writer that relied on one of them finds it gone
            // when it checks, inside its own transaction, and records nothing.
            let (n, bytes) = objects
                .backend()
                .remove_unreferenced(&live)
                .map_err(|e| Error::io(&dir.join(super::location::LOCATION_FILE), e))?;
            done.bucket_objects_removed = n;
            done.bucket_bytes_removed = bytes;
            let details = serde_json::to_value(&done).unwrap_or(serde_json::Value::Null);
            tx.audit(agent, "reclaim", &dir.display().to_string(), &details, at)?;
            Ok(done)
        })
    }
}
