//! Intake of formats other than delimited text, and `cat --format`: workbooks written by
//! general-purpose writers from PyPI (openpyxl for .xlsx, odfpy for .ods; both pinned in
//! tests/reference/requirements.txt, run by tests/reference/make_workbooks.py, which also says
//! what every checked cell must become), JSON Lines checked against Python's json module, and
//! tab-separated values as the IANA registration of text/tab-separated-values defines them.

mod common;

use std::path::Path;
use std::process::Command;

use common::{assert_contains, damage_object, reference_python, Sandbox};
use serde_json::Value;

/// Runs a Python snippet of the reference environment with `args`; returns its standard output.
fn python(code: &str, args: &[&Path]) -> String {
    let out = Command::new(reference_python())
        .arg("-c")
        .arg(code)
        .args(args)
        .output()
        .expect("run the reference python");
    assert!(
        out.status.success(),
        "the reference script failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("utf-8 from python")
}

/// A store beside the workbooks of tests/reference/make_workbooks.py, and its manifest.
fn workbooks() -> (Sandbox, Value) {
    let s = Sandbox::with_store();
    let out = Command::new(reference_python())
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/make_workbooks.py"
        ))
        .arg(s.path())
        .output()
        .expect("run make_workbooks.py");
    assert!(
        out.status.success(),
        "make_workbooks.py failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let manifest = serde_json::from_slice(&out.stdout).expect("the manifest is JSON");
    (s, manifest)
}

/// The rows of a version, through `cat --format jsonl`, each as (column, value) pairs in order.
fn rows(s: &Sandbox, reference: &str) -> Vec<Vec<(String, String)>> {
    s.ok(&["retrieve", reference, "--format", "jsonl"])
        .lines()
        .map(|line| {
            // Read in order: serde_json's map sorts keys, so walk the raw text's pairs.
            let v: Value = serde_json::from_str(line).expect("a JSON line");
            let obj = v.as_object().expect("an object per line");
            let mut keys: Vec<(usize, &String)> = obj
                .keys()
                .map(|k| {
                    let at = line
                        .find(&serde_json::to_string(k).unwrap())
                        .expect("key in line");
                    (at, k)
                })
                .collect();
            keys.sort();
            keys.into_iter()
                .map(|(_, k)| (k.clone(), obj[k].as_str().expect("text cell").to_string()))
                .collect()
        })
        .collect()
}

fn cell(rows: &[Vec<(String, String)>], row: u64, column: &str) -> String {
    rows[row as usize - 1]
        .iter()
        .find(|(k, _)| k == column)
        .map(|(_, v)| v.clone())
        .unwrap_or_else(|| panic!("no column {column}"))
}

fn trace(s: &Sandbox, reference: &str, row: u64, column: &str) -> Value {
    s.json(&[
        "trace",
        reference,
        "--row",
        &row.to_string(),
        "--column",
        column,
        "--json",
    ])
}

fn ingest_step(s: &Sandbox, dataset: &str) -> Value {
    let log = s.json(&["timeline", "--dataset", dataset, "--json"]);
    log.as_array().unwrap().first().unwrap()["step"].clone()
}

#[test]
fn an_xlsx_sheet_is_taken_in_cell_for_cell_and_traced_to_its_cells() {
    let (s, m) = workbooks();
    let x = &m["xlsx"];

    // Two sheets and no --sheet: refused, naming both, and nothing is recorded.
    let before = s.snapshot();
    let err = s.fails(2, &["receive", "orders.xlsx", "--as", "orders"]);
    assert_contains(&err, "\"Work orders\", \"Parts\"");
    assert_contains(&err, "--sheet");
    let err = s.fails(
        2,
        &[
            "receive",
            "orders.xlsx",
            "--as",
            "orders",
            "--sheet",
            "Prices",
        ],
    );
    assert_contains(&err, "no sheet \"Prices\"");
    assert_eq!(
        s.snapshot(),
        before,
        "a refused workbook leaves the store unchanged"
    );

    let out = s.ok(&[
        "receive",
        "orders.xlsx",
        "--as",
        "orders",
        "--sheet",
        "Work orders",
        "--why",
        "Q3 work orders as the Quillby manager keeps them",
    ]);
    assert_contains(&out, &format!("{} rows × 8 columns", x["n_rows"]));
    let show = s.json(&["about", "orders", "--json"]);
    let header: Vec<String> = serde_json::from_value(show["version"]["header"].clone()).unwrap();
    assert_eq!(serde_json::to_value(&header).unwrap(), x["header"]);

    // Every cell as the manifest says: ISO 8601 dates (Python's isoformat), numbers as the
    // shortest round-trip text of the number written in the file (Python's repr), booleans
    // as true/false, blanks empty, the formula's saved result, the error value's text.
    let table = rows(&s, "orders");
    assert_eq!(table.len() as u64, x["n_rows"].as_u64().unwrap());
    for c in x["cells"].as_array().unwrap() {
        let (row, column) = (c["row"].as_u64().unwrap(), c["column"].as_str().unwrap());
        assert_eq!(
            cell(&table, row, column),
            c["value"].as_str().unwrap(),
            "cell {} (data row {row}, {column})",
            c["ref"]
        );
    }

    // The conversion is recorded: the raw object is the workbook's exact bytes under their
    // BLAKE3 name (the official blake3 crate), the formulas with their results are listed.
    let step = ingest_step(&s, "orders");
    let conv = &step["params"]["convert"];
    let bytes = std::fs::read(s.path().join("orders.xlsx")).unwrap();
    let hash = blake3::hash(&bytes).to_hex().to_string();
    assert_eq!(conv["raw"]["hash"], hash.as_str());
    assert_eq!(conv["raw"]["n_bytes"], bytes.len() as u64);
    let stored = sluice::store::Store::open(&s.path().join(sluice::store::STORE_DIR))
        .unwrap()
        .objects
        .read_all(&hash.parse().unwrap())
        .expect("the workbook is stored as an object");
    assert_eq!(stored, bytes);
    assert_eq!(conv["format"], "xlsx");
    assert_eq!(conv["sheet"], "Work orders");
    assert_eq!(conv["formulas"], x["formulas"]);
    assert_eq!(conv["errors"][0]["cell"], "'Work orders'!H6");
    assert_eq!(conv["blank_rows_skipped"], 1);
    assert_contains(&s.ok(&["verify"]), "intact");

    // Every cell traced to its sheet and cell, with the value as the file stores it: numbers
    // and date serials are the <v> text of the sheet's XML (read by the script), compared as
    // binary64 values since the file may write them with an exponent.
    for c in x["cells"].as_array().unwrap() {
        let (row, column) = (c["row"].as_u64().unwrap(), c["column"].as_str().unwrap());
        let t = trace(&s, "orders", row, column);
        let end = &t["end"];
        assert_eq!(end["kind"], "raw");
        assert_eq!(end["cell"], c["ref"], "data row {row}, {column}");
        assert_eq!(end["raw_object"], hash.as_str());
        assert_eq!(end["converted_value"], c["value"]);
        let want_row: u64 = c["ref"]
            .as_str()
            .unwrap()
            .rsplit('!')
            .next()
            .unwrap()
            .trim_start_matches(|ch: char| ch.is_ascii_alphabetic())
            .parse()
            .unwrap();
        assert_eq!(end["line"], want_row, "the sheet row of {}", c["ref"]);
        if let (Some(v), "number" | "date") =
            (c["stored"].as_str(), end["stored_kind"].as_str().unwrap())
        {
            let want: f64 = v.parse().unwrap();
            let got: f64 = end["raw_value"].as_str().unwrap().parse().unwrap();
            assert_eq!(
                got.to_bits(),
                want.to_bits(),
                "stored value of {}",
                c["ref"]
            );
        }
        if column == "total" {
            let f = x["formulas"]
                .as_array()
                .unwrap()
                .iter()
                .find(|f| f["cell"] == c["ref"])
                .unwrap();
            assert_eq!(end["formula"], f["formula"]);
        } else {
            assert!(end["formula"].is_null());
        }
    }
    let opened = trace(&s, "orders", 3, "opened");
    assert_eq!(opened["end"]["stored_kind"], "date");
    let text = s.ok(&["trace", "orders", "--row", "2", "--column", "total"]);
    assert_contains(&text, "cell 'Work orders'!F3 (number)");
    assert_contains(&text, "the saved result of =D3*E3");

    // The same workbook again records nothing.
    assert_contains(
        &s.ok(&["receive", "orders.xlsx", "--as", "orders", "--sheet", "1"]),
        "unchanged",
    );
}

#[test]
fn a_sheet_picked_by_position_starts_where_its_table_starts() {
    let (s, m) = workbooks();
    s.ok(&["receive", "orders.xlsx", "--as", "parts", "--sheet", "2"]);
    let table = rows(&s, "parts");
    for c in m["xlsx"]["parts_cells"].as_array().unwrap() {
        let (row, column) = (c["row"].as_u64().unwrap(), c["column"].as_str().unwrap());
        assert_eq!(cell(&table, row, column), c["value"].as_str().unwrap());
        assert_eq!(trace(&s, "parts", row, column)["end"]["cell"], c["ref"]);
    }
    let step = ingest_step(&s, "parts");
    assert_eq!(
        step["params"]["convert"]["columns"],
        serde_json::json!(["B", "C", "D"])
    );
    assert_eq!(step["params"]["convert"]["header_row"], 3);
}

#[test]
fn an_ods_sheet_is_taken_in_with_its_formulas_saved_values() {
    let (s, m) = workbooks();
    let o = &m["ods"];
    s.ok(&["receive", "orders.ods", "--as", "shop_orders"]);
    let table = rows(&s, "shop_orders");
    assert_eq!(table.len() as u64, o["n_rows"].as_u64().unwrap());
    for c in o["cells"].as_array().unwrap() {
        let (row, column) = (c["row"].as_u64().unwrap(), c["column"].as_str().unwrap());
        assert_eq!(
            cell(&table, row, column),
            c["value"].as_str().unwrap(),
            "cell {}",
            c["ref"]
        );
        let end = &trace(&s, "shop_orders", row, column)["end"];
        assert_eq!(end["cell"], c["ref"]);
        assert_eq!(end["format"], "ods");
    }
    let conv = &ingest_step(&s, "shop_orders")["params"]["convert"];
    assert_eq!(conv["formulas"], o["formulas"]);
}

#[test]
fn a_trail_through_later_steps_still_ends_at_the_cell() {
    let (s, _) = workbooks();
    s.ok(&[
        "receive",
        "orders.xlsx",
        "--as",
        "orders",
        "--sheet",
        "Work orders",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "case",
        "--to",
        "upper",
        "--columns",
        "shop",
        "--why",
        "one spelling",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "drop",
        "paid = 'false'",
        "--why",
        "unpaid orders are not revenue",
    ]);
    // Data row 2 after the drop is order 41003 (sheet row 5: row 4 of the sheet is blank).
    let t = trace(&s, "orders", 2, "shop");
    assert_eq!(t["value"], "OXWATER WHEELWORKS");
    assert_eq!(t["end"]["cell"], "'Work orders'!C5");
    assert_eq!(t["end"]["raw_value"], "Oxwater Wheelworks");
}

#[test]
fn a_workbook_header_with_a_blank_or_repeated_name_is_refused_at_its_cell() {
    let (s, _) = workbooks();
    let before = s.snapshot();
    let err = s.fails(2, &["receive", "blank_header.xlsx", "--as", "orders"]);
    assert_contains(&err, "cell Orders!C1");
    assert_contains(&err, "blank header name");
    let err = s.fails(2, &["receive", "repeated_header.xlsx", "--as", "orders"]);
    assert_contains(&err, "cell Orders!D1");
    assert_contains(&err, "duplicate header name \"shop\"");
    // A key is checked like a text file's, each duplicate named by its cells.
    let err = s.fails(
        2,
        &[
            "receive",
            "orders.xlsx",
            "--as",
            "orders",
            "--sheet",
            "1",
            "--key",
            "shop",
        ],
    );
    assert_contains(
        &err,
        "\"Quillby Cycle Mend\" ('Work orders'!C2, 'Work orders'!C6)",
    );
    let err = s.fails(
        2,
        &[
            "receive",
            "orders.xlsx",
            "--as",
            "orders",
            "--sheet",
            "1",
            "--key",
            "paid",
        ],
    );
    assert_contains(
        &err,
        "cell 'Work orders'!G5: blank value in key column \"paid\"",
    );
    // Not a workbook at all, whatever its name says.
    s.file("fake.xlsx", "order_id,shop\n1,Quillby Cycle Mend\n");
    let err = s.fails(2, &["receive", "fake.xlsx", "--as", "orders"]);
    assert_contains(&err, "cannot be read as a workbook");
    // --sheet on delimited text is a usage error.
    s.file("orders.csv", "order_id,shop\n1,Quillby Cycle Mend\n");
    let err = s.fails(
        2,
        &["receive", "orders.csv", "--as", "orders", "--sheet", "1"],
    );
    assert_contains(&err, "--sheet is for workbooks");
    assert_eq!(s.snapshot(), before);
}

/// JSON Lines with text, numbers as written (trailing zeros, exponents, a value beyond
/// binary64), booleans, null, escapes, a key first seen on a later line and a blank line.
const ORDERS_JSONL: &str = concat!(
    "{\"order_id\": 43001, \"shop\": \"Oxwater Wheelworks\", \"parts_cost\": 12.50, \"paid\": true}\n",
    "{\"order_id\": 43002, \"shop\": \"Fennmarsh Bike Clinic\", \"parts_cost\": 1e3, \"paid\": false, \"note\": \"tab\\there \\\"quoted\\\" \\u00e9\"}\n",
    "\n",
    "{\"shop\": \"Quillby Cycle Mend\", \"order_id\": 43003, \"parts_cost\": 0.30000000000000000001, \"paid\": null}\r\n",
    "{\"order_id\": 43004, \"note\": \"line one\\nline two\", \"parts_cost\": -0.0}\n",
);

/// Python's json module as the reference: numbers kept as their tokens (parse_int and
/// parse_float receive the text), keys in first-seen order (dicts keep insertion order),
/// null as an empty cell and booleans as true/false (sluice's documented mapping).
const PY_JSONL: &str = r#"
import json, sys
header, rows = [], []
for line in open(sys.argv[1], encoding="utf-8"):
    if not line.strip():
        continue
    obj = json.loads(line, parse_int=str, parse_float=str)
    for k in obj:
        if k not in header:
            header.append(k)
    rows.append(obj)
def cell(v):
    if v is None:
        return ""
    if v is True:
        return "true"
    if v is False:
        return "false"
    return v
print(json.dumps({"header": header, "rows": [[cell(r.get(k)) for k in header] for r in rows]}))
"#;

#[test]
fn json_lines_are_taken_in_as_pythons_json_module_reads_them() {
    let s = Sandbox::with_store();
    let path = s.file("orders.jsonl", ORDERS_JSONL);
    let want: Value = serde_json::from_str(&python(PY_JSONL, &[&path])).unwrap();
    s.ok(&[
        "receive",
        "orders.jsonl",
        "--as",
        "web_orders",
        "--why",
        "booking form",
    ]);
    let show = s.json(&["about", "web_orders", "--json"]);
    assert_eq!(show["version"]["header"], want["header"]);
    let got: Vec<Vec<String>> = rows(&s, "web_orders")
        .into_iter()
        .map(|r| r.into_iter().map(|(_, v)| v).collect())
        .collect();
    assert_eq!(serde_json::to_value(&got).unwrap(), want["rows"]);
    // Numbers are the tokens themselves, never through floating point.
    assert_eq!(got[2][2], "0.30000000000000000001");
    assert_eq!(got[1][2], "1e3");
    assert_eq!(got[3][2], "-0.0");

    // A trail ends at the line (the blank line counted) and the token as written.
    let t = trace(&s, "web_orders", 3, "parts_cost");
    assert_eq!(t["end"]["format"], "jsonl");
    assert_eq!(t["end"]["line"], 4);
    assert_eq!(t["end"]["raw_value"], "0.30000000000000000001");
    assert_eq!(
        t["end"]["raw_line"],
        ORDERS_JSONL.lines().nth(3).unwrap().trim_end_matches('\r')
    );
    let t = trace(&s, "web_orders", 1, "note");
    assert_eq!(t["end"]["stored_kind"], "missing");
    let conv = &ingest_step(&s, "web_orders")["params"]["convert"];
    assert_eq!(conv["rows"], serde_json::json!([[1, 1, 2], [3, 4, 2]]));
}

#[test]
fn json_lines_that_cannot_be_a_table_are_refused_with_their_line() {
    let s = Sandbox::with_store();
    let before = s.snapshot();
    for (content, line, says) in [
        (
            "{\"a\": 1}\n{\"a\": {\"b\": 2}}\n",
            "line 2",
            "the value of \"a\" is an array or an object",
        ),
        ("{\"a\": 1}\n{\"a\": [1]}\n", "line 2", "array or an object"),
        ("{\"a\": 1}\n\n{\"a\": 1,}\n", "line 3", "not valid JSON"),
        ("{\"a\": 1}\n[1, 2]\n", "line 2", "found an array"),
        ("{\"a\": 1, \"a\": 2}\n", "line 1", "appears twice"),
    ] {
        s.file("bad.jsonl", content);
        let err = s.fails(2, &["receive", "bad.jsonl", "--as", "web_orders"]);
        assert_contains(&err, line);
        assert_contains(&err, says);
    }
    assert_eq!(s.snapshot(), before);
}

#[test]
fn tab_separated_files_are_detected_or_named_and_written_back() {
    // IANA text/tab-separated-values: records on lines, fields separated by tabs, no quoting
    // (a field holds no tab or line break), the first line naming the fields.
    let tsv = "order_id\tshop\tparts_cost\tnote\n\
               44001\tQuillby Cycle Mend\t12.50\tsaddle, \"gel\"\n\
               44002\tOxwater Wheelworks\t4.00\t\n";
    let s = Sandbox::with_store();
    s.file("orders.tsv", tsv);
    s.ok(&["receive", "orders.tsv", "--as", "detected"]);
    s.ok(&[
        "receive",
        "orders.tsv",
        "--as",
        "named",
        "--delimiter",
        "tab",
    ]);
    for name in ["detected", "named"] {
        let show = s.json(&["about", name, "--json"]);
        assert_eq!(show["version"]["dialect"]["delimiter"], "\t");
        assert_eq!(show["version"]["n_cols"], 4);
        // The stored bytes are the file's; --format tsv writes the same rows back.
        assert_eq!(s.ok(&["retrieve", name]), tsv);
        assert_eq!(s.ok(&["retrieve", name, "--format", "tsv"]), tsv);
    }
    assert_eq!(
        ingest_step(&s, "named")["params"]["delimiter_detected"],
        false
    );
    // As CSV (RFC 4180): the comma and the quotes make the note quoted, inner quotes doubled.
    assert_eq!(
        s.ok(&["retrieve", "named", "--format", "csv"]),
        "order_id,shop,parts_cost,note\n\
         44001,Quillby Cycle Mend,12.50,\"saddle, \"\"gel\"\"\"\n\
         44002,Oxwater Wheelworks,4.00,\n"
    );
}

#[test]
fn cat_formats_write_the_same_rows_and_refuse_what_tsv_cannot_hold() {
    let s = Sandbox::with_store();
    s.file(
        "orders.csv",
        "order_id;note;shop\r\n45001;\"two\nlines\";Fennmarsh Bike Clinic\r\n45002;\"a\ttab\";Quillby Cycle Mend\r\n45003;plain;\"Oxwater \"\"OW\"\" Wheelworks\"\r\n",
    );
    s.ok(&["receive", "orders.csv", "--as", "orders"]);
    // csv: canonical (comma, LF, minimal quoting) even for a semicolon CRLF file.
    let csv = s.ok(&["retrieve", "orders", "--format", "csv"]);
    assert_eq!(
        csv,
        "order_id,note,shop\n45001,\"two\nlines\",Fennmarsh Bike Clinic\n45002,a\ttab,Quillby Cycle Mend\n45003,plain,\"Oxwater \"\"OW\"\" Wheelworks\"\n"
    );
    // A derived version's stored bytes are canonical CSV already: --format csv is a copy.
    s.ok(&["clean", "orders", "trim", "--why", "spaces"]);
    assert_eq!(
        s.ok(&["retrieve", "orders:v2", "--format", "csv"]),
        s.ok(&["retrieve", "orders:v2"])
    );

    // jsonl, read back by Python's json module: the same cells as Python's csv module reads
    // from the CSV rendering (both general-purpose reference readers).
    let jsonl = s.file(
        "orders.jsonl.out",
        s.ok(&["retrieve", "orders", "--format", "jsonl"]),
    );
    let csv_path = s.file("orders.csv.out", &csv);
    let same = python(
        r#"
import csv, json, sys
a = [json.loads(l) for l in open(sys.argv[1], encoding="utf-8")]
with open(sys.argv[2], newline="", encoding="utf-8") as f:
    r = list(csv.reader(f))
b = [dict(zip(r[0], row)) for row in r[1:]]
print("same" if a == b and [list(x) for x in a] == [r[0]] * len(a) else "differ: %r %r" % (a, b))
"#,
        &[&jsonl, &csv_path],
    );
    assert_eq!(same.trim(), "same");

    // tsv: the note with a line break cannot be written; refused with its row and column, and
    // -o leaves no file behind.
    let err = s.fails(
        1,
        &["retrieve", "orders", "--format", "tsv", "-o", "out.tsv"],
    );
    assert_contains(&err, "data row 1, column note holds a line break");
    assert!(!s.path().join("out.tsv").exists());
    s.ok(&[
        "clean",
        "orders",
        "keep",
        "order_id = '45002'",
        "--why",
        "one row",
    ]);
    let err = s.fails(1, &["retrieve", "orders", "--format", "tsv"]);
    assert_contains(&err, "holds a tab");
}

proptest::proptest! {
    #![proptest_config(proptest::prelude::ProptestConfig { cases: 12, ..Default::default() })]

    /// Law: a version written with `cat --format jsonl` and taken in again is the same table
    /// (the same canonical CSV, so the same hash), whatever its cells hold.
    #[test]
    fn jsonl_written_and_taken_in_again_is_the_same_table(
        cells in proptest::collection::vec(
            proptest::collection::vec("[a-z0-9 ,\"\\\\\t\n\r\u{e9}\u{1F6B2}]{0,6}", 3),
            1..6,
        )
    ) {
        let s = Sandbox::with_store();
        let mut csv = Vec::new();
        sluice::table::write::push_record(&mut csv, ["shop", "note", "amount"].iter().map(|h| h.as_bytes()));
        for row in &cells {
            sluice::table::write::push_record(&mut csv, row.iter().map(|c| c.as_bytes()));
        }
        s.file("t.csv", &csv);
        s.ok(&["receive", "t.csv", "--as", "t", "--delimiter", ","]);
        let jsonl = s.ok(&["retrieve", "t", "--format", "jsonl"]);
        s.file("t.jsonl", jsonl);
        s.ok(&["receive", "t.jsonl", "--as", "again"]);
        let a = s.json(&["about", "t", "--json"]);
        let b = s.json(&["about", "again", "--json"]);
        proptest::prop_assert_eq!(&a["version"]["hash"], &b["version"]["hash"]);
    }
}

#[test]
fn a_history_from_a_workbook_exports_as_a_plan_that_remakes_it() {
    let (s, _) = workbooks();
    s.ok(&[
        "receive",
        "orders.xlsx",
        "--as",
        "orders",
        "--sheet",
        "Work orders",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "case",
        "--to",
        "upper",
        "--columns",
        "shop",
        "--why",
        "one spelling",
    ]);
    s.ok(&["export", "orders", "--format", "plan", "-o", "remake.json"]);
    let plan: Value =
        serde_json::from_str(&std::fs::read_to_string(s.path().join("remake.json")).unwrap())
            .unwrap();
    assert_eq!(plan["sources"][0]["sheet"], "Work orders");
    assert_eq!(plan["sources"][0]["file"], "orders.xlsx");
    let fresh = Sandbox::with_store();
    std::fs::copy(
        s.path().join("orders.xlsx"),
        fresh.path().join("orders.xlsx"),
    )
    .unwrap();
    std::fs::copy(
        s.path().join("remake.json"),
        fresh.path().join("remake.json"),
    )
    .unwrap();
    fresh.ok(&["run", "remake.json"]);
    let a = s.json(&["about", "orders", "--json"]);
    let b = fresh.json(&["about", "orders", "--json"]);
    assert_eq!(a["version"]["hash"], b["version"]["hash"]);
}

#[test]
fn replay_converts_the_raw_workbook_again_and_stops_at_a_damaged_one() {
    let (s, _) = workbooks();
    s.ok(&["receive", "orders.ods", "--as", "shop_orders"]);
    s.ok(&[
        "clean",
        "shop_orders",
        "case",
        "--to",
        "upper",
        "--columns",
        "note",
        "--why",
        "one spelling",
    ]);
    let r = s.json(&["reproduce", "shop_orders", "--json"]);
    assert_eq!(r["reproduced"], true);
    let first = &r["steps"][0];
    assert_eq!(first["kind"], "ingest");
    assert_eq!(first["result"], "same");
    assert_eq!(first["computed_hash"], first["recorded_hash"]);

    // The workbook object damaged behind sluice's back: replay names it and stops.
    let conv = ingest_step(&s, "shop_orders")["params"]["convert"].clone();
    let hash = conv["raw"]["hash"].as_str().unwrap();
    damage_object(&s.path().join(sluice::store::STORE_DIR), hash, |bytes| {
        let last = bytes.len() - 1;
        bytes[last] ^= 0x20;
    });
    let out = s.run(&["reproduce", "shop_orders", "--json"]);
    assert_eq!(out.code, 1);
    let r: Value = serde_json::from_str(&out.stdout).unwrap();
    assert_eq!(r["steps"][0]["result"], "raw_damaged");
    assert_contains(r["steps"][0]["detail"].as_str().unwrap(), "raw ods object");
    assert_contains(&s.run(&["verify"]).stdout, hash);
}

#[test]
fn dates_of_the_1904_date_system_are_read_as_that_system_counts_them() {
    let (s, m) = workbooks();
    s.ok(&[
        "receive",
        "mac1904.xlsx",
        "--as",
        "mac",
        "--sheet",
        "Orders",
    ]);
    let got: Vec<String> = rows(&s, "mac")
        .into_iter()
        .map(|r| r[0].1.clone())
        .collect();
    // Python's isoformat of the dates openpyxl wrote with its 1904 epoch.
    assert_eq!(serde_json::to_value(&got).unwrap(), m["mac1904"]);
    let err = s.fails(
        2,
        &[
            "receive",
            "mac1904.xlsx",
            "--as",
            "empty",
            "--sheet",
            "Empty",
        ],
    );
    assert_contains(&err, "sheet \"Empty\" holds no cell");
}
