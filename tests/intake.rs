//! Intake, cat, log, show and verify through the real binary, checked against outside
//! references where one exists (RFC 4180, the palmerpenguins data set, Python's csv module).

mod common;

use std::process::Command;

use common::*;

// RFC 4180 section 2, rules 5-7: the RFC's own examples of quoted fields with an embedded line
// break, comma and doubled quote. Taken in as data (no header), the fields must be the ones
// the RFC states, and `cat` must give the bytes back exactly.
#[test]
fn rfc4180_examples_parse_to_the_documented_fields_and_round_trip() {
    let s = Sandbox::with_store();
    let bytes = b"\"aaa\",\"b\r\nbb\",\"ccc\"\r\nzzz,\"y,y\",\"x\"\"x\"";
    s.file("rfc.csv", bytes);
    s.ok(&["receive", "rfc.csv", "--as", "rfc", "--no-header"]);
    let shown = s.json(&["about", "rfc", "--json"]);
    assert_eq!(shown["version"]["n_rows"], 2);
    assert_eq!(shown["version"]["n_cols"], 3);
    assert_eq!(
        shown["version"]["header"],
        serde_json::json!(["col1", "col2", "col3"])
    );
    let p = &shown["profile"];
    // Fields per the RFC: col1 = aaa, zzz; col2 = "b\r\nbb" (5 chars), "y,y" (3); col3 = ccc, x"x.
    assert_eq!(
        (p[0]["min"].as_str(), p[0]["max"].as_str()),
        (Some("aaa"), Some("zzz"))
    );
    assert_eq!(
        (p[1]["min_len"].as_u64(), p[1]["max_len"].as_u64()),
        (Some(3), Some(5))
    );
    assert_eq!(
        (p[2]["min"].as_str(), p[2]["max"].as_str()),
        (Some("ccc"), Some("x\"x"))
    );
    let r = s.run(&["retrieve", "rfc"]);
    assert_eq!(r.code, 0);
    assert_eq!(r.raw_stdout, bytes.to_vec());
    // The second record starts on line 3: the first holds a line break inside quotes.
    let store = sluice::store::Store::open(&s.path().join("sluice-store")).unwrap();
    let v = sluice::refs::resolve(&store.lineage, "rfc").unwrap();
    let idx = store
        .objects
        .read_all(&v.row_index.parse().unwrap())
        .unwrap();
    let second = sluice::table::rowindex::position(&idx, 1).unwrap();
    // "aaa" (5) , (1) "b\r\nbb" (7) , (1) "ccc" (5) \r\n (2) = 21 bytes before it.
    assert_eq!(second, (21, 3));
}

// RFC 4180 section 2: empty fields, quoted or not, are empty values.
#[test]
fn rfc4180_empty_fields_count_as_blanks() {
    let s = Sandbox::with_store();
    s.file("e.csv", "x,y,z\r\na,,c\r\n,\"\",\r\n");
    s.ok(&["receive", "e.csv", "--as", "empties"]);
    let p = s.json(&["about", "empties", "--json"])["profile"].clone();
    assert_eq!(p[0]["n_blank"], 1);
    assert_eq!(p[1]["n_blank"], 2);
    assert_eq!(p[1]["inferred_type"], "empty");
    assert_eq!(p[2]["n_blank"], 1);
}

// The palmerpenguins data set (CC0; Horst, Hill & Gorman 2020; shipped in the PyPI package
// palmerpenguins): 344 rows x 8 columns; NA counts bill_length_mm 2, bill_depth_mm 2,
// flipper_length_mm 2, body_mass_g 2, sex 11, as documented with the data.
#[test]
fn palmerpenguins_profile_matches_the_published_counts() {
    let s = Sandbox::with_penguins();
    let shown = s.json(&["about", "penguins", "--json"]);
    assert_eq!(shown["version"]["n_rows"], 344);
    assert_eq!(shown["version"]["n_cols"], 8);
    let blanks: Vec<(String, u64)> = shown["profile"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["name"].as_str().unwrap().to_string(),
                c["n_blank"].as_u64().unwrap(),
            )
        })
        .collect();
    let expect = [
        ("species", 0),
        ("island", 0),
        ("bill_length_mm", 2),
        ("bill_depth_mm", 2),
        ("flipper_length_mm", 2),
        ("body_mass_g", 2),
        ("sex", 11),
        ("year", 0),
    ];
    for ((name, n), (ename, en)) in blanks.iter().zip(expect) {
        assert_eq!((name.as_str(), *n), (ename, en));
    }
    let p = &shown["profile"];
    assert_eq!(p[2]["inferred_type"], "decimal");
    assert_eq!(p[5]["inferred_type"], "integer");
    assert_eq!(p[0]["n_distinct"], 3);
    // Without the null token, NA is text and the measurement columns are not numeric.
    s.ok(&["receive", "penguins.csv", "--as", "penguins_raw"]);
    let raw = s.json(&["about", "penguins_raw", "--json"]);
    assert_eq!(raw["profile"][2]["inferred_type"], "text");
    assert_eq!(raw["profile"][6]["n_blank"], 0);
}

fn python_profile(file: &std::path::Path, delimiter: &str, nulls: &[&str]) -> serde_json::Value {
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/profile.py");
    let mut c = Command::new("python3");
    c.arg(script).arg(file).args(["--delimiter", delimiter]);
    for n in nulls {
        c.args(["--null", n]);
    }
    let out = c
        .output()
        .expect("python3 is needed for the reference checks");
    assert!(
        out.status.success(),
        "reference script failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("reference JSON")
}

fn assert_profile_matches_reference(s: &Sandbox, dataset: &str, reference: &serde_json::Value) {
    // The first version: the export as it was taken in.
    let first = format!("{dataset}:v1");
    let shown = s.json(&["about", &first, "--json"]);
    assert_eq!(
        shown["version"]["n_rows"], reference["n_rows"],
        "rows of {dataset}"
    );
    assert_eq!(
        shown["version"]["n_cols"], reference["n_cols"],
        "columns of {dataset}"
    );
    for (ours, theirs) in shown["profile"]
        .as_array()
        .unwrap()
        .iter()
        .zip(reference["columns"].as_array().unwrap())
    {
        for key in ["name", "n_blank", "n_distinct", "min_len", "max_len"] {
            assert_eq!(
                ours[key], theirs[key],
                "{dataset}: column {} field {key}",
                theirs["name"]
            );
        }
        assert_eq!(ours["distinct_exact"], true);
        if !theirs["numeric_min"].is_null() {
            assert_eq!(
                ours["min"], theirs["numeric_min"],
                "{dataset}: min of {}",
                theirs["name"]
            );
            assert_eq!(
                ours["max"], theirs["numeric_max"],
                "{dataset}: max of {}",
                theirs["name"]
            );
        }
    }
}

// Differential check against Python's csv and decimal modules (general-purpose references): on
// the vendored penguins file and on the demo's dirty exports (comma/LF, semicolon/CRLF/BOM,
// comma/CRLF with quoted fields), row counts, blanks, distinct counts, lengths and the exact
// extremes of numeric columns agree.
#[test]
fn profile_agrees_with_python_csv_module() {
    let ds = Sandbox::with_penguins();
    let reference = python_profile(&ds.path().join("penguins.csv"), ",", &["NA"]);
    assert_profile_matches_reference(&ds, "penguins", &reference);

    let demo = Sandbox::with_demo();
    for (file, dataset, delim) in [
        ("quillby_2026q3.csv", "quillby_orders", ","),
        ("oxwater_2026q3.csv", "oxwater_orders", ";"),
        ("fennmarsh_2026q3.csv", "fennmarsh_orders", ","),
    ] {
        let reference = python_profile(&demo.path().join("exports").join(file), delim, &[]);
        assert_profile_matches_reference(&demo, dataset, &reference);
    }
}

#[test]
fn dialect_of_each_demo_export_is_detected() {
    let d = Sandbox::with_demo();
    let ox = d.json(&["about", "oxwater_orders:v1", "--json"]);
    let dl = &ox["version"]["dialect"];
    assert_eq!(dl["delimiter"], ";");
    assert_eq!(dl["line_ending"], "crlf");
    assert_eq!(dl["bom"], true);
    assert_eq!(dl["delimiter_detected"], true);
    // The BOM is not part of the first column's name.
    assert_eq!(ox["version"]["header"][0], "order no");
    let q = d.json(&["about", "quillby_orders:v1", "--json"]);
    assert_eq!(q["version"]["dialect"]["line_ending"], "lf");
    assert_eq!(q["version"]["dialect"]["bom"], false);
}

#[test]
fn tab_and_pipe_files_and_an_explicit_delimiter() {
    let s = Sandbox::with_store();
    s.file("t.tsv", "a\tb\n1\t2\n3\t4\n");
    s.file("p.txt", "a|b|c\n1|2|3\n");
    s.file("semi_as_comma.csv", "a;b,c\n1;2,3\n");
    s.ok(&["receive", "t.tsv", "--as", "tabbed"]);
    s.ok(&["receive", "p.txt", "--as", "piped"]);
    s.ok(&[
        "receive",
        "semi_as_comma.csv",
        "--as",
        "given",
        "--delimiter",
        ",",
    ]);
    assert_eq!(
        s.json(&["about", "tabbed", "--json"])["version"]["dialect"]["delimiter"],
        "\t"
    );
    assert_eq!(
        s.json(&["about", "piped", "--json"])["version"]["n_cols"],
        3
    );
    let g = s.json(&["about", "given", "--json"]);
    assert_eq!(g["version"]["header"], serde_json::json!(["a;b", "c"]));
    assert_eq!(g["version"]["dialect"]["delimiter_detected"], false);
}

#[test]
fn identical_bytes_record_no_new_version() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id,v\n1,x\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    let before = s.snapshot();
    let out = s.ok(&["receive", "a.csv", "--as", "things"]);
    assert_contains(&out, "unchanged");
    assert_contains(&out, "things:v1");
    assert_eq!(before, s.snapshot());
    // Different bytes make version 2; going back to the first bytes makes version 3.
    s.file("a.csv", "id,v\n1,y\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    s.file("a.csv", "id,v\n1,x\n");
    let out = s.ok(&["receive", "a.csv", "--as", "things"]);
    assert_contains(&out, "things:v3");
    let v1 = s.json(&["about", "things:v1", "--json"]);
    let v3 = s.json(&["about", "things:v3", "--json"]);
    assert_eq!(v1["version"]["hash"], v3["version"]["hash"]);
}

#[test]
fn references_by_name_number_and_hash_prefix() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id\n1\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    s.file("a.csv", "id\n2\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    let v1 = s.json(&["about", "things:v1", "--json"]);
    let hash = v1["version"]["hash"].as_str().unwrap().to_string();
    assert_eq!(hash, blake3::hash(b"id\n1\n").to_hex().to_string());
    let by_prefix = s.json(&["about", &format!("blake3:{}", &hash[..8]), "--json"]);
    assert_eq!(by_prefix["version"]["seq"], 1);
    assert_eq!(by_prefix["is_latest"], false);
    assert_eq!(s.json(&["about", "things", "--json"])["version"]["seq"], 2);
    assert_eq!(
        s.run(&["retrieve", &format!("blake3:{hash}")]).raw_stdout,
        b"id\n1\n".to_vec()
    );
}

#[test]
fn timeline_lists_steps_oldest_first_with_who_when_why() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id\n1\n");
    s.file("b.csv", "k\nz\n");
    s.ok(&["receive", "a.csv", "--as", "alpha", "--why", "first export"]);
    s.ok(&[
        "receive",
        "b.csv",
        "--as",
        "beta",
        "--person",
        "Jo Tester",
        "--email",
        "jo@example.net",
    ]);
    let log = s.json(&["timeline", "--json"]);
    let entries = log.as_array().unwrap();
    assert_eq!(entries.len(), 2);
    assert_eq!(entries[1]["produced"][0]["dataset"], "beta");
    // --person wins over SLUICE_PERSON (set by the test helper).
    assert_eq!(entries[1]["step"]["agent"], "Jo Tester (jo@example.net)");
    assert_eq!(entries[0]["step"]["agent"], AGENT);
    assert_eq!(entries[0]["step"]["reason"], "first export");
    assert_eq!(entries[0]["step"]["kind"], "ingest");
    assert_eq!(
        entries[0]["step"]["tool_version"],
        concat!("sluice ", env!("CARGO_PKG_VERSION"))
    );
    assert_eq!(entries[0]["step"]["rows_out"], 1);
    assert!(entries[0]["step"]["source"]["absolute_path"]
        .as_str()
        .unwrap()
        .ends_with("a.csv"));
    let only_alpha = s.json(&["timeline", "--dataset", "alpha", "--json"]);
    assert_eq!(only_alpha.as_array().unwrap().len(), 1);
    let text = s.ok(&["timeline"]);
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 3, "{text}");
    for col in ["when (UTC)", "step", "action", "made", "by", "reason"] {
        assert_contains(lines[0], col);
    }
    // Oldest first: alpha's intake, then beta's; the store-wide step numbers 1 and 2.
    let words = |l: &str| l.split_whitespace().map(str::to_string).collect::<Vec<_>>();
    assert_eq!(&words(lines[1])[2..5], ["1", "receive", "alpha:v1"]);
    assert!(
        lines[1].trim_end().ends_with("Test Runner  first export"),
        "{text}"
    );
    assert_eq!(&words(lines[2])[2..5], ["2", "receive", "beta:v1"]);
    // The filters: by person (name or address), by time, the latest N.
    let count = |args: &[&str]| {
        let mut all = vec!["timeline", "--json"];
        all.extend_from_slice(args);
        s.json(&all).as_array().unwrap().len()
    };
    assert_eq!(count(&["--by", "jo tester"]), 1);
    assert_eq!(count(&["--by", "jo@example.net"]), 1);
    assert_eq!(count(&["--by", "Nobody"]), 0);
    assert_eq!(count(&["--since", "2000-01-01"]), 2);
    assert_eq!(count(&["--until", "2000-01-01"]), 0);
    assert_eq!(count(&["--since", "9999-12-31T00:00:00Z"]), 0);
    let today = entries[0]["step"]["started_at"].as_str().unwrap()[..10].to_string();
    assert_eq!(
        count(&["--until", &today]),
        2,
        "a date includes its whole day"
    );
    let latest = s.json(&["timeline", "--json", "--limit", "1"]);
    assert_eq!(latest[0]["produced"][0]["dataset"], "beta");
    let err = s.fails(2, &["timeline", "--since", "yesterday"]);
    assert_contains(&err, "--since yesterday: expected an ISO 8601 date");
}

#[test]
fn key_is_declared_on_the_dataset() {
    let s = Sandbox::with_store();
    s.file("k.csv", "order_id,shop\n1,Quillby\n2,Oxwater\n");
    s.ok(&["receive", "k.csv", "--as", "orders", "--key", "order_id"]);
    let shown = s.json(&["about", "orders", "--json"]);
    assert_eq!(shown["key"], serde_json::json!(["order_id"]));
}

#[test]
fn header_that_looks_like_data_gets_a_warning() {
    let s = Sandbox::with_store();
    s.file("n.csv", "1,2\n3,4\n5,6\n");
    let r = s.run(&["receive", "n.csv", "--as", "numbers"]);
    assert_eq!(r.code, 0);
    assert_contains(&r.stderr, "--no-header");
}

#[test]
fn verify_names_a_flipped_byte_and_an_edited_audit_entry() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id,v\n1,x\n2,y\n");
    s.ok(&["receive", "a.csv", "--as", "things"]);
    assert_contains(&s.ok(&["verify"]), "intact");
    let hash = blake3::hash(b"id,v\n1,x\n2,y\n").to_hex().to_string();
    damage_object(&s.path().join(sluice::store::STORE_DIR), &hash, |bytes| {
        bytes[3] ^= 0x01;
    });
    let r = s.run(&["verify"]);
    assert_eq!(r.code, 1);
    assert_contains(&r.stdout, &hash);
    assert_contains(&r.stdout, "object_damaged");
    damage_object(&s.path().join(sluice::store::STORE_DIR), &hash, |bytes| {
        bytes[3] ^= 0x01;
    });
    assert_eq!(s.run(&["verify"]).code, 0);

    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    db.execute(
        "UPDATE audit_log SET subject = 'things:v7' WHERE seq = 2",
        [],
    )
    .unwrap();
    drop(db);
    let r = s.run(&["verify", "--json"]);
    assert_eq!(r.code, 1);
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["intact"], false);
    let problems = report["problems"].as_array().unwrap();
    assert!(problems
        .iter()
        .any(|p| p["kind"] == "audit" && p["detail"].as_str().unwrap().contains("audit entry 2")));
}

#[test]
fn demo_builds_a_store_that_verifies() {
    let s = Sandbox::new();
    let out = s.ok(&["demo"]);
    assert_contains(&out, "sluice-demo");
    assert_contains(&out, "quillby_orders:v1");
    assert_contains(&out, "try next:");
    let d = Sandbox {
        dir: tempfile::tempdir().unwrap(),
    };
    std::fs::remove_dir_all(d.path()).unwrap();
    std::fs::rename(s.path().join("sluice-demo"), d.path()).unwrap();
    assert_contains(&d.ok(&["verify"]), "intact");
    // Five intakes, the plan's twenty-four cleaning steps (its hold point records results, not
    // a step), then the outside script's step and the hand edit.
    let plan: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.path().join("q3_cleaning.json")).unwrap())
            .unwrap();
    let applies = plan["steps"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|s| s.get("clean").is_some())
        .count();
    assert_eq!(applies, 24);
    assert_eq!(
        d.json(&["timeline", "--json"]).as_array().unwrap().len(),
        5 + applies + 2
    );
    let reviewed = d.json(&["timeline", "--dataset", "reviewed_orders", "--json"]);
    let kinds: Vec<&str> = reviewed
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["step"]["kind"].as_str().unwrap())
        .collect();
    assert_eq!(kinds, ["command", "hand_edit"], "oldest first");
    assert_eq!(
        d.json(&["about", "quillby_orders", "--json"])["version"]["seq"],
        4
    );
    assert_eq!(
        d.json(&["about", "q3_by_shop", "--json"])["version"]["n_rows"],
        9
    );
    // It ends by answering the two questions: where an amount came from, why a total is what
    // it is.
    assert_contains(&out, "where did this amount come from?");
    assert_contains(&out, "oxwater_orders:v1 line 2, column parts: \"54,34 €\"");
    assert_contains(&out, "why is this total what it is?");
    assert_contains(&out, "(agrees)");
    // A second demo in the same folder goes to a new folder.
    assert_contains(&s.ok(&["demo"]), "sluice-demo");
}

#[test]
fn cat_to_a_file_writes_exact_bytes() {
    let s = Sandbox::with_store();
    let bytes = penguins_csv();
    s.file("p.csv", &bytes);
    s.ok(&["receive", "p.csv", "--as", "penguins"]);
    s.ok(&["retrieve", "penguins", "-o", "copy.csv"]);
    assert_eq!(std::fs::read(s.path().join("copy.csv")).unwrap(), bytes);
}
