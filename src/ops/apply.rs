//! Running one operation over a stored version and recording the result: the new version (as
//! canonical CSV), a step of kind `operation`, and its provenance — the row map as runs, every
//! changed cell with its old and new value, and every dropped input row with its reason. Provenance grows with what changed, not with
//! the number of rows: a cell operation that changes 10 cells of a million rows records 10 cell
//! changes and one run.
//!
//! Like intake, nothing is referenced before everything succeeded: the input is re-hashed as it
//! is read (a damaged object stops the step), the output objects are made durable, then one
//! transaction records the step, the version, its provenance and the audit entry.

use std::io::{self, Read};
use std::path::Path;

use serde_json::json;

use std::collections::HashMap;

use xxhash_rust::xxh3::Xxh3;

use super::date::{parse_date, DateProblem};
use super::number::parse_amount;
use super::predicate::Predicate;
use super::{KeepWhich, OnError, Operation};
use crate::clock;
use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::intake::{self, validate_dataset_name, IngestOptions, Prepared, PreparedIngest};
use crate::model::Dialect;
use crate::model::{Agent, LineageKind, RowRun, StepKind, Version};
use crate::provenance::{ChangeLog, DropLog};
use crate::refs;
use crate::store::{NewStep, NewVersion, Store};
use crate::table::write::{canonical_dialect, CanonicalWriter, Written};
use crate::table::{for_each_record, RawRecord, ReadSettings};

/// What `sluice clean` was asked to do.
#[derive(Debug, Clone)]
pub struct ApplyOptions {
    pub op: Operation,
    pub reason: String,
    /// Record the result as a version of this dataset instead of the input's.
    pub output_dataset: Option<String>,
    pub agent: Agent,
    /// For `map`: a table file to take in as part of the same step (recorded only if the map
    /// succeeds), with the intake options for it.
    pub map_table_file: Option<(std::path::PathBuf, IngestOptions)>,
    /// Recompute a recorded step instead of recording a new one (replay): the expected
    /// output and provenance hashes. Nothing is written to the database; an output object
    /// missing from the store is restored when the recomputed bytes have its hash.
    pub replay: Option<ReplayCheck>,
    /// The recorded step this one repeats on other data (`replay --onto`).
    pub repeats: Option<i64>,
}

/// What a replayed step is expected to give.
#[derive(Debug, Clone)]
pub struct ReplayCheck {
    pub output_hash: String,
    pub provenance_hash: Option<String>,
}

/// What an apply did.
#[derive(Debug, Clone)]
pub enum ApplyOutcome {
    Recorded {
        input: Version,
        version: Version,
        step_id: i64,
        n_changed: u64,
        /// Changed cells per column, in column order (columns with none left out).
        changed_by_column: Vec<(String, u64)>,
        n_dropped: u64,
        n_noted: u64,
        /// A table file taken in with the step (`map --table FILE`), as `name (hash)`.
        table_taken_in: Option<String>,
    },
    /// A recorded step computed again (replay): what it gave, against what was recorded.
    Replayed {
        input: Version,
        /// The hash of the bytes computed now.
        output_hash: String,
        n_rows: u64,
        matches: bool,
        /// The provenance object computed now has the recorded hash (or both have none).
        provenance_matches: bool,
        /// The output object was missing and has been restored from the computed bytes.
        restored: bool,
    },
    /// The result equals the latest version of the target dataset: nothing was recorded.
    /// `notes` are what the step would have noted on cells (e.g. values `number` could not
    /// read and kept), so that the user still learns of them.
    Unchanged {
        input: Version,
        version: Version,
        notes: Vec<(u64, String, String)>,
    },
}

/// A reader that hashes what passes through it.
struct Checked<R> {
    inner: R,
    hasher: blake3::Hasher,
    progress: crate::progress::Task,
}

impl<R: Read> Read for Checked<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.hasher.update(&buf[..n]);
        self.progress.add(n as u64);
        Ok(n)
    }
}

pub fn apply(store: &mut Store, reference: &str, opts: &ApplyOptions) -> Result<ApplyOutcome> {
    let input = refs::resolve(&store.lineage, reference)?;
    match apply_to(store, input, opts, Mode::Record)? {
        Done::Outcome(o) => Ok(o),
        Done::Deferred(_) => {
            Err(ErrorKind::Internal("a step meant to be recorded was deferred".into()).into())
        }
    }
}

/// Computes the step `opts` describes on `input` and makes its output objects durable, but
/// records nothing: the result is what one transaction needs to record it later
/// ([`insert_pending`]), together with other steps (a revert records a whole chain at once).
/// `input` may itself be pending: a version whose objects are in the store but whose row in
/// the database is still to be written, marked by a negative id ([`pending_version`]).
pub fn compute(store: &mut Store, input: Version, opts: &ApplyOptions) -> Result<Pending> {
    match apply_to(store, input, opts, Mode::Defer)? {
        Done::Deferred(p) => Ok(p),
        Done::Outcome(_) => Err(ErrorKind::Internal("a deferred step was recorded".into()).into()),
    }
}

/// Whether a computed step is recorded at once or handed back to be recorded later.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Mode {
    Record,
    Defer,
}

/// What a computed step became.
pub(super) enum Done {
    Outcome(ApplyOutcome),
    Deferred(Pending),
}

fn apply_to(store: &mut Store, input: Version, opts: &ApplyOptions, mode: Mode) -> Result<Done> {
    let dataset = opts
        .output_dataset
        .clone()
        .unwrap_or_else(|| input.dataset.clone());
    validate_dataset_name(&dataset)?;
    if opts.reason.trim().is_empty() {
        return Err(Error::usage(
            "--why needs a reason: say why this step is done, e.g. --why \"till adds spaces\"",
        ));
    }
    if matches!(opts.op, Operation::Summarize { .. }) {
        return super::summarize::run(store, input, opts, mode);
    }
    if matches!(opts.op, Operation::Append { .. }) {
        return super::append::run(store, input, opts, mode);
    }
    // A mapping table is recorded by its exact version, whatever reference named it; a table
    // file is read and stored now but recorded only with the step.
    let mut table_ingest: Option<Box<PreparedIngest>> = None;
    let table_ref = match &opts.op {
        Operation::Map { table, .. } | Operation::Lookup { table, .. } => Some(table.as_str()),
        _ => None,
    };
    let table = match (table_ref, &opts.map_table_file) {
        (None, _) => None,
        (Some(r), Some((path, iopts))) => match intake::prepare(store, path, iopts)? {
            Prepared::Unchanged(v) => Some(Table::load(store, r, Some(TableSource::Version(v)))?),
            Prepared::Ready(p) => {
                let t = Table::load(store, r, Some(TableSource::Pending(&p)))?;
                table_ingest = Some(p);
                Some(t)
            }
        },
        (Some(r), None) => Some(Table::load(store, r, None)?),
    };
    let (mapper, looker) = match table {
        Some(t) if matches!(opts.op, Operation::Map { .. }) => {
            (Mapper::from_table(&opts.op, t)?, None)
        }
        Some(t) => (
            None,
            Looker::from_table(&opts.op, &input.header, &input.label(), t)?,
        ),
        None => (None, None),
    };
    let resolved;
    let opts = match (&mapper, &looker, &opts.op) {
        (
            _,
            Some(l),
            Operation::Lookup {
                on,
                table_on,
                take,
                unmatched_fail,
                ..
            },
        ) => {
            resolved = ApplyOptions {
                op: Operation::Lookup {
                    table: l.table_hash.clone(),
                    on: on.clone(),
                    table_on: table_on.clone(),
                    take: take.clone(),
                    unmatched_fail: *unmatched_fail,
                },
                ..opts.clone()
            };
            &resolved
        }
        (
            Some(m),
            _,
            Operation::Map {
                columns,
                from,
                to,
                unmatched,
                ..
            },
        ) => {
            resolved = ApplyOptions {
                op: Operation::Map {
                    columns: columns.clone(),
                    table: m.table_hash.clone(),
                    from: from.clone(),
                    to: to.clone(),
                    unmatched: *unmatched,
                },
                ..opts.clone()
            };
            &resolved
        }
        _ => opts,
    };
    let label = input.label();
    let targets = opts.op.target_columns(&input.header, &label)?;
    let mut is_target = vec![false; input.header.len()];
    for &t in &targets {
        is_target[t] = true;
    }
    // Each output column's name, the input column its values come from, and for a derived
    // column how it is computed.
    let shaped = opts.op.derived_columns(&input.header, &label)?;
    let derivs: Vec<Option<super::derive::Derivation>> =
        shaped.iter().map(|(_, _, d)| d.clone()).collect();
    let columns: Vec<(String, usize)> = shaped.into_iter().map(|(n, i, _)| (n, i)).collect();
    let out_header: Vec<String> = columns.iter().map(|(n, _)| n.clone()).collect();
    let fill = FillFrom::new(&opts.op, &input)?;
    let replacer = Replacer::new(&opts.op)?;
    let started_at = clock::now_rfc3339();
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);

    let mut writer =
        output_writer(store, opts, &out_header, &input.null_tokens).map_err(store_io)?;
    let mut changes = ChangeLog::new(columns.len());
    let mut drops = DropLog::default();
    let mut runs: Vec<RowRun> = Vec::new();
    let mut changed_per_column = vec![0u64; columns.len()];
    let mut new_values: Vec<Option<Vec<u8>>> = vec![None; columns.len()];
    let mut chooser = RowChooser::new(store, &input, &opts.op, &targets)?;
    let null_tokens: Vec<Vec<u8>> = input
        .null_tokens
        .iter()
        .map(|t| t.as_bytes().to_vec())
        .collect();
    let mut notes: Vec<(u64, String, String)> = Vec::new();
    // Cells `number` or `date` could not read and must not pass: (input row, column, text, why).
    let mut failures: Vec<(u64, String, String, &'static str)> = Vec::new();
    let mut out_row = 0u64;
    each_input_row(store, &input, |in_row, r| {
        if chooser.drops(in_row, &r, &mut drops) {
            return Ok(());
        }
        match runs.last_mut() {
            Some(run) if run.in_start + run.len == in_row && run.out_start + run.len == out_row => {
                run.len += 1
            }
            _ => runs.push(RowRun {
                out_start: out_row,
                in_start: in_row,
                len: 1,
            }),
        }
        for (o, slot) in new_values.iter_mut().enumerate() {
            *slot = None;
            let c = columns[o].1;
            if !is_target[c] || !opts.op.changes_cells() {
                continue;
            }
            let old = r.field(c);
            if opts.op.cell_keeps(old) {
                continue;
            }
            let text = std::str::from_utf8(old).map_err(|_| {
                Error::from(ErrorKind::Inconsistent(format!(
                    "{label} holds invalid UTF-8 in data row {} column {}; run `sluice verify`",
                    in_row + 1,
                    input.header[c]
                )))
            })?;
            let new = match (&fill, &opts.op) {
                (Some(f), _) => f.fill(old, &r),
                (None, Operation::Number { .. } | Operation::Date { .. }) => {
                    if old.is_empty() || null_tokens.iter().any(|t| t.as_slice() == old) {
                        None
                    } else {
                        match read_value(&opts.op, text) {
                            Ok(n) => (n != text).then_some(n),
                            // An ambiguous date always stops the step: only --order decides.
                            Err((why, on_error)) => match on_error {
                                OnError::Keep if why != AMBIGUOUS => {
                                    notes.push((
                                        out_row,
                                        columns[o].0.clone(),
                                        format!("{why}; kept as it was"),
                                    ));
                                    None
                                }
                                OnError::Blank if why != AMBIGUOUS => {
                                    notes.push((
                                        out_row,
                                        columns[o].0.clone(),
                                        format!("{why}; blanked"),
                                    ));
                                    Some(String::new())
                                }
                                _ => {
                                    failures.push((
                                        in_row,
                                        columns[o].0.clone(),
                                        text.to_string(),
                                        why,
                                    ));
                                    None
                                }
                            },
                        }
                    }
                }
                (None, Operation::Replace { .. }) => replacer.as_ref().and_then(|r| r.apply(text)),
                (None, Operation::Map { unmatched, .. }) => match &mapper {
                    Some(m)
                        if !(old.is_empty() || null_tokens.iter().any(|t| t.as_slice() == old)) =>
                    {
                        match m.entries.get(text) {
                            Some(new) => (new != text).then(|| new.clone()),
                            None => match unmatched {
                                OnError::Keep => {
                                    notes.push((
                                        out_row,
                                        columns[o].0.clone(),
                                        "no entry in the mapping table; kept as it was".into(),
                                    ));
                                    None
                                }
                                OnError::Blank => {
                                    notes.push((
                                        out_row,
                                        columns[o].0.clone(),
                                        "no entry in the mapping table; blanked".into(),
                                    ));
                                    Some(String::new())
                                }
                                OnError::Fail => {
                                    failures.push((
                                        in_row,
                                        columns[o].0.clone(),
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
                (None, op) => op.cell(text),
            };
            if let Some(new) = new {
                changes.push(o, out_row);
                changed_per_column[o] += 1;
                *slot = Some(new.into_bytes());
            }
        }
        if let Some(l) = &looker {
            let base = columns.len() - l.take.len();
            match l.find(&r) {
                Some(values) => {
                    for (k, v) in values.iter().enumerate() {
                        new_values[base + k] = Some(v.clone().into_bytes());
                    }
                }
                None if l.unmatched_fail => {
                    let key: Vec<String> = l
                        .key_idx
                        .iter()
                        .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
                        .collect();
                    failures.push((
                        in_row,
                        l.take[0].clone(),
                        key.join(", "),
                        "no row of the lookup table has this key",
                    ));
                }
                None => {
                    for k in 0..l.take.len() {
                        new_values[base + k] = Some(Vec::new());
                    }
                    notes.push((
                        out_row,
                        l.take[0].clone(),
                        "no row of the lookup table has this key; left blank".into(),
                    ));
                }
            }
        }
        for (o, d) in derivs.iter().enumerate() {
            if let Some(d) = d {
                let is_blank =
                    |v: &[u8]| v.is_empty() || null_tokens.iter().any(|t| t.as_slice() == v);
                new_values[o] = Some(d.value(&r, &is_blank).into_bytes());
            }
        }
        let fields: Vec<&[u8]> = (0..columns.len())
            .map(|o| match &new_values[o] {
                Some(v) => v.as_slice(),
                None => r.field(columns[o].1),
            })
            .collect();
        writer.write_row(&fields).map_err(store_io)?;
        out_row += 1;
        Ok(())
    })?;
    if !failures.is_empty() {
        let shown: Vec<String> = failures
            .iter()
            .take(10)
            .map(|(row, col, v, why)| format!("data row {} {col} \"{v}\" ({why})", row + 1))
            .collect();
        let ambiguous = failures.iter().any(|f| f.3 == AMBIGUOUS);
        let what = if matches!(opts.op, Operation::Date { .. }) {
            "a date"
        } else {
            "an amount"
        };
        return Err(ErrorKind::Data(format!(
            "{label}: {} cannot be read as {what}: {}{}; {}",
            if failures.len() == 1 { "1 cell".to_string() } else { format!("{} cells", failures.len()) },
            shown.join(", "),
            if failures.len() > 10 { format!(", and {} more", failures.len() - 10) } else { String::new() },
            if ambiguous {
                "say which order the dates are written in with --order dmy or --order mdy"
            } else {
                "fix them upstream, or pass --on-error keep (leave the text, noted) or --on-error blank (empty the cell, noted); in a plan, \"on_error\": \"keep\" or \"blank\""
            }
        ))
        .into());
    }
    let written = writer.finish().map_err(store_io)?;
    // Output columns whose values come from an input column of another name, and derived
    // columns with every column they read.
    let mut sources: Vec<(String, String)> = columns
        .iter()
        .zip(&derivs)
        .filter(|((name, c), d)| d.is_none() && input.header[*c] != *name)
        .map(|((name, c), _)| (name.clone(), input.header[*c].clone()))
        .collect();
    for ((name, _), d) in columns.iter().zip(&derivs) {
        if let Some(d) = d {
            for c in d.sources() {
                sources.push((name.clone(), input.header[c].clone()));
            }
        }
    }
    if let Some(f) = &fill {
        if let Some(from) = f.source_column() {
            for t in &targets {
                sources.push((input.header[*t].clone(), from.to_string()));
                sources.push((input.header[*t].clone(), input.header[*t].clone()));
            }
        }
    }
    let changed_by_column: Vec<(String, u64)> = out_header
        .iter()
        .zip(&changed_per_column)
        .filter(|(_, n)| **n > 0)
        .map(|(h, n)| (h.clone(), *n))
        .collect();
    let prov = Provenance {
        runs,
        changes,
        drops,
        notes,
        sources,
        table: match (&mapper, &looker) {
            (Some(m), _) => Some((
                m.table_id,
                targets
                    .iter()
                    .map(|&t| (input.header[t].clone(), m.to_column.clone()))
                    .collect(),
            )),
            (_, Some(l)) => Some((
                l.table_id,
                l.take.iter().map(|c| (c.clone(), c.clone())).collect(),
            )),
            _ => None,
        },
        other: None,
    };
    record(
        store,
        input,
        &dataset,
        opts,
        &started_at,
        written,
        &out_header,
        prov,
        None,
        changed_by_column,
        table_ingest.as_deref_mut(),
        mode,
    )
}

/// Everything a built-in step records about how its output came from its input.
pub(crate) struct Provenance {
    pub runs: Vec<RowRun>,
    /// Changed cells by output column position (of the output header).
    pub changes: ChangeLog,
    pub drops: DropLog,
    pub notes: Vec<(u64, String, String)>,
    /// (output column, input column) where they differ.
    pub sources: Vec<(String, String)>,
    /// A second input read as a table (map, lookup): its version id (`None` while the table
    /// is an intake recorded with the step) and (output column, table column) pairs.
    pub table: Option<TableInput>,
    /// A second source whose rows are carried into the output (append).
    pub other: Option<OtherInput>,
}

impl Provenance {
    /// The row maps by the position of their input among the step's inputs, as `record`
    /// records them: the input first, then a table, then an append's other source.
    pub(crate) fn run_sets(&self) -> Vec<(u32, &[RowRun])> {
        let other_position = 1 + u32::from(self.table.is_some());
        let mut sets: Vec<(u32, &[RowRun])> = Vec::new();
        if !self.runs.is_empty() {
            sets.push((0, &self.runs));
        }
        if let Some(o) = self.other.as_ref().filter(|o| !o.runs.is_empty()) {
            sets.push((other_position, &o.runs));
        }
        sets
    }
}

/// The second source of an `append`: its version, the runs of output rows that came from it,
/// and (output column, its column) pairs.
pub(crate) struct OtherInput {
    pub id: i64,
    pub runs: Vec<RowRun>,
    pub sources: Vec<(String, String)>,
}

/// The writer of a step's output: in replay, when the recorded output is already stored, one
/// that only hashes (nothing is written to disk); otherwise one that keeps the bytes.
pub(super) fn output_writer(
    store: &Store,
    opts: &ApplyOptions,
    header: &[String],
    null_tokens: &[String],
) -> io::Result<CanonicalWriter> {
    let stored = opts.replay.as_ref().is_some_and(|c| {
        c.output_hash
            .parse::<Hash>()
            .is_ok_and(|h| store.objects.exists(&h))
    });
    if stored {
        CanonicalWriter::hashing_only(header, null_tokens)
    } else {
        CanonicalWriter::new(&store.objects, header, null_tokens)
    }
}

/// A step computed and made durable (output objects and provenance object written) but not
/// yet in the database: everything one transaction needs to record it ([`insert_pending`]).
/// Ids of inputs that are themselves pending are negative ([`pending_version`]).
#[derive(Debug, Clone)]
pub struct Pending {
    pub kind: StepKind,
    pub operation: Option<String>,
    pub params: serde_json::Value,
    pub reason: String,
    pub agent: Agent,
    pub started_at: String,
    pub ended_at: String,
    pub rows_in: u64,
    pub lineage: LineageKind,
    pub code: Option<serde_json::Value>,
    pub repeats_step: Option<i64>,
    /// The provenance object (hash, bytes), already durable.
    pub provenance: Option<(String, u64)>,
    /// (version id, role) of each input, in order.
    pub inputs: Vec<(i64, String)>,
    pub dataset: String,
    pub key: Option<Vec<String>>,
    pub hash: String,
    pub n_bytes: u64,
    pub row_index: String,
    pub row_index_bytes: u64,
    pub n_rows: u64,
    pub header: Vec<String>,
    pub null_tokens: Vec<String>,
    pub profiles: Vec<crate::model::ColumnProfile>,
    /// Column sources by the input they name: (input version id, [(output column, its column)]).
    pub sources: Vec<(i64, Vec<(String, String)>)>,
    pub notes: Vec<(u64, String, String)>,
    pub n_changed: u64,
    pub changed_by_column: Vec<(String, u64)>,
    pub n_dropped: u64,
}

impl Pending {
    /// The version this step will record as `seq` of its dataset, as a [`Version`] the next
    /// computed step can read (its id is `placeholder`, negative).
    pub fn version(&self, placeholder: i64, seq: u64) -> Version {
        Version {
            id: placeholder,
            dataset: self.dataset.clone(),
            seq,
            hash: self.hash.clone(),
            row_index: self.row_index.clone(),
            n_rows: self.n_rows,
            n_cols: self.header.len() as u64,
            n_bytes: self.n_bytes,
            header: self.header.clone(),
            dialect: canonical_dialect(),
            null_tokens: self.null_tokens.clone(),
            created_at: self.ended_at.clone(),
            step_id: placeholder,
        }
    }
}

/// The placeholder id of the `index`-th pending version of a chain (0-based): negative, so it
/// can never be a real row id.
pub fn pending_id(index: usize) -> i64 {
    -(index as i64) - 1
}

/// Records a pending step and its version inside `tx`; `real` turns a pending input's
/// placeholder id into the id its version was given. Returns (version id, step id, seq). The
/// audit entry is the caller's, since one may cover several steps.
pub fn insert_pending(
    tx: &mut crate::store::Tx<'_>,
    p: &Pending,
    real: &dyn Fn(i64) -> Result<i64>,
) -> Result<(i64, i64, u64)> {
    if let Some((hash, n)) = &p.provenance {
        tx.insert_object(hash, *n, "blob", &p.ended_at)?;
    }
    let inputs: Vec<(i64, &str)> = p
        .inputs
        .iter()
        .map(|(id, role)| Ok((real(*id)?, role.as_str())))
        .collect::<Result<_>>()?;
    let step_id = tx.insert_step(&NewStep {
        provenance: p.provenance.as_ref().map(|(h, _)| h.as_str()),
        kind: p.kind,
        operation: p.operation.as_deref(),
        params: p.params.clone(),
        agent: &p.agent,
        reason: Some(&p.reason),
        started_at: p.started_at.clone(),
        ended_at: p.ended_at.clone(),
        rows_in: Some(p.rows_in),
        rows_out: Some(p.n_rows),
        lineage: p.lineage,
        source: None,
        code: p.code.as_ref(),
        inputs,
        repeats_step: p.repeats_step,
    })?;
    let dialect = canonical_dialect();
    let (version_id, seq) = tx.insert_version(&NewVersion {
        dataset: &p.dataset,
        key: p.key.as_deref(),
        step_id,
        hash: &p.hash,
        n_bytes: p.n_bytes,
        row_index: &p.row_index,
        row_index_bytes: p.row_index_bytes,
        n_rows: p.n_rows,
        header: &p.header,
        dialect: &dialect,
        null_tokens: &p.null_tokens,
        profiles: &p.profiles,
        created_at: &p.ended_at,
    })?;
    for (input, sources) in &p.sources {
        tx.insert_column_sources(step_id, version_id, real(*input)?, sources)?;
    }
    tx.insert_cell_notes(step_id, version_id, &p.notes)?;
    Ok((version_id, step_id, seq))
}

/// What a step of kind `kind` records besides its output: for [`persist`].
pub(crate) struct StepMeta<'a> {
    pub kind: StepKind,
    pub operation: Option<String>,
    pub params: serde_json::Value,
    pub reason: &'a str,
    pub agent: &'a Agent,
    pub started_at: &'a str,
    pub lineage: LineageKind,
    pub repeats_step: Option<i64>,
}

/// Makes a written output and its provenance object durable and describes the step that will
/// record them. A table still to be taken in with the step (a `map` table file) is named by id
/// 0 in `sources` until the caller knows its id.
#[allow(clippy::too_many_arguments)]
pub(crate) fn persist(
    store: &Store,
    input: &Version,
    dataset: &str,
    meta: StepMeta<'_>,
    written: Written,
    out_header: &[String],
    prov: Provenance,
    key: Option<Vec<String>>,
    changed_by_column: Vec<(String, u64)>,
) -> Result<Pending> {
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
    let (table_hash, n_bytes) = written.table.finish().map_err(store_io)?;
    let (index_hash, index_bytes) = written.index.finish().map_err(store_io)?;
    // The row maps, changed cells and dropped rows, as one object (none when there are none).
    let run_sets = prov.run_sets();
    let provenance = if prov.changes.is_empty() && prov.drops.is_empty() && run_sets.is_empty() {
        None
    } else {
        let bytes = crate::provenance::encode(out_header, &prov.changes, &prov.drops, &run_sets);
        let mut w = store.objects.writer().map_err(store_io)?;
        w.write(&bytes).map_err(store_io)?;
        let (hash, n) = w.finish().map_err(store_io)?;
        Some((hash.hex(), n))
    };
    let mut inputs = vec![(input.id, "input".to_string())];
    let mut sources = vec![(input.id, prov.sources.clone())];
    if let Some((id, table_sources)) = &prov.table {
        let id = id.unwrap_or(0);
        inputs.push((id, "table".into()));
        sources.push((id, table_sources.clone()));
    }
    if let Some(o) = &prov.other {
        inputs.push((o.id, "other".into()));
        sources.push((o.id, o.sources.clone()));
    }
    Ok(Pending {
        kind: meta.kind,
        operation: meta.operation,
        params: meta.params,
        reason: meta.reason.to_string(),
        agent: meta.agent.clone(),
        started_at: meta.started_at.to_string(),
        ended_at: clock::now_rfc3339(),
        rows_in: input.n_rows,
        lineage: meta.lineage,
        code: None,
        repeats_step: meta.repeats_step,
        provenance,
        inputs,
        dataset: dataset.to_string(),
        key,
        hash: table_hash.hex(),
        n_bytes,
        row_index: index_hash.hex(),
        row_index_bytes: index_bytes,
        n_rows: written.n_rows,
        header: out_header.to_vec(),
        null_tokens: input.null_tokens.clone(),
        profiles: written.profiles,
        sources,
        notes: prov.notes,
        n_changed: prov.changes.len() as u64,
        changed_by_column,
        n_dropped: prov.drops.len() as u64,
    })
}

/// Persists a written output and records it: the version (or nothing, when it equals the
/// dataset's latest), the step, its provenance and the audit entry, in one transaction. In
/// [`Mode::Defer`] the step is only made durable and handed back.
#[allow(clippy::too_many_arguments)]
pub(super) fn record(
    store: &mut Store,
    input: Version,
    dataset: &str,
    opts: &ApplyOptions,
    started_at: &str,
    written: Written,
    out_header: &[String],
    prov: Provenance,
    key: Option<Vec<String>>,
    changed_by_column: Vec<(String, u64)>,
    table_ingest: Option<&mut PreparedIngest>,
    mode: Mode,
) -> Result<Done> {
    let out_hash = written.table.hash().hex();
    if let Some(check) = &opts.replay {
        return replayed(store, input, written, out_header, &prov, &out_hash, check)
            .map(Done::Outcome);
    }
    if mode == Mode::Record {
        if let Some(latest) = store.lineage.latest_version(dataset)? {
            if latest.hash == out_hash {
                return Ok(Done::Outcome(ApplyOutcome::Unchanged {
                    input,
                    version: latest,
                    notes: prov.notes,
                }));
            }
        }
    }
    let has_table_file = matches!(prov.table, Some((None, _)));
    let meta = StepMeta {
        kind: StepKind::Operation,
        operation: Some(opts.op.name().to_string()),
        params: opts.op.params(),
        reason: &opts.reason,
        agent: &opts.agent,
        started_at,
        lineage: LineageKind::Exact,
        repeats_step: opts.repeats,
    };
    let mut pending = persist(
        store,
        &input,
        dataset,
        meta,
        written,
        out_header,
        prov,
        key,
        changed_by_column,
    )?;
    if mode == Mode::Defer {
        if has_table_file {
            return Err(Error::usage(
                "a step that takes a table file in cannot be computed ahead; give the table as a stored version",
            ));
        }
        return Ok(Done::Deferred(pending));
    }
    let store_dir = store.dir().to_path_buf();
    let (version_id, step_id, table_label) = store.write(|tx| {
        // A table file taken in with this step is recorded first, in the same transaction.
        let mut table_label = None;
        if let (true, Some(p)) = (has_table_file, table_ingest) {
            match p.commit(&store_dir, tx)? {
                Some((id, _)) => {
                    table_label = Some(p.label());
                    for (input, _) in pending.inputs.iter_mut().skip(1).take(1) {
                        *input = id;
                    }
                    for (input, _) in pending.sources.iter_mut().skip(1).take(1) {
                        *input = id;
                    }
                }
                None => {
                    return Err(Error::from(ErrorKind::Inconsistent(
                        "the mapping table was recorded by another command meanwhile; run the step again".into(),
                    )))
                }
            }
        }
        let (version_id, step_id, seq) = insert_pending(tx, &pending, &|id| Ok(id))?;
        tx.audit(
            &opts.agent,
            "apply",
            &format!("{dataset}@{seq}"),
            &json!({
                "operation": pending.params,
                "input": input.hash,
                "version": pending.hash,
                "step": step_id,
                "cells_changed": pending.n_changed,
                "rows_dropped": pending.n_dropped,
                "provenance": pending.provenance.as_ref().map(|(h, _)| h),
                "cells_noted": pending.notes.len(),
            }),
            &pending.ended_at,
        )?;
        Ok((version_id, step_id, table_label))
    })?;
    let version = store
        .lineage
        .version_by_id(version_id)?
        .ok_or_else(|| Error::from(ErrorKind::Inconsistent("the new version vanished".into())))?;
    Ok(Done::Outcome(ApplyOutcome::Recorded {
        input,
        version,
        step_id,
        table_taken_in: table_label,
        n_changed: pending.n_changed,
        changed_by_column: pending.changed_by_column,
        n_dropped: pending.n_dropped,
        n_noted: pending.notes.len() as u64,
    }))
}

/// The end of a replayed step: the computed output compared with the recorded one, and a
/// missing output object restored from it when they agree.
fn replayed(
    store: &Store,
    input: Version,
    written: Written,
    out_header: &[String],
    prov: &Provenance,
    out_hash: &str,
    check: &ReplayCheck,
) -> Result<ApplyOutcome> {
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
    let run_sets = prov.run_sets();
    let prov_hash = (!(prov.changes.is_empty() && prov.drops.is_empty() && run_sets.is_empty()))
        .then(|| {
            let bytes =
                crate::provenance::encode(out_header, &prov.changes, &prov.drops, &run_sets);
            crate::hash::Hash::from_bytes(*blake3::hash(&bytes).as_bytes()).hex()
        });
    let matches = out_hash == check.output_hash;
    let n_rows = written.n_rows;
    let mut restored = false;
    if matches {
        let hash: crate::hash::Hash = out_hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        if !store.objects.exists(&hash) {
            written.table.finish().map_err(store_io)?;
            restored = true;
        }
    }
    Ok(ApplyOutcome::Replayed {
        input,
        output_hash: out_hash.to_string(),
        n_rows,
        matches,
        provenance_matches: prov_hash == check.provenance_hash,
        restored,
    })
}

/// Calls `f` with every data row of `input` (0-based index and record), re-hashing the object
/// as it is read; a mismatch is an error after the last row, before anything is recorded.
pub(super) fn each_input_row(
    store: &Store,
    input: &Version,
    f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    each_row(
        store,
        &input.hash,
        &input.dialect,
        &input.label(),
        Some(input.n_bytes),
        f,
    )
}

/// Calls `f` with every data row of version `v` (0-based index and record), re-hashing its
/// object as it is read (for readers outside the operations, such as checks).
pub fn each_version_row(
    store: &Store,
    v: &Version,
    f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    each_input_row(store, v, f)
}

/// [`each_input_row`] for an object known by hash, dialect and a label for messages.
fn each_row(
    store: &Store,
    hash: &str,
    dialect: &Dialect,
    label: &str,
    n_bytes: Option<u64>,
    f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    let h: Hash = hash
        .parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
    each_row_from(
        store.objects.open_raw(&h)?,
        hash,
        dialect,
        label,
        n_bytes,
        f,
    )
}

/// Reads the rows of `reader`, whose bytes must hash to `hash`.
fn each_row_from(
    reader: Box<dyn Read + Send>,
    hash: &str,
    dialect: &Dialect,
    label: &str,
    n_bytes: Option<u64>,
    mut f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    let input_hash: Hash = hash
        .parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
    let mut checked = Checked {
        inner: reader,
        hasher: blake3::Hasher::new(),
        progress: crate::progress::Task::begin(
            || format!("reading {label}"),
            n_bytes,
            crate::progress::Unit::Bytes,
        ),
    };
    let settings = ReadSettings::for_dialect(dialect)?;
    let mut header_seen = !dialect.has_header;
    let mut row = 0u64;
    for_each_record(Path::new(label), &mut checked, &settings, |r| {
        if !header_seen {
            header_seen = true;
            return Ok(());
        }
        row += 1;
        f(row - 1, r)
    })?;
    let actual = Hash::from_bytes(*checked.hasher.finalize().as_bytes());
    if actual != input_hash {
        return Err(ErrorKind::ObjectCorrupt {
            hash: input_hash.hex(),
            actual: actual.hex(),
        }
        .into());
    }
    Ok(())
}

/// The 128-bit XXH3 of some fields of a row, each preceded by its length, so that rows are
/// compared by value without keeping them. Two different rows share a hash with probability
/// about n²/2¹²⁹ for n rows.
fn row_key(r: &RawRecord<'_>, cols: &[usize]) -> u128 {
    let mut h = Xxh3::new();
    for &c in cols {
        let v = r.field(c);
        h.update(&(v.len() as u64).to_le_bytes());
        h.update(v);
    }
    h.digest128()
}

const AMBIGUOUS: &str = "ambiguous day and month";

/// Reads one value for `number` or `date`: the canonical text, or why not and what to do.
fn read_value(op: &Operation, text: &str) -> std::result::Result<String, (&'static str, OnError)> {
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

/// A second input read as a table: its version id (`None` while the table is an intake
/// recorded with the step) and (output column, table column) pairs.
pub(crate) type TableInput = (Option<i64>, Vec<(String, String)>);

/// Where `map` takes its table from.
enum TableSource<'a> {
    Version(Box<Version>),
    Pending(&'a PreparedIngest),
}

/// `map`, ready to run: the mapping table's entries in memory.
struct Mapper {
    /// `None` while the table is an intake recorded with the step.
    table_id: Option<i64>,
    table_hash: String,
    to_column: String,
    entries: HashMap<String, String>,
}

/// A table read whole into memory (mapping and lookup tables are small; the whole table is
/// held while the step runs).
struct Table {
    /// `None` while the table is an intake recorded with the step.
    id: Option<i64>,
    hash: String,
    header: Vec<String>,
    label: String,
    rows: Vec<Vec<String>>,
}

impl Table {
    fn load(store: &Store, reference: &str, source: Option<TableSource<'_>>) -> Result<Table> {
        let source = match source {
            Some(s) => s,
            None => TableSource::Version(Box::new(refs::resolve(&store.lineage, reference)?)),
        };
        let (id, hash, header, dialect, label) = match &source {
            TableSource::Version(v) => (
                Some(v.id),
                v.hash.clone(),
                v.header.clone(),
                v.dialect.clone(),
                v.label(),
            ),
            TableSource::Pending(p) => (
                None,
                p.hash().to_string(),
                p.header.clone(),
                p.dialect.clone(),
                p.label(),
            ),
        };
        let reader: Box<dyn Read + Send> = match &source {
            TableSource::Version(_) => store.objects.open_raw(
                &hash
                    .parse()
                    .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?,
            )?,
            // Not stored under its name yet: read the file itself, checked against its hash.
            TableSource::Pending(p) => {
                Box::new(std::fs::File::open(p.path()).map_err(|e| Error::io(p.path(), e))?)
            }
        };
        let mut rows = Vec::new();
        each_row_from(reader, &hash, &dialect, &label, None, |_, r| {
            rows.push(
                r.iter()
                    .map(|f| String::from_utf8_lossy(f).into_owned())
                    .collect(),
            );
            Ok(())
        })?;
        Ok(Table {
            id,
            hash,
            header,
            label,
            rows,
        })
    }

    fn column(&self, name: &str, what: &str) -> Result<usize> {
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
    fn from_table(op: &Operation, table: Table) -> Result<Option<Mapper>> {
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
struct Looker {
    table_id: Option<i64>,
    table_hash: String,
    /// Input columns holding the key, in key order.
    key_idx: Vec<usize>,
    /// The table columns taken, by name.
    take: Vec<String>,
    entries: HashMap<Vec<String>, Vec<String>>,
    unmatched_fail: bool,
}

impl Looker {
    fn from_table(
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

    fn find(&self, r: &RawRecord<'_>) -> Option<&Vec<String>> {
        let k: Vec<String> = self
            .key_idx
            .iter()
            .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
            .collect();
        self.entries.get(&k)
    }
}

/// `replace`, ready to run: the regular expression compiled once.
enum Replacer {
    Literal { find: String, with: String },
    Regex { re: regex::Regex, with: String },
}

impl Replacer {
    fn new(op: &Operation) -> Result<Option<Replacer>> {
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

    fn apply(&self, text: &str) -> Option<String> {
        let new = match self {
            Replacer::Literal { find, with } => text.replace(find.as_str(), with),
            Replacer::Regex { re, with } => re.replace_all(text, with.as_str()).into_owned(),
        };
        (new != text).then_some(new)
    }
}

/// How `fill` finds the value for a blank cell.
struct FillFrom {
    value: Option<String>,
    from: Option<(usize, String)>,
    null_tokens: Vec<Vec<u8>>,
}

impl FillFrom {
    fn new(op: &Operation, input: &Version) -> Result<Option<FillFrom>> {
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

    fn source_column(&self) -> Option<&str> {
        self.from.as_ref().map(|(_, n)| n.as_str())
    }

    fn blank(&self, v: &[u8]) -> bool {
        v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v)
    }

    /// The value for a cell currently `old`, when it is blank and there is something to put in.
    fn fill(&self, old: &[u8], r: &RawRecord<'_>) -> Option<String> {
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
enum RowChooser {
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
        chosen: HashMap<u128, u64>,
        keep_last: bool,
        what: String,
    },
}

impl RowChooser {
    fn new(store: &Store, input: &Version, op: &Operation, targets: &[usize]) -> Result<Self> {
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
        let mut chosen = HashMap::new();
        if keep_last {
            each_input_row(store, input, |row, r| {
                chosen.insert(row_key(&r, targets), row);
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
        })
    }

    /// Whether input row `row` is to be removed; a removed row is recorded in `log` with its
    /// reason.
    fn drops(&mut self, row: u64, r: &RawRecord<'_>, log: &mut DropLog) -> bool {
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
        } = self
        else {
            return false;
        };
        let k = row_key(r, cols);
        let kept = if *keep_last {
            chosen.get(&k).copied().unwrap_or(row)
        } else {
            *chosen.entry(k).or_insert(row)
        };
        if kept == row {
            return false;
        }
        log.push(row, &format!("({what})"), Some(kept));
        true
    }
}
