//! Revert: removing the effect of the step that made one version of a dataset whose history
//! went on after it, without deleting anything.
//!
//! For `D@k`, made by step S from `D@(k-1)`, with later versions `D@(k+1)` .. `D@n` each made
//! from the one before:
//!
//! 1. a step of kind `revert` (pointing at S through `steps.reverts_step`) records `D@(n+1)`,
//!    the table of `D@(k-1)` again (same bytes, same objects), read from `D@(k-1)` by an
//!    identity row map and beside it `D@n`, the version it replaces as the latest;
//! 2. every later step is then applied again, in order, on top of it: a built-in operation is
//!    run again with its recorded parameters (tables and appended sources pinned to the
//!    versions it read); a hand edit is re-applied as cell patches: its changed cells, removed
//!    rows and added rows, matched to the rows of the new history through the row lineage (a
//!    row is the same row when both histories carry it from the same row of `D@(k-1)`, or from
//!    the same row a later step brought in);
//! 3. all of it is recorded in one transaction, with one audit entry per version (the revert's
//!    first), or nothing is.
//!
//! What is stored follows the default policy of a run: an output a later step of the same
//! one-pass stretch supersedes is only hashed and recorded recomputable; the restored table,
//! re-applied hand edits and commands, and the new latest version are stored.
//!
//! Re-applying can meet conflicts, which refuse the revert unless forced:
//! - an outside command after S: its program is not run again here; forced, its recorded
//!   changes are re-applied as cell patches, as a hand edit's would be;
//! - a later hand edit (or forced command) changed a cell of a row or column that exists only
//!   because of S: forced, that change is left out;
//! - it changed or removed a row that the new history drops: forced, that change is left out;
//! - it changed a row of which S had dropped a duplicate: the duplicate comes back without the
//!   change; forced, it stays as it was;
//! - it changed the columns themselves: it cannot be patched; forced, it is left out whole;
//! - re-applied, it makes a row equal to another row of the new history (the same row twice,
//!   which its own version did not have): forced, both rows stay;
//! - an inspection recorded as a hold point on a version the withdrawal replaces fails on the
//!   new version that stands for it: forced, that version is recorded with the failing result.
//!
//! Every inspection recorded on a replaced version is run again on the version standing for it
//! and recorded with it (as a hold point where it was one). Patches keep the lineage kind of the step
//! they re-apply (a hand edit's stays `inferred`).
//!
//! Every forced conflict is listed in the revert step's parameters. A later built-in step that
//! can no longer run (a column only S made, a value it no longer reads) stops the revert with
//! that step's error. A refused or failed revert leaves the store as it was: the new history's
//! objects are written to a stage of their own under `tmp/` and published into `objects/` only
//! just before the transaction that records them.

use std::collections::{HashMap, HashSet, VecDeque};

use serde::Serialize;
use serde_json::json;

use crate::clock;
use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::{Agent, LineageKind, RowRun, Step, StepKind, Storage, Version};
use crate::ops::apply::{self, ApplyOptions};
use crate::ops::Operation;
use crate::provenance::{ChangeLog, DropLog};
use crate::recording::{self, Pending, Provenance, StepMeta};
use crate::refs;
use crate::store::version_writer::CanonicalWriter;
use crate::store::Store;

/// What `sluice withdraw` was asked to do.
#[derive(Debug, Clone)]
pub struct RevertOptions {
    pub reason: String,
    /// Resolve conflicts by the documented rules instead of refusing.
    pub force: bool,
    pub agent: Agent,
}

/// One thing that stands in the way of re-applying a later step.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Conflict {
    /// The later step.
    pub step: i64,
    /// The version it made (`name@seq`).
    pub version: String,
    /// `outside_command`, `row_from_reverted_step`, `column_from_reverted_step`,
    /// `row_dropped_after_revert`, `duplicate_returns_unedited`, `columns_changed`,
    /// `edited_row_twice`, `hold_point_fails`.
    pub kind: String,
    /// 1-based data row of `version` (or of the version the step read, for a removed row).
    pub row: Option<u64>,
    pub column: Option<String>,
    pub detail: String,
    /// What `--force` does about it.
    pub when_forced: String,
}

/// A version the revert recorded.
#[derive(Debug, Clone, Serialize)]
pub struct RevertedLink {
    pub step: i64,
    pub version: String,
    pub hash: String,
    pub rows: u64,
    /// The later step this one applies again (none for the revert step itself).
    pub repeats_step: Option<i64>,
    pub what: String,
    /// Whether its bytes were written (`stored`) or only its hash and recipe recorded
    /// (`recomputable`: a later step of the same one-pass stretch supersedes it).
    pub storage: Storage,
}

/// A check recorded on a version of the old history, run again on the new version that stands
/// for it.
#[derive(Debug, Clone, Serialize)]
pub struct Recheck {
    /// The version of the old history it was recorded on (`NAME:vN`).
    pub original: String,
    /// The new version it ran on (`NAME:vN`).
    pub version: String,
    pub rule: serde_json::Value,
    /// It stopped a plan's run when it failed (a hold point); failing again refuses the
    /// withdrawal.
    #[serde(rename = "hold_point")]
    pub gate: bool,
    pub passed: bool,
    pub n_failing: u64,
    /// The first failing rows, 1-based data rows of `version`.
    pub first_failing: Vec<u64>,
}

/// What a revert recorded.
#[derive(Debug, Clone, Serialize)]
pub struct RevertReport {
    pub reverted: String,
    pub reverted_step: i64,
    pub base: String,
    pub replaced_latest: String,
    /// The revert step, then each later step applied again, in order.
    pub recorded: Vec<RevertedLink>,
    /// Later steps that changed nothing once the reverted step was gone (nothing recorded).
    pub unchanged: Vec<String>,
    /// Conflicts resolved because `--force` was given.
    pub forced: Vec<Conflict>,
    /// The checks recorded on the versions the revert replaces, run again on the new versions
    /// that stand for them (recorded with them, as gates where they were gates).
    pub checks: Vec<Recheck>,
    /// Latest versions of other datasets made from the reverted history; a revert does not
    /// change them.
    pub untouched_downstream: Vec<String>,
    pub latest: String,
    pub hash: String,
}

/// A revert either recorded, or refused because of conflicts (nothing recorded).
#[derive(Debug, Clone)]
pub enum RevertOutcome {
    Recorded(RevertReport),
    Refused {
        reverted: String,
        conflicts: Vec<Conflict>,
    },
}

/// Where a row of a version in the chain came from, in terms both histories share.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
enum Origin {
    /// This row of the version before the reverted step.
    Base(u64),
    /// Row `row` of the step's input at `input` (not the dataset's own previous version).
    From { step: i64, input: u32, row: u64 },
    /// Added by the step (a hand edit's new row), at that row of the step's recorded output.
    Added { step: i64, row: u64 },
}

impl Origin {
    fn step(&self) -> Option<i64> {
        match self {
            Origin::Base(_) => None,
            Origin::From { step, .. } | Origin::Added { step, .. } => Some(*step),
        }
    }
}

fn db(msg: String) -> Error {
    ErrorKind::Inconsistent(msg).into()
}

/// The origins of a step's output rows, from the origins of its main input's rows and its run
/// sets (by input position).
fn origins_through(
    prev: &[Origin],
    n_out: u64,
    sets: &[(u32, Vec<RowRun>)],
    main: u32,
    step: i64,
) -> Vec<Origin> {
    let mut out: Vec<Option<Origin>> = vec![None; n_out as usize];
    for (position, runs) in sets {
        for r in runs {
            for k in 0..r.len {
                let o = (r.out_start + k) as usize;
                let i = r.in_start + k;
                if o >= out.len() {
                    continue;
                }
                out[o] = Some(if *position == main {
                    prev.get(i as usize).copied().unwrap_or(Origin::Added {
                        step,
                        row: o as u64,
                    })
                } else {
                    Origin::From {
                        step,
                        input: *position,
                        row: i,
                    }
                });
            }
        }
    }
    out.into_iter()
        .enumerate()
        .map(|(o, x)| {
            x.unwrap_or(Origin::Added {
                step,
                row: o as u64,
            })
        })
        .collect()
}

/// The run sets of a recorded step that made `output`, by input position.
fn recorded_sets(store: &Store, output: &Version) -> Result<Vec<(u32, Vec<RowRun>)>> {
    let inputs = store.lineage.step_input_versions(output.step_id)?;
    let mut sets = Vec::new();
    for (position, (_, v)) in inputs.iter().enumerate() {
        let runs = crate::provenance::row_runs(store, output, v.id)?;
        if !runs.is_empty() {
            sets.push((position as u32, runs));
        }
    }
    Ok(sets)
}

/// The run sets of a pending step, read back from its provenance object.
fn pending_sets(store: &Store, p: &Pending) -> Result<Vec<(u32, Vec<RowRun>)>> {
    let Some((hex, _)) = &p.provenance else {
        return Ok(Vec::new());
    };
    let hash: Hash = hex.parse().map_err(db)?;
    let bytes = store.objects.read_all(&hash)?;
    Ok(crate::provenance::decode(&bytes, hex)?.runs)
}

/// The new history before it is recorded: the pending steps, the conflicts met, the later
/// steps that changed nothing, and what each recorded later step did.
type Computed = (
    Vec<Pending>,
    Vec<Conflict>,
    Vec<String>,
    Vec<(i64, String)>,
    Vec<(usize, Recheck)>,
);

/// A later step and what it read and made.
struct Later {
    step: Step,
    input: Version,
    output: Version,
    /// Position of `input` among the step's inputs.
    main: u32,
}

/// Undoes the step that made `reference` (see the module's description).
pub fn revert(store: &mut Store, reference: &str, opts: &RevertOptions) -> Result<RevertOutcome> {
    if opts.reason.trim().is_empty() {
        return Err(Error::usage(
            "say why the step is reverted with --why TEXT, e.g. --why \"the dedupe key was wrong\"",
        ));
    }
    let target = refs::resolve(&store.lineage, reference)?;
    let label = target.label();
    let reverted = store.lineage.step(target.step_id)?.ok_or_else(|| {
        db(format!(
            "the step that made {label} is missing; run `sluice verify`"
        ))
    })?;
    if reverted.kind == StepKind::Ingest {
        return Err(Error::usage(format!(
            "{label} was taken in from a file, not made by a step; to stop using it, take in the right file with `sluice receive FILE --as {}`",
            target.dataset
        )));
    }
    if target.seq == 1 {
        return Err(Error::usage(format!(
            "{label} is the first version of {}: there is no earlier version of it to go back to; revert a later step, or stop using the dataset",
            target.dataset
        )));
    }
    let base = store
        .lineage
        .version_by_seq(&target.dataset, target.seq - 1)?
        .ok_or_else(|| db(format!("{}:v{} is missing", target.dataset, target.seq - 1)))?;
    if let Some(e) = store.lineage.erasure_of_version(base.id)? {
        return Err(ErrorKind::Data(format!(
            "step {} cannot be withdrawn: {}, the table it would restore, lost cells under erasure order {}, so its recorded bytes exist nowhere now; record the change you want as a new step on the latest version of {} instead",
            reverted.id,
            base.label(),
            e.order_id,
            target.dataset
        ))
        .into());
    }
    let reverted_inputs = store.lineage.step_input_versions(reverted.id)?;
    let Some(reverted_main) = reverted_inputs.iter().position(|(_, v)| v.id == base.id) else {
        return Err(Error::usage(format!(
            "{label} was not made from {} (its step read {}); revert can only take out a step that continued a dataset's own history",
            base.label(),
            reverted_inputs
                .iter()
                .map(|(_, v)| v.label())
                .collect::<Vec<_>>()
                .join(", ")
        )));
    };

    // The later history: each version made from the one before.
    let versions = store.lineage.versions_of(&target.dataset)?;
    let mut later: Vec<Later> = Vec::new();
    let mut prev = target.clone();
    for v in versions.into_iter().filter(|v| v.seq > target.seq) {
        let step = store
            .lineage
            .step(v.step_id)?
            .ok_or_else(|| db(format!("the step that made {} is missing", v.label())))?;
        let inputs = store.lineage.step_input_versions(step.id)?;
        let Some(main) = inputs.iter().position(|(_, i)| i.id == prev.id) else {
            return Err(Error::usage(format!(
                "{} was not made from {} ({}); revert can only apply again steps that continue from the reverted version",
                v.label(),
                prev.label(),
                match step.kind {
                    StepKind::Ingest => "it was taken in from a file".to_string(),
                    _ => format!(
                        "its step read {}",
                        inputs.iter().map(|(_, i)| i.label()).collect::<Vec<_>>().join(", ")
                    ),
                }
            )));
        };
        match step.kind {
            StepKind::Operation | StepKind::HandEdit | StepKind::Command => {}
            other => {
                return Err(Error::usage(format!(
                "{} was made by a {} step; withdraw that one first (`sluice withdraw {}`), then this one",
                v.label(),
                other.as_str().replace('_', " "),
                v.label()
            )))
            }
        }
        later.push(Later {
            step,
            input: prev.clone(),
            output: v.clone(),
            main: main as u32,
        });
        prev = v;
    }
    let latest = prev;

    // The old history's row origins, kept for the versions a patch step reads.
    let mut old_origin: Vec<Origin> = (0..base.n_rows).map(Origin::Base).collect();
    old_origin = origins_through(
        &old_origin,
        target.n_rows,
        &recorded_sets(store, &target)?,
        reverted_main as u32,
        reverted.id,
    );
    let mut old_origins_at: HashMap<i64, Vec<Origin>> = HashMap::new();
    for l in &later {
        if l.step.kind != StepKind::Operation {
            old_origins_at.insert(l.step.id, old_origin.clone());
        }
        old_origin = origins_through(
            &old_origin,
            l.output.n_rows,
            &recorded_sets(store, &l.output)?,
            l.main,
            l.step.id,
        );
    }
    // Rows of the base the reverted step dropped as duplicates, by the row they duplicated.
    let mut twins: HashMap<u64, Vec<u64>> = HashMap::new();
    for d in crate::provenance::drops(store, reverted.id, base.id)? {
        if let Some(of) = d.duplicate_of {
            twins.entry(of).or_default().push(d.row_idx);
        }
    }

    let base_label = base.label();
    // The new history, computed and written to a stage of its own: published into the store
    // only when it is recorded, so a refused or failed revert leaves no trace.
    let stage = store.begin_stage("revert")?;
    let computed = (|| -> Result<Computed> {
        // The new history, computed and made durable but not recorded.
        let started_at = clock::now_rfc3339();
        let mut pendings: Vec<Pending> = Vec::new();
        let mut conflicts: Vec<Conflict> = Vec::new();
        let mut unchanged: Vec<String> = Vec::new();
        let mut applied_again: Vec<(i64, String)> = Vec::new();
        // The restored table is stored even when a later step supersedes it: it is a `revert`
        // step's version, which no recipe computes (`recompute::make_readable` computes only
        // built-in operations' versions). It names the base's objects, so it costs nothing
        // when the base is stored; a recomputable base's bytes are computed into the stage,
        // published with the rest (the next step reads them anyway).
        if !store.bytes_stored(&base)? {
            crate::recompute::make_readable(store, &base)?;
        }
        let restore = restore_step(store, &base, &latest, &reverted, &label, opts, &started_at)?;
        let mut seq = latest.seq + 1;
        let mut current = restore.version(recording::pending_id(0), seq);
        pendings.push(restore);
        let mut new_origin: Vec<Origin> = (0..base.n_rows).map(Origin::Base).collect();
        // Each version of the old history and the new one that stands for it (by its index
        // among the pendings), with the step that made the old one.
        let mut stands_for: Vec<(Version, i64, usize, Version)> =
            vec![(target.clone(), reverted.id, 0, current.clone())];

        // Later built-in steps computed ahead in one pass, not yet taken.
        let mut fused: VecDeque<apply::Computed> = VecDeque::new();
        for (li, l) in later.iter().enumerate() {
            let computed = match l.step.kind {
                StepKind::Operation => {
                    if fused.is_empty() {
                        fused = fuse_ahead(store, &later[li..], &current, opts);
                    }
                    let p = match fused.pop_front() {
                        Some(c) => apply::defer_computed(store, current.clone(), c)
                            .map_err(|e| cannot_apply_again(l, e))?,
                        None => rerun(store, l, &current, opts)?,
                    };
                    let sets = pending_sets(store, &p)?;
                    let origins = origins_through(&new_origin, p.n_rows, &sets, 0, l.step.id);
                    Some((
                        p,
                        origins,
                        format!(
                            "{} applied again",
                            l.step.operation.as_deref().unwrap_or("step")
                        ),
                    ))
                }
                _ => {
                    let old = old_origins_at.remove(&l.step.id).unwrap_or_default();
                    let mut found = Vec::new();
                    let taken_out = TakenOut {
                        step: reverted.id,
                        base: &base_label,
                        twins: &twins,
                    };
                    let patched = patch(
                        store,
                        l,
                        &current,
                        &old,
                        &new_origin,
                        &taken_out,
                        opts,
                        &mut found,
                    )?;
                    conflicts.extend(found);
                    patched
                }
            };
            let Some((p, origins, what)) = computed else {
                stands_for.push((
                    l.output.clone(),
                    l.step.id,
                    pendings.len() - 1,
                    current.clone(),
                ));
                continue;
            };
            if p.hash == current.hash {
                stands_for.push((
                    l.output.clone(),
                    l.step.id,
                    pendings.len() - 1,
                    current.clone(),
                ));
                unchanged.push(format!(
                    "{} ({}, step {}) changed nothing once the reverted step was gone",
                    l.output.label(),
                    l.step.operation.as_deref().unwrap_or(l.step.kind.as_str()),
                    l.step.id
                ));
                continue;
            }
            seq += 1;
            current = p.version(recording::pending_id(pendings.len()), seq);
            new_origin = origins;
            applied_again.push((l.step.id, what));
            pendings.push(p);
            stands_for.push((
                l.output.clone(),
                l.step.id,
                pendings.len() - 1,
                current.clone(),
            ));
        }
        settle_storage(store, &mut pendings, latest.seq + 1)?;
        let rechecks = recheck(store, &stands_for, &mut conflicts)?;
        Ok((pendings, conflicts, unchanged, applied_again, rechecks))
    })();
    let (mut pendings, conflicts, unchanged, applied_again, rechecks) = match computed {
        Ok(c) if c.1.is_empty() || opts.force => {
            store
                .objects
                .publish_stage()
                .map_err(|e| Error::io(&stage, e))?;
            c
        }
        Ok((_, conflicts, _, _, _)) => {
            store.objects.discard_stage();
            return Ok(RevertOutcome::Refused {
                reverted: label,
                conflicts,
            });
        }
        Err(e) => {
            store.objects.discard_stage();
            return Err(e);
        }
    };
    if !conflicts.is_empty() {
        if let Some(first) = pendings.first_mut() {
            if let Some(map) = first.params.as_object_mut() {
                map.insert("forced_conflicts".into(), json!(conflicts));
            }
        }
    }

    let downstream: Vec<String> = crate::graph::impact(store, &label)?
        .current
        .into_iter()
        .filter(|l| l.split(':').next() != Some(target.dataset.as_str()))
        .collect();

    // Everything in one transaction, with one audit entry.
    let ended_at = clock::now_rfc3339();
    let dataset = target.dataset.clone();
    let latest_id = latest.id;
    let reverted_id = reverted.id;
    let recorded = store.write(|tx| {
        if tx.latest_version_id(&dataset)? != Some(latest_id) {
            return Err(Error::usage(format!(
                "{dataset} got a new version while the revert was computed; run the revert again"
            )));
        }
        let mut ids: Vec<i64> = Vec::with_capacity(pendings.len());
        let mut out = Vec::with_capacity(pendings.len());
        for (i, p) in pendings.iter().enumerate() {
            let real = |id: i64| -> Result<i64> {
                if id >= 0 {
                    return Ok(id);
                }
                ids.get((-id - 1) as usize)
                    .copied()
                    .ok_or_else(|| db("a pending version was used before it was recorded".into()))
            };
            let (vid, sid, seq) = recording::insert_pending(tx, p, &real)?;
            if i == 0 {
                tx.set_reverts_step(sid, reverted_id)?;
            }
            for gate in [false, true] {
                let rows: Vec<(String, bool, u64, String)> = rechecks
                    .iter()
                    .filter(|(at, r)| *at == i && r.gate == gate)
                    .map(|(_, r)| {
                        (
                            crate::model::canonical_json(&r.rule),
                            r.passed,
                            r.n_failing,
                            crate::model::canonical_json(&json!(r.first_failing)),
                        )
                    })
                    .collect();
                if !rows.is_empty() {
                    tx.insert_check_results(vid, &opts.agent, &rows, gate, &ended_at)?;
                }
            }
            let input_hash = match p.inputs.first() {
                Some((id, _)) if *id < 0 => {
                    pendings.get((-id - 1) as usize).map(|q| q.hash.clone())
                }
                _ => None,
            }
            .unwrap_or_else(|| base.hash.clone());
            ids.push(vid);
            let label_now = format!("{dataset}@{seq}");
            // One audit entry per version, all in this transaction: the first is the revert,
            // each later one says which step it applies again and for which revert.
            let (action, details) = match (i, p.kind) {
                (0, _) => (
                    "revert",
                    json!({
                        "version": p.hash,
                        "step": sid,
                        "row_index": p.row_index,
                        "provenance": p.provenance.as_ref().map(|(h, _)| h),
                        "reverts_step": reverted_id,
                        "reverted": label,
                        "base": base.hash,
                        "replaced_latest": latest.hash,
                        "forced_conflicts": conflicts.len(),
                        "reason": opts.reason,
                    }),
                ),
                (_, StepKind::Operation) => ("apply", {
                    let mut d = crate::recording::apply_entry(p, &input_hash, sid);
                    d["row_index"] = json!(p.row_index);
                    d["repeats_step"] = json!(p.repeats_step);
                    d["after_revert_of"] = json!(reverted_id);
                    d
                }),
                (_, kind) => (
                    kind.as_str(),
                    json!({
                        "from": input_hash,
                        "version": p.hash,
                        "step": sid,
                        "row_index": p.row_index,
                        "provenance": p.provenance.as_ref().map(|(h, _)| h),
                        "reapplies_step": p.repeats_step,
                        "as": "cell_patches",
                        "after_revert_of": reverted_id,
                    }),
                ),
            };
            tx.audit(&opts.agent, action, &label_now, &details, &ended_at)?;
            out.push(RevertedLink {
                step: sid,
                version: format!("{dataset}:v{seq}"),
                hash: p.hash.clone(),
                rows: p.n_rows,
                repeats_step: p.repeats_step,
                storage: p.storage,
                what: match i {
                    0 => format!(
                        "the table of {} again, without step {reverted_id}",
                        base.label()
                    ),
                    _ => applied_again
                        .get(i - 1)
                        .map(|(_, w)| w.clone())
                        .unwrap_or_default(),
                },
            });
        }
        let last = out.last().cloned();
        Ok((out, last))
    })?;
    let (links, last) = recorded;
    let last = last.ok_or_else(|| db("the revert recorded no version".into()))?;
    let links_for_checks = links.clone();
    Ok(RevertOutcome::Recorded(RevertReport {
        reverted: label,
        reverted_step: reverted.id,
        base: base.label(),
        replaced_latest: latest.label(),
        latest: last.version.clone(),
        hash: last.hash.clone(),
        recorded: links,
        unchanged,
        forced: conflicts,
        checks: rechecks
            .into_iter()
            .map(|(at, mut r)| {
                if let Some(l) = links_for_checks.get(at) {
                    r.version = l.version.clone();
                }
                r
            })
            .collect(),
        untouched_downstream: downstream,
    }))
}

/// The revert step itself: `base`'s table again, as the next version of its dataset.
fn restore_step(
    store: &Store,
    base: &Version,
    latest: &Version,
    reverted: &Step,
    label: &str,
    opts: &RevertOptions,
    started_at: &str,
) -> Result<Pending> {
    let runs = [RowRun {
        out_start: 0,
        in_start: 0,
        len: base.n_rows,
    }];
    let sets: Vec<(u32, &[RowRun])> = if base.n_rows > 0 {
        vec![(0, &runs[..])]
    } else {
        Vec::new()
    };
    let provenance = crate::provenance::write(
        store,
        &base.header,
        &ChangeLog::new(base.header.len()),
        &DropLog::default(),
        &sets,
    )?;
    let row_index_bytes = store.lineage.object_size(&base.row_index)?.ok_or_else(|| {
        db(format!(
            "the row index of {} is not recorded; run `sluice verify`",
            base.label()
        ))
    })?;
    Ok(Pending {
        kind: StepKind::Revert,
        operation: None,
        params: json!({
            "reverts_step": reverted.id,
            "reverted": label,
            "reverted_operation": reverted.operation,
            "base": base.label(),
            "replaced_latest": latest.label(),
        }),
        reason: opts.reason.clone(),
        agent: opts.agent.clone(),
        started_at: started_at.to_string(),
        ended_at: clock::now_rfc3339(),
        rows_in: latest.n_rows,
        lineage: LineageKind::Exact,
        code: None,
        repeats_step: None,
        provenance,
        inputs: vec![(base.id, "input".into()), (latest.id, "latest".into())],
        dataset: base.dataset.clone(),
        key: None,
        hash: base.hash.clone(),
        n_bytes: base.n_bytes,
        row_index: base.row_index.clone(),
        row_index_bytes,
        n_rows: base.n_rows,
        header: base.header.clone(),
        null_tokens: base.null_tokens.clone(),
        profiles: store.lineage.profiles(base.id)?,
        sources: Vec::new(),
        notes: Vec::new(),
        n_changed: 0,
        changed_by_column: Vec::new(),
        n_dropped: 0,
        storage: crate::model::Storage::Stored,
    })
}

/// A later built-in step run again on `current` with its recorded parameters.
/// The options that apply a later built-in step again on `current`'s dataset.
fn later_options(
    store: &Store,
    l: &Later,
    current: &Version,
    opts: &RevertOptions,
) -> Result<ApplyOptions> {
    let op: Operation = serde_json::from_value(l.step.params.clone()).map_err(|e| {
        db(format!(
            "step {} holds parameters this build cannot read ({e})",
            l.step.id
        ))
    })?;
    let inputs = store.lineage.step_input_versions(l.step.id)?;
    let op = match inputs
        .iter()
        .enumerate()
        .find(|(i, (role, _))| *i as u32 != l.main && role != "input")
    {
        Some((_, (_, other))) => crate::plan::with_other_input(&op, other.label()),
        None => op,
    };
    Ok(ApplyOptions {
        op,
        reason: l
            .step
            .reason
            .clone()
            .unwrap_or_else(|| format!("step {} applied again", l.step.id)),
        output_dataset: Some(current.dataset.clone()),
        agent: opts.agent.clone(),
        map_table_file: None,
        replay: None,
        repeats: Some(l.step.id),
    })
}

fn cannot_apply_again(l: &Later, e: Error) -> Error {
    Error::from(ErrorKind::Data(format!(
        "step {} ({} that made {}) cannot be applied again once the reverted step is gone: {e}; nothing was recorded",
        l.step.id,
        l.step.operation.as_deref().unwrap_or("step"),
        l.output.label()
    )))
}

/// Applies a later built-in step again on `current` (a pending version or a stored one).
fn rerun(store: &mut Store, l: &Later, current: &Version, opts: &RevertOptions) -> Result<Pending> {
    let aopts = later_options(store, l, current, opts)?;
    apply::compute(store, current.clone(), &aopts).map_err(|e| cannot_apply_again(l, e))
}

/// The stretch of later built-in steps from the first of `later` that can run in one pass
/// (`apply::fusable`), computed on `current`; empty when fewer than two can, or when the pass
/// cannot finish (the steps are then applied one at a time, which fail where and as they
/// would). As in a run, an output a later step of the stretch supersedes is only hashed
/// (`recompute::written_in_pass`), except the one standing for a version an inspection was
/// recorded on (the inspection is run on it again); the stretch's last output is written, so
/// what the next step reads can be read.
fn fuse_ahead(
    store: &Store,
    later: &[Later],
    current: &Version,
    opts: &RevertOptions,
) -> VecDeque<apply::Computed> {
    let mut aopts = Vec::new();
    for (k, l) in later.iter().enumerate() {
        if l.step.kind != StepKind::Operation || l.main != 0 {
            break;
        }
        let Ok(o) = later_options(store, l, current, opts) else {
            break;
        };
        if !apply::fusable(&o.op, k == 0) {
            break;
        }
        aopts.push(o);
    }
    if aopts.len() < 2 {
        return VecDeque::new();
    }
    let outputs: Vec<&str> = aopts
        .iter()
        .map(|o| o.output_dataset.as_deref().unwrap_or(&current.dataset))
        .collect();
    let mut keep = crate::recompute::written_in_pass(&outputs);
    for (k, l) in later.iter().take(keep.len()).enumerate() {
        // A store that cannot say keeps the bytes.
        keep[k] |= !matches!(store.lineage.check_results(l.output.id), Ok(r) if r.is_empty());
    }
    apply::compute_chain(store, current, &aopts, &keep)
        .map(VecDeque::from)
        .unwrap_or_default()
}

/// The default storage policy applied to the new history before it is recorded: a version its
/// stretch only hashed stays recomputable unless the policy keeps it, that is unless it is
/// the new latest (a later step changed nothing) or people need its bytes
/// (`recompute::held_for_people`: its bytes were signed off). Such a version is recorded
/// stored when its bytes are in the store: the latest's always are, since the stretch's last
/// output, which is written, has the same bytes. `first_seq` is the sequence number of the
/// first pending version.
fn settle_storage(store: &Store, pendings: &mut [Pending], first_seq: u64) -> Result<()> {
    let last = pendings.len().saturating_sub(1);
    for (i, p) in pendings.iter_mut().enumerate() {
        if p.storage != Storage::Recomputable {
            continue;
        }
        let v = p.version(recording::pending_id(i), first_seq + i as u64);
        if i != last && crate::recompute::held_for_people(store, &v)?.is_none() {
            continue;
        }
        if crate::recompute::readable(store, &v) {
            p.storage = Storage::Stored;
        } else if i == last {
            return Err(ErrorKind::Internal(format!(
                "the bytes of {}, the new latest version, were not written",
                v.label()
            ))
            .into());
        }
    }
    Ok(())
}

/// One conflict a patch met.
fn conflict(
    l: &Later,
    kind: &str,
    row: Option<u64>,
    column: Option<&str>,
    detail: String,
    when_forced: &str,
) -> Conflict {
    Conflict {
        step: l.step.id,
        version: l.output.label(),
        kind: kind.into(),
        row: row.map(|r| r + 1),
        column: column.map(str::to_string),
        detail,
        when_forced: when_forced.into(),
    }
}

const LEFT_OUT: &str = "this change is left out";

/// The step a revert takes out, as a patch needs it.
struct TakenOut<'a> {
    step: i64,
    /// The version before it (`name@seq`).
    base: &'a str,
    /// Rows of the base it dropped as duplicates, by the row they duplicated.
    twins: &'a HashMap<u64, Vec<u64>>,
}

/// A later hand edit (or outside command) re-applied on `current` as cell patches matched
/// through the row lineage. `None` when the step is left out whole (forced).
#[allow(clippy::too_many_arguments)]
fn patch(
    store: &Store,
    l: &Later,
    current: &Version,
    old_origin: &[Origin],
    new_origin: &[Origin],
    taken_out: &TakenOut<'_>,
    opts: &RevertOptions,
    conflicts: &mut Vec<Conflict>,
) -> Result<Option<(Pending, Vec<Origin>, String)>> {
    let what = l.step.kind.as_str().replace('_', " ");
    let reverted = taken_out.step;
    let twins = taken_out.twins;
    if l.step.kind == StepKind::Command {
        let command = l
            .step
            .code
            .as_ref()
            .and_then(|c| c.get("command"))
            .and_then(|c| c.as_array())
            .map(|a| {
                a.iter()
                    .filter_map(|x| x.as_str())
                    .collect::<Vec<_>>()
                    .join(" ")
            })
            .unwrap_or_default();
        conflicts.push(conflict(
            l,
            "outside_command",
            None,
            None,
            format!(
                "{} was made by the outside command `{command}`, which a revert does not run again",
                l.output.label()
            ),
            "its recorded changes are re-applied as cell patches, as a hand edit's would be; the command's own logic is not run on the new history",
        ));
    }
    if l.output.header != l.input.header {
        conflicts.push(conflict(
            l,
            "columns_changed",
            None,
            None,
            format!(
                "the {what} that made {} changed the columns ({} became {}), which cell patches cannot carry",
                l.output.label(),
                l.input.header.join(","),
                l.output.header.join(",")
            ),
            "the whole step is left out",
        ));
        return Ok(None);
    }
    let sets = recorded_sets(store, &l.output)?;
    let mut runs: Vec<RowRun> = sets
        .iter()
        .filter(|(p, _)| *p == l.main)
        .flat_map(|(_, r)| r.iter().copied())
        .collect();
    runs.sort_by_key(|r| r.out_start);
    let changed = crate::provenance::cell_changes_rows(store, &l.output)?;
    let dropped = crate::provenance::drops(store, l.step.id, l.input.id)?;

    let where_new: HashMap<Origin, u64> = new_origin
        .iter()
        .enumerate()
        .map(|(i, o)| (*o, i as u64))
        .collect();
    let column_of = |name: &str| current.header.iter().position(|h| h == name);

    // Rows of `current` to drop, and patches by (row of current, column).
    let mut drop_rows: HashMap<u64, u64> = HashMap::new(); // current row -> old input row
    for d in &dropped {
        let Some(origin) = old_origin.get(d.row_idx as usize) else {
            continue;
        };
        match where_new.get(origin) {
            Some(&w) => {
                drop_rows.insert(w, d.row_idx);
            }
            None if origin.step() == Some(reverted) => conflicts.push(conflict(
                l,
                "row_from_reverted_step",
                Some(d.row_idx),
                None,
                format!(
                    "the {what} removed data row {} of {}, a row that exists only because of the reverted step",
                    d.row_idx + 1,
                    l.input.label()
                ),
                LEFT_OUT,
            )),
            // Already gone from the new history: removing it again changes nothing.
            None => {}
        }
    }
    // Output rows of the step that were added, not carried.
    let mut carried = vec![false; l.output.n_rows as usize];
    for r in &runs {
        for k in 0..r.len {
            if let Some(c) = carried.get_mut((r.out_start + k) as usize) {
                *c = true;
            }
        }
    }
    // (row of the recorded output, column) -> where it goes in the new history.
    let mut wanted: Vec<(u64, String, u64, usize)> = Vec::new(); // (out row, column, current row, current col)
    for (name, rows) in &changed {
        for &o in rows {
            if !carried.get(o as usize).copied().unwrap_or(false) {
                continue; // an added row: taken whole below
            }
            let Some(i) = crate::model::input_of(&runs, o) else {
                continue;
            };
            let Some(origin) = old_origin.get(i as usize) else {
                continue;
            };
            let Some(c) = column_of(name) else {
                conflicts.push(conflict(
                    l,
                    "column_from_reverted_step",
                    Some(o),
                    Some(name),
                    format!(
                        "the {what} changed column {name} of data row {} of {}, a column that exists only because of the reverted step",
                        o + 1,
                        l.output.label()
                    ),
                    LEFT_OUT,
                ));
                continue;
            };
            match where_new.get(origin) {
                Some(&w) => {
                    if let Origin::Base(b) = origin {
                        if let Some(ts) = twins.get(b) {
                            conflicts.push(conflict(
                                l,
                                "duplicate_returns_unedited",
                                Some(o),
                                Some(name),
                                format!(
                                    "the {what} changed {name} of data row {} of {}; the reverted step had dropped {} of {} as {} of that row, which come{} back without the change",
                                    o + 1,
                                    l.output.label(),
                                    ts.iter().map(|t| format!("data row {}", t + 1)).collect::<Vec<_>>().join(", "),
                                    taken_out.base,
                                    if ts.len() == 1 { "a duplicate" } else { "duplicates" },
                                    if ts.len() == 1 { "s" } else { "" }
                                ),
                                "the change is applied to the row it was made on; the returning duplicate keeps its values",
                            ));
                        }
                    }
                    wanted.push((o, name.clone(), w, c));
                }
                None if origin.step() == Some(reverted) => conflicts.push(conflict(
                    l,
                    "row_from_reverted_step",
                    Some(o),
                    Some(name),
                    format!(
                        "the {what} changed {name} of data row {} of {}, a row that exists only because of the reverted step",
                        o + 1,
                        l.output.label()
                    ),
                    LEFT_OUT,
                )),
                None => conflicts.push(conflict(
                    l,
                    "row_dropped_after_revert",
                    Some(o),
                    Some(name),
                    format!(
                        "the {what} changed {name} of data row {} of {}, but without the reverted step a step before it drops that row",
                        o + 1,
                        l.output.label()
                    ),
                    LEFT_OUT,
                )),
            }
        }
    }
    // Added rows go after the row of the new history that carries the output row before them.
    let mut anchor: Option<u64> = None; // None: at the top
    let mut added: Vec<(Option<u64>, u64)> = Vec::new(); // (after current row, out row)
    for o in 0..l.output.n_rows {
        if carried[o as usize] {
            let origin = crate::model::input_of(&runs, o).and_then(|i| old_origin.get(i as usize));
            if let Some(&w) = origin.and_then(|g| where_new.get(g)) {
                anchor = Some(w);
            }
        } else {
            added.push((anchor, o));
        }
    }

    // The values the step wrote, read from its output in one pass: its changed cells, put
    // straight where they go in the new history, and its added rows.
    let mut wanted_at: HashMap<u64, Vec<(usize, u64, usize)>> = HashMap::new(); // out row -> (its column, current row, current column)
    for (o, name, w, c) in &wanted {
        if let Some(oc) = l.output.header.iter().position(|h| h == name) {
            wanted_at.entry(*o).or_default().push((oc, *w, *c));
        }
    }
    let need_rows: HashSet<u64> = added.iter().map(|a| a.1).collect();
    let out_col: Vec<Option<usize>> = current
        .header
        .iter()
        .map(|h| l.output.header.iter().position(|x| x == h))
        .collect();
    let mut patches: HashMap<(u64, usize), Vec<u8>> = HashMap::new();
    let mut row_values: HashMap<u64, Vec<Vec<u8>>> = HashMap::new();
    // How often each row of the step's own version occurs there.
    let mut own_copies: HashMap<u64, u64> = HashMap::new();
    store.objects.each_row(&l.output, |row, rec| {
        let fields: Vec<&[u8]> = (0..rec.len()).map(|c| rec.field(c)).collect();
        *own_copies.entry(row_hash(&fields)).or_default() += 1;
        for &(oc, w, c) in wanted_at.get(&row).into_iter().flatten() {
            patches.insert((w, c), rec.field(oc).to_vec());
        }
        if need_rows.contains(&row) {
            row_values.insert(
                row,
                out_col
                    .iter()
                    .map(|c| c.map_or_else(Vec::new, |c| rec.field(c).to_vec()))
                    .collect(),
            );
        }
        Ok(())
    })?;
    let mut added_after: HashMap<Option<u64>, Vec<u64>> = HashMap::new();
    for (a, o) in &added {
        added_after.entry(*a).or_default().push(*o);
    }

    // The patched table, written through the canonical writer.
    let started_at = clock::now_rfc3339();
    let store_io = |e: std::io::Error| Error::io(&store.dir().join("tmp"), e);
    let mut writer = CanonicalWriter::new(&store.objects, &current.header, &current.null_tokens)
        .map_err(store_io)?;
    let mut changes = ChangeLog::new(current.header.len());
    let mut drops = DropLog::default();
    let mut new_runs = crate::model::RowMap::default();
    let mut origins: Vec<Origin> = Vec::new();
    let mut out_row = 0u64;
    let reason = format!(
        "removed by the {what} of step {} (re-applied after a revert)",
        l.step.id
    );
    // Every written row's hash, and the rows the patch wrote values into (added or changed):
    // one of those that now appears twice is a conflict.
    let mut row_hashes: Vec<u64> = Vec::new();
    let mut touched: Vec<u64> = Vec::new();
    let emit_added = |after: Option<u64>,
                      writer: &mut CanonicalWriter,
                      out_row: &mut u64,
                      origins: &mut Vec<Origin>,
                      row_hashes: &mut Vec<u64>,
                      touched: &mut Vec<u64>|
     -> Result<()> {
        for o in added_after.get(&after).into_iter().flatten() {
            if let Some(vals) = row_values.get(o) {
                let fields: Vec<&[u8]> = vals.iter().map(Vec::as_slice).collect();
                row_hashes.push(row_hash(&fields));
                touched.push(*out_row);
                writer.write_row(&fields).map_err(store_io)?;
                origins.push(Origin::Added {
                    step: l.step.id,
                    row: *o,
                });
                *out_row += 1;
            }
        }
        Ok(())
    };
    emit_added(
        None,
        &mut writer,
        &mut out_row,
        &mut origins,
        &mut row_hashes,
        &mut touched,
    )?;
    store.objects.each_row(current, |row, rec| {
        if drop_rows.contains_key(&row) {
            drops.push(row, &reason, None);
        } else {
            new_runs.push(out_row, row);
            let mut patched = false;
            let fields: Vec<&[u8]> = (0..rec.len())
                .map(|c| match patches.get(&(row, c)) {
                    Some(v) => {
                        if v.as_slice() != rec.field(c) {
                            changes.push(c, out_row);
                            patched = true;
                        }
                        v.as_slice()
                    }
                    None => rec.field(c),
                })
                .collect();
            row_hashes.push(row_hash(&fields));
            if patched {
                touched.push(out_row);
            }
            writer.write_row(&fields).map_err(store_io)?;
            origins.push(
                new_origin
                    .get(row as usize)
                    .copied()
                    .unwrap_or(Origin::Added {
                        step: l.step.id,
                        row,
                    }),
            );
            out_row += 1;
        }
        emit_added(
            Some(row),
            &mut writer,
            &mut out_row,
            &mut origins,
            &mut row_hashes,
            &mut touched,
        )
    })?;
    let written = writer.finish().map_err(store_io)?;
    let mut seen: HashMap<u64, Vec<u64>> = HashMap::new();
    for (r, h) in row_hashes.iter().enumerate() {
        seen.entry(*h).or_default().push(r as u64);
    }
    let mut reported: HashSet<u64> = HashSet::new();
    for &t in &touched {
        let Some((h, same)) = row_hashes
            .get(t as usize)
            .and_then(|h| seen.get(h).map(|s| (h, s)))
        else {
            continue;
        };
        let own = own_copies.get(h).copied().unwrap_or(0);
        if same.len() > 1 && same.len() as u64 > own && reported.insert(*h) {
            let others: Vec<String> = same
                .iter()
                .filter(|&&r| r != t)
                .take(5)
                .map(|r| (r + 1).to_string())
                .collect();
            conflicts.push(conflict(
                l,
                "edited_row_twice",
                None,
                None,
                format!(
                    "the {what} of step {} re-applied makes data row {} of the new {} equal to data row{} {} (the same row twice, which the step's own version did not have)",
                    l.step.id,
                    t + 1,
                    current.dataset,
                    if others.len() == 1 { "" } else { "s" },
                    others.join(", ")
                ),
                "both rows are kept; remove the copy with a later step",
            ));
        }
    }
    let n_changed = changes.len();
    let prov = Provenance {
        runs: new_runs.into_runs(),
        changes,
        drops,
        notes: Vec::new(),
        sources: Vec::new(),
        table: None,
        other: None,
    };
    let params = json!({
        "reapplies_step": l.step.id,
        "as": "cell_patches",
        "from": l.output.label(),
    });
    let p = recording::persist(
        store,
        current,
        &current.dataset,
        StepMeta {
            kind: l.step.kind,
            operation: None,
            params,
            reason: l.step.reason.as_deref().unwrap_or(&opts.reason),
            agent: &opts.agent,
            started_at: &started_at,
            // A hand edit's or command's lineage was inferred by a diff; patching it onto the
            // new history does not make it more certain than it was.
            lineage: l.step.lineage,
            repeats_step: Some(l.step.id),
        },
        written,
        &current.header,
        prov,
        None,
        Vec::new(),
    )?;
    let n_added = added.len();
    let n_dropped = p.n_dropped;
    Ok(Some((
        p,
        origins,
        format!(
            "the {what} of step {} re-applied: {n_changed} cells, {n_dropped} rows removed, {n_added} rows added",
            l.step.id
        ),
    )))
}

/// Runs again, on the new version standing for each version of the old history, the checks
/// recorded on that version (each rule once per version; a gate if it ever was one). A gate
/// that fails again is a conflict.
fn recheck(
    store: &Store,
    stands_for: &[(Version, i64, usize, Version)],
    conflicts: &mut Vec<Conflict>,
) -> Result<Vec<(usize, Recheck)>> {
    let mut out = Vec::new();
    for (old, step, at, new) in stands_for {
        let mut rules: Vec<(String, bool)> = Vec::new();
        for (rule, _, _, _, _, gate) in store.lineage.check_results(old.id)? {
            match rules.iter_mut().find(|r| r.0 == rule) {
                Some(r) => r.1 |= gate,
                None => rules.push((rule, gate)),
            }
        }
        for (text, gate) in rules {
            let rule_value: serde_json::Value =
                serde_json::from_str(&text).unwrap_or(serde_json::Value::Null);
            // Stored rules may be of the old form (an older build's store): read both.
            let Some(rule) = crate::checks::Rule::from_stored(&rule_value) else {
                return Err(db(format!(
                    "an inspection recorded on {} holds a rule this build cannot read: {text}",
                    old.label()
                )));
            };
            let text = rule.describe();
            let result = match crate::checks::evaluate(store, new, std::slice::from_ref(&rule)) {
                Ok(mut r) => r.pop(),
                // A column the rule names is gone with the reverted step: a gate that cannot
                // run cannot pass; a plain check is left out.
                Err(_) if !gate => continue,
                Err(e) => {
                    conflicts.push(Conflict {
                        step: *step,
                        version: old.label(),
                        kind: "hold_point_fails".into(),
                        row: None,
                        column: None,
                        detail: format!(
                            "the inspection {text}, a hold point on {}, cannot run on the new history: {e}",
                            old.label()
                        ),
                        when_forced: "the inspection is left out".into(),
                    });
                    continue;
                }
            };
            let Some(r) = result else { continue };
            if gate && !r.passed {
                conflicts.push(Conflict {
                    step: *step,
                    version: old.label(),
                    kind: "hold_point_fails".into(),
                    row: r.first_failing.first().copied(),
                    column: None,
                    detail: format!(
                        "the inspection {text}, a hold point on {}, fails on the new history: {} failing row{} (first: {})",
                        old.label(),
                        r.n_failing,
                        if r.n_failing == 1 { "" } else { "s" },
                        r.first_failing
                            .iter()
                            .map(|x| x.to_string())
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                    when_forced: "the new version is recorded with the failing result".into(),
                });
            }
            out.push((
                *at,
                Recheck {
                    original: old.label(),
                    version: new.label(),
                    rule: rule_value,
                    gate,
                    passed: r.passed,
                    n_failing: r.n_failing,
                    first_failing: r.first_failing,
                },
            ));
        }
    }
    Ok(out)
}

/// A hash of a row's fields (length-prefixed, so different splits differ).
fn row_hash(fields: &[&[u8]]) -> u64 {
    let mut h = xxhash_rust::xxh3::Xxh3::new();
    for f in fields {
        h.update(&(f.len() as u64).to_le_bytes());
        h.update(f);
    }
    h.digest()
}
