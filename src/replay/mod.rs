//! Replay: computing a version again from its raw ancestors and checking that every step gives
//! the bytes it recorded. The steps on the way are those `export` would write (every step
//! reached by walking inputs back to intakes), taken in recording order, which is a topological
//! order of the lineage graph: a step only reads versions recorded before it.
//!
//! A raw version cannot be computed, only checked: its object must be there and hash to its
//! name. A built-in step is run again on its recorded inputs with its recorded parameters;
//! nothing is written to the database, and an output object that is missing from the store is
//! restored from the recomputed bytes when they have its hash (so replay is also how a store
//! shows it can regenerate an intermediate file removed to save space). The step's provenance
//! object is computed again too and compared with the recorded one.
//!
//! Outside work: a hand edit is re-applied from its recorded row map, changed cells and drops
//! ([`hand_edit`]); an outside command is run again only when the caller allows it
//! ([`ReplayOptions::allow_exec`]), in a checkout of its recorded commit ([`command`]). Without
//! that permission a command is never executed, so a store received from someone else can be
//! replayed, traced and verified without running anything it names.
//!
//! The first step whose output differs stops the replay, with a summary of how the recomputed
//! output differs from the recorded one ([`difference`]). Nothing is recorded either way.

pub mod command;
pub mod difference;
pub mod hand_edit;

use serde::Serialize;

use crate::error::{ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Agent, Step, StepKind, Version};
use crate::ops::apply::{self, ApplyOptions, ApplyOutcome, ReplayCheck};
use crate::refs;
use crate::store::Store;

pub use difference::Difference;

/// What replay is allowed to do.
#[derive(Debug, Clone, Default)]
pub struct ReplayOptions {
    /// Run recorded outside commands again (in a checkout of their recorded commit).
    pub allow_exec: bool,
}

/// What replay found for one step.
#[derive(Debug, Clone, Serialize)]
pub struct ReplayedStep {
    pub step: i64,
    pub kind: StepKind,
    pub operation: Option<String>,
    /// The version the step recorded (the first, for a step with several).
    pub produced: String,
    pub recorded_hash: String,
    /// The hash computed now (built-in steps and commands run again).
    pub computed_hash: Option<String>,
    /// "same", "restored" (same, and the missing object was written again), "differs",
    /// "provenance_differs", "raw_intact", "raw_missing", "raw_damaged", "reapplied" (a hand
    /// edit), "cannot_reapply", "not_rerun" (a command, without permission to run it),
    /// "code_unknown", "code_missing", "refused", "failed", "output_damaged" (the step gives
    /// the recorded bytes but the stored object does not hold them).
    pub result: String,
    pub detail: Option<String>,
    /// Things to know although the step reproduced (a command recorded from a dirty tree).
    pub warnings: Vec<String>,
    /// How the recomputed output differs from the recorded one (the first step that differs).
    pub difference: Option<Box<Difference>>,
}

impl ReplayedStep {
    /// The entry of `step`, which made `out`, before it is judged.
    fn of(step: &Step, out: &Version) -> ReplayedStep {
        ReplayedStep {
            step: step.id,
            kind: step.kind,
            operation: step.operation.clone(),
            produced: out.label(),
            recorded_hash: out.hash.clone(),
            computed_hash: None,
            result: String::new(),
            detail: None,
            warnings: Vec::new(),
            difference: None,
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct ReplayReport {
    pub version: String,
    pub hash: String,
    /// Every step was checked and gave (or, for raw data, has) the recorded bytes.
    pub reproduced: bool,
    pub steps: Vec<ReplayedStep>,
}

/// An outside command replay would run, for the caller to show before it runs.
#[derive(Debug, Clone, Serialize)]
pub struct PlannedCommand {
    pub step: i64,
    /// The command line as recorded, placeholders included.
    pub command: String,
    pub cwd: String,
    pub repository: Option<String>,
    pub commit: Option<String>,
    /// Why it will not run, when it cannot (no recorded code, an absolute output path).
    pub not_runnable: Option<String>,
}

fn object_state(store: &Store, hex: &str) -> Result<&'static str> {
    let hash: Hash = hex
        .parse()
        .map_err(|e: String| crate::Error::from(ErrorKind::Inconsistent(e)))?;
    Ok(match store.objects.check(&hash) {
        Ok(None) => "intact",
        Ok(Some(_)) => "damaged",
        Err(e) if matches!(e.kind(), ErrorKind::ObjectMissing { .. }) => "missing",
        Err(e) => return Err(e),
    })
}

fn load_step(store: &Store, id: i64) -> Result<Step> {
    store.lineage.step(id)?.ok_or_else(|| {
        crate::Error::from(ErrorKind::Inconsistent(format!(
            "step {id} is missing; run `sluice verify`"
        )))
    })
}

/// The outside commands on the way to `reference`, in the order replay would run them.
pub fn planned_commands(store: &Store, reference: &str) -> Result<Vec<PlannedCommand>> {
    let target = refs::resolve(&store.lineage, reference)?;
    let mut out = Vec::new();
    for id in crate::plan::steps_behind(store, &target)? {
        let step = load_step(store, id)?;
        if step.kind != StepKind::Command {
            continue;
        }
        let rec = command::RecordedCode::of(&step)?;
        out.push(PlannedCommand {
            step: id,
            command: rec.line(),
            cwd: rec.cwd.clone(),
            repository: rec.git.as_ref().map(|g| g.repository.clone()),
            commit: rec.git.as_ref().and_then(|g| g.commit.clone()),
            not_runnable: command::cannot_run(&rec).map(|(_, why)| why),
        });
    }
    Ok(out)
}

/// Computes `reference` again from its raw ancestors; stops at the first step that cannot be
/// shown to give its recorded bytes.
pub fn replay(store: &mut Store, reference: &str, options: &ReplayOptions) -> Result<ReplayReport> {
    let target = refs::resolve(&store.lineage, reference)?;
    let seen: Vec<i64> = crate::plan::steps_behind(store, &target)?
        .into_iter()
        .collect();
    let blocked = crate::erasure::unreproducible(store, seen.iter().copied())?;
    if !blocked.is_empty() {
        return Err(crate::Error::from(crate::error::ErrorKind::Data(
            crate::erasure::unreproducible_message(&target.label(), &blocked),
        )));
    }
    let mut steps = Vec::new();
    let mut reproduced = true;
    let mut progress = crate::progress::Task::begin(
        || format!("reproducing {}", target.label()),
        Some(seen.len() as u64),
        crate::progress::Unit::Steps,
    );
    // Steps before this position are not fused again (a fused run that could not run is
    // taken one step at a time, so that the step that fails is named).
    let mut one_at_a_time_until = 0;
    let mut i = 0;
    while i < seen.len() {
        if i >= one_at_a_time_until {
            let run = fusable_run(store, &seen[i..])?;
            if run.len() > 1 {
                let n = run.len();
                match fused(store, run, &mut steps, &mut progress)? {
                    Some(stop) => {
                        i += n;
                        if stop {
                            reproduced = false;
                            break;
                        }
                    }
                    None => one_at_a_time_until = i + n,
                }
                continue;
            }
        }
        let id = seen[i];
        i += 1;
        progress.add(1);
        let step = load_step(store, id)?;
        let outputs = store.lineage.step_outputs(id)?;
        let Some(out) = outputs.first() else {
            continue;
        };
        let mut entry = ReplayedStep::of(&step, out);
        let stop = match step.kind {
            StepKind::Ingest if crate::convert::conversion_of(&step).is_some() => {
                converted_intake(store, &step, out, &mut entry)?
            }
            StepKind::Revert => revert_step(store, &step, out, &mut entry)?,
            // Cell patches a revert recorded for a later command: re-applied like a hand edit.
            StepKind::Command if step.params.get("reapplies_step").is_some() => {
                hand_edit_step(store, &step, out, &mut entry)?
            }
            StepKind::Ingest => {
                let state = object_state(store, &out.hash)?;
                entry.result = format!("raw_{state}");
                if state != "intact" {
                    entry.detail = Some(format!(
                        "the raw data of {} is {state}; reproduce can only recompute what steps made from raw data, not the raw data itself",
                        out.label()
                    ));
                }
                state != "intact"
            }
            StepKind::Operation => built_in(store, &step, out, &mut entry)?,
            StepKind::HandEdit => hand_edit_step(store, &step, out, &mut entry)?,
            StepKind::Command if options.allow_exec => {
                let r = command::rerun(store, &step, &outputs)?;
                entry.result = r.result.to_string();
                entry.detail = r.detail;
                entry.warnings = r.warnings;
                entry.computed_hash = r.computed_hash;
                entry.difference = r.difference;
                !matches!(r.result, "same" | "restored") || stored_damaged(store, out, &mut entry)?
            }
            other => {
                let state = object_state(store, &out.hash)?;
                entry.result = "not_rerun".into();
                entry.detail = Some(format!(
                    "a {} step is outside work, which reproduce runs again only with --allow-exec; its recorded output is {state}",
                    other.as_str().replace('_', " ")
                ));
                reproduced = false;
                state != "intact"
            }
        };
        steps.push(entry);
        if stop {
            reproduced = false;
            break;
        }
    }
    Ok(ReplayReport {
        version: target.label(),
        hash: target.hash.clone(),
        reproduced,
        steps,
    })
}

/// A converted intake (a workbook, JSON Lines): the raw object is checked and converted again;
/// the version must come out byte for byte. `true` when the replay stops here.
fn converted_intake(
    store: &Store,
    step: &Step,
    out: &Version,
    entry: &mut ReplayedStep,
) -> Result<bool> {
    let conv = crate::convert::conversion_of(step).ok_or_else(|| {
        crate::Error::from(ErrorKind::Inconsistent("a vanished conversion".into()))
    })?;
    let short = &conv.raw.hash[..12.min(conv.raw.hash.len())];
    let state = object_state(store, &conv.raw.hash)?;
    if state != "intact" {
        entry.result = format!("raw_{state}");
        entry.detail = Some(format!(
            "the raw {} object {short} that {} was converted from is {state}",
            conv.format,
            out.label()
        ));
        return Ok(true);
    }
    let computed = crate::convert::convert_again(store, step, &conv)?;
    let same = computed == out.hash;
    entry.result = if same { "same" } else { "differs" }.into();
    entry.detail = Some(format!(
        "converted again from the raw {} object {short}",
        conv.format
    ));
    entry.computed_hash = Some(computed);
    Ok(!same)
}

/// A revert step: its version is the table of the version before the step it took out, so it
/// must have that version's hash and be intact. `true` when the replay stops here.
fn revert_step(
    store: &Store,
    step: &Step,
    out: &Version,
    entry: &mut ReplayedStep,
) -> Result<bool> {
    let inputs = store.lineage.step_input_versions(step.id)?;
    let Some((_, base)) = inputs.iter().find(|(role, _)| role == "input") else {
        return Err(ErrorKind::Inconsistent(format!("step {} records no input", step.id)).into());
    };
    entry.computed_hash = Some(base.hash.clone());
    if base.hash != out.hash {
        entry.result = "differs".into();
        entry.detail = Some(format!(
            "a revert records the table of {} again, but {} has other bytes",
            base.label(),
            out.label()
        ));
        return Ok(true);
    }
    let state = object_state(store, &out.hash)?;
    entry.result = if state == "intact" {
        "same"
    } else {
        "output_damaged"
    }
    .into();
    entry.detail = Some(format!(
        "the table of {} again, without step {}",
        base.label(),
        step.reverts_step
            .map_or_else(|| "?".into(), |s| s.to_string())
    ));
    Ok(state != "intact")
}

/// Re-applies a hand edit; `true` when the replay stops here.
fn hand_edit_step(
    store: &Store,
    step: &Step,
    out: &Version,
    entry: &mut ReplayedStep,
) -> Result<bool> {
    let state = object_state(store, &out.hash)?;
    if state != "intact" {
        entry.result = "cannot_reapply".into();
        entry.detail = Some(format!(
            "the output of this hand edit ({}) is {state}: the values a person typed are kept only in that version, so the edit cannot be re-applied",
            out.label()
        ));
        return Ok(true);
    }
    let inputs = store.lineage.step_input_versions(step.id)?;
    let Some((_, input)) = inputs.iter().find(|(role, _)| role == "input") else {
        return Err(ErrorKind::Inconsistent(format!("step {} records no input", step.id)).into());
    };
    match hand_edit::reapply(store, step.id, input, out)? {
        hand_edit::Reapplied::Same => {
            entry.result = "reapplied".into();
            entry.computed_hash = Some(out.hash.clone());
            Ok(false)
        }
        hand_edit::Reapplied::Differs(d, why) => {
            entry.result = "differs".into();
            entry.detail = Some(why);
            entry.difference = Some(d);
            Ok(true)
        }
    }
}

/// After a step gave the recorded bytes: whether the stored object of `out` is damaged, in
/// which case the entry says so and the replay stops (the steps after it would read it).
fn stored_damaged(store: &Store, out: &Version, entry: &mut ReplayedStep) -> Result<bool> {
    // A recomputable version has no stored object to hold the computed bytes against: that
    // they have the recorded hash is the whole check.
    if entry.result == "restored" || !store.bytes_stored(out)? {
        return Ok(false);
    }
    let state = object_state(store, &out.hash)?;
    if state == "intact" {
        return Ok(false);
    }
    entry.result = format!("output_{state}");
    entry.detail = Some(format!(
        "the step gives the recorded bytes, but the stored object of {} ({}) is {state}; `sluice verify` names it too",
        out.label(),
        out.hash
    ));
    Ok(true)
}

/// One recorded built-in step, ready to be computed again: the version it read, the version
/// it made, and its options with the check of what it recorded.
struct Rerun {
    step: Step,
    main: Version,
    out: Version,
    opts: ApplyOptions,
}

/// Built-in step `step` (which made `out`) ready to be computed again; tables and other
/// sources by their exact recorded versions.
fn rerun_of(store: &Store, step: Step, out: Version) -> Result<Rerun> {
    let (main, op) = crate::recompute::recorded_operation(store, &step)?;
    let opts = ApplyOptions {
        op,
        reason: step.reason.clone().unwrap_or_else(|| "replay".into()),
        output_dataset: Some(out.dataset.clone()),
        agent: Agent::new("sluice reproduce", None, "builtin"),
        map_table_file: None,
        repeats: None,
        replay: Some(ReplayCheck {
            output_hash: out.hash.clone(),
            provenance_hash: store.lineage.step_provenance(step.id)?,
            // A recomputable version is checked, not stored by reproducing it.
            write: store.bytes_stored(&out)?,
        }),
    };
    Ok(Rerun {
        step,
        main,
        out,
        opts,
    })
}

/// The built-in steps at the start of `ids` that can be computed again in one pass over their
/// rows: each reads the version the one before made, and each may join a fused run
/// ([`apply::fusable`]). Empty or one step: nothing to fuse.
fn fusable_run(store: &Store, ids: &[i64]) -> Result<Vec<Rerun>> {
    let mut run: Vec<Rerun> = Vec::new();
    for &id in ids {
        let step = load_step(store, id)?;
        if step.kind != StepKind::Operation {
            break;
        }
        let Some(out) = store.lineage.step_outputs(id)?.into_iter().next() else {
            break;
        };
        let Ok(r) = rerun_of(store, step, out) else {
            break;
        };
        let follows = run.last().is_none_or(|before| before.out.id == r.main.id);
        if !follows || !apply::fusable(&r.opts.op, run.is_empty()) {
            break;
        }
        run.push(r);
    }
    Ok(run)
}

/// Computes a run of built-in steps again in one pass ([`apply::replay_chain`]) and judges
/// each as [`built_in`] would; `Some(true)` when the replay stops in it, `None` when the run
/// could not be computed (the caller then takes its steps one at a time, to name the one that
/// fails).
fn fused(
    store: &mut Store,
    run: Vec<Rerun>,
    entries: &mut Vec<ReplayedStep>,
    progress: &mut crate::progress::Task,
) -> Result<Option<bool>> {
    let inputs: Vec<Version> = run.iter().map(|r| r.main.clone()).collect();
    let opts: Vec<ApplyOptions> = run.iter().map(|r| r.opts.clone()).collect();
    let Ok(outcomes) = apply::replay_chain(store, &inputs, &opts) else {
        return Ok(None);
    };
    for (r, outcome) in run.into_iter().zip(outcomes) {
        progress.add(1);
        let mut entry = ReplayedStep::of(&r.step, &r.out);
        let stop = judge(store, &r, Ok(outcome), &mut entry)?;
        entries.push(entry);
        if stop {
            return Ok(Some(true));
        }
    }
    Ok(Some(false))
}

/// Runs a built-in step again; `true` when the replay stops here.
fn built_in(
    store: &mut Store,
    step: &Step,
    out: &Version,
    entry: &mut ReplayedStep,
) -> Result<bool> {
    let r = rerun_of(store, step.clone(), out.clone())?;
    let outcome = apply::apply(store, &r.main.label(), &r.opts);
    judge(store, &r, outcome, entry)
}

/// What a built-in step computed again gave, held against what it recorded; `true` when the
/// replay stops here.
fn judge(
    store: &mut Store,
    r: &Rerun,
    outcome: Result<ApplyOutcome>,
    entry: &mut ReplayedStep,
) -> Result<bool> {
    let (main, out) = (&r.main, &r.out);
    let mut opts = r.opts.clone();
    match outcome {
        Ok(ApplyOutcome::Replayed {
            output_hash,
            matches,
            provenance_matches,
            restored,
            ..
        }) => {
            entry.computed_hash = Some(output_hash.clone());
            entry.result = match (matches, provenance_matches, restored) {
                (false, _, _) => "differs",
                (true, false, _) => "provenance_differs",
                (true, true, true) => "restored",
                (true, true, false) => "same",
            }
            .to_string();
            if matches && provenance_matches {
                return stored_damaged(store, out, entry);
            }
            if matches {
                entry.detail = Some("the output bytes are the recorded ones, but the provenance computed now differs from the recorded object".to_string());
                return Ok(true);
            }
            entry.detail = Some(format!(
                "the step gives other bytes ({}) than it recorded for {} ({})",
                crate::model::short_hash(&output_hash),
                out.label(),
                crate::model::short_hash(&out.hash)
            ));
            // The recomputed bytes, to compare: the step is computed once more, told that its
            // own result is the one expected, so that apply writes them as an object.
            opts.replay = Some(ReplayCheck {
                output_hash: output_hash.clone(),
                provenance_hash: None,
                write: true,
            });
            match computed_difference(store, main, out, &opts, &output_hash) {
                Ok(d) => entry.difference = Some(Box::new(d)),
                Err(e) => entry
                    .warnings
                    .push(format!("the outputs could not be compared: {e}")),
            }
            Ok(true)
        }
        Ok(_) => Err(ErrorKind::Inconsistent("a replayed step was recorded".into()).into()),
        Err(e) => {
            entry.result = "differs".into();
            entry.detail = Some(format!("the step cannot run again: {e}"));
            Ok(true)
        }
    }
}

/// The difference between `recorded` and the bytes the step computes now (hash `computed`):
/// a second replayed apply, told to expect its own result, writes them into a stage of their
/// own under `tmp/`; they are copied to a file there, the stage is removed, and the file is
/// compared and removed. The store is left as it was.
fn computed_difference(
    store: &mut Store,
    input: &Version,
    recorded: &Version,
    opts: &ApplyOptions,
    computed: &str,
) -> Result<Difference> {
    let hash: Hash = computed
        .parse()
        .map_err(|e: String| crate::Error::from(ErrorKind::Inconsistent(e)))?;
    let stage = store.begin_stage("replay")?;
    let tmp = stage.with_extension("csv");
    let copied = (|| {
        match apply::apply(store, &input.label(), opts)? {
            ApplyOutcome::Replayed { .. } => {}
            _ => return Err(ErrorKind::Inconsistent("a replayed step was recorded".into()).into()),
        }
        let mut f = std::fs::File::create(&tmp).map_err(|e| crate::Error::io(&tmp, e))?;
        store.objects.copy_to(&hash, &mut f, &tmp)?;
        Ok::<(), crate::Error>(())
    })();
    store.objects.discard_stage();
    let result = copied.and_then(|_| difference::against_file(store, recorded, &tmp));
    let _ = std::fs::remove_file(&tmp);
    result
}

/// Applies the chain of steps that made `reference` to new raw data for its input `name`
/// (next quarter's export): `file` is taken in as the next version of that dataset, the other
/// raw inputs stay the versions the chain read, and every step is recorded again in order,
/// each naming the step it repeats. Before anything is recorded the file is read (without
/// recording it) and every column of the recorded raw version that a step names must be in it:
/// a missing file or column refuses the run with nothing recorded, so the dataset's latest
/// version stays where it was. A step that cannot apply for another reason (a value it cannot
/// read, a failing hold point) stops the run and keeps what was done, as `sluice run` does.
pub fn onto(
    store: &mut Store,
    reference: &str,
    name: &str,
    file: &std::path::Path,
    why: Option<String>,
    agent: &Agent,
) -> Result<std::result::Result<crate::plan::RunReport, crate::plan::RunFailure>> {
    let mut plan = crate::plan::export(store, reference, std::path::Path::new("/"))?;
    if !plan.sources.iter().any(|i| i.dataset == name) {
        let names: Vec<&str> = plan.sources.iter().map(|i| i.dataset.as_str()).collect();
        return Err(crate::Error::usage(format!(
            "--with {name}=...: {reference} is not made from a dataset named \"{name}\"; its raw inputs are: {}",
            names.join(", ")
        )));
    }
    check_new_file(store, &plan, reference, name, file, agent)?;
    // The new file stands for its raw input and every version made from it is computed
    // again; a step that reads, as recorded, another raw source or table an erasure reached
    // cannot be run again as it was.
    let target = refs::resolve(&store.lineage, reference)?;
    let steps = crate::plan::steps_behind(store, &target)?;
    let blocked: Vec<_> = crate::erasure::unreproducible(store, steps.iter().copied())?
        .into_iter()
        .filter(|b| {
            let dataset = b.version.rsplit_once(':').map_or("", |(d, _)| d);
            dataset != name && plan.sources.iter().any(|s| s.dataset == dataset)
        })
        .collect();
    if !blocked.is_empty() {
        return Err(crate::Error::from(crate::error::ErrorKind::Data(
            crate::erasure::unreproducible_message(
                &format!("the steps that made {reference}"),
                &blocked,
            ),
        )));
    }
    let mut bindings = Vec::new();
    for input in &mut plan.sources {
        if input.dataset == name {
            input.reason =
                Some(why.clone().unwrap_or_else(|| {
                    format!("new raw data for the steps that made {reference}")
                }));
            bindings.push((
                input.dataset.clone(),
                crate::plan::Binding::File(file.to_path_buf()),
            ));
        } else if let Some(recorded) = &input.recorded {
            bindings.push((
                input.dataset.clone(),
                crate::plan::Binding::Version(recorded.clone()),
            ));
        }
    }
    let opts = crate::plan::RunOptions {
        plan_dir: std::path::PathBuf::from("."),
        bindings,
        agent: agent.clone(),
    };
    // All or nothing: the whole chain runs first in a trial copy of the store, so that a step
    // that fails on the new data (a value it cannot read, a hold point) stops the rerun before
    // anything is recorded. When it passes, what the trial recorded is copied into the store
    // in one transaction (objects first), as `publish` copies a store, rather than running
    // the chain a second time; if another writer recorded meanwhile, the chain is run again
    // for real (the steps are deterministic, so it passes where the trial did).
    let mut trial_store = store.trial()?;
    let trial = crate::plan::run(&mut trial_store, &plan, &opts);
    let adopted = match trial {
        Err(failure) => {
            trial_store.end_trial();
            return Ok(Err(crate::plan::RunFailure {
                done: Vec::new(),
                at: format!(
                    "{} in a trial run of the whole chain (versions named as they would have been)",
                    failure.at
                ),
                error: failure.error,
            }));
        }
        Ok(report) => crate::sharing::adopt_trial(&trial_store, store).map(|m| m.map(|_| report)),
    };
    trial_store.end_trial();
    match adopted? {
        Some(report) => Ok(Ok(report)),
        None => Ok(crate::plan::run(store, &plan, &opts)),
    }
}

/// The checks of [`onto`] before anything is recorded: `file` exists and can be read as the
/// plan input `name` would read it, and has every column of the recorded raw version that a
/// step of the chain names.
fn check_new_file(
    store: &Store,
    plan: &crate::plan::Plan,
    reference: &str,
    name: &str,
    file: &std::path::Path,
    agent: &Agent,
) -> Result<()> {
    let retry = format!("sluice rerun {reference} --with {name}=FILE");
    if !file.is_file() {
        return Err(crate::Error::usage(format!(
            "{}: no such file; nothing was recorded; give the new data for {name} as `{retry}`",
            file.display()
        )));
    }
    let Some(input) = plan.sources.iter().find(|i| i.dataset == name) else {
        return Ok(());
    };
    let iopts = crate::intake::IngestOptions {
        dataset: name.to_string(),
        key: input.key.clone(),
        reason: None,
        delimiter: input.delimiter.as_ref().and_then(|d| d.bytes().next()),
        has_header: input.header,
        encoding: input.encoding.clone(),
        null_tokens: input.null_tokens.clone(),
        agent: agent.clone(),
    };
    let header = match crate::intake::prepare_from(
        store,
        file,
        &iopts,
        &crate::intake::SourceOptions::default(),
    )
    .map_err(|e| {
        crate::Error::from(ErrorKind::Usage(format!(
            "{}: cannot be read as new data for {name}: {e}; nothing was recorded",
            file.display()
        )))
    })? {
        crate::intake::Prepared::Unchanged(v) => v.header.clone(),
        crate::intake::Prepared::Ready(p) => p.header.clone(),
    };
    let Some(recorded) = input
        .recorded
        .as_deref()
        .and_then(|r| crate::refs::resolve(&store.lineage, r).ok())
    else {
        return Ok(());
    };
    let mut missing: Vec<String> = Vec::new();
    for column in recorded.header.iter().filter(|c| !header.contains(c)) {
        let user = plan.steps.iter().find(|step| names_column(step, column));
        if let Some(step) = user {
            missing.push(format!(
                "\"{column}\" (used by {}{})",
                step.repeats
                    .map(|id| format!("step {id}, "))
                    .unwrap_or_default(),
                step.describe()
            ));
        }
    }
    if missing.is_empty() {
        return Ok(());
    }
    Err(crate::Error::usage(format!(
        "{} lacks column{} {} that the steps behind {reference} read from {}; its columns are: {}; nothing was recorded and the latest version of {name} is unchanged; give a file with those columns as `{retry}`",
        file.display(),
        if missing.len() == 1 { "" } else { "s" },
        missing.join(", "),
        recorded.label(),
        header.join(", ")
    )))
}

/// Whether a plan step names `column` in its parameters or rules (as a value, or as a word of
/// a predicate).
fn names_column(step: &crate::plan::PlanStep, column: &str) -> bool {
    let mut todo: Vec<serde_json::Value> = Vec::new();
    if let Some(op) = &step.clean {
        todo.push(serde_json::to_value(op).unwrap_or_default());
    }
    if let Some(rules) = &step.inspect {
        todo.push(serde_json::to_value(rules).unwrap_or_default());
    }
    while let Some(v) = todo.pop() {
        match v {
            serde_json::Value::String(t)
                if t == column
                    || t.split(|c: char| !(c.is_alphanumeric() || c == '_'))
                        .any(|w| w == column)
                    || (column.contains(' ') && t.contains(column)) =>
            {
                return true;
            }
            serde_json::Value::Array(a) => todo.extend(a),
            serde_json::Value::Object(o) => todo.extend(o.into_iter().map(|(_, x)| x)),
            _ => {}
        }
    }
    false
}
