//! Erasure orders on the demo's store (the invented Three Rivers Cycle Cooperative): the cells an
//! order reaches, checked against a forward walk written here from the recorded row maps alone
//! (not the engine's walk), and every reached row traced back by `sluice trace` to the raw line
//! the order names.

mod common;

use std::collections::{BTreeMap, BTreeSet};

use common::{assert_contains, Sandbox};
use serde_json::Value;
use sluice::store::Store;

const ORDER: &[&str] = &[
    "erase",
    "quillby_orders:v1",
    "--where",
    "customer = 'Ada Gilford'",
    "--request",
    "request 2026-117 (GDPR Art. 17), filed by the cooperative's data-protection officer",
];

/// Rows of each version reached from raw rows `start` of `raw` (0-based), by row maps only;
/// group summaries reached by their group values, read from the versions' CSV.
fn independent_walk(
    s: &Sandbox,
    raw: &str,
    start: &[u64],
) -> (
    BTreeMap<String, BTreeSet<u64>>,
    BTreeMap<String, BTreeSet<u64>>,
) {
    let store = Store::open(&s.path().join("sluice-store")).expect("open the store");
    let mut steps = store.lineage.steps(None).expect("steps");
    steps.sort_by_key(|st| st.id);
    let mut rows: BTreeMap<i64, BTreeSet<u64>> = BTreeMap::new();
    let mut summaries: BTreeMap<String, BTreeSet<u64>> = BTreeMap::new();
    let mut labels: BTreeMap<i64, String> = BTreeMap::new();
    let raw_v = sluice::refs::resolve(&store.lineage, raw).expect("raw version");
    rows.insert(raw_v.id, start.iter().copied().collect());
    labels.insert(raw_v.id, raw_v.label());
    // Steps in recording order read only versions recorded before them: one pass suffices.
    for st in &steps {
        let inputs = store.lineage.step_input_versions(st.id).expect("inputs");
        for w in store.lineage.step_outputs(st.id).expect("outputs") {
            labels.insert(w.id, w.label());
            for (role, v) in &inputs {
                let Some(reached) = rows.get(&v.id).cloned() else {
                    continue;
                };
                if reached.is_empty() || role == "table" {
                    continue;
                }
                if st.operation.as_deref() == Some("summarize") {
                    let by: Vec<String> = serde_json::from_value(st.params["by"].clone()).unwrap();
                    let input = csv_rows(s, &v.label());
                    let output = csv_rows(s, &w.label());
                    let keys: BTreeSet<Vec<String>> = reached
                        .iter()
                        .map(|&r| by.iter().map(|c| input[r as usize][c].clone()).collect())
                        .collect();
                    let hit: BTreeSet<u64> = output
                        .iter()
                        .enumerate()
                        .filter(|(_, row)| {
                            keys.contains(&by.iter().map(|c| row[c].clone()).collect::<Vec<_>>())
                        })
                        .map(|(i, _)| i as u64)
                        .collect();
                    summaries.entry(w.label()).or_default().extend(&hit);
                    // A summary of a summary: its groups hold the marked rows.
                    rows.entry(w.id).or_default().extend(hit);
                    continue;
                }
                let runs = sluice::provenance::row_runs(&store, &w, v.id).expect("row map");
                let got = rows.entry(w.id).or_default();
                for run in runs {
                    for r in &reached {
                        if *r >= run.in_start && *r < run.in_start + run.len {
                            got.insert(run.out_start + (r - run.in_start));
                        }
                    }
                }
            }
        }
    }
    let erased = rows
        .into_iter()
        .filter(|(id, r)| !r.is_empty() && !summaries.contains_key(&labels[id]))
        .map(|(id, r)| (labels[&id].clone(), r))
        .collect();
    (erased, summaries)
}

/// A version's rows as column -> value maps, read through `retrieve` with the `csv` crate.
fn csv_rows(s: &Sandbox, label: &str) -> Vec<BTreeMap<String, String>> {
    let bytes = s.run(&["retrieve", label]).raw_stdout;
    let mut r = csv::Reader::from_reader(bytes.as_slice());
    let header: Vec<String> = r.headers().unwrap().iter().map(String::from).collect();
    r.records()
        .map(|rec| {
            let rec = rec.unwrap();
            header
                .iter()
                .cloned()
                .zip(rec.iter().map(String::from))
                .collect()
        })
        .collect()
}

fn rows_of(cells: &Value) -> BTreeSet<u64> {
    cells
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["row"].as_u64().unwrap() - 1)
        .collect()
}

#[test]
fn a_dry_run_reaches_every_derived_cell_and_changes_nothing() {
    let s = Sandbox::with_demo();
    let before = s.snapshot();
    let mut args = ORDER.to_vec();
    args.push("--json");
    let survey = s.json(&args);
    assert_eq!(survey["dry_run"], true);
    assert_eq!(s.snapshot(), before, "a dry run records nothing");

    // Ada Gilford's order is data row 3 of the Quillby export (demo generator, seed fixed).
    let raw = csv_rows(&s, "quillby_orders:v1");
    let start: Vec<u64> = raw
        .iter()
        .enumerate()
        .filter(|(_, r)| r["customer"] == "Ada Gilford")
        .map(|(i, _)| i as u64)
        .collect();
    assert!(!start.is_empty());

    let (want_erased, want_marked) = independent_walk(&s, "quillby_orders:v1", &start);
    let mut got_erased = BTreeMap::new();
    let mut got_marked = BTreeMap::new();
    for v in survey["versions"].as_array().unwrap() {
        let label = v["version"].as_str().unwrap().to_string();
        let e = rows_of(&v["erased"]);
        let m = rows_of(&v["kept_unrecomputable"]);
        if !e.is_empty() {
            got_erased.insert(label.clone(), e);
        }
        if !m.is_empty() {
            got_marked.insert(label, m);
        }
    }
    assert_eq!(got_erased, want_erased, "erased rows per version");
    assert_eq!(got_marked, want_marked, "summary rows per version");
    assert!(
        want_erased.contains_key("reviewed_orders:v2"),
        "through the outside command and the hand edit"
    );
    assert!(
        want_marked.contains_key("q3_shop_totals:v1"),
        "through a summary of a summary"
    );

    // Whole rows are named, so every column of every reached row is erased.
    for v in survey["versions"].as_array().unwrap() {
        let label = v["version"].as_str().unwrap();
        let n_cols = csv_rows(&s, label).first().map_or(0, |r| r.len());
        for row in rows_of(&v["erased"]) {
            let n = v["erased"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|c| c["row"].as_u64() == Some(row + 1))
                .count();
            assert_eq!(n, n_cols, "{label} row {}", row + 1);
            // And `trace` takes each of them back to the order's raw line.
            let trail = s.ok(&[
                "trace",
                label,
                "--row",
                &(row + 1).to_string(),
                "--column",
                "customer",
            ]);
            assert_contains(&trail, &format!("quillby_orders:v1 line {}", start[0] + 2));
        }
    }

    // The screen names the order, the count, and the summary cells kept as published.
    let text = s.ok(ORDER);
    assert_contains(&text, "dry run: nothing was recorded and nothing erased");
    assert_contains(&text, "q3_by_shop:v1 row");
    assert_contains(&text, "kept as published");
}

#[test]
fn single_cells_and_columns_follow_renames_and_lookups() {
    let s = Sandbox::with_demo();
    // Oxwater calls its customer column "client"; step 10 renames it to "customer".
    let survey = s.json(&[
        "erase",
        "oxwater_orders:v1",
        "--cell",
        "2:client",
        "--request",
        "request 2026-118",
        "--json",
    ]);
    let versions = survey["versions"].as_array().unwrap();
    let cols: BTreeSet<&str> = versions
        .iter()
        .filter(|v| v["version"].as_str().unwrap().starts_with("all_orders:"))
        .flat_map(|v| v["erased"].as_array().unwrap().iter())
        .map(|c| c["column"].as_str().unwrap())
        .collect();
    assert_eq!(
        cols,
        BTreeSet::from(["customer"]),
        "one cell, under its new name"
    );
    // A customer's name is not aggregated by the summaries: nothing is marked there.
    assert!(versions
        .iter()
        .all(|v| v["kept_unrecomputable"].as_array().unwrap().is_empty()));

    // A technician's name in the looked-up staff list reaches the orders through the lookup.
    let survey = s.json(&[
        "erase",
        "technicians:v1",
        "--column",
        "shop",
        "--request",
        "retention of the staff list ended",
        "--json",
    ]);
    let v8 = survey["versions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["version"] == "all_orders:v8")
        .expect("the lookup's output");
    assert!(!v8["erased"].as_array().unwrap().is_empty());
}

#[test]
fn orders_are_refused_on_derived_versions_and_when_they_name_nothing() {
    let s = Sandbox::with_demo();
    let msg = s.fails(
        2,
        &["erase", "all_orders", "--column", "email", "--request", "r"],
    );
    assert_contains(&msg, "not received");
    let msg = s.fails(
        2,
        &[
            "erase",
            "quillby_orders:v1",
            "--key",
            "customer=Nobody Anywhere",
            "--request",
            "r",
        ],
    );
    assert_contains(&msg, "no cell of quillby_orders:v1");
    s.fails(2, &["erase", "quillby_orders:v1", "--request", "r"]);
}
