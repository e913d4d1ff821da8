//! Trails: where a cell's value came from. Starting at one cell of a version, each step back
//! follows the step's recorded row map (and, for a column that was renamed or derived, its
//! recorded source columns) to the cell it was made from, reading the value on both sides,
//! until it reaches the raw file as it was taken in: its path, hash, intake, the line of the
//! record and the raw text. Derived columns branch to every column they were made from; a
//! looked-up column continues in the looked-up table's row. Nothing here is guessed: every link
//! is a recorded run or source, marked `exact` for sluice's own operations and `inferred` for
//! lineage recovered by a diff.

use std::collections::HashMap;

use serde::Serialize;

use crate::diff::read::{cuttable, rows_of};
use crate::erasure::{cell_erasure, CellErasure};
use crate::error::{Error, ErrorKind, Result};
use crate::model::{StepKind, Version};
use crate::ops::Operation;
use crate::refs;
use crate::store::Store;
use crate::table::rowindex;

/// Which row to start from.
#[derive(Debug, Clone)]
pub enum RowPick {
    /// A 1-based data row, as `sluice retrieve` shows it (the header not counted).
    Number(u64),
    /// The one row whose columns hold these values.
    Key(Vec<(String, String)>),
}

/// One step of a trail, newest first.
#[derive(Debug, Clone, Serialize)]
pub struct Hop {
    pub step: i64,
    pub kind: StepKind,
    pub operation: Option<String>,
    pub agent: String,
    pub at: String,
    pub why: Option<String>,
    /// The version the step made, and the one the cell came from.
    pub produced: String,
    pub read: String,
    /// 1-based data rows in the two versions.
    pub row_after: u64,
    pub row_before: u64,
    pub column_after: String,
    pub column_before: String,
    pub value_after: String,
    pub value_before: String,
    /// The value or column differs, or the row came from another dataset.
    pub changed: bool,
    /// "exact" (a sluice operation) or "inferred" (recovered by a diff).
    pub link: String,
    /// For a revert: the step it took out (a revert hop is never folded away).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reverts_step: Option<i64>,
}

/// Where a trail ends.
#[derive(Debug, Clone, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum End {
    /// The raw file the data was taken in from.
    Raw(Box<Origin>),
    /// A column made from several columns (or a looked-up table): one trail per source.
    Branches { sources: Vec<Branch> },
    /// The step made the row or the value itself (a group summary, a row added by an outside
    /// edit, a constant fill): nothing further back to follow.
    Made {
        version: String,
        step: i64,
        operation: Option<String>,
        why: String,
    },
}

#[derive(Debug, Clone, Serialize)]
pub struct Branch {
    /// "from column given_name of orders:v3", "looked up in technicians:v1".
    pub via: String,
    pub trail: Trail,
}

/// The raw end of a trail.
#[derive(Debug, Clone, Serialize)]
pub struct Origin {
    pub version: String,
    pub hash: String,
    /// The path as given at intake, and as an absolute path then.
    pub path: Option<String>,
    pub absolute_path: Option<String>,
    pub taken_in_at: String,
    pub agent: String,
    /// The 1-based line of the file the record starts on.
    pub line: u64,
    pub column: String,
    /// The cell as it is in the raw file (decoded, without quotes).
    pub raw_value: String,
    /// The whole record as it is in the file (lossy when it is not UTF-8 text); for a
    /// workbook, the row as the first version holds it (canonical CSV).
    pub raw_line: String,
    /// What the raw file is: `csv` (delimited text), `xlsx`, `ods` or `jsonl`.
    pub format: String,
    /// A converted file (workbook, JSON Lines): the hash of its raw object, and `value`, the
    /// cell as the first version holds it after the conversion (`raw_value` is the file's).
    pub raw_object: Option<String>,
    pub converted_value: Option<String>,
    /// Workbooks: the sheet and cell (`Orders!C7`), what the cell holds (number, date, text,
    /// boolean, blank, error) and its formula, whose cached result was taken in. `line` is then
    /// the sheet row.
    pub cell: Option<String>,
    pub stored_kind: Option<String>,
    pub formula: Option<String>,
    /// The raw cell was erased by an erasure order (`raw_value` is then empty).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub erased: Option<CellErasure>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Trail {
    pub version: String,
    pub hash: String,
    /// 1-based data row.
    pub row: u64,
    pub column: String,
    pub value: String,
    /// Newest first.
    pub hops: Vec<Hop>,
    pub end: End,
    /// The cell was erased by an erasure order (`value` is then empty), or is a summary cell
    /// kept as published after an order erased values it aggregated.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub erased: Option<CellErasure>,
}

/// How deep derived columns may branch before the trail stops (a guard against a malformed
/// database, never reached by real histories).
const MAX_DEPTH: usize = 64;

/// The trail of one cell of `reference`.
pub fn trace(store: &Store, reference: &str, row: &RowPick, column: &str) -> Result<Trail> {
    let v = refs::resolve(&store.lineage, reference)?;
    if !v.header.iter().any(|h| h == column) {
        return Err(Error::usage(format!(
            "column \"{column}\" is not in {}; its columns are: {}",
            v.label(),
            v.header.join(", ")
        )));
    }
    let r = row_of(store, &v, row)?;
    let mut reader = Rows::default();
    follow(store, &mut reader, v, r, column.to_string(), 0)
}

/// The 0-based row of `v` a pick names.
pub fn row_of(store: &Store, v: &Version, row: &RowPick) -> Result<u64> {
    Ok(match row {
        RowPick::Number(n) => {
            if *n == 0 || *n > v.n_rows {
                return Err(Error::usage(format!(
                    "{} has data rows 1 to {}; there is no row {n} (rows count from 1 after the header, as `sluice retrieve {}` writes them)",
                    v.label(),
                    v.n_rows,
                    v.label()
                )));
            }
            n - 1
        }
        RowPick::Key(pairs) => find_by_key(store, v, pairs)?,
    })
}

fn find_by_key(store: &Store, v: &Version, pairs: &[(String, String)]) -> Result<u64> {
    let cols: Vec<usize> = pairs
        .iter()
        .map(|(c, _)| {
            v.header.iter().position(|h| h == c).ok_or_else(|| {
                Error::usage(format!(
                    "key column \"{c}\" is not in {}; its columns are: {}",
                    v.label(),
                    v.header.join(", ")
                ))
            })
        })
        .collect::<Result<_>>()?;
    let found = match rows_holding(store, v, &cols, pairs)? {
        Some(found) => found,
        None => {
            let mut found = Vec::new();
            store.objects.each_row(v, |row, r| {
                if cols
                    .iter()
                    .zip(pairs)
                    .all(|(&c, (_, want))| r.field(c) == want.as_bytes())
                {
                    found.push(row);
                }
                Ok(())
            })?;
            found
        }
    };
    let what = pairs
        .iter()
        .map(|(c, x)| format!("{c}={x}"))
        .collect::<Vec<_>>()
        .join(",");
    match found.as_slice() {
        [one] => Ok(*one),
        [] => Err(Error::usage(format!(
            "no row of {} has {what}; check the values with `sluice retrieve {}`",
            v.label(),
            v.label()
        ))),
        many => Err(Error::usage(format!(
            "{} rows of {} have {what} (data rows {}{}); add key columns or use --row",
            many.len(),
            v.label(),
            many.iter()
                .take(10)
                .map(|r| (r + 1).to_string())
                .collect::<Vec<_>>()
                .join(", "),
            if many.len() > 10 { ", ..." } else { "" }
        ))),
    }
}

/// Up to this many rows whose bytes hold the value sought are parsed one by one
/// ([`rows_holding`]); past it every row is parsed instead, which is then no slower.
const MAX_CANDIDATES: usize = 20_000;

/// The rows of `v` whose columns `cols` hold the values of `pairs`, found without parsing every
/// row: its bytes are searched for the longest value, and only the rows holding it somewhere
/// are parsed and checked (a row whose field equals the value holds its bytes, quoted or not,
/// as long as the value has no quote for the file to double). The object is re-hashed as it is
/// searched, as a parse of every row would. `None` when the search cannot be relied on (a
/// legacy encoding, whose bytes differ from the text; a value with a quote; only empty values)
/// or would not be quicker (bytes not stored, too many rows holding the value): the caller
/// then parses every row.
fn rows_holding(
    store: &Store,
    v: &Version,
    cols: &[usize],
    pairs: &[(String, String)],
) -> Result<Option<Vec<u64>>> {
    let Some(needle) = pairs
        .iter()
        .map(|(_, want)| want.as_bytes())
        .max_by_key(|want| want.len())
        .filter(|want| !want.is_empty() && !want.contains(&b'"'))
    else {
        return Ok(None);
    };
    if !cuttable(v) || !store.bytes_stored(v)? {
        return Ok(None);
    }
    let table = hash_of(&v.hash, v)?;
    let starts = crate::diff::read::offsets(&store.objects, v)?.1;
    // Every row holding the needle, in order, once: an occurrence at byte `o` is in the last
    // row starting at or before it (none: the header).
    let mut held: Vec<u64> = Vec::new();
    let note = |held: &mut Vec<u64>, o: u64| {
        let r = starts.partition_point(|&s| s <= o) as u64;
        if r > 0 && held.last() != Some(&(r - 1)) {
            held.push(r - 1);
        }
    };
    let finder = memchr::memmem::Finder::new(needle);
    // The last `needle.len() - 1` bytes read, for an occurrence across two pieces.
    let keep = needle.len() - 1;
    let (mut tail, mut across) = (Vec::with_capacity(2 * keep), Vec::with_capacity(2 * keep));
    let mut at = 0u64;
    let searched = store.objects.each_piece(&table, |piece| {
        if keep > 0 && !tail.is_empty() {
            across.clear();
            across.extend_from_slice(&tail);
            across.extend_from_slice(&piece[..piece.len().min(keep)]);
            let from = at - tail.len() as u64;
            for i in finder.find_iter(&across) {
                if i < tail.len() {
                    note(&mut held, from + i as u64);
                }
            }
        }
        for i in finder.find_iter(piece) {
            note(&mut held, at + i as u64);
        }
        if keep > 0 {
            tail.extend_from_slice(&piece[piece.len().saturating_sub(keep)..]);
            tail.drain(..tail.len().saturating_sub(keep));
        }
        at += piece.len() as u64;
        Ok(if held.len() > MAX_CANDIDATES {
            std::ops::ControlFlow::Break(())
        } else {
            std::ops::ControlFlow::Continue(())
        })
    })?;
    let Some(total) = searched else {
        return Ok(None);
    };
    let mut parser = crate::table::parse::Parser::new(v.dialect.delimiter_byte(), 0);
    let mut found = Vec::new();
    for r in held {
        let from = starts[r as usize];
        let to = starts.get(r as usize + 1).copied().unwrap_or(total);
        let len = usize::try_from(to.saturating_sub(from)).map_err(|_| {
            Error::from(ErrorKind::Inconsistent(format!(
                "data row {} of {} is longer than this machine can hold",
                r + 1,
                v.label()
            )))
        })?;
        let bytes = store.objects.read_range(&table, from, len)?;
        parser.restart(0);
        let fields = parse_one(&mut parser, &bytes, v)?;
        let holds = cols
            .iter()
            .zip(pairs)
            .all(|(&c, (_, want))| fields.get(c).is_some_and(|f| f == want));
        if holds {
            found.push(r);
        }
    }
    Ok(Some(found))
}

/// Rows read so far, by version id and 0-based row.
#[derive(Default)]
struct Rows {
    cache: HashMap<(i64, u64), Vec<String>>,
    reader: Reader,
}

/// What reading single records by offset keeps between reads.
#[derive(Default)]
struct Reader {
    /// One parser, restarted for every record read by offset (making one costs more than
    /// reading a record).
    parser: Option<crate::table::parse::Parser>,
    /// Per version id, the tail of its compact row index (`None`: format 1).
    tails: HashMap<i64, Option<rowindex::Tail>>,
}

impl Reader {
    /// The one parser, for `delimiter`.
    fn parser_for(&mut self, delimiter: u8) -> &mut crate::table::parse::Parser {
        if self.parser.as_ref().map(|p| p.delimiter()) != Some(delimiter) {
            self.parser = Some(crate::table::parse::Parser::new(delimiter, 0));
        }
        self.parser
            .get_or_insert_with(|| crate::table::parse::Parser::new(delimiter, 0))
    }
}

impl Rows {
    fn get(&mut self, store: &Store, v: &Version, row: u64) -> Result<&Vec<String>> {
        if !self.cache.contains_key(&(v.id, row)) {
            let fields = self.fetch(store, v, row)?;
            self.cache.insert((v.id, row), fields);
        }
        self.cache
            .get(&(v.id, row))
            .ok_or_else(|| missing_row(v, row))
    }

    /// One row of `v`: read by offset when its bytes are stored; computed on its own from the
    /// nearest stored ancestor when every step on the way works row by row
    /// ([`crate::recompute::one_row`], whose rows on the way are kept too); else read from
    /// the version computed whole.
    fn fetch(&mut self, store: &Store, v: &Version, row: u64) -> Result<Vec<String>> {
        if !store.bytes_stored(v)? {
            let reader = &mut self.reader;
            let mut read = |sv: &Version, sr: u64| stored_row(reader, store, sv, sr);
            if let Some(mut rows) = crate::recompute::one_row(store, v, row, &mut read)? {
                let fields = rows.pop().map(|(_, _, f)| f).unwrap_or_default();
                // The rows of the versions between, for the hops the trail makes next.
                for (id, r, f) in rows {
                    self.cache.entry((id, r)).or_insert(f);
                }
                return Ok(fields);
            }
        }
        stored_row(&mut self.reader, store, v, row)
    }

    fn cell(&mut self, store: &Store, v: &Version, row: u64, column: &str) -> Result<String> {
        let c = v.header.iter().position(|h| h == column).ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent(format!(
                "{} has no column \"{column}\"; run `sluice verify`",
                v.label()
            )))
        })?;
        Ok(self.get(store, v, row)?.get(c).cloned().unwrap_or_default())
    }
}

/// One row of `v` read from its bytes: by offset through its row index ([`record_bytes`]), or,
/// for a raw file in a legacy encoding, decoded from the start.
fn stored_row(reader: &mut Reader, store: &Store, v: &Version, row: u64) -> Result<Vec<String>> {
    if cuttable(v) {
        let (_, _, bytes) = record_bytes(store, reader, v, row)?;
        let parser = reader.parser_for(v.dialect.delimiter_byte());
        parser.restart(0);
        parse_one(parser, &bytes, v)
    } else {
        // A raw file in a legacy encoding: its offsets count the file's own bytes, so it is
        // decoded from the start.
        let got = rows_of(&store.objects, v, &[row])?;
        got.get(row)
            .map(|r| r.texts())
            .ok_or_else(|| missing_row(v, row))
    }
}

fn missing_row(v: &Version, row: u64) -> Error {
    ErrorKind::Inconsistent(format!(
        "{} has no data row {} in its row index; run `sluice verify`",
        v.label(),
        row + 1
    ))
    .into()
}

fn hash_of(hex: &str, v: &Version) -> Result<crate::hash::Hash> {
    hex.parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(format!("{}: {e}", v.label()))))
}

/// The byte offset and line of `row` and the bytes of its record (with its line ending and any
/// blank lines after it), read in near-constant time: from a compact row index the tail and
/// the checkpoint at or before the row, then the records from there to the next checkpoint,
/// parsed until the row; from one of format 1 two entries, then the record, each by offset.
fn record_bytes(
    store: &Store,
    rows: &mut Reader,
    v: &Version,
    row: u64,
) -> Result<(u64, u64, Vec<u8>)> {
    let index = hash_of(&v.row_index, v)?;
    let table = hash_of(&v.hash, v)?;
    let damaged = |e: std::io::Error| {
        Error::from(ErrorKind::Inconsistent(format!(
            "the row index of {} is damaged ({e}); run `sluice verify`",
            v.label()
        )))
    };
    let tail = match rows.tails.get(&v.id) {
        Some(t) => *t,
        None => {
            let head = store.objects.read_range(&index, 0, rowindex::HEADER_LEN)?;
            let t = if rowindex::format_of(&head).map_err(damaged)? == rowindex::COMPACT_FORMAT {
                let size = store.objects.size(&index)?;
                let at = size
                    .checked_sub(rowindex::TAIL_LEN as u64)
                    .ok_or_else(|| damaged(std::io::Error::other("too short for its tail")))?;
                let b = store.objects.read_range(&index, at, rowindex::TAIL_LEN)?;
                Some(rowindex::Tail::read(&b, size).map_err(damaged)?)
            } else {
                None
            };
            rows.tails.insert(v.id, t);
            t
        }
    };
    let Some(tail) = tail else {
        let at = rowindex::HEADER_LEN as u64 + row * rowindex::ENTRY_LEN as u64;
        let two = store
            .objects
            .read_range(&index, at, 2 * rowindex::ENTRY_LEN)?;
        // `entry` reads from a whole index; give it these two entries behind a header.
        let mut buf = rowindex::header().to_vec();
        buf.extend_from_slice(&two);
        let this = rowindex::entry(&buf, 0).ok_or_else(|| missing_row(v, row))?;
        let end = rowindex::entry(&buf, 1).map_or(v.n_bytes, |next| next.byte);
        if end < this.byte || end > v.n_bytes {
            return Err(missing_row(v, row));
        }
        let bytes = store
            .objects
            .read_range(&table, this.byte, (end - this.byte) as usize)?;
        return Ok((this.byte, this.line, bytes));
    };
    if row >= tail.n_rows {
        return Err(missing_row(v, row));
    }
    let stride = u64::from(tail.stride);
    let (i, skip) = (row / stride, row % stride);
    let two =
        store
            .objects
            .read_range(&index, tail.checkpoint_at(i), 2 * rowindex::CHECKPOINT_LEN)?;
    let at = rowindex::checkpoint(&two).ok_or_else(|| missing_row(v, row))?;
    let end = if i + 1 < tail.n_checkpoints() {
        rowindex::checkpoint(&two[rowindex::CHECKPOINT_LEN..])
            .ok_or_else(|| missing_row(v, row))?
            .0
    } else {
        v.n_bytes
    };
    if end < at.0 || end > v.n_bytes {
        return Err(missing_row(v, row));
    }
    let stretch = store
        .objects
        .read_range(&table, at.0, (end - at.0) as usize)?;
    let parser = rows.parser_for(v.dialect.delimiter_byte());
    let (byte, line, next) =
        rowindex::find_in_stretch(parser, &stretch, at, skip).ok_or_else(|| missing_row(v, row))?;
    let bytes = stretch[(byte - at.0) as usize..(next - at.0) as usize].to_vec();
    Ok((byte, line, bytes))
}

/// The fields of the one record in `bytes`.
fn parse_one(
    p: &mut crate::table::parse::Parser,
    bytes: &[u8],
    v: &Version,
) -> Result<Vec<String>> {
    let mut fields: Option<Vec<String>> = None;
    let mut keep = |r: crate::table::RawRecord<'_>| -> Result<()> {
        if fields.is_none() {
            fields = Some(
                r.iter()
                    .map(|f| String::from_utf8_lossy(f).into_owned())
                    .collect(),
            );
        }
        Ok(())
    };
    p.feed(bytes, &mut keep)?;
    let _ = p.finish(&mut keep)?;
    fields.ok_or_else(|| {
        ErrorKind::Inconsistent(format!(
            "a record of {} does not parse where its row index points; run `sluice verify`",
            v.label()
        ))
        .into()
    })
}

fn follow(
    store: &Store,
    rows: &mut Rows,
    start: Version,
    start_row: u64,
    start_column: String,
    depth: usize,
) -> Result<Trail> {
    let value = rows.cell(store, &start, start_row, &start_column)?;
    let mut trail = Trail {
        version: start.label(),
        hash: start.hash.clone(),
        row: start_row + 1,
        column: start_column.clone(),
        value,
        hops: Vec::new(),
        end: End::Branches {
            sources: Vec::new(),
        },
        erased: cell_erasure(store, &start, start_row, &start_column)?,
    };
    let (mut v, mut r, mut col) = (start, start_row, start_column);
    loop {
        let step = store.lineage.step(v.step_id)?.ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent(format!(
                "the step that made {} is missing; run `sluice verify`",
                v.label()
            )))
        })?;
        let made = |why: &str| End::Made {
            version: v.label(),
            step: step.id,
            operation: step.operation.clone(),
            why: why.to_string(),
        };
        if step.kind == StepKind::Ingest {
            trail.end = End::Raw(Box::new(origin(store, rows, &v, r, &col, &step)?));
            return Ok(trail);
        }
        if step.operation.as_deref() == Some("summarize") {
            trail.end = made("a group summary: the value aggregates every input row of its group");
            return Ok(trail);
        }
        let inputs = store.lineage.step_input_versions(step.id)?;
        // The input the row came from, and its row there.
        let mut from: Option<(Version, u64)> = None;
        for (_, input) in &inputs {
            if let Some(row) = crate::provenance::input_row(store, &v, input.id, r)? {
                from = Some((input.clone(), row));
                break;
            }
        }
        let sources: Vec<(String, i64, String)> = store
            .lineage
            .column_sources_from(v.id)?
            .into_iter()
            .filter(|(out, _, _)| *out == col)
            .collect();
        // A column taken from a looked-up table continues in the table's matching row.
        if let Some((_, table_id, table_col)) = sources.iter().find(|(_, id, _)| {
            inputs
                .iter()
                .any(|(role, t)| role == "table" && t.id == *id)
        }) {
            let table = inputs
                .iter()
                .find(|(_, t)| t.id == *table_id)
                .map(|(_, t)| t.clone())
                .ok_or_else(|| Error::from(ErrorKind::Inconsistent("a lost table input".into())))?;
            if step.operation.as_deref() == Some("lookup") {
                let Ok(Operation::Lookup { on, table_on, .. }) =
                    serde_json::from_value::<Operation>(step.params.clone())
                else {
                    trail.end = made("a looked-up value whose step parameters cannot be read");
                    return Ok(trail);
                };
                let table_on = table_on.unwrap_or_else(|| on.clone());
                let mut pairs = Vec::new();
                for (ours, theirs) in on.iter().zip(&table_on) {
                    pairs.push((theirs.clone(), rows.cell(store, &v, r, ours)?));
                }
                let hop_value = rows.cell(store, &v, r, &col)?;
                match find_by_key(store, &table, &pairs) {
                    Ok(tr) if depth < MAX_DEPTH => {
                        let sub =
                            follow(store, rows, table.clone(), tr, table_col.clone(), depth + 1)?;
                        let before = sub.value.clone();
                        trail.hops.push(hop(
                            &step,
                            &v,
                            &table,
                            r,
                            tr,
                            &col,
                            table_col.clone(),
                            hop_value,
                            before,
                        ));
                        trail.end = End::Branches {
                            sources: vec![Branch {
                                via: format!(
                                    "looked up in {} by {}",
                                    table.label(),
                                    table_on.join(", ")
                                ),
                                trail: sub,
                            }],
                        };
                    }
                    _ => {
                        trail.end = made("no row of the looked-up table has this row's key: the cell was left blank");
                    }
                }
                return Ok(trail);
            }
            // A mapping table: the value was changed through it; the trail goes on in the input.
        }
        let Some((input, ir)) = from else {
            trail.end = made("the step added this row (no input row is recorded for it)");
            return Ok(trail);
        };
        let from_input: Vec<&String> = sources
            .iter()
            .filter(|(_, id, _)| *id == input.id)
            .map(|(_, _, c)| c)
            .collect();
        let before_cols: Vec<String> = if from_input.is_empty() {
            if input.header.contains(&col) {
                vec![col.clone()]
            } else {
                Vec::new()
            }
        } else {
            from_input.into_iter().cloned().collect()
        };
        let after = rows.cell(store, &v, r, &col)?;
        match before_cols.as_slice() {
            [] => {
                trail.end = made("the step made this column");
                return Ok(trail);
            }
            [one] => {
                let before = rows.cell(store, &input, ir, one)?;
                trail.hops.push(hop(
                    &step,
                    &v,
                    &input,
                    r,
                    ir,
                    &col,
                    one.clone(),
                    after,
                    before,
                ));
                col = one.clone();
                v = input;
                r = ir;
            }
            many => {
                // Derived from several columns: a trail per source, each from the input row.
                let joined = many.join(" + ");
                trail.hops.push(hop(
                    &step,
                    &v,
                    &input,
                    r,
                    ir,
                    &col,
                    joined,
                    after,
                    String::new(),
                ));
                let mut branches = Vec::new();
                if depth < MAX_DEPTH {
                    for c in many {
                        branches.push(Branch {
                            via: format!("from column {c} of {}", input.label()),
                            trail: follow(store, rows, input.clone(), ir, c.clone(), depth + 1)?,
                        });
                    }
                }
                trail.end = End::Branches { sources: branches };
                return Ok(trail);
            }
        }
    }
}

#[allow(clippy::too_many_arguments)]
fn hop(
    step: &crate::model::Step,
    produced: &Version,
    read: &Version,
    row_after: u64,
    row_before: u64,
    column_after: &str,
    column_before: String,
    value_after: String,
    value_before: String,
) -> Hop {
    Hop {
        step: step.id,
        kind: step.kind,
        operation: step.operation.clone(),
        agent: step.agent.clone(),
        at: step.ended_at.clone(),
        why: step.reason.clone(),
        produced: produced.label(),
        read: read.label(),
        row_after: row_after + 1,
        row_before: row_before + 1,
        column_after: column_after.to_string(),
        // A hop into another dataset (a looked-up table, an appended source) is never folded
        // away, even when the value is the same: it is where the value came from.
        changed: value_after != value_before
            || column_after != column_before
            || produced.dataset != read.dataset
            || step.kind == StepKind::Revert,
        column_before,
        value_after,
        value_before,
        link: step.lineage.as_str().to_string(),
        reverts_step: step.reverts_step,
    }
}

fn origin(
    store: &Store,
    rows: &mut Rows,
    v: &Version,
    r: u64,
    column: &str,
    step: &crate::model::Step,
) -> Result<Origin> {
    let raw_value = rows.cell(store, v, r, column)?;
    let erased = cell_erasure(store, v, r, column)?;
    let (_, line, bytes) = record_bytes(store, &mut rows.reader, v, r)?;
    // The record without its line ending and the blank lines after it.
    let mut end = bytes.len();
    while end > 0 && matches!(bytes[end - 1], b'\n' | b'\r') {
        end -= 1;
    }
    if let Some(conv) = crate::convert::conversion_of(step) {
        let place = crate::convert::locate(store, &conv, &v.header, r, column)?;
        return Ok(Origin {
            version: v.label(),
            hash: v.hash.clone(),
            path: step.source.as_ref().map(|s| s.path.clone()),
            absolute_path: step.source.as_ref().map(|s| s.absolute_path.clone()),
            taken_in_at: step.ended_at.clone(),
            agent: step.agent.clone(),
            line: place.line,
            column: column.to_string(),
            raw_value: place.stored,
            raw_line: place
                .raw_line
                .unwrap_or_else(|| String::from_utf8_lossy(&bytes[..end]).into_owned()),
            format: place.format,
            raw_object: Some(place.raw_hash),
            converted_value: Some(raw_value),
            cell: place.cell,
            stored_kind: Some(place.stored_kind),
            formula: place.formula,
            erased,
        });
    }
    Ok(Origin {
        version: v.label(),
        hash: v.hash.clone(),
        path: step.source.as_ref().map(|s| s.path.clone()),
        absolute_path: step.source.as_ref().map(|s| s.absolute_path.clone()),
        taken_in_at: step.ended_at.clone(),
        agent: step.agent.clone(),
        line,
        column: column.to_string(),
        raw_value,
        raw_line: decode(v, &bytes[..end]),
        format: "csv".into(),
        raw_object: None,
        converted_value: None,
        cell: None,
        stored_kind: None,
        formula: None,
        erased,
    })
}

/// A raw record's bytes as text, decoded from the encoding the file was taken in with.
fn decode(v: &Version, bytes: &[u8]) -> String {
    match encoding_rs::Encoding::for_label(v.dialect.encoding.as_bytes()) {
        Some(enc) if !cuttable(v) => enc.decode_without_bom_handling(bytes).0.into_owned(),
        _ => String::from_utf8_lossy(bytes).into_owned(),
    }
}
