//! `sluice replay`: a version computed again from its raw ancestors, every step checked against
//! the bytes it recorded; missing intermediate objects restored; differences named.

mod common;

use common::{assert_contains, Sandbox};

fn object_path(s: &Sandbox, hash: &str) -> std::path::PathBuf {
    s.path()
        .join(".sluice/objects")
        .join(&hash[..2])
        .join(&hash[2..])
}

fn hash_of(s: &Sandbox, reference: &str) -> String {
    s.json(&["show", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string()
}

#[test]
fn the_demo_summary_is_reproduced_step_by_step() {
    let d = Sandbox::with_demo();
    let r = d.json(&["replay", "q3_by_shop", "--json"]);
    assert_eq!(r["reproduced"], true);
    let steps = r["steps"].as_array().unwrap();
    let raw = steps.iter().filter(|s| s["result"] == "raw_intact").count();
    let same = steps.iter().filter(|s| s["result"] == "same").count();
    assert_eq!(raw, 5, "the five raw inputs");
    assert_eq!(same, 20, "the plan's built-in steps up to q3_by_shop");
    assert!(steps
        .iter()
        .filter(|s| s["result"] == "same")
        .all(|s| s["computed_hash"] == s["recorded_hash"]));
    assert_contains(
        &d.ok(&["replay", "q3_by_shop"]),
        "every one of 20 steps gave the recorded bytes",
    );
}

#[test]
fn a_removed_intermediate_object_is_restored_by_replay() {
    let d = Sandbox::with_demo();
    let hash = hash_of(&d, "all_orders@5");
    std::fs::remove_file(object_path(&d, &hash)).unwrap();
    let r = d.run(&["verify", "--json"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "object_missing");
    let r = d.json(&["replay", "q3_by_shop", "--json"]);
    assert_eq!(r["reproduced"], true);
    let restored: Vec<&str> = r["steps"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["result"] == "restored")
        .map(|s| s["produced"].as_str().unwrap())
        .collect();
    assert_eq!(restored, vec!["all_orders@5"]);
    assert_contains(&d.ok(&["verify"]), "intact");
}

#[test]
fn damage_and_differences_stop_the_replay_where_they_are() {
    // Damaged raw data cannot be computed again: replay stops at it.
    let d = Sandbox::with_demo();
    let raw = hash_of(&d, "technicians@1");
    let p = object_path(&d, &raw);
    let mut bytes = std::fs::read(&p).unwrap();
    bytes[10] ^= 0x20;
    let mut perms = std::fs::metadata(&p).unwrap().permissions();
    #[allow(clippy::permissions_set_readonly_false)]
    perms.set_readonly(false);
    std::fs::set_permissions(&p, perms).unwrap();
    std::fs::write(&p, &bytes).unwrap();
    let r = d.run(&["replay", "q3_by_shop", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["reproduced"], false);
    let last = report["steps"].as_array().unwrap().last().unwrap().clone();
    assert_eq!(last["result"], "raw_damaged");
    assert_eq!(last["produced"], "technicians@1");

    // A step whose recorded parameters no longer give its recorded bytes is named, and the
    // replay stops there. (The parameters are edited behind sluice's back, in the database.)
    let d = Sandbox::with_demo();
    let db = rusqlite::Connection::open(d.path().join(".sluice/lineage.db")).unwrap();
    let changed = db
        .execute(
            "UPDATE steps SET params = replace(params, '\"inner\":true', '\"inner\":false')
             WHERE operation = 'trim' AND id = (SELECT min(id) FROM steps WHERE operation = 'trim')",
            [],
        )
        .unwrap();
    assert_eq!(changed, 1);
    drop(db);
    let r = d.run(&["replay", "q3_by_shop"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "trim -> quillby_orders@2");
    assert_contains(&r.stdout, "differs");
    assert_contains(&r.stdout, "not reproduced: q3_by_shop@1");
    assert!(!r.stdout.contains("summarize -> q3_by_shop@1"));
}

#[test]
fn outside_work_is_reported_as_not_run_again() {
    let d = Sandbox::with_demo();
    let r = d.run(&["replay", "reviewed_orders", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let kinds: Vec<(&str, &str)> = report["steps"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["result"] == "not_rerun")
        .map(|s| (s["kind"].as_str().unwrap(), s["produced"].as_str().unwrap()))
        .collect();
    assert_eq!(
        kinds,
        vec![
            ("command", "reviewed_orders@1"),
            ("hand_edit", "reviewed_orders@2")
        ]
    );
}

#[test]
fn the_same_chain_runs_on_next_quarters_export_and_each_step_names_the_one_it_repeats() {
    let d = Sandbox::with_demo();
    // Next quarter's Quillby export: the first hundred lines of this quarter's, standing in
    // for a new file with the same layout.
    let q3 = std::fs::read_to_string(d.path().join("exports/quillby_2026q3.csv")).unwrap();
    let q4: String = q3.lines().take(101).map(|l| format!("{l}\n")).collect();
    d.file("exports/quillby_2026q4.csv", &q4);
    let before = d.json(&["log", "--json"]).as_array().unwrap().len();
    let out = d.ok(&[
        "replay",
        "q3_by_shop",
        "--onto",
        "quillby_orders=exports/quillby_2026q4.csv",
        "--why",
        "Q4 2026 export from the Quillby till",
    ]);
    assert_contains(&out, "input quillby_orders from");
    assert_contains(&out, "recorded q3_by_shop@2");
    assert_contains(&out, "done: every step recorded");
    let log = d.json(&["log", "--json"]);
    let log = log.as_array().unwrap();
    let by_id: std::collections::HashMap<i64, &serde_json::Value> = log
        .iter()
        .map(|e| (e["step"]["id"].as_i64().unwrap(), &e["step"]))
        .collect();
    // Every new built-in step repeats a recorded step of the same operation.
    let new: Vec<&serde_json::Value> = log[..log.len() - before]
        .iter()
        .map(|e| &e["step"])
        .filter(|s| s["kind"] == "operation")
        .collect();
    assert_eq!(new.len(), 20);
    for s in &new {
        let repeated = by_id[&s["repeats_step"]
            .as_i64()
            .expect("names the step it repeats")];
        assert_eq!(repeated["operation"], s["operation"]);
        assert_eq!(repeated["reason"], s["reason"]);
    }
    // The new intake is the only new raw version; the Q4 summary counts the Q4 Quillby rows.
    let shown = d.json(&["show", "quillby_orders", "--json"]);
    assert_eq!(
        shown["version"]["seq"], 8,
        "raw Q4 (@5) and its three cleaned versions"
    );
    assert_contains(&d.ok(&["log", "q3_by_shop"]), "· repeats step ");
    let summary = d.run(&["cat", "q3_by_shop@2"]).stdout;
    assert!(summary.starts_with("shop,month,count,sum_parts_cost,mean_labour_hours\n"));
    assert_contains(&d.ok(&["verify"]), "intact");

    // A name the chain does not start from is refused before anything is recorded.
    let snapshot = d.snapshot();
    let err = d.fails(
        2,
        &[
            "replay",
            "q3_by_shop",
            "--onto",
            "orders=exports/quillby_2026q4.csv",
        ],
    );
    assert_contains(
        &err,
        "q3_by_shop is not made from a dataset named \"orders\"",
    );
    assert_contains(&err, "its raw inputs are: ");
    assert_contains(&err, "fennmarsh_orders, service_labels, technicians");
    assert_eq!(snapshot, d.snapshot());
}

#[test]
fn a_chain_that_cannot_apply_to_the_new_data_stops_and_keeps_what_was_done() {
    let d = Sandbox::with_demo();
    // A new export without the parts_cost column: the second step (number on parts_cost)
    // cannot apply.
    d.file(
        "exports/odd.csv",
        "order_id,opened,customer,email,service,labour_hours,status,technician,notes\n\
         1,2026-10-01,Ada Quenwick,,Flat repair,1.0,done,Ines,\n",
    );
    let r = d.run(&[
        "replay",
        "q3_by_shop",
        "--onto",
        "quillby_orders=exports/odd.csv",
    ]);
    assert_eq!(r.code, 2);
    assert_contains(
        &r.stderr,
        "the run stopped at step 2 (number on quillby_orders)",
    );
    // The trim of the new file changed nothing, so the number step read the new raw version.
    assert_contains(
        &r.stderr,
        "column \"parts_cost\" is not in quillby_orders@5",
    );
    assert_contains(
        &r.stderr,
        "the store keeps what came before: quillby_orders@5\n",
    );
}
