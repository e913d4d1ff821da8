//! `sluice withdraw`: one step taken out of a dataset's history, every later step applied again,
//! nothing deleted; conflicts with later hand edits listed and refused, or resolved by the
//! documented `--force` rules.

mod common;

use common::{assert_contains, Sandbox};

/// A small export with the usual dirt: padded names, a row exported twice, amounts with a
/// decimal comma, a cancelled order.
const RAW: &str = "id,name,amount,status\n\
    1, Ann ,\"1,5\",done\n\
    2,Bob,\"2,0\",open\n\
    1, Ann ,\"1,5\",done\n\
    3,Cid, 7 ,cancelled\n\
    4,Dee,3,done\n";

/// Runs a revert that must be refused (exit code 1); returns what it printed.
fn refused(s: &Sandbox, args: &[&str]) -> String {
    let r = s.run(args);
    assert_eq!(r.code, 1, "expected a refusal:\n{}\n{}", r.stdout, r.stderr);
    r.stdout
}

/// The steps `log --json` lists for `dataset`, newest first.
fn steps_of(s: &Sandbox, dataset: &str) -> Vec<serde_json::Value> {
    s.json(&["timeline", "--dataset", dataset, "--json"])
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["step"].clone())
        .collect()
}

fn hash_of(s: &Sandbox, reference: &str) -> String {
    s.json(&["about", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string()
}

/// trim -> dedupe -> number -> keep, as t:v2 .. t:v5.
fn chain() -> Sandbox {
    let s = Sandbox::with_store();
    s.file("raw.csv", RAW);
    s.ok(&["receive", "raw.csv", "--as", "t", "--why", "export"]);
    s.ok(&["clean", "t", "trim", "--why", "padded names"]);
    s.ok(&["clean", "t", "dedupe", "--why", "exported twice"]);
    s.ok(&[
        "clean",
        "t",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--why",
        "amounts as numbers",
    ]);
    s.ok(&[
        "clean",
        "t",
        "keep",
        "status != 'cancelled'",
        "--why",
        "cancelled orders do not count",
    ]);
    s
}

#[test]
fn reverting_dedupe_gives_the_bytes_of_the_chain_without_it() {
    let s = chain();
    let before: Vec<String> = (1..=5).map(|n| hash_of(&s, &format!("t:v{n}"))).collect();
    let out = s.ok(&[
        "withdraw",
        "t:v3",
        "--why",
        "the two orders 1 are separate sales",
    ]);
    assert_contains(&out, "withdrew step 3 (it made t:v3): t is now t:v8");
    assert_contains(&out, "the table of t:v2 again, without step 3");
    assert_contains(&out, "nothing was deleted");

    // The same chain without dedupe, run directly on t:v2 as another dataset.
    s.ok(&[
        "clean",
        "t:v2",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--why",
        "direct",
        "--as",
        "direct",
    ]);
    s.ok(&[
        "clean",
        "direct",
        "keep",
        "status != 'cancelled'",
        "--why",
        "direct",
    ]);
    // The two later steps are re-applied in one pass (both work row by row); each gives the
    // bytes the same step gives alone.
    assert_eq!(
        hash_of(&s, "t:v7"),
        hash_of(&s, "direct:v1"),
        "number again, same bytes"
    );
    assert_eq!(
        hash_of(&s, "t:v8"),
        hash_of(&s, "direct:v2"),
        "same bytes, same hash"
    );
    assert_eq!(
        hash_of(&s, "t:v6"),
        hash_of(&s, "t:v2"),
        "the revert's own version is t:v2's table"
    );

    // Nothing deleted: every earlier version is still there with its hash.
    for (n, h) in before.iter().enumerate() {
        assert_eq!(&hash_of(&s, &format!("t:v{}", n + 1)), h);
    }
    // The revert step points at the step it took out; the later ones at the steps they repeat.
    let steps = steps_of(&s, "t");
    let revert = steps.iter().find(|x| x["kind"] == "revert").unwrap();
    assert_eq!(revert["reverts_step"], 3);
    assert_eq!(revert["reason"], "the two orders 1 are separate sales");
    let repeats: Vec<i64> = steps
        .iter()
        .filter_map(|x| x["repeats_step"].as_i64())
        .collect();
    assert_eq!(
        repeats,
        vec![4, 5],
        "number repeats step 4, keep step 5 (oldest first)"
    );
    assert_contains(&s.ok(&["verify"]), "intact");
    assert_eq!(
        s.ok(&["retrieve", "t"]),
        "id,name,amount,status\n1,Ann,1.5,done\n2,Bob,2.0,open\n1,Ann,1.5,done\n4,Dee,3,done\n"
    );
}

#[test]
fn trace_through_a_revert_names_it_and_reaches_the_raw_line() {
    let s = chain();
    s.ok(&[
        "withdraw",
        "t:v3",
        "--why",
        "the two orders 1 are separate sales",
    ]);
    // Row 3 is the second order 1, which dedupe had dropped and the revert brought back.
    let out = s.ok(&["trace", "t", "--row", "3", "--column", "name"]);
    assert_contains(&out, "step 6 · withdraw (exact)");
    assert_contains(&out, "why     the two orders 1 are separate sales");
    assert_contains(
        &out,
        "withdrew step 3: t:v6 is t:v2's table from before that step",
    );
    assert_contains(&out, "before  t:v1 row 3 name: \" Ann \"");
    assert_contains(&out, "t:v1 line 4, column name: \" Ann \"");
    let j = s.json(&["trace", "t", "--row", "3", "--column", "name", "--json"]);
    let hops = j["hops"].as_array().unwrap();
    assert!(hops.iter().any(|h| h["reverts_step"] == 3));
}

/// A hand edit after dedupe changes the amount of order 1, whose duplicate dedupe dropped.
fn chain_with_hand_edit() -> Sandbox {
    let s = chain();
    let edited = s
        .ok(&["retrieve", "t"])
        .replace("1,Ann,1.5,done", "1,Ann,1.75,done");
    s.file("edit.csv", edited);
    s.ok(&[
        "receive",
        "edit.csv",
        "--as",
        "t",
        "--hand-edit-of",
        "t",
        "--why",
        "the till rounded order 1",
    ]);
    s
}

#[test]
fn a_later_edit_to_a_row_whose_duplicate_comes_back_refuses_the_revert() {
    let s = chain_with_hand_edit();
    let snapshot = s.snapshot();
    let out = refused(&s, &["withdraw", "t:v3", "--why", "separate sales"]);
    assert_contains(&out, "not withdrawn");
    assert_contains(
        &out,
        "step 6 (t:v6): the hand edit changed amount of data row 1 of t:v6; the reverted step had dropped data row 3 of t:v2 as a duplicate of that row",
    );
    assert_contains(
        &out,
        "with --accept-conflicts: the change is applied to the row it was made on",
    );
    assert_eq!(s.snapshot(), snapshot, "a refused revert records nothing");
    let r = s.run(&["withdraw", "t:v3", "--why", "separate sales", "--json"]);
    assert_eq!(r.code, 1);
    let j: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(j["recorded"], false);
    assert_eq!(j["conflicts"][0]["kind"], "duplicate_returns_unedited");
    assert_eq!(j["conflicts"][0]["row"], 1);
    assert_eq!(j["conflicts"][0]["column"], "amount");
}

#[test]
fn forced_the_edit_stays_on_its_row_and_the_duplicate_returns_as_it_was() {
    let s = chain_with_hand_edit();
    let out = s.ok(&[
        "withdraw",
        "t:v3",
        "--why",
        "separate sales",
        "--accept-conflicts",
    ]);
    assert_contains(
        &out,
        "the hand edit of step 6 re-applied: 1 cells, 0 rows removed, 0 rows added",
    );
    assert_contains(&out, "resolved by --accept-conflicts (1 conflict)");
    assert_eq!(
        s.ok(&["retrieve", "t"]),
        "id,name,amount,status\n1,Ann,1.75,done\n2,Bob,2.0,open\n1,Ann,1.5,done\n4,Dee,3,done\n"
    );
    // The forced conflict is kept with the revert step.
    let revert = steps_of(&s, "t")
        .into_iter()
        .find(|x| x["kind"] == "revert")
        .unwrap();
    assert_eq!(
        revert["params"]["forced_conflicts"][0]["kind"],
        "duplicate_returns_unedited"
    );
    // The re-applied edit is exact lineage: its changed cell traces to the hand edit.
    let t = s.ok(&["trace", "t", "--row", "1", "--column", "amount"]);
    assert_contains(&t, "after   t:v");
    assert_contains(&t, "\"1.75\"");
    assert_contains(&s.ok(&["verify"]), "intact");
}

#[test]
fn an_edit_to_a_row_the_new_history_drops_is_a_conflict() {
    // trim -> keep status = 'done' after a fill that the revert takes out.
    let s = Sandbox::with_store();
    s.file("raw.csv", "id,status,amount\n1,done,5\n2,,6\n3,open,7\n");
    s.ok(&["receive", "raw.csv", "--as", "o", "--why", "export"]);
    s.ok(&[
        "clean",
        "o",
        "fill",
        "--columns",
        "status",
        "--value",
        "done",
        "--why",
        "blank means done",
    ]);
    s.ok(&[
        "clean",
        "o",
        "keep",
        "status = 'done'",
        "--why",
        "done orders only",
    ]);
    let edited = s.ok(&["retrieve", "o"]).replace("2,done,6", "2,done,60");
    s.file("edit.csv", edited);
    s.ok(&[
        "receive",
        "edit.csv",
        "--as",
        "o",
        "--hand-edit-of",
        "o",
        "--why",
        "typo in order 2",
    ]);
    let out = refused(
        &s,
        &["withdraw", "o:v2", "--why", "blank does not mean done"],
    );
    assert_contains(
        &out,
        "the hand edit changed amount of data row 2 of o:v4, but without the reverted step a step before it drops that row",
    );
    let out = s.ok(&[
        "withdraw",
        "o:v2",
        "--why",
        "blank does not mean done",
        "--accept-conflicts",
    ]);
    assert_contains(&out, "resolved by --accept-conflicts (1 conflict)");
    assert_eq!(s.ok(&["retrieve", "o"]), "id,status,amount\n1,done,5\n");
}

#[test]
fn an_edit_to_a_column_only_the_reverted_step_made_is_a_conflict() {
    let s = Sandbox::with_store();
    s.file("raw.csv", "id,opened\n1,2026-07-03\n2,2026-08-14\n");
    s.ok(&["receive", "raw.csv", "--as", "w", "--why", "export"]);
    s.ok(&[
        "clean",
        "w",
        "rename",
        "opened=opened_on",
        "--why",
        "house style",
    ]);
    let edited = s.ok(&["retrieve", "w"]).replace("2026-08-14", "2026-08-15");
    s.file("edit.csv", edited);
    s.ok(&[
        "receive",
        "edit.csv",
        "--as",
        "w",
        "--hand-edit-of",
        "w",
        "--why",
        "wrong day",
    ]);
    let out = refused(&s, &["withdraw", "w:v2", "--why", "keep the till's names"]);
    assert_contains(
        &out,
        "step 3 (w:v3): the hand edit changed column opened_on of data row 2 of w:v3, a column that exists only because of the reverted step",
    );
    // Forced, the change is left out: the till's names and values come back.
    s.ok(&[
        "withdraw",
        "w:v2",
        "--why",
        "keep the till's names",
        "--accept-conflicts",
    ]);
    assert_eq!(
        s.ok(&["retrieve", "w"]),
        "id,opened\n1,2026-07-03\n2,2026-08-14\n"
    );
}

#[test]
fn outside_commands_after_the_step_are_conflicts() {
    let s = chain();
    s.file(
        "upper.py",
        "import csv, sys\nrows = list(csv.reader(open(sys.argv[1], newline='')))\n\
         w = csv.writer(open(sys.argv[2], 'w', newline=''), lineterminator='\\n')\n\
         w.writerow(rows[0])\nfor r in rows[1:]:\n    w.writerow([r[0], r[1].upper(), r[2], r[3]])\n",
    );
    s.ok(&[
        "capture",
        "--input",
        "t",
        "--output",
        "t=up.csv",
        "--why",
        "names in capitals",
        "--",
        "python3",
        "upper.py",
        "{t}",
        "up.csv",
    ]);
    let out = refused(&s, &["withdraw", "t:v3", "--why", "separate sales"]);
    assert_contains(
        &out,
        "was made by the outside command `python3 upper.py {t} up.csv`",
    );
    assert_contains(
        &out,
        "with --accept-conflicts: its recorded changes are re-applied as cell patches",
    );
    let out = s.ok(&[
        "withdraw",
        "t:v3",
        "--why",
        "separate sales",
        "--accept-conflicts",
    ]);
    assert_contains(&out, "the command of step 6 re-applied");
    // The returned duplicate was never seen by the command: it keeps its spelling.
    assert_eq!(
        s.ok(&["retrieve", "t"]),
        "id,name,amount,status\n1,ANN,1.5,done\n2,BOB,2.0,open\n1,Ann,1.5,done\n4,DEE,3,done\n"
    );
}

#[test]
fn what_cannot_be_reverted_is_refused_with_the_next_thing_to_try() {
    let s = chain();
    assert_contains(
        &s.fails(2, &["withdraw", "t:v1", "--why", "x"]),
        "was taken in from a file",
    );
    s.ok(&[
        "clean",
        "t",
        "summarize",
        "--by",
        "status",
        "--as",
        "by_status",
        "--why",
        "totals",
    ]);
    assert_contains(
        &s.fails(2, &["withdraw", "by_status:v1", "--why", "x"]),
        "is the first version of by_status",
    );
    assert_contains(&s.fails(2, &["withdraw", "t:v9", "--why", "x"]), "t:v9");
    // Reverting the step that made the latest version: its table from before comes back.
    let out = s.ok(&["withdraw", "t:v5", "--why", "count cancelled orders too"]);
    assert_contains(&out, "t is now t:v6");
    assert_eq!(hash_of(&s, "t:v6"), hash_of(&s, "t:v4"));
    // A summary made from the old history is not changed, and the output says so.
    assert_contains(
        &out,
        "not changed by the withdrawal, though made from the history it replaced: by_status:v1",
    );
}

#[test]
fn palmerpenguins_counts_hold_after_reverting_a_filter() {
    // palmerpenguins (CC0; Horst, Hill & Gorman 2020): 344 penguins, 152 of them Adelie;
    // body_mass_g is missing for 2 penguins, one of them Adelie (so 151 Adelie with a mass).
    let s = Sandbox::with_penguins();
    s.ok(&[
        "clean",
        "penguins",
        "keep",
        "species = 'Adelie'",
        "--why",
        "Adelie only",
    ]);
    s.ok(&[
        "clean",
        "penguins",
        "drop",
        "body_mass_g is blank",
        "--why",
        "no mass, no mean",
    ]);
    assert_eq!(
        s.json(&["about", "penguins", "--json"])["version"]["n_rows"],
        151
    );
    s.ok(&["withdraw", "penguins:v2", "--why", "all three species"]);
    assert_eq!(
        s.json(&["about", "penguins", "--json"])["version"]["n_rows"],
        342
    );
}
