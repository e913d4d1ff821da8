//! Declared rules checked against a version: not blank, unique, range, length, pattern and
//! allowed values. Each result (pass or fail, how many rows fail, the first failing rows) is
//! recorded on the version with who checked and when, so that a report can show the checks a
//! version passed. Checking reads the version and never changes it.
//!
//! Rules file (JSON): `{"rules": [ {"rule": "not_blank", "columns": ["order_id"]}, ... ]}` with
//! rule kinds `not_blank {columns}`, `unique {columns}` (the combination must be unique),
//! `range {column, min?, max?}` (exact numeric comparison; a value that is not a number fails),
//! `length {column, min?, max?}` (in characters), `pattern {column, regex}` (the whole value
//! must match) and `allowed {column, values}`. Blank values pass every rule but `not_blank`.

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

#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "rule", rename_all = "snake_case", deny_unknown_fields)]
pub enum Rule {
    NotBlank {
        columns: Vec<String>,
    },
    Unique {
        columns: Vec<String>,
    },
    Range {
        column: String,
        min: Option<String>,
        max: Option<String>,
    },
    Length {
        column: String,
        min: Option<u64>,
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

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RuleFile {
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

/// Parses a rules file's text; errors name the line and column.
pub fn parse_rules(text: &str, path: &str) -> Result<Vec<Rule>> {
    let f: RuleFile = serde_json::from_str(text).map_err(|e| {
        Error::usage(format!(
            "{path}: line {}, column {}: {}; see `sluice inspect --help` for the rule kinds",
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
        Rule::NotBlank { columns } => {
            Compiled::NotBlank(columns.iter().map(|c| col(v, c)).collect::<Result<_>>()?)
        }
        Rule::Unique { columns } => Compiled::Unique(
            columns.iter().map(|c| col(v, c)).collect::<Result<_>>()?,
            HashMap::new(),
        ),
        Rule::Range { column, min, max } => {
            for b in [min, max].into_iter().flatten() {
                if number_shape(b.as_bytes()).is_none() {
                    return Err(Error::usage(format!(
                        "range bound \"{b}\" is not a plain number"
                    )));
                }
            }
            Compiled::Range(col(v, column)?, min.clone(), max.clone())
        }
        Rule::Length { column, min, max } => Compiled::Length(col(v, column)?, *min, *max),
        Rule::Pattern { column, regex } => Compiled::Pattern(
            col(v, column)?,
            Regex::new(&format!("^(?:{regex})$")).map_err(|e| {
                Error::usage(format!(
                    "pattern \"{regex}\" is not a valid regular expression: {}",
                    e.to_string().lines().last().unwrap_or("")
                ))
            })?,
        ),
        Rule::Allowed { column, values } => Compiled::Allowed(col(v, column)?, values.clone()),
    })
}

/// Checks `rules` against version `reference` and records the results on it.
pub fn check(
    store: &mut Store,
    reference: &str,
    rules: &[Rule],
    gate: bool,
    agent: &Agent,
) -> Result<CheckReport> {
    let version = refs::resolve(&store.lineage, reference)?;
    if rules.is_empty() {
        return Err(Error::usage("the rules file holds no rule"));
    }
    let mut compiled: Vec<Compiled> = rules
        .iter()
        .map(|r| compile(r, &version))
        .collect::<Result<_>>()?;
    let null_tokens: Vec<Vec<u8>> = version
        .null_tokens
        .iter()
        .map(|t| t.as_bytes().to_vec())
        .collect();
    let blank = |v: &[u8]| v.is_empty() || null_tokens.iter().any(|t| t.as_slice() == v);
    let mut failing: Vec<(u64, Vec<u64>)> = vec![(0, Vec::new()); rules.len()];
    crate::ops::apply::each_version_row(store, &version, |row, r| {
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
    let results: Vec<CheckResult> = rules
        .iter()
        .zip(failing)
        .map(|(rule, (n, first))| CheckResult {
            rule: rule.clone(),
            passed: n == 0,
            n_failing: n,
            first_failing: first,
        })
        .collect();
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
        tx.insert_check_results(version.id, agent, &rows, gate, &at)?;
        tx.audit(
            agent,
            "check",
            &label,
            &json!({
                "version": version.hash,
                "rules": rows.len(),
                "failed": rows.iter().filter(|r| !r.1).count(),
                "gate": gate,
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
