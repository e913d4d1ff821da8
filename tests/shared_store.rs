//! Stores whose lineage is on a PostgreSQL server, against a real server (Debian's postgresql,
//! started by tests/common/pg.rs on loopback): the demo records the same versions, byte for
//! byte, as on SQLite; roles refused at the server; publish and borrow. (Concurrent writers on
//! two store folders sharing one server database and one bucket: tests/bucket.rs, which has
//! both servers.)

mod common;

use common::{pg, Sandbox};
use serde_json::Value;

/// (action, dataset, number, hash, row index, rows) of every version the timeline lists.
fn versions(s: &Sandbox, dir: &str) -> Vec<(String, String, u64, String, String, u64)> {
    let out = s.ok(&["--store", dir, "timeline", "--json"]);
    let steps: Value = serde_json::from_str(&out).expect("timeline --json");
    let mut all = Vec::new();
    for step in steps.as_array().expect("a list of steps") {
        for v in step["produced"].as_array().into_iter().flatten() {
            all.push((
                step["action"].as_str().unwrap_or("").to_string(),
                v["dataset"].as_str().unwrap().to_string(),
                v["seq"].as_u64().unwrap(),
                v["hash"].as_str().unwrap().to_string(),
                v["row_index"].as_str().unwrap().to_string(),
                v["n_rows"].as_u64().unwrap(),
            ));
        }
    }
    all
}

/// The whole demo (plan run, hand edit, outside command, report) with its lineage on the
/// server gives every version the same BLAKE3 hash and row index as the same demo on SQLite,
/// and the shared store verifies intact.
/// A late export of one order (`row`) written into store folder `who` and received there as
/// `late_orders`.
fn receive_late(s: &Sandbox, who: &str, row: &str) {
    let file = format!("{who}/late.csv");
    s.file(&file, format!("order_id,note\n{row}\n"));
    s.ok(&[
        "--store",
        who,
        "receive",
        &file,
        "--as",
        "late_orders",
        "--why",
        "a late export",
    ]);
}

#[test]
fn the_demo_on_the_server_records_what_it_records_on_sqlite() {
    let server = pg::server();
    let conn = server.new_database("demo_hashes");
    let s = Sandbox::new();
    s.ok(&["demo", "local"]);
    s.ok(&["demo", "shared", "--lineage-server", &conn]);
    let shared_dir = s.path().join("shared/sluice-store");
    assert!(
        !shared_dir.join("lineage.db").exists(),
        "a shared store keeps no lineage database in its folder"
    );
    let location = std::fs::read_to_string(shared_dir.join("location.json")).unwrap();
    assert!(location.contains("dbname=demo_hashes"), "{location}");
    assert!(!location.contains("password"), "{location}");
    let local = versions(&s, "local");
    let shared = versions(&s, "shared");
    assert!(local.len() > 20, "the demo records its versions: {local:?}");
    assert_eq!(local, shared);
    let verified = s.ok(&["--store", "shared", "verify"]);
    assert!(verified.starts_with("intact:"), "{verified}");
    // The rows are on the server: counted there with psql, not through sluice.
    let steps = server.admin_sql("demo_hashes", "SELECT count(*) FROM steps");
    let audit = server.admin_sql("demo_hashes", "SELECT count(*) FROM audit_log");
    assert!(steps.trim().parse::<u64>().unwrap() > 20, "{steps}");
    assert!(audit.trim().parse::<u64>().unwrap() > 20, "{audit}");
}

/// A connection string with a password is refused before anything is written: the password
/// would be stored in the store folder.
#[test]
fn a_password_in_the_connection_string_is_refused() {
    let server = pg::server();
    let s = Sandbox::new();
    let conn = format!(
        "host=127.0.0.1 port={} dbname=postgres user={} password=secret",
        server.port,
        pg::SUPERUSER
    );
    let r = s.run(&["setup", "--lineage-server", &conn]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("holds a password"), "{}", r.stderr);
    assert!(
        !s.path().join("sluice-store").exists(),
        "nothing is written"
    );
}

/// Counts on the server, with psql: (audit entries, steps).
fn server_counts(server: &pg::Server, db: &str) -> (u64, u64) {
    let out = server.admin_sql(
        db,
        "SELECT (SELECT count(*) FROM audit_log), (SELECT count(*) FROM steps)",
    );
    let mut it = out.trim().split('|').map(|n| n.parse::<u64>().unwrap());
    (it.next().unwrap(), it.next().unwrap())
}

/// The demo recorded in `local` and published into a new shared store `shared` whose lineage
/// is in the new server database `db`.
fn demo_published(server: &pg::Server, db: &str) -> Sandbox {
    let s = Sandbox::new();
    s.ok(&["demo", "local"]);
    publish_new(&s, server, db);
    s
}

/// `local` published into a new shared store `shared` whose lineage is in the new server
/// database `db`.
fn publish_new(s: &Sandbox, server: &pg::Server, db: &str) {
    let conn = server.new_database(db);
    s.ok(&[
        "--store",
        "local",
        "publish",
        "--to",
        "shared",
        "--lineage-server",
        &conn,
    ]);
}

/// A local store published into a new shared store, borrowed into two working copies, each
/// recording on its own: the first publishes back, the second is refused with the entry where
/// the two histories part named, and the shared store is as the first left it. Every copy
/// verifies intact and gives back the same bytes.
#[test]
fn publish_and_borrow_name_a_shared_store_that_moved_on() {
    let server = pg::server();
    let conn = server.new_database("moving_between");
    let s = Sandbox::new();
    s.ok(&["demo", "local"]);
    let published = s.ok(&[
        "--store",
        "local",
        "publish",
        "--to",
        "shared",
        "--lineage-server",
        &conn,
    ]);
    assert!(published.contains("published to"), "{published}");
    let (entries, steps) = server_counts(server, "moving_between");
    assert!(entries > 20 && steps > 20, "{entries} {steps}");
    assert!(s
        .ok(&["--store", "shared", "verify"])
        .starts_with("intact:"));
    s.ok(&["borrow", "shared", "--into", "first"]);
    // The JSON record of a borrow (schema/output/borrow.schema.json): the whole history copied
    // into a new folder, every stored object with it.
    let lent: Value =
        serde_json::from_str(&s.ok(&["borrow", "shared", "--into", "second", "--json"])).unwrap();
    assert_eq!(common::schema_errors("borrow", &lent), Vec::<String>::new());
    assert_eq!(lent["entries_before"], 0, "{lent}");
    assert_eq!(lent["entries_copied"], entries, "{lent}");
    assert_eq!(lent["objects_present"], 0, "{lent}");
    assert!(lent["objects_copied"].as_u64().unwrap() > 0, "{lent}");
    assert!(
        lent["from"].as_str().unwrap().contains("moving_between"),
        "{lent}"
    );
    assert!(
        lent["to"]
            .as_str()
            .unwrap()
            .ends_with("second/sluice-store"),
        "{lent}"
    );
    assert!(
        s.path().join("first/sluice-store/lineage.db").is_file(),
        "a working copy keeps its lineage in its folder"
    );
    let raw = s.ok(&["--store", "local", "retrieve", "quillby_orders:v1"]);
    assert_eq!(
        s.ok(&["--store", "second", "retrieve", "quillby_orders:v1"]),
        raw
    );
    for who in ["first", "second"] {
        receive_late(&s, who, &format!("L-1,late export read by {who}"));
    }
    let sent: Value =
        serde_json::from_str(&s.ok(&["--store", "first", "publish", "--to", "shared", "--json"]))
            .unwrap();
    assert_eq!(
        common::schema_errors("publish", &sent),
        Vec::<String>::new()
    );
    // One new entry and one new object (the late export; its row index too).
    assert_eq!(sent["entries_before"], entries, "{sent}");
    assert_eq!(sent["entries_copied"], 1, "{sent}");
    assert_eq!(sent["objects_copied"], 2, "{sent}");
    assert_eq!(
        server_counts(server, "moving_between"),
        (entries + 1, steps + 1)
    );
    let refused = s.run(&["--store", "second", "publish", "--to", "shared"]);
    assert_eq!(refused.code, 1, "{}", refused.stderr);
    assert!(
        refused
            .stderr
            .contains(&format!("part at audit entry {}", entries + 1)),
        "{}",
        refused.stderr
    );
    assert!(
        refused.stderr.contains("nothing was copied"),
        "{}",
        refused.stderr
    );
    assert_eq!(
        server_counts(server, "moving_between"),
        (entries + 1, steps + 1)
    );
    // The local store that was never borrowed is behind the shared one: refused too.
    let behind = s.run(&["--store", "local", "publish", "--to", "shared"]);
    assert_eq!(behind.code, 1, "{}", behind.stderr);
    assert!(behind.stderr.contains("moved on"), "{}", behind.stderr);
    assert_eq!(
        s.ok(&["--store", "shared", "retrieve", "late_orders"]),
        "order_id,note\nL-1,late export read by first\n"
    );
    for dir in ["shared", "first", "second"] {
        let v = s.ok(&["--store", dir, "verify"]);
        assert!(v.starts_with("intact:"), "{dir}: {v}");
    }
}

/// A borrow of one dataset copies the whole lineage but only the bytes of that dataset's
/// versions and of what they are made from: those read back byte for byte, a version outside
/// the part is refused with the shared store named, `verify` counts what was left there, work
/// recorded in the part publishes back, and an unknown dataset leaves no working copy.
#[test]
fn a_borrow_in_part_copies_one_dataset_and_what_it_is_made_from() {
    let server = pg::server();
    let s = demo_published(server, "borrowed_in_part");
    let whole: Value =
        serde_json::from_str(&s.ok(&["borrow", "shared", "--into", "whole", "--json"])).unwrap();
    let part: Value = serde_json::from_str(&s.ok(&[
        "borrow",
        "shared",
        "--into",
        "part",
        "--dataset",
        "q3_by_shop",
        "--json",
    ]))
    .unwrap();
    assert_eq!(common::schema_errors("borrow", &part), Vec::<String>::new());
    assert_eq!(part["entries_copied"], whole["entries_copied"], "{part}");
    assert!(
        part["objects_copied"].as_u64() < whole["objects_copied"].as_u64(),
        "{part} {whole}"
    );
    // What was left, as the location file names it, against the timeline of the shared store:
    // the received files and the dataset asked for are all here; the versions made after the
    // quarter's table from other branches (the shop totals, the reviewed orders) are not.
    let location: Value = serde_json::from_str(
        &std::fs::read_to_string(s.path().join("part/sluice-store/location.json")).unwrap(),
    )
    .unwrap();
    let left: Vec<&str> = location["left_in"]["objects"]
        .as_array()
        .unwrap()
        .iter()
        .map(|h| h.as_str().unwrap())
        .collect();
    let all = versions(&s, "shared");
    for (action, dataset, seq, hash, row_index, _) in &all {
        let is_left = left.contains(&hash.as_str());
        if action == "receive" || dataset == "q3_by_shop" {
            assert!(!is_left, "{dataset}:v{seq} is needed in the part");
            assert!(!left.contains(&row_index.as_str()), "{dataset}:v{seq}");
        }
        if dataset == "q3_shop_totals" || dataset == "reviewed_orders" {
            assert!(is_left, "{dataset}:v{seq} is outside the part");
        }
    }
    assert_eq!(
        s.ok(&["--store", "part", "retrieve", "q3_by_shop"]),
        s.ok(&["--store", "shared", "retrieve", "q3_by_shop"])
    );
    assert_eq!(
        s.ok(&["--store", "part", "retrieve", "quillby_orders:v1"]),
        s.ok(&["--store", "shared", "retrieve", "quillby_orders:v1"])
    );
    let outside = s.run(&["--store", "part", "retrieve", "q3_shop_totals"]);
    assert_ne!(outside.code, 0);
    assert!(
        outside.stderr.contains("left in the shared store")
            && outside.stderr.contains("borrowed_in_part"),
        "{}",
        outside.stderr
    );
    let checked: Value =
        serde_json::from_str(&s.ok(&["--store", "part", "verify", "--json"])).unwrap();
    assert_eq!(
        common::schema_errors("verify", &checked),
        Vec::<String>::new()
    );
    assert_eq!(checked["intact"], true, "{checked}");
    let counted = checked["objects_left_in_shared_store"].as_u64().unwrap();
    assert!(counted > 0 && counted <= left.len() as u64, "{checked}");
    assert!(s
        .ok(&["--store", "part", "verify"])
        .contains("borrowed in part:"));
    let deep = s.run(&["--store", "part", "verify", "--deep"]);
    assert_eq!(deep.code, 0, "{}\n{}", deep.stdout, deep.stderr);
    // Work recorded in the part is published back; the shared store verifies intact.
    receive_late(&s, "part", "L-2,late export read in the part");
    let sent: Value =
        serde_json::from_str(&s.ok(&["--store", "part", "publish", "--to", "shared", "--json"]))
            .unwrap();
    assert_eq!(sent["entries_copied"], 1, "{sent}");
    assert_eq!(sent["objects_copied"], 2, "{sent}");
    assert_eq!(
        s.ok(&["--store", "shared", "retrieve", "late_orders"]),
        "order_id,note\nL-2,late export read in the part\n"
    );
    assert!(s
        .ok(&["--store", "shared", "verify"])
        .starts_with("intact:"));
    // A dataset the shared store does not have: refused, and no working copy is left.
    let unknown = s.run(&[
        "borrow",
        "shared",
        "--into",
        "none",
        "--dataset",
        "q4_by_shop",
    ]);
    assert_eq!(unknown.code, 2, "{}", unknown.stderr);
    assert!(unknown.stderr.contains("q3_by_shop"), "{}", unknown.stderr);
    assert!(!s.path().join("none/sluice-store").exists());
}

/// A publish killed at moments spread over its whole run leaves the shared store with either
/// all of the published history or none of it (counted on the server), and verifying intact;
/// a publish after the kills completes it.
#[test]
fn a_killed_publish_leaves_the_shared_store_as_it_was() {
    let server = pg::server();
    let s = demo_published(server, "killed_publish");
    let before = server_counts(server, "killed_publish");
    for i in 0..4 {
        s.file(
            &format!("more{i}.csv"),
            format!("order_id,parts_cost\nM-{i},{}.50\n", 10 + i),
        );
        s.ok(&[
            "--store",
            "local",
            "receive",
            &format!("more{i}.csv"),
            "--as",
            "more_orders",
            "--why",
            "another export",
        ]);
    }
    let after = (before.0 + 4, before.1 + 4);
    // How long an unkilled publish takes, measured on a copy of the shared store's server
    // side would need a second database; time one into a scratch database instead.
    let scratch = server.new_database("killed_publish_timing");
    let started = std::time::Instant::now();
    s.ok(&[
        "--store",
        "local",
        "publish",
        "--to",
        "timing",
        "--lineage-server",
        &scratch,
    ]);
    let full = started.elapsed();
    let mut killed = 0;
    for k in 1..=8u32 {
        let child = s
            .command(&["--store", "local", "publish", "--to", "shared"])
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        if kill_after(child, full * k / 8) {
            killed += 1;
        }
        let now = server_counts(server, "killed_publish");
        assert!(
            now == before || now == after,
            "after a kill at {k}/8 of a publish the server holds {now:?}: neither {before:?} nor {after:?}"
        );
        if now == after {
            break;
        }
    }
    assert!(killed > 0, "no publish was still running when killed");
    s.ok(&["--store", "local", "publish", "--to", "shared"]);
    assert_eq!(server_counts(server, "killed_publish"), after);
    let v = s.ok(&["--store", "shared", "verify"]);
    assert!(v.starts_with("intact:"), "{v}");
}

/// Kills `child` with SIGKILL after `delay`; whether it was still running then.
fn kill_after(mut child: std::process::Child, delay: std::time::Duration) -> bool {
    let until = std::time::Instant::now() + delay;
    while std::time::Instant::now() < until {
        if child.try_wait().unwrap().is_some() {
            return false;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    let _ = child.kill();
    child.wait().unwrap().code().is_none()
}

/// The four roles, each refused at the server what it may not do (psql as a login of that
/// role, so no sluice code is between the role and the server), the audit log append-only for
/// every role and for the tables' owner, and a sluice whose login only reads refused when it
/// records, leaving the store as it was.
#[test]
fn each_role_is_refused_at_the_server_what_it_may_not_do() {
    let server = pg::server();
    let conn = server.new_database("roles_enforced");
    let s = Sandbox::new();
    s.ok(&["setup", "--lineage-server", &conn]);
    s.file("orders.csv", "order_id,parts_cost\nA-1,12.50\n");
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "first export",
    ]);
    let set_up = s.ok(&["roles", "--set-up"]);
    assert!(set_up.contains("sluice_recording"), "{set_up}");
    for (login, role) in [
        ("rowan_reads", "reading"),
        ("rhea_records", "recording"),
        ("sana_signs", "signing"),
        ("ada_administers", "administering"),
    ] {
        server.add_login(login);
        s.ok(&["roles", "--give", role, "--to", login]);
        let of = s.ok(&["roles", "--of", login]);
        assert!(of.contains(role), "{of}");
    }
    let db = "roles_enforced";
    let refused = |login: &str, sql: &str, why: &str| {
        let (ok, out) = server.psql(login, db, sql);
        assert!(!ok, "{login} was allowed: {sql}\n{out}");
        assert!(out.contains(why), "{login}: {sql}\n{out}");
    };
    let allowed = |login: &str, sql: &str| {
        let (ok, out) = server.psql(login, db, sql);
        assert!(ok, "{login} was refused: {sql}\n{out}");
    };
    let endorsement = |kind: &str| {
        format!(
            "BEGIN; INSERT INTO endorsements (id, kind, subject, label, meaning, name, signed_at,
                fingerprint, public_key, statement, signature)
             VALUES (1000, '{kind}', 's', 'l', 'approved', 'n', 't', 'f', 'k', 's', 'g'); ROLLBACK"
        )
    };
    let denied = "permission denied";
    // Reading: reads, and nothing else.
    allowed("rowan_reads", "SELECT count(*) FROM steps");
    refused(
        "rowan_reads",
        "INSERT INTO datasets (id, name, created_at) VALUES (100, 'x', 't')",
        denied,
    );
    refused(
        "rowan_reads",
        "UPDATE versions SET storage = 'kept'",
        denied,
    );
    // Recording: records steps, signs nothing, changes no audit entry.
    allowed(
        "rhea_records",
        "BEGIN; UPDATE versions SET storage = 'kept' WHERE id = 1; ROLLBACK",
    );
    refused("rhea_records", &endorsement("version"), denied);
    refused("rhea_records", "UPDATE versions SET n_rows = 0", denied);
    refused("rhea_records", "DELETE FROM steps", denied);
    // Signing: signs versions, reports and the audit head; admits no key.
    allowed("sana_signs", &endorsement("version"));
    refused(
        "sana_signs",
        &endorsement("admission"),
        "row-level security",
    );
    refused(
        "sana_signs",
        "INSERT INTO datasets (id, name, created_at) VALUES (100, 'x', 't')",
        denied,
    );
    // Administering: admits and retires keys; signs no version.
    allowed("ada_administers", &endorsement("admission"));
    refused(
        "ada_administers",
        &endorsement("approved_version_by_admin"),
        "violates",
    );
    refused(
        "ada_administers",
        &endorsement("version"),
        "row-level security",
    );
    // The audit log: no role may change or remove an entry ...
    for login in [
        "rowan_reads",
        "rhea_records",
        "sana_signs",
        "ada_administers",
    ] {
        refused(login, "UPDATE audit_log SET agent = 'someone else'", denied);
        refused(login, "DELETE FROM audit_log", denied);
        refused(login, "TRUNCATE audit_log", denied);
    }
    // ... and neither may the tables' owner: the trigger refuses it.
    for sql in [
        "UPDATE audit_log SET agent = 'someone else'",
        "DELETE FROM audit_log WHERE seq = 1",
        "TRUNCATE audit_log",
    ] {
        refused(pg::SUPERUSER, sql, "append-only");
    }
    // Through sluice: a login that only reads can look but not record.
    let (entries, steps) = server_counts(server, db);
    let reader = Sandbox::new();
    reader.file(
        "sluice-store/location.json",
        serde_json::json!({ "lineage": server.connection(db, "rowan_reads") }).to_string(),
    );
    assert!(reader.ok(&["timeline"]).contains("orders:v1"));
    reader.file("orders2.csv", "order_id,parts_cost\nA-2,3.00\n");
    let r = reader.run(&["receive", "orders2.csv", "--as", "orders", "--why", "more"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.stderr.contains("permission denied"), "{}", r.stderr);
    assert_eq!(server_counts(server, db), (entries, steps));
    assert!(s.ok(&["verify"]).starts_with("intact:"));
}

/// `service=NAME` is looked up in the connection service file (PGSERVICEFILE), whose
/// password is used and never written into the store; the password file is left empty here,
/// so the login can only have come from the service file.
#[test]
fn a_service_file_names_the_server_and_holds_the_password() {
    let server = pg::server();
    server.new_database("by_service");
    let s = Sandbox::new();
    let services = s.file(
        "pg_service.conf",
        format!(
            "# the team's servers\n[three_rivers_lineage]\nhost=127.0.0.1\nport={}\ndbname=by_service\nuser={}\npassword={}\n",
            server.port,
            pg::SUPERUSER,
            pg::PASSWORD
        ),
    );
    let empty = s.file("empty_pgpass", "");
    let run = |args: &[&str]| {
        let out = s
            .command(args)
            .env("PGSERVICEFILE", &services)
            .env("PGPASSFILE", &empty)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{args:?}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    };
    run(&["setup", "--lineage-server", "service=three_rivers_lineage"]);
    let location = std::fs::read_to_string(s.path().join("sluice-store/location.json")).unwrap();
    assert!(
        location.contains("service=three_rivers_lineage"),
        "{location}"
    );
    assert!(!location.contains(pg::PASSWORD), "{location}");
    s.file("orders.csv", "order_id,parts_cost\nA-1,12.50\n");
    run(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "first export",
    ]);
    let steps = server.admin_sql("by_service", "SELECT count(*) FROM steps");
    assert_eq!(steps.trim(), "1");
    // Without the service file the login has no password and the server refuses it.
    let out = s
        .command(&["timeline"])
        .env("PGSERVICEFILE", s.path().join("no_such_file"))
        .env("PGPASSFILE", &empty)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// A store where an erasure order was carried out publishes like any other: the erased
/// versions' own objects are gone, so their erased forms go instead (each under its own
/// name), with the order's records; the shared store and a copy borrowed from it verify intact
/// with the order named and give back the erased forms, byte for byte the local store's.
#[test]
fn a_store_with_an_erasure_publishes_its_erased_forms() {
    let server = pg::server();
    let s = Sandbox::new();
    s.ok(&["demo", "local"]);
    s.ok(&[
        "--store",
        "local",
        "erase",
        "quillby_orders:v1",
        "--where",
        "email = 'rosalind.yarlstow@example.org'",
        "--request",
        "request 2026-121, filed by the cooperative's data-protection officer",
        "--carry-out",
    ]);
    publish_new(&s, server, "after_erasure");
    s.ok(&["borrow", "shared", "--into", "copy"]);
    for store in ["shared", "copy"] {
        let report: Value =
            serde_json::from_str(&s.ok(&["--store", store, "verify", "--json"])).unwrap();
        assert_eq!(report["intact"], true, "{store}: {report:#}");
        assert_eq!(report["erasure_orders"][0]["order"], 1, "{store}");
        for version in ["quillby_orders:v1", "all_orders:v12", "reviewed_orders:v2"] {
            let here = s.ok(&["--store", store, "retrieve", version]);
            assert_eq!(
                here,
                s.ok(&["--store", "local", "retrieve", version]),
                "{store} {version}"
            );
            assert!(
                !here.contains("rosalind.yarlstow@example.org"),
                "{store} {version}"
            );
        }
    }
}
