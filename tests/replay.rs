//! `sluice reproduce`: a version computed again from its raw ancestors, every step checked against
//! the bytes it recorded; missing intermediate objects restored; differences named and
//! summarised; hand edits re-applied; outside commands run again only with `--allow-exec`.
//!
//! Outside references: the repositories are made by the `git` program itself, and what replay
//! must leave alone is read back with it (`git status --porcelain --ignored`, `git rev-parse
//! HEAD`); the scripts are run by `python3` and `sh`, and each one's own record of its runs
//! (a log file outside the store) says whether and which version ran. The demo's version
//! hashes in `tests/golden/demo_versions.txt` were recorded by this build: they hold the
//! output fixed across checkouts and machines, they are not an outside truth.

mod common;

use std::path::Path;
use std::process::Command;

use common::{assert_contains, damage_object, remove_object, Sandbox};

fn git(dir: &Path, args: &[&str]) -> String {
    let out = Command::new("git")
        .args(args)
        .current_dir(dir)
        .output()
        .expect("run git");
    assert!(
        out.status.success(),
        "git {}: {}",
        args.join(" "),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).trim().to_string()
}

/// A sandbox that is a git repository holding `orders` (a small export, taken in) and a
/// cleaning script, committed; every run of the script appends its version to `runs.log`
/// (outside the store, an absolute path written into the script), so a test can tell whether
/// and which version ran.
fn repository_with_script() -> (Sandbox, String) {
    let s = Sandbox::with_store();
    let dir = s.path();
    git(dir, &["init", "-q"]);
    git(dir, &["config", "user.name", "Robin Example"]);
    git(dir, &["config", "user.email", "robin@example.org"]);
    s.file(".gitignore", "sluice-store/\nruns.log\n*.csv\nout/\n");
    s.file(
        "orders.csv",
        "order_id,technician,status\n41001,ines,done\n41002,tobiah,test\n41003,caspar,done\n",
    );
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "the export",
    ]);
    s.file("clean.py", script(&s, "v1", "upper"));
    git(dir, &["add", ".gitignore", "clean.py"]);
    git(dir, &["commit", "-q", "-m", "cleaning script"]);
    let first = git(dir, &["rev-parse", "HEAD"]);
    (s, first)
}

/// The cleaning script: `how` the technician's name is written ("upper" or "title").
fn script(s: &Sandbox, version: &str, how: &str) -> String {
    format!(
        "import sys\n\
         log = {log:?}\n\
         src, dst = sys.argv[1], sys.argv[2]\n\
         rows = open(src).read().splitlines()\n\
         out = [rows[0]]\n\
         for r in rows[1:]:\n\
         \x20   f = r.split(',')\n\
         \x20   f[1] = f[1].{how}()\n\
         \x20   out.append(','.join(f))\n\
         open(dst, 'w').write('\\n'.join(out) + '\\n')\n\
         open(log, 'a').write('{version}\\n')\n",
        log = s.path().join("runs.log").display().to_string()
    )
}

fn runs_log(s: &Sandbox) -> String {
    std::fs::read_to_string(s.path().join("runs.log")).unwrap_or_default()
}

fn store_dir(s: &Sandbox) -> std::path::PathBuf {
    s.path().join(sluice::store::STORE_DIR)
}

fn hash_of(s: &Sandbox, reference: &str) -> String {
    s.json(&["about", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string()
}

#[test]
fn the_demo_summary_is_reproduced_step_by_step() {
    let d = Sandbox::with_demo();
    let r = d.json(&["reproduce", "q3_by_shop", "--json"]);
    assert_eq!(r["reproduced"], true);
    let steps = r["steps"].as_array().unwrap();
    let raw = steps.iter().filter(|s| s["result"] == "raw_intact").count();
    let same = steps.iter().filter(|s| s["result"] == "same").count();
    assert_eq!(raw, 5, "the five raw inputs");
    assert_eq!(same, 23, "the plan's built-in steps up to q3_by_shop");
    assert!(steps
        .iter()
        .filter(|s| s["result"] == "same")
        .all(|s| s["computed_hash"] == s["recorded_hash"]));
    assert_contains(
        &d.ok(&["reproduce", "q3_by_shop"]),
        "all 28 steps above check out (5 raw inputs intact, 23 steps run again gave the recorded bytes)",
    );
}

#[test]
fn a_removed_intermediate_object_is_restored_by_replay() {
    let d = Sandbox::with_demo();
    // The demo's run leaves all_orders:v5 recomputable (not stored); stored, it can be damaged.
    d.ok(&["retain", "all_orders:v5"]);
    let hash = hash_of(&d, "all_orders:v5");
    remove_object(&store_dir(&d), &hash);
    let r = d.run(&["verify", "--json"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "object_missing");
    let r = d.json(&["reproduce", "q3_by_shop", "--json"]);
    assert_eq!(r["reproduced"], true);
    let restored: Vec<&str> = r["steps"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["result"] == "restored")
        .map(|s| s["produced"].as_str().unwrap())
        .collect();
    assert_eq!(restored, vec!["all_orders:v5"]);
    assert_contains(&d.ok(&["verify"]), "intact");
}

#[test]
fn damage_and_differences_stop_the_replay_where_they_are() {
    // Damaged raw data cannot be computed again: replay stops at it.
    let d = Sandbox::with_demo();
    let raw = hash_of(&d, "technicians:v1");
    damage_object(&store_dir(&d), &raw, |bytes| bytes[10] ^= 0x20);
    let r = d.run(&["reproduce", "q3_by_shop", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["reproduced"], false);
    let last = report["steps"].as_array().unwrap().last().unwrap().clone();
    assert_eq!(last["result"], "raw_damaged");
    assert_eq!(last["produced"], "technicians:v1");

    // A step whose recorded parameters no longer give its recorded bytes is named, and the
    // replay stops there. (The parameters are edited behind sluice's back, in the database.)
    // The demo's run leaves quillby_orders:v2 recomputable; its bytes are kept first, so that
    // the recorded output can be compared with what the edited step computes.
    let d = Sandbox::with_demo();
    d.ok(&["retain", "quillby_orders:v2"]);
    let db = rusqlite::Connection::open(d.path().join("sluice-store/lineage.db")).unwrap();
    let changed = db
        .execute(
            "UPDATE steps SET params = replace(params, '\"inner\":true', '\"inner\":false')
             WHERE operation = 'trim' AND id = (SELECT min(id) FROM steps WHERE operation = 'trim')",
            [],
        )
        .unwrap();
    assert_eq!(changed, 1);
    drop(db);
    // `verify` sees the edit (the step's row is no longer the one its audit entry committed
    // to), so the store is compared before and after by its files and log instead.
    let seen = d.run(&["verify"]);
    assert_eq!(seen.code, 1);
    assert_contains(&seen.stdout, "the rows of steps whose id is");
    let files = |d: &Sandbox| {
        let count = |sub: &str| std::fs::read_dir(d.path().join(sub)).unwrap().count();
        (
            count("sluice-store/segments"),
            count("sluice-store/tmp"),
            d.ok(&["timeline", "--json"]),
        )
    };
    let snapshot = files(&d);
    let r = d.run(&["reproduce", "q3_by_shop"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "trim -> quillby_orders:v2");
    assert_contains(&r.stdout, "differs");
    assert_contains(&r.stdout, "not reproduced: q3_by_shop:v1");
    assert!(!r.stdout.contains("summarize -> q3_by_shop:v1"));
    // The difference, summarised by the diff engine: with inner spaces kept, the customer
    // names that had doubled spaces differ, and nothing else does.
    assert_contains(&r.stdout, "recorded quillby_orders:v2 has 240 rows");
    assert_contains(
        &r.stdout,
        "0 only in the recorded output, 0 only in the recomputed one",
    );
    assert_contains(&r.stdout, "changed cells by column: customer ");
    let report = d.run(&["reproduce", "q3_by_shop", "--json"]);
    let report: serde_json::Value = serde_json::from_str(&report.stdout).unwrap();
    let last = report["steps"].as_array().unwrap().last().unwrap().clone();
    let diff = &last["difference"];
    assert_eq!(diff["rows_only_recorded"], 0);
    assert!(diff["rows_changed"].as_u64().unwrap() > 0);
    assert_eq!(diff["changed_cells"][0]["column"], "customer");
    assert_eq!(diff["computed_hash"], last["computed_hash"]);
    for e in diff["examples"].as_array().unwrap() {
        let cell = &e["cells"][0];
        // The recomputed cell is the recorded one with an inner run of spaces kept.
        let recorded = cell["recorded"].as_str().unwrap();
        let computed = cell["computed"].as_str().unwrap();
        assert!(computed.contains("  "), "{computed:?}");
        assert_eq!(
            computed.split_whitespace().collect::<Vec<_>>().join(" "),
            recorded
        );
    }
    // Comparing left nothing behind: no version or step, no temporary file, no object.
    let v: serde_json::Value = serde_json::from_str(&d.run(&["verify", "--json"]).stdout).unwrap();
    assert_eq!(v["unreferenced_objects"], 0);
    assert_eq!(v["leftover_temp_files"], 0);
    assert_eq!(snapshot, files(&d));
}

#[test]
fn without_allow_exec_a_command_is_not_run_and_a_hand_edit_is_reapplied() {
    let d = Sandbox::with_demo();
    let r = d.run(&["reproduce", "reviewed_orders", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let outside: Vec<(&str, &str, &str)> = report["steps"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s["kind"] != "ingest" && s["kind"] != "operation")
        .map(|s| {
            (
                s["kind"].as_str().unwrap(),
                s["produced"].as_str().unwrap(),
                s["result"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        outside,
        vec![
            ("command", "reviewed_orders:v1", "not_rerun"),
            ("hand_edit", "reviewed_orders:v2", "reapplied"),
        ]
    );
    assert_eq!(report["reproduced"], false, "the command was not run again");
    assert_contains(&d.ok(&["verify"]), "intact");
}

#[test]
fn a_hand_edit_whose_output_object_is_gone_cannot_be_reapplied() {
    let d = Sandbox::with_demo();
    let hash = hash_of(&d, "reviewed_orders:v2");
    remove_object(&store_dir(&d), &hash);
    let snapshot = d.path().join("sluice-store/lineage.db");
    let before = std::fs::read(&snapshot).unwrap();
    let r = d.run(&["reproduce", "reviewed_orders"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "hand edit -> reviewed_orders:v2");
    assert_contains(&r.stdout, "cannot reapply");
    assert_contains(
        &r.stdout,
        "the output of this hand edit (reviewed_orders:v2) is missing: the values a person typed are kept only in that version, so the edit cannot be re-applied",
    );
    assert_eq!(
        before,
        std::fs::read(&snapshot).unwrap(),
        "nothing recorded"
    );
}

#[test]
fn a_damaged_intermediate_object_is_named_by_replay_and_by_verify() {
    let d = Sandbox::with_demo();
    // The demo's run leaves all_orders:v5 recomputable (not stored); stored, it can be damaged.
    d.ok(&["retain", "all_orders:v5"]);
    let hash = hash_of(&d, "all_orders:v5");
    damage_object(&store_dir(&d), &hash, |bytes| bytes[200] ^= 0x01);

    let r = d.run(&["reproduce", "q3_by_shop", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let last = report["steps"].as_array().unwrap().last().unwrap().clone();
    assert_eq!(last["produced"], "all_orders:v5");
    assert_eq!(last["result"], "output_damaged");
    assert_contains(last["detail"].as_str().unwrap(), &hash);
    let v = d.run(&["verify"]);
    assert_eq!(v.code, 1);
    assert_contains(&v.stdout, &hash[..12]);
}

#[test]
fn the_same_chain_runs_on_next_quarters_export_and_each_step_names_the_one_it_repeats() {
    let d = Sandbox::with_demo();
    // Next quarter's Quillby export: the first hundred lines of this quarter's, standing in
    // for a new file with the same layout.
    let q3 = std::fs::read_to_string(d.path().join("exports/quillby_2026q3.csv")).unwrap();
    let q4: String = q3.lines().take(101).map(|l| format!("{l}\n")).collect();
    d.file("exports/quillby_2026q4.csv", &q4);
    let before = d.json(&["timeline", "--json"]).as_array().unwrap().len();
    let out = d.ok(&[
        "rerun",
        "q3_by_shop",
        "--with",
        "quillby_orders=exports/quillby_2026q4.csv",
        "--why",
        "Q4 2026 export from the Quillby till",
    ]);
    assert_contains(&out, "input quillby_orders from");
    assert_contains(&out, "recorded q3_by_shop:v2");
    assert_contains(&out, "done: every step recorded");
    let log = d.json(&["timeline", "--json"]);
    let log = log.as_array().unwrap();
    let by_id: std::collections::HashMap<i64, &serde_json::Value> = log
        .iter()
        .map(|e| (e["step"]["id"].as_i64().unwrap(), &e["step"]))
        .collect();
    // Every new built-in step repeats a recorded step of the same operation.
    let new: Vec<&serde_json::Value> = log[before..]
        .iter()
        .map(|e| &e["step"])
        .filter(|s| s["kind"] == "operation")
        .collect();
    assert_eq!(new.len(), 23);
    for s in &new {
        let repeated = by_id[&s["repeats_step"]
            .as_i64()
            .expect("names the step it repeats")];
        assert_eq!(repeated["operation"], s["operation"]);
        assert_eq!(repeated["reason"], s["reason"]);
    }
    // The new intake is the only new raw version; the Q4 summary counts the Q4 Quillby rows.
    let shown = d.json(&["about", "quillby_orders", "--json"]);
    assert_eq!(
        shown["version"]["seq"], 8,
        "raw Q4 (v5) and its three cleaned versions"
    );
    assert_contains(
        &d.ok(&["timeline", "--dataset", "q3_by_shop"]),
        "(repeats step 28) parts and labour",
    );
    let summary = d.run(&["retrieve", "q3_by_shop:v2"]).stdout;
    assert!(summary.starts_with("shop,month,count,sum_parts_cost,mean_labour_hours\n"));
    assert_contains(&d.ok(&["verify"]), "intact");
    // The rerun's records are the trial run's, copied in: every recomputable version it made
    // computes again to its recorded hash, and the trial left nothing in the store's tmp/.
    let deep = d.json(&["verify", "--deep", "--json"]);
    assert_eq!(deep["intact"], true, "{deep}");
    assert_eq!(deep["leftover_temp_files"], 0, "{deep}");
    assert!(deep["versions_recomputed"].as_u64().unwrap() > 0, "{deep}");

    // A name the chain does not start from is refused before anything is recorded.
    let snapshot = d.snapshot();
    let err = d.fails(
        2,
        &[
            "rerun",
            "q3_by_shop",
            "--with",
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

// Before: the file was recorded as quillby_orders' latest version and the run stopped at step 2,
// leaving the broken file as the dataset's latest. Now every step's columns are checked against
// the new file first.
#[test]
fn a_new_file_without_a_column_a_step_reads_is_refused_before_anything_is_recorded() {
    let d = Sandbox::with_demo();
    // A new export without the parts_cost column, which the number step reads.
    d.file(
        "exports/odd.csv",
        "order_id,opened,customer,email,service,labour_hours,status,technician,notes\n\
         1,2026-10-01,Ada Quenwick,,Flat repair,1.0,done,Ines,\n",
    );
    let latest = d.json(&["about", "quillby_orders", "--json"])["version"]["seq"].clone();
    let snapshot = d.snapshot();
    let err = d.fails(
        2,
        &[
            "rerun",
            "q3_by_shop",
            "--with",
            "quillby_orders=exports/odd.csv",
        ],
    );
    assert_contains(
        &err,
        "exports/odd.csv lacks column \"parts_cost\" (used by step ",
    );
    assert_contains(&err, "number on quillby_orders)");
    assert_contains(
        &err,
        "nothing was recorded and the latest version of quillby_orders is unchanged",
    );
    assert_contains(&err, "`sluice rerun q3_by_shop --with quillby_orders=FILE`");
    assert_eq!(snapshot, d.snapshot(), "nothing recorded");
    assert_eq!(
        d.json(&["about", "quillby_orders", "--json"])["version"]["seq"],
        latest
    );
}

// Before: "the run stopped at before the first step", with advice to use an --input option
// this command does not have.
#[test]
fn a_missing_new_file_is_named_with_advice_that_works() {
    let d = Sandbox::with_demo();
    let snapshot = d.snapshot();
    let err = d.fails(
        2,
        &[
            "rerun",
            "q3_by_shop",
            "--with",
            "quillby_orders=exports/nowhere.csv",
        ],
    );
    assert_contains(
        &err,
        "exports/nowhere.csv: no such file; nothing was recorded",
    );
    assert_contains(&err, "`sluice rerun q3_by_shop --with quillby_orders=FILE`");
    assert!(!err.contains("stopped at before"), "{err}");
    assert!(!err.contains("--input"), "{err}");
    assert_eq!(snapshot, d.snapshot());
}

#[test]
fn an_outside_command_runs_again_from_its_recorded_commit_only_with_allow_exec() {
    let (s, first) = repository_with_script();
    let dir = s.path();
    s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=cleaned.csv",
        "--why",
        "names in capitals",
        "--",
        "python3",
        "clean.py",
        "{orders}",
        "{out:orders}",
    ]);
    // A second command names its output relative to the working directory, literally, and
    // runs from a subfolder: an executable shell script that calls its helper through a
    // symbolic link (so the checkout must keep the mode and the link).
    s.file(
        "tools/tag.sh",
        "#!/bin/sh\nmkdir -p out\nexec python3 helper.py \"$1\"\n",
    );
    s.file(
        "tools/tag_impl.py",
        "import sys\nrows = open(sys.argv[1]).read().splitlines()\nopen('out/tagged.csv', 'w').write('\\n'.join([rows[0] + ',shop'] + [r + ',Quillby' for r in rows[1:]]) + '\\n')\n",
    );
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(
            dir.join("tools/tag.sh"),
            std::fs::Permissions::from_mode(0o755),
        )
        .unwrap();
        std::os::unix::fs::symlink("tag_impl.py", dir.join("tools/helper.py")).unwrap();
    }
    git(dir, &["add", "tools"]);
    git(dir, &["commit", "-q", "-m", "tagging script"]);
    let tools = s.path().join("tools");
    let r = s
        .command(&[
            "capture",
            "--input",
            "orders",
            "--output",
            "orders=out/tagged.csv",
            "--why",
            "the shop",
            "--",
            "./tag.sh",
            "{orders}",
        ])
        .current_dir(&tools)
        .output()
        .unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let recorded = hash_of(&s, "orders:v2");
    assert_eq!(runs_log(&s), "v1\n");

    // The script changes and is committed: title case now.
    s.file("clean.py", script(&s, "v2", "title"));
    git(dir, &["commit", "-q", "-am", "title case instead"]);
    let status_before = git(dir, &["status", "--porcelain", "--ignored"]);
    let head_before = git(dir, &["rev-parse", "HEAD"]);

    // Without --allow-exec nothing runs; the store is not changed.
    let snapshot = s.snapshot();
    let r = s.run(&["reproduce", "orders", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let results: Vec<&str> = report["steps"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["result"].as_str().unwrap())
        .collect();
    assert_eq!(results, vec!["raw_intact", "not_rerun", "not_rerun"]);
    assert_eq!(runs_log(&s), "v1\n", "the script did not run");
    assert_eq!(snapshot, s.snapshot());

    // With it, the first version runs (from the recorded commit) and gives the recorded bytes.
    let out = s.ok(&["reproduce", "orders", "--allow-exec"]);
    assert_eq!(
        runs_log(&s),
        "v1\nv1\n",
        "the recorded version of the script ran"
    );
    assert_contains(&out, "reproduce will run 2 outside commands");
    assert_contains(&out, "python3 clean.py {orders} {out:orders}");
    assert_contains(&out, &format!("at commit {}", &first[..12]));
    assert_contains(
        &out,
        &format!(
            "reproduced orders:v3 (blake3:{})",
            &hash_of(&s, "orders:v3")[..16]
        ),
    );
    // With --json the list goes to standard error, so that standard output is one document.
    let r = s.run(&["reproduce", "orders", "--allow-exec", "--json"]);
    assert_eq!(r.code, 0);
    assert_contains(&r.stderr, "reproduce will run 2 outside commands");
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["reproduced"], true);
    let steps = report["steps"].as_array().unwrap();
    assert_eq!(steps[1]["result"], "same");
    assert_eq!(steps[1]["computed_hash"].as_str(), Some(recorded.as_str()));
    assert_eq!(steps[2]["result"], "same");
    // The user's working tree, index and HEAD are as they were; the store too; no leftovers.
    assert_eq!(
        git(dir, &["status", "--porcelain", "--ignored"]),
        status_before
    );
    assert_eq!(git(dir, &["rev-parse", "HEAD"]), head_before);
    assert_eq!(
        std::fs::read_to_string(dir.join("clean.py")).unwrap(),
        script(&s, "v2", "title")
    );
    assert_eq!(snapshot, s.snapshot());

    // A removed output object is restored from the command's bytes.
    remove_object(&store_dir(&s), &recorded);
    let report = s.json(&["reproduce", "orders", "--allow-exec", "--json"]);
    assert_eq!(report["steps"][1]["result"], "restored");
    assert_contains(&s.ok(&["verify"]), "intact");
}

#[test]
fn a_command_recorded_from_a_dirty_tree_replays_with_a_warning() {
    let (s, _) = repository_with_script();
    // An uncommitted change that does not alter the output.
    s.file("clean.py", &(script(&s, "v1", "upper") + "# tidy later\n"));
    s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=cleaned.csv",
        "--why",
        "capitals",
        "--",
        "python3",
        "clean.py",
        "{orders}",
        "{out:orders}",
    ]);
    let out = s.ok(&["reproduce", "orders", "--allow-exec"]);
    assert_contains(
        &out,
        "warning: when step 2 ran, the working tree had changes not in commit",
    );
    assert_contains(
        &out,
        "(clean.py); the commit is run now, which may not be the code that ran",
    );
    assert_contains(&out, "reproduced orders:v2");
}

#[test]
fn a_commit_that_no_longer_exists_is_named() {
    let (s, first) = repository_with_script();
    s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=cleaned.csv",
        "--why",
        "capitals",
        "--",
        "python3",
        "clean.py",
        "{orders}",
        "{out:orders}",
    ]);
    // The recorded commit id edited behind sluice's back (as if history had been rewritten).
    let gone = "0123456789abcdef0123456789abcdef01234567";
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let n = db
        .execute(
            "UPDATE steps SET code = replace(code, ?1, ?2) WHERE kind = 'command'",
            [&first, gone],
        )
        .unwrap();
    assert_eq!(n, 1);
    drop(db);
    let r = s.run(&["reproduce", "orders", "--allow-exec"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "code missing");
    assert_contains(
        &r.stdout,
        &format!("commit {gone} is not in the repository"),
    );
    assert_eq!(runs_log(&s), "v1\n", "nothing ran");
}

#[test]
fn a_command_recorded_outside_git_or_naming_an_absolute_output_is_not_run() {
    // Outside any repository (the demo's folder): the code was never recorded.
    let d = Sandbox::with_demo();
    let r = d.run(&["reproduce", "reviewed_orders", "--allow-exec"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "will not run: the command ran in ");
    assert_contains(
        &r.stdout,
        "outside any git repository, so the code that ran was never recorded",
    );

    // An absolute output path written into the command line itself.
    let (s, _) = repository_with_script();
    let target = s.path().join("elsewhere.csv");
    let target = target.to_str().unwrap();
    s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        &format!("orders={target}"),
        "--why",
        "capitals",
        "--",
        "python3",
        "clean.py",
        "{orders}",
        target,
    ]);
    let before = std::fs::metadata(target).unwrap().modified().unwrap();
    let r = s.run(&["reproduce", "orders", "--allow-exec", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["steps"][1]["result"], "refused");
    assert_contains(
        report["steps"][1]["detail"].as_str().unwrap(),
        &format!(
            "names the absolute output path {target} itself rather than through {{out:orders}}"
        ),
    );
    assert_eq!(
        std::fs::metadata(target).unwrap().modified().unwrap(),
        before
    );
    assert_eq!(runs_log(&s), "v1\n");
}

#[test]
fn a_command_that_writes_other_bytes_now_shows_how_they_differ() {
    let (s, _) = repository_with_script();
    // A script whose output depends on how often it has run (as one reading a clock would).
    s.file(
        "count.py",
        format!("import sys, os\n\
         log = {:?}\n\
         n = len(open(log).read().splitlines()) if os.path.exists(log) else 0\n\
         open(log, 'a').write('count\\n')\n\
         rows = open(sys.argv[1]).read().splitlines()\n\
         open(sys.argv[2], 'w').write('\\n'.join([rows[0] + ',run'] + [r + ',' + str(n) for r in rows[1:]]) + '\\n')\n", s.path().join("runs.log").display().to_string()),
    );
    git(s.path(), &["add", "count.py"]);
    git(s.path(), &["commit", "-q", "-m", "counting"]);
    s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=counted.csv",
        "--why",
        "runs",
        "--",
        "python3",
        "count.py",
        "{orders}",
        "{out:orders}",
    ]);
    let snapshot = s.snapshot();
    let r = s.run(&["reproduce", "orders", "--allow-exec"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, "capture -> orders:v2");
    assert_contains(&r.stdout, "differs");
    assert_contains(&r.stdout, "recorded orders:v2 has 3 rows; recomputed (");
    assert_contains(
        &r.stdout,
        "3 rows changed, 0 only in the recorded output, 0 only in the recomputed one",
    );
    assert_contains(&r.stdout, "changed cells by column: run 3");
    assert_contains(
        &r.stdout,
        "e.g. row 1: run: \"0\" recorded, \"1\" recomputed",
    );
    assert_eq!(
        snapshot,
        s.snapshot(),
        "nothing recorded, nothing left behind"
    );
}

/// Every version in the store, oldest first, as `name@n hash`.
fn version_hashes(s: &Sandbox) -> Vec<String> {
    let log = s.json(&["timeline", "--json"]);
    let mut lines: Vec<String> = log
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|e| e["produced"].as_array().unwrap().clone())
        .map(|v| {
            format!(
                "{}:v{} {}",
                v["dataset"].as_str().unwrap(),
                v["seq"],
                v["hash"].as_str().unwrap()
            )
        })
        .collect();
    lines.dedup();
    lines
}

#[test]
fn the_demo_plan_gives_the_same_hashes_in_fresh_stores_and_matches_the_golden_file() {
    let a = Sandbox::new();
    let out = a.ok(&["demo", "."]);
    assert_contains(
        &out,
        "$ sluice reproduce q3_by_shop\n  reproduced q3_by_shop:v1 (",
    );
    let b = Sandbox::with_demo();
    let in_a = version_hashes(&a);
    assert_eq!(in_a, version_hashes(&b), "two fresh demo stores");

    // The plan alone, run with `sluice run` on the same exports in a third fresh store, gives
    // the plan's part of the same history.
    let c = Sandbox::with_store();
    for name in [
        "quillby_2026q3.csv",
        "oxwater_2026q3.csv",
        "fennmarsh_2026q3.csv",
        "service_labels.csv",
        "technicians.csv",
    ] {
        c.file(
            &format!("exports/{name}"),
            std::fs::read(a.path().join("exports").join(name)).unwrap(),
        );
    }
    c.file(
        "q3_cleaning.json",
        std::fs::read(a.path().join("q3_cleaning.json")).unwrap(),
    );
    c.ok(&["run", "q3_cleaning.json"]);
    let in_c = version_hashes(&c);
    assert_eq!(
        in_c.len(),
        in_a.len() - 2,
        "all but the two pieces of outside work"
    );
    for v in &in_c {
        assert!(in_a.contains(v), "{v} is in the demo's history");
    }

    // The hashes are recorded: another checkout, another machine must give the same ones.
    let actual = in_a.join("\n") + "\n";
    let golden = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/golden/demo_versions.txt"
    );
    if std::env::var_os("SLUICE_BLESS").is_some() {
        std::fs::write(golden, &actual).unwrap();
    }
    let expected =
        std::fs::read_to_string(golden).expect("golden file (run with SLUICE_BLESS=1 once)");
    assert_eq!(expected, actual, "the demo's version hashes changed");
}

#[test]
fn a_hand_edit_whose_recorded_lineage_does_not_explain_it_is_named_with_the_cells() {
    // Two copies of one export, each edited by hand in a different cell.
    let s = Sandbox::with_store();
    let export =
        "order_id,technician,status\n41001,Ines,done\n41002,Tobiah,done\n41003,Caspar,done\n";
    for name in ["orders", "copy"] {
        s.file(&format!("{name}.csv"), export);
        s.ok(&["receive", &format!("{name}.csv"), "--as", name]);
    }
    s.file(
        "orders_edited.csv",
        export.replace("41001,Ines", "41001,Inès"),
    );
    s.ok(&[
        "receive",
        "orders_edited.csv",
        "--as",
        "orders",
        "--hand-edit-of",
        "orders:v1",
        "--why",
        "accent",
    ]);
    s.file(
        "copy_edited.csv",
        export.replace("41003,Caspar,done", "41003,Caspar,open"),
    );
    s.ok(&[
        "receive",
        "copy_edited.csv",
        "--as",
        "copy",
        "--hand-edit-of",
        "copy:v1",
        "--why",
        "reopened",
    ]);
    let out = s.run(&["reproduce", "orders"]);
    assert_eq!(out.code, 0, "{}", out.stdout);
    assert_contains(&out.stdout, "re-applied from its recorded lineage");

    // The two edits' provenance swapped behind sluice's back: each object is well formed, but
    // the orders edit now claims the other edit's cell.
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let n = db
        .execute(
            "UPDATE steps SET provenance = (SELECT group_concat(provenance) FROM steps AS o
               WHERE o.kind = 'hand_edit' AND o.id <> steps.id)
             WHERE kind = 'hand_edit'",
            [],
        )
        .unwrap();
    assert_eq!(n, 2);
    drop(db);
    let r = s.run(&["reproduce", "orders", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let last = report["steps"].as_array().unwrap().last().unwrap().clone();
    assert_eq!(last["kind"], "hand_edit");
    assert_eq!(last["result"], "differs");
    assert_contains(
        last["detail"].as_str().unwrap(),
        "the recorded lineage does not explain the edit",
    );
    let d = &last["difference"];
    assert_eq!(d["rows_changed"], 2);
    let cells: Vec<(u64, String, String, String)> = d["examples"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|e| {
            let row = e["recorded_row"].as_u64().unwrap();
            e["cells"]
                .as_array()
                .unwrap()
                .iter()
                .map(move |c| {
                    (
                        row,
                        c["column"].as_str().unwrap().to_string(),
                        c["recorded"].as_str().unwrap().to_string(),
                        c["computed"].as_str().unwrap().to_string(),
                    )
                })
                .collect::<Vec<_>>()
        })
        .collect();
    assert_eq!(
        cells,
        vec![
            // Changed by hand, but not listed: the input's value does not give the output's.
            (1, "technician".into(), "Inès".into(), "Ines".into()),
            // Listed as changed, but the output holds the input's value.
            (
                3,
                "status".into(),
                "done".into(),
                "done (listed as changed, but unchanged)".into()
            ),
        ]
    );
}

// Before: a rerun whose new export held a value a later step cannot read, or a value a hold
// point refuses, recorded the new export as the dataset's latest version (and the steps before
// the failure), then stopped. The whole chain now runs first in a trial copy of the store, so
// such a rerun records nothing and leaves "latest" where it was.
#[test]
fn a_rerun_that_fails_at_a_later_step_records_nothing() {
    let d = Sandbox::with_demo();
    let q3 = std::fs::read_to_string(d.path().join("exports/quillby_2026q3.csv")).unwrap();
    let header: Vec<&str> = q3.lines().next().unwrap().split(',').collect();
    let cost = header.iter().position(|h| *h == "parts_cost").unwrap();
    let status = header.iter().position(|h| *h == "status").unwrap();
    // The first data row's parts_cost made unreadable as an amount, or its status one the hold
    // point's rule (status one of done, open) refuses; the rest as exported.
    let with_cell = |col: usize, value: &str| -> String {
        let mut lines: Vec<String> = q3.lines().take(51).map(str::to_string).collect();
        let mut cells: Vec<String> = lines[1].split(',').map(str::to_string).collect();
        cells[col] = value.to_string();
        lines[1] = cells.join(",");
        lines.join("\n") + "\n"
    };
    assert!(
        !q3.lines().nth(1).unwrap().contains('"'),
        "the first data row has no quoted cell, so it can be split on commas"
    );
    d.file("exports/bad_amount.csv", with_cell(cost, "about forty"));
    d.file("exports/bad_status.csv", with_cell(status, "paused"));
    let latest = d.json(&["about", "quillby_orders", "--json"])["version"]["seq"].clone();
    for (file, says) in [
        (
            "bad_amount.csv",
            "cannot be read as an amount: data row 1 parts_cost \"about forty\"",
        ),
        ("bad_status.csv", "status one of done, open"),
    ] {
        let snapshot = d.snapshot();
        let r = d.run(&[
            "rerun",
            "q3_by_shop",
            "--with",
            &format!("quillby_orders=exports/{file}"),
        ]);
        assert_eq!(r.code, 1, "{file}: {}{}", r.stdout, r.stderr);
        assert_contains(&r.stderr, "in a trial run of the whole chain");
        assert_contains(&r.stderr, "nothing was recorded");
        assert_contains(&format!("{}{}", r.stdout, r.stderr), says);
        assert_eq!(snapshot, d.snapshot(), "{file}: the store changed");
        assert_eq!(
            d.json(&["about", "quillby_orders", "--json"])["version"]["seq"],
            latest
        );
        // Nothing of the trial is left in tmp/.
        let left: Vec<_> = std::fs::read_dir(d.path().join("sluice-store/tmp"))
            .unwrap()
            .flatten()
            .map(|e| e.file_name())
            .collect();
        assert!(left.is_empty(), "{file}: left in tmp/: {left:?}");
    }
    // The same rows without the bad cell rerun, and everything is recorded.
    let good: String = q3.lines().take(51).map(|l| format!("{l}\n")).collect();
    d.file("exports/good.csv", good);
    let out = d.ok(&[
        "rerun",
        "q3_by_shop",
        "--with",
        "quillby_orders=exports/good.csv",
    ]);
    assert_contains(&out, "recorded q3_by_shop:v2");
    assert_contains(&out, "done: every step recorded");
}

// A plan's row-by-row steps are computed again in one pass, as `run` computed them. When the
// third of four such steps no longer gives its recorded bytes (its parameters edited behind
// sluice's back), the steps before it are still judged one by one, it is named with how its
// output differs, and the replay stops there. Expected values worked out by hand from the
// three rows written here: trim gives `Ada Lin`, `Bo Sand`, `cy rowe`; the recorded case step
// wrote them in capitals, the edited one writes them in small letters, so every name differs.
#[test]
fn a_step_in_the_middle_of_a_fused_run_that_differs_is_named_and_stops_the_replay() {
    let s = Sandbox::with_store();
    s.file(
        "tallies.csv",
        "id,name,amount\n1, Ada Lin ,\"1,200.50\"\n2,Bo Sand,30\n3, cy rowe,cancel\n",
    );
    s.file(
        "plan.json",
        r#"{"sluice_plan": 2, "purpose": "the ferry tallies cleaned",
            "sources": [{"dataset": "t", "file": "tallies.csv", "reason": "the tally sheet"}],
            "steps": [
              {"dataset": "t", "clean": "trim", "settings": {}, "reason": "padding"},
              {"dataset": "t", "clean": "case", "settings": {"columns": ["name"], "to": "upper"}, "reason": "one spelling"},
              {"dataset": "t", "clean": "drop", "settings": {"predicate": "amount = 'cancel'"}, "reason": "cancelled"},
              {"dataset": "t", "clean": "number", "settings": {"columns": ["amount"]}, "reason": "amounts"}]}"#,
    );
    s.ok(&["run", "plan.json"]);
    assert_eq!(
        s.ok(&["retrieve", "t"]),
        "id,name,amount\n1,ADA LIN,1200.50\n2,BO SAND,30\n"
    );
    let whole = s.json(&["reproduce", "t", "--json"]);
    assert_eq!(whole["reproduced"], true);
    let results: Vec<&str> = whole["steps"]
        .as_array()
        .unwrap()
        .iter()
        .map(|st| st["result"].as_str().unwrap())
        .collect();
    assert_eq!(results, ["raw_intact", "same", "same", "same", "same"]);

    // The run leaves t:v3 recomputable; its bytes are kept, so that the recorded output can be
    // compared with what the edited step computes (it stays in the fused run).
    s.ok(&["retain", "t:v3"]);
    let db = rusqlite::Connection::open(store_dir(&s).join("lineage.db")).unwrap();
    let changed = db
        .execute(
            "UPDATE steps SET params = replace(params, '\"to\":\"upper\"', '\"to\":\"lower\"')
             WHERE operation = 'case'",
            [],
        )
        .unwrap();
    assert_eq!(changed, 1);
    drop(db);
    let r = s.run(&["reproduce", "t", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["reproduced"], false);
    let steps = report["steps"].as_array().unwrap();
    let seen: Vec<(&str, &str)> = steps
        .iter()
        .map(|st| {
            (
                st["produced"].as_str().unwrap(),
                st["result"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        seen,
        [
            ("t:v1", "raw_intact"),
            ("t:v2", "same"),
            ("t:v3", "differs")
        ]
    );
    let diff = &steps[2]["difference"];
    assert_eq!(diff["rows_changed"], 3);
    assert_eq!(diff["rows_only_recorded"], 0);
    assert_eq!(diff["changed_cells"][0]["column"], "name");
    let computed: Vec<&str> = diff["examples"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["cells"][0]["computed"].as_str().unwrap())
        .collect();
    assert_eq!(computed, ["ada lin", "bo sand", "cy rowe"]);
}
