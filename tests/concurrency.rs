//! Several sluice processes writing one store at once: writers wait for each other (SQLite busy
//! timeout, one write transaction per command), so no step is lost, version numbers stay
//! gap-free and the audit chain stays intact; and a writer whose object another machine's
//! `reclaim` removed before its commit records nothing.

mod common;

use common::*;

#[test]
fn eight_writers_at_once_lose_nothing() {
    let s = Sandbox::with_store();
    let mut children = Vec::new();
    for i in 0..8 {
        // Four processes write versions of one dataset, four write datasets of their own.
        let (name, file) = if i % 2 == 0 {
            ("shared".to_string(), format!("shared_{i}.csv"))
        } else {
            (format!("own_{i}"), format!("own_{i}.csv"))
        };
        let mut text = String::from("order_id,shop\n");
        for r in 0..2000 {
            text.push_str(&format!("{i}-{r},Oxwater Wheelworks\n"));
        }
        s.file(&file, text);
        children.push(
            s.command(&["receive", &file, "--as", &name])
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .expect("start sluice"),
        );
    }
    for c in children {
        let out = c.wait_with_output().unwrap();
        assert!(
            out.status.success(),
            "a concurrent ingest failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let shared = s.json(&["timeline", "--dataset", "shared", "--json"]);
    let mut seqs: Vec<u64> = shared
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["produced"][0]["seq"].as_u64().unwrap())
        .collect();
    seqs.sort();
    assert_eq!(seqs, vec![1, 2, 3, 4]);
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report}");
    assert_eq!(report["versions_checked"], 8);
    // init + 8 ingests, each exactly one entry.
    assert_eq!(report["audit_entries_checked"], 9);
    eprintln!(
        "concurrency: 8 ingest processes at once (4 into one dataset), 8 versions, versions of the shared dataset 1..4, 9 audit entries, verify intact"
    );
}

/// Twelve processes at once: four take new exports in as versions of one dataset, four apply
/// steps to the same version of another, four take in a dataset of their own and clean it;
/// meanwhile a reader runs `verify` over and over. Nothing is lost: every command's version
/// and step are there, version numbers run 1..n per dataset, audit sequence numbers are
/// unique and gap-free, the chain is intact, and every `verify` the reader ran while the
/// writers worked found the store intact (it reads one snapshot, so it never sees half a step).
#[test]
fn twelve_writers_ingesting_and_applying_while_a_reader_verifies() {
    use std::process::Stdio;
    let s = Sandbox::with_store();
    let rows = |tag: &str, n: usize| {
        let mut t = String::from("order_id,shop,status,parts_cost\n");
        for r in 0..n {
            let status = if r % 7 == 0 { "test" } else { "done" };
            t.push_str(&format!(
                "{tag}-{r}, Fennmarsh Bike Clinic ,{status},\"€{r}.50\"\n"
            ));
        }
        t
    };
    s.file("base.csv", rows("B", 3000));
    s.ok(&["receive", "base.csv", "--as", "base"]);
    let sh = |script: String| {
        let mut c = std::process::Command::new("sh");
        c.arg("-c")
            .arg(script)
            .current_dir(s.path())
            .env("SLUICE_PERSON", PERSON)
            .env("SLUICE_EMAIL", EMAIL)
            .env("NO_COLOR", "1")
            .env_remove("SLUICE_STORE")
            .stdout(Stdio::null())
            .stderr(Stdio::piped());
        c
    };
    let bin = env!("CARGO_BIN_EXE_sluice");
    let mut writers = Vec::new();
    for i in 0..4 {
        s.file(&format!("shared_{i}.csv"), rows(&format!("S{i}"), 3000));
        writers.push((
            format!("receive shared {i}"),
            sh(format!("'{bin}' receive shared_{i}.csv --as shared")),
        ));
    }
    let ops = [
        "trim --inner",
        "number --columns parts_cost",
        "drop \"status = 'test'\"",
        "case --columns shop --to upper",
    ];
    for op in ops {
        writers.push((
            format!("clean {op} to base:v1"),
            sh(format!(
                "'{bin}' clean base:v1 {op} --as base --why 'concurrent step'"
            )),
        ));
    }
    for i in 0..4 {
        s.file(&format!("own_{i}.csv"), rows(&format!("O{i}"), 3000));
        writers.push((
            format!("own {i}"),
            sh(format!(
                "'{bin}' receive own_{i}.csv --as own_{i} && \
                 '{bin}' clean own_{i} trim --why tidy && \
                 '{bin}' clean own_{i} number --columns parts_cost --why amounts"
            )),
        ));
    }
    let mut children: Vec<_> = writers
        .into_iter()
        .map(|(what, mut c)| (what, c.spawn().expect("start a writer")))
        .collect();
    let mut reads = 0;
    loop {
        let running = children
            .iter_mut()
            .any(|(_, c)| c.try_wait().unwrap().is_none());
        let v = s.json(&["verify", "--json"]);
        assert_eq!(v["intact"], true, "a reader saw a damaged store: {v}");
        reads += 1;
        if !running {
            break;
        }
    }
    for (what, c) in children {
        let out = c.wait_with_output().unwrap();
        assert!(
            out.status.success(),
            "{what} failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let seqs = |name: &str| -> Vec<u64> {
        let mut v: Vec<u64> = s
            .json(&["timeline", "--dataset", name, "--json"])
            .as_array()
            .unwrap()
            .iter()
            .map(|e| e["produced"][0]["seq"].as_u64().unwrap())
            .collect();
        v.sort();
        v
    };
    assert_eq!(seqs("shared"), vec![1, 2, 3, 4]);
    assert_eq!(seqs("base"), vec![1, 2, 3, 4, 5]);
    for i in 0..4 {
        assert_eq!(seqs(&format!("own_{i}")), vec![1, 2, 3]);
    }
    let report = s.json(&["verify", "--json"]);
    assert_eq!(report["intact"], true, "{report}");
    // init, base, 4 shared ingests, 4 steps on base, 4 x (ingest + 2 steps): one entry each.
    let entries = report["audit_entries_checked"].as_u64().unwrap();
    assert_eq!(entries, 1 + 1 + 4 + 4 + 12);
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let (n, lo, hi): (i64, i64, i64) = db
        .query_row(
            "SELECT count(DISTINCT seq), min(seq), max(seq) FROM audit_log",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .unwrap();
    assert_eq!((n, lo, hi), (entries as i64, 1, entries as i64));
    let steps: i64 = db
        .query_row("SELECT count(*) FROM steps", [], |r| r.get(0))
        .unwrap();
    assert_eq!(steps, 1 + 4 + 4 + 12);
    eprintln!(
        "concurrency: 12 writer processes (20 commands) at once, {steps} steps, {entries} audit entries, \
         all present; {reads} verify runs while they worked, all intact"
    );
}

/// Objects kept where other machines also write (a bucket): a writer whose object was removed
/// (by `reclaim` on another machine) between its upload and its commit records nothing. The
/// removal is played by an object backend around the real one that reports, when the write
/// transaction asks before committing, the first object it names as gone; the engine must
/// roll the step back (no version, no audit entry) and say to run the command again, and the
/// same intake through the real backend then records the version.
#[test]
fn a_writer_whose_object_vanished_before_its_commit_records_nothing() {
    use sluice::hash::Hash;
    use sluice::intake::{self, IngestOptions, IngestOutcome};
    use sluice::model::Agent;
    use sluice::store::objects::{FsBackend, ObjectBackend, TempObject};
    use sluice::store::Store;
    use std::io::{self, Read};
    use std::path::PathBuf;

    struct Vanishing(FsBackend);
    impl ObjectBackend for Vanishing {
        fn create_temp(&self) -> io::Result<Box<dyn TempObject>> {
            self.0.create_temp()
        }
        fn open(&self, hash: &Hash) -> io::Result<Box<dyn Read + Send>> {
            self.0.open(hash)
        }
        fn exists(&self, hash: &Hash) -> bool {
            self.0.exists(hash)
        }
        fn size(&self, hash: &Hash) -> io::Result<u64> {
            self.0.size(hash)
        }
        fn list(&self) -> io::Result<(Vec<Hash>, Vec<PathBuf>)> {
            self.0.list()
        }
        fn describe(&self, hash: &Hash) -> PathBuf {
            self.0.describe(hash)
        }
        fn confirm_present(&self, hashes: &[Hash]) -> io::Result<Vec<Hash>> {
            Ok(hashes.iter().take(1).copied().collect())
        }
    }

    let s = Sandbox::with_store();
    s.file("orders.csv", "order_id,shop\nQ-1,Quillby Cycle Mend\n");
    let dir = s.path().join("sluice-store");
    let options = IngestOptions {
        dataset: "orders".into(),
        key: None,
        reason: Some("the depot's export".into()),
        delimiter: None,
        has_header: true,
        encoding: None,
        null_tokens: vec![],
        agent: Agent::new("Test Runner", Some("runner@example.org"), "option"),
    };
    let audit_before = Store::open(&dir)
        .unwrap()
        .lineage
        .audit_entries()
        .unwrap()
        .len();
    let mut store =
        Store::open_with_backend(&dir, Box::new(Vanishing(FsBackend::new(&dir)))).unwrap();
    let err = match intake::ingest(&mut store, &s.path().join("orders.csv"), &options) {
        Err(e) => e.to_string(),
        Ok(_) => panic!("a step naming a vanished object was recorded"),
    };
    drop(store);
    assert_contains(&err, "run the command again");
    let store = Store::open(&dir).unwrap();
    assert!(store.lineage.versions_of("orders").unwrap().is_empty());
    assert_eq!(store.lineage.audit_entries().unwrap().len(), audit_before);
    drop(store);
    let mut store = Store::open(&dir).unwrap();
    let done = intake::ingest(&mut store, &s.path().join("orders.csv"), &options).unwrap();
    assert!(matches!(done, IngestOutcome::Recorded { .. }));
    assert_contains(&s.ok(&["verify"]), "intact");
}
