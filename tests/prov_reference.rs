//! The W3C PROV export checked by an outside reference: the `prov` package (PyPI; a
//! general-purpose library for the W3C PROV data model, pinned in
//! tests/reference/requirements.txt and run by tests/reference/prov_check.py in the environment
//! of tests/reference/pyenv.py) reads the demo's PROV-JSON (W3C Member Submission "PROV-JSON",
//! 2013) and PROV-N (W3C Recommendation "PROV-N", 2013) with warnings turned into errors; its
//! own PROV-N of the PROV-JSON document must equal the parse of sluice's PROV-N as a document;
//! the script also checks referential integrity and time order, which the library does not.
//! The numbers of entities, activities, agents and of each relation the library counts must
//! equal what the store holds, counted here from `sluice timeline --json`.

mod common;

use std::collections::{BTreeSet, HashMap};
use std::process::Command;

use common::*;
use serde_json::Value;

/// What the store holds on the way to `target`, counted from `sluice timeline --json` the way the
/// PROV mapping is documented (README, "W3C PROV"): versions and outside files as entities,
/// steps as activities, people and sluice builds as agents.
fn expected_counts(log: &Value, target: &str) -> HashMap<&'static str, usize> {
    let steps = log.as_array().expect("log is a list");
    let made_by: HashMap<String, &Value> = steps
        .iter()
        .flat_map(|e| {
            e["step"]["outputs"]
                .as_array()
                .unwrap()
                .iter()
                .map(move |o| (o.as_str().unwrap().to_string(), &e["step"]))
        })
        .collect();
    let mut todo = vec![target.to_string()];
    let mut seen_steps = BTreeSet::new();
    let mut chosen = Vec::new();
    while let Some(label) = todo.pop() {
        let step = made_by[&label];
        if seen_steps.insert(step["id"].as_i64().unwrap()) {
            chosen.push(step);
            for i in step["inputs"].as_array().unwrap() {
                todo.push(i.as_str().unwrap().to_string());
            }
        }
    }
    let mut versions = BTreeSet::new();
    let mut people = BTreeSet::new();
    let mut builds = BTreeSet::new();
    let (mut files, mut used, mut generated, mut derived) = (0, 0, 0, 0);
    for s in &chosen {
        let ins = s["inputs"].as_array().unwrap();
        let outs = s["outputs"].as_array().unwrap();
        versions.extend(ins.iter().chain(outs).map(|v| v.to_string()));
        people.insert(s["agent"].to_string());
        builds.insert(s["tool_version"].to_string());
        let kind = s["kind"].as_str().unwrap();
        let file = usize::from((kind == "ingest" || kind == "hand_edit") && !s["source"].is_null());
        files += file;
        used += ins.len() + file;
        generated += outs.len();
        derived += outs.len() * (ins.len() + file);
    }
    HashMap::from([
        ("entity", versions.len() + files),
        ("activity", chosen.len()),
        ("agent", people.len() + builds.len()),
        ("used", used),
        ("wasGeneratedBy", generated),
        ("wasDerivedFrom", derived),
        ("wasAssociatedWith", 2 * chosen.len()),
        ("wasAttributedTo", generated),
    ])
}

#[test]
fn the_prov_library_reads_the_demo_export_and_counts_what_the_store_holds() {
    let s = Sandbox::with_demo();
    let python = reference_python();
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/prov_check.py");
    // A revert as well, so that its step and the steps it applied again are exported too.
    s.ok(&[
        "withdraw",
        "all_orders:v5",
        "--why",
        "test orders are kept for the training report",
    ]);
    let log = s.json(&["timeline", "--json"]);
    // reviewed_orders:v2 is the end of the demo's longest line: intakes of three exports and two
    // tables, built-in steps, an outside command and a hand edit; all_orders is now the end of
    // the revert.
    for target in [
        "reviewed_orders:v2",
        "q3_by_shop:v1",
        "quillby_orders:v1",
        "all_orders:v14",
    ] {
        let json_path = s.path().join("lineage.prov.json");
        let provn_path = s.path().join("lineage.provn");
        s.ok(&[
            "export",
            target,
            "--format",
            "prov-json",
            "-o",
            json_path.to_str().unwrap(),
        ]);
        // Standard output, the other way to get it, must be the same document as the file.
        let provn = s.ok(&["export", target, "--format", "prov-n"]);
        std::fs::write(&provn_path, &provn).unwrap();
        let out = Command::new(&python)
            .arg(script)
            .arg(&json_path)
            .arg(&provn_path)
            .output()
            .expect("run the reference script");
        assert!(
            out.status.success(),
            "{target}: the prov library refused the export:\n{}\n{}",
            String::from_utf8_lossy(&out.stderr),
            String::from_utf8_lossy(&out.stdout)
        );
        let found: Value = serde_json::from_slice(&out.stdout).expect("the script prints JSON");
        let pinned = std::fs::read_to_string(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/requirements.txt"
        ))
        .unwrap();
        assert!(
            pinned.contains(&format!("prov=={}", found["prov_version"].as_str().unwrap())),
            "the reference interpreter's prov is not the pinned one; rerun tests/reference/pyenv.py"
        );
        let want = expected_counts(&log, target);
        for kind in ["entity", "activity", "agent"] {
            assert_eq!(
                found["elements"][kind].as_u64(),
                Some(want[kind] as u64),
                "{target}: {kind} count"
            );
        }
        for rel in [
            "used",
            "wasGeneratedBy",
            "wasDerivedFrom",
            "wasAssociatedWith",
            "wasAttributedTo",
        ] {
            assert_eq!(
                found["relations"][rel].as_u64(),
                Some(want[rel] as u64),
                "{target}: {rel} count"
            );
        }
    }
}

#[test]
fn the_check_script_catches_a_changed_value_and_a_reversed_activity() {
    // The comparison must be able to fail: a PROV-N file with one count changed, and a PROV-JSON
    // file whose first activity ends before it starts, are both refused.
    let s = Sandbox::with_demo();
    let python = reference_python();
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/prov_check.py");
    let json_text = s.ok(&["export", "oxwater_orders:v2", "--format", "prov-json"]);
    let provn = s.ok(&["export", "oxwater_orders:v2", "--format", "prov-n"]);
    let json_path = s.file("good.prov.json", &json_text);
    let changed = provn.replacen("sluice:rows=\"180\"", "sluice:rows=\"181\"", 1);
    assert_ne!(changed, provn, "the demo's Oxwater export has 180 rows");
    let bad_provn = s.file("changed.provn", changed);
    let out = Command::new(&python)
        .args([
            script.as_ref(),
            json_path.as_os_str(),
            bad_provn.as_os_str(),
        ])
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert_contains(&String::from_utf8_lossy(&out.stderr), "differ");

    let mut doc: Value = serde_json::from_str(&json_text).unwrap();
    let first = doc["activity"]
        .as_object()
        .unwrap()
        .keys()
        .next()
        .unwrap()
        .clone();
    doc["activity"][&first]["prov:endTime"] = Value::from("2000-01-01T00:00:00Z");
    let reversed = s.file("reversed.prov.json", doc.to_string());
    let good_provn = s.file("good.provn", &provn);
    let out = Command::new(&python)
        .args([
            script.as_ref(),
            reversed.as_os_str(),
            good_provn.as_os_str(),
        ])
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert_contains(&String::from_utf8_lossy(&out.stderr), "before it starts");
}
