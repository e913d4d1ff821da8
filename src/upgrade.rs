//! Converting a plan or rules file of the old form to the current form (`sluice upgrade`).
//!
//! Old plan (`"sluice_plan": 1`): `description`, `inputs` (`name`, `file`, `why`, ...), and steps
//! `{"on", "apply": {"op", ...}, "why", "as"}` or `{"on", "check": [RULE..], "gate"}`.
//! Current plan (`"sluice_plan": 2`): `purpose`, `sources` (`dataset`, `file`, `reason`, ...),
//! and steps `{"dataset", "clean": OP, "settings": {...}, "save_as", "reason"}` or
//! `{"dataset", "inspect": [RULE..], "hold_point": true}`.
//! Old rules (`{"rules": [{"rule": "not_blank" | "unique" | "range" | "length" | "pattern" |
//! "allowed", ...}]}`) become `{"sluice_rules": 2, "rules": [...]}` with each rule named by its
//! data-quality dimension (completeness, uniqueness, validity; common practice, DAMA DMBOK).
//!
//! The conversion works on the JSON text alone, keeps every step, rule, reason and setting, and
//! refuses anything it does not know rather than drop it. The result is written with its keys in
//! reading order, one source, step or rule per line.

use serde_json::{Map, Value};

use crate::error::{ErrorKind, Result};

/// The current plan format version.
pub const PLAN_FORMAT: u64 = 2;
/// The current rules format version.
pub const RULES_FORMAT: u64 = 2;

/// Converts the text of an old plan or rules file to the current form.
pub fn upgrade(text: &str) -> Result<String> {
    let v: Value = serde_json::from_str(text).map_err(|e| {
        usage(format!(
            "not valid JSON ({e}); expected a plan or a rules file"
        ))
    })?;
    let Value::Object(top) = v else {
        return Err(usage(
            "expected a JSON object: a plan (\"sluice_plan\": 1) or a rules file ({\"rules\": [...]})",
        ));
    };
    if top.contains_key("sluice_plan") {
        match top["sluice_plan"].as_u64() {
            Some(1) => plan(&top),
            Some(PLAN_FORMAT) => Err(usage(
                "this plan is already in the current form; nothing to convert",
            )),
            _ => Err(usage(format!(
                "\"sluice_plan\": {} is not a plan form sluice knows (1 converts to {PLAN_FORMAT})",
                top["sluice_plan"]
            ))),
        }
    } else if top.contains_key("sluice_rules") {
        Err(usage(
            "this rules file is already in the current form; nothing to convert",
        ))
    } else if top.contains_key("rules") {
        only_keys(&top, &["rules"], "the rules file")?;
        let rules = rules(&top["rules"], "the rules file")?;
        let mut out = String::from("{\n");
        out.push_str(&format!("  \"sluice_rules\": {RULES_FORMAT},\n"));
        list(&mut out, "rules", &rules, true);
        out.push_str("}\n");
        Ok(out)
    } else {
        Err(usage(
            "neither a plan (\"sluice_plan\": 1) nor a rules file ({\"rules\": [...]}); nothing to convert",
        ))
    }
}

fn usage(msg: impl Into<String>) -> crate::Error {
    ErrorKind::Usage(msg.into()).into()
}

/// Refuses keys other than `allowed`, naming where.
fn only_keys(o: &Map<String, Value>, allowed: &[&str], at: &str) -> Result<()> {
    match o.keys().find(|k| !allowed.contains(&k.as_str())) {
        Some(k) => Err(usage(format!(
            "{at}: unknown field \"{k}\" (the old form has {}); fix it by hand, then convert again",
            allowed.join(", ")
        ))),
        None => Ok(()),
    }
}

/// An object with its keys in the order given (a list of pairs), written compactly.
type Ordered = Vec<(&'static str, Value)>;

fn compact(o: &Ordered) -> String {
    let parts: Vec<String> = o
        .iter()
        .map(|(k, v)| format!("{}: {}", Value::from(*k), compact_value(v)))
        .collect();
    format!("{{{}}}", parts.join(", "))
}

/// serde_json's compact text with a space after `:` and `,`, as the example plans are written.
fn compact_value(v: &Value) -> String {
    match v {
        Value::Array(a) => format!(
            "[{}]",
            a.iter().map(compact_value).collect::<Vec<_>>().join(", ")
        ),
        Value::Object(m) => format!(
            "{{{}}}",
            m.iter()
                .map(|(k, v)| format!("{}: {}", Value::from(k.as_str()), compact_value(v)))
                .collect::<Vec<_>>()
                .join(", ")
        ),
        other => other.to_string(),
    }
}

/// Writes `"name": [` then one item per line.
fn list(out: &mut String, name: &str, items: &[Ordered], last: bool) {
    out.push_str(&format!("  {}: [", Value::from(name)));
    if items.is_empty() {
        out.push(']');
    } else {
        out.push('\n');
        for (i, it) in items.iter().enumerate() {
            out.push_str("    ");
            out.push_str(&compact(it));
            if i + 1 < items.len() {
                out.push(',');
            }
            out.push('\n');
        }
        out.push_str("  ]");
    }
    out.push_str(if last { "\n" } else { ",\n" });
}

fn plan(top: &Map<String, Value>) -> Result<String> {
    only_keys(
        top,
        &["sluice_plan", "description", "inputs", "steps"],
        "the plan",
    )?;
    let mut sources = Vec::new();
    for (i, input) in top
        .get("inputs")
        .and_then(Value::as_array)
        .map(Vec::as_slice)
        .unwrap_or_default()
        .iter()
        .enumerate()
    {
        let at = format!("input {}", i + 1);
        let o = input
            .as_object()
            .ok_or_else(|| usage(format!("{at}: expected an object")))?;
        only_keys(
            o,
            &[
                "name",
                "file",
                "why",
                "key",
                "delimiter",
                "header",
                "encoding",
                "null_tokens",
                "sheet",
            ],
            &at,
        )?;
        let mut s: Ordered = Vec::new();
        for (old, new) in [
            ("name", "dataset"),
            ("file", "file"),
            ("key", "key"),
            ("delimiter", "delimiter"),
            ("header", "header"),
            ("encoding", "encoding"),
            ("null_tokens", "null_tokens"),
            ("sheet", "sheet"),
            ("why", "reason"),
        ] {
            if let Some(v) = o.get(old) {
                s.push((new, v.clone()));
            }
        }
        sources.push(s);
    }
    let mut steps = Vec::new();
    let old_steps = top
        .get("steps")
        .and_then(Value::as_array)
        .ok_or_else(|| usage("the plan: \"steps\" must be a list"))?;
    for (i, step) in old_steps.iter().enumerate() {
        let at = format!("step {}", i + 1);
        let o = step
            .as_object()
            .ok_or_else(|| usage(format!("{at}: expected an object")))?;
        only_keys(o, &["on", "apply", "check", "gate", "why", "as"], &at)?;
        let on = o
            .get("on")
            .cloned()
            .ok_or_else(|| usage(format!("{at}: no \"on\" (the dataset the step works on)")))?;
        let mut s: Ordered = vec![("dataset", on)];
        match (o.get("apply"), o.get("check")) {
            (Some(apply), None) => {
                let mut settings = apply
                    .as_object()
                    .cloned()
                    .ok_or_else(|| usage(format!("{at}: \"apply\" must be an object")))?;
                let op = settings
                    .remove("op")
                    .ok_or_else(|| usage(format!("{at}: \"apply\" names no \"op\"")))?;
                s.push(("clean", op));
                if !settings.is_empty() {
                    s.push(("settings", Value::Object(settings)));
                }
                if o.contains_key("gate") {
                    return Err(usage(format!(
                        "{at}: \"gate\" belongs to a check, not to \"apply\""
                    )));
                }
            }
            (None, Some(check)) => {
                let rules = rules(check, &at)?;
                s.push((
                    "inspect",
                    Value::Array(rules.iter().map(to_value).collect()),
                ));
                if o.get("gate").and_then(Value::as_bool).unwrap_or(false) {
                    s.push(("hold_point", Value::Bool(true)));
                }
            }
            _ => {
                return Err(usage(format!(
                    "{at}: expected one of \"apply\" or \"check\""
                )))
            }
        }
        if let Some(v) = o.get("as") {
            s.push(("save_as", v.clone()));
        }
        if let Some(v) = o.get("why") {
            s.push(("reason", v.clone()));
        }
        steps.push(s);
    }
    let mut out = String::from("{\n");
    out.push_str(&format!("  \"sluice_plan\": {PLAN_FORMAT},\n"));
    if let Some(d) = top.get("description") {
        out.push_str(&format!("  \"purpose\": {},\n", compact_value(d)));
    }
    list(&mut out, "sources", &sources, false);
    list(&mut out, "steps", &steps, true);
    out.push_str("}\n");
    Ok(out)
}

fn to_value(o: &Ordered) -> Value {
    // Inside a step the rules are written compactly; key order there follows serde_json's map.
    Value::Object(o.iter().map(|(k, v)| (k.to_string(), v.clone())).collect())
}

/// Old rules to rules named by their data-quality dimension.
fn rules(v: &Value, at: &str) -> Result<Vec<Ordered>> {
    let list = v
        .as_array()
        .ok_or_else(|| usage(format!("{at}: the rules must be a list")))?;
    list.iter()
        .enumerate()
        .map(|(i, r)| rule(r, &format!("{at}, rule {}", i + 1)))
        .collect()
}

fn rule(v: &Value, at: &str) -> Result<Ordered> {
    let o = v
        .as_object()
        .ok_or_else(|| usage(format!("{at}: expected an object")))?;
    let kind = o
        .get("rule")
        .and_then(Value::as_str)
        .ok_or_else(|| usage(format!("{at}: no \"rule\" naming its kind")))?;
    let get = |k: &str| o.get(k).cloned();
    let need =
        |k: &str| get(k).ok_or_else(|| usage(format!("{at}: a \"{kind}\" rule needs \"{k}\"")));
    let with_optional = |mut r: Ordered, pairs: &[(&str, &'static str)]| {
        for (old, new) in pairs {
            if let Some(v) = get(old) {
                r.push((new, v));
            }
        }
        r
    };
    Ok(match kind {
        "not_blank" => {
            only_keys(o, &["rule", "columns"], at)?;
            vec![("dimension", "completeness".into()), ("columns", need("columns")?)]
        }
        "unique" => {
            only_keys(o, &["rule", "columns"], at)?;
            vec![("dimension", "uniqueness".into()), ("columns", need("columns")?)]
        }
        "allowed" => {
            only_keys(o, &["rule", "column", "values"], at)?;
            vec![
                ("dimension", "validity".into()),
                ("column", need("column")?),
                ("one_of", need("values")?),
            ]
        }
        "range" => {
            only_keys(o, &["rule", "column", "min", "max"], at)?;
            with_optional(
                vec![("dimension", "validity".into()), ("column", need("column")?)],
                &[("min", "at_least"), ("max", "at_most")],
            )
        }
        "length" => {
            only_keys(o, &["rule", "column", "min", "max"], at)?;
            with_optional(
                vec![("dimension", "validity".into()), ("column", need("column")?)],
                &[("min", "length_at_least"), ("max", "length_at_most")],
            )
        }
        "pattern" => {
            only_keys(o, &["rule", "column", "regex"], at)?;
            vec![
                ("dimension", "validity".into()),
                ("column", need("column")?),
                ("pattern", need("regex")?),
            ]
        }
        other => {
            return Err(usage(format!(
                "{at}: unknown rule \"{other}\" (the old form has not_blank, unique, range, length, pattern, allowed)"
            )))
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parsed(text: &str) -> Value {
        serde_json::from_str(&upgrade(text).expect("converts")).expect("valid JSON")
    }

    #[test]
    fn a_plan_keeps_every_step_reason_and_setting() {
        let old = r#"{"sluice_plan": 1, "description": "Q3 orders",
          "inputs": [{"name": "quillby_orders", "file": "exports/q.csv", "key": ["order_id"], "why": "Q3 export"}],
          "steps": [
            {"on": "quillby_orders", "apply": {"op": "trim", "inner": true}, "why": "padded names"},
            {"on": "quillby_orders", "apply": {"op": "append", "other": "oxwater_orders"}, "as": "all_orders", "why": "one table"},
            {"on": "all_orders", "apply": {"op": "dedupe"}, "why": "exported twice"},
            {"on": "all_orders", "check": [{"rule": "unique", "columns": ["order_id"]}], "gate": true}
          ]}"#;
        let new = parsed(old);
        assert_eq!(new["sluice_plan"], 2);
        assert_eq!(new["purpose"], "Q3 orders");
        assert_eq!(
            new["sources"][0],
            serde_json::json!({"dataset": "quillby_orders", "file": "exports/q.csv", "key": ["order_id"], "reason": "Q3 export"})
        );
        assert_eq!(
            new["steps"][0],
            serde_json::json!({"dataset": "quillby_orders", "clean": "trim", "settings": {"inner": true}, "reason": "padded names"})
        );
        assert_eq!(
            new["steps"][1],
            serde_json::json!({"dataset": "quillby_orders", "clean": "append", "settings": {"other": "oxwater_orders"}, "save_as": "all_orders", "reason": "one table"})
        );
        // An operation without settings has none written.
        assert_eq!(
            new["steps"][2],
            serde_json::json!({"dataset": "all_orders", "clean": "dedupe", "reason": "exported twice"})
        );
        assert_eq!(
            new["steps"][3],
            serde_json::json!({"dataset": "all_orders", "inspect": [{"dimension": "uniqueness", "columns": ["order_id"]}], "hold_point": true})
        );
    }

    #[test]
    fn the_written_plan_reads_in_the_order_of_the_form() {
        let text = upgrade(
            r#"{"sluice_plan": 1, "steps": [{"on": "a", "apply": {"op": "trim"}, "why": "w", "as": "b"}]}"#,
        )
        .unwrap();
        let line = text.lines().find(|l| l.contains("\"clean\"")).unwrap();
        let at = |k: &str| line.find(k).unwrap();
        assert!(at("\"dataset\"") < at("\"clean\""));
        assert!(at("\"clean\"") < at("\"save_as\""));
        assert!(at("\"save_as\"") < at("\"reason\""));
    }

    #[test]
    fn every_old_rule_kind_has_its_dimension() {
        let old = r#"{"rules": [
            {"rule": "not_blank", "columns": ["order_id"]},
            {"rule": "unique", "columns": ["order_id"]},
            {"rule": "range", "column": "parts_cost", "min": "0", "max": "5000"},
            {"rule": "range", "column": "parts_cost", "min": "0"},
            {"rule": "length", "column": "order_id", "min": 5, "max": 5},
            {"rule": "pattern", "column": "email", "regex": "[^@ ]+@[^@ ]+"},
            {"rule": "allowed", "column": "status", "values": ["done", "open"]}
        ]}"#;
        let new = parsed(old);
        assert_eq!(new["sluice_rules"], 2);
        let expected = serde_json::json!([
            {"dimension": "completeness", "columns": ["order_id"]},
            {"dimension": "uniqueness", "columns": ["order_id"]},
            {"dimension": "validity", "column": "parts_cost", "at_least": "0", "at_most": "5000"},
            {"dimension": "validity", "column": "parts_cost", "at_least": "0"},
            {"dimension": "validity", "column": "order_id", "length_at_least": 5, "length_at_most": 5},
            {"dimension": "validity", "column": "email", "pattern": "[^@ ]+@[^@ ]+"},
            {"dimension": "validity", "column": "status", "one_of": ["done", "open"]}
        ]);
        assert_eq!(new["rules"], expected);
    }

    #[test]
    fn the_example_plan_converts_whole() {
        let text = include_str!("../examples/plans/three_rivers_q3.json");
        let old: Value = serde_json::from_str(text).unwrap();
        if old["sluice_plan"] == 1 {
            let new = parsed(text);
            assert_eq!(
                new["steps"].as_array().unwrap().len(),
                old["steps"].as_array().unwrap().len()
            );
            assert_eq!(
                new["sources"].as_array().unwrap().len(),
                old["inputs"].as_array().unwrap().len()
            );
        }
    }

    #[test]
    fn what_it_does_not_know_is_refused_not_dropped() {
        for (text, says) in [
            (
                r#"{"rules": [{"rule": "sorted", "column": "a"}]}"#,
                "rule 1: unknown rule \"sorted\"",
            ),
            (
                r#"{"rules": [{"rule": "unique", "columns": ["a"], "note": "x"}]}"#,
                "unknown field \"note\"",
            ),
            (
                r#"{"sluice_plan": 1, "steps": [{"on": "a", "why": "w"}]}"#,
                "step 1: expected one of",
            ),
            (
                r#"{"sluice_plan": 1, "steps": [{"on": "a", "apply": {"op": "trim"}, "gate": true}]}"#,
                "step 1: \"gate\"",
            ),
            (
                r#"{"sluice_plan": 2, "steps": []}"#,
                "already in the current form",
            ),
            (
                r#"{"sluice_rules": 2, "rules": []}"#,
                "already in the current form",
            ),
            (r#"[1, 2]"#, "expected a JSON object"),
            (r#"{"plan": 1}"#, "neither a plan"),
            ("not json", "not valid JSON"),
        ] {
            let err = upgrade(text).expect_err(text).to_string();
            assert!(err.contains(says), "{text}: {err}");
        }
    }
}
