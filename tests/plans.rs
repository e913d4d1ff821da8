//! Plans: `sluice run` records each step as `apply` and `check` would, stops at the first
//! failure keeping what came before, and `sluice export --format plan` writes a plan that remakes
//! a version byte for byte. Plan and rules files are checked against `schema/plan.schema.json`
//! and `schema/rules.schema.json` with the `jsonschema` crate (a general-purpose JSON Schema
//! validator from the crate registry, draft 2020-12). Files of the old form are refused with
//! the advice to convert them, and the converter's output is held against a golden file.

mod common;

use common::{assert_contains, Sandbox};
use serde_json::{json, Value};
use sluice::ops::sort::{Direction, SortKey};
use sluice::ops::summarize::{AggFunc, Aggregate};
use sluice::ops::{CaseTo, KeepWhich, OnError, Operation, Renaming};

fn schema_file(name: &str) -> jsonschema::Validator {
    let text = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("schema")
            .join(name),
    )
    .unwrap();
    let schema: Value = serde_json::from_str(&text).unwrap();
    jsonschema::draft202012::new(&schema).expect("the schema is itself valid")
}

fn schema() -> jsonschema::Validator {
    schema_file("plan.schema.json")
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
    // The export has the demo plan's sources and the steps that led to q3_by_shop (all but the
    // plan's last, the per-shop totals made from the same input), every setting written out.
    assert_eq!(exported["sluice_plan"], 2);
    assert_eq!(exported["sources"].as_array().unwrap().len(), 5);
    let demo_steps = demo["steps"].as_array().unwrap();
    assert_eq!(demo_steps.last().unwrap()["save_as"], "q3_shop_totals");
    assert_eq!(
        exported["steps"].as_array().unwrap().len(),
        demo_steps.len() - 1
    );
    assert_eq!(exported["sources"][0]["file"], "exports/quillby_2026q3.csv");
    assert_eq!(exported["steps"][0]["clean"], "trim");
    assert_eq!(exported["steps"][0]["settings"]["inner"], true);
    assert_eq!(exported["steps"][0]["settings"]["columns"], Value::Null);
    assert!(
        !exported.to_string().contains("\"op\""),
        "the store's encoding of operations stays inside the store"
    );
    let hold = exported["steps"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s.get("inspect").is_some())
        .expect("the hold point is exported");
    assert_eq!(hold["hold_point"], true);
    assert_eq!(hold["inspect"].as_array().unwrap().len(), 5);
    assert_eq!(hold["inspect"][0]["dimension"], "completeness");
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
        Operation::Sort {
            by: vec![
                SortKey {
                    column: "shop".into(),
                    direction: Direction::Ascending,
                },
                SortKey {
                    column: "opened".into(),
                    direction: Direction::Descending,
                },
            ],
        },
    ];
    let rules: Value = serde_json::from_str(
        r#"[{"dimension": "completeness", "columns": ["id"]}, {"dimension": "uniqueness", "columns": ["id"]},
            {"dimension": "validity", "column": "x", "at_least": "0"},
            {"dimension": "validity", "column": "x", "at_most": "-1.5"},
            {"dimension": "validity", "column": "x", "length_at_least": 1, "length_at_most": 5},
            {"dimension": "validity", "column": "x", "pattern": "^a"},
            {"dimension": "validity", "column": "x", "one_of": ["a"]}]"#,
    )
    .unwrap();
    let rules: Vec<sluice::checks::Rule> = serde_json::from_value(rules).unwrap();
    let mut steps: Vec<Value> = ops
        .iter()
        .map(|op| {
            let (clean, settings) = sluice::plan::clean_and_settings(op);
            json!({"dataset": "orders", "clean": clean, "settings": settings, "reason": "every kind"})
        })
        .collect();
    steps.push(json!({"dataset": "orders", "inspect": rules, "hold_point": true}));
    let plan = json!({"sluice_plan": 2, "sources": [{"dataset": "orders", "file": "o.csv"}], "steps": steps});
    assert_valid(&schema(), &plan, "a plan with every operation and rule");
    // Every name `clean` takes is covered above, so the schema lists them all.
    for name in sluice::plan::OPERATION_NAMES {
        assert!(
            ops.iter().any(|o| o.name() == *name),
            "no example of {name}"
        );
    }
    let rules_file = json!({"sluice_rules": 2, "rules": rules});
    assert_valid(
        &schema_file("rules.schema.json"),
        &rules_file,
        "a rules file with every kind of rule",
    );
}

#[test]
fn malformed_plans_are_refused_by_the_schema_and_by_sluice_alike() {
    let v = schema();
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1, Ada\n");
    let before = s.snapshot();
    for (plan, expected) in [
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "clean": "trim", "settings": {"inner": true, "innr": 1}, "reason": "x"}]}"#,
            "line 1, column",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "clean": "trim"}]}"#,
            "step 1: a \"clean\" step needs \"reason\"",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "clean": "trim", "reason": "x",
                "inspect": [{"dimension": "uniqueness", "columns": ["id"]}]}]}"#,
            "not both",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "clean": "sparkle", "reason": "x"}]}"#,
            "\"clean\": \"sparkle\" is not an operation; the operations are: trim, case",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "clean": "trim", "settings": {"op": "case"}, "reason": "x"}]}"#,
            "name the operation in \"clean\", not as \"op\"",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "inspect": [{"dimension": "uniqueness", "columns": ["id"]}], "save_as": "p"}]}"#,
            "takes no \"save_as\"",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "inspect": [{"dimension": "validity", "column": "id", "one_of": ["1"], "pattern": "[0-9]+"}]}]}"#,
            "a validity rule takes exactly one test",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "inspect": [{"dimension": "validity", "column": "id", "at_least": "ten"}]}]}"#,
            "the bound \"ten\" is not a plain number",
        ),
        (
            r#"{"sluice_plan": 2, "steps": [{"dataset": "o", "inspect": [{"dimension": "timeliness", "columns": ["id"]}]}]}"#,
            "unknown variant `timeliness`",
        ),
        (
            r#"{"sluice_plan": 2, "steps": []}"#,
            "the plan has no steps",
        ),
        (
            r#"{"sluice_plan": 2,
 "sources": [{"dataset": "o", "file": "o.csv", "colour": "red"}],
 "steps": [{"dataset": "o", "clean": "trim", "reason": "x"}]}"#,
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
        r#"{"sluice_plan": 2,
            "sources": [{"dataset": "quillby_orders", "file": "exports/quillby_2026q3.csv"}],
            "steps": [
              {"dataset": "quillby_orders", "clean": "trim", "settings": {"inner": true}, "reason": "spaces"},
              {"dataset": "quillby_orders", "clean": "number", "settings": {"columns": ["parts_cost"]}, "reason": "amounts"},
              {"dataset": "quillby_orders", "clean": "date", "settings": {"columns": ["opened"], "order": "mdy"}, "reason": "dates"}
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
    assert_contains(&err, "the plan has no source named \"oxwater\"");
    assert_contains(&err, "its sources are: quillby_orders");
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
        r#"{"sluice_plan": 2,
            "sources": [{"dataset": "orders", "file": "o.csv"}],
            "steps": [
              {"dataset": "orders", "clean": "trim", "reason": "spaces"},
              {"dataset": "orders", "clean": "number", "settings": {"columns": ["amount"]}, "reason": "amounts"},
              {"dataset": "orders", "clean": "drop", "settings": {"predicate": "status = 'test'"}, "reason": "tests"}
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
        r#"{"sluice_plan": 2,
            "steps": [
              {"dataset": "orders", "clean": "case", "settings": {"columns": ["status"], "to": "upper"}, "reason": "shout"},
              {"dataset": "orders", "clean": "case", "settings": {"columns": ["colour"], "to": "upper"}, "reason": "shout"}
            ]}"#,
    );
    let err = s.fails(2, &["run", "q.json"]);
    assert_contains(&err, "plan entry 2 (case on orders)");
    assert_contains(&err, "column \"colour\" is not in orders:v3");
}

#[test]
fn a_hold_point_that_fails_stops_the_run_and_a_plain_inspection_does_not() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,done\n1,done \n2,\n");
    let plan = |hold: bool| {
        format!(
            r#"{{"sluice_plan": 2,
            "sources": [{{"dataset": "orders", "file": "o.csv"}}],
            "steps": [
              {{"dataset": "orders", "clean": "trim", "reason": "spaces"}},
              {{"dataset": "orders", "inspect": [{{"dimension": "uniqueness", "columns": ["id"]}}, {{"dimension": "completeness", "columns": ["id"]}}], "hold_point": {hold}}},
              {{"dataset": "orders", "clean": "dedupe", "reason": "twice"}}
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
    assert_contains(&r.stdout, "uniqueness: id fails on 1 row");
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
    assert_contains(
        &r.stderr,
        "the hold point on orders:v2 failed: uniqueness: id (1 row)",
    );
    let shown = s.json(&["about", "orders:v2", "--json"]);
    let checks = shown["checks"].as_array().unwrap();
    assert_eq!(checks.len(), 2);
    assert!(checks.iter().all(|c| c["hold_point"] == true));
    assert_eq!(
        s.json(&["timeline", "--dataset", "orders", "--json"])
            .as_array()
            .unwrap()
            .len(),
        2,
        "the dedupe after the hold point did not run"
    );
    let shown = s.ok(&["about", "orders:v2"]);
    assert_contains(&shown, "hold point   FAIL uniqueness: id");
    // The export writes the hold point back as a hold point.
    let exported: Value = serde_json::from_str(&s.ok(&["export", "orders", "--format", "plan"]))
        .expect("a plan on standard output");
    assert_eq!(exported["steps"][1]["hold_point"], true);
    assert_eq!(
        exported["steps"][1]["inspect"][0],
        json!({"dimension": "uniqueness", "columns": ["id"]})
    );
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

#[test]
fn plans_and_rules_files_of_the_old_form_are_refused_with_the_way_to_convert_them() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1, Ada\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    let before = s.snapshot();
    s.file(
        "old.json",
        r#"{"sluice_plan": 1, "steps": [{"on": "o", "apply": {"op": "trim"}, "why": "x"}]}"#,
    );
    let err = s.fails(2, &["run", "old.json"]);
    assert_contains(&err, "old.json: this is a plan of the old form");
    assert_contains(
        &err,
        "convert it with `sluice upgrade old.json -o NEW.json`",
    );
    s.file(
        "old_rules.json",
        r#"{"rules": [{"rule": "unique", "columns": ["id"]}]}"#,
    );
    let err = s.fails(2, &["inspect", "o", "--rules", "old_rules.json"]);
    assert_contains(&err, "old_rules.json: this is a rules file of the old form");
    assert_contains(
        &err,
        "convert it with `sluice upgrade old_rules.json -o NEW.json`",
    );
    assert_eq!(before, s.snapshot(), "a refused file records nothing");

    // The converted files run, and give what the old ones described.
    let plan = sluice::plan::upgrade(&std::fs::read_to_string(s.path().join("old.json")).unwrap())
        .unwrap();
    s.file("new.json", &plan);
    assert_contains(&s.ok(&["run", "new.json"]), "recorded o:v2");
    let rules =
        sluice::plan::upgrade(&std::fs::read_to_string(s.path().join("old_rules.json")).unwrap())
            .unwrap();
    assert_eq!(
        rules,
        "{\n  \"sluice_rules\": 2,\n  \"rules\": [\n    {\n      \"dimension\": \"uniqueness\",\n      \"columns\": [\n        \"id\"\n      ]\n    }\n  ]\n}\n"
    );
    s.file("new_rules.json", &rules);
    assert_contains(
        &s.ok(&["inspect", "o", "--rules", "new_rules.json"]),
        "pass  uniqueness: id",
    );
    assert_valid(
        &schema_file("rules.schema.json"),
        &serde_json::from_str(&rules).unwrap(),
        "a converted rules file",
    );
}

#[test]
fn the_old_demo_plan_converts_to_the_golden_file_which_the_schema_accepts() {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let old = std::fs::read_to_string(root.join("tests/fixtures/plans/three_rivers_q3.form1.json"))
        .unwrap();
    let golden =
        std::fs::read_to_string(root.join("tests/golden/three_rivers_q3.form2.json")).unwrap();
    let converted = sluice::plan::upgrade(&old).unwrap();
    assert_eq!(converted, golden);
    let parsed: Value = serde_json::from_str(&converted).unwrap();
    assert_valid(&schema(), &parsed, "the converted plan");
    // The schema refuses the old form, as sluice does.
    let old: Value = serde_json::from_str(&old).unwrap();
    assert!(!schema().is_valid(&old));
}

#[test]
fn malformed_rules_files_are_refused_by_the_schema_and_by_sluice_alike() {
    let v = schema_file("rules.schema.json");
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1,Ada\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    for (rules, expected) in [
        (
            r#"{"sluice_rules": 2, "rules": [{"dimension": "validity", "column": "id"}]}"#,
            "a validity rule takes exactly one test",
        ),
        (
            r#"{"sluice_rules": 2, "rules": [{"dimension": "completeness", "column": "id"}]}"#,
            "a completeness rule needs \"columns\"",
        ),
        (
            r#"{"sluice_rules": 2, "rules": [{"dimension": "uniqueness", "columns": ["id"], "one_of": ["1"]}]}"#,
            "a uniqueness rule takes only \"columns\"",
        ),
        (
            r#"{"sluice_rules": 2, "rules": [{"dimension": "validity", "column": "id", "length_at_least": -1}]}"#,
            "line 1, column",
        ),
        (
            r#"{"sluice_rules": 3, "rules": []}"#,
            "rules format 3 is not one this build reads",
        ),
    ] {
        let parsed: Value = serde_json::from_str(rules).unwrap();
        assert!(
            !v.is_valid(&parsed),
            "the schema accepts rules sluice refuses: {rules}"
        );
        s.file("r.json", rules);
        let err = s.fails(2, &["inspect", "o", "--rules", "r.json"]);
        assert_contains(&err, expected);
        assert_contains(&err, "r.json");
    }
}

#[test]
fn check_results_an_older_build_stored_are_shown_and_exported_in_the_current_form() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,done\n2,open\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.file(
        "r.json",
        r#"{"sluice_rules": 2, "rules": [{"dimension": "validity", "column": "status", "one_of": ["done", "open"]}, {"dimension": "completeness", "columns": ["id"]}]}"#,
    );
    s.ok(&["inspect", "o", "--rules", "r.json"]);
    // Stores written before the dimensions hold the rules in their old JSON; put them back so.
    let db = s.path().join("sluice-store/lineage.db");
    let conn = rusqlite::Connection::open(&db).unwrap();
    conn.execute(
        "UPDATE check_results SET rule = ?1 WHERE rule LIKE '%one_of%'",
        [r#"{"column":"status","rule":"allowed","values":["done","open"]}"#],
    )
    .unwrap();
    conn.execute(
        "UPDATE check_results SET rule = ?1 WHERE rule LIKE '%completeness%'",
        [r#"{"columns":["id"],"rule":"not_blank"}"#],
    )
    .unwrap();
    drop(conn);
    let shown = s.ok(&["about", "o"]);
    assert_contains(&shown, "pass validity: status one of done, open");
    assert_contains(&shown, "pass completeness: id");
    let json = s.json(&["about", "o", "--json"]);
    assert_eq!(
        json["checks"][0]["rule"],
        json!({"dimension": "validity", "column": "status", "one_of": ["done", "open"]})
    );
    let exported: Value =
        serde_json::from_str(&s.ok(&["export", "o", "--format", "plan"])).unwrap();
    assert_eq!(
        exported["steps"][0]["inspect"][1],
        json!({"dimension": "completeness", "columns": ["id"]})
    );
    assert_valid(
        &schema(),
        &exported,
        "a plan exported from an old store's checks",
    );
}

// The demo's figures worked out again with Python's csv and decimal modules (general-purpose
// references) from the table as it stood before the demo's last three cleaning steps
// (all_orders:v9): cancelled orders left out, customers' names in one case, every shop's months
// in calendar order; sums exact, means rounded half to even at six places.
#[test]
fn the_demo_figures_leave_out_cancelled_work_and_come_in_calendar_order() {
    let d = Sandbox::with_demo();
    let before = d.run(&["retrieve", "all_orders:v9"]).stdout;
    let script = r#"
import csv, decimal, io, sys
rows = list(csv.DictReader(io.StringIO(sys.stdin.read())))
kept = [r for r in rows if r["status"] != "cancelled"]
print(len(rows), len(kept))
groups = {}
for r in sorted(kept, key=lambda r: (r["shop"], r["month"])):
    g = groups.setdefault((r["shop"], r["month"]), [0, decimal.Decimal(0), decimal.Decimal(0), 0])
    g[0] += 1
    g[1] += decimal.Decimal(r["parts_cost"]) if r["parts_cost"] else 0
    if r["labour_hours"]:
        g[2] += decimal.Decimal(r["labour_hours"])
        g[3] += 1
print("shop,month,count,sum_parts_cost,mean_labour_hours")
for (shop, month), (n, parts, hours, n_hours) in groups.items():
    mean = (hours / n_hours).quantize(decimal.Decimal("0.000001"), rounding=decimal.ROUND_HALF_EVEN)
    print(f"{shop},{month},{n},{parts},{mean}")
"#;
    let mut child = std::process::Command::new("python3")
        .args(["-c", script])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("python3 is needed for the reference checks");
    use std::io::Write;
    child
        .stdin
        .take()
        .unwrap()
        .write_all(before.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    let out = String::from_utf8(out.stdout).unwrap();
    let (counts, expected) = out.split_once('\n').unwrap();
    let counts: Vec<u64> = counts.split(' ').map(|n| n.parse().unwrap()).collect();
    let after = d.json(&["about", "all_orders", "--json"]);
    assert_eq!(after["version"]["n_rows"].as_u64(), Some(counts[1]));
    assert!(
        counts[0] > counts[1],
        "the demo has cancelled orders to leave out"
    );
    assert_eq!(d.run(&["retrieve", "q3_by_shop"]).stdout, expected);
    // Months in calendar order within each shop.
    let by_shop = d.run(&["retrieve", "q3_by_shop"]).stdout;
    let months: Vec<&str> = by_shop
        .lines()
        .skip(1)
        .map(|l| l.split(',').nth(1).unwrap())
        .collect();
    assert_eq!(months[..3], ["2026-07", "2026-08", "2026-09"]);
    // No customer's name is left in capitals: every name is its words capitalised.
    let cleaned = d.run(&["retrieve", "all_orders"]).stdout;
    let mut rdr = csv::Reader::from_reader(cleaned.as_bytes());
    let col = rdr
        .headers()
        .unwrap()
        .iter()
        .position(|h| h == "customer")
        .unwrap();
    for r in rdr.records() {
        let name = r.unwrap()[col].to_string();
        let titled: Vec<String> = name
            .split(' ')
            .map(|w| {
                let mut c = w.chars();
                c.next().map_or(String::new(), |f| {
                    f.to_uppercase().collect::<String>() + &c.as_str().to_lowercase()
                })
            })
            .collect();
        assert_eq!(name, titled.join(" "));
    }
    // The drop says why, and the explanation of a total names it.
    let why = d.ok(&[
        "explain",
        "q3_shop_totals",
        "--row",
        "1",
        "--column",
        "sum_parts_cost",
    ]);
    assert_contains(&why, "a cancelled order is work not done");
    assert_contains(&why, "(agrees)");
}

/// The row-by-row operations a fused run chains, and the table operations that end a fused
/// stretch, as plan steps on `orders` (with the tables `shops`, `regions` and `extra`).
fn step_pool() -> Vec<Value> {
    let step = |clean: &str, settings: Value| {
        let mut s = json!({"dataset": "orders", "clean": clean, "reason": "property"});
        if !settings.is_null() {
            s["settings"] = settings;
        }
        s
    };
    vec![
        step("trim", Value::Null),
        step("trim", json!({"columns": ["customer"], "inner": true})),
        step("case", json!({"columns": ["shop"], "to": "lower"})),
        step("case", json!({"columns": ["customer"], "to": "title"})),
        step(
            "replace",
            json!({"columns": ["opened"], "find": "-", "with": "/"}),
        ),
        step(
            "replace",
            json!({"columns": ["parts"], "find": "^\\$", "with": "", "regex": true}),
        ),
        step(
            "map",
            json!({"columns": ["shop"], "table": "shops", "unmatched": "keep"}),
        ),
        step(
            "lookup",
            json!({"table": "regions", "on": ["shop"], "take": ["region"]}),
        ),
        step("fill", json!({"columns": ["parts"], "value": "0"})),
        step("fill", json!({"columns": ["note"], "from": "customer"})),
        step("number", json!({"columns": ["parts"], "on_error": "keep"})),
        step(
            "date",
            json!({"columns": ["opened"], "order": "dmy", "on_error": "blank"}),
        ),
        step(
            "split",
            json!({"column": "customer", "on": " ", "into": ["given", "family"]}),
        ),
        step(
            "combine",
            json!({"columns": ["shop", "status"], "with": "-", "into": "tag"}),
        ),
        step(
            "extract",
            json!({"column": "opened", "into": "year", "from": 1, "len": 4}),
        ),
        step(
            "rename",
            json!({"columns": [{"from": "note", "to": "remark"}]}),
        ),
        step(
            "select",
            json!({"columns": ["id", "customer", "shop", "opened", "parts", "status", "note"]}),
        ),
        step("keep", json!({"predicate": "status = 'done'"})),
        step("drop", json!({"predicate": "status = 'test'"})),
        step("dedupe", json!({"key": ["id"]})),
        step("dedupe", json!({"key": ["customer"], "keep": "last"})),
        step("dedupe", Value::Null),
        step(
            "sort",
            json!({"by": [{"column": "id", "direction": "descending"}]}),
        ),
        step("append", json!({"other": "extra"})),
        {
            let mut s = step(
                "summarize",
                json!({"by": ["shop"], "aggregates": [{"func": "max", "column": "id"}]}),
            );
            s["save_as"] = json!("totals");
            s
        },
    ]
}

/// A small work-order table with stray spaces, mixed case, amounts in several forms, dates in
/// two orders, blanks, repeated ids and rows.
fn orders_csv(rows: &[(u8, u8, u8, u8, u8)]) -> String {
    let customers = ["Ada Lovel", " ada lovel", "Bo  Quint ", "", "cy ren"];
    let shops = ["north", "South", " east", "west", "north"];
    let opened = ["2026-07-01", "03/08/2026", "31-07-2026", "", "not a date"];
    let parts = ["$12.50", "1,204.50", "", "(3.00)", "abc"];
    let status = ["done", "test", "open", "done", ""];
    let mut out = String::from("id,customer,shop,opened,parts,status,note\n");
    for (i, (c, s, o, p, st)) in rows.iter().enumerate() {
        let id = i % 7;
        out.push_str(&format!(
            "{id},{},{},{},\"{}\",{},\n",
            customers[*c as usize % 5],
            shops[*s as usize % 5],
            opened[*o as usize % 5],
            parts[*p as usize % 5],
            status[*st as usize % 5]
        ));
    }
    out
}

/// Every version of the store with the step that made it: dataset, number, hashes of the
/// bytes and row index, rows, header, and for operation steps the operation, parameters,
/// provenance object, rows in and out, column sources and cell notes, and every column's
/// profile.
fn recorded_versions(s: &Sandbox) -> Vec<String> {
    let db = rusqlite::Connection::open(s.path().join("sluice-store").join("lineage.db")).unwrap();
    let mut q = db
        .prepare(
            "SELECT d.name, v.seq, v.hash, v.row_index, v.n_rows, v.header, s.kind, \
                    COALESCE(s.operation, ''), CASE WHEN s.kind = 'operation' THEN s.params ELSE '' END, \
                    COALESCE(s.provenance, ''), COALESCE(s.rows_in, -1), COALESCE(s.rows_out, -1), \
                    (SELECT COALESCE(GROUP_CONCAT(t, ';'), '') FROM (SELECT n.row_idx || ':' || \
                       n.column_name || ':' || n.note AS t FROM cell_notes n \
                       WHERE n.output_id = v.id ORDER BY n.row_idx, n.column_name)), \
                    (SELECT COALESCE(GROUP_CONCAT(t, ';'), '') FROM (SELECT c.output_column || '<' || \
                       c.input_column AS t FROM column_sources c WHERE c.output_id = v.id ORDER BY t)), \
                    (SELECT COALESCE(GROUP_CONCAT(t, ';'), '') FROM (SELECT p.col_idx || ':' || p.name || \
                       ':' || p.inferred_type || ':' || p.n_blank || ':' || p.n_distinct || ':' || \
                       p.distinct_exact || ':' || COALESCE(p.min_value, '-') || ':' || \
                       COALESCE(p.max_value, '-') || ':' || COALESCE(p.min_len, '-') || ':' || \
                       COALESCE(p.max_len, '-') AS t FROM column_profiles p WHERE p.version_id = v.id \
                       ORDER BY p.col_idx)) \
             FROM versions v JOIN datasets d ON d.id = v.dataset_id JOIN steps s ON s.id = v.step_id \
             ORDER BY d.name, v.seq",
        )
        .unwrap();
    let rows = q
        .query_map([], |r| {
            let mut cells = Vec::new();
            for i in 0..15 {
                let v: rusqlite::types::Value = r.get(i)?;
                cells.push(format!("{v:?}"));
            }
            Ok(cells.join(" | "))
        })
        .unwrap();
    rows.map(|r| r.unwrap()).collect()
}

/// Every version of the store as `NAME:vN`.
fn version_labels(s: &Sandbox) -> Vec<String> {
    let db = rusqlite::Connection::open(s.path().join("sluice-store").join("lineage.db")).unwrap();
    let mut q = db
        .prepare(
            "SELECT d.name || ':v' || v.seq FROM versions v JOIN datasets d ON d.id = v.dataset_id \
             ORDER BY d.name, v.seq",
        )
        .unwrap();
    let rows = q.query_map([], |r| r.get(0)).unwrap();
    rows.map(|r| r.unwrap()).collect()
}

proptest::proptest! {
    #![proptest_config(proptest::prelude::ProptestConfig::with_cases(12))]

    /// A plan's stretches of row-by-row steps run fused in one pass; every step must get the
    /// same version bytes, row index and provenance as when each step runs alone (a plan of one
    /// step at a time), and a run that stops must stop at the same step, keeping the same
    /// steps before it.
    #[test]
    fn a_fused_run_records_what_one_step_at_a_time_records(
        rows in proptest::collection::vec((0u8..5, 0u8..5, 0u8..5, 0u8..5, 0u8..5), 0..24),
        picks in proptest::collection::vec(0usize..25, 2..9),
    ) {
        let pool = step_pool();
        let steps: Vec<Value> = picks.iter().map(|&i| pool[i].clone()).collect();
        let data = orders_csv(&rows);
        let tables = [
            ("shops.csv", "from,to\nnorth,North Yard\nSouth,South Yard\n east,East Yard\n"),
            ("regions.csv", "shop,region\nnorth,Upland\nNorth Yard,Upland\nwest,Coast\n"),
            ("extra.csv", "id,customer,shop,opened,parts,status,note\n90,Dee Ash,west,2026-07-02,4.00,done,late\n91,,north,,,open,\n"),
        ];
        let fused = Sandbox::with_store();
        let alone = Sandbox::with_store();
        for s in [&fused, &alone] {
            s.file("orders.csv", &data);
            for (name, text) in tables {
                s.file(name, text);
                s.ok(&["receive", name, "--as", name.trim_end_matches(".csv"), "--why", "tables"]);
            }
        }
        alone.ok(&["receive", "orders.csv", "--as", "orders", "--why", "raw input of a plan"]);
        let plan = json!({"sluice_plan": 2, "sources": [{"dataset": "orders", "file": "orders.csv"}], "steps": steps});
        fused.file("plan.json", plan.to_string());
        let whole = fused.run(&["run", "plan.json"]);
        let mut stopped_alone = None;
        for (i, step) in steps.iter().enumerate() {
            let one = json!({"sluice_plan": 2, "sources": [], "steps": [step]});
            alone.file("one.json", one.to_string());
            let r = alone.run(&["run", "one.json"]);
            if r.code != 0 {
                stopped_alone = Some((i, r.code, r.stderr));
                break;
            }
        }
        let v_fused = recorded_versions(&fused);
        let v_alone = recorded_versions(&alone);
        proptest::prop_assert_eq!(&v_fused, &v_alone, "plan: {}\nfused run: {}", plan, whole.stderr);
        // The fused run leaves its intermediates unstored (recomputable): each gives, computed
        // again when read, the same bytes as the version the step-by-step run stored.
        for label in version_labels(&fused) {
            let f = fused.run(&["retrieve", &label]);
            let a = alone.run(&["retrieve", &label]);
            proptest::prop_assert_eq!(f.code, 0, "{}: {}", label, f.stderr);
            proptest::prop_assert_eq!(&f.raw_stdout, &a.raw_stdout, "{} of plan {}", label, plan);
        }
        match stopped_alone {
            None => proptest::prop_assert_eq!(whole.code, 0, "{}", whole.stderr),
            Some((i, code, why)) => {
                proptest::prop_assert_eq!(whole.code, code, "{}", whole.stderr);
                let at = format!("plan entry {} (", i + 1);
                proptest::prop_assert!(whole.stderr.contains(&at), "the fused run stopped elsewhere than entry {}: {}", i + 1, whole.stderr);
                // The same reason, from the same step.
                let cause = why.split("caused by:").nth(1).unwrap_or(&why).trim();
                proptest::prop_assert!(whole.stderr.contains(cause), "{}\nagainst\n{}", whole.stderr, why);
            }
        }
    }
}

/// The first steps of a plan are computed while its file is taken in (one read of the file);
/// each file here must give the versions, row indexes, provenance and profiles that the same
/// steps give when they read the file's stored copy (`--input` bound to the version a
/// `receive` made): quoted fields with delimiters and line breaks inside, CRLF line ends, a
/// byte-order mark, blank lines, a semicolon delimiter found by sniffing, no header, a header
/// alone, and a file larger than intake's batches; with a null token, which the profiles of
/// every step count as blank.
#[test]
fn a_plan_computed_while_its_file_is_taken_in_records_what_a_run_on_the_stored_copy_records() {
    let mut long = String::from("id,name,amount,status\n");
    for i in 0..40_000 {
        long.push_str(&format!(
            "{},\" Name {} \",{}.{:02},{}\n",
            i % 30_000,
            i % 977,
            i % 1_000,
            i % 100,
            if i % 7 == 0 { "test" } else { "done" }
        ));
    }
    let files: Vec<(&str, String, bool)> = vec![
        (
            "quoted",
            "id,name,amount,status\n1,\"Smith, Ann\", 12.50 ,done\n2,\"two\nlines\",NA,test\n3,\"say \"\"hi\"\"\",4,done\n4,NA,NA,done\n".into(),
            true,
        ),
        (
            "crlf",
            "id,name,amount,status\r\n1, a ,1,done\r\n2,b ,2,test\r\n".into(),
            true,
        ),
        ("bom", "\u{feff}id,name,amount,status\n1, a ,1,done\n".into(), true),
        (
            "blank lines",
            "id,name,amount,status\n1, a ,1,done\n\n2,b,2,done\n\n".into(),
            true,
        ),
        (
            "semicolons",
            "id;name;amount;status\n1; a ;1;done\n2;b;2;test\n".into(),
            true,
        ),
        ("no header", "1, a ,1,done\n2,b,2,test\n".into(), false),
        ("header alone", "id,name,amount,status\n".into(), true),
        ("long", long, true),
    ];
    for (what, text, header) in files {
        let status = if header { "status" } else { "col4" };
        let name = if header { "name" } else { "col2" };
        let id = if header { "id" } else { "col1" };
        let steps = json!([
            {"dataset": "orders", "clean": "trim", "reason": "spaces"},
            {"dataset": "orders", "clean": "case", "settings": {"columns": [name], "to": "upper"}, "reason": "case"},
            {"dataset": "orders", "clean": "dedupe", "reason": "twice"},
            {"dataset": "orders", "clean": "drop", "settings": {"predicate": format!("{status} = 'test'")}, "reason": "tests"},
            {"dataset": "orders", "clean": "summarize", "save_as": "totals",
             "settings": {"by": [status], "aggregates": [{"func": "max", "column": id}]}, "reason": "largest"}
        ]);
        let plan = json!({"sluice_plan": 2,
            "sources": [{"dataset": "orders", "file": "o.csv", "header": header, "null_tokens": ["NA"]}],
            "steps": steps});
        let fed = Sandbox::with_store();
        let stored = Sandbox::with_store();
        for s in [&fed, &stored] {
            s.file("o.csv", &text);
            s.file("plan.json", plan.to_string());
        }
        fed.ok(&["run", "plan.json"]);
        let mut receive = vec![
            "receive",
            "o.csv",
            "--as",
            "orders",
            "--why",
            "raw input of a plan",
            "--null-token",
            "NA",
        ];
        if !header {
            receive.push("--no-header");
        }
        stored.ok(&receive);
        stored.ok(&["run", "plan.json", "--input", "orders=orders:v1"]);
        assert_eq!(
            recorded_versions(&fed),
            recorded_versions(&stored),
            "the {what} file"
        );
        for label in version_labels(&fed) {
            let f = fed.ok(&["retrieve", &label]);
            assert_eq!(
                f,
                stored.ok(&["retrieve", &label]),
                "{label} of the {what} file"
            );
        }
        assert_contains(&fed.ok(&["verify"]), "intact");
    }
}

/// A file refused part way (a ragged row after rows the steps had already computed) fails the
/// run at the input, as taking it in alone would, and leaves the store as it was.
#[test]
fn a_file_refused_while_its_steps_are_computed_leaves_the_store_as_it_was() {
    let s = Sandbox::with_store();
    let mut text = String::from("id,name,status\n");
    for i in 0..30_000 {
        text.push_str(&format!("{i}, n{i} ,done\n"));
    }
    text.push_str("30000,short\n");
    s.file("o.csv", &text);
    s.file(
        "plan.json",
        r#"{"sluice_plan": 2,
            "sources": [{"dataset": "orders", "file": "o.csv"}],
            "steps": [
              {"dataset": "orders", "clean": "trim", "reason": "spaces"},
              {"dataset": "orders", "clean": "drop", "settings": {"predicate": "status = 'test'"}, "reason": "tests"}
            ]}"#,
    );
    let before = s.snapshot();
    let r = s.run(&["run", "plan.json"]);
    assert_ne!(r.code, 0);
    assert_contains(&r.stderr, "input orders");
    assert_contains(&r.stderr, "30002");
    assert_eq!(before, s.snapshot());
}
