//! Recomputable versions: the one home of computing a version's bytes again from its recipe
//! (the deterministic built-in step that made it, its canonical parameters and its input
//! versions, as the `steps` and `step_inputs` tables record them), from the nearest stored
//! ancestors, each result checked against the recorded hash. Readers never call this
//! directly: [`on_demand`] tells the store's objects to ask here for a missing object, so
//! every reader of a version's bytes or row index (retrieve, compare, about, report, export,
//! identify, later steps, reproduce, rerun, withdraw, trace, explain, the PROV export) gets a
//! recomputable version like a stored one.
//!
//! The walk back to stored ancestors is a loop over an explicit stack, never recursion, so
//! a long chain of recomputable versions cannot deepen the call stack.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Agent, StepKind, Storage, Version};
use crate::ops::apply::{self, ApplyOptions, ApplyOutcome, ReplayCheck};
use crate::ops::Operation;
use crate::store::Store;

/// Installs on `store` (the store does this itself when it opens) the computing of missing objects that recomputable versions name: the
/// first read of such an object computes it (with its ancestors as needed) into a scratch
/// folder under `tmp/`, which goes when the store is closed. Objects of stored versions that
/// are missing stay missing (an error naming them, as before).
pub fn on_demand(store: &mut Store) {
    let store_dir = store.dir().to_path_buf();
    let scratch = store.dir().join("tmp").join(format!(
        "recompute-{}-{}",
        std::process::id(),
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_nanos())
    ));
    let inner: Mutex<Option<Store>> = Mutex::new(None);
    let dir = scratch.clone();
    store.objects.compute_missing_with(
        scratch,
        Box::new(move |hash: &Hash| {
            let mut guard = inner.lock().unwrap_or_else(|p| p.into_inner());
            if guard.is_none() {
                *guard = Some(scratch_store(&store_dir, &dir)?);
            }
            match guard.as_mut() {
                Some(s) => compute_object(s, hash),
                None => Ok(false),
            }
        }),
    );
}

/// A second handle on the same store whose new objects go to the scratch folder `dir` (and
/// are read from there first): what on-demand computing writes with.
fn scratch_store(store_dir: &Path, dir: &Path) -> Result<Store> {
    let mut s = Store::open_plain(store_dir)?;
    s.objects
        .begin_stage(dir.to_path_buf())
        .map_err(|e| Error::io(dir, e))?;
    Ok(s)
}

/// Computes the recomputable version whose bytes or row index are `hash` into `store`'s
/// stage; `Ok(false)` when no recomputable version names it.
fn compute_object(store: &mut Store, hash: &Hash) -> Result<bool> {
    let hex = hash.hex();
    let versions = store.lineage.versions_of_object(&hex)?;
    let Some(v) = versions
        .into_iter()
        .find(|v| v.storage == Storage::Recomputable)
    else {
        return Ok(false);
    };
    make_readable(store, &v)?;
    Ok(true)
}

/// Whether `v`'s bytes and row index can be read from `store` now (stored, or computed into
/// its stage earlier).
pub fn readable(store: &Store, v: &Version) -> bool {
    let present = |hex: &str| hex.parse::<Hash>().is_ok_and(|h| store.objects.exists(&h));
    present(&v.hash) && present(&v.row_index)
}

/// Makes `target`'s bytes and row index readable from `store` (written where its objects
/// write: the store itself, or its stage): the versions on the way back to the nearest stored
/// ancestors are found with an explicit stack, then computed in order, each checked against
/// its recorded hash.
pub fn make_readable(store: &mut Store, target: &Version) -> Result<()> {
    let order = recipe_order(store, target)?;
    // How many of the versions to compute read each version: one that only the next step of a
    // fused pass reads need not be written.
    let mut readers: HashMap<i64, usize> = HashMap::new();
    for v in &order {
        for (_, input) in store.lineage.step_input_versions(v.step_id)? {
            *readers.entry(input.id).or_default() += 1;
        }
    }
    let mut at = 0;
    while at < order.len() {
        let run = fusable_recipes(store, &order[at..])?;
        let n = run.len().max(1);
        if run.len() > 1 {
            compute_run(store, &order[at..at + n], run, &readers)?;
        } else {
            compute_one(store, &order[at])?;
        }
        at += n;
    }
    Ok(())
}

/// The recipes of the versions at the start of `order` that can be computed in one pass over
/// their rows: each made from the one before by a step that may join a fused run
/// ([`apply::fusable`]); each with the version it reads.
fn fusable_recipes(store: &Store, order: &[Version]) -> Result<Vec<(Version, ApplyOptions)>> {
    let mut run: Vec<(Version, ApplyOptions)> = Vec::new();
    for (k, v) in order.iter().enumerate() {
        let (main, opts) = recipe_options(store, v)?;
        let follows = k == 0 || main.id == order[k - 1].id;
        if !follows || !apply::fusable(&opts.op, k == 0) {
            break;
        }
        run.push((main, opts));
    }
    Ok(run)
}

/// Computes `versions` from their `recipes` ([`fusable_recipes`]) in one pass, each checked
/// against its recorded hash; the last is written, and so is any other that more than one of
/// the versions to compute reads (`readers`), the rest only hashed. When the pass cannot run,
/// one at a time, so that the error names the step.
fn compute_run(
    store: &mut Store,
    versions: &[Version],
    recipes: Vec<(Version, ApplyOptions)>,
    readers: &HashMap<i64, usize>,
) -> Result<()> {
    let (inputs, mut opts): (Vec<Version>, Vec<ApplyOptions>) = recipes.into_iter().unzip();
    let last = opts.len().saturating_sub(1);
    for (v, o) in versions.iter().zip(&mut opts[..last]) {
        if let Some(check) = &mut o.replay {
            check.write = readers.get(&v.id).is_some_and(|&n| n > 1);
        }
    }
    let Ok(outcomes) = apply::replay_chain(store, &inputs, &opts) else {
        return versions.iter().try_for_each(|v| compute_one(store, v));
    };
    for ((v, o), outcome) in versions.iter().zip(&opts).zip(outcomes) {
        held_to_recorded(v, o, outcome, true)?;
    }
    Ok(())
}

/// The versions to compute for `target`, each after the inputs it needs: a post-order walk
/// of the recipe graph on an explicit stack, stopping at versions that can be read.
fn recipe_order(store: &Store, target: &Version) -> Result<Vec<Version>> {
    let mut order = Vec::new();
    let mut seen = HashSet::new();
    let mut stack = vec![(target.clone(), false)];
    while let Some((v, inputs_done)) = stack.pop() {
        if inputs_done {
            order.push(v);
            continue;
        }
        if readable(store, &v) || !seen.insert(v.id) {
            continue;
        }
        let step = recipe_step(store, &v)?;
        stack.push((v, true));
        for (_, input) in store.lineage.step_input_versions(step.id)? {
            stack.push((input, false));
        }
    }
    Ok(order)
}

/// The step that made `v`, which must be a built-in operation for `v` to be recomputable.
fn recipe_step(store: &Store, v: &Version) -> Result<crate::model::Step> {
    let step = store.lineage.step(v.step_id)?.ok_or_else(|| {
        Error::from(ErrorKind::Inconsistent(format!(
            "step {} that made {} is missing; run `sluice verify`",
            v.step_id,
            v.label()
        )))
    })?;
    if step.kind != StepKind::Operation {
        return Err(ErrorKind::Inconsistent(format!(
            "the bytes of {} are not stored, and it is {} (step {}), which cannot be computed again; run `sluice verify`",
            v.label(),
            made_by(step.kind),
            step.id
        ))
        .into());
    }
    Ok(step)
}

/// What a version made by a step of `kind` is, in the words of the screens.
pub fn made_by(kind: StepKind) -> &'static str {
    match kind {
        StepKind::Ingest => "raw data (received)",
        StepKind::Operation => "made by a built-in operation",
        StepKind::Command => "the output of a captured command",
        StepKind::HandEdit => "a hand edit",
        StepKind::Revert => "made by a withdrawal",
        StepKind::Replay => "made by an earlier re-run",
    }
}

/// The options that compute `v` again from its recipe: the recorded operation with tables and
/// other sources named by their exact recorded versions, checked against `v`'s hash.
pub fn recipe_options(store: &Store, v: &Version) -> Result<(Version, ApplyOptions)> {
    let step = recipe_step(store, v)?;
    let id = step.id;
    let (main, op) = recorded_operation(store, &step)?;
    let opts = ApplyOptions {
        op,
        reason: step.reason.clone().unwrap_or_else(|| "recompute".into()),
        output_dataset: Some(v.dataset.clone()),
        agent: Agent::new("sluice", None, "builtin"),
        map_table_file: None,
        repeats: None,
        replay: Some(ReplayCheck {
            output_hash: v.hash.clone(),
            provenance_hash: store.lineage.step_provenance(id)?,
            write: true,
        }),
    };
    Ok((main, opts))
}

/// The operation built-in step `step` recorded and the version it read as its input; a second
/// source (an append's other table, a lookup's table) is named by its exact recorded version.
pub fn recorded_operation(
    store: &Store,
    step: &crate::model::Step,
) -> Result<(Version, Operation)> {
    let id = step.id;
    let op: Operation = serde_json::from_value(step.params.clone()).map_err(|e| {
        Error::from(ErrorKind::Inconsistent(format!(
            "step {id} holds parameters this build cannot read ({e})"
        )))
    })?;
    let inputs = store.lineage.step_input_versions(id)?;
    let Some((_, main)) = inputs.iter().find(|(role, _)| role == "input") else {
        return Err(ErrorKind::Inconsistent(format!("step {id} records no input")).into());
    };
    let op = match inputs.iter().find(|(role, _)| role != "input") {
        Some((_, other)) => crate::plan::with_other_input(&op, other.label()),
        None => op,
    };
    Ok((main.clone(), op))
}

/// Computes one version from inputs that can be read, writing its bytes and row index;
/// other bytes than recorded are [`ErrorKind::RecomputeMismatch`], naming the step.
fn compute_one(store: &mut Store, v: &Version) -> Result<()> {
    let (main, opts) = recipe_options(store, v)?;
    let outcome = apply::apply(store, &main.label(), &opts)?;
    held_to_recorded(v, &opts, outcome, true)
}

/// What a recomputation gave, held against `v`'s recorded hash (and, when `provenance` is
/// asked for, against its recorded provenance too): a difference is
/// [`ErrorKind::RecomputeMismatch`], naming the step.
fn held_to_recorded(
    v: &Version,
    opts: &ApplyOptions,
    outcome: ApplyOutcome,
    provenance: bool,
) -> Result<()> {
    match outcome {
        ApplyOutcome::Replayed {
            output_hash,
            matches,
            ..
        } if output_hash == v.hash && (matches || !provenance) => Ok(()),
        ApplyOutcome::Replayed { output_hash, .. } => Err(ErrorKind::RecomputeMismatch {
            step: v.step_id,
            operation: opts.op.name().to_string(),
            version: v.label(),
            expected: crate::model::short_hash(&v.hash),
            actual: crate::model::short_hash(&output_hash),
        }
        .into()),
        _ => Err(ErrorKind::Internal("a recomputed step was recorded".into()).into()),
    }
}

/// Computes `v` again from its recipe and checks that it gives the recorded hash, keeping no
/// bytes of it (`verify --deep`); inputs that are themselves not stored are computed on the
/// way, into a stage that is removed afterwards.
pub fn check_recipe(store: &Store, v: &Version) -> Result<()> {
    let mut s = Store::open_plain(store.dir())?;
    let dir: PathBuf = s.begin_stage("recompute")?;
    let result = (|| {
        for (_, input) in s.lineage.step_input_versions(v.step_id)? {
            for u in recipe_order(&s, &input)? {
                compute_one(&mut s, &u)?;
            }
        }
        let (main, mut opts) = recipe_options(&s, v)?;
        if let Some(c) = opts.replay.as_mut() {
            c.write = false;
        }
        let outcome = apply::apply(&mut s, &main.label(), &opts)?;
        held_to_recorded(v, &opts, outcome, false)
    })();
    s.objects.discard_stage();
    let _ = std::fs::remove_dir_all(dir);
    result
}

/// A row computed on its own: (version id, 0-based row, fields).
pub type ComputedRow = (i64, u64, Vec<String>);

/// Whether `op` computes each output row from its input row alone (and the step's own
/// parameters, and for `map` and `lookup` the table it recorded), so that one row of its
/// output can be computed without the rest: the cell, row-choosing and shape operations,
/// except `dedupe` keeping the last row (it looks ahead), and never the table operations.
fn row_local(op: &Operation) -> bool {
    !matches!(
        op,
        Operation::Append { .. }
            | Operation::Summarize { .. }
            | Operation::Sort { .. }
            | Operation::Dedupe {
                keep: crate::ops::KeepWhich::Last,
                ..
            }
    )
}

/// Data row `row` (0-based) of the recomputable version `v`, computed on its own: the row is
/// followed back through each step's row map to the nearest version whose bytes are stored,
/// read there with `read` (by offset), and carried forward through each step's per-record
/// transform. A row a step kept goes through it unchanged by its choosing (`keep`, `drop`,
/// `dedupe` keeping the first), so one row is enough; a `map` or `lookup` reads the table it
/// recorded (by hash), not the version it changed. `Ok(None)` when a step on the way is not
/// row-local ([`row_local`]): the caller then reads the version whole. A loop over the
/// chain, never recursion. Returns every row computed on the way, as (version id, row,
/// fields), `v`'s last, so that a trail walking back through the same chain reads none of
/// them again.
pub fn one_row(
    store: &Store,
    v: &Version,
    row: u64,
    read: &mut dyn FnMut(&Version, u64) -> Result<Vec<String>>,
) -> Result<Option<Vec<ComputedRow>>> {
    let mut chain: Vec<(Version, Operation, u64)> = Vec::new();
    let (mut cur, mut r) = (v.clone(), row);
    while !store.bytes_stored(&cur)? {
        let step = recipe_step(store, &cur)?;
        // The operation with its table named by the exact version the step read.
        let (main, op) = recorded_operation(store, &step)?;
        if !row_local(&op) {
            return Ok(None);
        }
        let Some(in_row) = crate::provenance::input_row(store, &cur, main.id, r)? else {
            return Err(ErrorKind::Inconsistent(format!(
                "data row {} of {} comes from no row of {} in the row map of step {}; run `sluice verify`",
                r + 1,
                cur.label(),
                main.label(),
                step.id
            ))
            .into());
        };
        chain.push((main.clone(), op, in_row));
        cur = main;
        r = in_row;
    }
    let fields = read(&cur, r)?;
    let mut current = crate::ops::rowwise::OwnedRow::default();
    for f in &fields {
        current.push(f.as_bytes());
    }
    let texts = |o: &crate::ops::rowwise::OwnedRow| -> Vec<String> {
        o.record(0)
            .iter()
            .map(|f| String::from_utf8_lossy(f).into_owned())
            .collect()
    };
    let mut computed = Vec::with_capacity(chain.len());
    for (k, (input, op, in_row)) in chain.iter().enumerate().rev() {
        if k + 1 < chain.len() {
            computed.push((input.id, *in_row, texts(&current)));
        }
        let (mapper, looker) = apply::recorded_table(store, input, op)?;
        let mut step = crate::ops::rowwise::RowStep::new(store, input, op, mapper, looker)?;
        let mut out = crate::ops::rowwise::OwnedRow::default();
        if !step.row(*in_row, &current.record(*in_row), &mut out)? {
            return Err(ErrorKind::Inconsistent(format!(
                "data row {} of {} is kept by the row map, but its step removes it when computed again; run `sluice verify --deep`",
                in_row + 1,
                input.label()
            ))
            .into());
        }
        current = out;
    }
    let fields = texts(&current);
    if fields.len() != v.header.len() {
        return Err(ErrorKind::Inconsistent(format!(
            "data row {} of {} computed again has {} fields, its header {}; run `sluice verify --deep`",
            row + 1,
            v.label(),
            fields.len(),
            v.header.len()
        ))
        .into());
    }
    computed.push((v.id, row, fields));
    Ok(Some(computed))
}

/// What a change of storage did to one version.
#[derive(Debug, Clone, serde::Serialize)]
pub struct StorageChange {
    /// `NAME:vN`.
    pub version: String,
    pub hash: String,
    pub before: Storage,
    pub after: Storage,
    /// Whether the bytes were computed again from the recipe to be stored.
    pub computed: bool,
    /// The audit entry that records the change (none when nothing changed).
    pub audit_entry: Option<u64>,
}

/// Stores `v`'s bytes and row index (computing them from its recipe when the store does not
/// hold them) and records its storage as `to` (`Stored` or `Kept`), with an audit entry
/// (action `storage`). Nothing is recorded when it already is.
pub fn store_bytes(
    store: &mut Store,
    v: &Version,
    to: Storage,
    agent: &Agent,
) -> Result<StorageChange> {
    if to == Storage::Recomputable {
        return Err(
            ErrorKind::Internal("storing bytes cannot make a version recomputable".into()).into(),
        );
    }
    let mut computed = false;
    if !readable(store, v) {
        make_readable(store, v)?;
        computed = true;
    }
    set_storage(store, v, to, computed, agent)
}

/// Records `v` as recomputable: its bytes may then be freed by `reclaim`; its hash, recipe,
/// shape and profile stay recorded. Refused for a version the default policy keeps (see
/// [`must_stay_stored`]).
pub fn release_bytes(store: &mut Store, v: &Version, agent: &Agent) -> Result<StorageChange> {
    if let Some(why) = must_stay_stored(store, v)? {
        return Err(Error::usage(format!("{} stays stored: {why}", v.label())));
    }
    set_storage(store, v, Storage::Recomputable, false, agent)
}

/// Which outputs of one pass over the rows are written, by the default policy: an output a
/// later output of the same pass supersedes (it writes the same dataset again) is an
/// intermediate, only hashed and recorded recomputable; the others are written. `outputs`
/// are the datasets the pass's steps write, in order. A run's stretches (`plan::run_fused`)
/// and a withdrawal's (`revert::fuse_ahead`) decide by this.
pub fn written_in_pass<S: PartialEq>(outputs: &[S]) -> Vec<bool> {
    (0..outputs.len())
        .map(|k| !outputs[k + 1..].contains(&outputs[k]))
        .collect()
}

/// Why `v`'s bytes must stay stored, if they must: it was not made by a built-in step (raw
/// data, outside work, a hand edit, a withdrawal), it is its dataset's latest version, a
/// person signed it off, a person asked to keep it, or it was delivered (`retrieve --deliver`).
pub fn must_stay_stored(store: &Store, v: &Version) -> Result<Option<String>> {
    let step = store.lineage.step(v.step_id)?;
    if step.as_ref().is_none_or(|s| s.kind != StepKind::Operation) {
        return Ok(Some(format!(
            "it is {}, which cannot be computed again from a recipe",
            step.map_or("made by a step that is missing", |s| made_by(s.kind))
        )));
    }
    if store
        .lineage
        .latest_version(&v.dataset)?
        .is_some_and(|l| l.id == v.id)
    {
        return Ok(Some(format!("it is the latest version of {}", v.dataset)));
    }
    if let Some(e) = store.lineage.erasure_of_version(v.id)? {
        return Ok(Some(format!(
            "erasure order {} reached it, so what it was computed from lost cells and its erased form is the only copy of the rest",
            e.order_id
        )));
    }
    held_for_people(store, v)
}

/// Why people need `v`'s bytes kept, if they do: a person asked to keep it, signed off its
/// bytes (a sign-off names them by hash), or it was delivered. The part of
/// [`must_stay_stored`] that a version not yet recorded (a withdrawal's new history) can be
/// asked too.
pub fn held_for_people(store: &Store, v: &Version) -> Result<Option<String>> {
    if v.storage == Storage::Kept {
        return Ok(Some(
            "a person asked to keep it stored (`sluice retain`)".into(),
        ));
    }
    let signed = store
        .lineage
        .endorsements()?
        .iter()
        .any(|e| e.kind == "version" && e.subject == v.hash);
    if signed {
        return Ok(Some("it was signed off".into()));
    }
    if let Some(d) = crate::delivery::of_version(store, v)?.first() {
        return Ok(Some(format!(
            "it was delivered (audit entry {}: {})",
            d.audit_entry, d.why
        )));
    }
    Ok(None)
}

fn set_storage(
    store: &mut Store,
    v: &Version,
    to: Storage,
    computed: bool,
    agent: &Agent,
) -> Result<StorageChange> {
    let mut change = StorageChange {
        version: v.label(),
        hash: v.hash.clone(),
        before: v.storage,
        after: to,
        computed,
        audit_entry: None,
    };
    if v.storage == to {
        return Ok(change);
    }
    let at = crate::clock::now_rfc3339();
    let details = serde_json::json!({
        "stored_version": v.hash,
        "row_index": v.row_index,
        "storage": to.as_str(),
        "was": v.storage.as_str(),
        "computed": computed,
    });
    let id = v.id;
    let subject = v.audit_subject();
    change.audit_entry = Some(store.write(|tx| {
        tx.set_storage(id, to)?;
        tx.audit(agent, "storage", &subject, &details, &at)
            .map(|e| e.seq)
    })?);
    Ok(change)
}
