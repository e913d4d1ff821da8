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
use std::path::PathBuf;

use super::rowwise::{Looker, Mapper, OwnedRow, RowStep, RowStepEnd, Table, Taken};
use super::summarize::Summary;
use super::Operation;
use crate::clock;
use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::intake::{self, validate_dataset_name, IngestOptions, Prepared, PreparedIngest};
use crate::model::{Agent, ColumnProfile, LineageKind, StepKind, Version};
pub use crate::recording::{
    apply_entry, insert_pending, pending_id, persist, OtherInput, Pending, Provenance, StepMeta,
    TableInput,
};
use crate::refs;
use crate::store::version_writer::{CanonicalWriter, Written};
use crate::store::Store;
use crate::table::RawRecord;

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
    /// The recorded step this one repeats on other data (`rerun --with`).
    pub repeats: Option<i64>,
}

/// What a replayed step is expected to give.
#[derive(Debug, Clone)]
pub struct ReplayCheck {
    pub output_hash: String,
    pub provenance_hash: Option<String>,
    /// Whether the computed bytes (and row index) are written when the store does not hold
    /// them: true to restore a stored version or to compute a recomputable one for reading;
    /// false to only hash (a recomputable version checked by `reproduce` stays unstored).
    pub write: bool,
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
    if matches!(opts.op, Operation::Sort { .. }) {
        return super::sort::run(store, input, opts, mode);
    }
    let Ready {
        mut table_ingest,
        mapper,
        looker,
        opts,
    } = ready(store, &input, opts)?;
    let opts = &opts;
    let mut step = RowStep::new(store, &input, &opts.op, mapper, looker)?;
    step.expect_rows(input.n_rows);
    let table_id = step.table_id();
    let out_header = step.header();
    let started_at = clock::now_rfc3339();
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
    let mut writer =
        output_writer(store, opts, &out_header, &input.null_tokens, &[]).map_err(store_io)?;
    let mut out = OwnedRow::default();
    each_input_row(store, &input, |in_row, r| {
        if step.row(in_row, &r, &mut out)? {
            {
                let (bytes, ends) = out.packed();
                writer.write_packed(bytes, ends).map_err(store_io)?;
            }
        }
        Ok(())
    })?;
    let end = step.finish()?;
    let written = writer.finish().map_err(store_io)?;
    let computed = Computed {
        opts: opts.clone(),
        started_at,
        written,
        end,
        table_id,
    };
    record_computed(
        store,
        input,
        &dataset,
        computed,
        table_ingest.as_deref_mut(),
        mode,
    )
}

/// A row-by-row step's table read and its options resolved (a map or lookup table named by
/// the exact version's hash, whatever reference named it).
struct Ready {
    /// A table file read and stored now but recorded only with the step.
    table_ingest: Option<Box<PreparedIngest>>,
    mapper: Option<Mapper>,
    looker: Option<Looker>,
    opts: ApplyOptions,
}

fn ready(store: &Store, input: &Version, opts: &ApplyOptions) -> Result<Ready> {
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
            Prepared::Unchanged(v) => Some(load_table(store, r, Some(TableSource::Version(v)))?),
            Prepared::Ready(p) => {
                let t = load_table(store, r, Some(TableSource::Pending(&p)))?;
                table_ingest = Some(p);
                Some(t)
            }
        },
        (Some(r), None) => Some(load_table(store, r, None)?),
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
    Ok(Ready {
        opts: opts.clone(),
        table_ingest,
        mapper,
        looker,
    })
}

/// Whether `op` may join a fused run of row-by-row steps ([`compute_chain`]) at a position
/// other than the first. The table operations need their whole input before they emit a row
/// and read it themselves (summarize, sort, append); `dedupe` keeping the last row reads its
/// input once ahead, which only a stored input allows, so it may only begin a run.
pub fn fusable(op: &Operation, first: bool) -> bool {
    match op {
        Operation::Summarize { .. } | Operation::Sort { .. } | Operation::Append { .. } => false,
        Operation::Dedupe {
            keep: super::KeepWhich::Last,
            ..
        } => first,
        _ => true,
    }
}

/// One step of a fused run while the rows pass: the transform, its writer, its current
/// output row and how many rows it has given.
struct Stage {
    step: RowStep,
    writer: CanonicalWriter,
    /// For each output column, the column of the step before's output whose profile it has.
    carried: Vec<Option<usize>>,
    out: OwnedRow,
    n_out: u64,
    started_at: String,
    table_id: Option<Option<i64>>,
    opts: ApplyOptions,
}

/// Computes a run of row-by-row steps on `input` in one pass over its rows: each record is
/// read and parsed once, handed through the steps in order (step k reads what step k-1 gave),
/// and every step's output is written (hash, row index, profile) and its provenance kept as
/// the rows pass. Each step reads the output of the one before; tables are stored versions.
/// Nothing is recorded: [`apply_computed`] records each in turn, so a run stopped part way
/// keeps its first steps whole. Every step must be [`fusable`] (the first with `first`).
/// A step whose `keep` is false has its output hashed, indexed and profiled but not written:
/// it is recorded as a recomputable version (its recipe is the step itself). A step computed
/// again ([`ApplyOptions::replay`]) with `keep` writes its output only when its check asks for
/// the bytes and the store lacks them ([`replay_chain`]).
pub fn compute_chain(
    store: &Store,
    input: &Version,
    steps: &[ApplyOptions],
    keep: &[bool],
) -> Result<Vec<Computed>> {
    Ok(compute_chain_summed(store, input, steps, keep, None)?.0)
}

/// [`compute_chain`] whose last step's output rows are also handed, as they pass, to the
/// `summarize` of `summary` (a pipeline breaker: it emits only once every row is in), to be
/// recorded after the stretch's steps with [`record_summary`] on the version the last of them
/// recorded.
pub(crate) fn compute_chain_summed(
    store: &Store,
    input: &Version,
    steps: &[ApplyOptions],
    keep: &[bool],
    summary: Option<&ApplyOptions>,
) -> Result<(Vec<Computed>, Option<Summary>)> {
    let mut chain = Chain::prepare(store, input, steps, keep, summary)?;
    chain.expect_rows(input.n_rows);
    each_input_row(store, input, |in_row, r| chain.row(in_row, r))?;
    chain.finish()
}

/// A run of row-by-row steps being computed in one pass ([`compute_chain_summed`]): prepared
/// on its input's shape, handed every input row in order, then finished. Its input is a stored
/// version, or a file being taken in whose rows reach it as intake checks them
/// (`intake::prepare_feeding`): the steps need its header, dataset and blanks, not its name.
pub(crate) struct Chain {
    stages: Vec<Stage>,
    summary: Option<Summary>,
    store_dir: PathBuf,
}

impl Chain {
    /// Prepares every step on the output of the one before (the first on `input`) and starts
    /// its writer. Nothing is written to the store's named objects.
    pub(crate) fn prepare(
        store: &Store,
        input: &Version,
        steps: &[ApplyOptions],
        keep: &[bool],
        summary: Option<&ApplyOptions>,
    ) -> Result<Chain> {
        let store_dir = store.dir().to_path_buf();
        let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
        let mut stages: Vec<Stage> = Vec::with_capacity(steps.len());
        let mut reads = input.clone();
        for (k, opts) in steps.iter().enumerate() {
            if !fusable(&opts.op, k == 0) || opts.map_table_file.is_some() {
                return Err(ErrorKind::Internal(format!(
                    "step {} of a fused run cannot be fused",
                    k + 1
                ))
                .into());
            }
            let dataset = opts
                .output_dataset
                .clone()
                .unwrap_or_else(|| reads.dataset.clone());
            validate_dataset_name(&dataset)?;
            if opts.reason.trim().is_empty() {
                return Err(Error::usage("--why needs a reason"));
            }
            let Ready {
                mapper,
                looker,
                opts,
                ..
            } = ready(store, &reads, opts)?;
            let step = RowStep::new(store, &reads, &opts.op, mapper, looker)?;
            let header = step.header();
            // A column this step copies unchanged, every row kept, has the profile the same
            // column has in the step before's output: it is taken from there, not computed
            // again.
            let carried = if k == 0 {
                Vec::new()
            } else {
                step.unchanged_columns()
            };
            let unprofiled: Vec<bool> = carried.iter().map(Option::is_some).collect();
            let writer = if keep.get(k).copied().unwrap_or(true) {
                output_writer(store, &opts, &header, &input.null_tokens, &unprofiled)
            } else {
                CanonicalWriter::leaving_out(None, &header, &input.null_tokens, &unprofiled)
            }
            .map_err(store_io)?;
            // What the next step reads: this step's output, not yet a stored version (only its
            // header, dataset and blanks are read from it while preparing).
            reads = crate::recording::unnamed_version(
                k,
                dataset,
                header,
                input.null_tokens.clone(),
                crate::model::Storage::Recomputable,
            );
            stages.push(Stage {
                table_id: step.table_id(),
                step,
                writer,
                carried,
                out: OwnedRow::default(),
                n_out: 0,
                started_at: clock::now_rfc3339(),
                opts,
            });
        }
        let summary = match summary {
            Some(opts) if !stages.is_empty() => Some(Summary::new(&reads, opts)?),
            Some(_) => {
                return Err(
                    ErrorKind::Internal("a summary fused with no step before it".into()).into(),
                )
            }
            None => None,
        };
        Ok(Chain {
            stages,
            summary,
            store_dir,
        })
    }

    /// How many input rows to expect (an estimate is enough: a step that keeps a table of the
    /// rows it has seen sizes it from this, and grows it if more come).
    pub(crate) fn expect_rows(&mut self, rows: u64) {
        for s in &mut self.stages {
            s.step.expect_rows(rows);
        }
    }

    /// Hands input row `in_row` (0-based, rows in order) through the steps.
    pub(crate) fn row(&mut self, in_row: u64, r: RawRecord<'_>) -> Result<()> {
        let store_dir = &self.store_dir;
        let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
        let stages = &mut self.stages;
        // Where the current row is: the input's record, or the output buffer of the latest
        // stage that built one (a stage whose row is its input row copies nothing).
        let mut held: Option<usize> = None;
        let mut row = in_row;
        let n_stages = stages.len();
        for k in 0..n_stages {
            let (before, after) = stages.split_at_mut(k);
            let stage = &mut after[0];
            let record = match held {
                None if k == 0 => RawRecord { ..r },
                None => RawRecord::packed(r.fields, r.ends, row),
                Some(j) => before[j].out.record(row),
            };
            let (bytes, ends) = match stage.step.take(row, &record, &mut stage.out)? {
                Taken::Removed => break,
                Taken::Same => (record.fields, record.ends),
                Taken::Built => {
                    held = Some(k);
                    stage.out.packed()
                }
            };
            let end = ends.last().copied().unwrap_or(0);
            stage
                .writer
                .write_packed(&bytes[..end], ends)
                .map_err(store_io)?;
            row = stage.n_out;
            stage.n_out += 1;
            if k + 1 == n_stages {
                if let Some(summary) = &mut self.summary {
                    summary.add(row, &RawRecord::packed(bytes, ends, row));
                }
            }
        }
        Ok(())
    }

    /// Ends the pass: every step's provenance, and its output's hash, row index and profile
    /// (a column carried from the step before takes that step's profile).
    pub(crate) fn finish(self) -> Result<(Vec<Computed>, Option<Summary>)> {
        let store_dir = &self.store_dir;
        let store_io = |e: io::Error| Error::io(&store_dir.join("tmp"), e);
        let mut computed = Vec::with_capacity(self.stages.len());
        for s in self.stages {
            let end = s.step.finish()?;
            let mut written = s.writer.finish().map_err(store_io)?;
            for (o, from) in s.carried.iter().enumerate() {
                let Some(from) = *from else { continue };
                let before = computed
                    .last()
                    .and_then(|c: &Computed| c.written.profiles.get(from));
                let (Some(before), Some(own)) = (before, written.profiles.get_mut(o)) else {
                    return Err(ErrorKind::Internal(format!(
                        "no profile to carry into column {} of a fused step",
                        o + 1
                    ))
                    .into());
                };
                *own = ColumnProfile {
                    name: std::mem::take(&mut own.name),
                    ..before.clone()
                };
            }
            computed.push(Computed {
                opts: s.opts,
                started_at: s.started_at,
                written,
                end,
                table_id: s.table_id,
            });
        }
        Ok((computed, self.summary))
    }
}

/// Records the summary a fused stretch accumulated ([`compute_chain_summed`]) as its step on
/// `input`, the version the stretch's last step recorded: as [`apply`] would have.
pub(crate) fn record_summary(
    store: &mut Store,
    input: Version,
    summary: Summary,
    opts: &ApplyOptions,
) -> Result<ApplyOutcome> {
    match summary.record(store, input, opts, Mode::Record)? {
        Done::Outcome(o) => Ok(o),
        Done::Deferred(_) => {
            Err(ErrorKind::Internal("a summary meant to be recorded was deferred".into()).into())
        }
    }
}

/// Records one step of a fused run ([`compute_chain`]) on `input`, the version the step
/// before it recorded (or found unchanged): as [`apply`] would have.
pub fn apply_computed(store: &mut Store, input: Version, c: Computed) -> Result<ApplyOutcome> {
    let dataset = c
        .opts
        .output_dataset
        .clone()
        .unwrap_or_else(|| input.dataset.clone());
    match record_computed(store, input, &dataset, c, None, Mode::Record)? {
        Done::Outcome(o) => Ok(o),
        Done::Deferred(_) => {
            Err(ErrorKind::Internal("a step meant to be recorded was deferred".into()).into())
        }
    }
}

/// Recorded built-in steps computed again in one pass ([`compute_chain`]), each held against
/// what it recorded: every one of `steps` carries its [`ReplayCheck`], the first reads
/// `inputs[0]`, and each later one reads the version the step before it recorded (its
/// `inputs[k]`, named in its outcome). Nothing is recorded; the outcomes are
/// [`ApplyOutcome::Replayed`], in order, with a missing stored output restored when it came
/// out with its recorded hash, as [`apply`] of each in turn would have given them.
pub fn replay_chain(
    store: &mut Store,
    inputs: &[Version],
    steps: &[ApplyOptions],
) -> Result<Vec<ApplyOutcome>> {
    let (Some(first), true) = (inputs.first(), inputs.len() == steps.len()) else {
        return Err(ErrorKind::Internal("a replayed run without its inputs".into()).into());
    };
    if steps.iter().any(|o| o.replay.is_none()) {
        return Err(ErrorKind::Internal("a replayed run with a step to record".into()).into());
    }
    let computed = compute_chain(store, first, steps, &vec![true; steps.len()])?;
    computed
        .into_iter()
        .zip(inputs)
        .map(|(c, input)| apply_computed(store, input.clone(), c))
        .collect()
}

/// One step of a fused run ([`compute_chain`]) on `input`, made durable but not recorded
/// (a withdrawal records its whole new history in one transaction): as [`compute`] would
/// have given it.
pub fn defer_computed(store: &mut Store, input: Version, c: Computed) -> Result<Pending> {
    let dataset = c
        .opts
        .output_dataset
        .clone()
        .unwrap_or_else(|| input.dataset.clone());
    match record_computed(store, input, &dataset, c, None, Mode::Defer)? {
        Done::Deferred(p) => Ok(p),
        Done::Outcome(_) => Err(ErrorKind::Internal("a deferred step was recorded".into()).into()),
    }
}

/// A row-by-row step computed (its output written, not yet durable) and what it recorded.
pub struct Computed {
    /// The step's options, its table pinned to the exact version.
    opts: ApplyOptions,
    started_at: String,
    written: Written,
    end: RowStepEnd,
    /// The version id of a map or lookup table (`None` inside while it is an intake recorded
    /// with the step); `None` outside when the step reads no table.
    table_id: Option<Option<i64>>,
}

/// Records (or defers, or checks in replay) a computed row-by-row step.
fn record_computed(
    store: &mut Store,
    input: Version,
    dataset: &str,
    c: Computed,
    table_ingest: Option<&mut PreparedIngest>,
    mode: Mode,
) -> Result<Done> {
    let end = c.end;
    let prov = Provenance {
        runs: end.runs.into_runs(),
        changes: end.changes,
        drops: end.drops,
        notes: end.notes,
        sources: end.sources,
        table: match (c.table_id, end.table_sources) {
            (Some(id), Some(pairs)) => Some((id, pairs)),
            _ => None,
        },
        other: None,
    };
    record(
        store,
        input,
        dataset,
        &c.opts,
        &c.started_at,
        c.written,
        &end.header,
        prov,
        None,
        end.changed_by_column,
        table_ingest,
        mode,
    )
}

/// The writer of a step's output: in replay, when the recorded output is already stored, one
/// that only hashes (nothing is written to disk); otherwise one that keeps the bytes. In replay
/// no column is profiled: nothing is recorded, and the recorded profile is checked by `verify
/// --deep` against the bytes, not against a replay.
pub(super) fn output_writer(
    store: &Store,
    opts: &ApplyOptions,
    header: &[String],
    null_tokens: &[String],
    unprofiled: &[bool],
) -> io::Result<CanonicalWriter> {
    let stored = opts.replay.as_ref().is_some_and(|c| {
        !c.write
            || c.output_hash
                .parse::<Hash>()
                .is_ok_and(|h| store.objects.exists(&h))
    });
    let objects = (!stored).then_some(&store.objects);
    let none_profiled;
    let unprofiled = if opts.replay.is_some() {
        none_profiled = vec![true; header.len()];
        &none_profiled
    } else {
        unprofiled
    };
    CanonicalWriter::leaving_out(objects, header, null_tokens, unprofiled)
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
            &apply_entry(&pending, &input.hash, step_id),
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
    if matches && written.table.keeps_bytes() {
        let hash: crate::hash::Hash = out_hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        if !store.objects.exists(&hash) {
            written.table.finish().map_err(store_io)?;
            restored = true;
        }
        // The row index goes with the bytes (a recomputable version has neither stored).
        if !store.objects.exists(&written.index.hash()) {
            written.index.finish().map_err(store_io)?;
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
    store.objects.each_row(input, f)
}

/// Where `map` takes its table from.
enum TableSource<'a> {
    Version(Box<Version>),
    Pending(&'a PreparedIngest),
}

/// Reads a mapping or lookup table whole.
/// The table a recorded `map` or `lookup` step read (named in `op` by its version's hash),
/// ready for a [`RowStep`] on `input`: for computing one row of its output again (a trail
/// through a recomputable version) without computing the whole version. `(None, None)` for
/// other operations.
pub fn recorded_table(
    store: &Store,
    input: &Version,
    op: &Operation,
) -> Result<(Option<Mapper>, Option<Looker>)> {
    let table = match op {
        Operation::Map { table, .. } | Operation::Lookup { table, .. } => {
            load_table(store, table, None)?
        }
        _ => return Ok((None, None)),
    };
    Ok(match op {
        Operation::Map { .. } => (Mapper::from_table(op, table)?, None),
        _ => (
            None,
            Looker::from_table(op, &input.header, &input.label(), table)?,
        ),
    })
}

fn load_table(store: &Store, reference: &str, source: Option<TableSource<'_>>) -> Result<Table> {
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
    // What the bytes read must hash to: an erased version's bytes are its erased form, checked
    // against that form's name (the table keeps the version's own name).
    let mut read_as = hash.clone();
    let reader: Box<dyn Read + Send> = match &source {
        TableSource::Version(_) => {
            let (bytes, form) = store.objects.open_raw(
                &hash
                    .parse()
                    .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?,
            )?;
            read_as = form.hex();
            bytes
        }
        // Not stored under its name yet: read the file itself, checked against its hash.
        TableSource::Pending(p) => {
            Box::new(std::fs::File::open(p.path()).map_err(|e| Error::io(p.path(), e))?)
        }
    };
    let mut rows = Vec::new();
    let source = crate::table::stored::Source {
        hash: &read_as,
        dialect: &dialect,
        label: &label,
        n_bytes: None,
        doing: "reading",
    };
    crate::table::stored::each_row(reader, &source, |_, r| {
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
