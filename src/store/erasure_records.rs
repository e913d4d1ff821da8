//! The database records of erasure orders (schema 7, `erasure_orders` and `erased_versions`):
//! every query erasure needs, kept together here, and the purge of values the database holds
//! about erased cells (column profiles' minimum and maximum, cell notes), then the database
//! file rebuilt so that no free page or write-ahead log frame keeps them.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use rusqlite::{params, OptionalExtension};

use super::audit::Key;
use super::lineage::{db_err, Lineage, Tx};
use crate::error::Result;
use crate::model::Agent;

/// One version an order reached, as recorded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ErasedVersion {
    pub order_id: i64,
    pub version_id: i64,
    /// The cell commitment root over the version's cells before the erasure (64 hex digits).
    pub root: String,
    /// The punctured salt tree (`commitment::Salts::to_bytes`).
    pub salts: Vec<u8>,
    /// Each erased cell's number (u64 LE) and leaf (32 bytes), in cell order.
    pub kept: Vec<u8>,
    /// Summary cells kept as published, no longer recomputable: cell numbers (u64 LE).
    pub marked: Vec<u8>,
    pub n_erased: u64,
    /// The objects holding the version's bytes and row index with the erased cells empty.
    pub stored_hash: String,
    pub stored_row_index: String,
}

/// An order as recorded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ErasureOrder {
    pub id: i64,
    pub version_id: i64,
    /// Canonical JSON of what the order named, without values.
    pub names: String,
    pub request: String,
    pub agent: String,
    pub ordered_at: String,
    pub n_cells: u64,
}

/// An order to record.
pub struct NewOrder<'a> {
    pub version_id: i64,
    pub names: &'a serde_json::Value,
    pub request: &'a str,
    pub agent: &'a Agent,
    pub at: &'a str,
    pub n_cells: u64,
}

fn erased_from_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<ErasedVersion> {
    Ok(ErasedVersion {
        order_id: r.get(0)?,
        version_id: r.get(1)?,
        root: r.get(2)?,
        salts: r.get(3)?,
        kept: r.get(4)?,
        marked: r.get(5)?,
        n_erased: r.get::<_, i64>(6)? as u64,
        stored_hash: r.get(7)?,
        stored_row_index: r.get(8)?,
    })
}

impl Lineage {
    /// Every erased version of every order, in order of orders then versions.
    pub fn erased_versions(&self) -> Result<Vec<ErasedVersion>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT order_id, version_id, root, salts, kept, marked, n_erased,
                        stored_hash, stored_row_index
                 FROM erased_versions ORDER BY order_id, version_id",
            )
            .map_err(db_err)?;
        let rows = st.query_map([], erased_from_row).map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// The latest erasure of one version, if any order reached it.
    pub fn erasure_of_version(&self, version_id: i64) -> Result<Option<ErasedVersion>> {
        self.conn
            .query_row(
                "SELECT order_id, version_id, root, salts, kept, marked, n_erased,
                        stored_hash, stored_row_index
                 FROM erased_versions WHERE version_id = ?1 ORDER BY order_id DESC LIMIT 1",
                params![version_id],
                erased_from_row,
            )
            .optional()
            .map_err(db_err)
    }

    /// Every order carried out, oldest first.
    pub fn erasure_orders(&self) -> Result<Vec<ErasureOrder>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT o.id, o.version_id, o.names, o.request, a.identity, o.ordered_at, o.n_cells
                 FROM erasure_orders o JOIN agents a ON a.id = o.agent_id ORDER BY o.id",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok(ErasureOrder {
                    id: r.get(0)?,
                    version_id: r.get(1)?,
                    names: r.get(2)?,
                    request: r.get(3)?,
                    agent: r.get(4)?,
                    ordered_at: r.get(5)?,
                    n_cells: r.get::<_, i64>(6)? as u64,
                })
            })
            .map_err(db_err)?;
        rows.collect::<rusqlite::Result<Vec<_>>>().map_err(db_err)
    }

    /// For the object reader: each erased version's own object names (bytes, row index)
    /// mapped to the objects that hold its erased form, the latest order's.
    pub fn erased_forms(&self) -> Result<HashMap<String, String>> {
        let mut st = self
            .conn
            .prepare(
                "SELECT v.hash, v.row_index, e.stored_hash, e.stored_row_index
                 FROM erased_versions e JOIN versions v ON v.id = e.version_id
                 ORDER BY e.order_id",
            )
            .map_err(db_err)?;
        let rows = st
            .query_map([], |r| {
                Ok((
                    r.get::<_, String>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, String>(2)?,
                    r.get::<_, String>(3)?,
                ))
            })
            .map_err(db_err)?;
        let mut out = HashMap::new();
        for row in rows {
            let (h, ix, sh, six) = row.map_err(db_err)?;
            // A version whose erased cells were already empty (or that only has summary
            // cells kept) keeps its own objects.
            if h != sh {
                out.insert(h, sh);
            }
            if ix != six {
                out.insert(ix, six);
            }
        }
        Ok(out)
    }

    /// Rebuilds the database file (`VACUUM`: every page written afresh, free pages gone) and
    /// empties the write-ahead log into it, truncating the log to nothing, so that values the
    /// last transactions overwrote are in no page of either file.
    pub fn rebuild_file(&self) -> Result<()> {
        self.conn.execute_batch("VACUUM").map_err(db_err)?;
        self.conn
            .query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |r| {
                r.get::<_, i64>(0)
            })
            .map_err(db_err)?;
        Ok(())
    }
}

impl Tx<'_> {
    /// Refuses to record a version whose bytes are those of a version an erasure order
    /// erased (the same file received again, or computed again from it): that would bring
    /// the erased values back under a name the store reads as erased.
    pub fn refuse_erased_bytes(&self, hash: &str) -> Result<()> {
        let hit: Option<(String, i64, i64)> = self
            .tx
            .query_row(
                "SELECT d.name, v.seq, e.order_id FROM erased_versions e
                 JOIN versions v ON v.id = e.version_id JOIN datasets d ON d.id = v.dataset_id
                 WHERE v.hash = ?1 AND e.stored_hash <> v.hash LIMIT 1",
                params![hash],
                |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
            )
            .optional()
            .map_err(db_err)?;
        match hit {
            None => Ok(()),
            Some((name, seq, order)) => Err(crate::Error::from(crate::error::ErrorKind::Data(format!(
                "these bytes are those of {name}:v{seq}, whose cells erasure order {order} erased; recording them again would bring the erased values back, so they are refused (remove the erased data from the file first)"
            )))),
        }
    }

    /// Records an order; returns its id. Its row is committed to by the next audit entry.
    pub fn insert_erasure_order(&mut self, o: &NewOrder<'_>) -> Result<i64> {
        let agent_id = self.agent_id(o.agent)?;
        self.tx
            .execute(
                "INSERT INTO erasure_orders (version_id, names, request, agent_id, ordered_at, n_cells)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
                params![
                    o.version_id,
                    o.names.to_string(),
                    o.request,
                    agent_id,
                    o.at,
                    o.n_cells as i64
                ],
            )
            .map_err(db_err)?;
        let id = self.tx.last_insert_rowid();
        self.wrote("erasure_orders", "id", Key::Int(id));
        Ok(id)
    }

    /// Records one erased version of an order.
    pub fn insert_erased_version(&mut self, e: &ErasedVersion) -> Result<()> {
        self.tx
            .execute(
                "INSERT INTO erased_versions (order_id, version_id, root, salts, kept, marked,
                     n_erased, stored_hash, stored_row_index)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
                params![
                    e.order_id,
                    e.version_id,
                    e.root,
                    e.salts,
                    e.kept,
                    e.marked,
                    e.n_erased as i64,
                    e.stored_hash,
                    e.stored_row_index
                ],
            )
            .map_err(db_err)?;
        self.wrote("erased_versions", "order_id", Key::Int(e.order_id));
        Ok(())
    }

    /// Overwrites what the database holds about a version's erased cells: a column profile's
    /// minimum or maximum that is one of the column's erased values becomes NULL (`erased`:
    /// column position -> the values erased there), and the cell notes of erased cells
    /// (`cells`: 0-based row and column name) are deleted. Returns how many fields and notes
    /// went.
    pub fn purge_erased_values(
        &mut self,
        version_id: i64,
        erased: &BTreeMap<usize, BTreeSet<Vec<u8>>>,
        cells: &[(u64, String)],
    ) -> Result<u64> {
        let mut n = 0u64;
        let mut changed_profile = false;
        for (&col, values) in erased {
            let row: Option<(Option<String>, Option<String>)> = self
                .tx
                .query_row(
                    "SELECT min_value, max_value FROM column_profiles
                     WHERE version_id = ?1 AND col_idx = ?2",
                    params![version_id, col as i64],
                    |r| Ok((r.get(0)?, r.get(1)?)),
                )
                .optional()
                .map_err(db_err)?;
            let Some((min, max)) = row else { continue };
            let hit =
                |v: &Option<String>| v.as_ref().is_some_and(|s| values.contains(s.as_bytes()));
            if hit(&min) {
                self.tx
                    .execute(
                        "UPDATE column_profiles SET min_value = NULL
                         WHERE version_id = ?1 AND col_idx = ?2",
                        params![version_id, col as i64],
                    )
                    .map_err(db_err)?;
                n += 1;
                changed_profile = true;
            }
            if hit(&max) {
                self.tx
                    .execute(
                        "UPDATE column_profiles SET max_value = NULL
                         WHERE version_id = ?1 AND col_idx = ?2",
                        params![version_id, col as i64],
                    )
                    .map_err(db_err)?;
                n += 1;
                changed_profile = true;
            }
        }
        if changed_profile {
            self.recommit_whole("column_profiles", "version_id")?;
        }
        let mut changed_notes = false;
        for (row, column) in cells {
            let gone = self
                .tx
                .execute(
                    "DELETE FROM cell_notes WHERE output_id = ?1 AND row_idx = ?2 AND column_name = ?3",
                    params![version_id, *row as i64, column],
                )
                .map_err(db_err)?;
            if gone > 0 {
                n += gone as u64;
                changed_notes = true;
            }
        }
        if changed_notes {
            self.recommit_whole("cell_notes", "output_id")?;
        }
        Ok(n)
    }

    /// Commits anew to every row of a table whose fields the erasure overwrote: one selector
    /// over the whole range of its key, which covers (and so, for `verify`, supersedes) every
    /// earlier entry's selector of that table, however their ranges were merged.
    fn recommit_whole(&mut self, table: &'static str, by: &'static str) -> Result<()> {
        let sql = match table {
            "column_profiles" => "SELECT min(version_id), max(version_id) FROM column_profiles",
            _ => "SELECT min(output_id), max(output_id) FROM cell_notes",
        };
        let (lo, hi): (Option<i64>, Option<i64>) = self
            .tx
            .query_row(sql, [], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(db_err)?;
        if let (Some(lo), Some(hi)) = (lo, hi) {
            self.wrote_range(table, by, Key::Int(lo), Key::Int(hi));
        }
        Ok(())
    }
}

impl super::Store {
    /// Whether an erasure was recorded but the old bytes of a version it reached are still
    /// in a segment (or a loose object): the erasing command was stopped after its
    /// transaction committed.
    pub fn erasure_unfinished(&self) -> Result<bool> {
        // A database too damaged to say is left for `verify` to name.
        let forms = self.lineage.erased_forms().unwrap_or_default();
        if forms.is_empty() {
            return Ok(false);
        }
        let backend = super::FsBackend::new(self.dir());
        Ok(forms.keys().any(|own| {
            own.parse::<crate::hash::Hash>()
                .is_ok_and(|h| super::ObjectBackend::exists(&backend, &h))
        }))
    }

    /// Removes the old bytes of every version an erasure reached: every segment holding
    /// one of them is written again without it (as `reclaim` does, with the erased objects
    /// left out of what is kept, under the writers' lock and recorded as a `reclaim` entry),
    /// then the database file is rebuilt and its write-ahead log truncated
    /// ([`Lineage::rebuild_file`]) and finished commands' temporary files are swept.
    pub fn remove_erased_bytes(
        &mut self,
        agent: &Agent,
        at: &str,
    ) -> Result<super::objects::Reclaimed> {
        let erased: std::collections::HashSet<String> =
            self.lineage.erased_forms()?.into_keys().collect();
        // Every object this process wrote is referenced now; the lock is taken exclusively.
        self.objects.release_writing();
        let backend = super::FsBackend::new(self.dir());
        let lock_path = self.dir().join(super::objects::WRITERS_LOCK);
        let guard = backend
            .exclusive()
            .map_err(|e| crate::Error::io(&lock_path, e))?;
        let dir = self.dir().to_path_buf();
        let done = self.write(|tx| {
            let mut live = std::collections::HashSet::new();
            for hex in tx.object_hashes()? {
                if erased.contains(&hex) {
                    continue;
                }
                if let Ok(h) = hex.parse::<crate::hash::Hash>() {
                    live.insert(h);
                }
            }
            let done = backend
                .reclaim(&live)
                .map_err(|e| crate::Error::io(&dir.join(super::segments::SEGMENTS_DIR), e))?;
            let mut details = serde_json::to_value(&done).unwrap_or(serde_json::Value::Null);
            if let Some(m) = details.as_object_mut() {
                m.insert(
                    "erased_objects".into(),
                    serde_json::Value::from(erased.len()),
                );
            }
            tx.audit(agent, "reclaim", &dir.display().to_string(), &details, at)?;
            Ok(done)
        })?;
        drop(guard);
        self.lineage.rebuild_file()?;
        self.sweep_tmp();
        Ok(done)
    }
}
