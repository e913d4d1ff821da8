//! The operations that work row by row, as per-record transforms ([`RowStep`]): fed a
//! step's input rows in order, each decides whether the row stays and what its output row is,
//! and keeps the step's provenance as it goes (row map, changed cells, drops, notes). A run of
//! such steps can be chained in one pass over the rows.
//!
//! Families: **cell** operations change values in place (trim, case, replace, map, fill,
//! number, date: [`Replacer`], [`Mapper`], [`FillFrom`], [`read_value`]); **row** operations
//! choose rows ([`RowChooser`]: keep, drop, dedupe); **shape** operations add, rename or pick
//! columns (split, combine, extract, lookup, rename, select: `derive` and [`Looker`]). The
//! **table** operations that need a whole input before they emit (summarize, sort, append) live
//! in their own modules and read their input themselves.

use std::collections::HashMap;

use xxhash_rust::xxh3::xxh3_128;

use super::keyset::KeySet;

use super::date::{parse_date, DateProblem};
use super::number::parse_amount;
use super::predicate::Predicate;
use super::{KeepWhich, OnError, Operation};
use crate::error::{Error, ErrorKind, Result};
use crate::model::{RowMap, Version};
use crate::provenance::{ChangeLog, DropLog};
use crate::store::Store;
use crate::table::RawRecord;

/// One output row being built: its fields' bytes back to back and where each ends.
#[derive(Debug, Default, Clone)]
pub struct OwnedRow {
    bytes: Vec<u8>,
    ends: Vec<usize>,
}

impl OwnedRow {
    pub fn clear(&mut self) {
        self.bytes.clear();
        self.ends.clear();
    }

    pub fn push(&mut self, field: &[u8]) {
        self.bytes.extend_from_slice(field);
        self.ends.push(self.bytes.len());
    }

    /// The row as a record, for the next step of a chain (positions are not known there).
    pub fn record(&self, index: u64) -> RawRecord<'_> {
        RawRecord::packed(&self.bytes, &self.ends, index)
    }

    /// The fields' bytes back to back, and where each ends (for a writer).
    pub fn packed(&self) -> (&[u8], &[usize]) {
        (&self.bytes, &self.ends)
    }

    /// Makes this row a copy of `r`, in one piece.
    pub fn copy_of(&mut self, r: &RawRecord<'_>) {
        let end = r.ends.last().copied().unwrap_or(0);
        self.bytes.clear();
        self.bytes.extend_from_slice(&r.fields[..end]);
        self.ends.clear();
        self.ends.extend_from_slice(r.ends);
    }
}

/// What a [`RowStep`] made of one input row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Taken {
    /// The step removes the row (recorded as a drop).
    Removed,
    /// The output row holds the input row's values in the same order.
    Same,
    /// The output row is in the buffer given.
    Built,
}

/// Marks output column `o` as holding a new value in the current row.
fn mark(is_new: &mut [bool], fresh: &mut Vec<usize>, o: usize) {
    if !is_new[o] {
        is_new[o] = true;
        fresh.push(o);
    }
}

/// Puts `value` into a reused buffer.
fn set_value(buf: &mut String, value: &str) {
    buf.clear();
    buf.push_str(value);
}

/// What a [`RowStep`] found once every row went through it.
pub struct RowStepEnd {
    pub header: Vec<String>,
    pub runs: RowMap,
    /// Changed cells by output column position.
    pub changes: ChangeLog,
    pub drops: DropLog,
    pub notes: Vec<(u64, String, String)>,
    /// (output column, input column) where they differ, and derived columns' sources.
    pub sources: Vec<(String, String)>,
    /// For map and lookup: (output column, table column) pairs.
    pub table_sources: Option<Vec<(String, String)>>,
    /// Changed cells per column, in column order (columns with none left out).
    pub changed_by_column: Vec<(String, u64)>,
}

/// A row-by-row operation ready to run on one input, with what it has recorded so far.
pub struct RowStep {
    op: Operation,
    /// The input as messages name it, and its dataset (for advice).
    label: String,
    dataset: String,
    input_header: Vec<String>,
    targets: Vec<usize>,
    is_target: Vec<bool>,
    /// Each output column's name and the input column its values come from.
    columns: Vec<(String, usize)>,
    derivs: Vec<Option<super::derive::Derivation>>,
    fill: Option<FillFrom>,
    replacer: Option<Replacer>,
    mapper: Option<Mapper>,
    looker: Option<Looker>,
    chooser: RowChooser,
    null_tokens: Vec<Vec<u8>>,
    changes: ChangeLog,
    drops: DropLog,
    runs: RowMap,
    changed_per_column: Vec<u64>,
    /// Each output column's new value in the current row, in a buffer reused from row to row
    /// (no allocation per changed cell), and whether the row has one.
    new_values: Vec<String>,
    is_new: Vec<bool>,
    /// The columns marked in `is_new` for the current row (so that only they are cleared).
    fresh: Vec<usize>,
    /// The output columns whose values the operation may change (its targets, when it changes
    /// cells at all): the only ones a row's cell loop visits.
    cell_outputs: Vec<usize>,
    notes: Vec<(u64, String, String)>,
    /// Cells `number`, `date` or `map` could not read and must not pass: (input row, column,
    /// text, why).
    failures: Vec<(u64, String, String, &'static str)>,
    out_row: u64,
    /// Output column `o` holds input column `o` (nothing derived or looked up, none
    /// dropped or moved): a row with no new value is the input row.
    same_columns: bool,
}

impl RowStep {
    /// Prepares `op` (already resolved: a map or lookup table named by its hash) on `input`,
    /// with the table read for it. `dedupe` keeping the last row reads `input` once here.
    pub fn new(
        store: &Store,
        input: &Version,
        op: &Operation,
        mapper: Option<Mapper>,
        looker: Option<Looker>,
    ) -> Result<RowStep> {
        let label = input.label();
        let targets = op.target_columns(&input.header, &label)?;
        let mut is_target = vec![false; input.header.len()];
        for &t in &targets {
            is_target[t] = true;
        }
        // Each output column's name, the input column its values come from, and for a derived
        // column how it is computed.
        let shaped = op.derived_columns(&input.header, &label)?;
        let derivs: Vec<Option<super::derive::Derivation>> =
            shaped.iter().map(|(_, _, d)| d.clone()).collect();
        let columns: Vec<(String, usize)> = shaped.into_iter().map(|(n, i, _)| (n, i)).collect();
        let same_columns = looker.is_none()
            && columns.len() == input.header.len()
            && columns.iter().enumerate().all(|(o, (_, c))| *c == o)
            && derivs.iter().all(Option::is_none);
        let cell_outputs: Vec<usize> = if op.changes_cells() {
            (0..columns.len())
                .filter(|&o| is_target[columns[o].1])
                .collect()
        } else {
            Vec::new()
        };
        let fill = FillFrom::new(op, input)?;
        let replacer = Replacer::new(op)?;
        let chooser = RowChooser::new(store, input, op, &targets)?;
        let null_tokens: Vec<Vec<u8>> = input
            .null_tokens
            .iter()
            .map(|t| t.as_bytes().to_vec())
            .collect();
        Ok(RowStep {
            op: op.clone(),
            label,
            dataset: input.dataset.clone(),
            input_header: input.header.clone(),
            is_target,
            changes: ChangeLog::new(columns.len()),
            drops: DropLog::default(),
            runs: RowMap::default(),
            changed_per_column: vec![0; columns.len()],
            new_values: vec![String::new(); columns.len()],
            is_new: vec![false; columns.len()],
            fresh: Vec::new(),
            cell_outputs,
            targets,
            columns,
            derivs,
            fill,
            replacer,
            mapper,
            looker,
            chooser,
            null_tokens,
            notes: Vec::new(),
            failures: Vec::new(),
            out_row: 0,
            same_columns,
        })
    }

    /// The version id of the table a map or lookup reads (`Some(None)` while the table is an
    /// intake recorded with the step), `None` for other operations.
    pub fn table_id(&self) -> Option<Option<i64>> {
        match (&self.mapper, &self.looker) {
            (Some(m), _) => Some(m.table_id),
            (_, Some(l)) => Some(l.table_id),
            _ => None,
        }
    }

    /// For each output column, the input column whose value it holds unchanged in every row
    /// when the step also keeps every row, in order (so its profile is the input column's);
    /// `None` for a column the step changes, derives or looks up, and for every column of a
    /// step that may remove rows.
    pub fn unchanged_columns(&self) -> Vec<Option<usize>> {
        let every_row = matches!(self.chooser, RowChooser::All);
        let looked_up = self
            .looker
            .as_ref()
            .map_or(self.columns.len(), |l| self.columns.len() - l.take.len());
        let changes = self.op.changes_cells();
        self.columns
            .iter()
            .zip(&self.derivs)
            .enumerate()
            .map(|(o, ((_, c), d))| {
                (every_row && o < looked_up && d.is_none() && !(changes && self.is_target[*c]))
                    .then_some(*c)
            })
            .collect()
    }

    /// The output header.
    pub fn header(&self) -> Vec<String> {
        self.columns.iter().map(|(n, _)| n.clone()).collect()
    }

    /// Takes input row `in_row`: false when the step removes it (recorded as a drop), else
    /// true with its output row in `out`.
    pub fn row(&mut self, in_row: u64, r: &RawRecord<'_>, out: &mut OwnedRow) -> Result<bool> {
        Ok(match self.take(in_row, r, out)? {
            Taken::Removed => false,
            Taken::Same => {
                out.copy_of(r);
                true
            }
            Taken::Built => true,
        })
    }

    /// Makes room for `rows` input rows at once where the step keeps a table of them
    /// (`dedupe` keeping the first row), before they pass: a step is prepared without it, so
    /// that one prepared to compute a single row again allocates nothing per row.
    pub fn expect_rows(&mut self, rows: u64) {
        if let RowChooser::Dedupe { chosen, .. } = &mut self.chooser {
            chosen.expect(rows);
        }
    }

    /// [`Self::row`] that leaves `out` alone when the output row is the input row, value for
    /// value ([`Taken::Same`]), so that a chain of steps need not copy it.
    pub fn take(&mut self, in_row: u64, r: &RawRecord<'_>, out: &mut OwnedRow) -> Result<Taken> {
        if self.chooser.drops(in_row, r, &mut self.drops) {
            return Ok(Taken::Removed);
        }
        self.runs.push(self.out_row, in_row);
        let out_row = self.out_row;
        for o in self.fresh.drain(..) {
            self.is_new[o] = false;
        }
        for t in 0..self.cell_outputs.len() {
            let o = self.cell_outputs[t];
            let c = self.columns[o].1;
            let old = r.field(c);
            if self.op.cell_keeps(old) {
                continue;
            }
            let text = std::str::from_utf8(old).map_err(|_| {
                Error::from(ErrorKind::Inconsistent(format!(
                    "{} holds invalid UTF-8 in data row {} column {}; run `sluice verify`",
                    self.label,
                    in_row + 1,
                    self.input_header[c]
                )))
            })?;
            let new = match (&self.fill, &self.op) {
                (Some(f), _) => f.fill(old, r),
                (None, Operation::Number { .. } | Operation::Date { .. }) => {
                    if old.is_empty()
                        || self.null_tokens.iter().any(|t| t.as_slice() == old)
                        || matches!(self.op, Operation::Number { decimal_comma, .. }
                            if super::number::already_canonical(text, decimal_comma))
                    {
                        None
                    } else {
                        match read_value(&self.op, text) {
                            Ok(n) => (n != text).then_some(n),
                            // An ambiguous date always stops the step: only --order decides.
                            Err((why, on_error)) => match on_error {
                                OnError::Keep if why != AMBIGUOUS => {
                                    self.notes.push((
                                        out_row,
                                        self.columns[o].0.clone(),
                                        format!("{why}; kept as it was"),
                                    ));
                                    None
                                }
                                OnError::Blank if why != AMBIGUOUS => {
                                    self.notes.push((
                                        out_row,
                                        self.columns[o].0.clone(),
                                        format!("{why}; blanked"),
                                    ));
                                    Some(String::new())
                                }
                                _ => {
                                    self.failures.push((
                                        in_row,
                                        self.columns[o].0.clone(),
                                        text.to_string(),
                                        why,
                                    ));
                                    None
                                }
                            },
                        }
                    }
                }
                (None, Operation::Replace { .. }) => {
                    self.replacer.as_ref().and_then(|r| r.apply(text))
                }
                (None, Operation::Map { unmatched, .. }) => match &self.mapper {
                    Some(m)
                        if !(old.is_empty()
                            || self.null_tokens.iter().any(|t| t.as_slice() == old)) =>
                    {
                        match m.entries.get(text) {
                            Some(new) => (new != text).then(|| new.clone()),
                            None => match unmatched {
                                OnError::Keep => {
                                    self.notes.push((
                                        out_row,
                                        self.columns[o].0.clone(),
                                        "no entry in the mapping table; kept as it was".into(),
                                    ));
                                    None
                                }
                                OnError::Blank => {
                                    self.notes.push((
                                        out_row,
                                        self.columns[o].0.clone(),
                                        "no entry in the mapping table; blanked".into(),
                                    ));
                                    Some(String::new())
                                }
                                OnError::Fail => {
                                    self.failures.push((
                                        in_row,
                                        self.columns[o].0.clone(),
                                        text.to_string(),
                                        "no entry in the mapping table",
                                    ));
                                    None
                                }
                            },
                        }
                    }
                    _ => None,
                },
                (None, op) => {
                    // Trim and case write into the column's buffer.
                    if op.cell_into(text, &mut self.new_values[o]) {
                        self.changes.push(o, out_row);
                        self.changed_per_column[o] += 1;
                        mark(&mut self.is_new, &mut self.fresh, o);
                    }
                    continue;
                }
            };
            if let Some(new) = new {
                self.changes.push(o, out_row);
                self.changed_per_column[o] += 1;
                set_value(&mut self.new_values[o], &new);
                mark(&mut self.is_new, &mut self.fresh, o);
            }
        }
        if let Some(l) = &self.looker {
            let base = self.columns.len() - l.take.len();
            match l.find(r) {
                Some(values) => {
                    for (k, v) in values.iter().enumerate() {
                        set_value(&mut self.new_values[base + k], v);
                        mark(&mut self.is_new, &mut self.fresh, base + k);
                    }
                }
                None if l.unmatched_fail => {
                    let key: Vec<String> = l
                        .key_idx
                        .iter()
                        .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
                        .collect();
                    self.failures.push((
                        in_row,
                        l.take[0].clone(),
                        key.join(", "),
                        "no row of the lookup table has this key",
                    ));
                }
                None => {
                    for k in 0..l.take.len() {
                        self.new_values[base + k].clear();
                        mark(&mut self.is_new, &mut self.fresh, base + k);
                    }
                    self.notes.push((
                        out_row,
                        l.take[0].clone(),
                        "no row of the lookup table has this key; left blank".into(),
                    ));
                }
            }
        }
        for (o, d) in self.derivs.iter().enumerate() {
            if let Some(d) = d {
                let is_blank =
                    |v: &[u8]| v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v);
                let value = d.value(r, &is_blank);
                set_value(&mut self.new_values[o], &value);
                mark(&mut self.is_new, &mut self.fresh, o);
            }
        }
        self.out_row += 1;
        if self.same_columns && self.fresh.is_empty() {
            return Ok(Taken::Same);
        }
        out.clear();
        for o in 0..self.columns.len() {
            if self.is_new[o] {
                out.push(self.new_values[o].as_bytes());
            } else {
                out.push(r.field(self.columns[o].1));
            }
        }
        Ok(Taken::Built)
    }

    /// Ends the step: the cells that could not be read are an error naming them; otherwise
    /// what the step recorded.
    pub fn finish(self) -> Result<RowStepEnd> {
        if !self.failures.is_empty() {
            let shown: Vec<String> = self
                .failures
                .iter()
                .take(10)
                .map(|(row, col, v, why)| format!("data row {} {col} \"{v}\" ({why})", row + 1))
                .collect();
            let ambiguous = self.failures.iter().any(|f| f.3 == AMBIGUOUS);
            let mark_advice = match &self.op {
                Operation::Number {
                    columns,
                    decimal_comma,
                    ..
                } => super::number::decimal_mark_advice(
                    self.failures.iter().map(|f| f.2.as_str()),
                    *decimal_comma,
                    &format!(
                        "sluice clean {} number --columns {}{}",
                        self.dataset,
                        columns.join(","),
                        if *decimal_comma {
                            ""
                        } else {
                            " --decimal-comma"
                        }
                    ),
                ),
                _ => None,
            };
            let what = if matches!(self.op, Operation::Date { .. }) {
                "a date"
            } else {
                "an amount"
            };
            return Err(ErrorKind::Data(format!(
                "{}: {} cannot be read as {what}: {}{}; {}",
                self.label,
                if self.failures.len() == 1 { "1 cell".to_string() } else { format!("{} cells", self.failures.len()) },
                shown.join(", "),
                if self.failures.len() > 10 { format!(", and {} more", self.failures.len() - 10) } else { String::new() },
                if ambiguous {
                    "say which order the dates are written in with --order dmy or --order mdy".to_string()
                } else if let Some(advice) = mark_advice {
                    advice
                } else {
                    "fix them upstream, or pass --on-error keep (leave the text, noted) or --on-error blank (empty the cell, noted); in a plan, \"on_error\": \"keep\" or \"blank\"".to_string()
                }
            ))
            .into());
        }
        let header = self.header();
        let input_header = &self.input_header;
        // Output columns whose values come from an input column of another name, and derived
        // columns with every column they read.
        let mut sources: Vec<(String, String)> = self
            .columns
            .iter()
            .zip(&self.derivs)
            .filter(|((name, c), d)| d.is_none() && input_header[*c] != *name)
            .map(|((name, c), _)| (name.clone(), input_header[*c].clone()))
            .collect();
        for ((name, _), d) in self.columns.iter().zip(&self.derivs) {
            if let Some(d) = d {
                for c in d.sources() {
                    sources.push((name.clone(), input_header[c].clone()));
                }
            }
        }
        if let Some(f) = &self.fill {
            if let Some(from) = f.source_column() {
                for t in &self.targets {
                    sources.push((input_header[*t].clone(), from.to_string()));
                    sources.push((input_header[*t].clone(), input_header[*t].clone()));
                }
            }
        }
        let changed_by_column: Vec<(String, u64)> = header
            .iter()
            .zip(&self.changed_per_column)
            .filter(|(_, n)| **n > 0)
            .map(|(h, n)| (h.clone(), *n))
            .collect();
        let table_sources = match (&self.mapper, &self.looker) {
            (Some(m), _) => Some(
                self.targets
                    .iter()
                    .map(|&t| (input_header[t].clone(), m.to_column.clone()))
                    .collect(),
            ),
            (_, Some(l)) => Some(l.take.iter().map(|c| (c.clone(), c.clone())).collect()),
            _ => None,
        };
        Ok(RowStepEnd {
            header,
            runs: self.runs,
            changes: self.changes,
            drops: self.drops,
            notes: self.notes,
            sources,
            table_sources,
            changed_by_column,
        })
    }
}

/// The 128-bit XXH3 of some fields of a row, each preceded by its length, so that rows are
/// compared by value without keeping them. Two different rows share a hash with probability
/// about n²/2¹²⁹ for n rows. The fields are written out into `scratch` (reused from row to
/// row) and hashed at once.
pub(crate) fn row_key(r: &RawRecord<'_>, cols: &[usize], scratch: &mut Vec<u8>) -> u128 {
    scratch.clear();
    for &c in cols {
        let v = r.field(c);
        scratch.extend_from_slice(&(v.len() as u64).to_le_bytes());
        scratch.extend_from_slice(v);
    }
    xxh3_128(scratch)
}

pub(crate) const AMBIGUOUS: &str = "ambiguous day and month";

/// Reads one value for `number` or `date`: the canonical text, or why not and what to do.
pub(crate) fn read_value(
    op: &Operation,
    text: &str,
) -> std::result::Result<String, (&'static str, OnError)> {
    match op {
        Operation::Number {
            decimal_comma,
            on_error,
            ..
        } => parse_amount(text, *decimal_comma).ok_or(("not an amount", *on_error)),
        Operation::Date {
            order, on_error, ..
        } => parse_date(text, *order).map_err(|p| {
            (
                match p {
                    DateProblem::Ambiguous => AMBIGUOUS,
                    DateProblem::NoSuchDate => "no such date",
                    DateProblem::NotADate => "not a date",
                },
                *on_error,
            )
        }),
        _ => Ok(text.to_string()),
    }
}

/// `map`, ready to run: the mapping table's entries in memory.
pub struct Mapper {
    /// `None` while the table is an intake recorded with the step.
    pub(crate) table_id: Option<i64>,
    pub(crate) table_hash: String,
    pub(crate) to_column: String,
    pub(crate) entries: HashMap<String, String>,
}

/// A table read whole into memory (mapping and lookup tables are small; the whole table is
/// held while the step runs).
pub(crate) struct Table {
    /// `None` while the table is an intake recorded with the step.
    pub(crate) id: Option<i64>,
    pub(crate) hash: String,
    pub(crate) header: Vec<String>,
    pub(crate) label: String,
    pub(crate) rows: Vec<Vec<String>>,
}

impl Table {
    pub(crate) fn column(&self, name: &str, what: &str) -> Result<usize> {
        self.header.iter().position(|h| h == name).ok_or_else(|| {
            Error::usage(format!(
                "column \"{name}\" is not in the {what} {}; its columns are: {}",
                self.label,
                self.header.join(", ")
            ))
        })
    }
}

impl Mapper {
    pub(crate) fn from_table(op: &Operation, table: Table) -> Result<Option<Mapper>> {
        let Operation::Map { from, to, .. } = op else {
            return Ok(None);
        };
        let label = table.label.clone();
        let pick = |name: &Option<String>, default: usize| -> Result<usize> {
            match name {
                Some(n) => table.column(n, "mapping table"),
                None if table.header.len() == 2 => Ok(default),
                None => Err(Error::usage(format!(
                    "the mapping table {label} has {} column{}; name the two to use with --from COL --to COL",
                    table.header.len(),
                    if table.header.len() == 1 { "" } else { "s" }
                ))),
            }
        };
        let (f, t) = (pick(from, 0)?, pick(to, 1)?);
        let mut entries: HashMap<String, String> = HashMap::new();
        // The 0-based data row where each value was first given.
        let mut first_row: HashMap<&str, usize> = HashMap::new();
        let mut dups: Vec<String> = Vec::new();
        for (row_idx, r) in table.rows.iter().enumerate() {
            let first = *first_row.entry(r[f].as_str()).or_insert(row_idx);
            if let Some(prev) = entries.insert(r[f].clone(), r[t].clone()) {
                let seen = format!("\"{}\"", r[f]);
                if prev != r[t] && dups.len() < 10 && !dups.iter().any(|d| d.starts_with(&seen)) {
                    // Data rows on screen are 1-based.
                    dups.push(format!(
                        "{seen} (data row {} gives \"{prev}\", data row {} \"{}\")",
                        first + 1,
                        row_idx + 1,
                        r[t]
                    ));
                }
            }
        }
        if !dups.is_empty() {
            return Err(ErrorKind::Data(format!(
                "the mapping table {label} gives more than one value for: {}; keep one entry per value",
                dups.join(", ")
            ))
            .into());
        }
        Ok(Some(Mapper {
            table_id: table.id,
            table_hash: table.hash,
            to_column: table.header[t].clone(),
            entries,
        }))
    }
}

/// `lookup`, ready to run: the looked-up table indexed by its key.
pub struct Looker {
    pub(crate) table_id: Option<i64>,
    pub(crate) table_hash: String,
    /// Input columns holding the key, in key order.
    pub(crate) key_idx: Vec<usize>,
    /// The table columns taken, by name.
    pub(crate) take: Vec<String>,
    pub(crate) entries: HashMap<Vec<String>, Vec<String>>,
    pub(crate) unmatched_fail: bool,
}

impl Looker {
    pub(crate) fn from_table(
        op: &Operation,
        header: &[String],
        label: &str,
        table: Table,
    ) -> Result<Option<Looker>> {
        let Operation::Lookup {
            on,
            table_on,
            take,
            unmatched_fail,
            ..
        } = op
        else {
            return Ok(None);
        };
        let key_idx: Vec<usize> = on
            .iter()
            .map(|c| super::derive::find(header, c, label))
            .collect::<Result<_>>()?;
        let table_keys = table_on.as_ref().unwrap_or(on);
        if table_keys.len() != on.len() {
            return Err(Error::usage("--table-on needs as many columns as --on"));
        }
        let tk: Vec<usize> = table_keys
            .iter()
            .map(|c| table.column(c, "lookup table"))
            .collect::<Result<_>>()?;
        let tt: Vec<usize> = take
            .iter()
            .map(|c| table.column(c, "lookup table"))
            .collect::<Result<_>>()?;
        let mut entries: HashMap<Vec<String>, Vec<String>> = HashMap::new();
        let mut dups: Vec<String> = Vec::new();
        for r in &table.rows {
            let k: Vec<String> = tk.iter().map(|&c| r[c].clone()).collect();
            let v: Vec<String> = tt.iter().map(|&c| r[c].clone()).collect();
            if entries.insert(k.clone(), v).is_some() && dups.len() < 10 {
                let shown = k.join(", ");
                if !dups.contains(&shown) {
                    dups.push(shown);
                }
            }
        }
        if !dups.is_empty() {
            return Err(ErrorKind::Data(format!(
                "the lookup table {} has more than one row for the key {}; a key must pick one row",
                table.label,
                dups.iter()
                    .map(|d| format!("\"{d}\""))
                    .collect::<Vec<_>>()
                    .join(", ")
            ))
            .into());
        }
        Ok(Some(Looker {
            table_id: table.id,
            table_hash: table.hash,
            key_idx,
            take: take.clone(),
            entries,
            unmatched_fail: *unmatched_fail,
        }))
    }

    pub(crate) fn find(&self, r: &RawRecord<'_>) -> Option<&Vec<String>> {
        let k: Vec<String> = self
            .key_idx
            .iter()
            .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
            .collect();
        self.entries.get(&k)
    }
}

/// `replace`, ready to run: the regular expression compiled once.
pub(crate) enum Replacer {
    Literal { find: String, with: String },
    Regex { re: regex::Regex, with: String },
}

impl Replacer {
    pub(crate) fn new(op: &Operation) -> Result<Option<Replacer>> {
        let Operation::Replace {
            find, with, regex, ..
        } = op
        else {
            return Ok(None);
        };
        if find.is_empty() {
            return Err(Error::usage("replace needs something to find: --find TEXT"));
        }
        Ok(Some(if *regex {
            let re = regex::Regex::new(find).map_err(|e| {
                Error::usage(format!(
                    "--find \"{find}\" is not a valid regular expression: {}",
                    e.to_string().lines().last().unwrap_or("")
                ))
            })?;
            Replacer::Regex {
                re,
                with: with.clone(),
            }
        } else {
            Replacer::Literal {
                find: find.clone(),
                with: with.clone(),
            }
        }))
    }

    pub(crate) fn apply(&self, text: &str) -> Option<String> {
        let new = match self {
            Replacer::Literal { find, with } => text.replace(find.as_str(), with),
            Replacer::Regex { re, with } => re.replace_all(text, with.as_str()).into_owned(),
        };
        (new != text).then_some(new)
    }
}

/// How `fill` finds the value for a blank cell.
pub(crate) struct FillFrom {
    pub(crate) value: Option<String>,
    pub(crate) from: Option<(usize, String)>,
    pub(crate) null_tokens: Vec<Vec<u8>>,
}

impl FillFrom {
    pub(crate) fn new(op: &Operation, input: &Version) -> Result<Option<FillFrom>> {
        let Operation::Fill { value, from, .. } = op else {
            return Ok(None);
        };
        let from = match from {
            None => None,
            Some(name) => Some((
                input.header.iter().position(|h| h == name).ok_or_else(|| {
                    Error::usage(format!(
                        "column \"{name}\" is not in {}; its columns are: {}",
                        input.label(),
                        input.header.join(", ")
                    ))
                })?,
                name.clone(),
            )),
        };
        match (&value, &from) {
            (Some(_), None) | (None, Some(_)) => {}
            _ => {
                return Err(Error::usage(
                    "fill takes exactly one of --value TEXT or --from COLUMN",
                ))
            }
        }
        Ok(Some(FillFrom {
            value: value.clone(),
            from,
            null_tokens: input
                .null_tokens
                .iter()
                .map(|t| t.as_bytes().to_vec())
                .collect(),
        }))
    }

    pub(crate) fn source_column(&self) -> Option<&str> {
        self.from.as_ref().map(|(_, n)| n.as_str())
    }

    pub(crate) fn blank(&self, v: &[u8]) -> bool {
        v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v)
    }

    /// The value for a cell currently `old`, when it is blank and there is something to put in.
    pub(crate) fn fill(&self, old: &[u8], r: &RawRecord<'_>) -> Option<String> {
        if !self.blank(old) {
            return None;
        }
        let new = match (&self.value, &self.from) {
            (Some(v), _) => v.clone(),
            (None, Some((c, _))) => {
                let v = r.field(*c);
                if self.blank(v) {
                    return None;
                }
                String::from_utf8_lossy(v).into_owned()
            }
            (None, None) => return None,
        };
        (new.as_bytes() != old).then_some(new)
    }
}

/// Decides which input rows an operation keeps. Cell operations keep every row.
pub(crate) enum RowChooser {
    All,
    /// `keep` and `drop`: rows where the predicate holds are kept (or removed).
    Filter {
        predicate: Predicate,
        keep_when_true: bool,
        null_tokens: Vec<Vec<u8>>,
        /// What each removed row records as its reason.
        reason: String,
    },
    /// `dedupe`: the first (or last) row of every key, by the key's hash.
    Dedupe {
        cols: Vec<usize>,
        /// keep first: the first row seen of each key; keep last: the last row of each key,
        /// found by a pass over the input before the main one.
        chosen: KeySet,
        keep_last: bool,
        what: String,
        /// The key fields of the current row, written out for [`row_key`].
        scratch: Vec<u8>,
    },
}

impl RowChooser {
    pub(crate) fn new(
        store: &Store,
        input: &Version,
        op: &Operation,
        targets: &[usize],
    ) -> Result<Self> {
        let null_tokens = || {
            input
                .null_tokens
                .iter()
                .map(|t| t.as_bytes().to_vec())
                .collect()
        };
        let (key, keep) = match op {
            Operation::KeepRows { predicate } | Operation::DropRows { predicate } => {
                let predicate = Predicate::parse(predicate, &input.header)?;
                let keep_when_true = matches!(op, Operation::KeepRows { .. });
                return Ok(RowChooser::Filter {
                    reason: if keep_when_true {
                        format!("did not match the keep predicate: {}", predicate.text())
                    } else {
                        format!("matched the drop predicate: {}", predicate.text())
                    },
                    predicate,
                    keep_when_true,
                    null_tokens: null_tokens(),
                });
            }
            Operation::Dedupe { key, keep } => (key, keep),
            _ => return Ok(RowChooser::All),
        };
        let keep_last = *keep == KeepWhich::Last;
        // Keeping the last row, every key is recorded now; keeping the first, the table is
        // sized when the rows are about to pass (`RowStep::expect_rows`), so that a step
        // prepared to compute one row again (a trail) does not allocate it for every row.
        let mut chosen = if keep_last {
            KeySet::with_expected(input.n_rows)
        } else {
            KeySet::default()
        };
        let mut scratch = Vec::new();
        if keep_last {
            store.objects.each_row(input, |row, r| {
                chosen.insert(row_key(&r, targets, &mut scratch), row);
                Ok(())
            })?;
        }
        let what = match key {
            None => "the whole row".to_string(),
            Some(k) => format!("key {}", k.join(", ")),
        };
        Ok(RowChooser::Dedupe {
            cols: targets.to_vec(),
            chosen,
            keep_last,
            what,
            scratch,
        })
    }

    /// Whether input row `row` is to be removed; a removed row is recorded in `log` with its
    /// reason.
    pub(crate) fn drops(&mut self, row: u64, r: &RawRecord<'_>, log: &mut DropLog) -> bool {
        if let RowChooser::Filter {
            predicate,
            keep_when_true,
            null_tokens,
            reason,
        } = self
        {
            let blank = |v: &[u8]| v.is_empty() || null_tokens.iter().any(|t| t.as_slice() == v);
            let holds = predicate.holds(r, &blank);
            if holds != *keep_when_true {
                log.push(row, reason, None);
                return true;
            }
            return false;
        }
        let RowChooser::Dedupe {
            cols,
            chosen,
            keep_last,
            what,
            scratch,
        } = self
        else {
            return false;
        };
        let k = row_key(r, cols, scratch);
        let kept = if *keep_last {
            chosen.get(k).unwrap_or(row)
        } else {
            chosen.first_or_insert(k, row)
        };
        if kept == row {
            return false;
        }
        log.push(row, &format!("({what})"), Some(kept));
        true
    }
}
