//! Recording a step: a computed step's output objects and provenance object made durable
//! ([`persist`], giving a [`Pending`]), then its step, version, column sources and notes
//! inserted in a transaction ([`insert_pending`]) with its audit entry ([`apply_entry`]).
//! Operations (`clean`, a plan's steps) and withdrawals record through here; a pending step
//! can be read by the next computed step before anything is in the database (its id is a
//! negative placeholder, [`pending_id`]).

use std::io;

use serde_json::json;

use crate::clock;
use crate::error::{Error, Result};
use crate::model::{Agent, LineageKind, RowRun, StepKind, Storage, Version};
use crate::provenance::{ChangeLog, DropLog};
use crate::store::version_writer::Written;
use crate::store::{NewStep, NewVersion, Store};
use crate::table::write::canonical_dialect;

/// Everything a built-in step records about how its output came from its input.
pub struct Provenance {
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
    pub fn run_sets(&self) -> Vec<(u32, &[RowRun])> {
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
pub struct OtherInput {
    pub id: i64,
    pub runs: Vec<RowRun>,
    pub sources: Vec<(String, String)>,
}

/// A second input read as a table: its version id (`None` while the table is an intake
/// recorded with the step) and (output column, table column) pairs.
pub type TableInput = (Option<i64>, Vec<(String, String)>);

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
    /// Whether the output's bytes were written ([`Storage::Stored`]) or only hashed
    /// ([`Storage::Recomputable`]: an intermediate of a one-pass run).
    pub storage: Storage,
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
            storage: self.storage,
        }
    }
}

/// The placeholder id of the `index`-th pending version of a chain (0-based): negative, so it
/// can never be a real row id.
pub fn pending_id(index: usize) -> i64 {
    -(index as i64) - 1
}

/// A version not recorded yet, as a step being prepared reads it: its dataset, header and
/// blanks (no name, rows or bytes yet), under the placeholder id of the `index`-th pending
/// version.
pub fn unnamed_version(
    index: usize,
    dataset: String,
    header: Vec<String>,
    null_tokens: Vec<String>,
    storage: Storage,
) -> Version {
    Version {
        id: pending_id(index),
        dataset,
        seq: 0,
        hash: String::new(),
        row_index: String::new(),
        n_rows: 0,
        n_cols: header.len() as u64,
        n_bytes: 0,
        header,
        dialect: canonical_dialect(),
        null_tokens,
        created_at: String::new(),
        step_id: pending_id(index),
        storage,
    }
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
        storage: p.storage,
    })?;
    for (input, sources) in &p.sources {
        tx.insert_column_sources(step_id, version_id, real(*input)?, sources)?;
    }
    tx.insert_cell_notes(step_id, version_id, &p.notes)?;
    Ok((version_id, step_id, seq))
}

/// What a step of kind `kind` records besides its output: for [`persist`].
pub struct StepMeta<'a> {
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
pub fn persist(
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
    // An output written hash-only (an intermediate of a one-pass run, see
    // `plan::run_fused`) is recorded by its hash and recipe; its bytes are not kept.
    let storage = if written.table.keeps_bytes() {
        Storage::Stored
    } else {
        Storage::Recomputable
    };
    let (table_hash, n_bytes, index_hash, index_bytes) = if storage == Storage::Stored {
        let (t, n) = written.table.finish().map_err(store_io)?;
        let (i, k) = written.index.finish().map_err(store_io)?;
        (t, n, i, k)
    } else {
        let t = (written.table.hash(), written.table.n_bytes());
        let i = (written.index.hash(), written.index.n_bytes());
        (t.0, t.1, i.0, i.1)
    };
    // The row maps, changed cells and dropped rows, as one object (none when there are none).
    let run_sets = prov.run_sets();
    let provenance =
        crate::provenance::write(store, out_header, &prov.changes, &prov.drops, &run_sets)?;
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
        storage,
    })
}

/// The details of the audit entry of a recorded operation step (action `apply`): what
/// `verify` holds the database against. A withdrawal adds what it re-applies.
pub fn apply_entry(p: &Pending, input_hash: &str, step_id: i64) -> serde_json::Value {
    json!({
        "operation": p.params,
        "input": input_hash,
        "version": p.hash,
        "step": step_id,
        "cells_changed": p.n_changed,
        "rows_dropped": p.n_dropped,
        "provenance": p.provenance.as_ref().map(|(h, _)| h),
        "cells_noted": p.notes.len(),
    })
}
