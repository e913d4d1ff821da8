//! Stores whose lineage is on a PostgreSQL server, against a real server (Debian's postgresql,
//! started by tests/common/pg.rs on loopback): the demo records the same versions, byte for
//! byte, as on SQLite; concurrent writers leave gap-free numbers and one audit chain.

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

/// Eight writer processes record into one shared store at once, each receiving its own new
/// extracts as further versions of one dataset and of a dataset of its own. Bounded by count
/// (8 writers x 12 steps), not by time, so a slow machine takes longer rather than testing less.
/// Afterwards: every step each writer was told it recorded is there once, step numbers and
/// version numbers run without a gap, and the audit chain verifies (checked by sluice, and
/// counted on the server with psql).
#[test]
fn eight_concurrent_writers_lose_and_duplicate_nothing() {
    const WRITERS: usize = 8;
    const STEPS: usize = 12;
    let server = pg::server();
    let conn = server.new_database("many_writers");
    let s = Sandbox::new();
    s.ok(&["setup", "--lineage-server", &conn]);
    let handles: Vec<_> = (0..WRITERS)
        .map(|w| {
            let dir = s.path().to_path_buf();
            let mut cmds = Vec::new();
            for i in 0..STEPS {
                let name = format!("w{w}_{i}.csv");
                std::fs::write(
                    dir.join(&name),
                    format!("reading_id,meter,kwh\nR{w}-{i},M{w},{}.{i}\n", 100 + w),
                )
                .unwrap();
                let dataset = if i % 2 == 0 {
                    "meter_readings".to_string()
                } else {
                    format!("depot_{w}")
                };
                let mut c = s.command(&[
                    "receive",
                    &name,
                    "--as",
                    &dataset,
                    "--why",
                    "a depot's nightly meter export",
                    "--json",
                ]);
                c.env("SLUICE_PERSON", format!("Depot {w}"));
                cmds.push(c);
            }
            std::thread::spawn(move || {
                let mut made = Vec::new();
                for mut c in cmds {
                    let out = c.output().expect("run sluice");
                    assert!(
                        out.status.success(),
                        "writer {w}: {}",
                        String::from_utf8_lossy(&out.stderr)
                    );
                    let v: Value = serde_json::from_slice(&out.stdout).expect("receive --json");
                    made.push(
                        v["step"]
                            .as_i64()
                            .unwrap_or_else(|| panic!("no step number in {v}")),
                    );
                }
                made
            })
        })
        .collect();
    let mut steps: Vec<i64> = handles
        .into_iter()
        .flat_map(|h| h.join().expect("writer thread"))
        .collect();
    steps.sort_unstable();
    // The setup records an audit entry but no step, so the writers' steps are 1..=96.
    let expected: Vec<i64> = (1..=(WRITERS * STEPS) as i64).collect();
    assert_eq!(steps, expected, "no step lost or given twice");
    let counts = server.admin_sql(
        "many_writers",
        "SELECT count(*), max(id), (SELECT count(*) FROM audit_log), (SELECT max(seq) FROM audit_log),
                (SELECT max(seq) FROM versions v JOIN datasets d ON d.id = v.dataset_id
                 WHERE d.name = 'meter_readings'),
                (SELECT count(*) FROM versions v JOIN datasets d ON d.id = v.dataset_id
                 WHERE d.name = 'meter_readings')
         FROM steps",
    );
    let n = (WRITERS * STEPS) as u64;
    let audit = n + 1; // and the setup's entry
    let shared = (WRITERS * STEPS.div_ceil(2)) as u64;
    assert_eq!(
        counts.trim(),
        format!("{n}|{n}|{audit}|{audit}|{shared}|{shared}"),
        "steps, highest step, audit entries, highest entry, versions of the shared dataset"
    );
    let verified = s.ok(&["verify"]);
    assert!(verified.starts_with("intact:"), "{verified}");
}
