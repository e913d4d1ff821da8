//! Work done outside sluice: hand edits taken in with `ingest --from` and outside commands run
//! with `sluice capture`, whose row lineage is inferred by a diff. The lineage is checked against
//! the edits the tests themselves make (they know which cells they changed and which rows they
//! removed), and the recorded code version against git's own `git rev-parse`.

mod common;

use std::process::Command;

use common::{assert_contains, Sandbox};
use sluice::provenance::{cell_changes, drops, row_runs};
use sluice::store::Store;

/// Ten work orders, keyed by order_id.
fn orders() -> Vec<Vec<String>> {
    let mut rows = vec![vec![
        "order_id".to_string(),
        "technician".to_string(),
        "status".to_string(),
        "parts_cost".to_string(),
    ]];
    for i in 0..10u32 {
        rows.push(vec![
            format!("{}", 41_000 + i),
            ["Ines", "Tobiah", "Caspar"][i as usize % 3].to_string(),
            if i % 4 == 3 { "test" } else { "done" }.to_string(),
            format!("{}.50", 10 + i),
        ]);
    }
    rows
}

fn to_csv(rows: &[Vec<String>]) -> String {
    rows.iter().map(|r| r.join(",") + "\n").collect()
}

fn open_store(s: &Sandbox) -> Store {
    Store::open(&s.path().join("sluice-store")).expect("open the store")
}

fn version(store: &Store, reference: &str) -> sluice::model::Version {
    sluice::refs::resolve(&store.lineage, reference).expect("resolve")
}

/// The store snapshot with the audit log's length taken out, and that length.
fn snapshot_and_audit(s: &Sandbox) -> (String, u64) {
    let snap = s.snapshot();
    let (rest, audit) = snap
        .rsplit_once("audit entries: ")
        .expect("the snapshot ends with the audit length");
    (rest.to_string(), audit.trim().parse().expect("a number"))
}

fn git(dir: &std::path::Path, args: &[&str]) -> String {
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

#[test]
fn a_hand_edit_names_exactly_the_cells_and_the_row_it_changed() {
    let s = Sandbox::with_store();
    let original = orders();
    s.file("orders.csv", to_csv(&original));
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "the Q3 export",
    ]);

    // The edit, as a person would make it in a spreadsheet: three cells changed (0-based data
    // row, column, new value), one data row deleted.
    let edits: [(usize, usize, &str); 3] = [(1, 1, "Tobias"), (4, 3, "99.00"), (7, 2, "open")];
    let deleted = 3usize;
    let mut edited = original.clone();
    for &(row, col, value) in &edits {
        edited[row + 1][col] = value.to_string();
    }
    edited.remove(deleted + 1);
    s.file("orders_edited.csv", to_csv(&edited));
    let out = s.ok(&[
        "receive",
        "orders_edited.csv",
        "--as",
        "orders",
        "--hand-edit-of",
        "orders:v1",
        "--why",
        "corrections phoned in by the shop",
    ]);
    assert_contains(&out, "hand edit");
    assert_contains(&out, "3 cells changed");
    assert_contains(&out, "1 row removed");

    let store = open_store(&s);
    let v1 = version(&store, "orders:v1");
    let v2 = version(&store, "orders:v2");
    // After the deleted row, input row r is output row r - 1.
    let out_row = |r: usize| (if r > deleted { r - 1 } else { r }) as u64;
    let expected: Vec<(u64, String, Option<String>, Option<String>)> = edits
        .iter()
        .map(|&(r, c, new)| {
            (
                out_row(r),
                original[0][c].clone(),
                Some(original[r + 1][c].clone()),
                Some(new.to_string()),
            )
        })
        .collect();
    let cells: Vec<(u64, String, Option<String>, Option<String>)> = cell_changes(&store, &v2)
        .unwrap()
        .into_iter()
        .map(|c| (c.row_idx, c.column, c.old, c.new))
        .collect();
    assert_eq!(cells, expected);
    let dropped = drops(&store, v2.step_id, v1.id).unwrap();
    assert_eq!(dropped.len(), 1);
    assert_eq!(dropped[0].row_idx, deleted as u64);
    assert_contains(&dropped[0].reason, "inferred by diff");
    // Every output row comes from an input row: those before the deleted one from themselves,
    // those after it from the row below.
    let runs: Vec<(u64, u64, u64)> = row_runs(&store, &v2, v1.id)
        .unwrap()
        .iter()
        .map(|r| (r.out_start, r.in_start, r.len))
        .collect();
    let n = original.len() as u64 - 1;
    let d = deleted as u64;
    assert_eq!(runs, vec![(0, 0, d), (d, d + 1, n - d - 1)]);

    let show = s.ok(&["about", "orders:v2"]);
    assert_contains(&show, "hand edit (lineage inferred by order)");
    assert_contains(&show, "corrections phoned in by the shop");
    let log = s.ok(&["timeline", "--dataset", "orders"]);
    assert_contains(&log, "hand edit");
    assert_contains(&log, "orders:v2");
    let json = s.json(&["about", "orders:v2", "--json"]);
    assert_eq!(json["step"]["kind"], "hand_edit");
    assert_eq!(json["step"]["lineage"], "inferred");
    assert_contains(&s.ok(&["verify"]), "intact");
}

#[test]
fn a_hand_edit_needs_a_reason_and_a_known_version() {
    let s = Sandbox::with_store();
    s.file("orders.csv", to_csv(&orders()));
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    let before = s.snapshot();
    let err = s.fails(
        2,
        &[
            "receive",
            "orders.csv",
            "--as",
            "orders",
            "--hand-edit-of",
            "orders:v1",
        ],
    );
    assert_contains(&err, "--why");
    let err = s.fails(
        2,
        &[
            "receive",
            "orders.csv",
            "--as",
            "orders",
            "--hand-edit-of",
            "orders:v7",
            "--why",
            "x",
        ],
    );
    assert_contains(&err, "orders:v7");
    assert_eq!(s.snapshot(), before);
}

/// The script of the outside-command tests: drops test orders and writes "Inès" for "Ines",
/// reading and writing the files named by its arguments.
const CLEAN_PY: &str = r#"import csv, sys
with open(sys.argv[1], newline="") as f:
    rows = list(csv.reader(f))
out = [rows[0]]
for r in rows[1:]:
    if r[2] == "test":
        continue
    if r[1] == "Ines":
        r[1] = "Inès"
    out.append(r)
with open(sys.argv[2], "w", newline="") as f:
    csv.writer(f, lineterminator="\n").writerows(out)
"#;

#[test]
fn an_outside_command_records_its_commit_branch_dirty_files_and_lineage() {
    let s = Sandbox::with_store();
    let original = orders();
    s.file("orders.csv", to_csv(&original));
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--key",
        "order_id",
    ]);

    // A repository with one commit holding the script and a notes file, then the notes file
    // changed (a tracked file modified: dirty) before the run.
    let dir = s.path();
    git(dir, &["init", "-q"]);
    git(dir, &["symbolic-ref", "HEAD", "refs/heads/cleaning"]);
    git(dir, &["config", "user.name", "Robin Example"]);
    git(dir, &["config", "user.email", "robin@example.org"]);
    s.file("clean.py", CLEAN_PY);
    s.file("NOTES.txt", "how the Q3 orders are cleaned\n");
    git(dir, &["add", "clean.py", "NOTES.txt"]);
    git(dir, &["commit", "-q", "-m", "the cleaning script"]);
    s.file("NOTES.txt", "how the Q3 orders are cleaned, and why\n");

    let out = s.ok(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=cleaned.csv",
        "--why",
        "drop test orders; Inès's name as she spells it",
        "--",
        "python3",
        "clean.py",
        "{orders}",
        "{out:orders}",
    ]);
    assert_contains(&out, "recorded orders:v2");
    assert_contains(&out, "capture;");

    // The outside reference: git itself (`git rev-parse HEAD`, `git rev-parse --abbrev-ref
    // HEAD`) for the commit and branch the command ran from.
    let head = git(dir, &["rev-parse", "HEAD"]);
    let branch = git(dir, &["rev-parse", "--abbrev-ref", "HEAD"]);
    let shown = s.json(&["about", "orders:v2", "--json"]);
    let code = &shown["step"]["code"];
    assert_eq!(shown["step"]["kind"], "command");
    assert_eq!(shown["step"]["lineage"], "inferred");
    assert_eq!(code["git"]["commit"], head.as_str());
    assert_eq!(code["git"]["branch"], branch.as_str());
    assert_eq!(code["git"]["dirty"], true);
    assert_eq!(code["git"]["modified"], serde_json::json!(["NOTES.txt"]));
    assert_eq!(
        code["command"],
        serde_json::json!(["python3", "clean.py", "{orders}", "{out:orders}"])
    );
    assert_eq!(code["exit_status"], 0);
    assert_eq!(code["inputs"][0]["hash"], shown_hash(&s, "orders:v1"));
    let text = s.ok(&["about", "orders:v2"]);
    assert_contains(
        &text,
        &format!("git {head} (branch {branch}, dirty: NOTES.txt)"),
    );
    assert_contains(
        &s.ok(&["about", "orders"]),
        "capture (lineage inferred by key order_id)",
    );

    // The lineage is what the script did (by construction of CLEAN_PY on `orders()`): every
    // test order dropped, every "Ines" changed, nothing else.
    let store = open_store(&s);
    let v1 = version(&store, "orders:v1");
    let v2 = version(&store, "orders:v2");
    let expected_drops: Vec<u64> = (0..original.len() as u64 - 1)
        .filter(|&r| original[r as usize + 1][2] == "test")
        .collect();
    let dropped: Vec<u64> = drops(&store, v2.step_id, v1.id)
        .unwrap()
        .iter()
        .map(|d| d.row_idx)
        .collect();
    assert_eq!(dropped, expected_drops);
    let kept: Vec<u64> = (0..original.len() as u64 - 1)
        .filter(|r| !expected_drops.contains(r))
        .collect();
    let expected_cells: Vec<(u64, String, String)> = kept
        .iter()
        .enumerate()
        .filter(|(_, &r)| original[r as usize + 1][1] == "Ines")
        .map(|(out_row, _)| (out_row as u64, "Ines".to_string(), "Inès".to_string()))
        .collect();
    let cells: Vec<(u64, String, String)> = cell_changes(&store, &v2)
        .unwrap()
        .into_iter()
        .map(|c| {
            assert_eq!(c.column, "technician");
            (c.row_idx, c.old.unwrap(), c.new.unwrap())
        })
        .collect();
    assert!(!expected_cells.is_empty());
    assert_eq!(cells, expected_cells);
    // Each output row maps to the input row the script copied it from.
    let runs = row_runs(&store, &v2, v1.id).unwrap();
    let mapped: Vec<u64> = (0..v2.n_rows)
        .map(|o| {
            let r = runs
                .iter()
                .find(|r| r.out_start <= o && o < r.out_start + r.len)
                .expect("every output row is covered");
            r.in_start + (o - r.out_start)
        })
        .collect();
    assert_eq!(mapped, kept);
    // The temporary copies of the inputs are gone.
    assert_eq!(
        std::fs::read_dir(dir.join("sluice-store/tmp"))
            .unwrap()
            .count(),
        0
    );
    assert_contains(&s.ok(&["verify"]), "intact");
}

fn shown_hash(s: &Sandbox, reference: &str) -> String {
    s.json(&["about", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string()
}

#[test]
fn paths_reach_the_command_through_environment_variables_too() {
    let s = Sandbox::with_store();
    s.file("orders.csv", to_csv(&orders()));
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    s.file(
        "env_copy.py",
        "import os, shutil\n\
         src = os.environ['SLUICE_INPUT_RAW_ORDERS']\n\
         dst = os.environ['SLUICE_OUTPUT_COPIED']\n\
         text = open(src).read().replace('Caspar', 'Kaspar')\n\
         open(dst, 'w').write(text)\n",
    );
    s.ok(&[
        "capture",
        "--input",
        "raw_orders=orders:v1",
        "--output",
        "copied=copy.csv",
        "--why",
        "spelling",
        "--",
        "python3",
        "env_copy.py",
    ]);
    let store = open_store(&s);
    let v = version(&store, "copied");
    // No input of the same dataset: the lineage is to the first input.
    let from = version(&store, "orders:v1");
    let caspar_rows = orders()[1..].iter().filter(|r| r[1] == "Caspar").count();
    let cells = cell_changes(&store, &v).unwrap();
    assert_eq!(cells.len(), caspar_rows);
    assert!(cells
        .iter()
        .all(|c| c.old.as_deref() == Some("Caspar") && c.new.as_deref() == Some("Kaspar")));
    assert!(drops(&store, v.step_id, from.id).unwrap().is_empty());
    let code = s.json(&["about", "copied", "--json"])["step"]["code"].clone();
    assert_eq!(code["git"], serde_json::Value::Null);
}

#[test]
fn a_failing_command_records_nothing_but_its_audit_entry() {
    let s = Sandbox::with_store();
    s.file("orders.csv", to_csv(&orders()));
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    let (before, audit_before) = snapshot_and_audit(&s);
    let err = s.fails(
        3,
        &[
            "capture",
            "--input",
            "orders",
            "--output",
            "orders=out.csv",
            "--why",
            "try",
            "--",
            "python3",
            "-c",
            "import sys; open(sys.argv[1], 'w').write('a\\n1\\n'); sys.exit(3)",
            "{out:orders}",
        ],
    );
    assert_contains(&err, "exited with status 3");
    let (after, audit_after) = snapshot_and_audit(&s);
    assert_eq!(after, before);
    assert_eq!(audit_after, audit_before + 1);
}

#[test]
fn a_missing_output_file_records_nothing_but_its_audit_entry() {
    let s = Sandbox::with_store();
    s.file("orders.csv", to_csv(&orders()));
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    let (before, audit_before) = snapshot_and_audit(&s);
    let err = s.fails(
        1,
        &[
            "capture",
            "--input",
            "orders",
            "--output",
            "orders=never.csv",
            "--why",
            "try",
            "--",
            "python3",
            "-c",
            "pass",
        ],
    );
    assert_contains(&err, "did not write");
    assert_contains(&err, "never.csv");
    let (after, audit_after) = snapshot_and_audit(&s);
    assert_eq!(after, before);
    assert_eq!(audit_after, audit_before + 1);

    // A file that was there before and that the command left alone is not its output either.
    s.file("stale.csv", to_csv(&orders()));
    let err = s.fails(
        1,
        &[
            "capture",
            "--input",
            "orders",
            "--output",
            "orders=stale.csv",
            "--why",
            "try",
            "--",
            "python3",
            "-c",
            "pass",
        ],
    );
    assert_contains(&err, "stale.csv");
}

#[test]
fn a_command_that_changes_its_input_is_refused() {
    let s = Sandbox::with_store();
    s.file("orders.csv", to_csv(&orders()));
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    let (before, audit_before) = snapshot_and_audit(&s);
    s.file(
        "sneaky.py",
        "import sys\n\
         open(sys.argv[1], 'a').write('41999,Ines,done,1.00\\n')\n\
         open(sys.argv[2], 'w').write(open(sys.argv[1]).read())\n",
    );
    let err = s.fails(
        1,
        &[
            "capture",
            "--input",
            "orders",
            "--output",
            "orders=out.csv",
            "--why",
            "try",
            "--",
            "python3",
            "sneaky.py",
            "{orders}",
            "{out:orders}",
        ],
    );
    assert_contains(&err, "changed the input");
    assert_contains(&err, "orders");
    let (after, audit_after) = snapshot_and_audit(&s);
    assert_eq!(after, before);
    assert_eq!(audit_after, audit_before + 1);
}
