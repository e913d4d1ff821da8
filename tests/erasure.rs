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

// ---- carrying an order out ---------------------------------------------------------------

/// Rosalind Yarlstow is one customer of the demo's Quillby export (demo generator, seed
/// fixed): one order, her name and address nowhere else.
const CARRY: &[&str] = &[
    "erase",
    "quillby_orders:v1",
    "--where",
    "email = 'rosalind.yarlstow@example.org'",
    "--request",
    "request 2026-121 (GDPR Art. 17), filed by the cooperative's data-protection officer",
];

/// What is searched for, lower-cased: her name and her address (another customer shares her
/// surname, so the surname alone is not hers).
const NEEDLES: &[&str] = &["rosalind yarlstow", "rosalind.yarlstow@example.org"];

/// Every place under `dir` where a needle occurs, in every encoding the store uses: the
/// files' own bytes (UTF-8 text in the database, its write-ahead log and README; segment
/// files), every Zstandard frame found in any file decoded (RFC 8878: a frame starts with the
/// magic number 0xFD2FB528, little-endian), and each needle as UTF-16LE too. The search is
/// ASCII-case-insensitive and does not use sluice's own readers.
fn find_everywhere(dir: &std::path::Path) -> Vec<String> {
    find_these_everywhere(dir, NEEDLES)
}

/// [`find_everywhere`] for other needles (lower-case).
fn find_these_everywhere(dir: &std::path::Path, these: &[&str]) -> Vec<String> {
    let mut needles: Vec<(String, Vec<u8>)> = Vec::new();
    for n in these {
        needles.push((n.to_string(), n.as_bytes().to_vec()));
        let utf16: Vec<u8> = n.encode_utf16().flat_map(|u| u.to_le_bytes()).collect();
        needles.push((format!("{n} (UTF-16LE)"), utf16));
    }
    search_files(dir, &needles, true)
}

/// Every place under `dir` where one of `needles` occurs in a file's bytes or in a Zstandard
/// frame decoded from it; `fold_case` compares ASCII-case-insensitively (needles lower-case).
fn search_files(
    dir: &std::path::Path,
    needles: &[(String, Vec<u8>)],
    fold_case: bool,
) -> Vec<String> {
    let lower = |b: &[u8]| -> Vec<u8> {
        if fold_case {
            b.to_ascii_lowercase()
        } else {
            b.to_vec()
        }
    };
    let hit = |hay: &[u8], n: &[u8]| hay.windows(n.len()).any(|w| w == n);
    let mut found = Vec::new();
    let mut todo = vec![dir.to_path_buf()];
    while let Some(d) = todo.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                todo.push(p);
                continue;
            }
            let bytes = std::fs::read(&p).unwrap();
            let low = lower(&bytes);
            for (name, n) in needles {
                if hit(&low, n) {
                    found.push(format!("{name} in {}", p.display()));
                }
            }
            let magic = [0x28u8, 0xB5, 0x2F, 0xFD];
            for at in 0..bytes.len().saturating_sub(4) {
                if bytes[at..at + 4] != magic {
                    continue;
                }
                let Ok(dec) = zstd::stream::read::Decoder::with_buffer(&bytes[at..]) else {
                    continue;
                };
                let mut dec = dec.single_frame();
                let mut out = Vec::new();
                if std::io::Read::read_to_end(&mut dec, &mut out).is_err() && out.is_empty() {
                    continue;
                }
                let low = lower(&out);
                for (name, n) in needles {
                    if hit(&low, n) {
                        found.push(format!(
                            "{name} in the frame at byte {at} of {}",
                            p.display()
                        ));
                    }
                }
            }
        }
    }
    found
}

/// `value` validated against `schema/output/NAME.schema.json` with the `jsonschema` crate.
fn assert_schema(name: &str, value: &Value) {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("schema/output")
        .join(format!("{name}.schema.json"));
    let schema: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let v = jsonschema::draft202012::new(&schema).unwrap();
    let errors: Vec<String> = v.iter_errors(value).map(|e| e.to_string()).collect();
    assert!(errors.is_empty(), "{name}: {errors:?}");
}

#[test]
fn carrying_out_an_order_erases_one_person_everywhere_and_keeps_the_proof_of_the_rest() {
    let s = Sandbox::with_demo();
    let store_dir = s.path().join("sluice-store");

    // Before: a sign-off (OpenSSH's ssh-keygen makes the key) of a version holding her row,
    // and a report of the summary her order was counted in.
    sign_off(&s, "reviewed_orders:v2");
    s.ok(&["report", "q3_by_shop", "-o", "q3-report.md"]);
    let reviewed_hash = s.json(&["about", "reviewed_orders:v2", "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string();

    // The search can fail: before the erasure it finds her in segments (decompressed) only.
    let before = find_everywhere(&store_dir);
    assert!(
        before.iter().any(|f| f.contains("frame at byte")),
        "the search must find her before: {before:?}"
    );

    // Which raw row is hers, and what an independent walk of the row maps reaches from it.
    let raw = csv_rows(&s, "quillby_orders:v1");
    let start: Vec<u64> = raw
        .iter()
        .enumerate()
        .filter(|(_, r)| r["email"] == "rosalind.yarlstow@example.org")
        .map(|(i, _)| i as u64)
        .collect();
    assert_eq!(start.len(), 1);
    let (want_erased, want_marked) = independent_walk(&s, "quillby_orders:v1", &start);
    let widths: BTreeMap<String, usize> = want_erased
        .keys()
        .map(|l| (l.clone(), csv_rows(&s, l)[0].len()))
        .collect();

    // A dry run changes nothing; the confirmation option carries the order out.
    let snapshot = s.snapshot();
    s.ok(CARRY);
    assert_eq!(s.snapshot(), snapshot);
    let mut args = CARRY.to_vec();
    args.extend(["--carry-out", "--json"]);
    let done = s.json(&args);
    assert_eq!(done["dry_run"], false);
    let carried = &done["carried_out"];
    assert_eq!(carried["order"], 1);
    assert_schema("erase", &done);

    // Every derived cell found: each version the independent walk reaches has her whole row
    // erased, and the summaries are kept, marked.
    let by_label: BTreeMap<String, &Value> = carried["versions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| (v["version"].as_str().unwrap().to_string(), v))
        .collect();
    for (label, rows) in &want_erased {
        let v = by_label
            .get(label)
            .unwrap_or_else(|| panic!("{label} not erased"));
        assert_eq!(
            v["cells_erased"].as_u64().unwrap(),
            (rows.len() * widths[label]) as u64,
            "{label}"
        );
    }
    for label in want_marked.keys() {
        let v = by_label
            .get(label)
            .unwrap_or_else(|| panic!("{label} not marked"));
        assert!(
            v["cells_kept_unrecomputable"].as_u64().unwrap() > 0,
            "{label}"
        );
    }

    // The bytes are gone from every file under the store.
    let after = find_everywhere(&store_dir);
    assert!(after.is_empty(), "still in the store: {after:?}");

    // verify is clean and names the order; the sign-off made before still verifies.
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    assert_schema("verify", &report);
    assert_eq!(report["erasure_orders"][0]["order"], 1);
    assert_eq!(
        report["erasure_orders"][0]["versions_proved"]
            .as_u64()
            .unwrap(),
        by_label.len() as u64
    );
    assert_eq!(report["endorsements_checked"], 2);
    let text = s.ok(&["verify", "--endorsement", "approved.endorsement"]);
    assert_contains(&text, "erasure order 1 (request 2026-121");
    // The version keeps its name: by hash and by NAME:vN it resolves, one row shorter in
    // content but not in shape.
    let by_hash = s.ok(&["retrieve", &format!("blake3:{reviewed_hash}")]);
    assert!(!by_hash.to_lowercase().contains("rosalind yarlstow"));
    assert_eq!(
        by_hash.lines().count(),
        s.ok(&["retrieve", "reviewed_orders:v2"]).lines().count()
    );
    s.ok(&["identify", "q3-report.md"]);
    // The raw export, outside the store, is named as still holding what the order erased.
    let found = s.json(&["identify", "exports/quillby_2026q3.csv", "--json"]);
    assert_schema("identify", &found);
    assert_eq!(found["erasures"][0]["version"], "quillby_orders:v1");
    assert_eq!(found["erasures"][0]["order"], 1);
    assert_eq!(found["erasures"][0]["cells_erased"], 10);
    assert_contains(
        &s.ok(&["identify", "exports/quillby_2026q3.csv"]),
        "this file still holds what the order erased from the store",
    );

    // Reproducing and re-running say which steps cannot be reproduced past the order, and why.
    let msg = s.fails(1, &["reproduce", "q3_by_shop"]);
    assert_contains(&msg, "cannot be reproduced past an erasure");
    assert_contains(
        &msg,
        "step 1: the quillby_orders:v1 it received lost 10 cells under erasure order 1",
    );
    let msg = s.fails(
        1,
        &[
            "rerun",
            "q3_by_shop",
            "--with",
            "quillby_orders=exports/quillby_2026q3.csv",
        ],
    );
    assert_contains(&msg, "whose cells erasure order 1 erased");
    // The report of a version with erased data says where and under which order.
    s.ok(&["report", "reviewed_orders:v2", "-o", "after.md"]);
    let md = std::fs::read_to_string(s.path().join("after.md")).unwrap();
    assert_contains(&md, "erasure order 1");
    assert!(!md.to_lowercase().contains("rosalind yarlstow"));

    // Every reader gets the erased forms, checked against their own names: a comparison of two
    // reached versions and a lookup in one (both refused as damaged objects before this was
    // fixed). The trail of an erased cell, and the explanation of a summary cell kept as
    // published, name the order instead of showing an empty value as the data's.
    let compared = s.ok(&["compare", "quillby_orders:v1", "quillby_orders:v2"]);
    for needle in NEEDLES {
        assert!(!compared.to_lowercase().contains(needle), "{compared}");
    }
    s.ok(&[
        "clean",
        "q3_by_shop",
        "lookup",
        "--table",
        "all_orders:v12",
        "--on",
        "shop",
        "--table-on",
        "order_id",
        "--take",
        "email",
        "--why",
        "a contact per shop",
        "--as",
        "shop_contacts",
    ]);
    let (label, rows) = want_erased
        .iter()
        .find(|(l, _)| l.starts_with("quillby_orders:v2"))
        .expect("her row in quillby_orders:v2");
    let row = (rows.iter().next().unwrap() + 1).to_string();
    let trail = s.json(&["trace", label, "--row", &row, "--column", "email", "--json"]);
    assert_schema("trace", &trail);
    assert_eq!(trail["value"], "");
    assert_eq!(trail["erased"]["what"], "erased");
    assert_eq!(trail["erased"]["order"], 1);
    assert_eq!(trail["end"]["erased"]["what"], "erased");
    let text = s.ok(&["trace", label, "--row", &row, "--column", "email"]);
    assert_contains(&text, "erased by erasure order 1 (request 2026-121");
    let (summary, rows) = want_marked
        .iter()
        .next()
        .expect("a summary kept as published");
    let column = csv_rows(&s, summary)[0]
        .keys()
        .find(|c| c.starts_with("sum_"))
        .expect("a sum column")
        .clone();
    let row = (rows.iter().next().unwrap() + 1).to_string();
    let why = s.json(&[
        "explain", summary, "--row", &row, "--column", &column, "--json",
    ]);
    assert_schema("explain", &why);
    assert_eq!(why["agrees"], false, "{why:#}");
    assert_eq!(why["kept_as_published"]["what"], "kept_as_published");
    assert_eq!(why["kept_as_published"]["order"], 1);
    let text = s.ok(&["explain", summary, "--row", &row, "--column", &column]);
    assert_contains(&text, "kept as published under erasure order 1");
    assert!(!text.contains("DIFFERS"), "{text}");
    // A step whose input lost cells cannot be withdrawn (the table it would restore exists
    // only as its erased form); the store is left as it was.
    let snapshot = s.snapshot();
    let msg = s.fails(
        1,
        &["withdraw", "all_orders:v5", "--why", "the drop was wrong"],
    );
    assert_contains(&msg, "lost cells under erasure order 1");
    assert_eq!(s.snapshot(), snapshot);

    // A reached version's erased form is the only copy of its other cells: it stays stored.
    let msg = s.fails(2, &["evict", "quillby_orders:v2"]);
    assert_contains(&msg, "erasure order 1 reached it");
    s.ok(&["evict", "--all"]);
    let about = s.json(&["about", "quillby_orders:v2", "--json"]);
    assert_schema("about", &about);
    assert_eq!(about["erasures"][0]["order"], 1, "{about:#}");
    assert_eq!(about["erasures"][0]["cells_erased"], 10, "{about:#}");
    let text = s.ok(&["about", "quillby_orders:v2"]);
    assert_contains(&text, "storage      its erased form, stored");
    assert_contains(
        &text,
        "erased       10 cells under erasure order 1 (request 2026-121",
    );
    assert!(!text.contains("recomputable"), "{text}");
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    // verify counts each version as `about` calls it: a reached version (its erased form) as
    // stored, whatever its recorded storage.
    let (mut recomputable, mut reached_recomputable) = (0u64, 0);
    for entry in s.json(&["timeline", "--json"]).as_array().unwrap() {
        for out in entry["produced"].as_array().into_iter().flatten() {
            let label = format!("{}:v{}", out["dataset"].as_str().unwrap(), out["seq"]);
            let about = s.json(&["about", &label, "--json"]);
            let reached = about["erasures"].as_array().is_some_and(|e| !e.is_empty());
            if about["storage"] == "recomputable" {
                if reached {
                    reached_recomputable += 1;
                } else {
                    recomputable += 1;
                }
            }
        }
    }
    assert!(reached_recomputable > 0, "the case this checks");
    assert_eq!(report["versions_recomputable"], recomputable, "{report:#}");

    // A guessed value is not confirmable: no salt the store still holds, with her name or
    // address, gives any leaf the store keeps for an erased cell.
    let store = Store::open(&store_dir).unwrap();
    let guesses: [&[u8]; 4] = [
        b"Rosalind Yarlstow",
        b"ROSALIND YARLSTOW",
        b"rosalind.yarlstow@example.org",
        b"Rosalind.Yarlstow@example.org",
    ];
    for e in store.lineage.erased_versions().unwrap() {
        let v = store.lineage.version_by_id(e.version_id).unwrap().unwrap();
        let salts = sluice::commitment::Salts::from_bytes(&e.salts).unwrap();
        for (i, c) in e.kept.chunks_exact(40).enumerate() {
            let cell = u64::from_le_bytes(c[..8].try_into().unwrap());
            assert_eq!(salts.salt(cell), None, "{} erased cell {i}", v.label());
        }
        no_salt_confirms_a_guess(&v, &salts, &e.kept, &guesses);
    }

    // A remaining cell changed in an erased version's stored form is detected.
    tampered_remaining_cell_is_caught(&s, store, &store_dir, POINT_ERASED_FORM_AT);
}

/// A second person of the same export, erased by a second order.
const SECOND_ORDER: &[&str] = &[
    "erase",
    "quillby_orders:v1",
    "--where",
    "email = 'elska.halley@example.org'",
    "--request",
    "request 2026-133 (GDPR Art. 17), filed by the cooperative's data-protection officer",
];
const SECOND: &[&str] = &["elska halley", "elska.halley@example.org"];

/// Admits a signatory (a key made by OpenSSH's ssh-keygen) and signs `version` off.
/// No salt `salts` still holds for a cell of `v`, with any of `guesses`, gives one of the leaves
/// kept for the erased cells (`kept`: 8 bytes of cell number and the 32-byte leaf, each).
fn no_salt_confirms_a_guess(
    v: &sluice::model::Version,
    salts: &sluice::commitment::Salts,
    kept: &[u8],
    guesses: &[&[u8]],
) {
    let kept: BTreeSet<[u8; 32]> = kept
        .chunks_exact(40)
        .map(|c| c[8..].try_into().unwrap())
        .collect();
    for cell in 0..v.n_rows * v.header.len() as u64 {
        let Some(salt) = salts.salt(cell) else {
            continue;
        };
        for g in guesses {
            assert!(
                !kept.contains(&sluice::commitment::leaf(&salt, g)),
                "{}: a guess confirmed at cell {cell}",
                v.label()
            );
        }
    }
}

/// Points the erased form of `quillby_orders:v1` at a copy of its bytes with one remaining
/// cell changed ("Zelda Gilmore" to "Zelda Gilmorf"), by `repoint` (parameters: the copy's
/// hash, the version's id), and holds `verify` to naming the commitment that no longer holds.
fn tampered_remaining_cell_is_caught(
    s: &Sandbox,
    store: Store,
    store_dir: &std::path::Path,
    repoint: &str,
) {
    let raw_v = sluice::refs::resolve(&store.lineage, "quillby_orders:v1").unwrap();
    let own: sluice::hash::Hash = raw_v.hash.parse().unwrap();
    let text = String::from_utf8(store.objects.read_all(&own).unwrap()).unwrap();
    let tampered = text.replacen("Zelda Gilmore", "Zelda Gilmorf", 1);
    assert_ne!(tampered, text);
    let mut w = store.objects.writer().unwrap();
    w.write(tampered.as_bytes()).unwrap();
    let (h, n) = w.finish().unwrap();
    drop(store);
    let db = rusqlite::Connection::open(store_dir.join("lineage.db")).unwrap();
    db.execute(
        "INSERT INTO objects (hash, n_bytes, kind, created_at) VALUES (?1, ?2, 'table', '2026-12-03T00:00:00Z')",
        rusqlite::params![h.hex(), n as i64],
    )
    .unwrap();
    db.execute(repoint, rusqlite::params![h.hex(), raw_v.id])
        .unwrap();
    drop(db);
    let report = s.run(&["verify", "--json"]);
    assert_eq!(report.code, 1);
    let report: Value = serde_json::from_str(&report.stdout).unwrap();
    assert!(
        report["problems"]
            .as_array()
            .unwrap()
            .iter()
            .any(|p| p["kind"] == "erasure"
                && p["subject"] == "quillby_orders:v1"
                && p["detail"].as_str().unwrap().contains("commitment")),
        "{report:#}"
    );
}

const POINT_ERASED_FORM_AT: &str =
    "UPDATE erased_versions SET stored_hash = ?1 WHERE version_id = ?2";
const POINT_LATEST_ERASED_FORM_AT: &str =
    "UPDATE erased_versions SET stored_hash = ?1 WHERE version_id = ?2 AND order_id = 2";

/// Ada Moss admitted as a signatory with a key ssh-keygen makes, and her approval of
/// `version` written to `approved.endorsement`.
fn sign_off(s: &Sandbox, version: &str) {
    let key = s.path().join("ada");
    let st = std::process::Command::new("ssh-keygen")
        .args(["-q", "-t", "ed25519", "-N", "", "-C", "ada", "-f"])
        .arg(&key)
        .status()
        .expect("ssh-keygen runs (Debian: apt-get install openssh-client; tests/run installs it)");
    assert!(st.success());
    s.ok(&[
        "signatories",
        "--admit",
        "ada.pub",
        "--name",
        "Ada Moss",
        "--signing-key",
        "ada",
    ]);
    s.ok(&[
        "endorse",
        version,
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
        "-o",
        "approved.endorsement",
    ]);
}

#[test]
fn a_second_order_on_versions_an_earlier_one_reached_erases_a_second_person_and_both_are_proved() {
    let s = Sandbox::with_demo();
    let store_dir = s.path().join("sluice-store");
    sign_off(&s, "reviewed_orders:v2");

    // Elska Halley (one order, her name and address nowhere else in the export; demo
    // generator, seed fixed) and what an independent walk of the row maps reaches from her row.
    let raw = csv_rows(&s, "quillby_orders:v1");
    let start: Vec<u64> = raw
        .iter()
        .enumerate()
        .filter(|(_, r)| r["email"] == "elska.halley@example.org")
        .map(|(i, _)| i as u64)
        .collect();
    assert_eq!(start.len(), 1);
    let rosalind: Vec<u64> = raw
        .iter()
        .enumerate()
        .filter(|(_, r)| r["email"] == "rosalind.yarlstow@example.org")
        .map(|(i, _)| i as u64)
        .collect();
    let (want_erased, want_marked) = independent_walk(&s, "quillby_orders:v1", &start);
    let widths: BTreeMap<String, usize> = want_erased
        .keys()
        .map(|l| (l.clone(), csv_rows(&s, l)[0].len()))
        .collect();
    assert!(!find_these_everywhere(&store_dir, SECOND).is_empty());

    // The first order: Rosalind Yarlstow.
    let mut args = CARRY.to_vec();
    args.extend(["--carry-out", "--json"]);
    let first = s.json(&args);
    assert_eq!(first["carried_out"]["order"], 1);

    // A dry run lists only cells not erased already: her row's address is not listed again,
    // and an order naming only her erased cell names nothing new.
    let survey = s.json(&[
        "erase",
        "quillby_orders:v1",
        "--column",
        "email",
        "--request",
        "a look at what a column order would reach",
        "--json",
    ]);
    let raw_entry = &survey["versions"][0];
    assert_eq!(raw_entry["version"], "quillby_orders:v1");
    let listed = rows_of(&raw_entry["erased"]);
    assert_eq!(listed.len(), raw.len() - rosalind.len());
    assert!(rosalind.iter().all(|r| !listed.contains(r)));
    let cell = format!("{}:email", rosalind[0] + 1);
    let again = s.run(&[
        "erase",
        "quillby_orders:v1",
        "--cell",
        &cell,
        "--request",
        "the same cell again",
    ]);
    assert_ne!(again.code, 0);
    assert_contains(&again.stderr, "erased already by an earlier erasure order");

    // The second order: Elska Halley, on versions the first reached.
    let mut args = SECOND_ORDER.to_vec();
    args.extend(["--carry-out", "--json"]);
    let second = s.json(&args);
    assert_schema("erase", &second);
    let carried = &second["carried_out"];
    assert_eq!(carried["order"], 2);
    let labels = |j: &Value| -> BTreeMap<String, Value> {
        j["carried_out"]["versions"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| (v["version"].as_str().unwrap().to_string(), v.clone()))
            .collect()
    };
    let (by_first, by_second) = (labels(&first), labels(&second));
    let both: Vec<&String> = by_second
        .keys()
        .filter(|l| by_first.contains_key(*l))
        .collect();
    assert!(both.len() > 3, "the orders share versions: {both:?}");
    for (label, rows) in &want_erased {
        let v = by_second
            .get(label)
            .unwrap_or_else(|| panic!("{label} not erased"));
        assert_eq!(
            v["cells_erased"].as_u64().unwrap(),
            (rows.len() * widths[label]) as u64,
            "{label}"
        );
    }
    for label in want_marked.keys() {
        let marked = |m: &BTreeMap<String, Value>| {
            m.get(label)
                .is_some_and(|v| v["cells_kept_unrecomputable"].as_u64().unwrap() > 0)
        };
        assert!(marked(&by_second) || marked(&by_first), "{label}");
    }

    // Both people's bytes are gone from every file under the store.
    let mut needles = NEEDLES.to_vec();
    needles.extend(SECOND);
    let found = find_these_everywhere(&store_dir, &needles);
    assert!(found.is_empty(), "still in the store: {found:?}");

    // verify proves both orders and names them; the sign-off made before still verifies.
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    assert_schema("verify", &report);
    let orders = report["erasure_orders"].as_array().unwrap();
    assert_eq!(orders.len(), 2);
    assert_eq!(orders[0]["versions_proved"], by_first.len() as u64);
    assert_eq!(orders[1]["versions_proved"], by_second.len() as u64);
    let text = s.ok(&["verify", "--endorsement", "approved.endorsement"]);
    assert_contains(&text, "erasure order 1 (request 2026-121");
    assert_contains(&text, "erasure order 2 (request 2026-133");
    // The report of a version both reached names both orders.
    s.ok(&["report", both[both.len() - 1], "-o", "after.md"]);
    let md = std::fs::read_to_string(s.path().join("after.md")).unwrap();
    assert_contains(&md, "erasure order 1");
    assert_contains(&md, "erasure order 2");
    assert!(!md.to_lowercase().contains("elska halley"));
    // Reproducing names both orders and the cells they took between them.
    let msg = s.fails(1, &["reproduce", "q3_by_shop"]);
    assert_contains(
        &msg,
        "step 1: the quillby_orders:v1 it received lost 20 cells under erasure orders 1, 2",
    );

    // The earlier order's salts are gone: no salt the store holds gives a leaf it keeps
    // for either person's cells from a right guess.
    let store = Store::open(&store_dir).unwrap();
    let guesses: [&[u8]; 4] = [
        b"Elska Halley",
        b"elska.halley@example.org",
        b"Rosalind Yarlstow",
        b"rosalind.yarlstow@example.org",
    ];
    for e in store.lineage.erased_versions().unwrap() {
        let v = store.lineage.version_by_id(e.version_id).unwrap().unwrap();
        let Some(salts) = sluice::commitment::Salts::from_bytes(&e.salts) else {
            panic!("{}: malformed salts", v.label());
        };
        if by_second.contains_key(&v.label()) && e.order_id == 1 {
            assert!(e.salts.is_empty(), "{}: order 1 keeps its salts", v.label());
        }
        no_salt_confirms_a_guess(&v, &salts, &e.kept, &guesses);
    }

    // A remaining cell changed in the stored form of a version both orders reached is seen.
    tampered_remaining_cell_is_caught(&s, store, &store_dir, POINT_LATEST_ERASED_FORM_AT);
}

/// `sluice ARGS` in folder `dir`, stopped at I/O point `n` of its object writes when given
/// (`SLUICE_TEST_IO_POINT=stop:N`, read by debug builds: the process ends there at once, as
/// if killed; see tests/crash.rs). Returns whether it exited 0.
fn sluice_in(dir: &std::path::Path, args: &[&str], stop_at: Option<u64>) -> bool {
    let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_sluice"));
    c.args(args)
        .current_dir(dir)
        .env("SLUICE_PERSON", common::PERSON)
        .env("SLUICE_EMAIL", common::EMAIL)
        .env_remove("SLUICE_STORE")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null());
    if let Some(n) = stop_at {
        c.env("SLUICE_TEST_IO_POINT", format!("stop:{n}"));
    }
    c.status().unwrap().success()
}

#[test]
fn an_erasure_killed_at_any_io_point_leaves_the_store_as_it_was_or_is_finished_on_the_next_open() {
    let base = Sandbox::with_demo();
    let mut args = CARRY.to_vec();
    args.push("--carry-out");
    stop_at_io_points(&base, &args, NEEDLES, 0);
}

#[test]
fn a_second_order_killed_at_any_io_point_leaves_the_store_as_it_was_or_is_finished_on_the_next_open(
) {
    let base = Sandbox::with_demo();
    let mut first = CARRY.to_vec();
    first.push("--carry-out");
    base.ok(&first);
    let mut args = SECOND_ORDER.to_vec();
    args.push("--carry-out");
    stop_at_io_points(&base, &args, SECOND, 1);
}

/// Runs `args` (an erasure carried out) on copies of `base` stopped at I/O points of its
/// object writes (a spread of them, and the last ones, those of the removal after the
/// transaction): each time the next command finds the store intact, and either no new order
/// is recorded and `needles` are still in the store, or it is and they are nowhere.
fn stop_at_io_points(base: &Sandbox, args: &[&str], needles: &[&str], orders_before: usize) {
    // The number of I/O points of an unstopped erasure: the first point a run passes.
    let passes = |n: u64| {
        let dir = tempfile::tempdir().unwrap();
        common::copy_dir(base.path(), dir.path());
        sluice_in(dir.path(), args, Some(n))
    };
    let mut hi = 1;
    while !passes(hi) {
        hi *= 2;
    }
    let mut lo = hi / 2;
    while lo + 1 < hi {
        let mid = (lo + hi) / 2;
        if passes(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    let n_points = hi - 1;
    assert!(n_points > 20, "{n_points} I/O points");
    // The last points are those of removing the old bytes after the order's transaction;
    // the others, a spread of them, write the erased forms before it.
    let mut points: BTreeSet<u64> = (n_points.saturating_sub(15).max(1)..=n_points).collect();
    points.extend([1, 2, n_points / 4, n_points / 2, 3 * n_points / 4]);
    let (mut as_it_was, mut finished) = (0, 0);
    for n in points {
        let dir = tempfile::tempdir().unwrap();
        common::copy_dir(base.path(), dir.path());
        assert!(
            !sluice_in(dir.path(), args, Some(n)),
            "stopped at point {n}"
        );
        // The next command that opens the store finds it intact, whichever way it went.
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_sluice"))
            .args(["verify", "--json"])
            .current_dir(dir.path())
            .env_remove("SLUICE_STORE")
            .output()
            .unwrap();
        let report: Value = serde_json::from_slice(&out.stdout).unwrap();
        assert_eq!(report["intact"], true, "stopped at point {n}: {report:#}");
        let found = find_these_everywhere(&dir.path().join("sluice-store"), needles);
        let orders = report["erasure_orders"].as_array().unwrap().len();
        if orders == orders_before {
            assert!(!found.is_empty(), "point {n}: no order, yet nothing found");
            as_it_was += 1;
        } else {
            assert_eq!(orders, orders_before + 1);
            assert!(found.is_empty(), "point {n}: recorded, yet {found:?}");
            finished += 1;
        }
    }
    assert!(as_it_was > 0 && finished > 0, "{as_it_was} and {finished}");
}

// ---- a guess not confirmable from the database ---------------------------------------------

/// A row's canonical encoding as DEVELOPERS.md ("Row commitments") defines it, written here
/// from that text: its non-NULL columns sorted by name, each as the name's length (u64 LE) and
/// bytes, a type tag (1 integer, 2 real, 3 text, 4 blob) and the value.
fn encode_row(cols: &BTreeMap<String, rusqlite::types::Value>) -> Vec<u8> {
    use rusqlite::types::Value as V;
    let mut out = Vec::new();
    for (name, v) in cols {
        if *v == V::Null || name == "rowid" {
            continue;
        }
        out.extend((name.len() as u64).to_le_bytes());
        out.extend(name.as_bytes());
        match v {
            V::Integer(i) => {
                out.push(1);
                out.extend(i.to_le_bytes());
            }
            V::Real(f) => {
                out.push(2);
                out.extend(f.to_bits().to_le_bytes());
            }
            V::Text(t) => {
                out.push(3);
                out.extend((t.len() as u64).to_le_bytes());
                out.extend(t.as_bytes());
            }
            V::Blob(b) => {
                out.push(4);
                out.extend((b.len() as u64).to_le_bytes());
                out.extend(b);
            }
            V::Null => {}
        }
    }
    out
}

/// The selector part of both digest forms: table, column and an integer range.
fn selector_bytes(h: &mut blake3::Hasher, table: &str, by: &str, from: i64, to: i64) {
    for name in [table, by] {
        h.update(&(name.len() as u64).to_le_bytes());
        h.update(name.as_bytes());
    }
    for k in [from, to] {
        h.update(&[1]);
        h.update(&k.to_le_bytes());
    }
}

/// Form 1 (DEVELOPERS.md): BLAKE3 over `sluice-rows-v1`, the selector and the encodings in
/// byte order, each with its length.
fn digest_form_1(table: &str, by: &str, from: i64, to: i64, rows: &[Vec<u8>]) -> String {
    let mut rows = rows.to_vec();
    rows.sort();
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-rows-v1");
    selector_bytes(&mut h, table, by, from, to);
    h.update(&(rows.len() as u64).to_le_bytes());
    for r in &rows {
        h.update(&(r.len() as u64).to_le_bytes());
        h.update(r);
    }
    h.finalize().to_hex().to_string()
}

/// A row's leaf in form 2: BLAKE3 over `sluice-row-v2` and its encoding.
fn row_leaf(encoded: &[u8]) -> [u8; 32] {
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-row-v2");
    h.update(encoded);
    *h.finalize().as_bytes()
}

/// Form 2: BLAKE3 over `sluice-rows-v2`, the selector, the count and the leaves in byte order.
fn digest_form_2(table: &str, by: &str, from: i64, to: i64, leaves: &[[u8; 32]]) -> String {
    let mut leaves = leaves.to_vec();
    leaves.sort();
    let mut h = blake3::Hasher::new();
    h.update(b"sluice-rows-v2");
    selector_bytes(&mut h, table, by, from, to);
    h.update(&(leaves.len() as u64).to_le_bytes());
    for l in &leaves {
        h.update(l);
    }
    h.finalize().to_hex().to_string()
}

fn hex(b: &[u8]) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

/// Every digest-like value the database holds: each run of 64 hexadecimal digits in any text
/// of any table (the audit entries' details among them), and every 32-byte window of any blob,
/// as hex.
fn digests_in(db: &rusqlite::Connection) -> BTreeSet<String> {
    let tables: Vec<String> = db
        .prepare("SELECT name FROM sqlite_master WHERE type = 'table'")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(|t| t.unwrap())
        .collect();
    let mut out = BTreeSet::new();
    for t in tables {
        let mut st = db.prepare(&format!("SELECT * FROM \"{t}\"")).unwrap();
        let n = st.column_count();
        let mut rows = st.query([]).unwrap();
        while let Some(r) = rows.next().unwrap() {
            for i in 0..n {
                match r.get::<_, rusqlite::types::Value>(i).unwrap() {
                    rusqlite::types::Value::Text(text) => {
                        let b = text.as_bytes();
                        let mut run = 0;
                        for (j, c) in b.iter().enumerate() {
                            run = if c.is_ascii_hexdigit() { run + 1 } else { 0 };
                            if run >= 64 {
                                out.insert(text[j + 1 - 64..=j].to_ascii_lowercase());
                            }
                        }
                    }
                    rusqlite::types::Value::Blob(b) => {
                        for w in b.windows(32) {
                            out.insert(hex(w));
                        }
                    }
                    _ => {}
                }
            }
        }
    }
    out
}

/// The profile rows of a version, column name -> value.
fn profile_rows(
    db: &rusqlite::Connection,
    version_id: i64,
) -> Vec<BTreeMap<String, rusqlite::types::Value>> {
    let mut st = db
        .prepare("SELECT * FROM column_profiles WHERE version_id = ?1 ORDER BY col_idx")
        .unwrap();
    let names: Vec<String> = st.column_names().iter().map(|c| c.to_string()).collect();
    st.query_map([version_id], |r| {
        Ok(names
            .iter()
            .enumerate()
            .map(|(i, n)| (n.clone(), r.get::<_, rusqlite::types::Value>(i).unwrap()))
            .collect())
    })
    .unwrap()
    .map(|r| r.unwrap())
    .collect()
}

/// The range of the latest audit entry's selector of `column_profiles` that covers `version`.
fn profile_selector(db: &rusqlite::Connection, version: i64) -> (i64, i64) {
    let details: Vec<String> = db
        .prepare("SELECT details FROM audit_log ORDER BY seq")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(|d| d.unwrap())
        .collect();
    let mut found = None;
    for d in details {
        let d: Value = serde_json::from_str(&d).unwrap();
        for r in d["rows"].as_array().into_iter().flatten() {
            let (from, to) = (r["from"].as_i64(), r["to"].as_i64());
            if r["table"] == "column_profiles" {
                if let (Some(a), Some(b)) = (from, to) {
                    if a <= version && version <= b {
                        found = Some((a, b));
                    }
                }
            }
        }
    }
    found.expect("an entry commits to the version's profile")
}

#[test]
fn a_guessed_extreme_of_an_erased_column_is_confirmable_from_no_digest_in_the_store() {
    // Zora Quennell is the largest member name and address and the fewest rides of the raw
    // file (and of the version without Bea Lindqvist); Oxwater, her town, is the smallest
    // town of both; the day she joined is neither the first nor the last.
    let s = Sandbox::with_store();
    s.file(
        "members.csv",
        "member,email,town,rides,joined\n\
         Aaron Abbotsley,aaron.abbotsley@example.org,Quillby,14,2024-03-01\n\
         Bea Lindqvist,bea.lindqvist@example.org,Oxwater,9,2023-05-10\n\
         Carys Moreton,carys.moreton@example.org,Quillby,22,2025-01-20\n\
         Zora Quennell,zora.quennell@example.org,Oxwater,5,2024-07-15\n",
    );
    s.ok(&["receive", "members.csv", "--as", "members"]);
    s.ok(&[
        "clean",
        "members",
        "drop",
        "member = 'Bea Lindqvist'",
        "--why",
        "left the cooperative",
    ]);
    let store_dir = s.path().join("sluice-store");
    let ids: Vec<i64> = {
        let store = Store::open(&store_dir).unwrap();
        ["members:v1", "members:v2"]
            .iter()
            .map(|r| sluice::refs::resolve(&store.lineage, r).unwrap().id)
            .collect()
    };
    // Her values, guessed right (the row as it is now, with the extreme left out, is the
    // erasure's own record of it, so a guess always fills the field).
    let guesses: Vec<Option<&str>> = vec![
        Some("Zora Quennell"),
        Some("zora.quennell@example.org"),
        Some("Oxwater"),
        Some("5"),
    ];

    // Control: the encodings and digests written here from DEVELOPERS.md give, with the salts
    // the store holds before the erasure, exactly the digests of the entries that recorded
    // the profiles. So a miss afterwards is not a mistake of this test's arithmetic.
    let db = rusqlite::Connection::open(store_dir.join("lineage.db")).unwrap();
    let before = digests_in(&db);
    let mut salts_before = Vec::new();
    for &id in &ids {
        let (from, to) = profile_selector(&db, id);
        let leaves: Vec<[u8; 32]> = (from..=to)
            .flat_map(|v| profile_rows(&db, v))
            .map(|r| row_leaf(&encode_row(&r)))
            .collect();
        assert!(
            before.contains(&digest_form_2(
                "column_profiles",
                "version_id",
                from,
                to,
                &leaves
            )),
            "the test's digest of version {id}'s profile must be the store's"
        );
        for r in profile_rows(&db, id) {
            let rusqlite::types::Value::Blob(salt) = &r["salt"] else {
                panic!("a profile row recorded now has a salt: {r:?}");
            };
            salts_before.push((id, r["name"].clone(), salt.clone()));
        }
    }
    drop(db);

    s.ok(&[
        "erase",
        "members:v1",
        "--key",
        "member=Zora Quennell",
        "--request",
        "request 2026-130 (GDPR Art. 17)",
        "--carry-out",
    ]);
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");

    // Every profile row that held one of her values lost it and its salt; the salt is in no
    // file under the store (decompressed frames searched too); other rows keep theirs.
    let db = rusqlite::Connection::open(store_dir.join("lineage.db")).unwrap();
    let mut purged = 0;
    for (id, name, salt) in &salts_before {
        let row = profile_rows(&db, *id)
            .into_iter()
            .find(|r| r["name"] == *name)
            .unwrap();
        let gone = row["min_value"] == rusqlite::types::Value::Null
            || row["max_value"] == rusqlite::types::Value::Null;
        let found = search_files(&store_dir, &[("salt".into(), salt.clone())], false);
        if gone {
            purged += 1;
            assert_eq!(row["salt"], rusqlite::types::Value::Null, "{row:?}");
            assert!(found.is_empty(), "{name:?} of {id}: {found:?}");
        } else {
            assert_eq!(row["salt"], rusqlite::types::Value::Blob(salt.clone()));
        }
    }
    // member, email, town and rides in both versions.
    assert_eq!(purged, 8, "{salts_before:?}");

    // The guess, with every field the store still holds, gives no leaf and no digest (of
    // either form) that the store keeps anywhere.
    let after = digests_in(&db);
    let mut tried = 0;
    for &id in &ids {
        let (from, to) = profile_selector(&db, id);
        let rows: Vec<BTreeMap<String, rusqlite::types::Value>> =
            (from..=to).flat_map(|v| profile_rows(&db, v)).collect();
        for (k, row) in rows.iter().enumerate() {
            if row["salt"] != rusqlite::types::Value::Null {
                continue;
            }
            for min in &guesses {
                for max in &guesses {
                    let mut guessed = row.clone();
                    let text = |g: &Option<&str>| {
                        g.map_or(rusqlite::types::Value::Null, |t| {
                            rusqlite::types::Value::Text(t.to_string())
                        })
                    };
                    if row["min_value"] == rusqlite::types::Value::Null {
                        guessed.insert("min_value".into(), text(min));
                    }
                    if row["max_value"] == rusqlite::types::Value::Null {
                        guessed.insert("max_value".into(), text(max));
                    }
                    let enc = encode_row(&guessed);
                    let leaf = row_leaf(&enc);
                    let mut encs: Vec<Vec<u8>> = rows.iter().map(encode_row).collect();
                    encs[k] = enc;
                    let mut leaves: Vec<[u8; 32]> = encs.iter().map(|e| row_leaf(e)).collect();
                    leaves[k] = leaf;
                    for d in [
                        hex(&leaf),
                        hex(blake3::hash(&encs[k]).as_bytes()),
                        digest_form_1("column_profiles", "version_id", from, to, &encs),
                        digest_form_2("column_profiles", "version_id", from, to, &leaves),
                    ] {
                        assert!(!after.contains(&d), "{row:?} with {min:?}, {max:?}");
                        tried += 1;
                    }
                }
            }
        }
    }
    assert!(tried >= 8 * 16 * 4, "{tried}");

    // verify still holds every profile row that was not overwritten to the entry that first
    // recorded it, and the overwritten ones to the erasure's record of them.
    drop(db);
    for (sql, what) in [
        (
            "UPDATE column_profiles SET n_blank = n_blank + 1 WHERE salt IS NOT NULL",
            "a row kept whole",
        ),
        (
            "UPDATE column_profiles SET max_len = max_len + 1 WHERE salt IS NULL AND col_idx = 0",
            "an overwritten row",
        ),
    ] {
        let copy = tempfile::tempdir().unwrap();
        common::copy_dir(s.path(), copy.path());
        let db = rusqlite::Connection::open(copy.path().join("sluice-store/lineage.db")).unwrap();
        assert!(db.execute(sql, []).unwrap() > 0, "{what}");
        drop(db);
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_sluice"))
            .args(["verify", "--json"])
            .current_dir(copy.path())
            .env_remove("SLUICE_STORE")
            .output()
            .unwrap();
        let r: Value = serde_json::from_slice(&out.stdout).unwrap();
        assert!(
            r["problems"]
                .as_array()
                .unwrap()
                .iter()
                .any(|p| p["kind"] == "audit_mismatch"
                    && p["subject"]
                        .as_str()
                        .unwrap()
                        .starts_with("column_profiles")),
            "{what}: {r:#}"
        );
    }
}

/// A store recorded by an earlier build (`tests/fixtures/store_v5`, schema 5: its audit entries
/// committed to the profiles without a salt) keeps that gap: the dry run and the order name
/// the versions and rows, the rows are committed to anew so that `verify` stays clean, and a
/// second order on the same versions works there too.
#[test]
fn an_old_store_names_its_unsalted_profiles_and_takes_two_orders() {
    let s = Sandbox::new();
    let fixture = std::path::Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/store_v5"
    ));
    common::copy_dir(fixture, s.path());
    let order = |key: &str, carry: bool| {
        let mut args = vec![
            "erase",
            "orders:v1",
            "--key",
            key,
            "--request",
            "request 2026-140",
            "--json",
        ];
        if carry {
            args.push("--carry-out");
        }
        s.json(&args)
    };
    let rows = ["wo-1,", "wo-3,"];
    assert_eq!(
        find_these_everywhere(&s.path().join("sluice-store"), &rows).len(),
        2 * 4,
        "both rows in each of the four stored order versions"
    );
    // WO-1 holds the smallest order number of the raw version.
    let dry = order("order_id=WO-1", false);
    let named: Vec<&str> = dry["profiles_committed_unsalted"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert!(named.contains(&"orders:v1"), "{dry:#}");
    let text = s.ok(&[
        "erase",
        "orders:v1",
        "--key",
        "order_id=WO-1",
        "--request",
        "request 2026-140",
    ]);
    assert_contains(&text, "column profiles recorded by an earlier sluice");
    let done = order("order_id=WO-1", true);
    assert_schema("erase", &done);
    assert!(
        done["carried_out"]["committed_the_old_way"]
            .as_array()
            .unwrap()
            .iter()
            .any(|r| r == "column_profiles 1"),
        "{done:#}"
    );
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    let done = order("order_id=WO-3", true);
    assert_eq!(done["carried_out"]["order"], 2);
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    assert_eq!(report["erasure_orders"].as_array().unwrap().len(), 2);
    let found = find_these_everywhere(&s.path().join("sluice-store"), &rows);
    assert!(found.is_empty(), "{found:?}");
}

/// The same file received as two datasets is one stored object: an order on one reaches the
/// other's cells, and what was derived from it, and erases them all. A version that only has
/// the same row index as a reached one (rows of the same lengths, other values) is refused,
/// with the store unchanged.
#[test]
fn a_copy_received_twice_is_erased_with_the_original_and_a_shared_row_index_is_refused() {
    let s = Sandbox::with_store();
    let file = "member,email,town\n\
                Aaron Abbotsley,aaron.abbotsley@example.org,Quillby\n\
                Zora Quennell,zora.quennell@example.org,Oxwater\n";
    s.file("members.csv", file);
    s.file("copy.csv", file);
    s.ok(&["receive", "members.csv", "--as", "members"]);
    s.ok(&["receive", "copy.csv", "--as", "ledger"]);
    s.ok(&[
        "clean",
        "ledger",
        "drop",
        "town = 'Quillby'",
        "--why",
        "Oxwater's ledger only",
    ]);
    let done = s.json(&[
        "erase",
        "members:v1",
        "--key",
        "member=Zora Quennell",
        "--request",
        "request 2026-141",
        "--carry-out",
        "--json",
    ]);
    let erased: BTreeMap<String, u64> = done["carried_out"]["versions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| {
            (
                v["version"].as_str().unwrap().to_string(),
                v["cells_erased"].as_u64().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        erased,
        BTreeMap::from([
            ("members:v1".to_string(), 3),
            ("ledger:v1".to_string(), 3),
            ("ledger:v2".to_string(), 3),
        ])
    );
    let found = find_these_everywhere(
        &s.path().join("sluice-store"),
        &["zora quennell", "zora.quennell@example.org"],
    );
    assert!(found.is_empty(), "{found:?}");
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report:#}");
    assert_eq!(report["erasure_orders"][0]["versions_proved"], 3);
    assert_contains(&s.ok(&["retrieve", "ledger:v1"]), "Aaron Abbotsley");

    // Other values, rows of the same lengths: one row index object for two versions.
    s.file("a.csv", "code\nAB1\nCD2\n");
    s.file("b.csv", "code\nXY9\nZW8\n");
    s.ok(&["receive", "a.csv", "--as", "codes"]);
    s.ok(&["receive", "b.csv", "--as", "other_codes"]);
    let before = s.snapshot();
    let msg = s.fails(
        2,
        &[
            "erase",
            "codes:v1",
            "--cell",
            "1:code",
            "--request",
            "request 2026-142",
            "--carry-out",
        ],
    );
    assert_contains(&msg, "has the same row index as other_codes:v1");
    assert_eq!(s.snapshot(), before, "a refused order changes nothing");
}
