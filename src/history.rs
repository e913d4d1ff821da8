//! Looking at history: the audit trail of steps in time order, oldest first, with filters
//! (`timeline`), and one version in full (`about`). Read-only queries that return plain data;
//! rendering is the command line's job.

use serde::Serialize;

use crate::error::{ErrorKind, Result};
use crate::model::{Agent, ColumnProfile, Step, StepKind, Version};
use crate::refs;
use crate::store::Store;

/// One line of `sluice timeline`: a step, what it is called on screen, and the versions it made.
#[derive(Debug, Clone, Serialize)]
pub struct TimelineEntry {
    /// The store-wide step number (the number every screen calls the step by).
    pub number: i64,
    /// The action as the command that records it is named: receive, clean, capture,
    /// hand edit, withdraw, reproduce.
    pub action: String,
    /// Who acted, read back into name and e-mail address.
    pub by: Agent,
    pub step: Step,
    pub produced: Vec<Version>,
}

/// Which steps `timeline` lists.
#[derive(Debug, Clone, Default)]
pub struct TimelineFilter {
    /// Only steps that read or made versions of this dataset.
    pub dataset: Option<String>,
    /// Only steps by this person: their name or e-mail address, ignoring case.
    pub by: Option<String>,
    /// Only steps started at or after this time: `YYYY-MM-DD` or `YYYY-MM-DDTHH:MM:SSZ`.
    pub since: Option<String>,
    /// Only steps started at or before this time; a date includes its whole day.
    pub until: Option<String>,
    /// Only the latest N steps (still oldest first).
    pub limit: Option<usize>,
}

/// The action name of a step kind, as the command that records it is named.
pub fn action_of(kind: StepKind) -> &'static str {
    match kind {
        StepKind::Ingest => "receive",
        StepKind::Operation => "clean",
        StepKind::Command => "capture",
        StepKind::HandEdit => "hand edit",
        StepKind::Revert => "withdraw",
        StepKind::Replay => "reproduce",
    }
}

/// Checks a `--since`/`--until` value: an ISO 8601 calendar date or a UTC time to the second.
fn time_bound(text: &str, option: &str) -> Result<String> {
    let t = text.trim();
    let b = t.as_bytes();
    let date_ok = b.len() >= 10 && crate::clock::is_iso_date(&b[..10]);
    let ok = date_ok
        && (b.len() == 10
            || (b.len() == 20
                && b[10] == b'T'
                && b[19] == b'Z'
                && [13, 16].iter().all(|&i| b[i] == b':')
                && [11, 12, 14, 15, 17, 18]
                    .iter()
                    .all(|&i| b[i].is_ascii_digit())));
    if !ok {
        return Err(ErrorKind::Usage(format!(
            "{option} {text}: expected an ISO 8601 date (2026-10-01) or a UTC time (2026-10-01T09:00:00Z)"
        ))
        .into());
    }
    // A time compares to the second: the trailing `Z` is left out.
    Ok(t.get(..19).unwrap_or(t).to_string())
}

/// The steps `filter` selects, oldest first, each with the versions it made.
pub fn timeline(store: &Store, filter: &TimelineFilter) -> Result<Vec<TimelineEntry>> {
    if let Some(name) = &filter.dataset {
        if store.lineage.dataset(name)?.is_none() {
            // Reuse the reference resolver's message, which lists the datasets.
            refs::resolve(&store.lineage, name)?;
        }
    }
    let since = filter
        .since
        .as_deref()
        .map(|t| time_bound(t, "--since"))
        .transpose()?;
    let until = filter
        .until
        .as_deref()
        .map(|t| time_bound(t, "--until"))
        .transpose()?;
    let by = filter.by.as_deref().map(|b| b.trim().to_lowercase());
    let mut steps = store.lineage.steps(filter.dataset.as_deref())?;
    steps.reverse();
    let mut out = Vec::with_capacity(steps.len());
    for step in steps {
        // Each bound compares as much of the time as it gives: a date its whole day, a time
        // to the second (so `--until 2026-10-01` includes that day).
        let at = step.started_at.as_str();
        let cut = |b: &str| at.get(..b.len()).unwrap_or(at).to_string();
        if since.as_deref().is_some_and(|s| cut(s).as_str() < s) {
            continue;
        }
        if until.as_deref().is_some_and(|u| cut(u).as_str() > u) {
            continue;
        }
        let agent = Agent::parse_identity(&step.agent, "store");
        if let Some(b) = &by {
            let name_matches = agent.name.to_lowercase() == *b;
            let email_matches = agent
                .email
                .as_deref()
                .is_some_and(|e| e.to_lowercase() == *b);
            if !name_matches && !email_matches {
                continue;
            }
        }
        let mut produced = Vec::new();
        for label in &step.outputs {
            produced.push(refs::resolve(&store.lineage, label)?);
        }
        out.push(TimelineEntry {
            number: step.id,
            action: action_of(step.kind).to_string(),
            by: agent,
            step,
            produced,
        });
    }
    if let Some(n) = filter.limit {
        let skip = out.len().saturating_sub(n);
        out.drain(..skip);
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
    /// Whether the version's bytes are kept, or computed from its recipe when read.
    pub storage: crate::model::Storage,
    pub profile: Vec<ColumnProfile>,
    pub step: Option<Step>,
    /// Rules checked on this version, oldest first.
    pub checks: Vec<CheckRecord>,
    /// Whether anyone signed this very version off (a sign-off whose signature verifies).
    pub signed: bool,
    /// The sign-offs over this version, oldest first, each with its signature checked.
    pub sign_offs: Vec<crate::endorse::SignOff>,
    /// Its recorded deliveries (`retrieve --deliver`), oldest first.
    pub deliveries: Vec<crate::delivery::Delivery>,
    /// The erasure orders that reached it, oldest first: what is read of it is then its
    /// erased form, never computed from its recipe again.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub erasures: Vec<crate::erasure::VersionErasure>,
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

pub fn about(store: &Store, reference: &str) -> Result<VersionDetail> {
    let version = refs::resolve(&store.lineage, reference)?;
    let profile = store.lineage.profiles(version.id)?;
    let step = store.lineage.step(version.step_id)?;
    let ds = store.lineage.dataset(&version.dataset)?;
    let latest = store.lineage.latest_version(&version.dataset)?;
    let checks = checks_of(store, version.id)?;
    let sign_offs = crate::endorse::sign_offs_of_version(store, &version, true)?;
    let deliveries = crate::delivery::of_version(store, &version)?;
    let erasures = crate::erasure::orders_reaching(store, &version)?;
    Ok(VersionDetail {
        erasures,
        deliveries,
        checks,
        signed: sign_offs
            .iter()
            .any(|s| s.status == crate::endorse::SignatureStatus::Verified),
        sign_offs,
        is_latest: latest.is_some_and(|l| l.id == version.id),
        storage: version.storage,
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
            crate::Error::from(ErrorKind::Inconsistent(format!(
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
