//! Converting plans and rules files of the form before `"sluice_plan": 2` and
//! `"sluice_rules": 2` into the current forms: an old plan's `inputs` (`name`, `why`) become
//! `sources` (`dataset`, `reason`), its steps' `on`/`apply`/`check`/`gate`/`why`/`as` become
//! `dataset`/`clean`+`settings`/`inspect`/`hold_point`/`reason`/`save_as`, and rules named by
//! `"rule"` become rules by data-quality dimension. The result is pretty JSON in a fixed
//! order, so converting the same file twice gives the same bytes.

use serde::Deserialize;
use serde_json::{Map, Value};

use serde::Serialize;

use super::{operation_from, PlanSource, StepText, PLAN_FORMAT};
use crate::checks::{OldRule, Rule, RULES_FORMAT};
use crate::error::{Error, Result};

/// A plan of the old form.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct OldPlan {
    sluice_plan: u32,
    #[serde(default)]
    description: Option<String>,
    #[serde(default)]
    inputs: Vec<OldInput>,
    steps: Vec<OldStep>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct OldInput {
    name: String,
    #[serde(default)]
    file: Option<String>,
    #[serde(default)]
    why: Option<String>,
    #[serde(default)]
    key: Option<Vec<String>>,
    #[serde(default)]
    delimiter: Option<String>,
    #[serde(default = "super::yes")]
    header: bool,
    #[serde(default)]
    encoding: Option<String>,
    #[serde(default)]
    null_tokens: Vec<String>,
    #[serde(default)]
    sheet: Option<String>,
    #[serde(default)]
    hash: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct OldStep {
    on: String,
    #[serde(default)]
    apply: Option<Map<String, Value>>,
    #[serde(default)]
    check: Option<Vec<OldRule>>,
    #[serde(default)]
    gate: bool,
    #[serde(default)]
    why: Option<String>,
    #[serde(default, rename = "as")]
    output: Option<String>,
}

/// A plan of the current form as the converter writes it: each step's settings as the old
/// plan wrote them (only the fields it gave), checked by reading them as the operation.
#[derive(Serialize)]
struct PlanText {
    sluice_plan: u32,
    #[serde(skip_serializing_if = "Option::is_none")]
    purpose: Option<String>,
    sources: Vec<PlanSource>,
    steps: Vec<StepText>,
}

/// A rules file of the old form.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct OldRules {
    rules: Vec<OldRule>,
}

/// Converts the text of an old plan (`"sluice_plan": 1`) or an old rules file (`{"rules":
/// [{"rule": ...}]}`) into the current form, as pretty JSON ending in a line break. A file
/// already of the current form, or of neither kind, is refused with what was found.
pub fn upgrade(text: &str) -> Result<String> {
    let value: Value = serde_json::from_str(text).map_err(|e| {
        Error::usage(format!(
            "line {}, column {}: not JSON ({}); expected a plan or a rules file",
            e.line(),
            e.column(),
            e.to_string()
                .split(" at line")
                .next()
                .unwrap_or("malformed")
        ))
    })?;
    let Value::Object(top) = &value else {
        return Err(Error::usage(
            "expected a plan or a rules file (a JSON object), found another JSON value",
        ));
    };
    let positioned = |what: &str, e: serde_json::Error| {
        Error::usage(format!(
            "line {}, column {}: {}; the file looks like {what} of the old form but cannot be read as one",
            e.line(),
            e.column(),
            e.to_string().split(" at line").next().unwrap_or("malformed")
        ))
    };
    let mut out = if let Some(form) = top.get("sluice_plan") {
        if form.as_u64() == Some(PLAN_FORMAT.into()) {
            return Err(Error::usage(
                "this plan is already of the current form (\"sluice_plan\": 2); nothing to convert",
            ));
        }
        let old: OldPlan = serde_json::from_str(text).map_err(|e| positioned("a plan", e))?;
        if old.sluice_plan != 1 {
            return Err(Error::usage(format!(
                "plan format {} is not one this build converts (it converts 1)",
                old.sluice_plan
            )));
        }
        pretty(&plan_of(old)?)?
    } else if let Some(form) = top.get("sluice_rules") {
        return Err(Error::usage(
            if form.as_u64() == Some(RULES_FORMAT.into()) {
                "this rules file is already of the current form (\"sluice_rules\": 2); nothing to convert".to_string()
            } else {
                format!("rules format {form} is not one this build converts")
            },
        ));
    } else if top.contains_key("rules") {
        let old: OldRules =
            serde_json::from_str(text).map_err(|e| positioned("a rules file", e))?;
        let rules: Vec<Rule> = old.rules.into_iter().map(Rule::from).collect();
        let rules = pretty(&rules)?.replace('\n', "\n  ");
        format!("{{\n  \"sluice_rules\": {RULES_FORMAT},\n  \"rules\": {rules}\n}}")
    } else {
        return Err(Error::usage(
            "expected a plan (with \"sluice_plan\") or a rules file (with \"rules\"); found neither",
        ));
    };
    out.push('\n');
    Ok(out)
}

fn plan_of(old: OldPlan) -> Result<PlanText> {
    let sources = old
        .inputs
        .into_iter()
        .map(|i| PlanSource {
            dataset: i.name,
            file: i.file,
            key: i.key,
            reason: i.why,
            delimiter: i.delimiter,
            header: i.header,
            encoding: i.encoding,
            null_tokens: i.null_tokens,
            sheet: i.sheet,
            hash: i.hash,
            recorded: None,
        })
        .collect();
    let mut steps = Vec::new();
    for (n, s) in old.steps.into_iter().enumerate() {
        let (clean, settings) = match s.apply {
            Some(mut m) => {
                let Some(Value::String(name)) = m.remove("op") else {
                    return Err(Error::usage(format!(
                        "step {}: \"apply\" names no operation in \"op\"",
                        n + 1
                    )));
                };
                operation_from(&name, Some(m.clone()))
                    .map_err(|e| Error::usage(format!("step {}: {e}", n + 1)))?;
                (Some(name), (!m.is_empty()).then_some(m))
            }
            None => (None, None),
        };
        steps.push(StepText {
            dataset: s.on,
            clean,
            settings,
            save_as: s.output,
            inspect: s
                .check
                .map(|rules| rules.into_iter().map(Rule::from).collect()),
            hold_point: s.gate,
            reason: s.why,
        });
    }
    Ok(PlanText {
        sluice_plan: PLAN_FORMAT,
        purpose: old.description,
        sources,
        steps,
    })
}

fn pretty(v: &impl serde::Serialize) -> Result<String> {
    serde_json::to_string_pretty(v)
        .map_err(|e| Error::usage(format!("the converted file cannot be written as JSON: {e}")))
}

#[cfg(test)]
mod tests {
    use super::*;

    const OLD_DEMO: &str = include_str!("../../tests/fixtures/plans/three_rivers_q3.form1.json");
    const NEW_DEMO: &str = include_str!("../../tests/golden/three_rivers_q3.form2.json");

    #[test]
    fn the_old_demo_plan_becomes_the_golden_new_one() {
        let converted = upgrade(OLD_DEMO).unwrap();
        assert_eq!(converted, NEW_DEMO);
        // It reads as a plan, with the old plan's steps and sources in order.
        let plan = crate::plan::parse(&converted, "new.json").unwrap();
        assert_eq!(plan.sources.len(), 5);
        assert_eq!(plan.steps.len(), 22);
        assert!(plan.steps[19].hold_point);
        assert_eq!(plan.steps[19].inspect.as_ref().map(Vec::len), Some(5));
        // Converting is deterministic, and a converted file is not converted again.
        assert_eq!(upgrade(OLD_DEMO).unwrap(), converted);
        let again = upgrade(&converted).unwrap_err().to_string();
        assert!(again.contains("already of the current form"), "{again}");
    }

    #[test]
    fn old_rules_become_rules_by_dimension() {
        let old = r#"{"rules": [
            {"rule": "not_blank", "columns": ["a", "b"]},
            {"rule": "unique", "columns": ["a"]},
            {"rule": "range", "column": "x", "min": "0"},
            {"rule": "length", "column": "z", "min": 5, "max": 5},
            {"rule": "pattern", "column": "e", "regex": "[^@]+@[^@]+"},
            {"rule": "allowed", "column": "s", "values": ["done", "open"]}
        ]}"#;
        let new = upgrade(old).unwrap();
        let v: Value = serde_json::from_str(&new).unwrap();
        assert_eq!(v["sluice_rules"], 2);
        let rules: Vec<Rule> = serde_json::from_value(v["rules"].clone()).unwrap();
        let words: Vec<String> = rules.iter().map(Rule::describe).collect();
        assert_eq!(
            words,
            [
                "completeness: a, b",
                "uniqueness: a",
                "validity: x at least 0",
                "validity: z length 5",
                "validity: e matches [^@]+@[^@]+",
                "validity: s one of done, open",
            ]
        );
        assert!(new.starts_with("{\n  \"sluice_rules\": 2,\n  \"rules\": [\n"));
        assert!(new.ends_with("\n  ]\n}\n"));
    }

    #[test]
    fn files_of_neither_kind_are_refused_with_what_was_found() {
        for (text, expected) in [
            ("[1, 2]", "found another JSON value"),
            ("{\"colour\": 1}", "found neither"),
            ("{\"rules\": [{\"rule\": \"shiny\"}]}", "line 1, column"),
            ("{\"sluice_plan\": 7, \"steps\": []}", "plan format 7"),
            ("{\"sluice_rules\": 2, \"rules\": []}", "already of the current form"),
            (
                "{\"sluice_plan\": 1, \"steps\": [{\"on\": \"o\", \"apply\": {\"op\": \"sparkle\"}}]}",
                "step 1: \"clean\": \"sparkle\" is not an operation",
            ),
            ("{\"sluice_plan\": 1", "not JSON"),
        ] {
            let err = upgrade(text).unwrap_err().to_string();
            assert!(err.contains(expected), "{text}: {err}");
        }
    }
}
