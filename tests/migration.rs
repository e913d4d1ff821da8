//! Stores written by older schema versions open and are migrated in place. Each released schema
//! version keeps a small fixture store under tests/fixtures/ (made by that version's sluice and
//! never changed afterwards); the tests work on copies.

mod common;

use std::path::Path;

use common::*;

fn user_version(db: &Path) -> i64 {
    rusqlite::Connection::open(db)
        .unwrap()
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .unwrap()
}

#[test]
fn a_schema_1_store_is_migrated_and_keeps_its_history() {
    let s = Sandbox::new();
    copy_dir(
        Path::new(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/store_v1"
        )),
        s.path(),
    );
    let db = s.path().join("sluice-store/lineage.db");
    assert_eq!(user_version(&db), 1);
    // Any command opens the store and migrates it.
    let log = s.json(&["timeline", "--json"]);
    assert_eq!(user_version(&db), sluice::store::lineage::SCHEMA_VERSION);
    let kinds: Vec<&str> = log
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["step"]["operation"].as_str().unwrap_or("receive"))
        .collect();
    assert_eq!(kinds, vec!["receive", "trim", "dedupe"], "oldest first");
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report}");
    assert_eq!(
        s.run(&["retrieve", "orders"]).stdout,
        "order_id,shop,amount\nWO-1,Quillby Cycle Mend,12.50\nWO-2,Oxwater Wheelworks,8.00\n"
    );
    // Provenance recorded by schema 1 in the database's tables reads back through the same
    // API that reads the provenance objects of schema 4 and later.
    {
        let store = sluice::store::Store::open(&s.path().join("sluice-store")).unwrap();
        let trimmed = sluice::refs::resolve(&store.lineage, "orders:v2").unwrap();
        let raw = sluice::refs::resolve(&store.lineage, "orders:v1").unwrap();
        let changes = sluice::provenance::cell_changes(&store, &trimmed).unwrap();
        assert_eq!(changes.len(), 1);
        assert_ne!(changes[0].old, changes[0].new);
        let runs = sluice::provenance::row_runs(&store, &trimmed, raw.id).unwrap();
        assert_eq!(runs.iter().map(|r| r.len).sum::<u64>(), trimmed.n_rows);
        // A trail's one-row lookup reads the same map from the database's tables.
        for row in 0..trimmed.n_rows + 1 {
            assert_eq!(
                sluice::provenance::input_row(&store, &trimmed, raw.id, row).unwrap(),
                sluice::model::input_of(&runs, row),
                "row {row}"
            );
        }
        let deduped = sluice::refs::resolve(&store.lineage, "orders:v3").unwrap();
        let drops = sluice::provenance::drops(&store, deduped.step_id, trimmed.id).unwrap();
        assert_eq!(drops.len(), 1);
        assert!(drops[0].duplicate_of.is_some());
    }
    // The migrated store takes new steps and their new kinds of record.
    s.ok(&[
        "clean",
        "orders",
        "number",
        "--columns",
        "amount",
        "--why",
        "amounts as numbers",
    ]);
    assert_contains(&s.ok(&["verify"]), "intact");
}

/// A store of the one-file-per-object layout (schema 4, `tests/fixtures/store_loose_objects`,
/// made before segments existed) is read as it is, and `reclaim` moves its objects into a
/// segment: every hash kept, the bytes `retrieve` gives unchanged, the move in the audit chain.
#[test]
fn a_store_of_loose_objects_is_read_and_converted_by_reclaim() {
    let s = Sandbox::new();
    let fixture = Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/store_loose_objects"
    ));
    copy_dir(fixture, s.path());
    let store_dir = s.path().join(sluice::store::STORE_DIR);
    let loose_files = |d: &Path| -> usize {
        let objects = d.join("objects");
        std::fs::read_dir(&objects)
            .map(|fans| {
                fans.flatten()
                    .map(|f| std::fs::read_dir(f.path()).map_or(0, |r| r.count()))
                    .sum()
            })
            .unwrap_or(0)
    };
    assert_eq!(loose_files(&store_dir), 14);
    let refs = [
        "orders:v1",
        "orders:v2",
        "orders:v3",
        "orders:v4",
        "shops:v1",
    ];
    let hashes_before: Vec<String> = refs
        .iter()
        .map(|r| s.json(&["about", r, "--json"])["version"]["hash"].to_string())
        .collect();
    let bytes_before: Vec<String> = refs.iter().map(|r| s.ok(&["retrieve", r])).collect();
    // The raw file the fixture took in, byte for byte.
    assert_eq!(
        s.ok(&["retrieve", "orders:v1"]).as_bytes(),
        std::fs::read(fixture.join("orders.csv")).unwrap()
    );
    let trail = s.ok(&["trace", "orders:v4", "--row", "1", "--column", "technician"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    let entries = v["audit_entries_checked"].as_u64().unwrap();

    let done = s.json(&["reclaim", "--json"]);
    assert_eq!(done["loose_converted"], 14, "{done}");
    assert_eq!(done["objects_removed"], 0, "{done}");
    assert_eq!(loose_files(&store_dir), 0);
    assert!(!store_dir.join("objects").exists());

    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["objects_checked"], 14);
    assert_eq!(v["audit_entries_checked"].as_u64().unwrap(), entries + 1);
    let hashes_after: Vec<String> = refs
        .iter()
        .map(|r| s.json(&["about", r, "--json"])["version"]["hash"].to_string())
        .collect();
    assert_eq!(hashes_before, hashes_after);
    let bytes_after: Vec<String> = refs.iter().map(|r| s.ok(&["retrieve", r])).collect();
    assert_eq!(bytes_before, bytes_after);
    assert_eq!(
        s.ok(&["trace", "orders:v4", "--row", "1", "--column", "technician"]),
        trail
    );
    // Provenance objects of format 1 (run sets as one sequence) are read beside those of
    // format 2 (run sets in blocks behind a table) that the same steps write now: the same
    // row maps, the same trails.
    std::fs::copy(fixture.join("orders.csv"), s.path().join("again.csv")).unwrap();
    s.ok(&["receive", "again.csv", "--as", "again"]);
    let why = ["--why", "the same steps again"];
    let steps: [&[&str]; 3] = [
        &["trim", "--columns", "technician"],
        &["dedupe", "--keep", "first"],
        &["number", "--columns", "amount"],
    ];
    for step in steps {
        let mut args = vec!["clean", "again"];
        args.extend_from_slice(step);
        args.extend_from_slice(&why);
        s.ok(&args);
    }
    {
        let store = sluice::store::Store::open(&store_dir).unwrap();
        let version = |r: &str| sluice::refs::resolve(&store.lineage, r).unwrap();
        let format = |v: &sluice::model::Version| {
            let hex = store.lineage.step_provenance(v.step_id).unwrap().unwrap();
            let head = store
                .objects
                .read_range(&hex.parse().unwrap(), 0, 8)
                .unwrap();
            u32::from_le_bytes(head[4..8].try_into().unwrap())
        };
        let (o_in, o_out) = (version("orders:v2"), version("orders:v3"));
        let (n_in, n_out) = (version("again:v2"), version("again:v3"));
        assert_eq!((format(&o_out), format(&n_out)), (1, 2));
        let o_runs = sluice::provenance::row_runs(&store, &o_out, o_in.id).unwrap();
        let n_runs = sluice::provenance::row_runs(&store, &n_out, n_in.id).unwrap();
        assert_eq!(o_runs, n_runs);
        assert!(
            o_runs.len() > 1,
            "the dedupe dropped a row between two runs"
        );
        for row in 0..o_out.n_rows + 1 {
            let expected = sluice::model::input_of(&o_runs, row);
            assert_eq!(
                sluice::provenance::input_row(&store, &o_out, o_in.id, row).unwrap(),
                expected
            );
            assert_eq!(
                sluice::provenance::input_row(&store, &n_out, n_in.id, row).unwrap(),
                expected
            );
        }
    }
    for row in ["1", "2", "3"] {
        for column in ["technician", "amount"] {
            let trail = |r: &str| {
                let t = s.json(&["trace", r, "--row", row, "--column", column, "--json"]);
                (
                    t["value"].clone(),
                    t["end"]["line"].clone(),
                    t["hops"].as_array().unwrap().len(),
                )
            };
            assert_eq!(trail("orders:v4"), trail("again:v4"), "row {row}, {column}");
        }
    }
    // New steps go on in the converted store.
    s.ok(&["clean", "orders", "trim", "--why", "again"]);
    assert_contains(&s.ok(&["verify"]), "intact");
}

/// A store of schema 4 with segments (`tests/fixtures/store_v4`: `receive` with a key and a
/// `trim`, made by the last build before sign-offs) is migrated to schema 5: its history
/// verifies as before, its versions are unsigned, and a key can then be admitted and a version
/// signed off, with the new rows committed to by the chain like the old ones.
#[test]
fn a_schema_4_store_takes_sign_offs_after_migration() {
    let s = Sandbox::new();
    let fixture = Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/store_v4"
    ));
    copy_dir(fixture, s.path());
    let db = s.path().join("sluice-store/lineage.db");
    assert_eq!(user_version(&db), 4);
    let before = s.ok(&["retrieve", "orders:v2"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["schema_version"], sluice::store::lineage::SCHEMA_VERSION);
    assert_eq!(v["endorsements_checked"], 0);
    assert_eq!(user_version(&db), sluice::store::lineage::SCHEMA_VERSION);
    let about = s.json(&["about", "orders", "--json"]);
    assert_eq!(about["signed"], false);
    assert_eq!(about["step"]["reason"], "the till pads names with spaces");
    assert_eq!(
        s.ok(&["retrieve", "orders:v1"]).as_bytes(),
        std::fs::read(fixture.join("orders.csv")).unwrap()
    );

    let made = std::process::Command::new("ssh-keygen")
        .args(["-q", "-t", "ed25519", "-N", "", "-C", "ada", "-f"])
        .arg(s.path().join("ada"))
        .status()
        .expect("ssh-keygen runs (Debian: openssh-client; tests/run installs it)");
    assert!(made.success());
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
        "orders",
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
    ]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["endorsements_checked"], 2);
    assert_eq!(s.json(&["about", "orders", "--json"])["signed"], true);
    assert_eq!(s.ok(&["retrieve", "orders:v2"]), before);
}

/// A store whose row indexes are of format 1 (24 bytes per row: `tests/fixtures/store_rowindex_v1`,
/// made by the last build before the compact row index: `receive` of a 300-row export with CRLF
/// line ends, quoted fields holding line breaks and a blank line, then a `trim`) is read as it
/// is. The same export taken in again gets compact row indexes; both forms must give every row
/// the same byte offset and line, the fingerprints the old build stored must equal those
/// recomputed from the bytes, and trails, a comparison across the two forms and the deep
/// verification must agree. Every hash is kept: old indexes are never rewritten.
#[test]
fn row_indexes_of_format_1_are_read_beside_compact_ones() {
    use sluice::table::rowindex;
    let s = Sandbox::new();
    let fixture = Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/store_rowindex_v1"
    ));
    copy_dir(fixture, s.path());
    let about = |r: &str| s.json(&["about", r, "--json"])["version"].clone();
    let old_indexes: Vec<String> = ["orders:v1", "orders:v2"]
        .iter()
        .map(|r| about(r)["row_index"].as_str().unwrap().to_string())
        .collect();
    s.ok(&["receive", "orders.csv", "--as", "again"]);
    s.ok(&["clean", "again", "trim", "--why", "the till pads names"]);
    // The cleaned bytes are the same, whichever build made them.
    assert_eq!(about("orders:v2")["hash"], about("again:v2")["hash"]);

    let store = sluice::store::Store::open(&s.path().join("sluice-store")).unwrap();
    let version = |r: &str| sluice::refs::resolve(&store.lineage, r).unwrap();
    let index = |r: &str| {
        store
            .objects
            .read_all(&version(r).row_index.parse().unwrap())
            .unwrap()
    };
    for (old, new) in [("orders:v1", "again:v1"), ("orders:v2", "again:v2")] {
        let (a, b) = (index(old), index(new));
        assert_eq!(rowindex::format_of(&a).unwrap(), rowindex::FORMAT_VERSION);
        assert_eq!(rowindex::format_of(&b).unwrap(), rowindex::COMPACT_FORMAT);
        assert_eq!(rowindex::validate(&a).unwrap(), 300);
        assert_eq!(
            rowindex::positions(&a).unwrap(),
            rowindex::positions(&b).unwrap()
        );
        assert!(
            b.len() * 4 < a.len(),
            "{} bytes against {}",
            b.len(),
            a.len()
        );
        let stored = sluice::diff::read::offsets(&store.objects, &version(old)).unwrap();
        let recomputed = sluice::diff::read::row_index(&store.objects, &version(new)).unwrap();
        assert_eq!(
            stored.0.as_ref(),
            Some(&recomputed.0),
            "{old}: fingerprints"
        );
        assert_eq!(stored.1, recomputed.1, "{old}: offsets");
    }
    drop(store);

    // Rows on both sides of the blank line, one after a record over two lines, the last one.
    for row in ["1", "150", "151", "300"] {
        for column in ["notes", "technician"] {
            let trail = |r: &str| {
                let t = s.json(&["trace", r, "--row", row, "--column", column, "--json"]);
                (
                    t["value"].clone(),
                    t["end"]["line"].clone(),
                    t["end"]["raw_line"].clone(),
                )
            };
            assert_eq!(trail("orders"), trail("again"), "row {row}, {column}");
        }
    }
    let counts = |a: &str, b: &str| {
        let c = s.json(&["compare", a, b, "--key", "order_id", "--counts", "--json"]);
        (c["rows"].clone(), c["cells"].clone())
    };
    assert_eq!(
        counts("orders:v1", "orders:v2"),
        counts("orders:v1", "again:v2")
    );
    assert_eq!(
        counts("again:v1", "orders:v2"),
        counts("again:v1", "again:v2")
    );
    let v = s.json(&["verify", "--deep", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["versions_recomputed"], 4, "{v}");
    for (r, ix) in ["orders:v1", "orders:v2"].iter().zip(&old_indexes) {
        assert_eq!(about(r)["row_index"].as_str().unwrap(), ix, "{r}");
    }
}
