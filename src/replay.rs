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
//! object is computed again too and compared with the recorded one. Outside work (commands,
//! hand edits) is not run again by this build; replay says so for each such step and checks
//! that its recorded output is intact.

use serde::Serialize;

use crate::error::{ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Agent, StepKind};
use crate::ops::apply::{self, ApplyOptions, ApplyOutcome, ReplayCheck};
use crate::ops::Operation;
use crate::refs;
use crate::store::Store;

/// What replay found for one step.
#[derive(Debug, Clone, Serialize)]
pub struct ReplayedStep {
    pub step: i64,
    pub kind: StepKind,
    pub operation: Option<String>,
    /// The version the step recorded (the first, for a step with several).
    pub produced: String,
    pub recorded_hash: String,
    /// The hash computed now (built-in steps).
    pub computed_hash: Option<String>,
    /// "same", "restored" (same, and the missing object was written again), "differs",
    /// "provenance_differs", "raw_intact", "raw_missing", "raw_damaged", "not_rerun".
    pub result: String,
    pub detail: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ReplayReport {
    pub version: String,
    pub hash: String,
    /// Every step was checked and gave (or, for raw data, has) the recorded bytes.
    pub reproduced: bool,
    pub steps: Vec<ReplayedStep>,
}

fn object_state(store: &Store, hex: &str) -> Result<&'static str> {
    let hash: Hash = hex
        .parse()
        .map_err(|e: String| crate::Error::from(ErrorKind::Database(e)))?;
    Ok(match store.objects.check(&hash) {
        Ok(None) => "intact",
        Ok(Some(_)) => "damaged",
        Err(e) if matches!(e.kind(), ErrorKind::ObjectMissing { .. }) => "missing",
        Err(e) => return Err(e),
    })
}

/// Computes `reference` again from its raw ancestors; stops at the first step that cannot be
/// shown to give its recorded bytes.
pub fn replay(store: &mut Store, reference: &str) -> Result<ReplayReport> {
    let target = refs::resolve(&store.lineage, reference)?;
    let seen = crate::plan::steps_behind(store, &target)?;
    let agent = Agent {
        identity: "sluice replay".into(),
        source: "builtin".into(),
    };
    let mut steps = Vec::new();
    let mut reproduced = true;
    let mut progress = crate::progress::Task::begin(
        || format!("replaying {}", target.label()),
        Some(seen.len() as u64),
        crate::progress::Unit::Steps,
    );
    for id in seen {
        progress.add(1);
        let step = store.lineage.step(id)?.ok_or_else(|| {
            crate::Error::from(ErrorKind::Database(format!(
                "step {id} is missing; run `sluice verify`"
            )))
        })?;
        let outputs = store.lineage.step_outputs(id)?;
        let Some(out) = outputs.first() else {
            continue;
        };
        let mut entry = ReplayedStep {
            step: id,
            kind: step.kind,
            operation: step.operation.clone(),
            produced: out.label(),
            recorded_hash: out.hash.clone(),
            computed_hash: None,
            result: String::new(),
            detail: None,
        };
        match step.kind {
            StepKind::Ingest => {
                let state = object_state(store, &out.hash)?;
                entry.result = format!("raw_{state}");
                if state != "intact" {
                    entry.detail = Some(format!(
                        "the raw data of {} is {state}; replay can only recompute what steps made from raw data, not the raw data itself",
                        out.label()
                    ));
                    reproduced = false;
                    steps.push(entry);
                    break;
                }
            }
            StepKind::Operation => {
                let op: Operation = serde_json::from_value(step.params.clone()).map_err(|e| {
                    crate::Error::from(ErrorKind::Database(format!(
                        "step {id} holds parameters this build cannot read ({e})"
                    )))
                })?;
                let inputs = store.lineage.step_input_versions(id)?;
                let Some((_, main)) = inputs.iter().find(|(role, _)| role == "input") else {
                    return Err(ErrorKind::Database(format!("step {id} records no input")).into());
                };
                // Tables and other sources by their exact recorded versions.
                let op = match inputs.iter().find(|(role, _)| role != "input") {
                    Some((_, other)) => crate::plan::with_other_input(&op, other.label()),
                    None => op,
                };
                let opts = ApplyOptions {
                    op,
                    reason: step.reason.clone().unwrap_or_else(|| "replay".into()),
                    output_dataset: Some(out.dataset.clone()),
                    agent: agent.clone(),
                    map_table_file: None,
                    repeats: None,
                    replay: Some(ReplayCheck {
                        output_hash: out.hash.clone(),
                        provenance_hash: store.lineage.step_provenance(id)?,
                    }),
                };
                match apply::apply(store, &main.label(), &opts) {
                    Ok(ApplyOutcome::Replayed {
                        output_hash,
                        matches,
                        provenance_matches,
                        restored,
                        ..
                    }) => {
                        entry.computed_hash = Some(output_hash);
                        entry.result = match (matches, provenance_matches, restored) {
                            (false, _, _) => "differs",
                            (true, false, _) => "provenance_differs",
                            (true, true, true) => "restored",
                            (true, true, false) => "same",
                        }
                        .to_string();
                        if !(matches && provenance_matches) {
                            entry.detail = Some(if matches {
                                "the output bytes are the recorded ones, but the provenance computed now differs from the recorded object".to_string()
                            } else {
                                format!(
                                    "the step gives other bytes than it recorded; compare them with `sluice diff {}` against the recomputed output (the recorded version is {})",
                                    out.label(),
                                    &out.hash[..12]
                                )
                            });
                            reproduced = false;
                            steps.push(entry);
                            break;
                        }
                    }
                    Ok(_) => {
                        return Err(
                            ErrorKind::Database("a replayed step was recorded".into()).into()
                        )
                    }
                    Err(e) => {
                        entry.result = "differs".into();
                        entry.detail = Some(format!("the step cannot run again: {e}"));
                        reproduced = false;
                        steps.push(entry);
                        break;
                    }
                }
            }
            other => {
                let state = object_state(store, &out.hash)?;
                entry.result = "not_rerun".into();
                entry.detail = Some(format!(
                    "a {} step is outside work, which this build does not run again; its recorded output is {state}",
                    other.as_str().replace('_', " ")
                ));
                reproduced = false;
                if state != "intact" {
                    steps.push(entry);
                    break;
                }
            }
        }
        steps.push(entry);
    }
    Ok(ReplayReport {
        version: target.label(),
        hash: target.hash.clone(),
        reproduced,
        steps,
    })
}

/// Applies the chain of steps that made `reference` to new raw data for its input `name`
/// (next quarter's export): `file` is taken in as the next version of that dataset, the other
/// raw inputs stay the versions the chain read, and every step is recorded again in order,
/// each naming the step it repeats. A step that cannot apply (a missing column, a failing
/// gate) stops the run and keeps what was done, as `sluice run` does.
pub fn onto(
    store: &mut Store,
    reference: &str,
    name: &str,
    file: &std::path::Path,
    why: Option<String>,
    agent: &Agent,
) -> Result<std::result::Result<crate::plan::RunReport, crate::plan::RunFailure>> {
    let mut plan = crate::plan::export(store, reference, std::path::Path::new("/"))?;
    if !plan.inputs.iter().any(|i| i.name == name) {
        let names: Vec<&str> = plan.inputs.iter().map(|i| i.name.as_str()).collect();
        return Err(crate::Error::usage(format!(
            "--onto {name}=...: {reference} is not made from a dataset named \"{name}\"; its raw inputs are: {}",
            names.join(", ")
        )));
    }
    let mut bindings = Vec::new();
    for input in &mut plan.inputs {
        if input.name == name {
            input.why =
                Some(why.clone().unwrap_or_else(|| {
                    format!("new raw data for the steps that made {reference}")
                }));
            bindings.push((
                input.name.clone(),
                crate::plan::Binding::File(file.to_path_buf()),
            ));
        } else if let Some(recorded) = &input.recorded {
            bindings.push((
                input.name.clone(),
                crate::plan::Binding::Version(recorded.clone()),
            ));
        }
    }
    let opts = crate::plan::RunOptions {
        plan_dir: std::path::PathBuf::from("."),
        bindings,
        agent: agent.clone(),
    };
    Ok(crate::plan::run(store, &plan, &opts))
}
