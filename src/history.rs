//! Looking at history: the steps of a store or of one dataset, newest first (`log`), and one
//! version in full (`show`). Read-only queries that return plain data; rendering is the command
//! line's job.

use serde::Serialize;

use crate::error::Result;
use crate::model::{ColumnProfile, Step, Version};
use crate::refs;
use crate::store::Store;

/// One entry of `sluice log`: a step and the versions it produced.
#[derive(Debug, Clone, Serialize)]
pub struct LogEntry {
    pub step: Step,
    pub produced: Vec<Version>,
}

/// The steps touching `dataset` (all steps when `None`), newest first.
pub fn log(store: &Store, dataset: Option<&str>) -> Result<Vec<LogEntry>> {
    if let Some(name) = dataset {
        if store.lineage.dataset(name)?.is_none() {
            // Reuse the reference resolver's message, which lists the datasets.
            refs::resolve(&store.lineage, name)?;
        }
    }
    let steps = store.lineage.steps(dataset)?;
    let mut out = Vec::with_capacity(steps.len());
    for step in steps {
        let mut produced = Vec::new();
        for label in &step.outputs {
            produced.push(refs::resolve(&store.lineage, label)?);
        }
        out.push(LogEntry { step, produced });
    }
    Ok(out)
}

/// Everything about one version.
#[derive(Debug, Clone, Serialize)]
pub struct VersionDetail {
    pub version: Version,
    /// The dataset's declared key, if any.
    pub key: Option<Vec<String>>,
    pub is_latest: bool,
    pub profile: Vec<ColumnProfile>,
    pub step: Option<Step>,
    /// Rules checked on this version, oldest first.
    pub checks: Vec<CheckRecord>,
}

/// One recorded check result.
#[derive(Debug, Clone, Serialize)]
pub struct CheckRecord {
    pub rule: serde_json::Value,
    pub passed: bool,
    pub n_failing: u64,
    pub agent: String,
    pub checked_at: String,
    /// Whether the inspection ran as a plan's hold point (a failure stopped the run).
    pub hold_point: bool,
}

pub fn show(store: &Store, reference: &str) -> Result<VersionDetail> {
    let version = refs::resolve(&store.lineage, reference)?;
    let profile = store.lineage.profiles(version.id)?;
    let step = store.lineage.step(version.step_id)?;
    let ds = store.lineage.dataset(&version.dataset)?;
    let latest = store.lineage.latest_version(&version.dataset)?;
    let checks = checks_of(store, version.id)?;
    Ok(VersionDetail {
        checks,
        is_latest: latest.is_some_and(|l| l.id == version.id),
        key: ds.and_then(|d| d.key),
        version,
        profile,
        step,
    })
}

/// The rules checked on a version, oldest first.
pub fn checks_of(store: &Store, version_id: i64) -> Result<Vec<CheckRecord>> {
    Ok(store
        .lineage
        .check_results(version_id)?
        .into_iter()
        .map(
            |(rule, passed, n_failing, agent, checked_at, gate)| CheckRecord {
                // Old stores' rules (`{"rule": "not_blank", ...}`) are shown in the current form.
                rule: serde_json::from_str(&rule)
                    .map(crate::checks::stored_as_current)
                    .unwrap_or(serde_json::Value::String(rule)),
                passed,
                n_failing,
                agent,
                checked_at,
                hold_point: gate,
            },
        )
        .collect())
}

/// One step on the way to a version, with the versions it read (role and version, in the
/// step's input order) and made.
#[derive(Debug, Clone)]
pub struct StepBehind {
    pub step: Step,
    pub inputs: Vec<(String, Version)>,
    pub outputs: Vec<Version>,
}

/// Every step a version comes from (walking inputs back to intakes), in recording order, which
/// is a topological order of the lineage graph: a step reads only versions recorded before it.
/// Used by the report and the PROV export.
pub fn behind(store: &Store, version: &Version) -> Result<Vec<StepBehind>> {
    let ids = crate::plan::steps_behind(store, version)?;
    let mut out = Vec::with_capacity(ids.len());
    for id in ids {
        let step = store.lineage.step(id)?.ok_or_else(|| {
            crate::Error::from(crate::error::ErrorKind::Database(format!(
                "step {id} is missing from the database; run `sluice verify`"
            )))
        })?;
        out.push(StepBehind {
            inputs: store.lineage.step_input_versions(id)?,
            outputs: store.lineage.step_outputs(id)?,
            step,
        });
    }
    Ok(out)
}
