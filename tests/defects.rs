//! Regression tests for defects found in use, each named after the problem it guards against.
//! The expected values are worked out by hand from the small tables written here (every step's
//! effect on every row is known), not taken from sluice's own output.

mod common;

use common::*;

/// Twelve work orders of the cooperative's workshop; names and services padded and in mixed
/// case, so that trim and case change two of the three cells of every row.
fn padded_orders() -> String {
    let mut t = String::from("order_id,customer,service\n");
    for i in 1..=12 {
        t.push_str(&format!(" {i:03} ,  Rider {i} , Brake Tune {i} \n"));
    }
    t
}

// Before: with two of three cells of every row changed, the diff by order paired nothing and
// reported every row removed and added again. The truth, known from the steps: 12 rows, all
// kept, each with its customer and service cells changed; order_id is changed too (padding).
#[test]
fn a_diff_of_cleaned_data_pairs_rows_by_the_recorded_lineage_not_by_similarity() {
    let s = Sandbox::with_store();
    s.file("orders.csv", padded_orders());
    s.ok(&["receive", "orders.csv", "--as", "o"]);
    s.ok(&["clean", "o", "trim", "--why", "padding"]);
    s.ok(&[
        "clean",
        "o",
        "case",
        "--columns",
        "customer",
        "--to",
        "upper",
        "--why",
        "one spelling",
    ]);
    let d = s.json(&["compare", "o:v1", "o:v3", "--json"]);
    assert_eq!(d["paired_by"], "lineage");
    assert_eq!(d["rows"]["removed"], 0);
    assert_eq!(d["rows"]["added"], 0);
    assert_eq!(d["rows"]["changed"], 12);
    assert_eq!(d["cells"]["changed"], 36);
    assert_eq!(d["lineage_steps"], serde_json::json!([2, 3]));
    let first = &d["changes"][0]["cells"];
    assert_eq!(first[1]["old"], "  Rider 1 ");
    assert_eq!(first[1]["new"], "RIDER 1");
    let text = s.ok(&["compare", "o:v1", "o:v3"]);
    assert_contains(
        &text,
        "rows paired through the recorded lineage: the row maps of steps 2, 3, back to o:v1",
    );
    // Newer first: the same pairs, seen the other way round.
    let back = s.json(&["compare", "o:v3", "o:v1", "--json"]);
    assert_eq!(back["paired_by"], "lineage");
    assert_eq!(back["rows"]["changed"], 12);
    assert_eq!(back["rows"]["removed"], 0);
}

// Before: a row dropped between two similar neighbours made the heuristic report one record
// changed into another. The lineage knows which row was dropped.
#[test]
fn a_dropped_row_is_removed_and_no_record_is_reported_changed_into_another() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order_id,shop,status,amount\n1,Ferry Lane,done,10\n2,Ferry Lane,test,10\n3,Ferry Lane,done,10\n",
    );
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&[
        "clean",
        "o",
        "drop",
        "status = 'test'",
        "--why",
        "training orders",
    ]);
    s.ok(&[
        "clean",
        "o",
        "case",
        "--columns",
        "shop,status",
        "--to",
        "upper",
        "--why",
        "one spelling",
    ]);
    let d = s.json(&["compare", "o:v1", "o:v3", "--json"]);
    assert_eq!(d["paired_by"], "lineage");
    assert_eq!(d["rows"]["removed"], 1);
    assert_eq!(d["rows"]["changed"], 2);
    assert_eq!(d["rows"]["added"], 0);
    let removed: Vec<&serde_json::Value> = d["changes"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["kind"] == "removed")
        .collect();
    assert_eq!(removed[0]["from_row"], 2);
    // No order_id cell changed: each record stayed itself.
    assert_eq!(
        d["cells"]["by_column"][0],
        serde_json::json!({"column": "order_id", "changed": 0})
    );
}

// Versions no recorded step relates are still compared by the heuristic, and the diff says so;
// a column declared as a key anywhere in the history keeps two different records apart.
#[test]
fn unrelated_versions_say_the_pairing_is_a_guess_and_never_pair_different_keys() {
    let s = Sandbox::with_store();
    s.file(
        "a.csv",
        "order_id,shop,amount\n1,Ferry Lane,10\n2,Mill Row,12\n",
    );
    s.file(
        "b.csv",
        "order_id,shop,amount\n1,Ferry Lane,10\n3,Mill Row,12\n",
    );
    s.ok(&["receive", "a.csv", "--as", "raw", "--key", "order_id"]);
    s.ok(&["receive", "b.csv", "--as", "other"]);
    let d = s.json(&["compare", "other:v1", "raw:v1", "--json"]);
    // raw declares order_id as its key, so this is a diff by key; the second order is removed
    // and another added, not one order changed into the other.
    assert_eq!(d["paired_by"], "key");
    assert_eq!(d["rows"]["changed"], 0);
    assert_eq!(d["rows"]["removed"], 1);
    s.ok(&["clean", "raw", "rename", "order_id=id", "--why", "short"]);
    s.ok(&[
        "clean",
        "raw",
        "rename",
        "id=order_id",
        "--why",
        "back",
        "--as",
        "cleaned",
    ]);
    s.file(
        "c.csv",
        "order_id,shop,amount\n1,Ferry Lane,10\n4,Mill Row,12\n",
    );
    s.ok(&["receive", "c.csv", "--as", "third"]);
    let d = s.json(&["compare", "third:v1", "cleaned:v1", "--json"]);
    assert_eq!(d["paired_by"], "order");
    assert_contains(
        d["pairing"].as_str().unwrap(),
        "no recorded steps relate the versions",
    );
    assert_eq!(d["rows"]["changed"], 0, "order 4 is not order 2 changed");
    assert_eq!(d["rows"]["removed"], 1);
    assert_eq!(d["rows"]["added"], 1);
}

// Before: raw data with exact duplicate rows refused a diff by key ("key is not unique"), with
// advice that could not work. Now duplicates are paired inside their group, through the
// lineage when the versions are related: the dedupe step dropped the second copy of order 2,
// so the first copy is the row that was kept.
#[test]
fn a_keyed_diff_of_raw_data_with_exact_duplicates_pairs_them_by_lineage() {
    let s = Sandbox::with_store();
    s.file("o.csv", "order_id,amount\n1,10\n2,12\n2,12\n3,7\n2,12\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&["clean", "o", "dedupe", "--why", "exported twice"]);
    let d = s.json(&["compare", "o:v1", "o:v2", "--key", "order_id", "--json"]);
    assert_eq!(d["paired_by"], "key");
    assert_eq!(d["duplicates"]["paired_by"], "lineage");
    assert_eq!(d["duplicates"]["groups"], 1);
    assert_eq!(d["duplicates"]["rows_from"], 3);
    assert_eq!(d["duplicates"]["rows_to"], 1);
    assert_eq!(d["rows"]["unchanged"], 3);
    assert_eq!(d["rows"]["removed"], 2);
    let removed: Vec<u64> = d["changes"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["kind"] == "removed")
        .map(|c| c["from_row"].as_u64().unwrap())
        .collect();
    assert_eq!(
        removed,
        vec![3, 5],
        "dedupe kept the first copy (data row 2)"
    );
}

// Before: a diff by a key that is not unique listed every row of every group. Now a count and
// the first few.
#[test]
fn a_keyed_diff_on_a_column_that_is_not_unique_shows_a_count_and_the_first_few_rows() {
    let mut t = String::from("shop,amount\n");
    for i in 0..300 {
        t.push_str(&format!("{},{i}\n", ["Ferry Lane", "Mill Row"][i % 2]));
    }
    let s = Sandbox::with_store();
    s.file("a.csv", &t);
    s.file("b.csv", t.replace(",299\n", ",300\n"));
    s.ok(&["receive", "a.csv", "--as", "a"]);
    s.ok(&["receive", "b.csv", "--as", "b"]);
    let text = s.ok(&["compare", "a:v1", "b:v1", "--key", "shop", "--counts"]);
    assert_contains(
        &text,
        "2 key values are shared by several rows (300 before, 300 after), paired within each group by order",
    );
    assert_contains(&text, "\"Ferry Lane\" rows 1, 3, 5, 7, 9, and 145 more");
    assert!(!text.contains(" 11,"), "no long lists of rows:\n{text}");
    let d = s.json(&["compare", "a:v1", "b:v1", "--key", "shop", "--json"]);
    assert_eq!(d["rows"]["changed"], 1);
}

/// Raw orders where order 1 was exported twice in different case; a plan upper-cases shop,
/// drops exact duplicates and inspects, as a hold point, that order ids are unique; then a clerk fixes
/// the kept order 1's shop by hand to "Ferry Lane".
fn case_dedupe_gate_and_hand_edit() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order_id,shop,amount\n1,ferry lane,10\n1,Ferry Lane,10\n2,Mill Row,5\n",
    );
    s.file(
        "plan.json",
        r#"{"sluice_plan": 2,
        "sources": [{"dataset": "o", "file": "o.csv"}],
        "steps": [
          {"dataset": "o", "clean": "case", "settings": {"columns": ["shop"], "to": "upper"}, "reason": "one spelling"},
          {"dataset": "o", "clean": "dedupe", "reason": "exported twice"},
          {"dataset": "o", "inspect": [{"dimension": "uniqueness", "columns": ["order_id"]}], "hold_point": true}
        ]}"#,
    );
    s.ok(&["run", "plan.json"]);
    s.file(
        "edit.csv",
        "order_id,shop,amount\n1,Ferry Lane,10\n2,MILL ROW,5\n",
    );
    s.ok(&[
        "receive",
        "edit.csv",
        "--as",
        "o",
        "--hand-edit-of",
        "o",
        "--why",
        "the shop's own spelling",
    ]);
    s
}

// Before: taking out the case step silently brought back the duplicate the dedupe had removed
// (the dedupe no longer saw two equal rows), the hand edit made the kept row equal to its
// returning twin, and the unique-id hold point recorded on o:v3 was not run again.
#[test]
fn a_withdrawal_runs_the_recorded_hold_point_again_and_refuses_a_hand_edited_row_appearing_twice() {
    let s = case_dedupe_gate_and_hand_edit();
    let before = s.snapshot();
    let r = s.run(&[
        "withdraw",
        "o:v2",
        "--why",
        "keep the shops' own spelling",
        "--json",
    ]);
    assert_eq!(r.code, 1, "refused:\n{}\n{}", r.stdout, r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let kinds: Vec<&str> = v["conflicts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["kind"].as_str().unwrap())
        .collect();
    assert!(kinds.contains(&"hold_point_fails"), "{kinds:?}");
    assert!(kinds.contains(&"edited_row_twice"), "{kinds:?}");
    assert_eq!(s.snapshot(), before, "a refused revert records nothing");

    let forced = s.json(&[
        "withdraw",
        "o:v2",
        "--why",
        "keep the shops' own spelling",
        "--accept-conflicts",
        "--json",
    ]);
    let check = &forced["report"]["checks"][0];
    assert_eq!(check["original"], "o:v3");
    assert_eq!(check["hold_point"], true);
    assert_eq!(check["passed"], false);
    assert_eq!(check["first_failing"], serde_json::json!([2]));
    // The dedupe changed nothing on the new history, so the revert's own version stands for
    // o:v3 and keeps the check result.
    assert_eq!(check["version"], "o:v5");
    let about = s.json(&["about", "o:v5", "--json"]);
    let checks = about["checks"].as_array().expect("checks listed");
    assert_eq!(checks.len(), 1, "{about}");
    assert_eq!(checks[0]["passed"], false);
    let forced_kinds: Vec<&str> = forced["report"]["forced"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["kind"].as_str().unwrap())
        .collect();
    assert!(
        forced_kinds.contains(&"edited_row_twice"),
        "{forced_kinds:?}"
    );
}

#[test]
fn a_withdrawal_with_accepted_conflicts_prints_the_inspections_it_ran_again() {
    let s = case_dedupe_gate_and_hand_edit();
    let out = s.ok(&[
        "withdraw",
        "o:v2",
        "--why",
        "keep the shops' own spelling",
        "--accept-conflicts",
    ]);
    assert_contains(&out, "inspections recorded on the old history, run again:");
    assert_contains(&out, "o:v5 (as on o:v3, a hold point)");
    assert_contains(&out, "fails: 1 row (first: 2)");
}

// Before: a hand edit re-applied by a withdrawal was recorded as exact lineage although the
// original's was inferred by a diff.
#[test]
fn a_hand_edit_re_applied_by_a_withdrawal_keeps_its_inferred_lineage() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order_id,shop,amount\n1, Ferry Lane ,10\n2,Mill Row,5\n",
    );
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&["clean", "o", "trim", "--why", "padding"]);
    s.ok(&[
        "clean",
        "o",
        "case",
        "--columns",
        "shop",
        "--to",
        "upper",
        "--why",
        "one spelling",
    ]);
    s.file(
        "edit.csv",
        "order_id,shop,amount\n1,FERRY LANE,12\n2,MILL ROW,5\n",
    );
    s.ok(&[
        "receive",
        "edit.csv",
        "--as",
        "o",
        "--hand-edit-of",
        "o",
        "--why",
        "till rounded",
    ]);
    s.ok(&["withdraw", "o:v3", "--why", "keep the case"]);
    let log = s.json(&["timeline", "--dataset", "o", "--json"]);
    let steps = log.as_array().unwrap();
    let reapplied = steps
        .iter()
        .map(|x| &x["step"])
        .find(|x| x["kind"] == "hand_edit" && !x["repeats_step"].is_null())
        .expect("the re-applied hand edit");
    assert_eq!(reapplied["lineage"], "inferred");
}

// Before: `explain --limit 3` printed 244 lines, one per dropped duplicate, because each
// duplicate's reason named the row it duplicated. Now one line per reason, with a count and the
// first rows, and at most `--limit` reasons.
#[test]
fn explain_groups_dropped_duplicates_into_one_line_and_honours_the_limit() {
    let mut t = String::from("shop,amount\n");
    // 40 distinct orders of one shop, each exported twice, and 5 test orders.
    for i in 0..40 {
        t.push_str(&format!("Ferry Lane,{i}\nFerry Lane,{i}\n"));
    }
    for i in 0..5 {
        t.push_str(&format!("Ferry Lane,-{}\n", i + 1));
    }
    let s = Sandbox::with_store();
    s.file("o.csv", &t);
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&["clean", "o", "dedupe", "--why", "exported twice"]);
    s.ok(&["clean", "o", "drop", "amount < 0", "--why", "test orders"]);
    s.ok(&[
        "clean",
        "o",
        "summarize",
        "--by",
        "shop",
        "--as",
        "by_shop",
        "--why",
        "count",
    ]);
    let text = s.ok(&[
        "explain", "by_shop", "--row", "1", "--column", "count", "--limit", "3",
    ]);
    assert!(text.lines().count() <= 16, "{text}");
    assert_contains(
        &text,
        "dropped 40 rows of this group: duplicate of an earlier row (the whole row) (data rows 2 (of 1), 4 (of 3), 6 (of 5), ...",
    );
    assert_contains(&text, "dropped 5 rows of this group: ");
    let e = s.json(&[
        "explain", "by_shop", "--row", "1", "--column", "count", "--limit", "3", "--json",
    ]);
    assert_eq!(e["contributing"]["rows"], 40);
    let dedupe = e["upstream"]
        .as_array()
        .unwrap()
        .iter()
        .find(|u| u["operation"] == "dedupe")
        .unwrap();
    assert_eq!(dedupe["dropped"].as_array().unwrap().len(), 1);
    assert_eq!(dedupe["dropped"][0]["rows"], 40);
}

// Before: amounts such as "335,00 USD" failed with advice to keep or blank them, although
// `--decimal-comma` reads every one. Decimal commas are common practice in much of Europe.
#[test]
fn number_suggests_the_decimal_comma_when_it_reads_the_failing_values() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order_id,amount\n1,\"335,00 USD\"\n2,\"12,50 EUR\"\n",
    );
    s.ok(&["receive", "o.csv", "--as", "o"]);
    let err = s.fails(
        1,
        &[
            "clean",
            "o",
            "number",
            "--columns",
            "amount",
            "--why",
            "text",
        ],
    );
    assert_contains(
        &err,
        "all of them read as amounts written with a decimal comma: retry with --decimal-comma (`sluice clean o number --columns amount --decimal-comma`",
    );
    assert!(!err.contains("--on-error keep"), "{err}");
    s.ok(&[
        "clean",
        "o",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--why",
        "text",
    ]);
    assert_eq!(
        s.ok(&["retrieve", "o"]),
        "order_id,amount\n1,335.00\n2,12.50\n"
    );
    // Values neither mark reads keep the old advice.
    s.file("p.csv", "order_id,amount\n1,twelve\n");
    s.ok(&["receive", "p.csv", "--as", "p"]);
    let err = s.fails(
        1,
        &[
            "clean",
            "p",
            "number",
            "--columns",
            "amount",
            "--why",
            "text",
        ],
    );
    assert_contains(&err, "--on-error keep");
}

// Before: a header-only file was recorded with 0 rows and no word.
#[test]
fn a_header_only_file_is_recorded_with_a_warning() {
    let s = Sandbox::with_store();
    s.file("o.csv", "order_id,shop,amount\n");
    let r = s.run(&["receive", "o.csv", "--as", "o"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_contains(
        &format!("{}{}", r.stdout, r.stderr),
        "o.csv has a header and no data rows: recorded as an empty table of 3 columns",
    );
}

// Before: a tab-separated text file named .xls was recorded without a word, and a legacy binary
// workbook got a message about NUL bytes and UTF-16. The Compound File signature is the one the
// format's specification gives ([MS-CFB] 2.2: D0 CF 11 E0 A1 B1 1A E1).
#[test]
fn a_legacy_xls_workbook_is_refused_by_name_and_a_text_file_named_xls_is_noted() {
    let s = Sandbox::with_store();
    let mut ole = vec![0xD0, 0xCF, 0x11, 0xE0, 0xA1, 0xB1, 0x1A, 0xE1];
    ole.extend(std::iter::repeat_n(0u8, 504));
    s.file("old.xls", &ole);
    let before = s.snapshot();
    let err = s.fails(2, &["receive", "old.xls", "--as", "old"]);
    assert_contains(&err, "old.xls is a legacy binary Excel workbook");
    assert_contains(&err, "save it as .xlsx");
    assert!(!err.contains("UTF-16"), "{err}");
    assert_eq!(s.snapshot(), before);

    s.file("till.xls", "order_id\tshop\n1\tFerry Lane\n");
    let r = s.run(&["receive", "till.xls", "--as", "till"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_contains(
        &format!("{}{}", r.stdout, r.stderr),
        "till.xls is named .xls but holds text, not a workbook: it was read as delimited text",
    );
    let shown = s.json(&["about", "till", "--json"]);
    assert_eq!(
        shown["version"]["header"],
        serde_json::json!(["order_id", "shop"])
    );
    assert_eq!(shown["version"]["n_rows"], 1);

    s.file(
        "page.xls",
        "<html><body><table><tr><td>1</td></tr></table></body></html>\n",
    );
    let err = s.fails(2, &["receive", "page.xls", "--as", "page"]);
    assert_contains(&err, "page.xls is named .xls but holds a web page or XML");
}

// Before: a report written into a folder that does not exist named the internal temporary file
// (".r.html.sluice-part"). Now the message names the folder given.
#[test]
fn a_report_into_a_missing_folder_names_that_folder() {
    let s = Sandbox::with_penguins();
    let before = s.snapshot();
    let err = s.fails(2, &["report", "penguins", "-o", "missing/r.html"]);
    assert_contains(
        &err,
        "cannot write missing/r.html: the folder missing does not exist",
    );
    assert!(!err.contains("sluice-part"), "{err}");
    assert_eq!(s.snapshot(), before, "nothing recorded");
    let err = s.fails(2, &["retrieve", "penguins", "-o", "missing/p.csv"]);
    assert!(!err.contains("sluice-part"), "{err}");
}

// Before: an outside command that rewrote a declared key column lost all row lineage (every row
// removed and added again), with no way to say the rows are the same. `--match-by-order`
// matches them by order, and the step records that it did.
#[test]
fn an_outside_command_that_rewrites_the_key_can_be_matched_by_order() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order_id,shop,amount\nq-1,Ferry Lane,10\nq-2,Mill Row,12\nq-3,Ferry Lane,7\n",
    );
    s.ok(&["receive", "o.csv", "--as", "o", "--key", "order_id"]);
    let run = |extra: &[&str], out: &str, prefix: &str| {
        let target = "{out:o}";
        let script = format!("sed 's/^q-/{prefix}-/' {{o}} > {target}");
        let mut args = vec!["capture", "--input", "o=o:v1", "--output"];
        let output = format!("o={out}");
        args.push(&output);
        args.extend_from_slice(&["--why", "till prefix"]);
        args.extend_from_slice(extra);
        args.extend_from_slice(&["--", "sh", "-c", &script]);
        s.ok(&args)
    };
    let out = run(&[], "by_key.csv", "Q3");
    assert_contains(
        &out,
        "no row kept its key order_id: if the command rewrote the key values, run it again matching rows by order",
    );
    let by_key = s.json(&["about", "o:v2", "--json"]);
    assert_eq!(by_key["step"]["params"]["inferred_by"]["diff"], "key");
    assert_eq!(by_key["step"]["rows_in"], 3);
    let d = s.json(&["compare", "o:v1", "o:v2", "--json"]);
    assert_eq!(d["rows"]["removed"], 3, "by key, no row is kept");

    run(&["--match-by-order"], "by_order.csv", "FL");
    let by_order = s.json(&["about", "o:v3", "--json"]);
    assert_eq!(
        by_order["step"]["params"]["inferred_by"],
        serde_json::json!({"diff": "order", "asked": true})
    );
    // The lineage now pairs the rows: each order kept, its id changed.
    let d = s.json(&["compare", "o:v1", "o:v3", "--json"]);
    assert_eq!(d["paired_by"], "lineage");
    assert_eq!(d["rows"]["changed"], 3);
    assert_eq!(d["rows"]["removed"], 0);
    let t = s.json(&["trace", "o:v3", "--row", "2", "--column", "shop", "--json"]);
    assert_eq!(t["end"]["path"], "o.csv");
}

fn git(dir: &std::path::Path, args: &[&str]) -> String {
    let out = std::process::Command::new("git")
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

// Before: the code state of an outside command said "clean" at the repository's commit although
// the script it ran was untracked (or ignored), so the commit did not hold the code that ran.
// Now the files its command line names are stored with the step and their git state recorded;
// `git status --porcelain --ignored` is the outside reference for that state.
#[test]
fn an_untracked_or_ignored_script_is_recorded_with_its_bytes_and_replayed_from_them() {
    let s = Sandbox::with_store();
    let dir = s.path();
    git(dir, &["init", "-q"]);
    git(dir, &["config", "user.name", "Robin Example"]);
    git(dir, &["config", "user.email", "robin@example.org"]);
    s.file(".gitignore", "*.local\n");
    s.file("NOTES.txt", "how the orders are cleaned\n");
    git(dir, &["add", ".gitignore", "NOTES.txt"]);
    git(dir, &["commit", "-q", "-m", "notes"]);
    s.file("o.csv", "order_id,shop\n1,ferry lane\n2,mill row\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    let script = "tr a-z A-Z < \"$1\" > \"$2\"\n";
    s.file("clean.sh", script);
    s.file("settings.local", "upper\n");
    let status = git(dir, &["status", "--porcelain", "--ignored"]);
    assert_contains(&status, "?? clean.sh");
    assert_contains(&status, "!! settings.local");
    s.ok(&[
        "capture",
        "--input",
        "o",
        "--output",
        "o=out.csv",
        "--why",
        "upper case",
        "--",
        "sh",
        "clean.sh",
        "{o}",
        "{out:o}",
        "settings.local",
    ]);
    let shown = s.json(&["about", "o:v2", "--json"]);
    let code = &shown["step"]["code"];
    assert_eq!(code["git"]["dirty"], true, "{code}");
    assert_eq!(code["git"]["untracked"], serde_json::json!(["clean.sh"]));
    assert_eq!(
        code["git"]["ignored"],
        serde_json::json!(["settings.local"])
    );
    let files = code["files"].as_array().unwrap();
    assert_eq!(files[0]["path"], "clean.sh");
    assert_eq!(files[0]["git"], "untracked");
    assert_eq!(
        files[0]["hash"],
        blake3::hash(script.as_bytes()).to_hex().to_string()
    );
    assert_eq!(files[1]["git"], "ignored");
    assert_contains(&s.ok(&["about", "o:v2"]), "clean.sh (untracked)");
    assert_contains(&s.ok(&["verify"]), "intact");

    // The script changes on disk afterwards; a replay runs the recorded bytes and so gives the
    // recorded output again.
    s.file("clean.sh", "tr a-z x < \"$1\" > \"$2\"\n");
    let out = s.ok(&["reproduce", "o:v2", "--allow-exec"]);
    assert_contains(&out, "run with the recorded bytes of clean.sh");
    let r = s.json(&["reproduce", "o:v2", "--allow-exec", "--json"]);
    assert_eq!(r["reproduced"], true, "{r}");
}

// Before: `drop "status == 'test'"` said only "expected a column name". Equality is one `=`,
// and the refusal now says so, at the column of the `==`.
#[test]
fn a_predicate_written_with_double_equals_says_equality_is_one_equals_sign() {
    let s = Sandbox::with_store();
    s.file("o.csv", "order_id,status\n1,done\n2,test\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    let before = s.snapshot();
    let err = s.fails(
        2,
        &["clean", "o", "drop", "status == 'test'", "--why", "tests"],
    );
    assert_contains(&err, "column 8");
    assert_contains(&err, "equality is one \"=\"");
    assert!(!err.contains("expected a column name"), "{err}");
    assert_eq!(s.snapshot(), before, "nothing recorded");
    // One `=` is the comparison the user meant: the test order goes.
    s.ok(&["clean", "o", "drop", "status = 'test'", "--why", "tests"]);
    assert_eq!(s.ok(&["retrieve", "o"]), "order_id,status\n1,done\n");
}

/// Runs `args` with standard output a pipe whose reading end is already closed, as when the
/// output goes into `head -c 10` that has finished: every write fails with a broken pipe.
fn into_closed_pipe(s: &Sandbox, args: &[&str]) -> (i32, String) {
    let (reader, writer) = std::io::pipe().expect("a pipe");
    drop(reader);
    let out = s
        .command(args)
        .stdout(writer)
        .stderr(std::process::Stdio::piped())
        .output()
        .expect("run sluice");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

// Before: `sluice timeline --json | head -c 10` printed "error: Broken pipe" (the JSON writer's
// error hid the pipe's), while the text output ended quietly. Every reading command, in text and
// in JSON, now ends quietly with status 0 when its reader has gone (common practice for Unix
// filters: a closed pipe is the reader's choice, not a failure).
#[test]
fn output_into_a_closed_pipe_ends_quietly_in_text_and_json() {
    let s = Sandbox::with_demo();
    let commands: &[&[&str]] = &[
        &["timeline"],
        &["about", "all_orders"],
        &["compare", "all_orders:v4", "all_orders:v5"],
        &[
            "compare",
            "quillby_orders:v1",
            "quillby_orders:v2",
            "--counts",
        ],
        &[
            "trace",
            "all_orders",
            "--row",
            "3",
            "--column",
            "parts_cost",
        ],
        &["explain", "q3_by_shop", "--row", "1", "--column", "count"],
        &["impact", "technicians:v1"],
        &["reproduce", "q3_by_shop"],
        &["verify"],
        &["identity"],
        &["identify", "q3_by_shop-report.html"],
    ];
    for args in commands {
        for json in [false, true] {
            let mut a = args.to_vec();
            if json {
                a.push("--json");
            }
            let (code, err) = into_closed_pipe(&s, &a);
            assert_eq!(code, 0, "sluice {}: {err}", a.join(" "));
            assert_eq!(err, "", "sluice {} wrote to standard error", a.join(" "));
        }
    }
    // Commands without --json that print data or text.
    for args in [
        &["retrieve", "all_orders"][..],
        &["retrieve", "all_orders", "--format", "jsonl"],
        &["export", "q3_by_shop", "--format", "plan"],
        &["lineage"],
        &["completions", "bash"],
        &["manual"],
        &["--help"],
    ] {
        let (code, err) = into_closed_pipe(&s, args);
        assert_eq!(code, 0, "sluice {}: {err}", args.join(" "));
        assert_eq!(err, "", "sluice {} wrote to standard error", args.join(" "));
    }
}

// Before: "(1 sources, 1 steps)" and "1 of 1 rules failed"; screens now write one thing in the
// singular, and counts with thousands separators as every other screen does.
#[test]
fn counts_of_one_are_written_in_the_singular() {
    let s = Sandbox::with_store();
    s.file("o.csv", "order_id,status\n1,done\n2,test\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&["clean", "o", "drop", "status = 'test'", "--why", "tests"]);
    let out = s.ok(&["export", "o", "--format", "plan", "-o", "plan.json"]);
    assert_contains(&out, "wrote the plan of o (1 source, 1 step) to plan.json");
    let out = s.ok(&["report", "o", "-o", "o.md", "--format", "md"]);
    assert_contains(&out, "(2 steps)");
    s.ok(&["receive", "o.csv", "--as", "p"]);
    let out = s.ok(&["report", "p", "-o", "p.md", "--format", "md"]);
    assert_contains(&out, "wrote the lineage report of p:v1 (1 step) to p.md");
    assert!(!out.contains("1 steps"), "{out}");
}

// Before: a file named through `..` was recorded, and shown by trace, as
// `/home/.../plans/../o.csv`. The absolute path recorded is the file's real path.
#[test]
fn the_absolute_path_of_a_raw_file_is_recorded_without_dot_dot() {
    let s = Sandbox::with_store();
    s.file("plans/keep.txt", "");
    s.file("o.csv", "order_id,status\n1,done\n");
    s.ok(&["receive", "plans/../o.csv", "--as", "o"]);
    let t = s.json(&["trace", "o", "--row", "1", "--column", "status", "--json"]);
    let real = std::fs::canonicalize(s.path().join("o.csv")).unwrap();
    assert_eq!(t["end"]["path"], "plans/../o.csv", "as given");
    assert_eq!(t["end"]["absolute_path"], real.display().to_string());
}

// Before: the demo's outside script printed "fixed 74 orders" among sluice's own lines, with
// nothing to say whose line it was. Its line now names the script and what it did.
#[test]
fn the_demo_script_labels_its_own_line() {
    let s = Sandbox::new();
    let r = s.run(&["demo", "."]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let all = format!("{}{}", r.stdout, r.stderr);
    assert!(!all.contains("\nfixed "), "{all}");
    // The rows the script changed are counted in its input, the version its step read.
    let about = s.json(&["about", "reviewed_orders:v1", "--json"]);
    let input = about["step"]["inputs"][0].as_str().unwrap().to_string();
    let raw = s.ok(&["retrieve", &input]);
    let header: Vec<&str> = raw.lines().next().unwrap().split(',').collect();
    let col = header.iter().position(|h| *h == "technician").unwrap();
    let n = raw
        .lines()
        .skip(1)
        .filter(|l| l.split(',').nth(col) == Some("Ines"))
        .count();
    assert!(n > 0);
    assert_contains(
        &all,
        &format!("restore_accents.py: Inès written in {n} orders"),
    );
}

// Before: compare wrote row 1,001 where trace, explain and every message write data row 1001.
// Row numbers name a row and are written alike on every screen, without separators; counts
// keep theirs.
#[test]
fn row_numbers_are_written_alike_on_every_screen_and_counts_with_separators() {
    let s = Sandbox::with_store();
    let table = |last: &str| {
        let mut t = String::from("order_id,shop\n");
        for i in 1..=1000 {
            t.push_str(&format!("{i},Ferry Lane\n"));
        }
        t.push_str(&format!("1001,{last}\n"));
        t
    };
    s.file("a.csv", table("Ferry Lane"));
    s.file("b.csv", table("Mill Row"));
    s.ok(&["receive", "a.csv", "--as", "o", "--key", "order_id"]);
    s.ok(&["receive", "b.csv", "--as", "o", "--key", "order_id"]);
    let out = s.ok(&["compare", "o:v1", "o:v2"]);
    assert_contains(
        &out,
        "rows: 1,001 before, 1,001 after; 1,001 kept (1 of them changed)",
    );
    let row = out
        .lines()
        .find(|l| l.contains("Mill«·Row»") || l.contains("Mill"))
        .unwrap_or_else(|| panic!("{out}"));
    assert!(row.trim_start().starts_with("1001 "), "{row}");
    let trace = s.ok(&["trace", "o", "--row", "1001", "--column", "shop"]);
    assert_contains(&trace, "data row 1001");
}

// Before: `retrieve -o` wrote a temporary file beside the target and renamed it into place,
// also over a pipe or a device: `-o /dev/null` run as root replaced the device with a regular
// file. A named pipe stands in for the device here (`mkfifo`, POSIX); what comes out of it
// must be the version's bytes, and it must still be a pipe afterwards.
#[test]
fn retrieve_into_a_named_pipe_writes_into_it_and_leaves_it_a_pipe() {
    use std::io::Read;
    use std::os::unix::fs::FileTypeExt;
    let s = Sandbox::with_store();
    let table = "order_id,shop\n1,Ferry Lane\n2,\"Mill Row, east\"\n";
    s.file("orders.csv", table);
    s.ok(&["receive", "orders.csv", "--as", "o"]);
    let pipe = s.path().join("out.pipe");
    let made = std::process::Command::new("mkfifo")
        .arg(&pipe)
        .status()
        .expect("mkfifo runs");
    assert!(made.success());
    let reading = {
        let pipe = pipe.clone();
        std::thread::spawn(move || {
            let mut got = Vec::new();
            std::fs::File::open(&pipe)
                .and_then(|mut f| f.read_to_end(&mut got))
                .map(|_| got)
        })
    };
    s.ok(&["retrieve", "o", "-o", pipe.to_str().expect("a UTF-8 path")]);
    // First the kind: a pipe replaced by a file was never opened for writing, so its reader
    // would wait for ever (the failed test ends the process, and the reader with it).
    let kind = std::fs::symlink_metadata(&pipe).expect("the pipe is there");
    assert!(kind.file_type().is_fifo(), "{kind:?}");
    let got = reading
        .join()
        .expect("the reading thread ends")
        .expect("the pipe is read");
    assert_eq!(String::from_utf8_lossy(&got), table);
}

// Before: `sluice --store FOLDER setup` (and `demo`, and `borrow`) made the store in the working
// directory, ignoring `--store`, and every later command given the same `--store` then found no
// store there.
#[test]
fn commands_that_make_a_store_make_it_where_store_points_and_refuse_two_different_folders() {
    let s = Sandbox::new();
    s.ok(&["--store", "project", "setup"]);
    assert!(s.path().join("project/sluice-store/lineage.db").is_file());
    assert!(!s.path().join("sluice-store").exists());
    // The store's own folder names the same project.
    s.ok(&["--store", "other/sluice-store", "setup"]);
    assert!(s.path().join("other/sluice-store/lineage.db").is_file());
    // The folder and --store agreeing is not a conflict.
    s.ok(&["--store", "third", "setup", "third"]);
    assert!(s.path().join("third/sluice-store/lineage.db").is_file());
    // Two different folders: refused, nothing made.
    let err = s.fails(2, &["--store", "left", "setup", "right"]);
    assert_contains(
        &err,
        "two folders to make the store in: DIR right and --store left",
    );
    assert!(!s.path().join("left").exists() && !s.path().join("right").exists());
    // SLUICE_STORE from the environment gives way to the folder given.
    let out = s
        .command(&["setup", "fourth"])
        .env("SLUICE_STORE", s.path().join("elsewhere"))
        .output()
        .expect("run sluice");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(s.path().join("fourth/sluice-store/lineage.db").is_file());
    assert!(!s.path().join("elsewhere").exists());
    // `demo` and `borrow` make stores too, and follow the same rule.
    s.ok(&["--store", "tour", "demo"]);
    assert!(s.path().join("tour/sluice-store/lineage.db").is_file());
    let err = s.fails(2, &["--store", "tour2", "demo", "tour3"]);
    assert_contains(
        &err,
        "two folders to make the store in: DIR tour3 and --store tour2",
    );
    let err = s.fails(2, &["--store", "copy", "borrow", "tour", "--into", "copy2"]);
    assert_contains(
        &err,
        "two folders to make the store in: --into copy2 and --store copy",
    );
    // And the store --store named is the one later commands use.
    s.file("bikes.csv", "id,kind\n1,cargo\n2,touring\n");
    s.ok(&[
        "--store",
        "project",
        "receive",
        "bikes.csv",
        "--as",
        "bikes",
    ]);
    assert_contains(&s.ok(&["--store", "project", "timeline"]), "bikes");
}
