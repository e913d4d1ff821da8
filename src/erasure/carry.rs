//! Carrying out an erasure order: the salted cell commitment of every reached version computed
//! from its hash-checked bytes before anything changes, each version's erased form (its bytes
//! with the erased cells empty, and its row index) written as new objects, the order and the
//! commitments recorded in one transaction with what the database held about the erased cells
//! overwritten, then the old objects' bytes removed from the segments and the database file
//! rebuilt ([`crate::store::Store::remove_erased_bytes`]).

use std::collections::{BTreeMap, BTreeSet, HashMap};

use serde::Serialize;
use serde_json::json;

use super::reach::{Cells, Reach};
use super::{Order, Target};
use crate::commitment::{self, Bytes32, Commitment, Salts, TreeHasher};
use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Agent, Version};
use crate::store::erasure_records::{ErasedVersion, NewOrder, Purge};
use crate::store::Store;
use crate::table::rowindex;

/// What carrying out an order did to one version.
#[derive(Debug, Clone, Serialize)]
pub struct CarriedVersion {
    pub version: String,
    pub hash: String,
    pub cells_erased: u64,
    pub cells_kept_unrecomputable: u64,
    /// Whether its bytes were recomputable before (they are stored in erased form now, and it
    /// can no longer be computed from its recipe).
    pub was_recomputable: bool,
    /// The cell commitment root recorded before the erasure (64 hex digits).
    pub root: String,
}

/// What carrying out an order did.
#[derive(Debug, Clone, Serialize)]
pub struct Carried {
    pub order: i64,
    /// The audit entries of the order and of its carrying out.
    pub ordered_entry: u64,
    pub erased_entry: u64,
    pub versions: Vec<CarriedVersion>,
    /// Profile minima and maxima and cell notes that held erased values, overwritten.
    pub database_fields_overwritten: u64,
    /// Rows overwritten that an earlier build committed to by an unsalted digest (table and
    /// key): a guess of the value they held can still be confirmed against it.
    pub committed_the_old_way: Vec<String>,
    /// Segment files rewritten without the old objects, and what the rebuild did.
    pub removed: crate::store::objects::Reclaimed,
}

/// One reached version made ready before anything is recorded.
struct Prepared {
    version: Version,
    recomputable: bool,
    root: Bytes32,
    salts: Salts,
    /// Every erased cell's leaf, this order's and earlier orders' (in cell order).
    kept: Vec<(u64, Bytes32)>,
    /// The cells this order erases.
    n_new: u64,
    /// The latest earlier order that reached the version, whose kept salts this one
    /// supersedes.
    previous: Option<i64>,
    marked: Vec<u64>,
    form_hash: Hash,
    form_bytes: u64,
    index_hash: Hash,
    index_bytes: u64,
    /// Column -> the values erased in it (to find them in the profile).
    values: BTreeMap<usize, BTreeSet<Vec<u8>>>,
    /// Erased cells as (0-based row, column name), for cell notes.
    cells: Vec<(u64, String)>,
}

fn refuse(msg: String) -> Error {
    Error::usage(msg)
}

/// What the order names, for the record: its kind and positions, never the values a
/// predicate or key gave (they name the person).
fn names_record(order: &Order, named: &Cells) -> serde_json::Value {
    let rows: BTreeSet<u64> = named.iter().map(|&(r, _)| r + 1).collect();
    match &order.target {
        Target::RowsWhere(_) => json!({ "kind": "rows_where", "rows": rows }),
        Target::RowsWithKey(pairs) => json!({
            "kind": "rows_with_key",
            "columns": pairs.iter().map(|(c, _)| c).collect::<Vec<_>>(),
            "rows": rows,
        }),
        Target::Cells(cells) => json!({
            "kind": "cells",
            "cells": cells.iter().map(|(r, c)| json!([r, c])).collect::<Vec<_>>(),
        }),
        Target::Columns(cols) => json!({ "kind": "columns", "columns": cols }),
    }
}

/// Carries out `order`: see the module documentation. The reach is the dry run's.
pub fn carry_out(
    store: &mut Store,
    order: &Order,
    agent: &Agent,
    at: &str,
) -> Result<(Reach, Carried)> {
    if let Some(why) = store.lineage.erasure_refused() {
        return Err(Error::usage(why));
    }
    if let Some(url) = crate::store::location::Location::read(store.dir())?.objects {
        return Err(Error::usage(format!(
            "erasure orders cannot be carried out yet on a store whose objects are in a bucket ({url}): the bucket's versioning, replicas and backups are outside sluice's reach; bring the objects back with `sluice transfer --to-folder` and ask the data-protection officer about the bucket's copies"
        )));
    }
    let reach = super::survey(store, order)?;
    let named = reach
        .versions
        .first()
        .map(|r| r.erased.clone())
        .unwrap_or_default();
    check_erasable(store, &reach)?;
    let mut prepared = Vec::new();
    for r in &reach.versions {
        prepared.push(prepare(
            store,
            &r.version,
            &r.erased,
            &r.kept_unrecomputable,
        )?);
    }
    // Nothing is computed from now on: the scratch folder of computed versions goes.
    store.objects.stop_computing();
    let names = names_record(order, &named);
    let raw = order.version.clone();
    let request = order.request.clone();
    let (order_id, ordered_entry, erased_entry, purge) = store.write(|tx| {
        for p in &prepared {
            tx.insert_object(&p.form_hash.hex(), p.form_bytes, "table", at)?;
            tx.insert_object(&p.index_hash.hex(), p.index_bytes, "row_index", at)?;
        }
        let order_id = tx.insert_erasure_order(&NewOrder {
            version_id: raw.id,
            names: &names,
            request: &request,
            agent,
            at,
            n_cells: named.len() as u64,
        })?;
        for p in &prepared {
            tx.insert_erased_version(&ErasedVersion {
                order_id,
                version_id: p.version.id,
                root: commitment::hex(&p.root),
                salts: p.salts.to_bytes(),
                kept: p
                    .kept
                    .iter()
                    .flat_map(|(i, l)| i.to_le_bytes().into_iter().chain(l.iter().copied()))
                    .collect(),
                marked: p.marked.iter().flat_map(|i| i.to_le_bytes()).collect(),
                n_erased: p.n_new,
                stored_hash: p.form_hash.hex(),
                stored_row_index: p.index_hash.hex(),
            })?;
        }
        let versions: Vec<serde_json::Value> = prepared
            .iter()
            .map(|p| {
                json!({
                    "version": p.version.hash,
                    "subject": p.version.audit_subject(),
                    "root": commitment::hex(&p.root),
                    "cells_erased": p.n_new,
                    "cells_kept_unrecomputable": p.marked.len(),
                    "stored_form": p.form_hash.hex(),
                    "stored_row_index": p.index_hash.hex(),
                })
            })
            .collect();
        let ordered = tx.audit(
            agent,
            "erasure_ordered",
            &raw.audit_subject(),
            &json!({
                "order": order_id,
                "version": raw.hash,
                "names": names,
                "request": request,
                "cells_named": named.len(),
                "versions": versions,
            }),
            at,
        )?;
        let mut purge = Purge::default();
        for p in &prepared {
            tx.purge_erased_values(p.version.id, &p.values, &p.cells, &mut purge)?;
            if let Some(earlier) = p.previous {
                tx.supersede_salts(earlier, p.version.id, &mut purge)?;
            }
        }
        let erased = tx.audit(
            agent,
            "erased",
            &raw.audit_subject(),
            &json!({
                "order": order_id,
                "versions_rewritten": prepared.len(),
                "cells_erased": prepared.iter().map(|p| p.n_new).sum::<u64>(),
                "database_fields_overwritten": purge.fields,
                "overwritten": purge.overwritten,
            }),
            at,
        )?;
        Ok((order_id, ordered.seq, erased.seq, purge))
    })?;
    let removed = store.remove_erased_bytes(agent, at)?;
    let versions = prepared
        .iter()
        .map(|p| CarriedVersion {
            version: p.version.label(),
            hash: p.version.hash.clone(),
            cells_erased: p.n_new,
            cells_kept_unrecomputable: p.marked.len() as u64,
            was_recomputable: p.recomputable,
            root: commitment::hex(&p.root),
        })
        .collect();
    Ok((
        reach,
        Carried {
            order: order_id,
            ordered_entry,
            erased_entry,
            versions,
            database_fields_overwritten: purge.fields,
            committed_the_old_way: purge
                .old_way
                .iter()
                .map(|(t, k)| format!("{t} {k}"))
                .collect(),
            removed,
        },
    ))
}

/// Refuses what this build cannot erase completely, before anything is written.
fn check_erasable(store: &Store, reach: &Reach) -> Result<()> {
    let reached: BTreeSet<i64> = reach.versions.iter().map(|r| r.version.id).collect();
    let all = store.lineage.all_versions()?;
    for r in &reach.versions {
        let v = &r.version;
        if v.dialect
            .encoding
            .to_ascii_lowercase()
            .starts_with("utf-16")
        {
            return Err(refuse(format!(
                "{} was received in {}; erasing cells of a version in that encoding is not supported yet",
                v.label(),
                v.dialect.encoding
            )));
        }
        if let Some(step) = store.lineage.step(v.step_id)? {
            if step.params.get("convert").is_some() {
                return Err(refuse(format!(
                    "{} was converted from a workbook or JSON Lines file kept whole in the store; erasing inside such a file is not supported yet",
                    v.label()
                )));
            }
        }
        for w in &all {
            if reached.contains(&w.id) {
                // Versions with the same bytes (the walk reaches each with the same cells)
                // share one erased form, so they must lose the same cells.
                if w.id != v.id && w.hash == v.hash {
                    let twin = reach.versions.iter().find(|x| x.version.id == w.id);
                    if twin.is_some_and(|x| x.erased != r.erased) {
                        return Err(ErrorKind::Internal(format!(
                            "{} and {} hold the same bytes but the order reaches different cells of them",
                            v.label(),
                            w.label()
                        ))
                        .into());
                    }
                }
                continue;
            }
            if w.hash == v.hash {
                return Err(ErrorKind::Internal(format!(
                    "{} holds the bytes of {}, which the walk did not reach",
                    w.label(),
                    v.label()
                ))
                .into());
            }
            if w.row_index == v.row_index {
                return Err(refuse(format!(
                    "{} has the same row index as {}, which the order does not reach (their rows have the same lengths); the store reads a row index by its name, so writing one of them anew would move the other's rows: not supported",
                    v.label(),
                    w.label()
                )));
            }
        }
    }
    Ok(())
}

/// Commits to `v`'s cells from its hash-checked bytes, then writes its erased form.
fn prepare(store: &Store, v: &Version, erased: &Cells, marked: &Cells) -> Result<Prepared> {
    let recomputable = !store.bytes_stored(v)?;
    let n_cols = v.header.len() as u64;
    let previous = store.lineage.erasure_of_version(v.id)?;
    let (salts, earlier, old_root) = match &previous {
        None => {
            let seed = commitment::random_seed()
                .map_err(|e| Error::io(std::path::Path::new("getrandom"), e))?;
            (Salts::fresh(seed), BTreeMap::new(), None)
        }
        Some(e) => {
            let bad = || {
                Error::from(ErrorKind::Inconsistent(format!(
                    "the commitment erasure order {} recorded for {} is malformed; run `sluice verify`",
                    e.order_id,
                    v.label()
                )))
            };
            let salts = Salts::from_bytes(&e.salts).ok_or_else(bad)?;
            if e.kept.len() % 40 != 0 {
                return Err(bad());
            }
            let kept: BTreeMap<u64, Bytes32> = e
                .kept
                .chunks_exact(40)
                .filter_map(|c| {
                    let i = u64::from_le_bytes(c[..8].try_into().ok()?);
                    Some((i, c[8..].try_into().ok()?))
                })
                .collect();
            (salts, kept, Some(e.root.clone()))
        }
    };
    // Every cell's leaf: from its salt and value, or the leaf an earlier order kept.
    let mut stream = salts.stream(v.n_rows.saturating_mul(n_cols));
    let mut tree = TreeHasher::default();
    let mut kept = Vec::with_capacity(erased.len());
    let mut missing = None;
    let mut values: BTreeMap<usize, BTreeSet<Vec<u8>>> = BTreeMap::new();
    store.objects.each_row(v, |row, r| {
        for c in 0..n_cols {
            let value = if (c as usize) < r.len() {
                r.field(c as usize)
            } else {
                b""
            };
            let i = row * n_cols + c;
            let salt = stream.next().flatten();
            let leaf = match (earlier.get(&i), salt) {
                (Some(l), _) => *l,
                (None, Some(s)) => commitment::leaf(&s, value),
                (None, None) => {
                    missing.get_or_insert(i);
                    [0u8; 32]
                }
            };
            if erased.contains(&(row, c as usize)) && !earlier.contains_key(&i) {
                kept.push((i, leaf));
                values.entry(c as usize).or_default().insert(value.to_vec());
            }
            tree.push(leaf);
        }
        Ok(())
    })?;
    let commitment = Commitment {
        n_rows: v.n_rows,
        n_cols,
        tree: tree.finish(),
    };
    let root = commitment.root(&v.header);
    if let (Some(e), Some(recorded)) = (&previous, &old_root) {
        // The erased form must still be what the earlier order proved, before it is
        // punctured further: the same check `verify` makes.
        if missing.is_some() || commitment::hex(&root) != *recorded {
            return Err(ErrorKind::Inconsistent(format!(
                "{} no longer gives the commitment erasure order {} recorded (a remaining cell or a kept leaf was changed); nothing was erased: run `sluice verify`",
                v.label(),
                e.order_id
            ))
            .into());
        }
    }
    let new_numbers: Vec<u64> = kept.iter().map(|(i, _)| *i).collect();
    let n_new = kept.len() as u64;
    let punctured = salts.puncture(&new_numbers);
    drop(salts);
    let mut all_kept: Vec<(u64, Bytes32)> = earlier.into_iter().chain(kept).collect();
    all_kept.sort_by_key(|(i, _)| *i);
    let kept = all_kept;

    let own: Hash = v
        .hash
        .parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
    let own_index: Hash = v
        .row_index
        .parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
    let bytes = store.objects.read_all(&own)?;
    let index = store.objects.read_all(&own_index)?;
    let positions = rowindex::positions(&index)
        .map_err(|e| Error::io(std::path::Path::new(&v.row_index), e))?;
    let mut by_row: BTreeMap<u64, Vec<usize>> = BTreeMap::new();
    for &(r, c) in erased {
        by_row.entry(r).or_default().push(c);
    }
    let (form, new_positions) = erased_form(
        &bytes,
        &positions,
        &by_row,
        v.dialect.delimiter_byte(),
        v.dialect.quote.as_bytes().first().copied().unwrap_or(b'"'),
    );
    drop(bytes);
    let mut w = store
        .objects
        .writer()
        .map_err(|e| Error::io(store.dir(), e))?;
    w.write(&form).map_err(|e| Error::io(store.dir(), e))?;
    let (form_hash, form_bytes) = w.finish().map_err(|e| Error::io(store.dir(), e))?;
    let ix = rowindex::encode(new_positions);
    let mut w = store
        .objects
        .random_access_writer()
        .map_err(|e| Error::io(store.dir(), e))?;
    w.write(&ix).map_err(|e| Error::io(store.dir(), e))?;
    let (index_hash, index_bytes) = w.finish().map_err(|e| Error::io(store.dir(), e))?;
    let cells = erased
        .iter()
        .map(|&(r, c)| (r, v.header.get(c).cloned().unwrap_or_default()))
        .collect();
    let header_len = v.header.len();
    Ok(Prepared {
        version: v.clone(),
        recomputable,
        root,
        salts: punctured,
        kept,
        n_new,
        previous: previous.map(|e| e.order_id),
        marked: marked
            .iter()
            .map(|&(r, c)| r * header_len as u64 + c as u64)
            .collect(),
        form_hash,
        form_bytes,
        index_hash,
        index_bytes,
        values,
        cells,
    })
}

/// The byte ranges of a record's fields (within `row`, a record and its line ending), read
/// as RFC 4180 reads them: a field that opens with the quote runs to the quote that closes it
/// (a doubled quote is one quote inside), anything else to the next delimiter or line end.
fn field_spans(row: &[u8], delimiter: u8, quote: u8) -> Vec<(usize, usize)> {
    let mut spans = Vec::new();
    let mut i = 0;
    loop {
        let start = i;
        if row.get(i) == Some(&quote) {
            i += 1;
            while i < row.len() {
                if row[i] == quote {
                    if row.get(i + 1) == Some(&quote) {
                        i += 2;
                        continue;
                    }
                    i += 1;
                    break;
                }
                i += 1;
            }
        }
        while i < row.len() && row[i] != delimiter && row[i] != b'\n' && row[i] != b'\r' {
            i += 1;
        }
        spans.push((start, i));
        if i < row.len() && row[i] == delimiter {
            i += 1;
            continue;
        }
        break;
    }
    spans
}

/// Line breaks in `b`: LF, CRLF (one) and a lone CR.
fn line_breaks(b: &[u8]) -> u64 {
    let mut n = 0;
    for (i, &x) in b.iter().enumerate() {
        if x == b'\n' || (x == b'\r' && b.get(i + 1) != Some(&b'\n')) {
            n += 1;
        }
    }
    n
}

/// `bytes` with the fields of `by_row` (0-based row -> columns) emptied, and every row's new
/// byte offset and line. Everything else, header, delimiter, quoting and line endings, stays
/// byte for byte.
fn erased_form(
    bytes: &[u8],
    positions: &[(u64, u64)],
    by_row: &BTreeMap<u64, Vec<usize>>,
    delimiter: u8,
    quote: u8,
) -> (Vec<u8>, Vec<(u64, u64)>) {
    let mut out = Vec::with_capacity(bytes.len());
    let mut new_positions = Vec::with_capacity(positions.len());
    let mut copied = 0usize;
    let mut shift_bytes = 0u64;
    let mut shift_lines = 0u64;
    let ends: HashMap<usize, usize> = (0..positions.len())
        .map(|i| {
            let end = positions
                .get(i + 1)
                .map_or(bytes.len(), |p| p.0 as usize)
                .min(bytes.len());
            (i, end)
        })
        .collect();
    for (i, &(byte, line)) in positions.iter().enumerate() {
        new_positions.push((byte - shift_bytes, line - shift_lines));
        let Some(cols) = by_row.get(&(i as u64)) else {
            continue;
        };
        let start = (byte as usize).min(bytes.len());
        let end = ends[&i];
        out.extend_from_slice(&bytes[copied..start]);
        let row = &bytes[start..end];
        let spans = field_spans(row, delimiter, quote);
        let mut at = 0;
        for (c, &(a, b)) in spans.iter().enumerate() {
            if cols.contains(&c) {
                out.extend_from_slice(&row[at..a]);
                shift_bytes += (b - a) as u64;
                shift_lines += line_breaks(&row[a..b]);
                at = b;
            }
        }
        out.extend_from_slice(&row[at..]);
        copied = end;
    }
    out.extend_from_slice(&bytes[copied..]);
    (out, new_positions)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// RFC 4180 section 2's example records (REFERENCES.md): quoted fields with a line break,
    /// a comma and a doubled quote inside are emptied whole, and the offsets and lines of the
    /// rows after them follow.
    #[test]
    fn erased_form_empties_quoted_fields_and_moves_the_rows_after() {
        let bytes = b"a,b,c\r\n\"aaa\",\"b\r\nbb\",\"ccc\"\r\nzzz,\"y,y\",\"x\"\"x\"\r\n";
        let positions = vec![(7u64, 2u64), (28, 4)];
        let by_row = BTreeMap::from([(0u64, vec![1usize]), (1, vec![1, 2])]);
        let (form, pos) = erased_form(bytes, &positions, &by_row, b',', b'"');
        assert_eq!(
            String::from_utf8(form).unwrap(),
            "a,b,c\r\n\"aaa\",,\"ccc\"\r\nzzz,,\r\n"
        );
        assert_eq!(pos, vec![(7, 2), (21, 3)]);
        assert_eq!(
            crate::table::parse::parse_all(b"zzz,,\r\n", b',').unwrap(),
            vec![vec![b"zzz".to_vec(), Vec::new(), Vec::new()]]
        );
    }

    #[test]
    fn field_spans_of_a_plain_and_a_short_row() {
        assert_eq!(
            field_spans(b"1;ab;;\n", b';', b'"'),
            vec![(0, 1), (2, 4), (5, 5), (6, 6)]
        );
        assert_eq!(field_spans(b"x", b',', b'"'), vec![(0, 1)]);
    }
}
