//! The parts of the interface that are sluice's own: the visible store folder (and the old
//! hidden one refused with advice that works), `identify`, `upgrade`, and the recording
//! commands' `--json`, which scripts read instead of parsing text.

mod common;

use common::*;

#[test]
fn an_old_hidden_store_is_refused_with_advice_that_works() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id\n1\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    assert!(s.path().join("sluice-store/lineage.db").is_file());
    std::fs::rename(s.path().join("sluice-store"), s.path().join(".sluice")).unwrap();
    let err = s.fails(2, &["timeline"]);
    assert_contains(&err, "a store in the old hidden folder");
    assert_contains(&err, "mv ");
    // Found from a folder below the project too.
    std::fs::create_dir_all(s.path().join("work/q3")).unwrap();
    let r = s
        .command(&["timeline"])
        .current_dir(s.path().join("work/q3"))
        .output()
        .unwrap();
    assert_eq!(r.status.code(), Some(2));
    assert_contains(
        &String::from_utf8_lossy(&r.stderr),
        "rename it to sluice-store",
    );
    // The advice works: after the rename, everything is as it was.
    std::fs::rename(s.path().join(".sluice"), s.path().join("sluice-store")).unwrap();
    assert_eq!(s.json(&["timeline", "--json"]).as_array().unwrap().len(), 1);
    assert_contains(&s.ok(&["verify"]), "intact");
}

#[test]
fn identify_names_a_received_file_and_refuses_a_stranger() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id,name\n1,Ada\n");
    s.ok(&["receive", "a.csv", "--as", "people", "--why", "w"]);
    let out = s.ok(&["identify", "a.csv"]);
    assert_contains(&out, "a.csv is the recorded version people:v1");
    let hash = blake3::hash(b"id,name\n1,Ada\n").to_hex().to_string();
    assert_contains(&out, &format!("blake3:{}", &hash[..16]));
    let j = s.json(&["identify", "a.csv", "--json"]);
    assert_eq!(j["hash"], format!("blake3:{hash}"));
    assert_eq!(j["versions"][0]["seq"], 1);
    s.file("b.csv", "id,name\n1,Bo\n");
    let err = s.fails(1, &["identify", "b.csv"]);
    assert_contains(
        &err,
        "no version, report or delivered file with these bytes",
    );
}

#[test]
fn upgrade_converts_the_old_example_plan_and_the_old_rules() {
    let s = Sandbox::new();
    let old = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/examples/plans/three_rivers_q3.json"
    ))
    .unwrap();
    let old_json: serde_json::Value = serde_json::from_str(&old).unwrap();
    if old_json["sluice_plan"] != 1 {
        // The example is already in the current form: nothing to convert.
        return;
    }
    s.file("plan.json", &old);
    let out = s.ok(&["upgrade", "plan.json", "-o", "plan2.json"]);
    assert_contains(&out, "wrote plan.json in the current form to plan2.json");
    let new: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(s.path().join("plan2.json")).unwrap())
            .unwrap();
    assert_eq!(new["sluice_plan"], 2);
    assert_eq!(new["purpose"], old_json["description"]);
    let old_steps = old_json["steps"].as_array().unwrap();
    let new_steps = new["steps"].as_array().unwrap();
    assert_eq!(new_steps.len(), old_steps.len());
    // Every reason and dataset is kept, in order; the check that stopped the run is a hold
    // point.
    for (o, n) in old_steps.iter().zip(new_steps) {
        assert_eq!(n["dataset"], o["on"]);
        assert_eq!(n["reason"], o["why"]);
        assert_eq!(n.get("hold_point").is_some(), o["gate"] == true);
    }
    // A rules file, printed when no -o is given.
    s.file(
        "rules.json",
        r#"{"rules": [{"rule": "not_blank", "columns": ["id"]}, {"rule": "allowed", "column": "s", "values": ["a"]}]}"#,
    );
    let printed: serde_json::Value =
        serde_json::from_str(&s.ok(&["upgrade", "rules.json"])).unwrap();
    assert_eq!(
        printed,
        serde_json::json!({"sluice_rules": 2, "rules": [
            {"dimension": "completeness", "columns": ["id"]},
            {"dimension": "validity", "column": "s", "one_of": ["a"]}
        ]})
    );
    // Something it does not know is refused, with the file's name and the place.
    s.file(
        "odd.json",
        r#"{"rules": [{"rule": "sorted", "column": "a"}]}"#,
    );
    let err = s.fails(2, &["upgrade", "odd.json"]);
    assert_contains(
        &err,
        "odd.json: the rules file, rule 1: unknown rule \"sorted\"",
    );
}

#[test]
fn recording_commands_give_the_new_hash_and_step_number_as_json() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id,name\n1, Ada \n");
    let r = s.json(&["receive", "a.csv", "--as", "people", "--why", "w", "--json"]);
    assert_eq!(r["recorded"], true);
    assert_eq!(r["step"], 1);
    let hash = blake3::hash(b"id,name\n1, Ada \n").to_hex().to_string();
    assert_eq!(r["version"]["hash"], hash.as_str());
    let c = s.json(&["clean", "people", "trim", "--why", "padded", "--json"]);
    assert_eq!(c["recorded"], true);
    assert_eq!(c["step"], 2);
    assert_eq!(c["changed_cells"], 1);
    assert_eq!(c["version"]["seq"], 2);
    assert_eq!(
        c["version"]["hash"],
        blake3::hash(b"id,name\n1,Ada\n")
            .to_hex()
            .to_string()
            .as_str()
    );
    // Nothing new: recorded false, no step.
    let again = s.json(&["clean", "people", "trim", "--why", "padded", "--json"]);
    assert_eq!(again["recorded"], false);
    assert_eq!(again["step"], serde_json::Value::Null);
}
