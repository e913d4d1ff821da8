//! Built-in operations: the law that a step's provenance reproduces its output (row map plus
//! cell changes applied to the input give exactly the output), determinism, and the command
//! line of `sluice clean`.

mod common;

use std::path::Path;

use proptest::prelude::*;
use sluice::intake::{ingest, IngestOptions, IngestOutcome};
use sluice::model::{Agent, Version};
use sluice::ops::apply::{apply, ApplyOptions, ApplyOutcome};
use sluice::ops::sort::{Direction, SortKey};
use sluice::ops::{CaseTo, KeepWhich, OnError, Operation, Renaming};
use sluice::store::Store;
use sluice::table::{for_each_record, ReadSettings};

use common::*;

fn agent() -> Agent {
    Agent::new("t", None, "option")
}

/// The data rows of a stored version, as strings.
fn rows_of(store: &Store, v: &Version) -> Vec<Vec<String>> {
    let mut out = Vec::new();
    let r = store.objects.open_raw(&v.hash.parse().unwrap()).unwrap().0;
    let mut header = v.dialect.has_header;
    for_each_record(
        Path::new("v"),
        r,
        &ReadSettings::for_dialect(&v.dialect).unwrap(),
        |rec| {
            if header {
                header = false;
            } else {
                out.push(
                    rec.iter()
                        .map(|f| String::from_utf8(f.to_vec()).unwrap())
                        .collect(),
                );
            }
            Ok(())
        },
    )
    .unwrap();
    out
}

/// Rebuilds an output from its input and the recorded provenance alone.
fn replay_provenance(store: &Store, input: &Version, output: &Version) -> Vec<Vec<String>> {
    let inp = rows_of(store, input);
    let runs = sluice::provenance::row_runs(store, output, input.id).unwrap();
    // Each output column comes from the input column recorded for it, or else the one of the
    // same name.
    let sources = store.lineage.column_sources(output.id).unwrap();
    let from: Vec<usize> = output
        .header
        .iter()
        .map(|name| {
            let recorded: Vec<&String> = sources
                .iter()
                .filter(|(o, _)| o == name)
                .map(|(_, i)| i)
                .collect();
            let source = if recorded.len() == 1 {
                recorded[0]
            } else {
                name
            };
            input
                .header
                .iter()
                .position(|h| h == source)
                .expect("a source column")
        })
        .collect();
    let mut rebuilt = vec![Vec::new(); output.n_rows as usize];
    for run in runs {
        for k in 0..run.len {
            let row = &inp[(run.in_start + k) as usize];
            rebuilt[(run.out_start + k) as usize] = from.iter().map(|&c| row[c].clone()).collect();
        }
    }
    // Every input row is either carried by exactly one run or dropped, never both.
    let drops = sluice::provenance::drops(store, output.step_id, input.id).unwrap();
    let mut fate = vec![0u8; input.n_rows as usize];
    for run in sluice::provenance::row_runs(store, output, input.id).unwrap() {
        for k in 0..run.len {
            fate[(run.in_start + k) as usize] += 1;
        }
    }
    for d in &drops {
        fate[d.row_idx as usize] += 1;
        // A duplicate names a row that has the same values and is kept.
        if let Some(of) = d.duplicate_of {
            assert_eq!(
                fate[of as usize], 1,
                "row {} duplicates a row that was not kept",
                d.row_idx
            );
        }
    }
    assert!(
        fate.iter().all(|&f| f == 1),
        "input rows covered other than once: {fate:?}"
    );
    for c in sluice::provenance::cell_changes(store, output).unwrap() {
        let col = output.header.iter().position(|h| *h == c.column).unwrap();
        let cell = &mut rebuilt[c.row_idx as usize][col];
        assert_eq!(
            Some(cell.as_str()),
            c.old.as_deref(),
            "recorded old value differs from the input"
        );
        // The values are read from the versions; what the record itself asserts is that this
        // cell, and only the cells listed, changed.
        assert_ne!(c.old, c.new, "a recorded change that changes nothing");
        *cell = c.new.clone().unwrap_or_default();
    }
    rebuilt
}

fn table() -> impl Strategy<Value = (usize, Vec<Vec<String>>)> {
    (1usize..4).prop_flat_map(|n_cols| {
        let cell = prop::collection::vec(
            prop::sample::select(vec![
                "a", "B", " ", "  ", "\u{a0}", "é", "Ö", ",", "\"", "x-y", "\t",
            ]),
            0..5,
        )
        .prop_map(|parts| parts.concat());
        (
            Just(n_cols),
            prop::collection::vec(prop::collection::vec(cell, n_cols), 0..20),
        )
    })
}

fn write_csv(rows: &[Vec<String>], n_cols: usize) -> Vec<u8> {
    let mut out = Vec::new();
    let header: Vec<String> = (0..n_cols).map(|i| format!("c{i}")).collect();
    sluice::table::write::push_record(&mut out, header.iter().map(|h| h.as_bytes()));
    for r in rows {
        sluice::table::write::push_record(&mut out, r.iter().map(|f| f.as_bytes()));
    }
    out
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    // The law trace and revert rely on: for every step, the input rows taken through the row
    // map with the recorded cell changes applied are exactly the output rows.
    #[test]
    fn provenance_reproduces_the_output(
        (n_cols, rows) in table(),
        inner in any::<bool>(),
        to in 0u8..3,
        keep_last in any::<bool>(),
        by_key in any::<bool>(),
    ) {
        let dir = tempfile::tempdir().unwrap();
        let mut store = Store::init_recorded(dir.path(), &agent()).unwrap();
        let path = dir.path().join("t.csv");
        std::fs::write(&path, write_csv(&rows, n_cols)).unwrap();
        let opts = IngestOptions {
            dataset: "t".into(), key: None, reason: None, delimiter: Some(b','), has_header: true,
            encoding: None, null_tokens: vec![], agent: agent(),
        };
        let IngestOutcome::Recorded { version: mut current, .. } = ingest(&mut store, &path, &opts).unwrap() else {
            panic!("new dataset")
        };
        let to = [CaseTo::Lower, CaseTo::Upper, CaseTo::Title][to as usize];
        let keep = if keep_last { KeepWhich::Last } else { KeepWhich::First };
        let key = by_key.then(|| vec!["c0".to_string()]);
        for op in [
            Operation::Dedupe { key: key.clone(), keep },
            Operation::Trim { columns: None, inner },
            Operation::Case { columns: None, to },
            // A permutation of the rows, recorded as runs.
            Operation::Sort { by: vec![
                SortKey { column: format!("c{}", n_cols - 1), direction: Direction::Descending },
                SortKey { column: "c0".into(), direction: Direction::Ascending },
            ] },
            Operation::Dedupe { key, keep },
            Operation::DropRows { predicate: "c0 is blank or c0 matches '^a'".into() },
            Operation::KeepRows { predicate: "not c0 in ('B', 'x-y')".into() },
            Operation::Fill { columns: vec!["c0".into()], value: None, from: Some(format!("c{}", n_cols - 1)) },
            Operation::Fill { columns: vec!["c0".into()], value: Some("n/a".into()), from: None },
            Operation::Number { columns: vec!["c0".into()], decimal_comma: false, on_error: OnError::Blank },
            Operation::Date { columns: vec!["c0".into()], order: None, on_error: OnError::Keep },
            Operation::Replace { columns: None, find: "a".into(), with: "\"".into(), regex: false },
            Operation::Replace { columns: None, find: "(?i)(b)(é?)".into(), with: "$2$1,".into(), regex: true },
            Operation::Rename { columns: vec![Renaming { from: "c0".into(), to: "first".into() }] },
            Operation::Select { columns: std::iter::once("first".to_string()).chain((1..n_cols).rev().map(|i| format!("c{i}"))).collect() },
        ] {
            let o = ApplyOptions { op, reason: "law".into(), output_dataset: None, agent: agent(), map_table_file: None, replay: None, repeats: None };
            match apply(&mut store, &current.label(), &o).unwrap() {
                ApplyOutcome::Recorded { input, version, .. } => {
                    prop_assert_eq!(replay_provenance(&store, &input, &version), rows_of(&store, &version));
                    current = version;
                }
                ApplyOutcome::Unchanged { .. } => {}
                ApplyOutcome::Replayed { .. } => prop_assert!(false, "no replay was asked for"),
            }
        }
        prop_assert!(sluice::verify::verify(&store).unwrap().intact);
    }
}

#[test]
fn the_same_step_on_the_same_bytes_gives_the_same_hash() {
    let mut hashes = Vec::new();
    for _ in 0..2 {
        let d = Sandbox::with_demo();
        d.ok(&[
            "clean",
            "oxwater_orders:v1",
            "trim",
            "--inner",
            "--why",
            "spaces",
            "--as",
            "again",
        ]);
        d.ok(&[
            "clean",
            "again",
            "case",
            "--columns",
            "e-mail",
            "--to",
            "lower",
            "--why",
            "case",
        ]);
        hashes.push(d.json(&["about", "again", "--json"])["version"]["hash"].clone());
    }
    assert_eq!(hashes[0], hashes[1]);
}

#[test]
fn apply_records_an_exact_step_with_cell_counts() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id;name;email\n1; Ada  Quenwick ;ADA@Example.org\n2;Bram Fenley;bram@example.org\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let out = s.ok(&[
        "clean",
        "orders",
        "trim",
        "--inner",
        "--why",
        "the till pads names",
    ]);
    assert_contains(&out, "recorded orders:v2");
    assert_contains(&out, "trim changed 1 cell (name 1)");
    let out = s.ok(&[
        "clean",
        "orders",
        "case",
        "--columns",
        "email",
        "--to",
        "lower",
        "--why",
        "case-blind",
        "--as",
        "orders_clean",
    ]);
    assert_contains(&out, "recorded orders_clean:v1");
    // Canonical CSV: comma, LF, minimal quoting, whatever the input's dialect was.
    let r = s.run(&["retrieve", "orders_clean"]);
    assert_eq!(
        r.stdout,
        "id,name,email\n1,Ada Quenwick,ada@example.org\n2,Bram Fenley,bram@example.org\n"
    );
    let log = s.json(&["timeline", "--dataset", "orders_clean", "--json"]);
    let step = &log.as_array().unwrap().last().unwrap()["step"];
    assert_eq!(step["kind"], "operation");
    assert_eq!(step["operation"], "case");
    assert_eq!(step["lineage"], "exact");
    assert_eq!(
        step["params"],
        serde_json::json!({"op": "case", "columns": ["email"], "to": "lower"})
    );
    assert_eq!(step["inputs"], serde_json::json!(["orders:v2"]));
    assert_eq!(step["reason"], "case-blind");
    // Doing it again changes nothing and records nothing.
    let before = s.snapshot();
    let out = s.ok(&[
        "clean",
        "orders_clean",
        "case",
        "--columns",
        "email",
        "--to",
        "lower",
        "--why",
        "again",
    ]);
    assert_contains(&out, "unchanged");
    assert_eq!(before, s.snapshot());
}

#[test]
fn apply_refuses_unknown_columns_and_a_missing_reason() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,name\n1,x\n");
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let before = s.snapshot();
    let err = s.fails(
        2,
        &[
            "clean",
            "orders",
            "trim",
            "--columns",
            "nmae",
            "--why",
            "typo",
        ],
    );
    assert_contains(
        &err,
        "column \"nmae\" is not in orders:v1; its columns are: id, name",
    );
    let err = s.fails(2, &["clean", "orders", "trim"]);
    assert_contains(&err, "--why");
    let err = s.fails(2, &["clean", "orders", "trim", "--why", "  "]);
    assert_contains(&err, "--why needs a reason");
    assert_eq!(before, s.snapshot());
}

// Reference: order-preserving de-duplication with Python's standard library (dict keys keep
// insertion order; keeping the first of each row is common practice). On the demo's dirty
// exports, the rows sluice keeps are exactly the rows Python keeps.
#[test]
fn dedupe_agrees_with_python_on_the_demo_exports() {
    let d = Sandbox::with_demo();
    for (dataset, file, delim, key) in [
        ("quillby_orders", "quillby_2026q3.csv", ",", None),
        ("oxwater_orders", "oxwater_2026q3.csv", ";", None),
        (
            "fennmarsh_orders",
            "fennmarsh_2026q3.csv",
            ",",
            Some("order_id"),
        ),
    ] {
        let first = format!("{dataset}:v1");
        let mut args = vec![
            "clean",
            &first,
            "dedupe",
            "--why",
            "exported twice",
            "--as",
            "deduped",
        ];
        if let Some(k) = key {
            args.extend(["--key", k]);
        }
        d.ok(&args);
        let ours = d.run(&["retrieve", "deduped"]).stdout;
        let script = r#"
import csv, sys
path, delim, key = sys.argv[1], sys.argv[2], sys.argv[3]
with open(path, newline="", encoding="utf-8-sig") as f:
    rows = [r for r in csv.reader(f, delimiter=delim) if r]
header, data = rows[0], rows[1:]
k = header.index(key) if key else None
seen = {}
for r in data:
    seen.setdefault(tuple(r) if k is None else r[k], r)
w = csv.writer(sys.stdout, lineterminator="\n")
w.writerow(header)
w.writerows(seen.values())
"#;
        let out = std::process::Command::new("python3")
            .args(["-c", script])
            .arg(d.path().join("exports").join(file))
            .args([delim, key.unwrap_or("")])
            .output()
            .expect("python3 is needed for the reference checks");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let theirs = String::from_utf8(out.stdout).unwrap();
        assert_eq!(
            ours, theirs,
            "{dataset}: sluice and Python keep different rows"
        );
    }
}

#[test]
fn dedupe_records_what_each_dropped_row_duplicated() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id,shop\n1,Quillby\n2,Oxwater\n1,Quillby\n3,Fennmarsh\n2,Oxwater\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let out = s.ok(&["clean", "orders", "dedupe", "--why", "exported twice"]);
    assert_contains(&out, "dedupe dropped 2 rows; 3 rows");
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let v1 = sluice::refs::resolve(&store.lineage, "orders:v1").unwrap();
    let v2 = sluice::refs::resolve(&store.lineage, "orders:v2").unwrap();
    let drops = sluice::provenance::drops(&store, v2.step_id, v1.id).unwrap();
    let seen: Vec<(u64, Option<u64>, &str)> = drops
        .iter()
        .map(|d| (d.row_idx, d.duplicate_of, d.reason.as_str()))
        .collect();
    assert_eq!(
        seen,
        vec![
            (2, Some(0), "duplicate of data row 1 (the whole row)"),
            (4, Some(1), "duplicate of data row 2 (the whole row)"),
        ]
    );
    // Runs: rows 0-1 kept as 0-1, row 3 kept as 2.
    let runs: Vec<(u64, u64, u64)> = sluice::provenance::row_runs(&store, &v2, v1.id)
        .unwrap()
        .iter()
        .map(|r| (r.out_start, r.in_start, r.len))
        .collect();
    assert_eq!(runs, vec![(0, 0, 2), (2, 3, 1)]);
    let out = s.ok(&[
        "clean",
        "orders:v1",
        "dedupe",
        "--key",
        "id",
        "--keep",
        "last",
        "--why",
        "last wins",
        "--as",
        "last",
    ]);
    assert_contains(&out, "dropped 2 rows");
    assert_eq!(
        s.run(&["retrieve", "last"]).stdout,
        "id,shop\n1,Quillby\n3,Fennmarsh\n2,Oxwater\n"
    );
}

// palmerpenguins (CC0; Horst, Hill & Gorman 2020): dropping the rows with any NA leaves 333
// complete rows, as documented with the data set.
#[test]
fn palmerpenguins_complete_rows_are_333() {
    let s = Sandbox::with_penguins();
    let any_na = "bill_length_mm is blank or bill_depth_mm is blank or flipper_length_mm is blank \
                  or body_mass_g is blank or sex is blank";
    let out = s.ok(&[
        "clean",
        "penguins",
        "drop",
        any_na,
        "--why",
        "complete records only",
        "--as",
        "complete",
    ]);
    assert_contains(&out, "drop dropped 11 rows; 333 rows");
    // keep with the negation gives the same bytes.
    let keep = format!("not ({any_na})");
    let out = s.ok(&[
        "clean",
        "penguins",
        "keep",
        &keep,
        "--why",
        "complete records only",
        "--as",
        "complete_k",
    ]);
    assert_contains(&out, "keep dropped 11 rows; 333 rows");
    assert_eq!(
        s.run(&["retrieve", "complete"]).stdout,
        s.run(&["retrieve", "complete_k"]).stdout
    );
    // Species counts after dropping: Adelie 146, Gentoo 119, Chinstrap 68 (as documented).
    for (species, n) in [("Adelie", 146), ("Gentoo", 119), ("Chinstrap", 68)] {
        s.ok(&[
            "clean",
            "complete",
            "keep",
            &format!("species = '{species}'"),
            "--why",
            "one species",
            "--as",
            species,
        ]);
        assert_eq!(
            s.json(&["about", species, "--json"])["version"]["n_rows"],
            n,
            "{species}"
        );
    }
    // Every drop names the predicate.
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let raw = sluice::refs::resolve(&store.lineage, "penguins").unwrap();
    let done = sluice::refs::resolve(&store.lineage, "complete").unwrap();
    let drops = sluice::provenance::drops(&store, done.step_id, raw.id).unwrap();
    assert_eq!(drops.len(), 11);
    assert!(drops[0]
        .reason
        .starts_with("matched the drop predicate: bill_length_mm is blank"));
}

#[test]
fn a_bad_predicate_points_at_its_column_and_changes_nothing() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,done\n2,cancelled\n");
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let before = s.snapshot();
    let err = s.fails(
        2,
        &[
            "clean",
            "orders",
            "drop",
            "status = 'cancelled",
            "--why",
            "x",
        ],
    );
    assert_contains(
        &err,
        "predicate \"status = 'cancelled\", column 10: this text is never closed",
    );
    let err = s.fails(
        2,
        &[
            "clean",
            "orders",
            "drop",
            "state = 'cancelled'",
            "--why",
            "x",
        ],
    );
    assert_contains(
        &err,
        "column 1: no column \"state\"; the columns are: id, status",
    );
    assert_eq!(before, s.snapshot());
    let out = s.ok(&[
        "clean",
        "orders",
        "drop",
        "status = 'cancelled'",
        "--why",
        "not revenue",
    ]);
    assert_contains(&out, "drop dropped 1 row; 1 row");
}

#[test]
fn rename_select_and_fill_record_where_columns_came_from() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "order no;e-mail;note\nOX-1;;ada@example.org\nOX-2;bram@example.org;\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let out = s.ok(&[
        "clean",
        "orders",
        "fill",
        "--columns",
        "e-mail",
        "--from",
        "note",
        "--why",
        "address typed in the note",
    ]);
    assert_contains(&out, "fill changed 1 cell (e-mail 1)");
    s.ok(&[
        "clean",
        "orders",
        "rename",
        "order no=order_id",
        "e-mail=email",
        "--why",
        "one naming",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "select",
        "email,order_id",
        "--why",
        "contact list",
    ]);
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "email,order_id\nada@example.org,OX-1\nbram@example.org,OX-2\n"
    );
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let renamed = sluice::refs::resolve(&store.lineage, "orders:v3").unwrap();
    assert_eq!(
        store.lineage.column_sources(renamed.id).unwrap(),
        vec![
            ("email".to_string(), "e-mail".to_string()),
            ("order_id".to_string(), "order no".to_string())
        ]
    );
    let filled = sluice::refs::resolve(&store.lineage, "orders:v2").unwrap();
    assert!(store
        .lineage
        .column_sources(filled.id)
        .unwrap()
        .contains(&("e-mail".to_string(), "note".to_string())));
    let err = s.fails(2, &["clean", "orders", "rename", "nope=x", "--why", "typo"]);
    assert_contains(&err, "column \"nope\" is not in orders:v4");
}

#[test]
fn number_reads_amounts_exactly_and_never_zeroes_what_it_cannot_read() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id;amount\n1;1.204,50 €\n2;(5,00)\n3;EUR 12,5\n4;n/a\n5;\n6;12,5%\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    // Refused by default, listing the cell, exit code 1 (a data failure); nothing recorded.
    let before = s.snapshot();
    let err = s.fails(
        1,
        &[
            "clean",
            "orders",
            "number",
            "--columns",
            "amount",
            "--decimal-comma",
            "--why",
            "amounts",
        ],
    );
    assert_contains(
        &err,
        "1 cell cannot be read as an amount: data row 4 amount \"n/a\" (not an amount)",
    );
    assert_contains(&err, "--on-error keep");
    assert_eq!(before, s.snapshot());
    // Kept as text, with a note on the cell.
    let out = s.ok(&[
        "clean",
        "orders",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--on-error",
        "keep",
        "--why",
        "amounts",
    ]);
    assert_contains(&out, "number changed 4 cells (amount 4)");
    assert_contains(&out, "noted: 1 cell left as asked");
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "id,amount\n1,1204.50\n2,-5.00\n3,12.5\n4,n/a\n5,\n6,0.125\n"
    );
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let v = sluice::refs::resolve(&store.lineage, "orders").unwrap();
    assert_eq!(
        store.lineage.cell_notes(v.id).unwrap(),
        vec![(
            3,
            "amount".to_string(),
            "not an amount; kept as it was".to_string()
        )]
    );
    drop(store);
    // Blanked, with a note, when asked.
    s.ok(&[
        "clean",
        "orders:v1",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--on-error",
        "blank",
        "--why",
        "amounts",
        "--as",
        "blanked",
    ]);
    assert_eq!(
        s.run(&["retrieve", "blanked"]).stdout,
        "id,amount\n1,1204.50\n2,-5.00\n3,12.5\n4,\n5,\n6,0.125\n"
    );
    let shown = s.json(&["about", "blanked", "--json"]);
    assert_eq!(shown["profile"][1]["inferred_type"], "decimal");
    assert_eq!(shown["profile"][1]["min"], "-5.00");
    assert_eq!(shown["profile"][1]["max"], "1204.50");
}

#[test]
fn date_writes_iso_8601_and_refuses_to_guess() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id,opened\n1,03/04/2026\n2,13/04/2026\n3,8 Jul 2026\n4,2026-07-03T14:05+0200\n5,\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let before = s.snapshot();
    // 03/04/2026 reads both ways: refused without --order, exit code 1, nothing recorded.
    let err = s.fails(
        1,
        &[
            "clean",
            "orders",
            "date",
            "--columns",
            "opened",
            "--why",
            "dates",
        ],
    );
    assert_contains(&err, "1 cell cannot be read as a date: data row 1 opened \"03/04/2026\" (ambiguous day and month)");
    assert_contains(&err, "--order dmy");
    assert_eq!(before, s.snapshot());
    s.ok(&[
        "clean",
        "orders",
        "date",
        "--columns",
        "opened",
        "--order",
        "dmy",
        "--why",
        "the till writes day first",
    ]);
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "id,opened\n1,2026-04-03\n2,2026-04-13\n3,2026-07-08\n4,2026-07-03T14:05:00+02:00\n5,\n"
    );
    // A day that does not exist (ISO 8601 uses the Gregorian calendar) is an error, not March.
    s.file("p.csv", "id,opened\n1,2023-02-29\n2,2024-02-29\n");
    s.ok(&["receive", "p.csv", "--as", "leap"]);
    let err = s.fails(
        1,
        &[
            "clean",
            "leap",
            "date",
            "--columns",
            "opened",
            "--why",
            "dates",
        ],
    );
    assert_contains(&err, "data row 1 opened \"2023-02-29\" (no such date)");
    let out = s.ok(&[
        "clean",
        "leap",
        "date",
        "--columns",
        "opened",
        "--on-error",
        "blank",
        "--why",
        "dates",
    ]);
    assert_contains(&out, "date changed 1 cell");
    assert_eq!(
        s.run(&["retrieve", "leap"]).stdout,
        "id,opened\n1,\n2,2024-02-29\n"
    );
}

#[test]
fn replace_literal_and_by_regular_expression() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id,hours,service\n1,\"1,5\",brakes - adjust\n2,2.25,Brake Tune\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let out = s.ok(&[
        "clean",
        "orders",
        "replace",
        "--columns",
        "hours",
        "--find",
        ",",
        "--with",
        ".",
        "--why",
        "decimal commas",
    ]);
    assert_contains(&out, "replace changed 1 cell (hours 1)");
    s.ok(&[
        "clean",
        "orders",
        "replace",
        "--columns",
        "service",
        "--regex",
        "--find",
        "(?i)^brakes? *(-|tune) *(adjust)?$",
        "--with",
        "brake adjustment",
        "--why",
        "one label",
    ]);
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "id,hours,service\n1,1.5,brake adjustment\n2,2.25,brake adjustment\n"
    );
    let err = s.fails(
        2,
        &[
            "clean", "orders", "replace", "--regex", "--find", "(", "--with", "x", "--why", "x",
        ],
    );
    assert_contains(&err, "--find \"(\" is not a valid regular expression");
}

// palmerpenguins (CC0; Horst, Hill & Gorman 2020), counts and means as documented with the
// data set and recomputed with pandas for the reference sheet: by species Adelie 152, Gentoo
// 124, Chinstrap 68; by island Biscoe 168, Dream 124, Torgersen 52; after dropping incomplete
// rows 146, 119, 68; mean body_mass_g where present 3700.6623, 3733.0882, 5076.0163.
#[test]
fn palmerpenguins_group_counts_and_means() {
    let s = Sandbox::with_penguins();
    let groups = |dataset: &str| -> Vec<Vec<String>> {
        s.run(&["retrieve", dataset])
            .stdout
            .lines()
            .skip(1)
            .map(|l| l.split(',').map(str::to_string).collect())
            .collect()
    };
    s.ok(&[
        "clean",
        "penguins",
        "summarize",
        "--by",
        "species",
        "--mean",
        "body_mass_g",
        "--as",
        "by_species",
        "--why",
        "counts",
    ]);
    let g = groups("by_species");
    let got: Vec<(String, String, String)> = g
        .iter()
        .map(|r| {
            (
                r[0].clone(),
                r[1].clone(),
                format!("{:.4}", r[2].parse::<f64>().unwrap()),
            )
        })
        .collect();
    assert_eq!(
        got,
        vec![
            ("Adelie".into(), "152".into(), "3700.6623".into()),
            ("Gentoo".into(), "124".into(), "5076.0163".into()),
            ("Chinstrap".into(), "68".into(), "3733.0882".into()),
        ]
    );
    s.ok(&[
        "clean",
        "penguins",
        "summarize",
        "--by",
        "island",
        "--as",
        "by_island",
        "--why",
        "counts",
    ]);
    assert_eq!(
        groups("by_island"),
        vec![
            vec!["Torgersen", "52"],
            vec!["Biscoe", "168"],
            vec!["Dream", "124"]
        ]
    );
    let any_na = "bill_length_mm is blank or bill_depth_mm is blank or flipper_length_mm is blank \
                  or body_mass_g is blank or sex is blank";
    s.ok(&[
        "clean",
        "penguins",
        "drop",
        any_na,
        "--why",
        "complete records",
        "--as",
        "complete",
    ]);
    s.ok(&[
        "clean",
        "complete",
        "summarize",
        "--by",
        "species",
        "--as",
        "complete_by_species",
        "--why",
        "counts",
    ]);
    assert_eq!(
        groups("complete_by_species"),
        vec![
            vec!["Adelie", "146"],
            vec!["Gentoo", "119"],
            vec!["Chinstrap", "68"]
        ]
    );
    // The summary is keyed by its groups.
    assert_eq!(
        s.json(&["about", "by_species", "--json"])["key"],
        serde_json::json!(["species"])
    );
}

// Exact sums checked with Python's decimal module (a general-purpose reference) on the demo's
// cleaned parts costs: the same groups, the same sums to the last digit.
#[test]
fn summarize_sums_agree_with_python_decimal() {
    let d = Sandbox::with_demo();
    d.ok(&[
        "clean",
        "quillby_orders",
        "summarize",
        "--by",
        "technician,status",
        "--sum",
        "parts_cost",
        "--as",
        "sums",
        "--why",
        "report",
    ]);
    let ours = d.run(&["retrieve", "sums"]).stdout;
    let cleaned = d.run(&["retrieve", "quillby_orders"]).stdout;
    let script = r#"
import csv, decimal, io, sys
rows = list(csv.DictReader(io.StringIO(sys.stdin.read())))
groups = {}
for r in rows:
    k = (r["technician"], r["status"])
    g = groups.setdefault(k, [0, decimal.Decimal(0)])
    g[0] += 1
    if r["parts_cost"]:
        g[1] += decimal.Decimal(r["parts_cost"])
w = csv.writer(sys.stdout, lineterminator="\n")
w.writerow(["technician", "status", "count", "sum_parts_cost"])
for (t, st), (n, total) in groups.items():
    w.writerow([t, st, n, str(total)])
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
        .write_all(cleaned.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    assert_eq!(ours, String::from_utf8(out.stdout).unwrap());
}

#[test]
fn map_takes_the_table_in_and_records_it_as_an_input() {
    let s = Sandbox::with_store();
    s.file(
        "o.csv",
        "id,service\n1,flat fix\n2,Puncture\n3,gears\n4,\n5,tyre swap\n",
    );
    s.file(
        "labels.csv",
        "label,service\nflat fix,puncture repair\nPuncture,puncture repair\ngears,gear indexing\n",
    );
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let before = s.snapshot();
    let err = s.fails(
        1,
        &[
            "clean",
            "orders",
            "map",
            "--columns",
            "service",
            "--table",
            "labels.csv",
            "--unmatched",
            "fail",
            "--why",
            "names",
        ],
    );
    assert_contains(
        &err,
        "data row 5 service \"tyre swap\" (no entry in the mapping table)",
    );
    // The table file is recorded only with a step that succeeds: a failed map leaves nothing.
    assert_eq!(before, s.snapshot());
    let out = s.ok(&[
        "clean",
        "orders",
        "map",
        "--columns",
        "service",
        "--table",
        "labels.csv",
        "--why",
        "the cooperative's names",
    ]);
    assert_contains(&out, "took in the table as labels");
    assert_contains(&out, "map changed 3 cells (service 3)");
    assert_contains(&out, "noted: 1 cell left as asked");
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "id,service\n1,puncture repair\n2,puncture repair\n3,gear indexing\n4,\n5,tyre swap\n"
    );
    let log = s.json(&["timeline", "--dataset", "orders", "--json"]);
    let step = &log.as_array().unwrap().last().unwrap()["step"];
    assert_eq!(
        step["inputs"],
        serde_json::json!(["orders:v1", "labels:v1"])
    );
    assert_eq!(
        step["params"]["table"],
        blake3::hash(
            std::fs::read(s.path().join("labels.csv"))
                .unwrap()
                .as_slice()
        )
        .to_hex()
        .to_string()
    );
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let inp = sluice::refs::resolve(&store.lineage, "orders:v1").unwrap();
    let outv = sluice::refs::resolve(&store.lineage, "orders:v2").unwrap();
    assert_eq!(
        replay_provenance(&store, &inp, &outv),
        rows_of(&store, &outv)
    );
    drop(store);
    // A table that maps one value two ways is refused.
    s.file(
        "bad.csv",
        "from,to\ngears,gear indexing\ngears,gear tuning\n",
    );
    s.ok(&["receive", "bad.csv", "--as", "bad_labels"]);
    let err = s.fails(
        1,
        &[
            "clean",
            "orders",
            "map",
            "--columns",
            "service",
            "--table",
            "bad_labels",
            "--why",
            "x",
        ],
    );
    assert_contains(&err, "gives more than one value for: \"gears\"");
}

#[test]
fn split_combine_and_extract_derive_new_columns_and_name_their_sources() {
    let s = Sandbox::with_store();
    s.file("o.csv", "order,customer,town\nOX-7201,Ada Quenwick,Oxwater\nOX-7202,Bram,\nQ-9,Cora de la Fenn,Quillby\n");
    s.ok(&["receive", "o.csv", "--as", "orders"]);
    let out = s.ok(&[
        "clean",
        "orders",
        "split",
        "--column",
        "customer",
        "--on",
        " ",
        "--into",
        "given,family",
        "--why",
        "mailing",
    ]);
    assert_contains(&out, "split derived given, family; 3 rows × 5 columns");
    s.ok(&[
        "clean",
        "orders",
        "combine",
        "--columns",
        "given,town",
        "--with",
        " of ",
        "--into",
        "label",
        "--why",
        "board",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "extract",
        "--column",
        "order",
        "--regex",
        "^OX-(\\d+)$",
        "--into",
        "number",
        "--why",
        "numeric id",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "extract",
        "--column",
        "order",
        "--from",
        "1",
        "--len",
        "2",
        "--into",
        "prefix",
        "--why",
        "till code",
    ]);
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        // combine puts its column after the last of its sources (town).
        "order,prefix,number,customer,given,family,town,label\n\
         OX-7201,OX,7201,Ada Quenwick,Ada,Quenwick,Oxwater,Ada of Oxwater\n\
         OX-7202,OX,7202,Bram,Bram,,,Bram\n\
         Q-9,Q-,,Cora de la Fenn,Cora,de la Fenn,Quillby,Cora of Quillby\n"
    );
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let combined = sluice::refs::resolve(&store.lineage, "orders:v3").unwrap();
    assert_eq!(
        store.lineage.column_sources(combined.id).unwrap(),
        vec![
            ("label".to_string(), "given".to_string()),
            ("label".to_string(), "town".to_string())
        ]
    );
    drop(store);
    let err = s.fails(
        2,
        &[
            "clean", "orders", "split", "--column", "customer", "--on", " ", "--into", "town",
            "--why", "x",
        ],
    );
    assert_contains(&err, "column \"town\" would appear twice");
}

// The worked example of Buneman, Khanna & Tan, "Why and Where: A Characterization of Data
// Provenance" (ICDT 2001), in its shape: employees joined to departments on the department
// number, the rows of department 'CS' kept, name and phone selected. (Table contents are our
// own.) The phone cell comes from the employee table alone; the department name from the
// looked-up table, recorded as a second input.
#[test]
fn lookup_join_keep_select_in_the_shape_of_the_where_provenance_example() {
    let s = Sandbox::with_store();
    s.file(
        "employees.csv",
        "name,phone,dept\nIvo Ashford,555-0101,1\nNell Corby,555-0102,2\nKit Fenwell,555-0103,1\n",
    );
    s.file("departments.csv", "dept_no,dept_name\n1,CS\n2,Physics\n");
    s.ok(&["receive", "employees.csv", "--as", "employees"]);
    s.ok(&["receive", "departments.csv", "--as", "departments"]);
    let out = s.ok(&[
        "clean",
        "employees",
        "lookup",
        "--table",
        "departments",
        "--on",
        "dept",
        "--table-on",
        "dept_no",
        "--take",
        "dept_name",
        "--why",
        "department names",
    ]);
    assert_contains(&out, "lookup derived dept_name");
    s.ok(&[
        "clean",
        "employees",
        "keep",
        "dept_name = 'CS'",
        "--why",
        "the CS department",
    ]);
    s.ok(&[
        "clean",
        "employees",
        "select",
        "name,phone",
        "--why",
        "the phone list",
    ]);
    assert_eq!(
        s.run(&["retrieve", "employees"]).stdout,
        "name,phone\nIvo Ashford,555-0101\nKit Fenwell,555-0103\n"
    );
    let log = s.json(&["timeline", "--dataset", "employees", "--json"]);
    let lookup = log
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["step"]["operation"] == "lookup")
        .unwrap();
    assert_eq!(
        lookup["step"]["inputs"],
        serde_json::json!(["employees:v1", "departments:v1"])
    );
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let joined = sluice::refs::resolve(&store.lineage, "employees:v2").unwrap();
    let sources = store.lineage.column_sources(joined.id).unwrap();
    assert!(sources.contains(&("dept_name".to_string(), "dept_name".to_string())));
    assert!(
        !sources.iter().any(|(o, _)| o == "phone"),
        "phone is copied from the employee row: {sources:?}"
    );
    drop(store);
    // A key the table lacks: blank and noted, or refused; a key on two table rows: refused.
    s.file("more.csv", "name,dept\nOtto Marley,9\n");
    s.ok(&["receive", "more.csv", "--as", "more"]);
    let out = s.ok(&[
        "clean",
        "more",
        "lookup",
        "--table",
        "departments",
        "--on",
        "dept",
        "--table-on",
        "dept_no",
        "--take",
        "dept_name",
        "--why",
        "x",
    ]);
    assert_contains(&out, "noted: 1 cell left as asked");
    assert_eq!(
        s.run(&["retrieve", "more"]).stdout,
        "name,dept,dept_name\nOtto Marley,9,\n"
    );
    let err = s.fails(
        1,
        &[
            "clean",
            "more:v1",
            "lookup",
            "--table",
            "departments",
            "--on",
            "dept",
            "--table-on",
            "dept_no",
            "--take",
            "dept_name",
            "--fail-unmatched",
            "--why",
            "x",
        ],
    );
    assert_contains(&err, "\"9\" (no row of the lookup table has this key)");
    s.file("dup.csv", "dept_no,dept_name\n1,CS\n1,Computing\n");
    let err = s.fails(
        1,
        &[
            "clean",
            "more:v1",
            "lookup",
            "--table",
            "dup.csv",
            "--on",
            "dept",
            "--table-on",
            "dept_no",
            "--take",
            "dept_name",
            "--why",
            "x",
        ],
    );
    assert_contains(&err, "has more than one row for the key \"1\"");
}

// Why-provenance of a union (Buneman, Khanna & Tan, ICDT 2001): for the union of two equal
// one-row tables, the output row has two witnesses, one row from each. After append and
// dedupe, the surviving row is carried from its own source and the other is recorded as a
// dropped duplicate of it.
#[test]
fn append_then_dedupe_keeps_each_rows_origin() {
    let s = Sandbox::with_store();
    s.file("a.csv", "shop,city\nQuillby Cycle Mend,Quillby\n");
    s.file("b.csv", "shop,town\nQuillby Cycle Mend,Quillby\n");
    s.ok(&["receive", "a.csv", "--as", "first"]);
    s.ok(&["receive", "b.csv", "--as", "second"]);
    let err = s.fails(
        2,
        &[
            "clean", "first", "append", "--other", "second", "--why", "merge",
        ],
    );
    assert_contains(
        &err,
        "second:v1 has column \"town\" that first:v1 has not; map them with --map THEIRS=OURS",
    );
    let out = s.ok(&[
        "clean",
        "first",
        "append",
        "--other",
        "second",
        "--map",
        "town=city",
        "--why",
        "merge",
    ]);
    assert_contains(&out, "append added 1 row; 2 rows");
    let out = s.ok(&["clean", "first", "dedupe", "--why", "same shop twice"]);
    assert_contains(&out, "dedupe dropped 1 row; 1 row");
    let store = Store::open(&s.path().join("sluice-store")).unwrap();
    let a = sluice::refs::resolve(&store.lineage, "first:v1").unwrap();
    let b = sluice::refs::resolve(&store.lineage, "second:v1").unwrap();
    let merged = sluice::refs::resolve(&store.lineage, "first:v2").unwrap();
    let deduped = sluice::refs::resolve(&store.lineage, "first:v3").unwrap();
    let runs = |out: &Version, inp: &Version| -> Vec<(u64, u64, u64)> {
        sluice::provenance::row_runs(&store, out, inp.id)
            .unwrap()
            .iter()
            .map(|r| (r.out_start, r.in_start, r.len))
            .collect()
    };
    // Row 0 of the union came from the first table, row 1 from the second.
    assert_eq!(runs(&merged, &a), vec![(0, 0, 1)]);
    assert_eq!(runs(&merged, &b), vec![(1, 0, 1)]);
    assert_eq!(
        store.lineage.column_sources(merged.id).unwrap(),
        vec![
            ("city".into(), "town".into()),
            ("shop".into(), "shop".into())
        ]
    );
    // The survivor is union row 0 (from the first table); union row 1 is its duplicate.
    assert_eq!(runs(&deduped, &merged), vec![(0, 0, 1)]);
    let drops = sluice::provenance::drops(&store, deduped.step_id, merged.id).unwrap();
    assert_eq!((drops[0].row_idx, drops[0].duplicate_of), (1, Some(0)));
}

// Checks on palmerpenguins (CC0; counts documented with the data set): bill_length_mm is
// blank (NA) on 2 rows, sex on 11, and species takes only the three documented values.
#[test]
fn check_records_results_and_fails_with_exit_code_1() {
    let s = Sandbox::with_penguins();
    s.file(
        "rules.json",
        r#"{"sluice_rules": 2, "rules": [
            {"dimension": "completeness", "columns": ["bill_length_mm"]},
            {"dimension": "completeness", "columns": ["sex"]},
            {"dimension": "validity", "column": "species", "one_of": ["Adelie", "Gentoo", "Chinstrap"]},
            {"dimension": "validity", "column": "body_mass_g", "at_least": "2700", "at_most": "6300"},
            {"dimension": "validity", "column": "body_mass_g", "at_most": "6000"},
            {"dimension": "validity", "column": "year", "pattern": "20[0-9]{2}"},
            {"dimension": "validity", "column": "island", "length_at_least": 5, "length_at_most": 9},
            {"dimension": "uniqueness", "columns": ["species"]}
        ]}"#,
    );
    let r = s.run(&["inspect", "penguins", "--rules", "rules.json", "--json"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let failing: Vec<u64> = report["results"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x["n_failing"].as_u64().unwrap())
        .collect();
    // 2 and 11 blanks as documented; every species allowed; masses within the documented
    // extremes (2700 and 6300, computed with Python); some above 6000; years four digits;
    // island names 5 to 9 letters; species repeats (341 rows repeat one of three values).
    assert_eq!(failing[0..4], [2, 11, 0, 0]);
    assert!(failing[4] > 0);
    assert_eq!(failing[5..7], [0, 0]);
    assert_eq!(failing[7], 341);
    let shown = s.json(&["about", "penguins", "--json"]);
    assert_eq!(shown["checks"].as_array().unwrap().len(), 8);
    assert_eq!(shown["checks"][0]["passed"], false);
    assert_contains(&s.ok(&["verify"]), "intact");
    s.file(
        "bad.json",
        "{\"sluice_rules\": 2, \"rules\": [\n  {\"dimension\": \"completeness\", \"colums\": [\"sex\"]}\n]}",
    );
    let err = s.fails(2, &["inspect", "penguins", "--rules", "bad.json"]);
    assert_contains(&err, "bad.json: line 2, column");
    assert_contains(&err, "unknown field `colums`");
    // The screen names each rule in its dimension's words.
    let r = s.run(&["inspect", "penguins", "--rules", "rules.json"]);
    assert_contains(&r.stdout, "FAIL  completeness: sex: 11 rows");
    assert_contains(
        &r.stdout,
        "pass  validity: body_mass_g between 2700 and 6300",
    );
    assert_contains(&r.stdout, "pass  validity: island length between 5 and 9");
    assert_contains(
        &r.stdout,
        "pass  validity: species one of Adelie, Gentoo, Chinstrap",
    );
    assert_contains(&r.stdout, "pass  validity: year matches 20[0-9]{2}");
}
