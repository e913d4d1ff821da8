//! Plans: a JSON list of steps that `sluice run` records one by one, and that `sluice export
//! --format plan` writes back from the history of a version. A plan names its sources (raw
//! data), binds each to a file or a stored version when it runs, and then cleans and inspects
//! in order. Every step is recorded exactly as `sluice clean` and `sluice inspect` record it; a
//! run is only a sequence of such commands, so a failure keeps the steps done before it.
//!
//! Inside a plan, a name is a dataset name: a step on a `dataset` reads the version this run
//! last produced or bound for it (or, for a name the run has not touched, the store's version
//! of that reference), and records its output as the next version of the same dataset unless
//! the step says `save_as`. A step's `clean` names an operation and its `settings` are the
//! operation's parameters; the store keeps them in its own encoding (the operation's name as
//! an `op` field beside them), which the plan never shows. The format is described field by
//! field in `schema/plan.schema.json` and README.md ("Plans"); plans and rules files of the
//! form before it are converted by [`upgrade()`].

mod upgrade;

pub use upgrade::upgrade;

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::checks::{self, CheckReport, Rule};
use crate::error::{Error, ErrorKind, Result};
use crate::intake::{self, IngestOptions, IngestOutcome};
use crate::model::{Agent, StepKind, Version};
use crate::ops::apply::{self, ApplyOptions, ApplyOutcome};
use crate::ops::Operation;
use crate::refs;
use crate::store::Store;
use crate::table::batch::RecordBatch;

/// The plan format version this build reads and writes.
pub const PLAN_FORMAT: u32 = 2;

/// A plan file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Plan {
    /// The format version; 2.
    pub sluice_plan: u32,
    /// What the plan is for, in a sentence or two.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub purpose: Option<String>,
    /// The raw data the plan starts from, taken in (or bound) before any step runs.
    #[serde(default)]
    pub sources: Vec<PlanSource>,
    /// The steps, in the order they run.
    pub steps: Vec<PlanStep>,
}

/// One source of a plan: a dataset name and where its data comes from by default.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlanSource {
    /// The dataset the data is taken in as.
    pub dataset: String,
    /// The file to take in, relative to the plan file's folder; `--input NAME=...` overrides it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub file: Option<String>,
    /// Key columns declared at intake.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub key: Option<Vec<String>>,
    /// Why the file is taken in (the reason recorded with the intake).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
    /// The field delimiter, when it is not to be detected.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delimiter: Option<String>,
    /// Whether the first line is a header (default true).
    #[serde(default = "yes", skip_serializing_if = "is_true")]
    pub header: bool,
    /// A legacy text encoding to decode from (default UTF-8).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub encoding: Option<String>,
    /// Values that count as blank.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub null_tokens: Vec<String>,
    /// For a workbook: the sheet to take in, by name or 1-based position (default: the only
    /// sheet).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sheet: Option<String>,
    /// The BLAKE3 hash of the raw version the plan was exported from. Informational: a run on
    /// other data (next quarter's export) is the point of a plan; the run says when it differs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub hash: Option<String>,
    /// For a plan exported from the history: the raw version itself (`name@seq`). Not part
    /// of the file format.
    #[serde(skip)]
    pub recorded: Option<String>,
}

fn yes() -> bool {
    true
}

fn is_true(b: &bool) -> bool {
    *b
}

/// One step of a plan: a cleaning (`clean` with its `settings`) or an inspection (`inspect`
/// with its rules), never both.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "StepText", into = "StepText")]
pub struct PlanStep {
    /// The dataset (or any version reference) the step works on.
    pub dataset: String,
    /// A built-in operation with its parameters, as `sluice clean` records them.
    pub clean: Option<Operation>,
    /// Rules to inspect the version against, as in a rules file.
    pub inspect: Option<Vec<Rule>>,
    /// For an inspection: stop the run when a rule fails.
    pub hold_point: bool,
    /// The reason recorded with the step (required for a cleaning).
    pub reason: Option<String>,
    /// Record the output as a version of this dataset instead of `dataset`'s.
    pub save_as: Option<String>,
    /// For a plan exported from the history: the recorded step this one is. A run records it
    /// as the step each new step repeats. Not part of the file format.
    pub repeats: Option<i64>,
}

/// A step as written in a plan file.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct StepText {
    dataset: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    clean: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    settings: Option<serde_json::Map<String, Value>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    save_as: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    inspect: Option<Vec<Rule>>,
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    hold_point: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    reason: Option<String>,
}

/// The names `clean` takes, in the order README.md lists them.
pub const OPERATION_NAMES: &[&str] = &[
    "trim",
    "case",
    "replace",
    "map",
    "lookup",
    "fill",
    "number",
    "date",
    "split",
    "combine",
    "extract",
    "rename",
    "select",
    "keep",
    "drop",
    "dedupe",
    "sort",
    "append",
    "summarize",
];

/// An operation from a plan's `clean` and `settings`: the store's encoding of it is the
/// settings with the operation's name as `op`.
pub fn operation_from(
    clean: &str,
    settings: Option<serde_json::Map<String, Value>>,
) -> std::result::Result<Operation, String> {
    if !OPERATION_NAMES.contains(&clean) {
        return Err(format!(
            "\"clean\": \"{clean}\" is not an operation; the operations are: {}",
            OPERATION_NAMES.join(", ")
        ));
    }
    let mut m = settings.unwrap_or_default();
    if m.contains_key("op") {
        return Err("\"settings\" takes the operation's settings; name the operation in \"clean\", not as \"op\"".into());
    }
    m.insert("op".into(), Value::String(clean.into()));
    serde_json::from_value(Value::Object(m))
        .map_err(|e| format!("the settings of \"{clean}\": {e}"))
}

/// A plan's `clean` and `settings` for an operation: its name and every parameter but `op`
/// (none: no settings).
pub fn clean_and_settings(op: &Operation) -> (String, Option<serde_json::Map<String, Value>>) {
    let mut m = match op.params() {
        Value::Object(m) => m,
        _ => serde_json::Map::new(),
    };
    m.remove("op");
    (op.name().to_string(), (!m.is_empty()).then_some(m))
}

impl TryFrom<StepText> for PlanStep {
    type Error = String;

    fn try_from(t: StepText) -> std::result::Result<Self, String> {
        let clean = match t.clean {
            Some(c) => Some(operation_from(&c, t.settings)?),
            None if t.settings.is_some() => {
                return Err(
                    "\"settings\" belongs to a \"clean\" step; name the operation in \"clean\""
                        .into(),
                )
            }
            None => None,
        };
        Ok(PlanStep {
            dataset: t.dataset,
            clean,
            inspect: t.inspect,
            hold_point: t.hold_point,
            reason: t.reason,
            save_as: t.save_as,
            repeats: None,
        })
    }
}

impl From<PlanStep> for StepText {
    fn from(s: PlanStep) -> Self {
        let (clean, settings) = match &s.clean {
            Some(op) => {
                let (c, m) = clean_and_settings(op);
                (Some(c), m)
            }
            None => (None, None),
        };
        StepText {
            dataset: s.dataset,
            clean,
            settings,
            save_as: s.save_as,
            inspect: s.inspect,
            hold_point: s.hold_point,
            reason: s.reason,
        }
    }
}

impl PlanStep {
    /// A short description for messages: "number on quillby_orders".
    pub fn describe(&self) -> String {
        match (&self.clean, &self.inspect) {
            (Some(op), _) => format!("{} on {}", op.name(), self.dataset),
            (None, _) if self.hold_point => {
                format!("inspection at a hold point on {}", self.dataset)
            }
            _ => format!("inspection of {}", self.dataset),
        }
    }
}

/// The most steps a plan may have: 10,000, far past any written by hand or exported from a
/// history, so that a plan cannot make a run of unbounded length.
pub const MAX_PLAN_STEPS: usize = 10_000;

/// The largest plan text read: 16 MiB (every step of a plan is parsed before the first runs).
pub const MAX_PLAN_BYTES: usize = 16 << 20;

/// Reads a plan's text; errors name the line and column, or the step. A plan of the old form
/// (`"sluice_plan": 1`) is refused with the advice to convert it.
pub fn parse(text: &str, path: &str) -> Result<Plan> {
    if text.len() > MAX_PLAN_BYTES {
        return Err(Error::usage(format!(
            "{path}: the plan is {} bytes, more than the {} MiB a plan may be; split it into several plans",
            text.len(),
            MAX_PLAN_BYTES >> 20
        )));
    }
    // A first look at the form, skipping everything else without keeping it.
    #[derive(Deserialize)]
    struct Form {
        sluice_plan: Option<Value>,
    }
    if let Ok(form) = serde_json::from_str::<Form>(text) {
        match form.sluice_plan.as_ref() {
            Some(Value::Number(n)) if n.as_u64() == Some(1) => {
                return Err(Error::usage(format!(
                    "{path}: this is a plan of the old form (\"sluice_plan\": 1, steps with \"on\" and \"apply\"); convert it with `sluice upgrade {path} -o NEW.json`"
                )))
            }
            Some(Value::Number(n)) if n.as_u64() != Some(PLAN_FORMAT.into()) => {
                return Err(Error::usage(format!(
                    "{path}: plan format {n} is not one this build reads (it reads {PLAN_FORMAT}); use a newer sluice"
                )))
            }
            _ => {}
        }
    }
    let plan: Plan = serde_json::from_str(text).map_err(|e| {
        let what = e.to_string();
        let what = what.split(" at line").next().unwrap_or("malformed plan");
        Error::usage(format!(
            "{path}: line {}, column {}: {what}; the plan format is in schema/plan.schema.json and README.md (\"Plans\")",
            e.line(),
            e.column(),
        ))
    })?;
    validate(&plan, path)?;
    Ok(plan)
}

fn validate(plan: &Plan, path: &str) -> Result<()> {
    if plan.sluice_plan != PLAN_FORMAT {
        return Err(Error::usage(format!(
            "{path}: plan format {} is not one this build reads (it reads {PLAN_FORMAT}); upgrade sluice",
            plan.sluice_plan
        )));
    }
    let mut names = BTreeSet::new();
    for (i, source) in plan.sources.iter().enumerate() {
        if !names.insert(source.dataset.as_str()) {
            return Err(Error::usage(format!(
                "{path}: source {} names dataset \"{}\" a second time; give each source its own name",
                i + 1,
                source.dataset
            )));
        }
        if let Some(d) = &source.delimiter {
            if d.len() != 1 {
                return Err(Error::usage(format!(
                    "{path}: source \"{}\": the delimiter must be one ASCII character, not {d:?}",
                    source.dataset
                )));
            }
        }
    }
    if plan.steps.is_empty() {
        return Err(Error::usage(format!("{path}: the plan has no steps")));
    }
    if plan.steps.len() > MAX_PLAN_STEPS {
        return Err(Error::usage(format!(
            "{path}: the plan has {} steps, more than the {MAX_PLAN_STEPS} a plan may have; split it into several plans",
            plan.steps.len()
        )));
    }
    for (i, s) in plan.steps.iter().enumerate() {
        let at = |what: &str| Error::usage(format!("{path}: step {}: {what}", i + 1));
        match (&s.clean, &s.inspect) {
            (Some(_), Some(_)) => {
                return Err(at(
                    "a step holds either \"clean\" or \"inspect\", not both; split it in two",
                ))
            }
            (None, None) => {
                return Err(at(
                    "a step needs \"clean\" (an operation) or \"inspect\" (a list of rules)",
                ))
            }
            (Some(_), None) => {
                if s.reason.as_deref().is_none_or(|w| w.trim().is_empty()) {
                    return Err(at(
                        "a \"clean\" step needs \"reason\": the reason recorded with it",
                    ));
                }
                if s.hold_point {
                    return Err(at("\"hold_point\" belongs to \"inspect\" steps"));
                }
            }
            (None, Some(rules)) => {
                if rules.is_empty() {
                    return Err(at("\"inspect\" holds no rule"));
                }
                if s.save_as.is_some() {
                    return Err(at(
                        "an inspection records no version, so it takes no \"save_as\"; remove it",
                    ));
                }
            }
        }
    }
    Ok(())
}

/// Where a plan input's data comes from in one run.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Binding {
    File(PathBuf),
    Version(String),
}

/// What `run` needs besides the plan.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// The folder relative file paths in the plan are read from (the plan file's folder).
    pub plan_dir: PathBuf,
    /// `--input NAME=...` choices, which override the plan's files.
    pub bindings: Vec<(String, Binding)>,
    pub agent: Agent,
}

/// One thing a run did.
#[derive(Debug, Clone)]
pub enum Done {
    /// A plan input bound to a stored version.
    Bound { name: String, version: Version },
    /// A plan input taken in from a file.
    TookIn {
        name: String,
        path: PathBuf,
        outcome: Box<IngestOutcome>,
        /// The hash the plan recorded for this input, when the data differs from it.
        differs_from: Option<String>,
    },
    /// A `clean` step.
    Applied {
        step: usize,
        op: Operation,
        outcome: Box<ApplyOutcome>,
    },
    /// An `inspect` step.
    Checked {
        step: usize,
        hold_point: bool,
        report: CheckReport,
    },
}

impl Done {
    /// The version this item recorded, if it recorded one (an intake or an operation whose
    /// result was new).
    pub fn recorded(&self) -> Option<&Version> {
        match self {
            Done::TookIn { outcome, .. } => match &**outcome {
                IngestOutcome::Recorded { version, .. } => Some(version),
                IngestOutcome::Unchanged { .. } => None,
            },
            Done::Applied { outcome, .. } => match &**outcome {
                ApplyOutcome::Recorded { version, .. } => Some(version),
                ApplyOutcome::Unchanged { .. } | ApplyOutcome::Replayed { .. } => None,
            },
            Done::Bound { .. } | Done::Checked { .. } => None,
        }
    }
}

/// The result of a run that went to the end.
#[derive(Debug, Clone)]
pub struct RunReport {
    pub done: Vec<Done>,
    /// Inspections that are not hold points with a failing rule.
    pub failed_checks: usize,
}

/// A run that stopped: what was done and kept, where it stopped, and why.
#[derive(Debug)]
pub struct RunFailure {
    pub done: Vec<Done>,
    /// "step 4 (number on quillby_orders)" or "input quillby_orders".
    pub at: String,
    pub error: Error,
}

impl RunFailure {
    fn before_start(error: Error) -> Self {
        RunFailure {
            done: Vec::new(),
            at: "the start, before the first step".into(),
            error,
        }
    }
}

/// Runs a plan: binds or takes in its inputs, then records each step in order. Problems that
/// can be seen before anything is recorded (unknown inputs, missing files, a name no step
/// can resolve) stop the run before it starts.
pub fn run(
    store: &mut Store,
    plan: &Plan,
    opts: &RunOptions,
) -> std::result::Result<RunReport, RunFailure> {
    let sources = plan_sources(store, plan, opts).map_err(RunFailure::before_start)?;
    let mut done = Vec::new();
    // The version each dataset name stands for in this run.
    let mut current: BTreeMap<String, Version> = BTreeMap::new();
    // Steps a pass computed while their input was taken in, recorded already.
    let mut skip_until = 0;
    let n_sources = plan.sources.len();
    for (i, (input, source)) in plan.sources.iter().zip(sources).enumerate() {
        let fail = |done, error| RunFailure {
            done,
            at: format!("input {}", input.dataset),
            error,
        };
        match source {
            Binding::Version(r) => match refs::resolve(&store.lineage, &r) {
                Ok(v) => {
                    current.insert(input.dataset.clone(), v.clone());
                    done.push(Done::Bound {
                        name: input.dataset.clone(),
                        version: v,
                    });
                }
                Err(e) => return Err(fail(done, e)),
            },
            Binding::File(path) => {
                let iopts = IngestOptions {
                    dataset: input.dataset.clone(),
                    key: input.key.clone(),
                    reason: Some(
                        input
                            .reason
                            .clone()
                            .unwrap_or_else(|| "raw input of a plan".to_string()),
                    ),
                    delimiter: input.delimiter.as_ref().and_then(|d| d.bytes().next()),
                    has_header: input.header,
                    encoding: input.encoding.clone(),
                    null_tokens: input.null_tokens.clone(),
                    agent: opts.agent.clone(),
                };
                let source = intake::SourceOptions {
                    sheet: input.sheet.clone(),
                };
                let file = (&iopts, path.as_path(), &source);
                match take_in(store, plan, i + 1 == n_sources, file, &mut current, opts) {
                    Ok((outcome, ahead)) => {
                        let differs_from = input
                            .hash
                            .clone()
                            .filter(|h| !h.eq_ignore_ascii_case(&taken_in(&outcome).hash));
                        done.push(Done::TookIn {
                            name: input.dataset.clone(),
                            path,
                            outcome: Box::new(outcome),
                            differs_from,
                        });
                        match ahead {
                            Ahead::Nothing => {}
                            Ahead::Recorded { n, items } => {
                                done.extend(items);
                                skip_until = n;
                            }
                            Ahead::Failed { items, at, error } => {
                                done.extend(items);
                                return Err(RunFailure { done, at, error });
                            }
                        }
                    }
                    Err(e) => return Err(fail(done, e)),
                }
            }
        }
    }
    let mut failed_checks = 0;
    // Steps already recorded by a fused pass, and steps to run one at a time after a fused
    // pass could not finish.
    let mut plain_until = 0;
    for (i, step) in plan.steps.iter().enumerate() {
        if i < skip_until {
            continue;
        }
        let at = format!("step {} ({})", i + 1, step.describe());
        if i >= plain_until {
            // A stretch of row-by-row steps, each reading the one before, runs in one pass.
            let n = fusable_stretch(store, &plan.steps[i..], &current);
            if n >= 2 {
                match run_fused(store, &plan.steps[i..i + n], i + 1, &mut current, opts) {
                    Ok(Some(items)) => {
                        done.extend(items);
                        skip_until = i + n;
                        continue;
                    }
                    // The pass could not finish: the same steps one at a time, which stop
                    // where and as a step-by-step run does.
                    Ok(None) => plain_until = i + n,
                    Err((items, k, error)) => {
                        done.extend(items);
                        let at = format!("step {} ({})", i + k + 1, plan.steps[i + k].describe());
                        return Err(RunFailure { done, at, error });
                    }
                }
            }
        }
        match run_step(store, step, i + 1, &mut current, opts) {
            Ok(d) => {
                if let Done::Checked {
                    report, hold_point, ..
                } = &d
                {
                    if !report.passed {
                        if *hold_point {
                            let failing: Vec<String> = report
                                .results
                                .iter()
                                .filter(|r| !r.passed)
                                .map(|r| {
                                    format!(
                                        "{} ({} {})",
                                        r.rule.describe(),
                                        r.n_failing,
                                        if r.n_failing == 1 { "row" } else { "rows" }
                                    )
                                })
                                .collect();
                            let error = Error::from(ErrorKind::Data(format!(
                                "the hold point on {} failed: {}; the results are recorded on the version (`sluice about {}`)",
                                report.version,
                                failing.join(", "),
                                report.version
                            )));
                            done.push(d);
                            return Err(RunFailure { done, at, error });
                        }
                        failed_checks += 1;
                    }
                }
                done.push(d);
            }
            Err(error) => return Err(RunFailure { done, at, error }),
        }
    }
    Ok(RunReport {
        done,
        failed_checks,
    })
}

/// Decides where each input's data comes from, and checks every name the steps use, before
/// anything is recorded.
fn plan_sources(store: &Store, plan: &Plan, opts: &RunOptions) -> Result<Vec<Binding>> {
    for (name, _) in &opts.bindings {
        if !plan.sources.iter().any(|i| &i.dataset == name) {
            let known: Vec<&str> = plan.sources.iter().map(|i| i.dataset.as_str()).collect();
            return Err(Error::usage(format!(
                "--input {name}=...: the plan has no source named \"{name}\"; its sources are: {}",
                if known.is_empty() {
                    "(none)".to_string()
                } else {
                    known.join(", ")
                }
            )));
        }
    }
    let mut sources = Vec::new();
    for input in &plan.sources {
        let chosen = opts
            .bindings
            .iter()
            .rev()
            .find(|(n, _)| n == &input.dataset)
            .map(|(_, b)| b.clone());
        let source = match (chosen, &input.file) {
            (Some(Binding::File(p)), _) => Binding::File(p),
            (Some(Binding::Version(r)), _) => {
                refs::resolve(&store.lineage, &r)?;
                Binding::Version(r)
            }
            (None, Some(f)) => Binding::File(opts.plan_dir.join(f)),
            (None, None) => {
                return Err(Error::usage(format!(
                "plan source \"{}\" names no file; give one with --input {}=FILE or --input {}=REF",
                input.dataset, input.dataset, input.dataset
            )))
            }
        };
        if let Binding::File(p) = &source {
            if !p.is_file() {
                return Err(Error::usage(format!(
                    "plan source \"{}\": {} is not a file; give another with --input {}=FILE",
                    input.dataset,
                    p.display(),
                    input.dataset
                )));
            }
        }
        sources.push(source);
    }
    // Every name a step reads must be an input, the output of an earlier step, or a version
    // the store already holds.
    let mut known: BTreeSet<String> = plan.sources.iter().map(|i| i.dataset.clone()).collect();
    for (i, step) in plan.steps.iter().enumerate() {
        let mut reads = vec![step.dataset.as_str()];
        if let Some(op) = &step.clean {
            reads.extend(other_input(op));
        }
        for name in reads {
            if !known.contains(name) {
                refs::resolve(&store.lineage, name).map_err(|e| {
                    Error::usage(format!(
                        "step {} ({}) reads \"{name}\", which is neither a source of the plan, nor made by an earlier step, nor in the store ({e})",
                        i + 1,
                        step.describe()
                    ))
                })?;
            }
        }
        if step.clean.is_some() {
            known.insert(output_name(store, step)?);
        }
    }
    Ok(sources)
}

/// The reference an operation reads besides its input (a mapping or lookup table, the other
/// source of an append).
fn other_input(op: &Operation) -> Option<&str> {
    match op {
        Operation::Map { table, .. } | Operation::Lookup { table, .. } => Some(table),
        Operation::Append { other, .. } => Some(other),
        _ => None,
    }
}

/// `op` reading `reference` as its table or other source (a map or lookup table, the other
/// source of an append); other operations are returned as they are.
pub(crate) fn with_other_input(op: &Operation, reference: String) -> Operation {
    let mut op = op.clone();
    match &mut op {
        Operation::Map { table, .. } | Operation::Lookup { table, .. } => *table = reference,
        Operation::Append { other, .. } => *other = reference,
        _ => {}
    }
    op
}

/// The dataset a step's output is recorded in: `as`, else the dataset `on` names.
fn output_name(store: &Store, step: &PlanStep) -> Result<String> {
    if let Some(n) = &step.save_as {
        return Ok(n.clone());
    }
    Ok(match refs::resolve(&store.lineage, &step.dataset) {
        // A reference to a stored version (`orders:v2`, a hash) writes to its dataset; a bare
        // name is the dataset itself.
        Ok(v) if v.dataset != step.dataset => v.dataset,
        _ => step.dataset.clone(),
    })
}

/// How many steps from the start of `steps` can run fused in one pass: `clean` steps whose
/// operation works row by row (`apply::fusable`), each reading the dataset the step before it
/// wrote, none reading as a table a dataset written earlier in the stretch.
fn fusable_stretch(
    store: &Store,
    steps: &[PlanStep],
    current: &BTreeMap<String, Version>,
) -> usize {
    let mut written: Vec<String> = Vec::new();
    for (k, step) in steps.iter().enumerate() {
        let Some(op) = &step.clean else {
            return k;
        };
        // A summary ends a stretch: it takes the rows of the step before as they pass.
        let summary = matches!(op, Operation::Summarize { .. });
        if !(apply::fusable(op, k == 0) || summary && k > 0) {
            return k;
        }
        if let Some(last) = written.last() {
            if &step.dataset != last {
                return k;
            }
        }
        if other_input(op).is_some_and(|t| written.iter().any(|w| w == t)) {
            return k;
        }
        let out = match &step.save_as {
            Some(n) => n.clone(),
            None if k > 0 || current.contains_key(&step.dataset) => step.dataset.clone(),
            None => match refs::resolve(&store.lineage, &step.dataset) {
                Ok(v) => v.dataset,
                Err(_) => return k,
            },
        };
        written.push(out);
        if summary {
            return k + 1;
        }
    }
    steps.len()
}

/// What a fused stretch recorded before it stopped, the 0-based position in the stretch of
/// the step that failed, and why.
type FusedFailure = (Vec<Done>, usize, Error);

/// What became of a plan's first stretch computed while its input was taken in ([`take_in`]).
enum Ahead {
    /// None was computed (or the pass could not finish): the steps run as usual.
    Nothing,
    /// The first `n` steps are recorded.
    Recorded { n: usize, items: Vec<Done> },
    /// The intake is recorded, and the run stopped at a step of the stretch.
    Failed {
        items: Vec<Done>,
        at: String,
        error: Error,
    },
}

/// Takes in the file `path` as input `iopts.dataset` and records it, giving the dataset that
/// version in `current`. When it is the plan's last input (`last`) and the plan's first steps
/// read it row by row ([`stretch_on_intake`]), they are computed on its rows as intake reads
/// them and recorded after it. An error is the intake's: nothing of it is recorded.
fn take_in(
    store: &mut Store,
    plan: &Plan,
    last: bool,
    (iopts, path, source): (&IngestOptions, &Path, &intake::SourceOptions),
    current: &mut BTreeMap<String, Version>,
    opts: &RunOptions,
) -> Result<(IngestOutcome, Ahead)> {
    let ahead = if last {
        stretch_on_intake(store, plan, current, iopts, path, source, opts)
    } else {
        None
    };
    let Some((n, stretch)) = ahead else {
        let outcome = intake::ingest_from(store, path, iopts, source)?;
        current.insert(iopts.dataset.clone(), taken_in(&outcome).clone());
        return Ok((outcome, Ahead::Nothing));
    };
    let mut feed = StretchFeed {
        store,
        stretch: &stretch,
        iopts,
        worker: None,
        refused: None,
    };
    let prepared = intake::prepare_feeding(store, path, iopts, source, Some(&mut feed));
    let chain = feed.finish();
    drop(feed);
    let outcome = intake::record_prepared(store, prepared?, iopts)?;
    let v = taken_in(&outcome).clone();
    current.insert(iopts.dataset.clone(), v.clone());
    // A failed write fails the run at the stretch's first step; a pass that could not finish
    // leaves the steps to the run's loop, which computes them from the stored input (and stops
    // where and as that run does).
    let computed = match chain.and_then(|c| c.map(apply::Chain::finish).transpose()) {
        Ok(Some(computed)) => computed,
        Ok(None) => return Ok((outcome, Ahead::Nothing)),
        Err(error) if matches!(error.kind(), ErrorKind::Io { .. }) => {
            let at = format!("step 1 ({})", plan.steps[0].describe());
            let ahead = Ahead::Failed {
                items: Vec::new(),
                at,
                error,
            };
            return Ok((outcome, ahead));
        }
        Err(_) => return Ok((outcome, Ahead::Nothing)),
    };
    let ahead = match stretch.record(store, v, computed, 1, current, opts) {
        Ok(items) => Ahead::Recorded { n, items },
        Err((items, k, error)) => Ahead::Failed {
            items,
            at: format!("step {} ({})", k + 1, plan.steps[k].describe()),
            error,
        },
    };
    Ok((outcome, ahead))
}

/// The version an intake recorded or found unchanged.
fn taken_in(outcome: &IngestOutcome) -> &Version {
    match outcome {
        IngestOutcome::Recorded { version, .. } | IngestOutcome::Unchanged { version } => version,
    }
}

/// The stretch of steps at the start of `plan` to compute while its last input, a file, is
/// taken in, and how many steps it holds: when the first step reads that input, at least two
/// steps form a stretch ([`fusable_stretch`]), the first needs no read of its input ahead
/// (`apply::fusable` of a later position), none reads the input as a table, and intake can
/// hand the file's rows over (`intake::can_feed`).
fn stretch_on_intake(
    store: &Store,
    plan: &Plan,
    current: &BTreeMap<String, Version>,
    iopts: &IngestOptions,
    path: &Path,
    source: &intake::SourceOptions,
    opts: &RunOptions,
) -> Option<(usize, Stretch)> {
    let first = plan.steps.first()?;
    if first.dataset != iopts.dataset
        || !first
            .clean
            .as_ref()
            .is_some_and(|op| apply::fusable(op, false))
        || !intake::can_feed(path, iopts, source)
    {
        return None;
    }
    let mut ahead = current.clone();
    ahead.insert(iopts.dataset.clone(), pending_input(iopts, Vec::new()));
    let n = fusable_stretch(store, &plan.steps, &ahead);
    if n < 2
        || plan.steps[..n].iter().any(|s| {
            s.clean
                .as_ref()
                .and_then(other_input)
                .is_some_and(|t| t == iopts.dataset)
        })
    {
        return None;
    }
    Some((
        n,
        Stretch::prepare(store, &plan.steps[..n], &iopts.dataset, &ahead, opts)?,
    ))
}

/// The input of a stretch computed while its file is taken in, before it has a name: its
/// dataset and blanks, and the header once intake has read it.
fn pending_input(iopts: &IngestOptions, header: Vec<String>) -> Version {
    crate::recording::unnamed_version(
        0,
        iopts.dataset.clone(),
        header,
        iopts.null_tokens.clone(),
        crate::model::Storage::Stored,
    )
}

/// Computes a stretch on the rows intake hands over ([`intake::Feed`]), on a thread of its
/// own (intake's calling thread checks, profiles and indexes the same rows meanwhile). A step
/// that refuses its input, or a row it cannot compute, ends the pass: [`StretchFeed::finish`]
/// then gives no chain, and the run computes the steps from the stored input instead.
struct StretchFeed<'a> {
    store: &'a Store,
    stretch: &'a Stretch,
    iopts: &'a IngestOptions,
    worker: Option<StretchWorker>,
    /// Why the stretch could not be prepared.
    refused: Option<Error>,
}

/// The thread computing a stretch: batches go to it, and come back to be filled again.
struct StretchWorker {
    to: std::sync::mpsc::SyncSender<(RecordBatch, usize, u64)>,
    back: std::sync::mpsc::Receiver<RecordBatch>,
    thread: std::thread::JoinHandle<(Option<apply::Chain>, Option<Error>)>,
}

/// Batches on their way to the stretch's thread at most: a few MiB of rows.
const BATCHES_AHEAD: usize = 2;

impl StretchFeed<'_> {
    /// Waits for the stretch's thread: the chain when every row went through it; an error
    /// when a write failed (a full disk: it fails the run at the stretch's first step, as the
    /// same failure in a pass over the stored copy does); `Ok(None)` when the pass stopped.
    fn finish(&mut self) -> Result<Option<apply::Chain>> {
        let refused = self.refused.take();
        let (chain, error) = match self.worker.take() {
            Some(w) => {
                drop(w.to);
                w.thread.join().map_err(|_| {
                    Error::from(ErrorKind::Internal(
                        "the thread of a plan's steps panicked".into(),
                    ))
                })?
            }
            None => (None, refused),
        };
        match error {
            Some(e) if matches!(e.kind(), ErrorKind::Io { .. }) => Err(e),
            _ => Ok(chain),
        }
    }
}

impl Drop for StretchFeed<'_> {
    fn drop(&mut self) {
        // After an intake that failed: the thread ends once it has the batches sent, and its
        // temporary objects go with it, before the store is left.
        let _ = self.finish();
    }
}

impl intake::Feed for StretchFeed<'_> {
    fn header(&mut self, header: &[String], rows: u64) {
        let s = self.stretch;
        let mut chain = match apply::Chain::prepare(
            self.store,
            &pending_input(self.iopts, header.to_vec()),
            &s.aopts,
            &s.keep[..s.row_steps],
            s.summary_opts.as_ref(),
        ) {
            Ok(c) => c,
            Err(e) => {
                self.refused = Some(e);
                return;
            }
        };
        chain.expect_rows(rows);
        let (to, rx) = std::sync::mpsc::sync_channel::<(RecordBatch, usize, u64)>(BATCHES_AHEAD);
        let (back_tx, back) = std::sync::mpsc::channel::<RecordBatch>();
        let thread = std::thread::Builder::new()
            .name("sluice-steps".into())
            .spawn(move || {
                let mut chain = Some(chain);
                let mut error = None;
                while let Ok((mut batch, skip, first_row)) = rx.recv() {
                    if let Some(c) = &mut chain {
                        let (mut seen, mut row) = (0usize, first_row);
                        let done = batch.for_each(|r| {
                            if seen < skip {
                                seen += 1;
                                return Ok(());
                            }
                            row += 1;
                            c.row(row - 1, r)
                        });
                        if let Err(e) = done {
                            chain = None;
                            error = Some(e);
                        }
                    }
                    batch.clear();
                    let _ = back_tx.send(batch);
                }
                (chain, error)
            });
        match thread {
            Ok(thread) => self.worker = Some(StretchWorker { to, back, thread }),
            Err(e) => {
                self.refused = Some(Error::from(ErrorKind::Internal(format!(
                    "could not start the thread of a plan's steps: {e}"
                ))))
            }
        }
    }

    fn batch(&mut self, batch: RecordBatch, skip: usize, first_row: u64) -> RecordBatch {
        match &self.worker {
            Some(w) => {
                let _ = w.to.send((batch, skip, first_row));
                w.back.try_recv().unwrap_or_default()
            }
            None => batch,
        }
    }
}

/// Runs a stretch of row-by-row steps in one pass ([`apply::compute_chain`]), then records
/// each step in turn in its own transaction, as [`run_step`] would. `Ok(None)`: the pass could
/// not be completed (a step refused its input, a cell could not be read), nothing was
/// recorded, and the caller runs the steps one at a time instead, which stops where and as
/// such a run does. A failed write stops the run at the stretch's first step.
fn run_fused(
    store: &mut Store,
    steps: &[PlanStep],
    first_number: usize,
    current: &mut BTreeMap<String, Version>,
    opts: &RunOptions,
) -> std::result::Result<Option<Vec<Done>>, FusedFailure> {
    let Ok(input) = resolve_in_run(store, &steps[0].dataset, current) else {
        return Ok(None);
    };
    let Some(stretch) = Stretch::prepare(store, steps, &input.dataset, current, opts) else {
        return Ok(None);
    };
    let computed = match apply::compute_chain_summed(
        store,
        &input,
        &stretch.aopts,
        &stretch.keep[..stretch.row_steps],
        stretch.summary_opts.as_ref(),
    ) {
        Ok(c) => c,
        // A write that failed (a full disk) fails the run as it would have failed the first
        // step; nothing is recorded.
        Err(e) if matches!(e.kind(), ErrorKind::Io { .. }) => return Err((Vec::new(), 0, e)),
        Err(_) => return Ok(None),
    };
    stretch
        .record(store, input, computed, first_number, current, opts)
        .map(Some)
}

/// The version `name` stands for in a run: the one the run gave it, else the store's.
fn resolve_in_run(
    store: &Store,
    name: &str,
    current: &BTreeMap<String, Version>,
) -> Result<Version> {
    match current.get(name) {
        Some(v) => Ok(v.clone()),
        None => refs::resolve(&store.lineage, name),
    }
}

/// A stretch of a plan's steps ready to be computed in one pass: each step's options, the
/// dataset it writes, whether its output is stored, and the summary that may end it.
struct Stretch {
    aopts: Vec<ApplyOptions>,
    datasets: Vec<String>,
    keep: Vec<bool>,
    summary_opts: Option<ApplyOptions>,
    row_steps: usize,
}

impl Stretch {
    /// `None` when a step's table cannot be resolved: the steps then run one at a time,
    /// which fail where and as such a run does. `input_dataset` is the dataset the first step
    /// reads.
    fn prepare(
        store: &Store,
        steps: &[PlanStep],
        input_dataset: &str,
        current: &BTreeMap<String, Version>,
        opts: &RunOptions,
    ) -> Option<Stretch> {
        let mut aopts: Vec<ApplyOptions> = Vec::with_capacity(steps.len());
        let mut datasets = Vec::with_capacity(steps.len());
        for (k, step) in steps.iter().enumerate() {
            let op = step.clean.as_ref()?;
            let op = match other_input(op) {
                Some(name) => {
                    with_other_input(op, resolve_in_run(store, name, current).ok()?.label())
                }
                None => op.clone(),
            };
            let dataset = match &step.save_as {
                Some(n) => n.clone(),
                None if k > 0 || current.contains_key(&step.dataset) => step.dataset.clone(),
                None => input_dataset.to_string(),
            };
            datasets.push(dataset.clone());
            aopts.push(ApplyOptions {
                op,
                reason: step.reason.clone().unwrap_or_default(),
                output_dataset: Some(dataset),
                agent: opts.agent.clone(),
                map_table_file: None,
                replay: None,
                repeats: step.repeats,
            });
        }
        // Default storage policy: an output a later step of this stretch supersedes (it writes
        // the same dataset again) is an intermediate, recorded by hash and recipe but not
        // written; the rest (the dataset's latest after the stretch, and outputs saved under
        // another name) are stored. A version that stops being the latest later stays stored.
        let keep = crate::recompute::written_in_pass(&datasets);
        // A summary at the end takes the rows of the step before as they pass.
        let summary_opts = match aopts.last() {
            Some(last) if matches!(last.op, Operation::Summarize { .. }) => aopts.pop(),
            _ => None,
        };
        let row_steps = aopts.len();
        Some(Stretch {
            aopts,
            datasets,
            keep,
            summary_opts,
            row_steps,
        })
    }

    /// Records each step the pass computed on `input` in turn, in its own transaction, as
    /// [`run_step`] would, then the summary.
    fn record(
        self,
        store: &mut Store,
        input: Version,
        computed: (Vec<apply::Computed>, Option<crate::ops::summarize::Summary>),
        first_number: usize,
        current: &mut BTreeMap<String, Version>,
        opts: &RunOptions,
    ) -> std::result::Result<Vec<Done>, FusedFailure> {
        let Stretch {
            aopts,
            datasets,
            summary_opts,
            row_steps,
            ..
        } = self;
        let (computed, summary) = computed;
        let mut done = Vec::with_capacity(row_steps + 1);
        let mut reads = input;
        let mut datasets = datasets.into_iter();
        for (k, (c, dataset)) in computed.into_iter().zip(datasets.by_ref()).enumerate() {
            let outcome = match apply::apply_computed(store, reads.clone(), c) {
                Ok(o) => o,
                Err(e) => return Err((done, k, e)),
            };
            let version = match &outcome {
                ApplyOutcome::Recorded { version, .. }
                | ApplyOutcome::Unchanged { version, .. } => version.clone(),
                ApplyOutcome::Replayed { .. } => {
                    let e =
                        ErrorKind::Inconsistent("a plan step was replayed, not recorded".into());
                    return Err((done, k, e.into()));
                }
            };
            current.insert(dataset, version.clone());
            reads = version;
            done.push(Done::Applied {
                step: first_number + k,
                op: aopts[k].op.clone(),
                outcome: Box::new(outcome),
            });
        }
        if let (Some(summary), Some(opts), Some(dataset)) = (summary, summary_opts, datasets.next())
        {
            let outcome = match apply::record_summary(store, reads.clone(), summary, &opts) {
                Ok(o) => o,
                Err(e) => return Err((done, row_steps, e)),
            };
            match &outcome {
                ApplyOutcome::Recorded { version, .. }
                | ApplyOutcome::Unchanged { version, .. } => {
                    current.insert(dataset, version.clone());
                }
                ApplyOutcome::Replayed { .. } => {
                    let e =
                        ErrorKind::Inconsistent("a plan step was replayed, not recorded".into());
                    return Err((done, row_steps, e.into()));
                }
            }
            done.push(Done::Applied {
                step: first_number + row_steps,
                op: opts.op,
                outcome: Box::new(outcome),
            });
        }
        // A later step that changed nothing leaves an intermediate the latest version of its
        // dataset: the policy stores every dataset's latest, so its bytes are computed and
        // stored (an audit entry of its own).
        let last = done.len().saturating_sub(1);
        for v in current.values() {
            if v.storage == crate::model::Storage::Recomputable
                && store
                    .lineage
                    .latest_version(&v.dataset)
                    .is_ok_and(|l| l.is_some_and(|l| l.id == v.id))
            {
                if let Err(e) = crate::recompute::store_bytes(
                    store,
                    v,
                    crate::model::Storage::Stored,
                    &opts.agent,
                ) {
                    return Err((done, last, e));
                }
            }
        }
        Ok(done)
    }
}

fn run_step(
    store: &mut Store,
    step: &PlanStep,
    number: usize,
    current: &mut BTreeMap<String, Version>,
    opts: &RunOptions,
) -> Result<Done> {
    let resolve =
        |store: &Store, name: &str, current: &BTreeMap<String, Version>| match current.get(name) {
            Some(v) => Ok(v.clone()),
            None => refs::resolve(&store.lineage, name),
        };
    let input = resolve(store, &step.dataset, current)?;
    if let Some(rules) = &step.inspect {
        let report = checks::check(store, &input.label(), rules, step.hold_point, &opts.agent)?;
        return Ok(Done::Checked {
            step: number,
            hold_point: step.hold_point,
            report,
        });
    }
    let Some(op) = &step.clean else {
        return Err(Error::usage(format!(
            "step {number} holds neither \"apply\" nor \"check\""
        )));
    };
    // Names are pinned to exact versions (`name@seq`), so a step reads what this run made.
    let op = match other_input(op) {
        Some(name) => with_other_input(op, resolve(store, name, current)?.label()),
        None => op.clone(),
    };
    let dataset = match &step.save_as {
        Some(n) => n.clone(),
        None if current.contains_key(&step.dataset) => step.dataset.clone(),
        None => input.dataset.clone(),
    };
    let aopts = ApplyOptions {
        op: op.clone(),
        reason: step.reason.clone().unwrap_or_default(),
        output_dataset: Some(dataset.clone()),
        agent: opts.agent.clone(),
        map_table_file: None,
        replay: None,
        repeats: step.repeats,
    };
    let outcome = apply::apply(store, &input.label(), &aopts)?;
    let version = match &outcome {
        ApplyOutcome::Recorded { version, .. } | ApplyOutcome::Unchanged { version, .. } => {
            version.clone()
        }
        ApplyOutcome::Replayed { .. } => {
            return Err(
                ErrorKind::Inconsistent("a plan step was replayed, not recorded".into()).into(),
            )
        }
    };
    current.insert(dataset, version);
    Ok(Done::Applied {
        step: number,
        op,
        outcome: Box::new(outcome),
    })
}

/// Every step a version comes from, found by walking inputs back to intakes, in recording
/// order (a topological order: a step reads only versions recorded before it).
pub(crate) fn steps_behind(store: &Store, v: &Version) -> Result<BTreeSet<i64>> {
    let mut todo = vec![v.step_id];
    let mut seen = BTreeSet::new();
    while let Some(id) = todo.pop() {
        if !seen.insert(id) {
            continue;
        }
        for (_, input) in store.lineage.step_input_versions(id)? {
            todo.push(input.step_id);
        }
    }
    Ok(seen)
}

/// Writes the plan that produced `reference` from its raw inputs: each intake on its way
/// becomes a source (its file path made relative to `base_dir` when it lies under it), each
/// built-in step a `clean` step with its recorded settings and reason, and each inspection
/// recorded on a version of the way an `inspect` step right after the step that made it.
/// Histories a plan cannot express are refused with the reason: outside commands and hand
/// edits, and branches (a dataset whose steps read two of its versions side by side).
pub fn export(store: &Store, reference: &str, base_dir: &Path) -> Result<Plan> {
    let target = refs::resolve(&store.lineage, reference)?;
    let seen = steps_behind(store, &target)?;
    let cannot =
        |what: String| Error::usage(format!("cannot write {} as a plan: {what}", target.label()));
    let mut plan = Plan {
        sluice_plan: PLAN_FORMAT,
        purpose: Some(format!(
            "the steps that made {} ({}) from its raw inputs",
            target.label(),
            &target.hash[..12]
        )),
        sources: Vec::new(),
        steps: Vec::new(),
    };
    // Which version each dataset name stands for at this point of the plan.
    let mut current: BTreeMap<String, i64> = BTreeMap::new();
    let name_of = |current: &BTreeMap<String, i64>, v: &Version| -> Result<String> {
        if current.get(&v.dataset) == Some(&v.id) {
            Ok(v.dataset.clone())
        } else {
            Err(cannot(format!(
                "its history reads {} after a later version of {} was made (a branch); export a version on one line of history",
                v.label(),
                v.dataset
            )))
        }
    };
    for id in seen {
        let step = store
            .lineage
            .step(id)?
            .ok_or_else(|| cannot(format!("step {id} is missing from the database")))?;
        let outputs = store.lineage.step_outputs(id)?;
        match step.kind {
            StepKind::Ingest => {
                for v in &outputs {
                    if plan.sources.iter().any(|i| i.dataset == v.dataset) {
                        return Err(cannot(format!(
                            "its history takes in {} twice (as {} and later again); export a version on one line of history",
                            v.dataset,
                            v.label()
                        )));
                    }
                    plan.sources.push(input_of(&step, v, base_dir));
                    current.insert(v.dataset.clone(), v.id);
                }
            }
            StepKind::Operation => {
                let op: Operation = serde_json::from_value(step.params.clone()).map_err(|e| {
                    cannot(format!(
                        "step {id} holds parameters this build cannot read ({e})"
                    ))
                })?;
                let inputs = store.lineage.step_input_versions(id)?;
                let Some((_, main)) = inputs.iter().find(|(role, _)| role == "input") else {
                    return Err(cannot(format!("step {id} records no input")));
                };
                let on = name_of(&current, main)?;
                let op = match inputs.iter().find(|(role, _)| role != "input") {
                    Some((_, other)) => with_other_input(&op, name_of(&current, other)?),
                    None => op,
                };
                let Some(out) = outputs.first() else {
                    return Err(cannot(format!("step {id} records no output")));
                };
                plan.steps.push(PlanStep {
                    repeats: Some(id),
                    save_as: (out.dataset != on).then(|| out.dataset.clone()),
                    dataset: on,
                    clean: Some(op),
                    inspect: None,
                    hold_point: false,
                    reason: step.reason.clone(),
                });
                current.insert(out.dataset.clone(), out.id);
            }
            other => {
                return Err(cannot(format!(
                    "step {id} is a {} step, which a plan cannot express",
                    other.as_str().replace('_', " ")
                )))
            }
        }
        for v in &outputs {
            plan.steps.extend(checks_on(store, v)?);
        }
    }
    Ok(plan)
}

/// The inspections recorded on a version, one plan step per inspection (the rules recorded
/// together by one agent at one time).
fn checks_on(store: &Store, v: &Version) -> Result<Vec<PlanStep>> {
    let mut steps: Vec<PlanStep> = Vec::new();
    let mut last: Option<(String, String)> = None;
    for (rule, _, _, agent, at, gate) in store.lineage.check_results(v.id)? {
        // Old stores hold rules of the form before the dimensions; both are read.
        let rule: Rule = serde_json::from_str::<Value>(&rule)
            .ok()
            .and_then(|r| Rule::from_stored(&r))
            .ok_or_else(|| {
                Error::from(ErrorKind::Inconsistent(format!(
                    "an inspection of {} holds a rule this build cannot read ({rule}); run `sluice verify`",
                    v.label()
                )))
            })?;
        let group = (agent, at);
        match steps.last_mut() {
            Some(s) if last.as_ref() == Some(&group) => {
                if let Some(rules) = s.inspect.as_mut() {
                    rules.push(rule);
                }
            }
            _ => steps.push(PlanStep {
                repeats: None,
                dataset: v.dataset.clone(),
                clean: None,
                inspect: Some(vec![rule]),
                hold_point: gate,
                reason: None,
                save_as: None,
            }),
        }
        last = Some(group);
    }
    Ok(steps)
}

fn input_of(step: &crate::model::Step, v: &Version, base_dir: &Path) -> PlanSource {
    let p = &step.params;
    let file = step.source.as_ref().map(|s| {
        let abs = Path::new(&s.absolute_path);
        let rel = abs.strip_prefix(base_dir).unwrap_or(abs);
        rel.display().to_string()
    });
    let strings = |key: &str| -> Option<Vec<String>> {
        p.get(key)?.as_array().map(|a| {
            a.iter()
                .filter_map(|x| x.as_str().map(str::to_string))
                .collect()
        })
    };
    let detected = p
        .get("delimiter_detected")
        .and_then(|d| d.as_bool())
        .unwrap_or(true);
    PlanSource {
        dataset: v.dataset.clone(),
        file,
        reason: step.reason.clone(),
        key: strings("key"),
        delimiter: (!detected).then(|| v.dialect.delimiter.clone()),
        header: v.dialect.has_header,
        encoding: Some(v.dialect.encoding.clone()).filter(|e| e != "utf-8"),
        null_tokens: strings("null_tokens").unwrap_or_default(),
        sheet: p
            .pointer("/convert/sheet")
            .and_then(|x| x.as_str())
            .map(str::to_string),
        hash: Some(v.hash.clone()),
        recorded: Some(v.label()),
    }
}
