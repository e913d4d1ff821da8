//! Plans: `sluice run` records each step as `apply` and `check` would, stops at the first
//! failure keeping what came before, and `sluice export --format plan` writes a plan that remakes
//! a version byte for byte. Plan files are checked against `schema/plan.schema.json` with the
//! `jsonschema` crate (a general-purpose JSON Schema validator from the crate registry, draft
//! 2020-12).

mod common;

use common::{assert_contains, Sandbox};
use serde_json::{json, Value};
use sluice::ops::summarize::{AggFunc, Aggregate};
use sluice::ops::{CaseTo, KeepWhich, OnError, Operation, Renaming};

fn schema() -> jsonschema::Validator {
    let text = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("schema/plan.schema.json"),
    )
    .unwrap();
    let schema: Value = serde_json::from_str(&text).unwrap();
    jsonschema::draft202012::new(&schema).expect("the plan schema is itself valid")
}

fn assert_valid(v: &jsonschema::Validator, plan: &Value, what: &str) {
    let errors: Vec<String> = v
        .iter_errors(plan)
        .map(|e| format!("{} at {}", e, e.instance_path()))
        .collect();
    assert!(
        errors.is_empty(),
        "{what} does not validate:\n{}",
        errors.join("\n")
    );
}

fn hash_of(s: &Sandbox, reference: &str) -> String {
    s.json(&["about", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string()
}

#[test]
fn the_demo_plan_and_its_export_validate_against_the_schema() {
    let v = schema();
    let d = Sandbox::with_demo();
    let demo: Value =
        serde_json::from_str(&std::fs::read_to_string(d.path().join("q3_cleaning.json")).unwrap())
            .unwrap();
    assert_valid(&v, &demo, "the demo plan");
    d.ok(&[
        "export",
        "q3_by_shop",
        "--format",
        "plan",
        "-o",
        "exported.json",
    ]);
    let exported: Value =
        serde_json::from_str(&std::fs::read_to_string(d.path().join("exported.json")).unwrap())
            .unwrap();
    assert_valid(&v, &exported, "the exported plan");
    // The export has the demo plan's inputs and the steps that led to q3_by_shop (all but the
    // plan's last, the per-shop totals made from the same input), every parameter written out.
    assert_eq!(exported["inputs"].as_array().unwrap().len(), 5);
    let demo_steps = demo["steps"].as_array().unwrap();
    assert_eq!(demo_steps.last().unwrap()["as"], "q3_shop_totals");
    assert_eq!(
        exported["steps"].as_array().unwrap().len(),
        demo_steps.len() - 1
    );
    assert_eq!(exported["inputs"][0]["file"], "exports/quillby_2026q3.csv");
    assert_eq!(exported["steps"][0]["apply"]["inner"], true);
    assert_eq!(exported["steps"][0]["apply"]["columns"], Value::Null);
    let gate = exported["steps"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s.get("check").is_some())
        .expect("the gate is exported");
    assert_eq!(gate["gate"], true);
    assert_eq!(gate["check"].as_array().unwrap().len(), 5);
}

#[test]
fn every_operation_and_rule_as_recorded_validates_against_the_schema() {
    // One value of each kind, serialised as a step records it (every field written out), so the
    // schema cannot fall behind the operations.
    let s = |v: &[&str]| v.iter().map(|x| x.to_string()).collect::<Vec<_>>();
    let ops = vec![
        Operation::Trim {
            columns: None,
            inner: true,
        },
        Operation::Case {
            columns: Some(s(&["email"])),
            to: CaseTo::Title,
        },
        Operation::Dedupe {
            key: Some(s(&["id"])),
            keep: KeepWhich::Last,
        },
        Operation::Replace {
            columns: None,
            find: ",".into(),
            with: ".".into(),
            regex: false,
        },
        Operation::Map {
            columns: s(&["service"]),
            table: "labels".into(),
            from: Some("label".into()),
            to: None,
            unmatched: OnError::Blank,
        },
        Operation::Lookup {
            table: "staff".into(),
            on: s(&["technician"]),
            table_on: Some(s(&["name"])),
            take: s(&["shop"]),
            unmatched_fail: true,
        },
        Operation::Append {
            other: "oxwater".into(),
            map: vec![Renaming {
                from: "order no".into(),
                to: "order_id".into(),
            }],
        },
        Operation::Fill {
            columns: s(&["notes"]),
            value: Some("none".into()),
            from: None,
        },
        Operation::Number {
            columns: s(&["parts"]),
            decimal_comma: true,
            on_error: OnError::Keep,
        },
        Operation::Date {
            columns: s(&["opened"]),
            order: Some(sluice::ops::date::DateOrder::Dmy),
            on_error: OnError::Fail,
        },
        Operation::Date {
            columns: s(&["opened"]),
            order: None,
            on_error: OnError::Fail,
        },
        Operation::Split {
            column: "customer".into(),
            on: " ".into(),
            into: s(&["given", "family"]),
        },
        Operation::Combine {
            columns: s(&["given", "family"]),
            with: " ".into(),
            into: "customer".into(),
        },
        Operation::Extract {
            column: "opened".into(),
            into: "month".into(),
            from: Some(1),
            len: Some(7),
            regex: None,
        },
        Operation::Rename {
            columns: vec![Renaming {
                from: "a".into(),
                to: "b".into(),
            }],
        },
        Operation::Select {
            columns: s(&["a", "b"]),
        },
        Operation::Summarize {
            by: s(&["shop"]),
            aggregates: vec![Aggregate {
                func: AggFunc::Mean,
                column: "parts".into(),
            }],
        },
        Operation::KeepRows {
            predicate: "status = 'done'".into(),
        },
        Operation::DropRows {
            predicate: "status = 'test'".into(),
        },
    ];
    let rules: Value = serde_json::from_str(
        r#"[{"rule": "not_blank", "columns": ["id"]}, {"rule": "unique", "columns": ["id"]},
            {"rule": "range", "column": "x", "min": "0", "max": null},
            {"rule": "length", "column": "x", "min": 1, "max": 5},
            {"rule": "pattern", "column": "x", "regex": "^a"},
            {"rule": "allowed", "column": "x", "values": ["a"]}]"#,
    )
    .unwrap();
    let rules: Vec<sluice::checks::Rule> = serde_json::from_value(rules).unwrap();
    let mut steps: Vec<Value> = ops
        .iter()
        .map(|op| json!({"on": "orders", "apply": op, "why": "every kind"}))
        .collect();
    steps.push(json!({"on": "orders", "check": rules, "gate": true}));
    let plan =
        json!({"sluice_plan": 1, "inputs": [{"name": "orders", "file": "o.csv"}], "steps": steps});
    assert_valid(&schema(), &plan, "a plan with every operation and rule");
}

#[test]
fn malformed_plans_are_refused_by_the_schema_and_by_sluice_alike() {
    let v = schema();
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1, Ada\n");
    let before = s.snapshot();
    for (plan, expected) in [
        (
            r#"{"sluice_plan": 1, "steps": [{"on": "o", "apply": {"op": "trim", "inner": true, "innr": 1}, "why": "x"}]}"#,
            "line 1, column",
        ),
        (
            r#"{"sluice_plan": 1, "steps": [{"on": "o", "apply": {"op": "trim"}}]}"#,
            "step 1: an \"apply\" step needs \"why\"",
        ),
        (
            r#"{"sluice_plan": 1, "steps": [{"on": "o", "apply": {"op": "trim"}, "why": "x",
                "check": [{"rule": "unique", "columns": ["id"]}]}]}"#,
            "not both",
        ),
        (
            r#"{"sluice_plan": 1, "steps": [{"on": "o", "apply": {"op": "sparkle"}, "why": "x"}]}"#,
            "unknown variant `sparkle`",
        ),
        (
            r#"{"sluice_plan": 1, "steps": [{"on": "o", "check": [{"rule": "unique", "columns": ["id"]}], "as": "p"}]}"#,
            "takes no \"as\"",
        ),
        (
            r#"{"sluice_plan": 1, "steps": []}"#,
            "the plan has no steps",
        ),
        (
            r#"{"sluice_plan": 1,
 "inputs": [{"name": "o", "file": "o.csv", "colour": "red"}],
 "steps": [{"on": "o", "apply": {"op": "trim"}, "why": "x"}]}"#,
            "line 2, column",
        ),
    ] {
        let parsed: Value = serde_json::from_str(plan).unwrap();
        assert!(
            !v.is_valid(&parsed),
            "the schema accepts a plan sluice refuses: {plan}"
        );
        s.file("p.json", plan);
        let err = s.fails(2, &["run", "p.json"]);
        assert_contains(&err, expected);
        assert_contains(&err, "p.json");
    }
    assert_eq!(before, s.snapshot(), "a refused plan records nothing");
}

#[test]
fn an_exported_plan_remakes_the_version_byte_for_byte_in_a_fresh_store() {
    let d = Sandbox::with_demo();
    d.ok(&[
        "export",
        "q3_by_shop",
        "--format",
        "plan",
        "-o",
        "remake.json",
    ]);
    let fresh = Sandbox::with_store();
    std::fs::create_dir(fresh.path().join("exports")).unwrap();
    for f in std::fs::read_dir(d.path().join("exports")).unwrap() {
        let f = f.unwrap();
        std::fs::copy(f.path(), fresh.path().join("exports").join(f.file_name())).unwrap();
    }
    std::fs::copy(
        d.path().join("remake.json"),
        fresh.path().join("remake.json"),
    )
    .unwrap();
    let out = fresh.ok(&["run", "remake.json"]);
    assert_contains(&out, "done: every step recorded");
    for r in [
        "q3_by_shop",
        "all_orders",
        "quillby_orders",
        "oxwater_orders",
    ] {
        assert_eq!(hash_of(&fresh, r), hash_of(&d, r), "{r}");
    }
    assert_eq!(
        fresh.run(&["retrieve", "q3_by_shop"]).raw_stdout,
        d.run(&["retrieve", "q3_by_shop"]).raw_stdout
    );
    assert_contains(&fresh.ok(&["verify"]), "intact");
}

#[test]
fn inputs_bind_to_stored_versions_or_to_new_files() {
    let d = Sandbox::with_demo();
    let cleaned = hash_of(&d, "quillby_orders");
    d.file(
        "quillby_only.json",
        r#"{"sluice_plan": 1,
            "inputs": [{"name": "quillby_orders", "file": "exports/quillby_2026q3.csv"}],
            "steps": [
              {"on": "quillby_orders", "apply": {"op": "trim", "inner": true}, "why": "spaces"},
              {"on": "quillby_orders", "apply": {"op": "number", "columns": ["parts_cost"]}, "why": "amounts"},
              {"on": "quillby_orders", "apply": {"op": "date", "columns": ["opened"], "order": "mdy"}, "why": "dates"}
            ]}"#,
    );
    // Bound to the raw version already in the store: nothing is taken in, and the steps give
    // the bytes the demo's run gave.
    let out = d.ok(&[
        "run",
        "quillby_only.json",
        "--input",
        "quillby_orders=quillby_orders:v1",
    ]);
    assert_contains(&out, "input quillby_orders: bound to quillby_orders:v1");
    assert_eq!(hash_of(&d, "quillby_orders"), cleaned);

    // Next quarter's export, given on the command line instead of the plan's file: the same
    // steps run on other data, and the JSON says which inputs differ from an exported plan.
    let mut q4 = Vec::new();
    sluice::demo::work_orders(&mut q4, sluice::demo::Till::Quillby, 90, 52_000).unwrap();
    d.file("exports/quillby_2026q4.csv", &q4);
    d.ok(&[
        "export",
        "quillby_orders",
        "--format",
        "plan",
        "-o",
        "quillby_export.json",
    ]);
    let report = d.json(&[
        "run",
        "quillby_export.json",
        "--input",
        "quillby_orders=exports/quillby_2026q4.csv",
        "--json",
    ]);
    assert_eq!(report["completed"], true);
    let done = report["done"].as_array().unwrap();
    assert_eq!(done[0]["kind"], "input");
    assert_eq!(done[0]["recorded"], true);
    assert!(done[0]["differs_from_plan"].is_string());
    assert_eq!(done.len(), 4);
    assert!(done[1..]
        .iter()
        .all(|s| s["kind"] == "clean" && s["recorded"] == true));
    let latest = d.json(&["about", "quillby_orders", "--json"]);
    assert_eq!(latest["version"]["n_rows"].as_u64().unwrap(), 90);

    // An input the plan does not have, or a file that is not there: refused before anything.
    let before = d.snapshot();
    let err = d.fails(2, &["run", "quillby_only.json", "--input", "oxwater=x.csv"]);
    assert_contains(&err, "the plan has no input named \"oxwater\"");
    assert_contains(&err, "its inputs are: quillby_orders");
    std::fs::remove_file(d.path().join("exports/quillby_2026q3.csv")).unwrap();
    let err = d.fails(2, &["run", "quillby_only.json"]);
    assert_contains(&err, "exports/quillby_2026q3.csv is not a file");
    assert_eq!(before, d.snapshot());
}

#[test]
fn a_failing_step_stops_the_run_and_keeps_the_steps_before_it() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id,amount,status\n1, 12.50 ,done\n2,abc,done\n3,7,test\n",
    );
    s.file(
        "p.json",
        r#"{"sluice_plan": 1,
            "inputs": [{"name": "orders", "file": "o.csv"}],
            "steps": [
              {"on": "orders", "apply": {"op": "trim"}, "why": "spaces"},
              {"on": "orders", "apply": {"op": "number", "columns": ["amount"]}, "why": "amounts"},
              {"on": "orders", "apply": {"op": "drop", "predicate": "status = 'test'"}, "why": "tests"}
            ]}"#,
    );
    let r = s.run(&["run", "p.json"]);
    assert_eq!(r.code, 1, "an amount that cannot be read is a data failure");
    // Steps are called by their store-wide number (the intake is step 1); plan entries by
    // their place in the plan.
    assert_contains(&r.stdout, "step 2: recorded orders:v2");
    assert_contains(
        &r.stderr,
        "the run stopped at plan entry 2 (number on orders)",
    );
    assert_contains(
        &r.stderr,
        "the store keeps what came before: orders:v1, orders:v2",
    );
    assert_contains(&r.stderr, "abc");
    let log = s.json(&["timeline", "--dataset", "orders", "--json"]);
    assert_eq!(log.as_array().unwrap().len(), 2, "the intake and the trim");
    assert_contains(&s.ok(&["verify"]), "intact");

    // A step on a column that is not there is caught when it runs, with the same account.
    s.file(
        "q.json",
        r#"{"sluice_plan": 1,
            "steps": [
              {"on": "orders", "apply": {"op": "case", "columns": ["status"], "to": "upper"}, "why": "shout"},
              {"on": "orders", "apply": {"op": "case", "columns": ["colour"], "to": "upper"}, "why": "shout"}
            ]}"#,
    );
    let err = s.fails(2, &["run", "q.json"]);
    assert_contains(&err, "plan entry 2 (case on orders)");
    assert_contains(&err, "column \"colour\" is not in orders:v3");
}

#[test]
fn a_gate_that_fails_stops_the_run_and_a_plain_check_does_not() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,done\n1,done \n2,\n");
    let plan = |gate: bool| {
        format!(
            r#"{{"sluice_plan": 1,
            "inputs": [{{"name": "orders", "file": "o.csv"}}],
            "steps": [
              {{"on": "orders", "apply": {{"op": "trim"}}, "why": "spaces"}},
              {{"on": "orders", "check": [{{"rule": "unique", "columns": ["id"]}}, {{"rule": "not_blank", "columns": ["id"]}}], "gate": {gate}}},
              {{"on": "orders", "apply": {{"op": "dedupe"}}, "why": "twice"}}
            ]}}"#
        )
    };
    s.file("plain.json", plan(false));
    let r = s.run(&["run", "plain.json"]);
    assert_eq!(r.code, 1, "a failing check is reported in the exit code");
    assert_contains(
        &r.stdout,
        "plan entry 2: inspection on orders:v2: 1 of 2 rules failed",
    );
    assert_contains(&r.stdout, "unique id fails on 1 row");
    // The dedupe is the store's third step: the intake, the trim, then it.
    assert_contains(&r.stdout, "step 3: recorded orders:v3");

    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,done\n1,done \n2,\n");
    s.file("gated.json", plan(true));
    let r = s.run(&["run", "gated.json"]);
    assert_eq!(r.code, 1);
    assert_contains(
        &r.stderr,
        "the run stopped at plan entry 2 (inspection at a hold point on orders)",
    );
    assert_contains(&r.stderr, "the gate on orders:v2 failed: unique id (1 row)");
    let shown = s.json(&["about", "orders:v2", "--json"]);
    let checks = shown["checks"].as_array().unwrap();
    assert_eq!(checks.len(), 2);
    assert!(checks.iter().all(|c| c["gate"] == true));
    assert_eq!(
        s.json(&["timeline", "--dataset", "orders", "--json"])
            .as_array()
            .unwrap()
            .len(),
        2,
        "the dedupe after the gate did not run"
    );
    // The export writes the gate back as a gate.
    let exported: Value = serde_json::from_str(&s.ok(&["export", "orders", "--format", "plan"]))
        .expect("a plan on standard output");
    assert_eq!(exported["steps"][1]["gate"], true);
}

#[test]
fn histories_a_plan_cannot_express_are_refused_with_the_reason() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1, Ada\n2,Bram\n");
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    s.ok(&["clean", "orders", "trim", "--why", "spaces"]);
    // orders:v1 stacked under orders:v2: the plan would need two versions of one name at once.
    s.ok(&[
        "clean",
        "orders",
        "append",
        "--other",
        "orders:v1",
        "--as",
        "both",
        "--why",
        "before and after",
    ]);
    let err = s.fails(2, &["export", "both", "--format", "plan"]);
    assert_contains(&err, "cannot write both:v1 as a plan");
    assert_contains(
        &err,
        "reads orders:v1 after a later version of orders was made",
    );
}
