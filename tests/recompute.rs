//! Recomputable versions: a plan's intermediates recorded by hash and recipe without their
//! bytes, computed again (and checked against their hash) whenever something reads them; the
//! commands that keep, store again and release versions' bytes; `verify` checking recipes and,
//! with `--deep`, recomputing; and a store of schema 5 migrated with every old reference and
//! hash still resolving. The hashes are checked with the `blake3` crate (the reference
//! implementation's Rust crate, from the registry), outside sluice's own code paths.

mod common;

use std::path::Path;

use common::*;

fn blake3_hex(bytes: &[u8]) -> String {
    blake3::hash(bytes).to_hex().to_string()
}

/// Each version's label and recorded storage (`None`: stored).
fn storage_of(vs: &[(String, String, Option<String>)]) -> Vec<(&str, Option<&str>)> {
    vs.iter()
        .map(|(l, _, st)| (l.as_str(), st.as_deref()))
        .collect()
}

/// Every version of the store as `NAME:vN`, with its recorded hash and storage.
fn versions(s: &Sandbox) -> Vec<(String, String, Option<String>)> {
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let mut q = db
        .prepare(
            "SELECT d.name || ':v' || v.seq, v.hash, v.storage FROM versions v
             JOIN datasets d ON d.id = v.dataset_id ORDER BY d.name, v.seq",
        )
        .unwrap();
    let rows = q
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap();
    rows.map(|r| r.unwrap()).collect()
}

/// Every object name the store's segments hold.
fn stored_objects(s: &Sandbox) -> Vec<String> {
    let backend = sluice::store::objects::FsBackend::new(&s.path().join("sluice-store"));
    use sluice::store::objects::ObjectBackend;
    let (names, _) = backend.list().unwrap();
    names.iter().map(|h| h.hex()).collect()
}

const ORDERS: &str = "order_id,shop,service,parts_cost\n\
WO-1, Quillby Cycle Mend ,tune-up,$12.50\n\
WO-2,Oxwater Wheelworks,FLAT REPAIR,8.00\n\
WO-3,  Quillby Cycle Mend,brake bleed,\"1,030.00\"\n\
WO-4,Oxwater Wheelworks,tune-up,$4.25\n";

/// A store where a plan of four row-by-row steps made orders:v2..v5 (v2..v4 intermediates).
fn planned() -> Sandbox {
    let s = Sandbox::with_store();
    s.file("orders.csv", ORDERS);
    s.file(
        "plan.json",
        r#"{"sluice_plan": 2, "purpose": "Q3 parts cost",
 "sources": [{"dataset": "orders", "file": "orders.csv", "key": ["order_id"], "reason": "Q3 export"}],
 "steps": [
   {"dataset": "orders", "clean": "trim", "settings": {"inner": true}, "reason": "the till pads names"},
   {"dataset": "orders", "clean": "case", "settings": {"columns": ["service"], "to": "upper"}, "reason": "one case"},
   {"dataset": "orders", "clean": "number", "settings": {"columns": ["parts_cost"]}, "reason": "amounts"},
   {"dataset": "orders", "clean": "case", "settings": {"columns": ["shop"], "to": "upper"}, "reason": "shop codes"}
 ]}"#,
    );
    s.ok(&["run", "plan.json"]);
    s
}

/// A store of schema 5 (`tests/fixtures/store_v5`: a keyed intake of orders.csv and a plan of
/// trim, case, number and a summary by shop, made by the last build before recomputable
/// versions) opens and migrates; every version resolves by `NAME:vN` and by its hash, gives
/// bytes with its recorded BLAKE3, and still does after the old intermediates are evicted and
/// their space reclaimed (computed again from their recipes), with the same trail as before.
#[test]
fn a_schema_5_store_migrates_and_every_old_reference_and_hash_resolves() {
    let s = Sandbox::new();
    let fixture = Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/store_v5"
    ));
    copy_dir(fixture, s.path());
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["schema_version"], sluice::store::lineage::SCHEMA_VERSION);
    assert_eq!(v["versions_stored"], 5);
    assert_eq!(v["versions_recomputable"], 0);
    let old = versions(&s);
    assert_eq!(old.len(), 5);
    let mut before = Vec::new();
    for (label, hash, storage) in &old {
        assert_eq!(storage, &None, "{label} reads as stored");
        let bytes = s.run(&["retrieve", label]).raw_stdout;
        assert_eq!(&blake3_hex(&bytes), hash, "{label}");
        let by_hash = s.run(&["retrieve", &format!("blake3:{}", &hash[..12])]);
        assert_eq!(by_hash.raw_stdout, bytes, "{label} by its hash");
        before.push(bytes);
    }
    let raw = old.iter().position(|(l, _, _)| l == "orders:v1").unwrap();
    assert_eq!(
        before[raw],
        std::fs::read(fixture.join("orders.csv")).unwrap(),
        "the raw version is the file taken in"
    );
    let trail = s.ok(&["trace", "orders:v4", "--row", "3", "--column", "parts_cost"]);

    // The intermediates the policy allows to release: orders:v2 and v3 (v1 is raw, v4 the
    // latest of orders, by_shop:v1 the latest of by_shop).
    let evicted = s.json(&["evict", "--all", "--json"]);
    let names: Vec<&str> = evicted["changes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["version"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["orders:v2", "orders:v3"]);
    s.ok(&["reclaim"]);
    let present = stored_objects(&s);
    for (label, hash, _) in &old {
        let gone = label == "orders:v2" || label == "orders:v3";
        assert_eq!(
            !present.contains(hash),
            gone,
            "{label}'s bytes after reclaim"
        );
    }
    for ((label, hash, _), bytes) in old.iter().zip(&before) {
        let again = s.run(&["retrieve", label]).raw_stdout;
        assert_eq!(&again, bytes, "{label} computed again");
        assert_eq!(&blake3_hex(&again), hash);
    }
    assert_eq!(
        s.ok(&["trace", "orders:v4", "--row", "3", "--column", "parts_cost"]),
        trail
    );
    let v = s.json(&["verify", "--deep", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["versions_recomputable"], 2);
    assert_eq!(v["recipes_checked"], 2);
}

/// A plan's intermediates are recorded by hash, row count and profile but not written; every
/// reader gets their bytes computed again, with the recorded hash; the latest version is
/// stored; `recompute`, `retain` and `evict` change what is kept, each with an audit entry.
#[test]
fn a_run_keeps_its_intermediates_as_recipes_and_computes_them_when_read() {
    let s = planned();
    let vs = versions(&s);
    let storage = storage_of(&vs);
    assert_eq!(
        storage,
        [
            ("orders:v1", None),
            ("orders:v2", Some("recomputable")),
            ("orders:v3", Some("recomputable")),
            ("orders:v4", Some("recomputable")),
            ("orders:v5", None),
        ]
    );
    let present = stored_objects(&s);
    for (label, hash, st) in &vs {
        assert_eq!(
            present.contains(hash),
            st.is_none(),
            "{label} in the segments"
        );
        let bytes = s.run(&["retrieve", label]).raw_stdout;
        assert_eq!(&blake3_hex(&bytes), hash, "{label} read back");
    }
    // Reading wrote nothing into the store: the computed bytes lived in a scratch folder.
    assert_eq!(stored_objects(&s), present);
    let about = s.json(&["about", "orders:v3", "--json"]);
    assert_eq!(about["storage"], "recomputable");
    assert_eq!(about["profile"].as_array().unwrap().len(), 4);
    s.ok(&["compare", "orders:v2", "orders:v4", "--counts"]);
    s.ok(&["reproduce", "orders:v5"]);

    let entries = |s: &Sandbox| s.json(&["verify", "--json"])["audit_entries_checked"].clone();
    let n0 = entries(&s).as_u64().unwrap();
    let err = s.fails(2, &["evict", "orders:v5"]);
    assert_contains(
        &err,
        "orders:v5 stays stored: it is the latest version of orders",
    );
    let err = s.fails(2, &["evict", "orders:v1"]);
    assert_contains(
        &err,
        "orders:v1 stays stored: it is raw data (received), which cannot be computed again",
    );
    let done = s.json(&["recompute", "orders:v3", "--json"]);
    assert_eq!(done["changes"][0]["computed"], true);
    assert_eq!(done["changes"][0]["after"], "stored");
    assert!(stored_objects(&s).contains(&vs[2].1));
    s.ok(&["retain", "orders:v3"]);
    let err = s.fails(2, &["evict", "orders:v3"]);
    assert_contains(&err, "asked to keep it stored");
    s.ok(&["evict", "orders:v4"]);
    assert_eq!(
        entries(&s).as_u64().unwrap(),
        n0 + 2,
        "recompute and retain"
    );
    let v = s.json(&["verify", "--deep", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["versions_stored"], 3);
    assert_eq!(v["versions_recomputable"], 2);
    // evict of orders:v4 was already recomputable: no entry; the storage entries are in the
    // timeline's audit chain and committed to like every row.
    assert_eq!(v["audit_entries_checked"].as_u64().unwrap(), n0 + 2);
}

/// A recipe edited behind sluice's back: `verify` names the version and its step (the
/// parameters differ from what the step's audit entry recorded), reading the version fails
/// naming the step that computes other bytes, and `verify --deep` names it too.
#[test]
fn an_edited_recipe_is_named_by_verify_and_by_the_failing_recomputation() {
    let s = planned();
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let (step, params): (i64, String) = db
        .query_row(
            "SELECT s.id, s.params FROM steps s JOIN versions v ON v.step_id = s.id
             JOIN datasets d ON d.id = v.dataset_id WHERE d.name = 'orders' AND v.seq = 3",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert!(params.contains("\"upper\""), "{params}");
    db.execute(
        "UPDATE steps SET params = ?1 WHERE id = ?2",
        rusqlite::params![params.replace("\"upper\"", "\"lower\""), step],
    )
    .unwrap();
    drop(db);
    let r = s.run(&["verify", "--json"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let recipe: Vec<&serde_json::Value> = v["problems"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|p| p["kind"] == "recipe")
        .collect();
    assert_eq!(recipe.len(), 1, "{v}");
    assert_eq!(recipe[0]["subject"], "orders:v3");
    assert_contains(
        recipe[0]["detail"].as_str().unwrap(),
        &format!("the parameters of step {step} are"),
    );
    let err = s.fails(1, &["retrieve", "orders:v3"]);
    assert_contains(
        &err,
        &format!("step {step} (case) computed orders:v3 again as"),
    );
    let r = s.run(&["verify", "--deep", "--json"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    let deep: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    assert!(
        deep["problems"]
            .as_array()
            .unwrap()
            .iter()
            .any(|p| p["kind"] == "recompute" && p["subject"] == "orders:v3"),
        "{deep}"
    );
}

/// A trail through recomputable versions (each of its rows computed on its own from the
/// nearest stored version) is the trail the same history gives with every version stored.
#[test]
fn a_trail_through_recomputable_versions_is_the_trail_through_stored_ones() {
    let s = planned();
    let mut through_recipes = Vec::new();
    for (row, column) in [("1", "shop"), ("3", "parts_cost"), ("2", "service")] {
        through_recipes.push(s.ok(&["trace", "orders:v5", "--row", row, "--column", column]));
        through_recipes.push(s.ok(&["trace", "orders:v3", "--row", row, "--column", column]));
    }
    assert_contains(&through_recipes[0], "orders:v4 row 1 shop");
    s.ok(&["recompute", "orders:v2", "orders:v3", "orders:v4"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["versions_recomputable"], 0);
    let mut through_stored = Vec::new();
    for (row, column) in [("1", "shop"), ("3", "parts_cost"), ("2", "service")] {
        through_stored.push(s.ok(&["trace", "orders:v5", "--row", row, "--column", column]));
        through_stored.push(s.ok(&["trace", "orders:v3", "--row", row, "--column", column]));
    }
    assert_eq!(through_recipes, through_stored);
}

/// A delivery (`retrieve --deliver`) records exactly the bytes handed over: the audit entry's
/// file hash is the BLAKE3 (the `blake3` crate's) of the file written, for the stored bytes, a
/// canonical rendering and standard output alike; `identify` and `about` name it; a delivered
/// intermediate is computed, stored and then refused to `evict`; a delivery without a reason
/// is refused before anything is written, and leaves the store as it was.
#[test]
fn a_delivery_records_the_bytes_handed_over_and_keeps_the_version_stored() {
    let s = planned();
    let storage_of = |label: &str| {
        versions(&s)
            .into_iter()
            .find(|(l, _, _)| l == label)
            .unwrap()
            .2
    };
    assert_eq!(storage_of("orders:v3").as_deref(), Some("recomputable"));

    let before = s.snapshot();
    let err = s.fails(
        2,
        &["retrieve", "orders:v3", "-o", "none.csv", "--deliver", "  "],
    );
    assert_contains(&err, "--deliver needs a reason");
    assert!(!s.path().join("none.csv").exists());
    assert_eq!(s.snapshot(), before, "a refused delivery changes nothing");

    let r = s.run(&[
        "retrieve",
        "orders:v3",
        "--format",
        "jsonl",
        "-o",
        "orders_for_review.jsonl",
        "--deliver",
        "order lines for the treasurer's review",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_contains(
        &r.stderr,
        "delivered orders:v3 as orders_for_review.jsonl (jsonl",
    );
    let written = std::fs::read(s.path().join("orders_for_review.jsonl")).unwrap();
    let written_hex = blake3_hex(&written);
    assert_eq!(
        storage_of("orders:v3"),
        None,
        "a delivered intermediate is stored"
    );

    let id = s.json(&["identify", "orders_for_review.jsonl", "--json"]);
    assert_eq!(id["versions"].as_array().unwrap().len(), 0);
    let d = &id["deliveries"][0];
    assert_eq!(d["file_hash"], written_hex.as_str());
    assert_eq!(d["bytes"], written.len() as u64);
    assert_eq!(d["version"], "orders:v3");
    assert_eq!(d["format"], "jsonl");
    assert_eq!(d["why"], "order lines for the treasurer's review");
    assert_eq!(d["by"], format!("{PERSON} ({EMAIL})").as_str());
    let shown = s.ok(&["identify", "orders_for_review.jsonl"]);
    assert_contains(&shown, "is a delivered rendering of orders:v3");
    let about = s.json(&["about", "orders:v3", "--json"]);
    assert_eq!(about["deliveries"][0]["file_hash"], written_hex.as_str());
    assert_contains(
        &s.ok(&["about", "orders:v3"]),
        "delivered    orders_for_review.jsonl (jsonl)",
    );

    let err = s.fails(2, &["evict", "orders:v3"]);
    assert_contains(&err, "stays stored: it was delivered (audit entry");

    // The stored bytes to standard output: the recorded hash is the version's own.
    let r = s.run(&[
        "retrieve",
        "orders:v2",
        "--deliver",
        "raw-cleaned lines for the shop",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let v2 = versions(&s)
        .into_iter()
        .find(|(l, _, _)| l == "orders:v2")
        .unwrap();
    assert_eq!(blake3_hex(&r.raw_stdout), v2.1);
    let out = s.file("v2.csv", &r.raw_stdout);
    let id = s.json(&["identify", out.to_str().unwrap(), "--json"]);
    assert_eq!(id["versions"][0]["hash"], v2.1.as_str());
    assert_eq!(id["deliveries"][0]["file"], "-");
    assert_eq!(id["deliveries"][0]["format"], "stored bytes");

    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
}

/// A trail through recomputable versions made by `map` and `lookup` computes the one row it
/// follows, with the table each step recorded, and gives the trail the stored versions give.
/// That it reads no other row of the raw file is seen from outside: a byte changed in another
/// row of the stored raw version (same length, so every offset holds) does not stop the trail,
/// while computing the version whole would meet the damage (its hash would differ), and
/// `verify` names it.
#[test]
fn a_trail_through_map_and_lookup_reads_only_its_row_and_the_recorded_tables() {
    let s = Sandbox::with_store();
    s.file(
        "jobs.csv",
        "job,mechanic,service,minutes\n\
         J1,ines,flat fix,20\n\
         J2,tomas,BRAKES,35\n\
         J3,ines,chain swap,15\n\
         J4,odile,flat fix,25\n",
    );
    s.file(
        "labels.csv",
        "label,service\nflat fix,puncture repair\nBRAKES,brake service\nchain swap,chain replacement\n",
    );
    s.file(
        "staff.csv",
        "name,shop\nines,Quillby Cycle Mend\ntomas,Oxwater Wheelworks\nodile,Fennmarsh Bike Clinic\n",
    );
    s.file(
        "plan.json",
        r#"{"sluice_plan": 2, "purpose": "jobs per shop",
 "sources": [
   {"dataset": "jobs", "file": "jobs.csv", "key": ["job"], "reason": "the week's jobs"},
   {"dataset": "labels", "file": "labels.csv", "key": ["label"], "reason": "agreed service names"},
   {"dataset": "staff", "file": "staff.csv", "key": ["name"], "reason": "who works where"}],
 "steps": [
   {"dataset": "jobs", "clean": "map", "settings": {"columns": ["service"], "table": "labels"}, "reason": "one name per service"},
   {"dataset": "jobs", "clean": "lookup", "settings": {"table": "staff", "on": ["mechanic"], "table_on": ["name"], "take": ["shop"]}, "reason": "the shop of each job"},
   {"dataset": "jobs", "clean": "case", "settings": {"columns": ["mechanic"], "to": "title"}, "reason": "names capitalised"}
 ]}"#,
    );
    s.ok(&["run", "plan.json"]);
    let all = versions(&s);
    let storage = |label: &str| all.iter().find(|(l, _, _)| l == label).unwrap().2.clone();
    assert_eq!(
        storage("jobs:v2").as_deref(),
        Some("recomputable"),
        "{all:?}"
    );
    assert_eq!(
        storage("jobs:v3").as_deref(),
        Some("recomputable"),
        "{all:?}"
    );

    let trails = |s: &Sandbox| -> Vec<String> {
        [
            ("1", "shop"),
            ("2", "service"),
            ("1", "service"),
            ("2", "mechanic"),
        ]
        .iter()
        .map(|(row, column)| s.ok(&["trace", "jobs:v4", "--row", row, "--column", column]))
        .collect()
    };
    let through_recipes = trails(&s);
    assert_contains(&through_recipes[0], "Quillby Cycle Mend");
    assert_contains(&through_recipes[0], "looked up in staff:v1");
    assert_contains(&through_recipes[1], "brake service");

    // A twin of the store as it is now, for the trails through stored versions below.
    let t = Sandbox::new();
    copy_dir(s.path(), t.path());

    // Damage the raw file's last row (J4's minutes 25 -> 26), behind sluice's back.
    let raw = all
        .iter()
        .find(|(l, _, _)| l == "jobs:v1")
        .unwrap()
        .1
        .clone();
    damage_object(&s.path().join("sluice-store"), &raw, |bytes| {
        let at = bytes.len() - 2;
        assert_eq!(bytes[at], b'5');
        bytes[at] = b'6';
    });
    assert_eq!(
        trails(&s)[..2],
        through_recipes[..2],
        "rows 1 and 2 read alone"
    );
    let v = s.run(&["verify"]);
    assert_eq!(v.code, 1, "{}", v.stdout);
    assert_contains(&v.stdout, &raw[..16]);
    let whole = s.run(&["retrieve", "jobs:v3"]);
    assert_ne!(whole.code, 0, "computing jobs:v3 whole meets the damage");

    // The same trails in the undamaged twin with every version stored.
    t.ok(&["recompute", "jobs:v2", "jobs:v3"]);
    assert_eq!(trails(&t), through_recipes);
}

/// Work orders with padded shop names (the trim a withdrawal takes out), amounts with currency
/// signs and a thousands comma, and a cancelled order.
const WORK: &str = "order_id,shop,service,parts_cost,status\n\
WO-1, Quillby Cycle Mend ,tune-up,$12.50,done\n\
WO-2,Oxwater Wheelworks,FLAT REPAIR,8.00,open\n\
WO-3,  Quillby Cycle Mend,brake bleed,\"1,030.00\",done\n\
WO-4,Oxwater Wheelworks,tune-up,$4.25,cancelled\n\
WO-5, Quillby Cycle Mend ,wheel true,$3.00,done\n";

/// The `clean` arguments of each step after the trim, in order.
fn later_steps() -> Vec<Vec<&'static str>> {
    vec![
        vec![
            "case",
            "--columns",
            "service",
            "--to",
            "upper",
            "--why",
            "one case",
        ],
        vec!["number", "--columns", "parts_cost", "--why", "amounts"],
        vec!["sort", "--by", "order_id:desc", "--why", "newest first"],
        vec![
            "case",
            "--columns",
            "shop",
            "--to",
            "lower",
            "--why",
            "shop codes",
        ],
        vec!["keep", "status != 'cancelled'", "--why", "work done"],
    ]
}

/// A store with `WORK` received as `orders`.
fn received() -> Sandbox {
    let s = Sandbox::with_store();
    s.file("orders.csv", WORK);
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "Q3 export",
    ]);
    s
}

/// One `clean` of `orders` with the given arguments.
fn clean(s: &Sandbox, step: &[&str]) {
    let mut args = vec!["clean", "orders"];
    args.extend_from_slice(step);
    s.ok(&args);
}

/// `WORK` received as `orders`, then the given steps one `clean` at a time (each stored).
fn cleaned_one_by_one(trim: bool) -> Sandbox {
    let s = received();
    if trim {
        clean(&s, &["trim", "--why", "the till pads names"]);
    }
    for step in later_steps() {
        clean(&s, &step);
    }
    s
}

/// A withdrawal follows the storage policy of a run: of the later steps it applies again in
/// one pass, only the pass's last output is written (orders:v9 and orders:v12 are superseded
/// within their passes and recorded by hash and recipe, their bytes not written); the
/// restored table (a `revert` step's version, which no recipe computes), the output the sort
/// reads (its pass's last) and the new latest are stored. Every version it recorded has the
/// hash the same steps give applied one at a time to the raw file in another store, and reads
/// back as bytes whose BLAKE3 (the `blake3` crate) is that hash; `verify --deep` computes the
/// recomputable ones again.
#[test]
fn a_withdrawal_writes_only_what_the_policy_stores() {
    let s = cleaned_one_by_one(true);
    assert_eq!(versions(&s).len(), 7);
    let done = s.json(&[
        "withdraw",
        "orders:v2",
        "--why",
        "the padding marks a branch",
        "--json",
    ]);
    assert_eq!(done["report"]["latest"], "orders:v13", "{done}");

    // The reference: the same steps on the raw file one at a time, without the trim.
    let reference = cleaned_one_by_one(false);
    let expected: Vec<String> = versions(&reference).into_iter().map(|v| v.1).collect();
    let vs = versions(&s);
    let recorded: Vec<&str> = vs[7..].iter().map(|v| v.1.as_str()).collect();
    assert_eq!(
        recorded, expected,
        "the restored table, then each step again"
    );

    let storage = storage_of(&vs[7..]);
    assert_eq!(
        storage,
        [
            ("orders:v8", None),
            ("orders:v9", Some("recomputable")),
            ("orders:v10", None),
            ("orders:v11", None),
            ("orders:v12", Some("recomputable")),
            ("orders:v13", None),
        ]
    );
    // The withdrawal says so itself.
    let said: Vec<(&str, &str)> = done["report"]["recorded"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["version"].as_str().unwrap(),
                l["storage"].as_str().unwrap(),
            )
        })
        .collect();
    let recorded_storage: Vec<(&str, &str)> = storage
        .iter()
        .map(|(l, st)| (*l, st.unwrap_or("stored")))
        .collect();
    assert_eq!(said, recorded_storage);
    let present = stored_objects(&s);
    for (label, hash, st) in &vs[7..] {
        assert_eq!(
            present.contains(hash),
            st.is_none(),
            "{label} in the segments"
        );
        let bytes = s.run(&["retrieve", label]).raw_stdout;
        assert_eq!(&blake3_hex(&bytes), hash, "{label} read back");
    }
    let v = s.json(&["verify", "--deep", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["versions_recomputable"], 2);
    assert_eq!(v["recipes_checked"], 2);
    // Released and reclaimed, nothing else depends on the objects the pass did not write.
    s.ok(&["reclaim"]);
    for (label, hash, _) in &vs[7..] {
        let bytes = s.run(&["retrieve", label]).raw_stdout;
        assert_eq!(&blake3_hex(&bytes), hash, "{label} after reclaim");
    }
    s.ok(&["reproduce", "orders:v13"]);
}

/// What a withdrawal reads again stays stored even inside a pass: the new version standing
/// for one an inspection was recorded on (the inspection runs on it), and a version that
/// became the latest because the step after it changed nothing once the trim was gone (the
/// `keep` drops only trimmed names; its identical output, the pass's last, was written).
#[test]
fn a_withdrawal_stores_what_it_inspects_and_its_latest() {
    let s = received();
    s.file(
        "rules.json",
        r#"{"sluice_rules": 2, "rules": [{"dimension": "completeness", "columns": ["service"]}]}"#,
    );
    let steps = later_steps();
    clean(&s, &["trim", "--why", "the till pads names"]);
    clean(&s, &steps[0]);
    s.ok(&["inspect", "orders:v3", "--rules", "rules.json"]);
    clean(&s, &steps[1]);
    clean(
        &s,
        &[
            "keep",
            "shop != 'Quillby Cycle Mend'",
            "--why",
            "Oxwater's orders only",
        ],
    );
    let done = s.json(&[
        "withdraw",
        "orders:v2",
        "--why",
        "the padding marks a branch",
        "--json",
    ]);
    assert_eq!(done["report"]["latest"], "orders:v8", "{done}");
    assert_eq!(
        done["report"]["unchanged"].as_array().unwrap().len(),
        1,
        "{done}"
    );
    assert_eq!(
        done["report"]["checks"][0]["version"], "orders:v7",
        "{done}"
    );
    let vs = versions(&s);
    let storage = storage_of(&vs[5..]);
    assert_eq!(
        storage,
        [
            ("orders:v6", None),
            ("orders:v7", None),
            ("orders:v8", None)
        ]
    );
    let present = stored_objects(&s);
    for (label, hash, _) in &vs[5..] {
        assert!(present.contains(hash), "{label} in the segments");
    }
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    let err = s.fails(2, &["evict", "orders:v8"]);
    assert_contains(
        &err,
        "orders:v8 stays stored: it is the latest version of orders",
    );
}
