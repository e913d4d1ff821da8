//! Parquet and Arrow IPC files in and out, against pyarrow (Apache Arrow's Python library,
//! PyPI, pinned in tests/reference/requirements.txt) as the outside reference: the files
//! tests/reference/make_columnar.py writes with it are read to the values its manifest computes
//! from the Python values written; the files `retrieve --format parquet|arrow` writes are read by
//! it to the same values, with the types the profile implies.

mod common;

use std::path::Path;
use std::process::Command;

use common::{assert_contains, reference_python, Sandbox};
use serde_json::Value;

/// A store beside the files of make_columnar.py, and its manifest.
fn columnar_files() -> (Sandbox, Value) {
    let s = Sandbox::with_store();
    let out = Command::new(reference_python())
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/make_columnar.py"
        ))
        .arg(s.path())
        .output()
        .expect("run make_columnar.py");
    assert!(
        out.status.success(),
        "make_columnar.py failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    (
        s,
        serde_json::from_slice(&out.stdout).expect("a JSON manifest"),
    )
}

/// The rows of a version through `retrieve --format jsonl`, cells in header order.
fn cells(s: &Sandbox, reference: &str, header: &[String]) -> Vec<Vec<String>> {
    s.ok(&["retrieve", reference, "--format", "jsonl"])
        .lines()
        .map(|line| {
            let v: Value = serde_json::from_str(line).expect("a JSON line");
            header
                .iter()
                .map(|h| v[h].as_str().expect("a text cell").to_string())
                .collect()
        })
        .collect()
}

fn strings(v: &Value) -> Vec<String> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_str().expect("a string").to_string())
        .collect()
}

fn expected_rows(manifest: &Value) -> Vec<Vec<String>> {
    manifest["table"]["rows"]
        .as_array()
        .expect("rows")
        .iter()
        .map(strings)
        .collect()
}

/// The conversion record of the ingest step of `dataset`'s first version.
fn conversion(s: &Sandbox, dataset: &str) -> Value {
    let timeline = s.json(&["timeline", "--dataset", dataset, "--json"]);
    timeline[0]["step"]["params"]["convert"].clone()
}

#[test]
fn files_pyarrow_writes_read_to_its_values_with_every_codec() {
    let (s, manifest) = columnar_files();
    let header = strings(&manifest["table"]["header"]);
    let want = expected_rows(&manifest);
    for (i, name) in [
        "till.parquet",
        "till_zstd.parquet",
        "till_gzip.parquet",
        "till_lz4.parquet",
        "till.arrow",
        "till.arrows",
    ]
    .iter()
    .enumerate()
    {
        let dataset = format!("till{i}");
        s.ok(&["receive", name, "--as", &dataset, "--why", "till export"]);
        let got = cells(&s, &dataset, &header);
        // Source: the manifest, computed by make_columnar.py from the Python values pyarrow wrote.
        assert_eq!(got.len(), want.len(), "{name}: row count");
        for (r, (g, w)) in got.iter().zip(&want).enumerate() {
            assert_eq!(g, w, "{name}: data row {}", r + 1);
        }
        // The raw object is the file byte for byte.
        let bytes = std::fs::read(s.path().join(name)).unwrap();
        let conv = conversion(&s, &dataset);
        let raw = conv["raw"]["hash"].as_str().expect("raw hash");
        assert_eq!(raw, blake3::hash(&bytes).to_hex().as_str(), "{name}");
        // Source: the codec pyarrow was asked for, as the file's metadata names it.
        if let Some(codec) = manifest["files"][*name]["codec"].as_str() {
            if name.ends_with(".parquet") {
                let codecs = strings(&conv["codecs"]);
                assert!(
                    codecs.iter().any(|c| c.starts_with(codec)),
                    "{name}: {codecs:?} should name {codec}"
                );
                assert_eq!(
                    conv["groups"].as_array().unwrap().len() as u64,
                    manifest["files"][*name]["row_groups"].as_u64().unwrap(),
                    "{name}: row groups, as pyarrow's metadata counts them"
                );
            }
        }
        // Column types: scale, unit, zone and dictionary encoding as pyarrow's schema says.
        for (t, w) in conv["column_types"]
            .as_array()
            .unwrap()
            .iter()
            .zip(manifest["table"]["types"].as_array().unwrap())
        {
            assert_eq!(t["name"], w["name"]);
            assert_eq!(t["dictionary"], w["dictionary"], "{name}: {}", w["name"]);
            for k in ["scale", "unit", "zone"] {
                let got = t.get(k).cloned().unwrap_or(Value::Null);
                assert_eq!(got, w[k], "{name}: {} {k}", w["name"]);
            }
        }
    }
}

#[test]
fn a_trail_ends_at_the_row_group_and_row() {
    let (s, manifest) = columnar_files();
    s.ok(&[
        "receive",
        "till.parquet",
        "--as",
        "till",
        "--why",
        "till export",
    ]);
    s.ok(&["clean", "till", "trim", "--why", "tidy notes"]);
    // Data row 5 is the second row of the second row group of 3 (pyarrow's row_group_size).
    let trail = s.json(&[
        "trace", "till", "--row", "5", "--column", "amount", "--json",
    ]);
    let text = serde_json::to_string(&trail).unwrap();
    assert_contains(&text, "row group 2, row 2");
    let want = expected_rows(&manifest)[4][3].clone();
    assert_contains(&text, &format!("\"raw_value\":\"{want}\""));
    assert_contains(&text, "Decimal128(10, 2)");
    let screen = s.ok(&["trace", "till", "--row", "5", "--column", "amount"]);
    assert_contains(&screen, "Apache Parquet");
    assert_contains(&screen, "row group 2, row 2");
}

#[test]
fn nested_columns_are_refused_by_name_and_nothing_is_recorded() {
    let (s, _) = columnar_files();
    let before = s.snapshot();
    let err = s.fails(2, &["receive", "nested.parquet", "--as", "parts"]);
    assert_contains(&err, "column \"parts\"");
    assert_contains(&err, "List(");
    assert_eq!(s.snapshot(), before, "a refused file changes nothing");
    s.file("broken.parquet", b"PAR1 this is not a parquet file PAR1");
    let err = s.fails(2, &["receive", "broken.parquet", "--as", "broken"]);
    assert_contains(&err, "cannot be read as Apache Parquet");
}

/// What pyarrow reads from a file: each column's type and every cell as text.
fn pyarrow_reads(path: &Path) -> Value {
    let code = r#"
import sys, json, pyarrow as pa, pyarrow.parquet as pq, pyarrow.feather as feather
p = sys.argv[1]
t = pq.read_table(p) if p.endswith(".parquet") else feather.read_table(p)
def text(v):
    if v is None: return None
    if hasattr(v, "isoformat"): return v.isoformat()
    return str(v)
print(json.dumps({"types": [str(f.type) for f in t.schema],
                  "rows": [[text(v) for v in r.values()] for r in t.to_pylist()]}))
"#;
    let out = Command::new(reference_python())
        .arg("-c")
        .arg(code)
        .arg(path)
        .output()
        .expect("run pyarrow");
    assert!(
        out.status.success(),
        "pyarrow could not read {}:\n{}",
        path.display(),
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("JSON from the reader")
}

#[test]
fn files_sluice_writes_read_in_pyarrow_to_the_same_values_and_types() {
    let s = Sandbox::with_store();
    s.file(
        "repairs.csv",
        "ticket,shop,labour,done_on,parts\n\
         7001,Quillby Cycle Mend,12.5,2026-07-01,3\n\
         7002,Ferrow Spokes,-0.25,2026-07-02,\n\
         7003,Annick Bike Hub,,2026-02-28,12\n\
         7004,\"Quillby, east\",1204.50,,-4\n",
    );
    s.ok(&[
        "receive",
        "repairs.csv",
        "--as",
        "repairs",
        "--why",
        "weekly",
    ]);
    for (format, file) in [("parquet", "out.parquet"), ("arrow", "out.arrow")] {
        s.ok(&["retrieve", "repairs", "--format", format, "-o", file]);
        let read = pyarrow_reads(&s.path().join(file));
        // Types: integer columns as int64, decimals with the largest scale seen, ISO dates as
        // date32, text as string (pyarrow's names for them).
        assert_eq!(
            strings(&read["types"]),
            [
                "int64",
                "string",
                "decimal128(6, 2)",
                "date32[day]",
                "int64"
            ],
            "{format}"
        );
        // Values: Python's str() of the Decimal keeps the scale, so 12.5 reads as 12.50.
        let rows: Vec<Vec<Value>> = read["rows"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| r.as_array().unwrap().clone())
            .collect();
        let want = serde_json::json!([
            ["7001", "Quillby Cycle Mend", "12.50", "2026-07-01", "3"],
            ["7002", "Ferrow Spokes", "-0.25", "2026-07-02", null],
            ["7003", "Annick Bike Hub", null, "2026-02-28", "12"],
            ["7004", "Quillby, east", "1204.50", null, "-4"],
        ]);
        assert_eq!(Value::from(rows), want, "{format}");
        // The same version gives the same bytes.
        s.ok(&["retrieve", "repairs", "--format", format, "-o", "again"]);
        assert_eq!(
            std::fs::read(s.path().join(file)).unwrap(),
            std::fs::read(s.path().join("again")).unwrap(),
            "{format}: written twice"
        );
    }
    // And a store made elsewhere from the same file writes the same bytes.
    let other = Sandbox::with_store();
    other.file(
        "repairs.csv",
        std::fs::read(s.path().join("repairs.csv")).unwrap(),
    );
    other.ok(&["receive", "repairs.csv", "--as", "repairs"]);
    other.ok(&[
        "retrieve",
        "repairs",
        "--format",
        "parquet",
        "-o",
        "out.parquet",
    ]);
    assert_eq!(
        std::fs::read(s.path().join("out.parquet")).unwrap(),
        std::fs::read(other.path().join("out.parquet")).unwrap()
    );
}

#[test]
fn a_parquet_file_round_trips_through_sluice_and_pyarrow() {
    let (s, manifest) = columnar_files();
    s.ok(&["receive", "till.parquet", "--as", "till"]);
    s.ok(&[
        "retrieve",
        "till",
        "--format",
        "parquet",
        "-o",
        "back.parquet",
    ]);
    let read = pyarrow_reads(&s.path().join("back.parquet"));
    let types = strings(&read["types"]);
    // Source: make_columnar.py's table: till_id int64, amount decimal128(10, 2) (whose values
    // need 10 digits), day date32; the rest written as text.
    assert_eq!(types[0], "int64");
    assert_eq!(types[3], "decimal128(10, 2)");
    assert_eq!(types[6], "date32[day]");
    let want = expected_rows(&manifest);
    for (r, row) in read["rows"].as_array().unwrap().iter().enumerate() {
        for (c, v) in row.as_array().unwrap().iter().enumerate() {
            let w = &want[r][c];
            match v.as_str() {
                // A float column is written as an exact decimal of the largest scale seen, so
                // 2.5 reads back as 2.50: the same number.
                Some(t) if types[c].starts_with("decimal") => {
                    assert_eq!(plain(t), plain(w), "row {} column {c}", r + 1)
                }
                Some(t) => assert_eq!(t, w, "row {} column {c}", r + 1),
                None => assert_eq!(w, "", "row {} column {c}: a null is a blank", r + 1),
            }
        }
    }
}

/// A plain decimal without trailing fraction zeros.
fn plain(t: &str) -> String {
    if t.contains('.') {
        t.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        t.to_string()
    }
}
