//! `sluice compare`: the minimal edit script against the worked example of Myers' paper, the diff
//! by key against pandas on generated versions with known edits, golden files of the text
//! form, the errors, the column changes, and the law "diff, then apply the edit script, gives
//! the second version" as a property test, and the diff by key against a plain reference over
//! random revisions as another.

mod common;

use std::path::PathBuf;
use std::process::Command;

use common::*;
use proptest::prelude::*;

fn golden(name: &str, actual: &str) {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/golden")
        .join(name);
    if std::env::var_os("SLUICE_BLESS").is_some() {
        std::fs::write(&path, actual).unwrap();
    }
    let expected = std::fs::read_to_string(&path).unwrap_or_else(|_| {
        panic!(
            "golden file {} (run with SLUICE_BLESS=1 once)",
            path.display()
        )
    });
    if expected != actual {
        panic!(
            "\n{name}: expected:\n{}\n{expected}{}\nactual:\n{}\n{actual}{}\n",
            rule(),
            rule(),
            rule(),
            rule()
        );
    }
}

/// A store holding `first` and `second` as versions 1 and 2 of dataset `t`.
fn two_versions(first: &str, second: &str, key: Option<&str>) -> Sandbox {
    let s = Sandbox::with_store();
    s.file("first.csv", first);
    s.file("second.csv", second);
    let mut args = vec!["receive", "first.csv", "--as", "t"];
    if let Some(k) = key {
        args.extend(["--key", k]);
    }
    s.ok(&args);
    s.ok(&["receive", "second.csv", "--as", "t"]);
    s
}

fn one_column(rows: &str) -> String {
    let mut t = String::from("letter\n");
    for c in rows.chars() {
        t.push(c);
        t.push('\n');
    }
    t
}

// Myers, "An O(ND) Difference Algorithm and Its Variations", Algorithmica 1 (1986), the worked
// example of section 2: A = ABCABBA, B = CBABAC have D = 5 and a longest common subsequence of
// length 4 (e.g. CABA). In a one-column table a changed cell is a whole different row, so no
// removed and added rows are paired and the counts are those of the minimal script itself.
#[test]
fn myers_paper_example_has_d_5_and_4_rows_in_common() {
    let s = two_versions(&one_column("ABCABBA"), &one_column("CBABAC"), None);
    let d = s.json(&["compare", "t:v1", "t:v2", "--json"]);
    assert_eq!(d["paired_by"], "order");
    assert_eq!(d["alignment"]["edit_distance"], 5);
    assert_eq!(d["alignment"]["common_rows"], 4);
    assert_eq!(d["rows"]["unchanged"], 4);
    assert_eq!(d["rows"]["removed"], 3);
    assert_eq!(d["rows"]["added"], 2);
    assert_eq!(d["rows"]["changed"], 0);
    // The unchanged rows form a common subsequence of length 4 of both sequences.
    let removed: Vec<u64> = d["changes"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["kind"] == "removed")
        .map(|c| c["from_row"].as_u64().unwrap())
        .collect();
    let kept: String = "ABCABBA"
        .chars()
        .enumerate()
        .filter(|(i, _)| !removed.contains(&(*i as u64 + 1)))
        .map(|(_, c)| c)
        .collect();
    assert_eq!(kept.len(), 4);
    let mut rest = "CBABAC".chars();
    assert!(
        kept.chars().all(|k| rest.any(|c| c == k)),
        "{kept} is not a subsequence of CBABAC"
    );
}

// The reference: pandas 3.1.1 (PyPI, pinned in tests/reference/requirements.txt), an outer
// merge on the key (tests/reference/diff_pandas.py). Both it and sluice must also agree with
// what the generator (sluice::demo::revision_pair) records that it changed.
#[test]
fn keyed_diff_counts_match_pandas_and_the_generator() {
    let s = Sandbox::with_store();
    let (mut first, mut second) = (Vec::new(), Vec::new());
    let rev = sluice::demo::revision_pair(&mut first, &mut second, 100_000).unwrap();
    let a = s.file("first.csv", &first);
    let b = s.file("second.csv", &second);
    s.ok(&["receive", "first.csv", "--as", "orders"]);
    s.ok(&["receive", "second.csv", "--as", "orders"]);
    let d = s.json(&[
        "compare",
        "orders:v1",
        "orders:v2",
        "--key",
        "order_id",
        "--json",
        "--counts",
    ]);

    let out = Command::new(reference_python())
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/diff_pandas.py"
        ))
        .arg(&a)
        .arg(&b)
        .arg("order_id")
        .output()
        .expect("run the pandas reference");
    assert!(
        out.status.success(),
        "diff_pandas.py failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let pd: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(pd["pandas"], "3.1.1");

    assert!(rev.changed_rows > 500 && rev.removed_rows > 250 && rev.added_rows > 250);
    for (ours, theirs, generator) in [
        (&d["rows"]["changed"], &pd["changed_rows"], rev.changed_rows),
        (&d["rows"]["removed"], &pd["removed"], rev.removed_rows),
        (&d["rows"]["added"], &pd["added"], rev.added_rows),
    ] {
        assert_eq!(ours.as_u64(), Some(generator));
        assert_eq!(theirs.as_u64(), Some(generator));
    }
    let by_column = d["cells"]["by_column"].as_array().unwrap();
    assert_eq!(by_column.len(), rev.changed_cells.len());
    for (entry, (column, n)) in by_column.iter().zip(&rev.changed_cells) {
        assert_eq!(entry["column"], column.as_str());
        assert_eq!(entry["changed"].as_u64(), Some(*n), "column {column}");
        assert_eq!(
            pd["changed_cells"][column].as_u64(),
            Some(*n),
            "pandas, column {column}"
        );
    }
    assert_eq!(d["listed"], 0);
}

const SHOPS_1: &str = "order_id,customer,service,parts_cost\n\
41001,Ada Quenwick ,Brake Tune ,12.50\n\
41002,Bram Oxley,puncture repair,4.00\n\
41003,Cora Fenn,gear indexing,0\n\
41004,Dov Marsh,wheel true,7.25\n";

const SHOPS_2: &str = "order_id,customer,service,parts_cost\n\
41001,Ada Quenwick,Brake Tune,12.50\n\
41003,Cora Fenn,gear indexing,0\n\
41004,Dov Marsh,wheel truing,7.25\n\
41005,Esk Tallow,chain swap,18.00\n";

#[test]
fn keyed_text_output_matches_the_golden_file() {
    let s = two_versions(SHOPS_1, SHOPS_2, Some("order_id"));
    let out = s.ok(&["compare", "t:v1", "t:v2"]);
    // The changed characters in « », white space visible: the removed trailing space.
    assert_contains(&out, "Ada·Quenwick«·»");
    let counts = s.ok(&["compare", "t:v1", "t:v2", "--counts"]);
    assert_contains(&counts, "rows paired by key order_id");
    assert_contains(&counts, "3 kept (2 of them changed), 1 removed, 1 added");
    golden("diff_keyed.txt", &out);
    golden("diff_keyed_stat.txt", &counts);
}

#[test]
fn unkeyed_text_output_matches_the_golden_file() {
    let s = two_versions(SHOPS_1, SHOPS_2, None);
    let out = s.ok(&["compare", "t:v1", "t:v2"]);
    assert_contains(&out, "Brake·Tune«·»");
    assert_contains(&out, "rows paired by order (no key)");
    golden("diff_unkeyed.txt", &out);
}

#[test]
fn limit_caps_the_listing_but_not_the_counts() {
    let s = two_versions(SHOPS_1, SHOPS_2, Some("order_id"));
    let d = s.json(&["compare", "t:v1", "t:v2", "--json", "--limit", "1"]);
    assert_eq!(d["n_changes"], 4);
    assert_eq!(d["listed"], 1);
    assert_eq!(d["rows"]["changed"], 2);
    assert_eq!(d["changes"][0]["key"], serde_json::json!(["41001"]));
    assert_eq!(d["changes"][0]["cells"][0]["old"], "Ada Quenwick ");
    assert_eq!(d["changes"][0]["cells"][0]["new"], "Ada Quenwick");
    let text = s.ok(&["compare", "t:v1", "t:v2", "--limit", "1"]);
    assert_contains(&text, "… and 3 more changes not listed (--limit 1)");
}

#[test]
fn no_escape_codes_when_not_at_a_terminal_or_with_no_color() {
    let s = two_versions(SHOPS_1, SHOPS_2, Some("order_id"));
    // Standard output is a pipe here: no colour, whether NO_COLOR is set or not.
    let with = s.command(&["compare", "t:v1", "t:v2"]).output().unwrap();
    let without = s
        .command(&["compare", "t:v1", "t:v2"])
        .env_remove("NO_COLOR")
        .output()
        .unwrap();
    for out in [&with, &without] {
        assert!(out.status.success());
        assert!(!out.stdout.contains(&0x1b), "escape code in the output");
    }
    assert_eq!(with.stdout, without.stdout);
}

#[test]
fn identical_versions_have_no_differences() {
    let s = Sandbox::with_store();
    s.file("a.csv", SHOPS_1);
    s.ok(&["receive", "a.csv", "--as", "t"]);
    s.ok(&["clean", "t", "rename", "service=job", "--why", "one name"]);
    s.ok(&["clean", "t", "rename", "job=service", "--why", "back again"]);
    let out = s.ok(&["compare", "t:v1", "t:v3"]);
    assert_contains(&out, "no differences");
    let d = s.json(&["compare", "t:v1", "t:v3", "--json", "--key", "order_id"]);
    assert_eq!(d["rows"]["unchanged"], 4);
    assert_eq!(d["n_changes"], 0);
}

#[test]
fn duplicate_keys_are_paired_within_their_group_and_reported() {
    let s = two_versions("id,v\n1,a\n2,b\n1,c\n3,d\n2,e\n", "id,v\n1,a\n", None);
    let d = s.json(&["compare", "t:v1", "t:v2", "--key", "id", "--json"]);
    assert_eq!(d["paired_by"], "key");
    // Unrelated versions: inside a group, the first row with the first row.
    assert_eq!(d["duplicates"]["paired_by"], "order");
    assert_eq!(d["duplicates"]["groups"], 2);
    assert_eq!(d["duplicates"]["rows_from"], 4);
    assert_eq!(d["duplicates"]["first"][0]["key"][0], "1");
    assert_eq!(
        d["duplicates"]["first"][0]["from_rows"],
        serde_json::json!([1, 3])
    );
    assert_eq!(d["rows"]["unchanged"], 1);
    assert_eq!(d["rows"]["removed"], 4);
    assert_eq!(d["rows"]["added"], 0);
    let text = s.ok(&["compare", "t:v1", "t:v2", "--key", "id"]);
    assert_contains(
        &text,
        "2 key values are shared by several rows (4 before, 1 after)",
    );
    assert_contains(&text, "\"1\" rows 1, 3 → 1");
}

#[test]
fn blank_keys_are_listed_with_their_rows() {
    let s = two_versions("id,v\n1,a\n2,b\n", "id,v\n1,a\n,b\n3,c\n,d\n", None);
    let err = s.fails(2, &["compare", "t:v1", "t:v2", "--key", "id"]);
    assert_contains(&err, "t:v2: blank key id in 2 data rows (2, 4)");
}

#[test]
fn a_key_column_missing_in_one_version_is_named() {
    let s = two_versions("id,v\n1,a\n", "code,v\n1,a\n", None);
    let err = s.fails(2, &["compare", "t:v1", "t:v2", "--key", "id"]);
    assert_contains(&err, "key column \"id\" not in t:v2");
    assert_contains(&err, "its columns are: code, v");
}

#[test]
fn unknown_versions_are_refused() {
    let s = two_versions("id\n1\n", "id\n2\n", None);
    let err = s.fails(2, &["compare", "t:v1", "t:v9"]);
    assert_contains(&err, "unknown version \"t:v9\"");
    let err = s.fails(2, &["compare", "nothing", "t:v1"]);
    assert_contains(&err, "unknown version \"nothing\"");
}

#[test]
fn the_declared_key_is_used_without_key_option() {
    let s = two_versions("id,v\n1,a\n2,b\n", "id,v\n2,b\n1,z\n", Some("id"));
    let d = s.json(&["compare", "t:v1", "t:v2", "--json"]);
    assert_eq!(d["paired_by"], "key");
    assert_eq!(d["rows"]["changed"], 1);
    assert_eq!(d["rows"]["unchanged"], 1);
    assert_eq!(d["changes"][0]["from_row"], 1);
    assert_eq!(d["changes"][0]["to_row"], 2);
}

#[test]
fn added_removed_renamed_and_reordered_columns() {
    let first =
        "id,phone,notes,shop\n1,555-01,x,Quillby\n2,555-02,y,Oxwater\n3,555-03,,Fennmarsh\n";
    // phone becomes telephone (same values), notes is removed, grade is added, shop moves
    // before the telephone column, and one shop changes.
    let second =
        "id,shop,telephone,grade\n1,Quillby,555-01,A\n2,Oxwater,555-02,B\n3,Fenmarsh,555-03,C\n";
    for key in [Some("id"), None] {
        let s = two_versions(first, second, key);
        let d = s.json(&["compare", "t:v1", "t:v2", "--json"]);
        let cols = &d["columns"];
        assert_eq!(cols["added"], serde_json::json!(["grade"]), "{key:?}");
        assert_eq!(cols["removed"], serde_json::json!(["notes"]));
        assert_eq!(
            cols["renamed"],
            serde_json::json!([{"from": "phone", "to": "telephone"}])
        );
        assert_eq!(cols["reordered"], true);
        assert_eq!(d["rows"]["changed"], 1);
        assert_eq!(d["rows"]["unchanged"], 2);
        assert_eq!(d["cells"]["changed"], 1);
        let cells = &d["changes"][0]["cells"];
        assert_eq!(cells[0]["column"], "shop");
        assert_eq!(cells[0]["old"], "Fennmarsh");
        let text = s.ok(&["compare", "t:v1", "t:v2"]);
        assert_contains(
            &text,
            "columns: added grade; removed notes; renamed phone now telephone; reordered (id, shop, telephone, grade)",
        );
    }
}

// ---- the law: the edit script applied to the first version gives the second -----------------

fn csv_of(rows: &[Vec<String>]) -> String {
    let mut t = String::from("a,b,c\n");
    for r in rows {
        t.push_str(&r.join(","));
        t.push('\n');
    }
    t
}

/// Applies the pairing to `a`: each row of the second version is a row of the first (with the
/// changed cells replaced) or an added row.
fn apply(d: &sluice::diff::Diff, a: &[Vec<String>]) -> Vec<Vec<String>> {
    let p = &d.pairing;
    let n_b = d.to.n_rows as usize;
    let mut out: Vec<Option<Vec<String>>> = vec![None; n_b];
    for run in &p.runs {
        for k in 0..run.len {
            out[(run.b_start + k) as usize] = Some(a[(run.a_start + k) as usize].clone());
        }
    }
    for c in &p.cells {
        let col = d.to.header.iter().position(|h| *h == c.column).unwrap();
        let row = out[c.b_row as usize].as_mut().unwrap();
        assert_eq!(row[col], c.old);
        row[col] = c.new.clone();
    }
    for &y in &p.added {
        assert!(out[y as usize].is_none());
        out[y as usize] = Some(d.to_rows.get(y).unwrap().texts());
    }
    // Every row of the first version is carried by a run or removed, never both.
    let mut carried = vec![0u32; a.len()];
    for run in &p.runs {
        for k in 0..run.len {
            carried[(run.a_start + k) as usize] += 1;
        }
    }
    for &x in &p.removed {
        carried[x as usize] += 1;
    }
    assert!(carried.iter().all(|&n| n == 1), "{carried:?}");
    out.into_iter()
        .map(|r| r.expect("every row explained"))
        .collect()
}

fn table() -> impl Strategy<Value = Vec<Vec<String>>> {
    // Few distinct values, so that rows repeat and blocks of changes are common.
    let cell = prop::sample::select(vec!["x", "y", "z", "x ", ""]).prop_map(String::from);
    prop::collection::vec(prop::collection::vec(cell, 3), 0..12)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]
    #[test]
    fn applying_the_edit_script_gives_the_second_version(a in table(), b in table()) {
        let dir = tempfile::tempdir().unwrap();
        let agent = sluice::model::Agent::new(PERSON, Some(EMAIL), "option");
        let mut store = sluice::store::Store::init_recorded(dir.path(), &agent).unwrap();
        let mut versions = Vec::new();
        for (name, rows) in [("a.csv", &a), ("b.csv", &b)] {
            let path = dir.path().join(name);
            std::fs::write(&path, csv_of(rows)).unwrap();
            let opts = sluice::intake::IngestOptions {
                dataset: "t".into(), key: None, reason: None, delimiter: Some(b','),
                has_header: true, encoding: None, null_tokens: vec![], agent: agent.clone(),
            };
            match sluice::intake::ingest(&mut store, &path, &opts).unwrap() {
                sluice::intake::IngestOutcome::Recorded { version, .. }
                | sluice::intake::IngestOutcome::Unchanged { version } => versions.push(version),
            }
        }
        let d = sluice::diff::diff_versions(
            &store,
            &versions[0],
            &versions[1],
            &sluice::diff::DiffOptions { key: sluice::diff::KeyChoice::Unkeyed },
        ).unwrap();
        prop_assert_eq!(apply(&d, &a), b.clone());
        if versions[0].id == versions[1].id {
            // Equal tables are one version: its rows pair with themselves through the
            // (empty) recorded lineage, exactly, and nothing differs.
            let by_lineage = matches!(d.matched_by, sluice::diff::MatchedBy::Lineage { .. });
            prop_assert!(by_lineage);
            prop_assert!(d.alignment.is_none());
            prop_assert_eq!(d.n_unchanged(), a.len() as u64);
            return Ok(());
        }
        // Unrelated versions are aligned by order; the counts of the minimal script:
        // D = rows of both minus twice the common ones.
        let by_order = matches!(d.matched_by, sluice::diff::MatchedBy::Order);
        prop_assert!(by_order);
        let al = d.alignment.unwrap();
        prop_assert_eq!(al.edit_distance, (a.len() + b.len()) as u64 - 2 * al.common_rows);
        prop_assert_eq!(
            d.n_unchanged() + d.n_changed() + d.n_removed(),
            a.len() as u64
        );
    }
}

// ---- the diff by key against a plain reference ------------------------------------------------

/// A cell as written to the file: its value, and whether it is quoted even when it need not be
/// (RFC 4180 allows any field to be quoted), so that equal values are sometimes written with
/// different bytes on the two sides.
type Cell = (String, bool);

fn field(c: &Cell) -> String {
    let (v, quote) = c;
    // RFC 4180, section 2: a field holding a comma, a quote or a line break is quoted, with
    // each quote doubled.
    if *quote || v.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", v.replace('"', "\"\""))
    } else {
        v.clone()
    }
}

/// The file of a table `id,b,c`, with LF or CRLF line endings.
fn keyed_csv(rows: &[[Cell; 3]], crlf: bool) -> String {
    let end = if crlf { "\r\n" } else { "\n" };
    let mut t = format!("id,b,c{end}");
    for r in rows {
        t.push_str(&r.iter().map(field).collect::<Vec<_>>().join(","));
        t.push_str(end);
    }
    t
}

fn keyed_cell() -> impl Strategy<Value = Cell> {
    let v = prop::sample::select(vec!["x", "y", "x ", "", "a,b", "say \"hi\"", "two\nlines"]);
    (v.prop_map(String::from), any::<bool>())
}

fn keyed_row() -> impl Strategy<Value = [Cell; 3]> {
    // Few key values, so that keys repeat and go missing on either side; never blank.
    let id = prop::sample::select(vec!["1", "2", "3", "4", "5", "6"]).prop_map(String::from);
    ((id, any::<bool>()), keyed_cell(), keyed_cell()).prop_map(|(i, b, c)| [i, b, c])
}

/// A first table and a second made from it: rows kept (in any order, some of them twice), with
/// cells outside the key changed or written again with other quoting, rows dropped and new
/// rows added (new key values come with the new rows).
fn revision() -> impl Strategy<Value = (Vec<[Cell; 3]>, Vec<[Cell; 3]>)> {
    let edit = (
        any::<prop::sample::Index>(),
        prop::option::of((1..3usize, keyed_cell())),
        any::<bool>(),
    );
    let pick = prop_oneof![
        3 => edit.prop_map(|(i, change, requote)| (Some((i, change, requote)), None)),
        1 => keyed_row().prop_map(|r| (None, Some(r))),
    ];
    (
        prop::collection::vec(keyed_row(), 0..12),
        prop::collection::vec(pick, 0..14),
    )
        .prop_map(|(a, picks)| {
            let mut b = Vec::new();
            for p in picks {
                match p {
                    (Some((i, change, requote)), _) if !a.is_empty() => {
                        let mut row = a[i.index(a.len())].clone();
                        if requote {
                            for c in row.iter_mut() {
                                c.1 = !c.1;
                            }
                        }
                        if let Some((col, cell)) = change {
                            row[col] = cell;
                        }
                        b.push(row);
                    }
                    (_, Some(r)) => b.push(r),
                    _ => {}
                }
            }
            (a, b)
        })
}

/// What a diff by key must find, computed plainly from the values (the rule README.md states:
/// rows with equal key values are the same row; rows sharing a key are paired first with first
/// in row order): (row in A, row in B, changed) for every pair in B's order, the removed and
/// added rows, the changed cells (row in B, column, old, new), and how many key values repeat.
type Expected = (
    Vec<(u64, u64, bool)>,
    Vec<u64>,
    Vec<u64>,
    Vec<(u64, String, String, String)>,
    u64,
);

fn keyed_reference(a: &[[Cell; 3]], b: &[[Cell; 3]]) -> Expected {
    let names = ["id", "b", "c"];
    let mut keys: Vec<&String> = a.iter().chain(b).map(|r| &r[0].0).collect();
    keys.sort();
    keys.dedup();
    let mut pairs = Vec::new();
    let (mut removed, mut added) = (Vec::new(), Vec::new());
    let mut groups = 0;
    for k in keys {
        let ra: Vec<u64> = (0..a.len() as u64)
            .filter(|&i| a[i as usize][0].0 == *k)
            .collect();
        let rb: Vec<u64> = (0..b.len() as u64)
            .filter(|&i| b[i as usize][0].0 == *k)
            .collect();
        if ra.len() > 1 || rb.len() > 1 {
            groups += 1;
        }
        let n = ra.len().min(rb.len());
        pairs.extend(ra[..n].iter().copied().zip(rb[..n].iter().copied()));
        removed.extend_from_slice(&ra[n..]);
        added.extend_from_slice(&rb[n..]);
    }
    pairs.sort_by_key(|p| p.1);
    removed.sort_unstable();
    added.sort_unstable();
    let mut cells = Vec::new();
    let mut out = Vec::new();
    for (x, y) in pairs {
        let (ra, rb) = (&a[x as usize], &b[y as usize]);
        let mut changed = false;
        for c in 0..3 {
            if ra[c].0 != rb[c].0 {
                changed = true;
                cells.push((y, names[c].to_string(), ra[c].0.clone(), rb[c].0.clone()));
            }
        }
        out.push((x, y, changed));
    }
    (out, removed, added, cells, groups)
}

/// The same five things read off a diff.
fn keyed_found(d: &sluice::diff::Diff) -> Expected {
    let mut pairs = Vec::new();
    for run in &d.pairing.runs {
        for k in 0..run.len {
            pairs.push((run.a_start + k, run.b_start + k, run.changed));
        }
    }
    let cells = d
        .pairing
        .cells
        .iter()
        .map(|c| (c.b_row, c.column.clone(), c.old.clone(), c.new.clone()))
        .collect();
    (
        pairs,
        d.pairing.removed.clone(),
        d.pairing.added.clone(),
        cells,
        d.duplicates.as_ref().map_or(0, |g| g.groups),
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]
    #[test]
    fn the_diff_by_key_agrees_with_a_plain_reference(
        (a, b) in revision(),
        crlf in (any::<bool>(), any::<bool>()),
        limit in 0..8usize,
    ) {
        let dir = tempfile::tempdir().unwrap();
        let agent = sluice::model::Agent::new(PERSON, Some(EMAIL), "option");
        let mut store = sluice::store::Store::init_recorded(dir.path(), &agent).unwrap();
        let mut labels = Vec::new();
        for (name, rows, crlf) in [("a.csv", &a, crlf.0), ("b.csv", &b, crlf.1)] {
            let path = dir.path().join(name);
            std::fs::write(&path, keyed_csv(rows, crlf)).unwrap();
            let opts = sluice::intake::IngestOptions {
                dataset: "t".into(), key: None, reason: None, delimiter: Some(b','),
                has_header: true, encoding: None, null_tokens: vec![], agent: agent.clone(),
            };
            match sluice::intake::ingest(&mut store, &path, &opts).unwrap() {
                sluice::intake::IngestOutcome::Recorded { version, .. }
                | sluice::intake::IngestOutcome::Unchanged { version } => {
                    labels.push(version.label())
                }
            }
        }
        let (first, second) = (labels[0].as_str(), labels[1].as_str());
        let expected = keyed_reference(&a, &b);
        let opts = sluice::diff::DiffOptions {
            key: sluice::diff::KeyChoice::Columns(vec!["id".into()]),
        };
        // Everything, as lineage inferred for outside work keeps it.
        let all = sluice::diff::diff(&store, first, second, &opts).unwrap();
        prop_assert_eq!(keyed_found(&all), expected.clone());
        // The listing `compare` makes: the same counts, and the first `limit` changes (changed
        // and added rows in B's order, then removed rows) with their cells.
        let listed = sluice::diff::diff_listed(&store, first, second, &opts, limit).unwrap();
        let (pairs, removed, added, cells, groups) = expected;
        let (l_pairs, l_removed, l_added, _, l_groups) = keyed_found(&listed);
        prop_assert_eq!(&l_pairs, &pairs);
        prop_assert_eq!(&l_removed, &removed);
        prop_assert_eq!(&l_added, &added);
        prop_assert_eq!(l_groups, groups);
        let n_changed = pairs.iter().filter(|p| p.2).count();
        prop_assert_eq!(listed.n_changes as usize, n_changed + removed.len() + added.len());
        prop_assert_eq!(listed.n_cells as usize, cells.len());
        let mut order: Vec<(u64, bool)> = pairs
            .iter()
            .filter(|p| p.2)
            .map(|p| (p.1, true))
            .chain(added.iter().map(|&y| (y, false)))
            .collect();
        order.sort_unstable();
        let want: Vec<(Option<u64>, Option<u64>)> = order
            .iter()
            .map(|&(y, changed)| {
                let x = changed.then(|| pairs.iter().find(|p| p.1 == y).map(|p| p.0)).flatten();
                (x, Some(y))
            })
            .chain(removed.iter().map(|&x| (Some(x), None)))
            .take(limit)
            .collect();
        let got: Vec<(Option<u64>, Option<u64>)> =
            listed.changes.iter().map(|c| (c.a_row, c.b_row)).collect();
        prop_assert_eq!(got, want);
        let listed_cells: Vec<(u64, String, String, String)> = listed
            .pairing
            .cells
            .iter()
            .map(|c| (c.b_row, c.column.clone(), c.old.clone(), c.new.clone()))
            .collect();
        let want_cells: Vec<(u64, String, String, String)> = cells
            .iter()
            .filter(|c| listed.changes.iter().any(|l| l.b_row == Some(c.0) && l.a_row.is_some()))
            .cloned()
            .collect();
        prop_assert_eq!(listed_cells, want_cells);
    }
}
