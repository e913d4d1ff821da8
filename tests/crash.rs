//! Crash safety of real processes: `sluice receive` of a large generated export and `sluice run`
//! of a six-step plan are started as child processes and killed with SIGKILL at 50 moments
//! each, spread evenly over the measured duration of an unkilled run (deterministic delays,
//! not random ones). After every kill: `sluice verify` finds the store intact, the store holds
//! either the complete new version and its step or none of it, and running the same command
//! again succeeds and ends with the same bytes as the unkilled run.
//!
//! Every step of both plans works row by row, so the plans run fused: one pass computes every
//! step's output, then the steps are recorded one transaction each. These are the kill tests of
//! a fused run: a kill during the pass leaves nothing recorded, a kill while the steps are
//! recorded keeps the first k whole (the unkilled run is checked to have been fused: every
//! step started before the first one ended).
//!
//! The kill lands wherever the child happens to be at that delay, so the stages hit vary with
//! the machine's load; the delays themselves, and the checks, do not. The test prints how many
//! kills found nothing recorded, how many a complete result, and how many came after the
//! child had already exited.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;

const KILL_POINTS: u32 = 50;
const ROWS: u64 = 20_000;
/// Rows of the export the plan runs on: six steps in a debug build take about as long as
/// intake of `ROWS`.
const PLAN_ROWS: u64 = 2_500;

fn sluice(dir: &Path, args: &[&str]) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_sluice"));
    c.args(args)
        .current_dir(dir)
        .env("SLUICE_PERSON", PERSON)
        .env("SLUICE_EMAIL", EMAIL)
        .env("NO_COLOR", "1")
        .env_remove("SLUICE_STORE")
        .stdout(Stdio::null())
        .stderr(Stdio::null());
    c
}

fn ok_json(dir: &Path, args: &[&str]) -> serde_json::Value {
    let out = sluice(dir, args).stdout(Stdio::piped()).output().unwrap();
    assert!(
        out.status.success(),
        "sluice {} failed in {}",
        args.join(" "),
        dir.display()
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// The generated Quillby export (comma, LF, padded names, amounts as text, US dates).
fn export(at: &Path, rows: u64) -> PathBuf {
    let path = at.join("quillby_q3.csv");
    let mut f = std::io::BufWriter::new(std::fs::File::create(&path).unwrap());
    sluice::demo::work_orders(&mut f, sluice::demo::Till::Quillby, rows, 1).unwrap();
    drop(f);
    path
}

/// What kills found.
#[derive(Default, Debug)]
struct Tally {
    nothing: u32,
    complete: u32,
    partial_plan: u32,
    already_done: u32,
    /// Temporary files and folders the killed commands left in `tmp/`.
    leftovers: usize,
}

/// The entries of `tmp/` that process `pid` made (sluice names them `KIND-PID-...`).
fn leftovers(dir: &Path, pid: u32) -> Vec<String> {
    let mut found: Vec<String> = std::fs::read_dir(dir.join("sluice-store/tmp"))
        .map(|rd| {
            rd.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .filter(|n| n.split('-').nth(1) == Some(pid.to_string().as_str()))
                .collect()
        })
        .unwrap_or_default();
    found.sort();
    found
}

/// Kills `child` after `delay`; returns whether it was still running when killed.
fn kill_after(mut child: Child, delay: Duration) -> bool {
    let until = Instant::now() + delay;
    loop {
        if let Some(_status) = child.try_wait().unwrap() {
            return false;
        }
        let now = Instant::now();
        if now >= until {
            break;
        }
        std::thread::sleep((until - now).min(Duration::from_millis(2)));
    }
    // SIGKILL: Child::kill sends it on Unix.
    let _ = child.kill();
    let status = child.wait().unwrap();
    // A child that exited on its own between the last poll and the kill has a status code.
    status.code().is_none()
}

/// The duration of an unkilled run: the shorter of a run in a copy of `dir` and one in `dir`
/// itself (left with the result), so that a first run slowed by a cold cache does not push
/// most kill points past the end.
fn measure(dir: &Path, args: &[&str]) -> Duration {
    let mut best = Duration::MAX;
    let copy = tempfile::tempdir().unwrap();
    copy_dir(dir, copy.path());
    for at in [copy.path(), dir] {
        let t = Instant::now();
        let st = sluice(at, args).status().unwrap();
        assert!(
            st.success(),
            "the unkilled sluice {} failed",
            args.join(" ")
        );
        best = best.min(t.elapsed());
    }
    best
}

fn delays(total: Duration) -> impl Iterator<Item = Duration> {
    (0..KILL_POINTS).map(move |k| total.mul_f64(f64::from(k) / f64::from(KILL_POINTS)))
}

fn versions_of(dir: &Path, dataset: &str) -> Vec<serde_json::Value> {
    ok_json(dir, &["timeline", "--dataset", dataset, "--json"])
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|e| e["produced"].as_array().unwrap().clone())
        .collect()
}

fn assert_intact(dir: &Path, what: &str) -> serde_json::Value {
    let v = ok_json(dir, &["verify", "--json"]);
    assert_eq!(v["intact"], true, "{what}: verify found damage: {v}");
    v
}

#[test]
fn ingest_killed_at_fifty_moments_records_all_or_nothing() {
    let base = Sandbox::with_store();
    base.file(
        "seed.csv",
        "order_id,shop\nWO-1,Quillby Cycle Mend\nWO-2,Quillby Cycle Mend\n",
    );
    base.ok(&["receive", "seed.csv", "--as", "orders"]);
    let big = export(base.path(), ROWS);
    let big_arg = big.to_str().unwrap().to_string();
    let args = ["receive", big_arg.as_str(), "--as", "orders"];

    let reference = tempfile::tempdir().unwrap();
    copy_dir(
        &base.path().join("sluice-store"),
        &reference.path().join("sluice-store"),
    );
    let total = measure(reference.path(), &args);
    let want = versions_of(reference.path(), "orders");
    assert_eq!(want.len(), 2);
    let want_hash = want.iter().find(|v| v["seq"] == 2).unwrap()["hash"].clone();
    let audit_before = assert_intact(base.path(), "base")["audit_entries_checked"]
        .as_u64()
        .unwrap();

    let mut tally = Tally::default();
    for (k, delay) in delays(total).enumerate() {
        let dir = tempfile::tempdir().unwrap();
        copy_dir(
            &base.path().join("sluice-store"),
            &dir.path().join("sluice-store"),
        );
        let child = sluice(dir.path(), &args).spawn().unwrap();
        let pid = child.id();
        let killed = kill_after(child, delay);
        let what = format!("kill point {k} at {delay:?}");
        let left = leftovers(dir.path(), pid);
        tally.leftovers += left.len();
        let report = assert_intact(dir.path(), &what);
        let audit = report["audit_entries_checked"].as_u64().unwrap();
        let now = versions_of(dir.path(), "orders");
        match now.len() {
            1 => {
                assert_eq!(
                    audit, audit_before,
                    "{what}: an audit entry without its version"
                );
                tally.nothing += 1;
            }
            2 => {
                let v2 = now.iter().find(|v| v["seq"] == 2).unwrap();
                assert_eq!(v2["hash"], want_hash, "{what}: a different version");
                assert_eq!(v2["n_rows"], ROWS, "{what}");
                assert_eq!(audit, audit_before + 1, "{what}");
                if killed {
                    tally.complete += 1;
                } else {
                    tally.already_done += 1;
                }
            }
            n => panic!("{what}: {n} versions of orders"),
        }
        // Running it again succeeds and ends where the unkilled run did.
        let st = sluice(dir.path(), &args).status().unwrap();
        assert!(st.success(), "{what}: the rerun failed");
        assert_eq!(
            leftovers(dir.path(), pid),
            Vec::<String>::new(),
            "{what}: the rerun left the killed command's temporary files (there were {left:?})"
        );
        let after = versions_of(dir.path(), "orders");
        assert_eq!(after.len(), 2, "{what}: the rerun");
        assert_eq!(
            after.iter().find(|v| v["seq"] == 2).unwrap()["hash"],
            want_hash,
            "{what}: the rerun"
        );
        assert_intact(dir.path(), &format!("{what}, after the rerun"));
    }
    eprintln!(
        "crash: ingest of {ROWS} rows ({} bytes) took {total:?} unkilled; {KILL_POINTS} kill points: \
         {} left nothing recorded, {} a complete version and step, {} came after the child had exited; \
         {} temporary files left by the kills, all removed by the rerun",
        std::fs::metadata(&big).unwrap().len(),
        tally.nothing,
        tally.complete,
        tally.already_done,
        tally.leftovers
    );
    assert_eq!(
        tally.nothing + tally.complete + tally.already_done,
        KILL_POINTS
    );
    assert!(
        tally.nothing > 0,
        "no kill landed before the commit: {tally:?}"
    );
}

const PLAN: &str = r#"{
  "sluice_plan": 2,
  "purpose": "Quillby's Q3 work orders cleaned for the crash test",
  "sources": [{"dataset": "orders", "file": "quillby_q3.csv", "reason": "the till's Q3 export"}],
  "steps": [
    {"dataset": "orders", "clean": "trim", "settings": {"inner": true}, "reason": "padded names"},
    {"dataset": "orders", "clean": "case", "settings": {"columns": ["email"], "to": "lower"}, "reason": "case-blind addresses"},
    {"dataset": "orders", "clean": "number", "settings": {"columns": ["parts_cost"]}, "reason": "amounts as text"},
    {"dataset": "orders", "clean": "date", "settings": {"columns": ["opened"], "order": "mdy"}, "reason": "month first"},
    {"dataset": "orders", "clean": "dedupe", "reason": "orders exported twice"},
    {"dataset": "orders", "clean": "drop", "settings": {"predicate": "status = 'test'"}, "reason": "training orders"}
  ]
}"#;

const PLAN_STEPS: usize = 6;

#[test]
fn plan_run_killed_at_fifty_moments_keeps_whole_steps_only() {
    let base = Sandbox::with_store();
    export(base.path(), PLAN_ROWS);
    base.file("plan.json", PLAN);
    // The export is taken in first, so that the kills land in the steps.
    base.ok(&["receive", "quillby_q3.csv", "--as", "orders"]);
    let args = ["run", "plan.json"];

    let reference = tempfile::tempdir().unwrap();
    copy_dir(base.path(), reference.path());
    let total = measure(reference.path(), &args);
    let want = versions_of(reference.path(), "orders");
    assert_eq!(want.len(), 1 + PLAN_STEPS);
    let by_seq = |vs: &[serde_json::Value], seq: usize| {
        vs.iter().find(|v| v["seq"] == seq as u64).unwrap()["hash"].clone()
    };
    let final_hash = by_seq(&want, 1 + PLAN_STEPS);
    assert_fused(reference.path(), PLAN_STEPS);
    let audit_before = assert_intact(base.path(), "base")["audit_entries_checked"]
        .as_u64()
        .unwrap();

    let mut tally = Tally::default();
    let mut steps_seen = vec![0u32; PLAN_STEPS + 1];
    // One kill after `delay`: the store holds whole steps only, and running the plan again
    // ends with the unkilled run's bytes. Returns how many steps the killed run recorded,
    // whether the kill came before it ended, and how many temporary files it left.
    let kill_at = |k: usize, delay: Duration| -> (usize, bool, usize) {
        let dir = tempfile::tempdir().unwrap();
        copy_dir(base.path(), dir.path());
        let child = sluice(dir.path(), &args).spawn().unwrap();
        let pid = child.id();
        let killed = kill_after(child, delay);
        let what = format!("kill point {k} at {delay:?}");
        let left = leftovers(dir.path(), pid);
        let report = assert_intact(dir.path(), &what);
        let now = versions_of(dir.path(), "orders");
        let made = now.len() - 1;
        assert!(made <= PLAN_STEPS, "{what}: {made} steps");
        // Whole steps only: each version the run made is the one the unkilled run made at
        // that place, and each has exactly one audit entry.
        for seq in 1..=now.len() {
            assert_eq!(
                by_seq(&now, seq),
                by_seq(&want, seq),
                "{what}: orders:v{seq}"
            );
        }
        assert_eq!(
            report["audit_entries_checked"].as_u64().unwrap(),
            audit_before + made as u64,
            "{what}"
        );
        // Running the plan again succeeds and ends with the unkilled run's bytes.
        let st = sluice(dir.path(), &args).status().unwrap();
        assert!(st.success(), "{what}: the rerun failed");
        assert_eq!(
            leftovers(dir.path(), pid),
            Vec::<String>::new(),
            "{what}: the rerun left the killed command's temporary files (there were {left:?})"
        );
        let after = versions_of(dir.path(), "orders");
        assert_eq!(
            after.iter().max_by_key(|v| v["seq"].as_u64()).unwrap()["hash"],
            final_hash,
            "{what}: the rerun ended elsewhere"
        );
        assert_intact(dir.path(), &format!("{what}, after the rerun"));
        (made, killed, left.len())
    };
    let mut count = |(made, killed, left): (usize, bool, usize)| {
        tally.leftovers += left;
        steps_seen[made] += 1;
        match (made, killed) {
            (0, _) => tally.nothing += 1,
            (PLAN_STEPS, false) => tally.already_done += 1,
            (PLAN_STEPS, true) => tally.complete += 1,
            _ => tally.partial_plan += 1,
        }
        made
    };
    // Moments spread over the unkilled run's time and as long again, since a loaded machine
    // runs the killed copies slower than the measured one.
    let (mut before, mut after) = (Duration::ZERO, total * 2);
    let mut landed = false;
    for (k, delay) in delays(total * 2).enumerate() {
        match count(kill_at(k, delay)) {
            0 => before = before.max(delay),
            PLAN_STEPS => after = after.min(delay),
            _ => landed = true,
        }
    }
    // A one-pass run records its steps together at its end, a short window: if no kill landed
    // in it, halve the interval between the latest kill that found no step and the earliest
    // that found them all, up to twenty more times.
    let mut k = KILL_POINTS as usize;
    while !landed && k < KILL_POINTS as usize + 20 && before < after {
        let mid = before + (after - before) / 2;
        match count(kill_at(k, mid)) {
            0 => before = mid,
            PLAN_STEPS => after = mid,
            _ => landed = true,
        }
        k += 1;
    }
    eprintln!(
        "crash: plan of {PLAN_STEPS} steps on {PLAN_ROWS} rows took {total:?} unkilled; {k} kill points: \
         {} before the first step was recorded, {} after some of the steps, {} after all of them \
         (killed), {} after the child had exited; steps recorded when killed: {steps_seen:?}; \
         {} temporary files left by the kills, all removed by the rerun",
        tally.nothing,
        tally.partial_plan,
        tally.complete,
        tally.already_done,
        tally.leftovers
    );
    assert!(
        tally.partial_plan > 0,
        "no kill landed between steps: {tally:?}"
    );
}

/// The last `n` operation steps of the store in `dir` were computed in one pass: each started
/// before the first of them ended (one at a time, each starts after the one before ended).
fn assert_fused(dir: &Path, n: usize) {
    let db = rusqlite::Connection::open(dir.join("sluice-store").join("lineage.db")).unwrap();
    let mut q = db
        .prepare("SELECT started_at, ended_at FROM steps WHERE kind = 'operation' ORDER BY id")
        .unwrap();
    let times: Vec<(String, String)> = q
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    let last = &times[times.len() - n..];
    for (k, (started, _)) in last.iter().enumerate() {
        assert!(
            started <= &last[0].1,
            "step {} of the run started at {started}, after the first ended at {}: the run was not fused",
            k + 1,
            last[0].1
        );
    }
}

/// Runs `args` in fresh copies of `base`, each stopped (`stop`: the process ends at once, as
/// if killed) or failed (`fail`: that write, sync or rename returns an error) at its Nth I/O
/// point of object writes, N = 1, 2, ... until a run passes them all (debug builds read
/// `SLUICE_TEST_IO_POINT`). After each: `verify` finds the store intact, `dataset` holds a
/// prefix of the unstopped run's versions, a failure leaves no temporary file behind, and running the command again ends with the unstopped run's bytes. Returns the
/// number of I/O points.
fn every_io_point(base: &Path, args: &[&str], dataset: &str, mode: &str) -> u64 {
    let reference = tempfile::tempdir().unwrap();
    copy_dir(base, reference.path());
    assert!(sluice(reference.path(), args).status().unwrap().success());
    let want = versions_of(reference.path(), dataset);
    let by_seq = |vs: &[serde_json::Value], seq: usize| {
        vs.iter().find(|v| v["seq"] == seq as u64).unwrap()["hash"].clone()
    };
    let last = by_seq(&want, want.len());
    for n in 1u64.. {
        let dir = tempfile::tempdir().unwrap();
        copy_dir(base, dir.path());
        let status = sluice(dir.path(), args)
            .env("SLUICE_TEST_IO_POINT", format!("{mode}:{n}"))
            .status()
            .unwrap();
        let what = format!("sluice {} with {mode} at I/O point {n}", args.join(" "));
        let report = assert_intact(dir.path(), &what);
        let known = sluice(dir.path(), &["about", dataset])
            .status()
            .unwrap()
            .success();
        let now = if known {
            versions_of(dir.path(), dataset)
        } else {
            Vec::new()
        };
        for seq in 1..=now.len() {
            assert_eq!(
                by_seq(&now, seq),
                by_seq(&want, seq),
                "{what}: {dataset}@{seq}"
            );
        }
        if status.success() {
            assert_eq!(now.len(), want.len(), "{what}: finished short");
            return n - 1;
        }
        match mode {
            "stop" => assert_eq!(status.code(), Some(86), "{what}: did not stop there"),
            _ => {
                assert!(
                    matches!(status.code(), Some(1 | 2)),
                    "{what}: did not fail as an error: {status:?}"
                );
                // An object the command published before a later one failed stays, unreferenced
                // (never read; `reclaim` removes it); no temporary file does.
                assert_eq!(report["leftover_temp_files"], 0, "{what}: {report}");
            }
        }
        assert!(
            sluice(dir.path(), args).status().unwrap().success(),
            "{what}: the rerun failed"
        );
        let after = versions_of(dir.path(), dataset);
        assert_eq!(
            after.iter().max_by_key(|v| v["seq"].as_u64()).unwrap()["hash"],
            last,
            "{what}: the rerun ended elsewhere"
        );
        assert_intact(dir.path(), &format!("{what}, after the rerun"));
    }
    unreachable!()
}

const SHORT_PLAN: &str = r#"{
  "sluice_plan": 2,
  "purpose": "Quillby's Q3 work orders, three steps, for the I/O point test",
  "sources": [{"dataset": "orders", "file": "quillby_q3.csv", "reason": "the till's Q3 export"}],
  "steps": [
    {"dataset": "orders", "clean": "trim", "settings": {"inner": true}, "reason": "padded names"},
    {"dataset": "orders", "clean": "number", "settings": {"columns": ["parts_cost"]}, "reason": "amounts as text"},
    {"dataset": "orders", "clean": "dedupe", "reason": "orders exported twice"}
  ]
}"#;

#[test]
fn every_io_point_of_ingest_apply_and_run_stopped_or_failed() {
    let base = Sandbox::with_store();
    export(base.path(), PLAN_ROWS);
    base.file("plan.json", SHORT_PLAN);
    let ingest = ["receive", "quillby_q3.csv", "--as", "orders"];
    let apply = ["clean", "orders", "trim", "--why", "padded names"];
    let mut counts = Vec::new();
    for mode in ["stop", "fail"] {
        counts.push(every_io_point(base.path(), &ingest, "orders", mode));
    }
    base.ok(&ingest);
    for mode in ["stop", "fail"] {
        counts.push(every_io_point(base.path(), &apply, "orders", mode));
        counts.push(every_io_point(
            base.path(),
            &["run", "plan.json"],
            "orders",
            mode,
        ));
    }
    eprintln!("crash: I/O points of ingest, ingest, apply, run, apply, run: {counts:?}");
    // Two objects for an intake (table, row index), three for each step (and provenance).
    assert!(counts.iter().all(|&c| c >= 8), "{counts:?}");
}
