//! `sluice trace`: a cell's trail back through every step to the raw file and line it came
//! from, branching for derived columns and continuing into looked-up tables and appended
//! sources.

mod common;

use common::{assert_contains, Sandbox, Xorshift64};
use serde_json::Value;

/// A store with orders whose notes hold line breaks (so lines and rows differ), cleaned by
/// trim, dedupe, rename and number.
fn cleaned() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "orders.csv",
        "id,customer,amount,note\n\
         1, Ada Quenwick ,€12.50,\"two\nlines\"\n\
         2,Bram Fenley,4.00,\n\
         2,Bram Fenley,4.00,\n\
         3,Cora Dunmore ,\"1,204.50\",\"a \"\"quoted\"\"\nnote\"\n\
         4,Dev Ashby,7,plain\n",
    );
    s.ok(&["receive", "orders.csv", "--as", "orders", "--why", "export"]);
    s.ok(&["clean", "orders", "trim", "--why", "spaces"]);
    s.ok(&["clean", "orders", "dedupe", "--why", "twice"]);
    s.ok(&[
        "clean",
        "orders",
        "rename",
        "amount=parts_cost",
        "--why",
        "our name",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "number",
        "--columns",
        "parts_cost",
        "--why",
        "amounts",
    ]);
    s
}

fn trace(s: &Sandbox, args: &[&str]) -> Value {
    let mut all = vec!["trace"];
    all.extend_from_slice(args);
    all.push("--json");
    s.json(&all)
}

#[test]
fn a_cell_is_traced_through_every_step_to_its_raw_line() {
    let s = cleaned();
    // Data row 3 of the cleaned version is order 3: row 4 of the raw file (a duplicate was
    // dropped before it), whose record starts on line 6 (two notes above it hold line breaks).
    let t = trace(&s, &["orders", "--row", "3", "--column", "parts_cost"]);
    assert_eq!(t["value"], "1204.50");
    let hops = t["hops"].as_array().unwrap();
    let ops: Vec<&str> = hops
        .iter()
        .map(|h| h["operation"].as_str().unwrap())
        .collect();
    assert_eq!(ops, vec!["number", "rename", "dedupe", "trim"]);
    assert_eq!(hops[0]["value_before"], "1,204.50");
    assert_eq!(hops[0]["changed"], true);
    assert_eq!(hops[1]["column_before"], "amount");
    assert_eq!(hops[1]["column_after"], "parts_cost");
    assert_eq!(hops[2]["row_after"], 3);
    assert_eq!(hops[2]["row_before"], 4);
    assert_eq!(hops[2]["changed"], false);
    assert!(hops.iter().all(|h| h["link"] == "exact"));
    let raw = &t["end"];
    assert_eq!(raw["kind"], "raw");
    assert_eq!(raw["path"], "orders.csv");
    assert_eq!(raw["column"], "amount");
    assert_eq!(raw["raw_value"], "1,204.50");
    assert_eq!(
        raw["raw_line"],
        "3,Cora Dunmore ,\"1,204.50\",\"a \"\"quoted\"\"\nnote\""
    );

    // The line number agrees with Python's csv module (a general-purpose reference): its
    // reader's line_num after the header and three records is the last line of the third, so
    // the fourth record starts on the line after it.
    let script = r#"
import csv, sys
with open(sys.argv[1], newline="") as f:
    r = csv.reader(f)
    next(r)
    for _ in range(3):
        next(r)
    print(r.line_num + 1)
"#;
    let out = std::process::Command::new("python3")
        .args(["-c", script])
        .arg(s.path().join("orders.csv"))
        .output()
        .expect("python3 is needed for the reference checks");
    assert!(out.status.success());
    let python_line: u64 = String::from_utf8(out.stdout)
        .unwrap()
        .trim()
        .parse()
        .unwrap();
    assert_eq!(raw["line"].as_u64().unwrap(), python_line);
    assert_eq!(python_line, 6);

    // The text form folds the steps that left the value alone and shows the raw record.
    let text = s.ok(&["trace", "orders", "--row", "1", "--column", "customer"]);
    assert_contains(&text, "customer of orders:v5, data row 1: \"Ada Quenwick\"");
    assert_contains(
        &text,
        "3 steps left it alone (step 5 number, step 4 rename, step 3 dedupe)",
    );
    assert_contains(
        &text,
        "before  orders:v1 row 1 customer: \" Ada Quenwick \"",
    );
    assert_contains(
        &text,
        "orders:v1 line 2, column customer: \" Ada Quenwick \"",
    );
}

#[test]
fn rows_are_picked_by_key_and_mistakes_are_named() {
    let s = cleaned();
    let t = trace(&s, &["orders", "--key", "id=4", "--column", "customer"]);
    assert_eq!(t["row"], 4);
    assert_eq!(t["end"]["line"], 8);
    for (args, expected) in [
        (
            vec!["orders", "--row", "0", "--column", "customer"],
            "orders:v5 has data rows 1 to 4; there is no row 0",
        ),
        (
            vec!["orders", "--row", "9", "--column", "customer"],
            "there is no row 9",
        ),
        (
            vec!["orders", "--row", "1", "--column", "colour"],
            "column \"colour\" is not in orders:v5",
        ),
        (
            vec!["orders", "--key", "id=77", "--column", "customer"],
            "no row of orders:v5 has id=77",
        ),
        (
            vec!["orders:v1", "--key", "id=2", "--column", "customer"],
            "2 rows of orders:v1 have id=2 (data rows 2, 3)",
        ),
        (
            vec!["orders", "--key", "shop=Q", "--column", "customer"],
            "key column \"shop\" is not in orders:v5",
        ),
    ] {
        let mut all = vec!["trace"];
        all.extend(args);
        assert_contains(&s.fails(2, &all), expected);
    }
}

#[test]
fn derived_looked_up_appended_and_summarised_cells() {
    let s = Sandbox::with_store();
    s.file(
        "q.csv",
        "id,customer,tech\n1,Ada Quenwick,Ines\n2,Bram Fenley,Caspar\n",
    );
    s.file(
        "o.csv",
        "order no,client,mechanic\nOX-1,Cora Dunmore,Caspar\n",
    );
    s.file("staff.csv", "name,shop\nInes,Quillby\nCaspar,Oxwater\n");
    s.ok(&["receive", "q.csv", "--as", "q"]);
    s.ok(&["receive", "o.csv", "--as", "o"]);
    s.ok(&["receive", "staff.csv", "--as", "staff"]);
    s.ok(&[
        "clean",
        "q",
        "append",
        "--other",
        "o",
        "--map",
        "order no=id",
        "--map",
        "client=customer",
        "--map",
        "mechanic=tech",
        "--as",
        "all",
        "--why",
        "one table",
    ]);
    s.ok(&[
        "clean",
        "all",
        "split",
        "--column",
        "customer",
        "--on",
        " ",
        "--into",
        "given,family",
        "--why",
        "names",
    ]);
    s.ok(&[
        "clean",
        "all",
        "combine",
        "--columns",
        "family,given",
        "--with",
        ", ",
        "--into",
        "sort_name",
        "--why",
        "sorting",
    ]);
    s.ok(&[
        "clean",
        "all",
        "lookup",
        "--table",
        "staff",
        "--on",
        "tech",
        "--table-on",
        "name",
        "--take",
        "shop",
        "--why",
        "shops",
    ]);
    s.ok(&[
        "clean",
        "all",
        "summarize",
        "--by",
        "shop",
        "--as",
        "per_shop",
        "--why",
        "counts",
    ]);

    // A row from the appended source traces to that source's file, under its own names.
    let t = trace(&s, &["all", "--row", "3", "--column", "customer"]);
    let hops = t["hops"].as_array().unwrap();
    let append = hops.iter().find(|h| h["operation"] == "append").unwrap();
    assert_eq!(append["read"], "o:v1");
    assert_eq!(append["column_before"], "client");
    assert_eq!(t["end"]["path"], "o.csv");
    assert_eq!(t["end"]["raw_line"], "OX-1,Cora Dunmore,Caspar");

    // A combined column branches to each column it was made from, each to its raw cell.
    let t = trace(&s, &["all", "--row", "1", "--column", "sort_name"]);
    assert_eq!(t["value"], "Quenwick, Ada");
    let branches = t["end"]["sources"].as_array().unwrap();
    assert_eq!(branches.len(), 2);
    let ends: Vec<(&str, &str)> = branches
        .iter()
        .map(|b| {
            (
                b["trail"]["column"].as_str().unwrap(),
                b["trail"]["value"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(ends, vec![("family", "Quenwick"), ("given", "Ada")]);
    // ... and a split column back to the one it was split from.
    let family = &branches[0]["trail"];
    assert_eq!(family["end"]["kind"], "raw");
    assert_eq!(family["end"]["column"], "customer");
    assert_eq!(family["end"]["raw_value"], "Ada Quenwick");

    // A looked-up column continues in the table's row with the same key.
    let t = trace(&s, &["all", "--row", "2", "--column", "shop"]);
    assert_eq!(t["value"], "Oxwater");
    let sub = &t["end"]["sources"][0];
    assert_contains(
        sub["via"].as_str().unwrap(),
        "looked up in staff:v1 by name",
    );
    assert_eq!(sub["trail"]["row"], 2);
    assert_eq!(sub["trail"]["end"]["raw_line"], "Caspar,Oxwater");

    // A summary cell says it is made by the summary (explained elsewhere), not traced row by row.
    let t = trace(&s, &["per_shop", "--row", "1", "--column", "count"]);
    assert_eq!(t["end"]["kind"], "made");
    assert_eq!(t["end"]["operation"], "summarize");
}

// Windows-1252 is the WHATWG Encoding Standard's legacy single-byte encoding for Western
// European text (0xE9 is "é"): the raw line of a trail is shown decoded, as the file meant it.
#[test]
fn a_raw_line_in_a_legacy_encoding_is_shown_decoded() {
    let s = Sandbox::with_store();
    s.file("l1.csv", b"id;name\n1; Jos\xe9 \n2;Ren\xe9e\n");
    s.ok(&[
        "receive",
        "l1.csv",
        "--as",
        "people",
        "--encoding",
        "windows-1252",
    ]);
    s.ok(&["clean", "people", "trim", "--why", "spaces"]);
    let t = trace(&s, &["people", "--row", "1", "--column", "name"]);
    assert_eq!(t["value"], "José");
    assert_eq!(t["end"]["raw_value"], " José ");
    assert_eq!(t["end"]["raw_line"], "1; José ");
    assert_eq!(t["end"]["line"], 2);
}

/// A row picked by key is found by searching the version's bytes for the value and parsing only
/// the rows that hold it; when that cannot be relied on (a value with a quote) or would not be
/// quicker (thousands of rows holding it), every row is parsed. Either way the rows found must
/// be those whose field equals the value, which the `csv` crate (the reference reader here,
/// RFC 4180) tells from the same file: values that are parts of other values, a value in the
/// header or in another column only, quoted fields holding the delimiter, a line break or a
/// doubled quote, CRLF line endings, duplicates, and a value across the 256 KiB pieces the
/// object is read in.
#[test]
fn rows_picked_by_key_are_the_rows_whose_field_equals_the_value() {
    let mut text = String::from("id,customer,note\r\n");
    let mut rng = Xorshift64(0x2545_F491_4F6C_DD1D);
    for i in 0..30_000u64 {
        let x = rng.next(); // for notes that differ from row to row
        let note = match i % 7 {
            0 => format!("\"see {}, twice\"", x % 1000),
            1 => format!("\"line\r\nbreak {}\"", x % 97),
            2 => format!("\"a \"\"quoted\"\" {}\"", x % 50),
            3 => format!("ref {}", 1000 + i / 3),
            _ => format!("n{}", x % 100_000),
        };
        let id = if i == 12_345 { 777 } else { 1000 + i };
        text.push_str(&format!("{id},Customer {},{note}\r\n", i % 250));
        // An id across the first boundary between pieces (tables are stored in frames of
        // 256 KiB, and read a frame at a time): a filler row, then id 4242421 from 3 bytes
        // before the boundary.
        const PIECE: usize = 256 << 10;
        if text.len() > PIECE - 400 && text.len() < PIECE - 100 {
            let start = "8,Customer x,".len() + 2;
            let pad = PIECE - 3 - text.len() - start;
            text.push_str(&format!("8,Customer x,{}\r\n", "p".repeat(pad)));
            assert_eq!(text.len(), PIECE - 3);
            text.push_str("4242421,Customer y,boundary\r\n");
        }
    }
    text.push_str("id,Customer 1,header again\r\n");
    let s = Sandbox::with_store();
    s.file("orders.csv", &text);
    s.ok(&["receive", "orders.csv", "--as", "orders"]);

    check_keys(&s, text.as_bytes(), PROBES);
    // After an erasure order the version's bytes are its erased form (and so is its row index):
    // the rows found are those of the bytes `retrieve` gives now.
    s.ok(&[
        "erase",
        "orders:v1",
        "--key",
        "id=1005",
        "--request",
        "R-1",
        "--carry-out",
    ]);
    let erased = s.run(&["retrieve", "orders:v1"]).raw_stdout;
    assert_ne!(erased, text.as_bytes());
    check_keys(
        &s,
        &erased,
        &[(0, "id", "1005"), (0, "id", "1006"), (0, "id", "4242421")],
    );
}

/// The keys [`rows_picked_by_key_are_the_rows_whose_field_equals_the_value`] looks up: column,
/// name, value.
const PROBES: &[(usize, &str, &str)] = &[
    (0, "id", "1000"), // also the start of 1000..1009 and inside notes
    (0, "id", "1001"),
    (0, "id", "777"),     // moved out of sequence; "777" is in many notes
    (0, "id", "12345"),   // in no row's id
    (0, "id", "id"),      // the header's own name, and a data row's
    (0, "id", "30999"),   // the last row
    (0, "id", "4242421"), // across two pieces
    (1, "customer", "Customer 7"),
    (2, "note", "ref 1000"),
    (2, "note", "line\r\nbreak 5"),
    (2, "note", "a \"quoted\" 3"), // a quote: every row parsed
    (2, "note", "n1"),
    (1, "customer", "Customer"), // in every row, as a part: every row parsed
];

/// `sluice trace orders:v1 --key` of each probe finds the rows the `csv` crate finds in `bytes`.
fn check_keys(s: &Sandbox, bytes: &[u8], probes: &[(usize, &str, &str)]) {
    let mut reference = csv::ReaderBuilder::new().from_reader(bytes);
    let records: Vec<csv::StringRecord> = reference.records().map(|r| r.unwrap()).collect();
    let expected = |col: usize, value: &str| -> Vec<usize> {
        (0..records.len())
            .filter(|&i| &records[i][col] == value)
            .map(|i| i + 1)
            .collect()
    };
    for &(col, name, value) in probes {
        let want = expected(col, value);
        let key = format!("{name}={value}");
        let args = [
            "trace", "orders", "--key", &key, "--column", "customer", "--json",
        ];
        let r = s.run(&args);
        match want.as_slice() {
            [one] => {
                assert_eq!(r.code, 0, "{key}: {}", r.stderr);
                let t: Value = serde_json::from_str(&r.stdout).unwrap();
                assert_eq!(t["row"], *one as u64, "{key}");
            }
            [] => {
                assert_eq!(r.code, 2, "{key}: {}", r.stdout);
                assert_contains(&r.stderr, &format!("no row of orders:v1 has {key}"));
            }
            many => {
                assert_eq!(r.code, 2, "{key}: {}", r.stdout);
                let rows: Vec<String> = many.iter().take(10).map(|r| r.to_string()).collect();
                assert_contains(
                    &r.stderr,
                    &format!(
                        "{} rows of orders:v1 have {key} (data rows {}",
                        many.len(),
                        rows.join(", ")
                    ),
                );
            }
        }
    }
}
