//! The database records of erasure orders (schema 7, `erasure_orders` and `erased_versions`):
//! every query erasure needs, kept together here, and the purge of values the database holds
//! about erased cells (column profiles' minimum and maximum, cell notes), then the database
//! file rebuilt so that no free page or write-ahead log frame keeps them.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use super::audit::{self, Key, Selector};
use super::backend::{Kind, Row, Value};
use super::lineage::{Lineage, Tx};
use crate::error::Result;
use crate::model::Agent;
use crate::vals;

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

/// What an erasure overwrote in the rows of one table with one key (`version_id`,
/// `output_id` or `order_id`): the leaves (`audit::row_leaf`, hex) of the rows as they were
/// and are no longer, and of the rows as they are now. Kept in the `erased` entry's details as
/// `overwritten`; `verify` puts `before` back in place of `after` when it checks an earlier
/// entry's commitment to those rows. A leaf of a row that held an erased value is salted by
/// the row's salt, which the overwrite emptied.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Overwritten {
    pub table: String,
    pub key: i64,
    pub before: Vec<String>,
    pub after: Vec<String>,
}

/// What the purge of one order did.
#[derive(Debug, Clone, Default)]
pub struct Purge {
    /// Profile extremes and cell notes overwritten.
    pub fields: u64,
    pub overwritten: Vec<Overwritten>,
    /// Rows (table, key) an earlier build committed to by an unsalted digest of their
    /// encodings: the whole table was committed to anew, and a guess of an overwritten value
    /// with the row's other fields can still be confirmed against that older digest.
    pub old_way: Vec<(String, i64)>,
}

const PROFILE_EXTREMES: &str = "SELECT min_value, max_value FROM column_profiles
     WHERE version_id = ?1 AND col_idx = ?2";
const PURGE_PROFILE_MIN: &str = "UPDATE column_profiles SET min_value = NULL, salt = NULL
     WHERE version_id = ?1 AND col_idx = ?2";
const PURGE_PROFILE_MAX: &str = "UPDATE column_profiles SET max_value = NULL, salt = NULL
     WHERE version_id = ?1 AND col_idx = ?2";
const NOTE_OF_CELL: &str = "SELECT 1 FROM cell_notes
     WHERE output_id = ?1 AND row_idx = ?2 AND column_name = ?3";
const DELETE_NOTE: &str =
    "DELETE FROM cell_notes WHERE output_id = ?1 AND row_idx = ?2 AND column_name = ?3";
const EMPTY_SALTS: &str =
    "UPDATE erased_versions SET salts = ?3 WHERE order_id = ?1 AND version_id = ?2";
const ALL_DETAILS: &str = "SELECT details FROM audit_log ORDER BY seq";

/// Every erased version, in order of orders then versions.
const ERASED_ALL: &str = "SELECT order_id, version_id, root, salts, kept, marked, n_erased,
            stored_hash, stored_row_index
     FROM erased_versions ORDER BY order_id, version_id";

/// Every erasure of one version, oldest order first.
const ERASURES_OF_VERSION: &str = "SELECT order_id, version_id, root, salts, kept, marked,
            n_erased, stored_hash, stored_row_index
     FROM erased_versions WHERE version_id = ?1 ORDER BY order_id";

/// The latest erasure of one version.
const ERASED_OF_VERSION: &str = "SELECT order_id, version_id, root, salts, kept, marked,
            n_erased, stored_hash, stored_row_index
     FROM erased_versions WHERE version_id = ?1 ORDER BY order_id DESC LIMIT 1";

fn erased_from_row(r: &Row) -> Result<ErasedVersion> {
    Ok(ErasedVersion {
        order_id: r.int(0)?,
        version_id: r.int(1)?,
        root: r.text(2)?,
        salts: r.blob(3)?,
        kept: r.blob(4)?,
        marked: r.blob(5)?,
        n_erased: r.int(6)? as u64,
        stored_hash: r.text(7)?,
        stored_row_index: r.text(8)?,
    })
}

impl Lineage {
    /// Every erased version of every order, in order of orders then versions.
    pub fn erased_versions(&self) -> Result<Vec<ErasedVersion>> {
        self.db
            .query(ERASED_ALL, &[])?
            .iter()
            .map(erased_from_row)
            .collect()
    }

    /// Every erasure of one version, oldest order first (none when no order reached it).
    pub fn erasures_of_version(&self, version_id: i64) -> Result<Vec<ErasedVersion>> {
        self.db
            .query(ERASURES_OF_VERSION, vals![version_id])?
            .iter()
            .map(erased_from_row)
            .collect()
    }

    /// The latest erasure of one version, if any order reached it.
    pub fn erasure_of_version(&self, version_id: i64) -> Result<Option<ErasedVersion>> {
        self.db
            .query(ERASED_OF_VERSION, vals![version_id])?
            .first()
            .map(erased_from_row)
            .transpose()
    }

    /// Whether a version's column profile rows were committed to the old way: by an entry of
    /// form 1 (an earlier build's digest over the rows' encodings, which held no salt).
    pub fn profile_unsalted(&self, version_id: i64) -> Result<bool> {
        committed_in_form_1(self.db.as_ref(), "column_profiles", version_id)
    }

    /// Every order carried out, oldest first.
    pub fn erasure_orders(&self) -> Result<Vec<ErasureOrder>> {
        self.db
            .query(
                "SELECT o.id, o.version_id, o.names, o.request, a.identity, o.ordered_at, o.n_cells
                 FROM erasure_orders o JOIN agents a ON a.id = o.agent_id ORDER BY o.id",
                &[],
            )?
            .iter()
            .map(|r| {
                Ok(ErasureOrder {
                    id: r.int(0)?,
                    version_id: r.int(1)?,
                    names: r.text(2)?,
                    request: r.text(3)?,
                    agent: r.text(4)?,
                    ordered_at: r.text(5)?,
                    n_cells: r.int(6)? as u64,
                })
            })
            .collect()
    }

    /// For the object reader: each erased version's own object names (bytes, row index)
    /// mapped to the objects that hold its erased form, the latest order's; the forms an
    /// earlier order wrote for a version a later order erased more of map there too (they
    /// still hold the later order's cells, and are removed with the version's own bytes).
    pub fn erased_forms(&self) -> Result<HashMap<String, String>> {
        let rows = self.db.query(
            "SELECT v.hash, v.row_index, e.stored_hash, e.stored_row_index
             FROM erased_versions e JOIN versions v ON v.id = e.version_id
             ORDER BY e.order_id",
            &[],
        )?;
        let mut chains: BTreeMap<(String, String), Vec<(String, String)>> = BTreeMap::new();
        for r in &rows {
            chains
                .entry((r.text(0)?, r.text(1)?))
                .or_default()
                .push((r.text(2)?, r.text(3)?));
        }
        let mut out = HashMap::new();
        for ((h, ix), forms) in chains {
            let Some((sh, six)) = forms.last().cloned() else {
                continue;
            };
            // A version whose erased cells were already empty (or that only has summary
            // cells kept) keeps its own objects.
            let olds = std::iter::once((h, ix)).chain(forms);
            for (oh, oix) in olds {
                if oh != sh {
                    out.insert(oh, sh.clone());
                }
                if oix != six {
                    out.insert(oix, six.clone());
                }
            }
        }
        Ok(out)
    }

    /// Whether erasure orders can be carried out on this lineage database: on SQLite in the
    /// store folder, yes; on a PostgreSQL server, no, because the values an erasure overwrites
    /// stay in the server's write-ahead log, its archive and its backups, which sluice does not
    /// control (the message says so).
    pub fn erasure_refused(&self) -> Option<String> {
        match self.db.kind() {
            Kind::Sqlite => None,
            Kind::Postgres => Some(format!(
                "erasure orders cannot be carried out yet on a store whose lineage is on a server ({}): the erased values would stay in the server's write-ahead log, archive and backups, which sluice does not control; ask the server's administrator and the data-protection officer how erasure is done there",
                self.db.describe()
            )),
        }
    }

    /// Rebuilds the database file (`VACUUM`: every page written afresh, free pages gone) and
    /// empties the write-ahead log into it, truncating the log to nothing, so that values the
    /// last transactions overwrote are in no page of either file.
    pub fn rebuild_file(&self) -> Result<()> {
        if self.db.kind() != Kind::Sqlite {
            return Err(crate::Error::usage(
                self.erasure_refused().unwrap_or_default(),
            ));
        }
        self.db.batch("VACUUM")?;
        self.db.query("PRAGMA wal_checkpoint(TRUNCATE)", &[])?;
        Ok(())
    }
}

impl Tx<'_> {
    /// Refuses to record a version whose bytes are those of a version an erasure order
    /// erased (the same file received again, or computed again from it): that would bring
    /// the erased values back under a name the store reads as erased.
    pub fn refuse_erased_bytes(&self, hash: &str) -> Result<()> {
        let hit = self.db.query(
            "SELECT d.name, v.seq, e.order_id FROM erased_versions e
             JOIN versions v ON v.id = e.version_id JOIN datasets d ON d.id = v.dataset_id
             WHERE v.hash = ?1 AND e.stored_hash <> v.hash LIMIT 1",
            vals![hash],
        )?;
        match hit.first() {
            None => Ok(()),
            Some(r) => Err(crate::Error::from(crate::error::ErrorKind::Data(format!(
                "these bytes are those of {}:v{}, whose cells erasure order {} erased; recording them again would bring the erased values back, so they are refused (remove the erased data from the file first)",
                r.text(0)?,
                r.int(1)?,
                r.int(2)?
            )))),
        }
    }

    /// Records an order; returns its id (the highest so far plus one, given inside the write
    /// transaction, as every id). Its row is committed to by the next audit entry.
    pub fn insert_erasure_order(&mut self, o: &NewOrder<'_>) -> Result<i64> {
        let agent_id = self.agent_id(o.agent)?;
        let id = self
            .db
            .query("SELECT coalesce(max(id), 0) + 1 FROM erasure_orders", &[])?
            .first()
            .map_or(Ok(1), |r| r.int(0))?;
        self.db.execute(
            "INSERT INTO erasure_orders (id, version_id, names, request, agent_id, ordered_at, n_cells)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            vals![
                id,
                o.version_id,
                o.names.to_string(),
                o.request,
                agent_id,
                o.at,
                o.n_cells as i64
            ],
        )?;
        self.wrote("erasure_orders", "id", Key::Int(id));
        Ok(id)
    }

    /// Records one erased version of an order.
    pub fn insert_erased_version(&mut self, e: &ErasedVersion) -> Result<()> {
        self.db.execute(
            "INSERT INTO erased_versions (order_id, version_id, root, salts, kept, marked,
                 n_erased, stored_hash, stored_row_index)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
            &[
                Value::Int(e.order_id),
                Value::Int(e.version_id),
                Value::from(&e.root),
                Value::Blob(e.salts.clone()),
                Value::Blob(e.kept.clone()),
                Value::Blob(e.marked.clone()),
                Value::Int(e.n_erased as i64),
                Value::from(&e.stored_hash),
                Value::from(&e.stored_row_index),
            ],
        )?;
        self.wrote("erased_versions", "order_id", Key::Int(e.order_id));
        Ok(())
    }

    /// Overwrites what the database holds about a version's erased cells: a column profile's
    /// minimum or maximum that is one of the column's erased values becomes NULL, with the
    /// row's salt (`erased`: column position -> the values erased there), and the cell notes
    /// of erased cells (`cells`: 0-based row and column name) are deleted. Each change is kept
    /// in `purge` as the leaves of the rows before and after ([`Overwritten`]).
    pub fn purge_erased_values(
        &mut self,
        version_id: i64,
        erased: &BTreeMap<usize, BTreeSet<Vec<u8>>>,
        cells: &[(u64, String)],
        purge: &mut Purge,
    ) -> Result<()> {
        let mut hits: Vec<(i64, bool, bool)> = Vec::new();
        for (&col, values) in erased {
            let rows = self
                .db
                .query(PROFILE_EXTREMES, vals![version_id, col as i64])?;
            let Some(r) = rows.first() else { continue };
            let (min, max) = (r.opt_text(0)?, r.opt_text(1)?);
            let hit =
                |v: &Option<String>| v.as_ref().is_some_and(|s| values.contains(s.as_bytes()));
            if hit(&min) || hit(&max) {
                hits.push((col as i64, hit(&min), hit(&max)));
            }
        }
        if !hits.is_empty() {
            let n = self.overwrite("column_profiles", "version_id", version_id, purge, |tx| {
                let mut n = 0;
                for &(col, min, max) in &hits {
                    if min {
                        tx.db.execute(PURGE_PROFILE_MIN, vals![version_id, col])?;
                        n += 1;
                    }
                    if max {
                        tx.db.execute(PURGE_PROFILE_MAX, vals![version_id, col])?;
                        n += 1;
                    }
                }
                Ok(n)
            })?;
            purge.fields += n;
        }
        let mut any = false;
        for (row, column) in cells {
            any |= !self
                .db
                .query(NOTE_OF_CELL, vals![version_id, *row as i64, column])?
                .is_empty();
        }
        if any {
            let n = self.overwrite("cell_notes", "output_id", version_id, purge, |tx| {
                let mut n = 0;
                for (row, column) in cells {
                    n += tx
                        .db
                        .execute(DELETE_NOTE, vals![version_id, *row as i64, column])?;
                }
                Ok(n)
            })?;
            purge.fields += n;
        }
        Ok(())
    }

    /// Empties the salts an earlier order kept for a version a later order erases more of
    /// (the later order's record holds them punctured further; the earlier ones would give
    /// the salts of the newly erased cells).
    pub fn supersede_salts(
        &mut self,
        order_id: i64,
        version_id: i64,
        purge: &mut Purge,
    ) -> Result<()> {
        self.overwrite("erased_versions", "order_id", order_id, purge, |tx| {
            tx.db.execute(
                EMPTY_SALTS,
                &[
                    Value::Int(order_id),
                    Value::Int(version_id),
                    Value::Blob(Vec::new()),
                ],
            )
        })?;
        Ok(())
    }

    /// Runs `change` on the rows of `table` whose `by` is `key` and keeps, in `purge`, the
    /// leaves (`audit::row_leaf`) of the rows it changed as they were and as they are. A row
    /// an entry of form 1 (an earlier build) committed to cannot be stood in for by its leaf,
    /// so the whole table is committed to anew, as earlier builds did, and the row is named
    /// in `purge.old_way`.
    fn overwrite(
        &mut self,
        table: &'static str,
        by: &'static str,
        key: i64,
        purge: &mut Purge,
        change: impl FnOnce(&mut Self) -> Result<u64>,
    ) -> Result<u64> {
        let sel = Selector::one(table, by, Key::Int(key));
        let leaves = |db: &dyn super::backend::Database| -> Result<Vec<String>> {
            let mut l: Vec<String> = audit::select_rows(db, &sel)?
                .iter()
                .map(|(_, e)| crate::commitment::hex(&audit::row_leaf(e)))
                .collect();
            l.sort();
            Ok(l)
        };
        let before = leaves(self.db)?;
        let n = change(self)?;
        let after = leaves(self.db)?;
        let (gone, came) = multiset_difference(&before, &after);
        if gone.is_empty() && came.is_empty() {
            return Ok(n);
        }
        purge.overwritten.push(Overwritten {
            table: table.to_string(),
            key,
            before: gone,
            after: came,
        });
        if committed_in_form_1(self.db, table, key)? {
            self.recommit_whole(table, by)?;
            purge.old_way.push((table.to_string(), key));
        }
        Ok(n)
    }

    /// Commits anew to every row of a table whose fields an erasure overwrote where an
    /// earlier build committed to them: one selector over the whole range of its key, which
    /// covers (and so, for `verify`, supersedes) every earlier entry's selector of that table,
    /// however their ranges were merged.
    fn recommit_whole(&mut self, table: &'static str, by: &'static str) -> Result<()> {
        let sql = match table {
            "column_profiles" => "SELECT min(version_id), max(version_id) FROM column_profiles",
            "erased_versions" => "SELECT min(order_id), max(order_id) FROM erased_versions",
            _ => "SELECT min(output_id), max(output_id) FROM cell_notes",
        };
        let rows = self.db.query(sql, &[])?;
        if let Some(r) = rows.first() {
            if let (Some(lo), Some(hi)) = (r.opt_int(0)?, r.opt_int(1)?) {
                self.wrote_range(table, by, Key::Int(lo), Key::Int(hi));
            }
        }
        Ok(())
    }
}

/// Whether an entry of form 1 (an earlier build's unsalted digest over the encodings) commits
/// to the rows of `table` with key `key`.
fn committed_in_form_1(db: &dyn super::backend::Database, table: &str, key: i64) -> Result<bool> {
    for r in db.query(ALL_DETAILS, &[])? {
        let details: serde_json::Value = serde_json::from_str(&r.text(0)?).unwrap_or_default();
        let Some(rows) = details.get("rows").and_then(|x| x.as_array()) else {
            continue;
        };
        for x in rows {
            if let Some((sel, _, _, form)) = Selector::from_json(x) {
                if form == 1 && sel.table == table && sel.covers(key) {
                    return Ok(true);
                }
            }
        }
    }
    Ok(false)
}

/// The leaves in `a` and not in `b`, and in `b` and not in `a`, counting repeats (both
/// sorted).
fn multiset_difference(a: &[String], b: &[String]) -> (Vec<String>, Vec<String>) {
    let (mut i, mut j) = (0, 0);
    let (mut only_a, mut only_b) = (Vec::new(), Vec::new());
    while i < a.len() || j < b.len() {
        match (a.get(i), b.get(j)) {
            (Some(x), Some(y)) if x == y => {
                i += 1;
                j += 1;
            }
            (Some(x), Some(y)) if x < y => {
                only_a.push(x.clone());
                i += 1;
            }
            (Some(_), Some(y)) => {
                only_b.push(y.clone());
                j += 1;
            }
            (Some(x), None) => {
                only_a.push(x.clone());
                i += 1;
            }
            (None, Some(y)) => {
                only_b.push(y.clone());
                j += 1;
            }
            (None, None) => break,
        }
    }
    (only_a, only_b)
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

#[cfg(test)]
mod tests {
    use super::multiset_difference;

    fn v(items: &[&str]) -> Vec<String> {
        items.iter().map(|s| s.to_string()).collect()
    }

    /// Repeats count: what is taken out and put back restores the first list exactly.
    #[test]
    fn the_difference_of_two_sorted_lists_counts_repeats() {
        let (a, b) = (v(&["a", "b", "b", "d"]), v(&["b", "c", "d", "d"]));
        let (gone, came) = multiset_difference(&a, &b);
        assert_eq!(gone, v(&["a", "b"]));
        assert_eq!(came, v(&["c", "d"]));
        let mut back = b.clone();
        for c in &came {
            let i = back.iter().position(|x| x == c).unwrap();
            back.remove(i);
        }
        back.extend(gone);
        back.sort();
        assert_eq!(back, a);
        assert_eq!(multiset_difference(&a, &a), (Vec::new(), Vec::new()));
    }
}
