//! `transfer`: every stored object copied from where the store keeps its objects now (its own
//! segments, or a bucket) to the other place, each one re-hashed as it is read and read back
//! from the new place and re-hashed again, before `location.json` is switched to it; recorded
//! in the audit chain (action `transfer`). The old copy is left as it was.
//!
//! Done under the writers' lock, held exclusively (so no command is writing objects to the old
//! place meanwhile), and inside one write transaction (so no step is recorded meanwhile). Killed
//! before the switch, the store reads from the old place as before, the new place holding
//! unreferenced copies; the switch is one rename of `location.json`.

use std::io::{self, Read, Write};
use std::path::Path;

use super::bucket::{self, BucketBackend};
use super::location::Location;
use super::objects::{FsBackend, ObjectBackend};
use super::Store;
use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::Agent;

/// What `transfer` did.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Transferred {
    pub from: String,
    pub to: String,
    /// Objects copied (each re-hashed when read and again from the new place).
    pub objects: u64,
    /// Objects the new place already held, re-hashed there.
    pub already_there: u64,
    /// Uncompressed bytes of all of them.
    pub bytes: u64,
}

/// Hashes what `r` gives, writing it to `out` when there is one.
fn hash_through(r: &mut dyn Read, mut out: Option<&mut dyn Write>) -> io::Result<(Hash, u64)> {
    let mut hasher = blake3::Hasher::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut n = 0u64;
    loop {
        let k = r.read(&mut buf)?;
        if k == 0 {
            break;
        }
        hasher.update(&buf[..k]);
        if let Some(o) = out.as_mut() {
            o.write_all(&buf[..k])?;
        }
        n += k as u64;
    }
    Ok((Hash::from_bytes(*hasher.finalize().as_bytes()), n))
}

fn describe_place(dir: &Path, loc: &Location) -> String {
    match &loc.objects {
        Some(url) => url.clone(),
        None => dir
            .join(super::segments::SEGMENTS_DIR)
            .display()
            .to_string(),
    }
}

impl Store {
    /// Copies every stored object into the bucket at `to_bucket`, or (`None`) from the bucket
    /// into the store's own folder, then reads objects from there (see the module
    /// documentation); `at` is the audit time.
    pub fn transfer(
        &mut self,
        to_bucket: Option<&str>,
        agent: &Agent,
        at: &str,
    ) -> Result<Transferred> {
        let dir = self.dir().to_path_buf();
        let loc = Location::read(&dir)?;
        match (to_bucket, loc.objects.as_deref()) {
            (None, None) => {
                return Err(ErrorKind::Usage(
                    "the store's objects are already in its own folder; to copy them into a bucket, name it with `--to-bucket URL`".into(),
                )
                .into())
            }
            (Some(u), Some(cur)) if u.trim_end_matches('/') == cur.trim_end_matches('/') => {
                return Err(ErrorKind::Usage(format!(
                    "the store's objects are already in the bucket {cur}"
                ))
                .into())
            }
            _ => {}
        }
        if let Some(u) = to_bucket {
            bucket::check_reachable(u).map_err(|e| Error::io(Path::new(u), e))?;
        }
        let to: Box<dyn ObjectBackend> = match to_bucket {
            Some(u) => Box::new(
                BucketBackend::new(&dir, u, loc.cache_bytes)
                    .map_err(|e| Error::io(Path::new(u), e))?,
            ),
            None => Box::new(FsBackend::new(&dir)),
        };
        let from_name = describe_place(&dir, &loc);
        let mut new_loc = loc.clone();
        new_loc.objects = to_bucket.map(|u| u.trim_end_matches('/').to_string());
        let to_name = describe_place(&dir, &new_loc);
        let lock_path = dir.join(super::objects::WRITERS_LOCK);
        to.hold_exclusively()
            .map_err(|e| Error::io(&lock_path, e))?;
        self.sweep_tmp();
        let from = self.objects.backend();
        let objects = &self.objects;
        let mut done = Transferred {
            from: from_name.clone(),
            to: to_name.clone(),
            objects: 0,
            already_there: 0,
            bytes: 0,
        };
        let switched = self.lineage.write(|tx| {
            for hex in tx.object_hashes()? {
                let Ok(h) = hex.parse::<Hash>() else {
                    continue;
                };
                // An erased version's own bytes and row index are gone; its erased forms are
                // objects of their own (listed too), read in their place.
                if objects.is_erased(&h) {
                    continue;
                }
                let at_from = |e: io::Error| Error::io(&from.describe(&h), e);
                let at_to = |e: io::Error| Error::io(&to.describe(&h), e);
                if to.exists(&h) {
                    done.already_there += 1;
                } else {
                    let mut r = from.open(&h).map_err(at_from)?;
                    let mut temp = to.create_temp().map_err(at_to)?;
                    let (actual, _) = hash_through(&mut r, Some(&mut temp)).map_err(at_from)?;
                    if actual != h {
                        return Err(ErrorKind::ObjectCorrupt {
                            hash: h.hex(),
                            actual: actual.hex(),
                        }
                        .into());
                    }
                    temp.persist(&h).map_err(at_to)?;
                    done.objects += 1;
                }
                // Read back from the new place and re-hashed there.
                let mut r = to.open(&h).map_err(at_to)?;
                let (actual, n) = hash_through(&mut r, None).map_err(at_to)?;
                if actual != h {
                    return Err(ErrorKind::ObjectCorrupt {
                        hash: h.hex(),
                        actual: actual.hex(),
                    }
                    .into());
                }
                done.bytes += n;
            }
            new_loc.write(&dir)?;
            let details = serde_json::to_value(&done).unwrap_or(serde_json::Value::Null);
            tx.audit(agent, "transfer", &dir.display().to_string(), &details, at)
                .inspect_err(|_| {
                    // Not recorded: the store goes on reading from the old place.
                    let _ = loc.write(&dir);
                })?;
            Ok(())
        });
        if let Err(e) = switched {
            let _ = loc.write(&dir);
            return Err(e);
        }
        // This handle goes on reading from the old place, which still holds every object; a
        // store opened from now on reads from the new one.
        Ok(done)
    }
}
