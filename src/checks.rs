//! Declared rules checked against a version, by data-quality dimension (the dimension names
//! are common practice, as in DAMA's DMBOK): completeness (no blank cell), uniqueness (the
//! combination of columns is unique) and validity (a value is one of a list, a number within
//! bounds, of a length, or matching a pattern). Each result (pass or fail, how many rows fail,
//! the first failing rows) is recorded on the version with who inspected it and when, so that a
//! report can show the rules a version passed. Inspecting reads the version and never changes
//! it.
//!
//! Rules file (JSON, `schema/rules.schema.json`): `{"sluice_rules": 2, "rules": [RULE, ...]}`
//! with `{"dimension": "completeness", "columns": [..]}`, `{"dimension": "uniqueness",
//! "columns": [..]}` and `{"dimension": "validity", "column": C, ...}` with one test:
//! `"one_of": [..]`, `"at_least"`/`"at_most"` (numbers as text, compared exactly; a value that
//! is not a number fails), `"length_at_least"`/`"length_at_most"` (in characters) or
//! `"pattern"` (the whole value must match). Blank values pass every rule but completeness.
//! Stores written before this form hold rules as `{"rule": "not_blank", ...}`; they are read
//! through [`Rule::from_stored`], and old rules files are refused with the advice to convert
//! them (`crate::plan::upgrade`).

use std::cmp::Ordering;
use std::collections::HashMap;

use regex::Regex;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::clock;
use crate::error::{Error, Result};
use crate::model::{canonical_json, Agent, Version};
use crate::refs;
use crate::store::Store;
use crate::table::profile::{cmp_numbers, number_shape};

/// How many failing rows a result lists.
pub const FIRST_FAILING: usize = 10;

/// The rules file format this build reads.
pub const RULES_FORMAT: u32 = 2;

/// A declared rule, by data-quality dimension.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(try_from = "RuleText", into = "RuleText")]
pub enum Rule {
    /// No cell of these columns is blank.
    Completeness { columns: Vec<String> },
    /// The combination of these columns' values is unique.
    Uniqueness { columns: Vec<String> },
    /// The values of `column` pass `test` (blank values pass).
    Validity { column: String, test: Validity },
}

/// The one test of a validity rule.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Validity {
    /// The value is one of these.
    OneOf(Vec<String>),
    /// The value is a number within the bounds (exact decimal comparison), either optional.
    Between {
        at_least: Option<String>,
        at_most: Option<String>,
    },
    /// The value has this many characters, either bound optional.
    Length {
        at_least: Option<u64>,
        at_most: Option<u64>,
    },
    /// The whole value matches the regular expression (Rust `regex` syntax).
    Pattern(String),
}

/// A rule as written in a rules file or a plan: one flat object, its fields checked into a
/// [`Rule`] when read.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct RuleText {
    dimension: Dimension,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    columns: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    column: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    one_of: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    at_least: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    at_most: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    length_at_least: Option<u64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    length_at_most: Option<u64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pattern: Option<String>,
}

#[derive(Debug, Clone, Copy, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
enum Dimension {
    Completeness,
    Uniqueness,
    Validity,
}

impl TryFrom<RuleText> for Rule {
    type Error = String;

    fn try_from(t: RuleText) -> std::result::Result<Self, String> {
        let tests = [
            t.one_of.is_some(),
            t.at_least.is_some() || t.at_most.is_some(),
            t.length_at_least.is_some() || t.length_at_most.is_some(),
            t.pattern.is_some(),
        ];
        let n_tests = tests.iter().filter(|x| **x).count();
        match t.dimension {
            Dimension::Completeness | Dimension::Uniqueness => {
                let name = match t.dimension {
                    Dimension::Completeness => "completeness",
                    _ => "uniqueness",
                };
                let Some(columns) = t.columns else {
                    return Err(format!("a {name} rule needs \"columns\": [..]"));
                };
                if columns.is_empty() {
                    return Err(format!("a {name} rule needs at least one column"));
                }
                if t.column.is_some() || n_tests > 0 {
                    return Err(format!(
                        "a {name} rule takes only \"columns\"; tests such as \"one_of\" belong to validity rules"
                    ));
                }
                Ok(match t.dimension {
                    Dimension::Completeness => Rule::Completeness { columns },
                    _ => Rule::Uniqueness { columns },
                })
            }
            Dimension::Validity => {
                let Some(column) = t.column else {
                    return Err("a validity rule needs \"column\": one column name".into());
                };
                if t.columns.is_some() {
                    return Err("a validity rule names one \"column\", not \"columns\"".into());
                }
                if n_tests != 1 {
                    return Err(format!(
                        "a validity rule takes exactly one test (\"one_of\", \"at_least\"/\"at_most\", \"length_at_least\"/\"length_at_most\" or \"pattern\"); this one has {n_tests}"
                    ));
                }
                let test = if let Some(v) = t.one_of {
                    Validity::OneOf(v)
                } else if let Some(p) = t.pattern {
                    Validity::Pattern(p)
                } else if t.at_least.is_some() || t.at_most.is_some() {
                    for b in [&t.at_least, &t.at_most].into_iter().flatten() {
                        if number_shape(b.as_bytes()).is_none() {
                            return Err(format!(
                                "the bound \"{b}\" is not a plain number (write it as text, e.g. \"-5000\" or \"12.50\")"
                            ));
                        }
                    }
                    Validity::Between {
                        at_least: t.at_least,
                        at_most: t.at_most,
                    }
                } else {
                    Validity::Length {
                        at_least: t.length_at_least,
                        at_most: t.length_at_most,
                    }
                };
                Ok(Rule::Validity { column, test })
            }
        }
    }
}

impl From<Rule> for RuleText {
    fn from(r: Rule) -> Self {
        let mut t = RuleText {
            dimension: Dimension::Validity,
            columns: None,
            column: None,
            one_of: None,
            at_least: None,
            at_most: None,
            length_at_least: None,
            length_at_most: None,
            pattern: None,
        };
        match r {
            Rule::Completeness { columns } => {
                t.dimension = Dimension::Completeness;
                t.columns = Some(columns);
            }
            Rule::Uniqueness { columns } => {
                t.dimension = Dimension::Uniqueness;
                t.columns = Some(columns);
            }
            Rule::Validity { column, test } => {
                t.column = Some(column);
                match test {
                    Validity::OneOf(v) => t.one_of = Some(v),
                    Validity::Between { at_least, at_most } => {
                        t.at_least = at_least;
                        t.at_most = at_most;
                    }
                    Validity::Length { at_least, at_most } => {
                        t.length_at_least = at_least;
                        t.length_at_most = at_most;
                    }
                    Validity::Pattern(p) => t.pattern = Some(p),
                }
            }
        }
        t
    }
}

/// A rule of the form stores and rules files held before the dimensions (`{"rule":
/// "not_blank", ...}`): read from old stores' check results, and converted by `upgrade`.
#[derive(Debug, Clone, PartialEq, Eq, Deserialize)]
#[serde(tag = "rule", rename_all = "snake_case", deny_unknown_fields)]
pub(crate) enum OldRule {
    NotBlank {
        columns: Vec<String>,
    },
    Unique {
        columns: Vec<String>,
    },
    Range {
        column: String,
        #[serde(default)]
        min: Option<String>,
        #[serde(default)]
        max: Option<String>,
    },
    Length {
        column: String,
        #[serde(default)]
        min: Option<u64>,
        #[serde(default)]
        max: Option<u64>,
    },
    Pattern {
        column: String,
        regex: String,
    },
    Allowed {
        column: String,
        values: Vec<String>,
    },
}

impl From<OldRule> for Rule {
    fn from(r: OldRule) -> Self {
        match r {
            OldRule::NotBlank { columns } => Rule::Completeness { columns },
            OldRule::Unique { columns } => Rule::Uniqueness { columns },
            OldRule::Range { column, min, max } => Rule::Validity {
                column,
                test: Validity::Between {
                    at_least: min,
                    at_most: max,
                },
            },
            OldRule::Length { column, min, max } => Rule::Validity {
                column,
                test: Validity::Length {
                    at_least: min,
                    at_most: max,
                },
            },
            OldRule::Pattern { column, regex } => Rule::Validity {
                column,
                test: Validity::Pattern(regex),
            },
            OldRule::Allowed { column, values } => Rule::Validity {
                column,
                test: Validity::OneOf(values),
            },
        }
    }
}

impl Rule {
    /// A rule as recorded in a store's check results: the current form, or the form stores
    /// held before the dimensions. `None` when it is neither.
    pub fn from_stored(json: &serde_json::Value) -> Option<Rule> {
        if json.get("dimension").is_some() {
            return serde_json::from_value(json.clone()).ok();
        }
        serde_json::from_value::<OldRule>(json.clone())
            .ok()
            .map(Rule::from)
    }

    /// The rule in the dimension's words: "completeness: order_id, opened", "validity:
    /// parts_cost between -5000 and 5000".
    pub fn describe(&self) -> String {
        match self {
            Rule::Completeness { columns } => format!("completeness: {}", columns.join(", ")),
            Rule::Uniqueness { columns } => format!("uniqueness: {}", columns.join(", ")),
            Rule::Validity { column, test } => {
                let what = match test {
                    Validity::OneOf(v) => format!("one of {}", v.join(", ")),
                    Validity::Between { at_least, at_most } => bounds(at_least, at_most, ""),
                    Validity::Length { at_least, at_most } => match (at_least, at_most) {
                        (Some(a), Some(b)) if a == b => format!("length {a}"),
                        (a, b) => bounds(
                            &a.map(|x| x.to_string()),
                            &b.map(|x| x.to_string()),
                            "length ",
                        ),
                    },
                    Validity::Pattern(p) => format!("matches {p}"),
                };
                format!("validity: {column} {what}")
            }
        }
    }
}

fn bounds(at_least: &Option<String>, at_most: &Option<String>, what: &str) -> String {
    match (at_least, at_most) {
        (Some(a), Some(b)) => format!("{what}between {a} and {b}"),
        (Some(a), None) => format!("{what}at least {a}"),
        (None, Some(b)) => format!("{what}at most {b}"),
        (None, None) => format!("{what}unbounded"),
    }
}

/// A stored rule (as `show` and the report read it) in the dimension's words; a rule this
/// build cannot read is shown as its JSON.
pub fn describe_stored(json: &serde_json::Value) -> String {
    match Rule::from_stored(json) {
        Some(r) => r.describe(),
        None => canonical_json(json),
    }
}

/// A stored rule in the current form (an old store's rule converted), for JSON output; a rule
/// this build cannot read is returned as it is.
pub fn stored_as_current(json: serde_json::Value) -> serde_json::Value {
    match Rule::from_stored(&json) {
        Some(r) => serde_json::to_value(&r).unwrap_or(json),
        None => json,
    }
}

/// A rules file.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RuleFile {
    pub sluice_rules: u32,
    pub rules: Vec<Rule>,
}

/// The outcome of one rule.
#[derive(Debug, Clone, Serialize)]
pub struct CheckResult {
    pub rule: Rule,
    pub passed: bool,
    pub n_failing: u64,
    /// The first failing rows, 1-based data rows as `cat` shows them.
    pub first_failing: Vec<u64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct CheckReport {
    pub version: String,
    pub hash: String,
    pub passed: bool,
    pub results: Vec<CheckResult>,
}

/// Parses a rules file's text; errors name the line and column. A rules file of the old form
/// (`{"rules": [{"rule": ...}]}`, without `"sluice_rules"`) is refused with the advice to
/// convert it.
pub fn parse_rules(text: &str, path: &str) -> Result<Vec<Rule>> {
    // A first look at the form, skipping everything else without keeping it.
    #[derive(Deserialize)]
    struct Form {
        sluice_rules: Option<serde_json::Value>,
        rules: Option<serde::de::IgnoredAny>,
    }
    if let Ok(form) = serde_json::from_str::<Form>(text) {
        match form.sluice_rules {
            None if form.rules.is_some() => {
                return Err(Error::usage(format!(
                    "{path}: this is a rules file of the old form (rules named by \"rule\", no \"sluice_rules\"); convert it with `sluice upgrade {path} -o NEW.json`"
                )))
            }
            Some(serde_json::Value::Number(n)) if n.as_u64() != Some(RULES_FORMAT.into()) => {
                return Err(Error::usage(format!(
                    "{path}: rules format {n} is not one this build reads (it reads {RULES_FORMAT})"
                )))
            }
            _ => {}
        }
    }
    let f: RuleFile = serde_json::from_str(text).map_err(|e| {
        Error::usage(format!(
            "{path}: line {}, column {}: {}; the rules format is in schema/rules.schema.json and `sluice inspect --help`",
            e.line(),
            e.column(),
            e.to_string()
                .split(" at line")
                .next()
                .unwrap_or("malformed rules")
        ))
    })?;
    Ok(f.rules)
}

enum Compiled {
    NotBlank(Vec<usize>),
    Unique(Vec<usize>, HashMap<Vec<u8>, u64>),
    Range(usize, Option<String>, Option<String>),
    Length(usize, Option<u64>, Option<u64>),
    Pattern(usize, Regex),
    Allowed(usize, Vec<String>),
}

fn col(v: &Version, name: &str) -> Result<usize> {
    v.header.iter().position(|h| h == name).ok_or_else(|| {
        Error::usage(format!(
            "rule names column \"{name}\", which is not in {}; its columns are: {}",
            v.label(),
            v.header.join(", ")
        ))
    })
}

fn compile(rule: &Rule, v: &Version) -> Result<Compiled> {
    Ok(match rule {
        Rule::Completeness { columns } => {
            Compiled::NotBlank(columns.iter().map(|c| col(v, c)).collect::<Result<_>>()?)
        }
        Rule::Uniqueness { columns } => Compiled::Unique(
            columns.iter().map(|c| col(v, c)).collect::<Result<_>>()?,
            HashMap::new(),
        ),
        Rule::Validity { column, test } => {
            let c = col(v, column)?;
            match test {
                Validity::Between { at_least, at_most } => {
                    for b in [at_least, at_most].into_iter().flatten() {
                        if number_shape(b.as_bytes()).is_none() {
                            return Err(Error::usage(format!(
                                "the bound \"{b}\" is not a plain number"
                            )));
                        }
                    }
                    Compiled::Range(c, at_least.clone(), at_most.clone())
                }
                Validity::Length { at_least, at_most } => Compiled::Length(c, *at_least, *at_most),
                Validity::Pattern(regex) => Compiled::Pattern(
                    c,
                    Regex::new(&format!("^(?:{regex})$")).map_err(|e| {
                        Error::usage(format!(
                            "pattern \"{regex}\" is not a valid regular expression: {}",
                            e.to_string().lines().last().unwrap_or("")
                        ))
                    })?,
                ),
                Validity::OneOf(values) => Compiled::Allowed(c, values.clone()),
            }
        }
    })
}

/// Checks `rules` against version `reference` and records the results on it.
pub fn check(
    store: &mut Store,
    reference: &str,
    rules: &[Rule],
    hold_point: bool,
    agent: &Agent,
) -> Result<CheckReport> {
    let version = refs::resolve(&store.lineage, reference)?;
    if rules.is_empty() {
        return Err(Error::usage("the rules file holds no rule"));
    }
    let results = evaluate(store, &version, rules)?;
    let at = clock::now_rfc3339();
    let passed = results.iter().all(|r| r.passed);
    let label = version.label();
    let rows: Vec<(String, bool, u64, String)> = results
        .iter()
        .map(|r| {
            (
                canonical_json(&serde_json::to_value(&r.rule).unwrap_or_default()),
                r.passed,
                r.n_failing,
                canonical_json(&json!(r.first_failing)),
            )
        })
        .collect();
    store.write(|tx| {
        // The database column is still called `gate`: it records whether the inspection
        // ran as a plan's hold point.
        tx.insert_check_results(version.id, agent, &rows, hold_point, &at)?;
        tx.audit(
            agent,
            "check",
            &label,
            &json!({
                "version": version.hash,
                "rules": rows.len(),
                "failed": rows.iter().filter(|r| !r.1).count(),
                "hold_point": hold_point,
            }),
            &at,
        )
    })?;
    Ok(CheckReport {
        version: label,
        hash: version.hash.clone(),
        passed,
        results,
    })
}

/// Evaluates `rules` on `version` without recording anything (also on a version a revert is
/// about to record).
pub fn evaluate(store: &Store, version: &Version, rules: &[Rule]) -> Result<Vec<CheckResult>> {
    let mut compiled: Vec<Compiled> = rules
        .iter()
        .map(|r| compile(r, version))
        .collect::<Result<_>>()?;
    let null_tokens: Vec<Vec<u8>> = version
        .null_tokens
        .iter()
        .map(|t| t.as_bytes().to_vec())
        .collect();
    let blank = |v: &[u8]| v.is_empty() || null_tokens.iter().any(|t| t.as_slice() == v);
    let mut failing: Vec<(u64, Vec<u64>)> = vec![(0, Vec::new()); rules.len()];
    store.objects.each_row(version, |row, r| {
        for (k, c) in compiled.iter_mut().enumerate() {
            let fails = match c {
                Compiled::NotBlank(cols) => cols.iter().any(|&i| blank(r.field(i))),
                Compiled::Unique(cols, seen) => {
                    let mut key = Vec::new();
                    for &i in cols.iter() {
                        let f = r.field(i);
                        key.extend_from_slice(&(f.len() as u64).to_le_bytes());
                        key.extend_from_slice(f);
                    }
                    match seen.get(&key) {
                        Some(_) => true,
                        None => {
                            seen.insert(key, row);
                            false
                        }
                    }
                }
                Compiled::Range(i, min, max) => {
                    let v = r.field(*i);
                    !blank(v)
                        && (number_shape(v).is_none()
                            || min
                                .as_ref()
                                .is_some_and(|m| cmp_numbers(v, m.as_bytes()) == Ordering::Less)
                            || max
                                .as_ref()
                                .is_some_and(|m| cmp_numbers(v, m.as_bytes()) == Ordering::Greater))
                }
                Compiled::Length(i, min, max) => {
                    let v = r.field(*i);
                    let n = String::from_utf8_lossy(v).chars().count() as u64;
                    !blank(v) && (min.is_some_and(|m| n < m) || max.is_some_and(|m| n > m))
                }
                Compiled::Pattern(i, re) => {
                    let v = r.field(*i);
                    !blank(v) && !std::str::from_utf8(v).is_ok_and(|s| re.is_match(s))
                }
                Compiled::Allowed(i, values) => {
                    let v = r.field(*i);
                    !blank(v) && !values.iter().any(|a| a.as_bytes() == v)
                }
            };
            if fails {
                let f = &mut failing[k];
                f.0 += 1;
                if f.1.len() < FIRST_FAILING {
                    f.1.push(row + 1);
                }
            }
        }
        Ok(())
    })?;
    Ok(rules
        .iter()
        .zip(failing)
        .map(|(rule, (n, first))| CheckResult {
            rule: rule.clone(),
            passed: n == 0,
            n_failing: n,
            first_failing: first,
        })
        .collect())
}
