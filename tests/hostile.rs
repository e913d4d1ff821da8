//! Hostile and broken input: a corpus of broken CSV files, generated here (the big ones are
//! never committed), each taken in by the real binary. Each gives either a clear error with its
//! position or the handling README documents, never a panic; the store is unchanged after a
//! refusal; and the child's peak resident memory (from `wait4`'s resource usage) stays under a
//! stated bound. The figures are printed (`--nocapture`).
//!
//! A child's peak as `wait4` reports it is at least the peak of this test process when it
//! started the child (Linux carries the figure across `execve`), and the tests of this file run
//! in parallel in one process, so the files are written a piece at a time and the bounds leave
//! room for that floor (up to about 70 MiB here; run one test alone for exact figures).
//!
//! The bounds: intake keeps a few 1 MiB pieces in flight and the parser's record buffer, which
//! holds one record, so memory grows with the longest record and the number of columns, not
//! with the file. `BASE_MIB` covers the binary, SQLite and the pieces; a huge field adds a few
//! copies of itself (the record buffer, the profile's min and max).

mod common;

use std::io::Write;
use std::os::unix::process::ExitStatusExt;
use std::path::Path;
use std::process::{Command, Stdio};

use common::*;

/// Peak memory allowed for any file of ordinary records, in MiB.
const BASE_MIB: u64 = 64;

struct Measured {
    code: i32,
    stderr: String,
    stdout: String,
    peak_kib: u64,
}

/// Runs sluice in `dir` and reports its exit code, output and peak resident memory.
fn measured(dir: &Path, args: &[&str]) -> Measured {
    let out_path = dir.join(".hostile-out");
    let err_path = dir.join(".hostile-err");
    #[allow(clippy::zombie_processes)]
    let child = Command::new(env!("CARGO_BIN_EXE_sluice"))
        .args(args)
        .current_dir(dir)
        .env("SLUICE_PERSON", PERSON)
        .env("SLUICE_EMAIL", EMAIL)
        .env("NO_COLOR", "1")
        .env_remove("SLUICE_STORE")
        .stdin(Stdio::null())
        .stdout(std::fs::File::create(&out_path).unwrap())
        .stderr(std::fs::File::create(&err_path).unwrap())
        .spawn()
        .expect("start sluice");
    // The child is reaped by wait4 below (for its resource usage), not by Child::wait; the
    // handle is forgotten so that it never waits a second time.
    let pid = child.id() as libc::pid_t;
    std::mem::forget(child);
    let mut status: libc::c_int = 0;
    // SAFETY: an all-zero rusage is a valid value of the plain C struct.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: `pid` is our own child, not yet waited for; both pointers point at live locals.
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    assert_eq!(r, pid, "wait4 failed: {}", std::io::Error::last_os_error());
    let st = std::process::ExitStatus::from_raw(status);
    let stderr = std::fs::read_to_string(&err_path).unwrap_or_default();
    // A large output (a comparison's listing) is kept by its start and end only, so that this
    // process's own memory stays small (see the top of the file).
    let stdout = {
        use std::io::{Read, Seek};
        let mut f = std::fs::File::open(&out_path).unwrap();
        let len = f.metadata().unwrap().len();
        if len <= 4 << 20 {
            std::fs::read_to_string(&out_path).unwrap_or_default()
        } else {
            let mut head = vec![0u8; 1 << 20];
            f.read_exact(&mut head).unwrap();
            f.seek(std::io::SeekFrom::End(-(64 << 10))).unwrap();
            let mut tail = Vec::new();
            f.read_to_end(&mut tail).unwrap();
            format!(
                "{}\n[...]\n{}",
                String::from_utf8_lossy(&head),
                String::from_utf8_lossy(&tail)
            )
        }
    };
    std::fs::remove_file(&out_path).unwrap();
    std::fs::remove_file(&err_path).unwrap();
    Measured {
        code: st.code().unwrap_or(-1),
        stderr,
        stdout,
        // ru_maxrss is in KiB on Linux (getrusage(2)).
        peak_kib: usage.ru_maxrss as u64,
    }
}

/// What a file of the corpus must do.
enum Expect {
    /// Refused with exit code 2; stderr holds each text; the store is unchanged.
    Refused(&'static [&'static str]),
    /// Taken in with this many data rows (and stderr holds each text).
    Taken(u64, &'static [&'static str]),
}

fn check(s: &Sandbox, name: &str, bytes: &[u8], expect: Expect, bound_mib: u64) -> u64 {
    let file = s.file(&format!("corpus/{name}"), bytes);
    check_file(s, name, &file, bytes.len() as u64, expect, bound_mib)
}

/// Writes `head`, then `n` copies of `fill` and then `tail` to `path`, a piece at a time: the
/// test process itself must stay small, since a child's peak memory as `wait4` reports it is at
/// least the peak of the process that started it (Linux carries it across `execve`).
fn write_filled(path: &Path, head: &[u8], fill: &[u8], n: usize, tail: &[u8]) -> u64 {
    let mut f = std::io::BufWriter::with_capacity(1 << 20, std::fs::File::create(path).unwrap());
    f.write_all(head).unwrap();
    for _ in 0..n {
        f.write_all(fill).unwrap();
    }
    f.write_all(tail).unwrap();
    f.flush().unwrap();
    (head.len() + fill.len() * n + tail.len()) as u64
}

fn check_file(
    s: &Sandbox,
    name: &str,
    file: &Path,
    n_bytes: u64,
    expect: Expect,
    bound_mib: u64,
) -> u64 {
    let dataset = name.replace(['.', '-'], "_");
    let before = s.snapshot();
    let m = measured(
        s.path(),
        &["receive", file.to_str().unwrap(), "--as", &dataset],
    );
    std::fs::remove_file(file).unwrap();
    assert!(
        !m.stderr.contains("panicked"),
        "{name}: sluice panicked:\n{}",
        m.stderr
    );
    let peak_mib = m.peak_kib.div_ceil(1024);
    match expect {
        Expect::Refused(texts) => {
            assert_eq!(
                m.code, 2,
                "{name}: expected a refusal:\n{}{}",
                m.stdout, m.stderr
            );
            for t in texts {
                assert_contains(&m.stderr, t);
            }
            assert_eq!(before, s.snapshot(), "{name}: a refusal changed the store");
        }
        Expect::Taken(rows, texts) => {
            assert_eq!(m.code, 0, "{name}: expected intake:\n{}", m.stderr);
            for t in texts {
                assert_contains(&m.stderr, t);
            }
            // Only the row count is read: a whole JSON tree of 100,000 columns' profiles would
            // raise this process's own peak, which the next child's figure starts from.
            #[derive(serde::Deserialize)]
            struct About {
                version: Counted,
            }
            #[derive(serde::Deserialize)]
            struct Counted {
                n_rows: u64,
            }
            let about: About = serde_json::from_str(&s.ok(&["about", &dataset, "--json"]))
                .unwrap_or_else(|e| panic!("{name}: `about --json` is not what it should be: {e}"));
            assert_eq!(about.version.n_rows, rows, "{name}");
        }
    }
    assert!(
        peak_mib <= bound_mib,
        "{name}: peak memory {peak_mib} MiB is over the bound of {bound_mib} MiB"
    );
    eprintln!(
        "hostile: {name} ({n_bytes} bytes): exit {}, peak {peak_mib} MiB (bound {bound_mib} MiB)",
        m.code
    );
    peak_mib
}

#[test]
fn broken_csv_corpus_gets_clear_errors_or_documented_handling_within_memory_bounds() {
    let s = Sandbox::with_store();
    let header = b"order_id,shop,amount\n";
    let with = |body: &[u8]| [header.as_slice(), body].concat();

    check(
        &s,
        "ragged.csv",
        &with(b"WO-1,Quillby Cycle Mend,12.50\nWO-2,Quillby Cycle Mend\n"),
        Expect::Refused(&["record 2 (line 3, byte 51)", "expected 3 fields, found 2"]),
        BASE_MIB,
    );
    check(
        &s,
        "invalid-utf8.csv",
        &with(b"WO-1,Quillby Cycle M\xe9nd,12.50\n"),
        Expect::Refused(&[
            "line 2 (byte 41)",
            "invalid UTF-8",
            "--encoding windows-1252",
        ]),
        BASE_MIB,
    );
    check(
        &s,
        "nul.csv",
        &with(b"WO-1,Quillby\0Cycle Mend,12.50\n"),
        Expect::Refused(&["byte 33", "a NUL byte (0x00)"]),
        BASE_MIB,
    );
    check(
        &s,
        "unterminated-quote.csv",
        &with(b"WO-1,\"Quillby Cycle Mend,12.50\nWO-2,Oxwater Wheelworks,8.00\n"),
        Expect::Refused(&["line 2", "quote"]),
        BASE_MIB,
    );
    check(
        &s,
        "only-newlines.csv",
        b"\n\n\n\r\n\n",
        Expect::Refused(&["only blank lines"]),
        BASE_MIB,
    );
    check(
        &s,
        "only-header.csv",
        header,
        Expect::Taken(0, &[]),
        BASE_MIB,
    );
    // Bytes of a compressed file (a gzip header, then noise): the NUL at byte 3 is named as
    // the sign of a binary file, ahead of the invalid UTF-8 at byte 1.
    let mut binary = vec![0x1f, 0x8b, 0x08, 0x00];
    let mut x: u32 = 2_463_534_242;
    for _ in 0..65_536 {
        // xorshift32 (Marsaglia 2003), for bytes that look like compressed data.
        x ^= x << 13;
        x ^= x >> 17;
        x ^= x << 5;
        binary.push(x as u8);
    }
    check(
        &s,
        "binary.csv",
        &binary,
        Expect::Refused(&[
            "line 1 (byte 3)",
            "a NUL byte (0x00); this looks like a binary file",
        ]),
        BASE_MIB,
    );
    // CR alone ends records (as in files from classic Mac OS); documented in README.
    check(
        &s,
        "cr-only.csv",
        b"order_id,shop,amount\rWO-1,Quillby Cycle Mend,12.50\rWO-2,Oxwater Wheelworks,8.00\r",
        Expect::Taken(2, &[]),
        BASE_MIB,
    );
    check(
        &s,
        "mixed-endings.csv",
        &with(b"WO-1,Quillby Cycle Mend,12.50\r\nWO-2,Oxwater Wheelworks,8.00\nWO-3,Fennmarsh Bike Clinic,1.00\rWO-4,Quillby Cycle Mend,2.00\n"),
        Expect::Taken(4, &[]),
        BASE_MIB,
    );
    // A byte-order mark after the start is text (U+FEFF) inside its field, kept as it is.
    check(
        &s,
        "bom-in-the-middle.csv",
        &with(b"WO-1,\xef\xbb\xbfQuillby Cycle Mend,12.50\n\xef\xbb\xbfWO-2,Oxwater Wheelworks,8.00\n"),
        Expect::Taken(2, &[]),
        BASE_MIB,
    );
    let kept = s.ok(&["retrieve", "bom_in_the_middle_csv"]);
    assert_contains(&kept, "WO-1,\u{feff}Quillby Cycle Mend");

    // One field of 50 MB (quoted, with line breaks and doubled quotes inside), past the 32 MiB
    // bound on one record: refused where the record starts.
    let chunk = b"the customer says \"\"the brakes squeal\"\" again\nand again, ";
    std::fs::create_dir_all(s.path().join("corpus")).unwrap();
    let big = s.path().join("corpus/one-50mb-field.csv");
    let n = write_filled(
        &big,
        b"order_id,notes\nWO-1,\"",
        chunk,
        50_000_000 / chunk.len() + 1,
        b"\"\nWO-2,short\n",
    );
    check_file(
        &s,
        "one-50mb-field.csv",
        &big,
        n,
        Expect::Refused(&[
            "record 1 (line 2, byte 15)",
            "more than 32 MiB, the bound on one record",
            "--max-record-mib",
        ]),
        BASE_MIB + 2 * 32,
    );

    // 100,000 columns, two rows.
    let n = 100_000;
    let mut wide = Vec::new();
    for i in 0..n {
        write!(wide, "{}c{i}", if i > 0 { "," } else { "" }).unwrap();
    }
    wide.push(b'\n');
    for r in 0..2 {
        for i in 0..n {
            write!(wide, "{}{}", if i > 0 { "," } else { "" }, i * 3 + r).unwrap();
        }
        wide.push(b'\n');
    }
    check(
        &s,
        "wide-100000-columns.csv",
        &wide,
        Expect::Taken(2, &[]),
        BASE_MIB + 256,
    );
    assert_intact(&s);
}

fn assert_intact(s: &Sandbox) {
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
}

#[test]
fn a_file_that_grows_while_it_is_read_is_refused_and_the_store_is_unchanged() {
    let s = Sandbox::with_store();
    let path = s.path().join("growing.csv");
    let mut f = std::fs::File::create(&path).unwrap();
    writeln!(f, "order_id,shop,amount").unwrap();
    let line = b"WO-1,Quillby Cycle Mend,12.50\n";
    for _ in 0..400_000 {
        f.write_all(line).unwrap();
    }
    f.flush().unwrap();
    let before = s.snapshot();
    // A writer keeps appending whole lines until the ingest has finished.
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let writer = {
        let stop = stop.clone();
        std::thread::spawn(move || {
            let mut appended = 0u64;
            while !stop.load(std::sync::atomic::Ordering::SeqCst) {
                f.write_all(line).unwrap();
                appended += 1;
                std::thread::sleep(std::time::Duration::from_micros(200));
            }
            appended
        })
    };
    let m = measured(s.path(), &["receive", "growing.csv", "--as", "orders"]);
    stop.store(true, std::sync::atomic::Ordering::SeqCst);
    let appended = writer.join().unwrap();
    assert_eq!(m.code, 2, "{}", m.stderr);
    assert_contains(
        &m.stderr,
        "growing.csv: the file changed while it was being read",
    );
    assert_eq!(before, s.snapshot());
    eprintln!(
        "hostile: growing.csv refused after {appended} lines were appended during the read; peak {} MiB",
        m.peak_kib.div_ceil(1024)
    );
    assert!(m.peak_kib / 1024 <= BASE_MIB);
}

/// Rule files, plans and mapping tables that are malformed, name missing columns, or are huge
/// (a 100,000-step plan and a 100,000-rule file, each broken at its end): a clear error with
/// the position (file, line, column) or the missing name and the columns there are; nothing
/// recorded; memory bounded.
#[test]
fn malformed_missing_and_huge_rules_plans_and_tables_are_refused_with_positions() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,service\n1,tune\n2,flat\n");
    s.ok(&["receive", "o.csv", "--as", "o"]);
    let before = s.snapshot();
    let refused = |name: &str, content: &[u8], args: &[&str], texts: &[&str]| {
        s.file(name, content);
        let m = measured(s.path(), args);
        // 2: the file is malformed or names what is not there; 1: the data in it is wrong
        // (README, exit codes).
        let code = if name == "twice.csv" { 1 } else { 2 };
        assert_eq!(m.code, code, "{name}: expected a refusal:\n{}", m.stderr);
        assert!(!m.stderr.contains("panicked"), "{name}: {}", m.stderr);
        for t in texts {
            assert_contains(&m.stderr, t);
        }
        let peak = m.peak_kib.div_ceil(1024);
        assert!(peak <= BASE_MIB + 64, "{name}: peak {peak} MiB");
        eprintln!(
            "hostile: {name} ({} bytes) refused, peak {peak} MiB: {}",
            content.len(),
            m.stderr.lines().next().unwrap_or("")
        );
    };
    refused(
        "misspelt.json",
        b"{\"sluice_rules\": 2, \"rules\": [{\"dimension\": \"uniqueness\",\n \"colums\": [\"id\"]}]}",
        &["inspect", "o", "--rules", "misspelt.json"],
        &["misspelt.json: line 2, column 9: unknown field `colums`"],
    );
    refused(
        "missing.json",
        b"{\"sluice_rules\": 2, \"rules\": [{\"dimension\": \"uniqueness\", \"columns\": [\"technician\"]}]}",
        &["inspect", "o", "--rules", "missing.json"],
        &["\"technician\", which is not in o:v1; its columns are: id, service"],
    );
    let mut rules = String::from("{\"sluice_rules\": 2, \"rules\": [\n");
    for _ in 0..100_000 {
        rules.push_str("{\"dimension\": \"completeness\", \"columns\": [\"id\"]},\n");
    }
    rules.push_str("{\"dimension\": \"completeness\", \"columns\": [\"id\"]}\n");
    refused(
        "huge-rules.json",
        rules.as_bytes(),
        &["inspect", "o", "--rules", "huge-rules.json"],
        &["huge-rules.json: line 100003, column 0: EOF while parsing"],
    );
    let mut plan = String::from(
        "{\"sluice_plan\": 2, \"sources\": [{\"dataset\": \"o\", \"file\": \"o.csv\"}], \"steps\": [\n",
    );
    for _ in 0..100_000 {
        plan.push_str("{\"dataset\": \"o\", \"clean\": \"trim\", \"reason\": \"x\"},\n");
    }
    plan.push_str("{\"dataset\": \"o\", \"clean\": \"trim\", \"reason\": \"x\"}]\n");
    refused(
        "huge-plan.json",
        plan.as_bytes(),
        &["run", "huge-plan.json"],
        &["huge-plan.json: line 100003, column 0"],
    );
    let mut plan = String::from(
        "{\"sluice_plan\": 2, \"sources\": [{\"dataset\": \"o\", \"file\": \"o.csv\"}], \"steps\": [\n",
    );
    for _ in 0..10_000 {
        plan.push_str("{\"dataset\": \"o\", \"clean\": \"trim\", \"reason\": \"x\"},\n");
    }
    plan.push_str("{\"dataset\": \"o\", \"clean\": \"trim\", \"reason\": \"x\"}]}\n");
    refused(
        "10001-steps.json",
        plan.as_bytes(),
        &["run", "10001-steps.json"],
        &["the plan has 10001 steps, more than the 10000 a plan may have"],
    );
    let mut plan = String::from("{\"sluice_plan\": 2, \"sources\": [], \"steps\": []");
    plan.push_str(&" ".repeat(17 << 20));
    plan.push('}');
    refused(
        "17mib-plan.json",
        plan.as_bytes(),
        &["run", "17mib-plan.json"],
        &["17mib-plan.json: the plan is more than the 16 MiB it may be"],
    );
    drop(plan);
    // A plan of 4 GiB (a sparse file of NUL bytes, which are UTF-8): read only up to the bound,
    // so memory stays small; before, the whole file was read before its size was checked.
    let sparse = s.path().join("4gib-plan.json");
    std::fs::File::create(&sparse)
        .unwrap()
        .set_len(4 << 30)
        .unwrap();
    let m = measured(s.path(), &["run", "4gib-plan.json"]);
    assert_eq!(m.code, 2, "{}", m.stderr);
    assert_contains(
        &m.stderr,
        "4gib-plan.json: the plan is more than the 16 MiB it may be",
    );
    let peak = m.peak_kib.div_ceil(1024);
    assert!(peak <= BASE_MIB + 64, "4 GiB plan: peak {peak} MiB");
    eprintln!("hostile: a 4 GiB plan refused after 16 MiB were read, peak {peak} MiB");
    std::fs::remove_file(&sparse).unwrap();
    refused(
        "missing-column-plan.json",
        b"{\"sluice_plan\": 2, \"sources\": [{\"dataset\": \"o\", \"file\": \"o.csv\"}],\n \"steps\": [{\"dataset\": \"o\", \"clean\": \"trim\", \"settings\": {\"columns\": [\"shop\"]}, \"reason\": \"x\"}]}",
        &["run", "missing-column-plan.json"],
        &["plan entry 1 (trim on o)", "column \"shop\" is not in o:v1; its columns are: id, service"],
    );
    refused(
        "twice.csv",
        b"label,name\ntune,Tune-up\ntune,Full service\n",
        &[
            "clean",
            "o",
            "map",
            "--columns",
            "service",
            "--table",
            "twice.csv",
            "--why",
            "t",
        ],
        &["gives more than one value for: \"tune\" (data row 1 gives \"Tune-up\", data row 2 \"Full service\")"],
    );
    refused(
        "one-column.csv",
        b"label\ntune\n",
        &[
            "clean",
            "o",
            "map",
            "--columns",
            "service",
            "--table",
            "one-column.csv",
            "--why",
            "t",
        ],
        &["has 1 column; name the two to use with --from COL --to COL"],
    );
    refused(
        "labels.csv",
        b"label,name\ntune,Tune-up\n",
        &[
            "clean",
            "o",
            "map",
            "--columns",
            "service",
            "--table",
            "labels.csv",
            "--from",
            "written",
            "--why",
            "t",
        ],
        &[
            "column \"written\" is not in the mapping table",
            "its columns are: label, name",
        ],
    );
    assert_eq!(before, s.snapshot(), "a refusal recorded something");
}

/// Predicates built to exhaust the stack or the parser, given in plans (a single argument is
/// limited to 128 KiB by Linux): 10,300 nested parentheses and 40,000 nested `not`s are refused
/// at the column where the nesting passes the limit; a flat `or` of 40,000 tests is read in one
/// pass and evaluated. No abort, memory bounded.
#[test]
fn predicates_nested_past_the_limit_are_refused_and_long_chains_run() {
    let s = Sandbox::with_store();
    s.file("o.csv", "id,status\n1,open\n2,cancelled\n3,open\n");
    let plan = |name: &str, pred: &str| {
        let text = serde_json::json!({
            "sluice_plan": 2,
            "sources": [{"dataset": "o", "file": "o.csv"}],
            "steps": [{"dataset": "o", "clean": "drop", "settings": {"predicate": pred}, "reason": "hostile"}],
        });
        s.file(name, text.to_string());
    };
    for (name, pred, col) in [
        (
            "10,300 parentheses",
            format!("{}status = 'x'{}", "(".repeat(10_300), ")".repeat(10_300)),
            201,
        ),
        (
            "40,000 nots",
            format!("{}status = 'x'", "not ".repeat(40_000)),
            801,
        ),
    ] {
        plan("deep.json", &pred);
        let m = measured(s.path(), &["run", "deep.json"]);
        assert_eq!(m.code, 2, "{name}: {}", m.stderr);
        assert!(!m.stderr.contains("overflow"), "{name}: {}", m.stderr);
        assert_contains(
            &m.stderr,
            &format!("column {col}: parentheses and \"not\" nest more than 200 deep"),
        );
        assert!(
            m.stderr.len() < 1000,
            "{name}: the message is short: {}",
            m.stderr.len()
        );
        let peak = m.peak_kib.div_ceil(1024);
        assert!(peak <= 2 * BASE_MIB, "{name}: peak {peak} MiB");
        eprintln!("hostile: predicate of {name} refused, peak {peak} MiB");
    }
    let wide = vec!["status = 'nope'"; 40_000].join(" or ") + " or status = 'cancelled'";
    plan("wide.json", &wide);
    let m = measured(s.path(), &["run", "wide.json"]);
    assert_eq!(m.code, 0, "{}", m.stderr);
    let peak = m.peak_kib.div_ceil(1024);
    assert!(peak <= 2 * BASE_MIB, "40,000 alternatives: peak {peak} MiB");
    assert_eq!(s.ok(&["retrieve", "o"]), "id,status\n1,open\n3,open\n");
    eprintln!(
        "hostile: predicate of 40,001 alternatives ({} bytes) ran, peak {peak} MiB",
        wide.len()
    );
}

/// Files built to fill memory through one record: a single line of 96 MiB, a header line of
/// 64 MiB, one cell of 40 MiB. Each is refused at the documented bound (32 MiB a record) with
/// the file, line and byte, in bounded memory; with the bound raised (`--max-record-mib`) the
/// cell is taken in, and its column's profile keeps only the value's start, so the database
/// grows by kilobytes, not by the cell.
#[test]
fn one_huge_record_is_refused_at_the_bound_and_a_raised_bound_keeps_the_profile_small() {
    let s = Sandbox::with_store();
    let kib = [0u8; 1024];
    // (file, head, fill byte, KiB of it, tail, where the refusal must point)
    type Case<'a> = (&'a str, &'a [u8], u8, usize, &'a [u8], &'a str);
    let cases: [Case<'_>; 3] = [
        (
            "one-line.csv",
            b"",
            b'x',
            96 << 10,
            b"",
            "record 0 (line 1, byte 0)",
        ),
        (
            "long-header.csv",
            b"",
            b'h',
            64 << 10,
            b",b\n1,2\n",
            "record 0 (line 1, byte 0)",
        ),
        (
            "huge-cell.csv",
            b"id,notes\nWO-1,",
            b'n',
            40 << 10,
            b"\nWO-2,ok\n",
            "record 1 (line 2, byte 9)",
        ),
    ];
    let before = s.snapshot();
    for (name, head, fill, n, tail, place) in cases {
        let file = s.path().join(name);
        let size = write_filled(&file, head, &kib.map(|_| fill), n, tail);
        let m = measured(
            s.path(),
            &["receive", file.to_str().unwrap(), "--as", "big"],
        );
        assert_eq!(m.code, 2, "{name}: {}", m.stderr);
        assert_contains(&m.stderr, name);
        assert_contains(&m.stderr, place);
        assert_contains(&m.stderr, "more than 32 MiB, the bound on one record");
        let peak = m.peak_kib.div_ceil(1024);
        assert!(peak <= BASE_MIB + 2 * 32, "{name}: peak {peak} MiB");
        eprintln!("hostile: {name} ({size} bytes) refused, peak {peak} MiB");
    }
    assert_eq!(before, s.snapshot());
    let db_before = std::fs::metadata(s.path().join("sluice-store/lineage.db"))
        .unwrap()
        .len();
    let m = measured(
        s.path(),
        &[
            "receive",
            "huge-cell.csv",
            "--as",
            "big",
            "--max-record-mib",
            "64",
        ],
    );
    assert_eq!(m.code, 0, "{}", m.stderr);
    let peak = m.peak_kib.div_ceil(1024);
    assert!(peak <= BASE_MIB + 4 * 40, "raised bound: peak {peak} MiB");
    let v = s.json(&["about", "big", "--json"]);
    let text = v.to_string();
    assert!(
        text.len() < 20_000,
        "show keeps the profile short: {} bytes",
        text.len()
    );
    // "nnn..." sorts before "ok": the cut value is the column's smallest.
    let min = v["profile"][1]["min"].as_str().unwrap();
    assert_eq!(min, format!("{}\u{2026}", "n".repeat(256)), "{v}");
    let shown = s.ok(&["about", "big"]);
    assert_contains(
        &shown,
        "the profile keeps a min or max longer than 256 bytes as its start",
    );
    s.ok(&["verify"]);
    let c = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    c.execute_batch("PRAGMA wal_checkpoint(TRUNCATE)").unwrap();
    drop(c);
    let grew = std::fs::metadata(s.path().join("sluice-store/lineage.db"))
        .unwrap()
        .len()
        - db_before;
    assert!(grew < 1 << 20, "the database grew by {grew} bytes");
    eprintln!("hostile: a 40 MiB cell taken with --max-record-mib 64, peak {peak} MiB, database grew by {grew} bytes");
}

/// Writes a zip archive holding `parts` (name, content made by the closure, which writes into
/// the compressed entry a piece at a time), deflated.
/// What writes one part of a generated archive.
type Fill<'a> = &'a dyn Fn(&mut dyn Write);

fn write_zip(path: &Path, parts: &[(&str, Fill<'_>)]) {
    let mut z = zip::ZipWriter::new(std::fs::File::create(path).unwrap());
    let opts = zip::write::SimpleFileOptions::default()
        .compression_method(zip::CompressionMethod::Deflated)
        .compression_level(Some(1))
        .large_file(true);
    for (name, fill) in parts {
        z.start_file(*name, opts).unwrap();
        fill(&mut z);
    }
    z.finish().unwrap();
}

/// Workbooks built to exhaust memory: a sheet whose XML inflates far past its file (a few
/// hundred KiB of .xlsx, 160 MiB of XML), and a sheet of two cells at opposite corners of the
/// grid (A1 and XFD1048576, a range of 17 billion cells). Both are refused before the
/// workbook is read, with the bound named, in bounded memory.
#[test]
fn workbooks_that_inflate_or_span_the_grid_are_refused_before_they_are_read() {
    let s = Sandbox::with_store();
    let head = b"<?xml version=\"1.0\"?><worksheet xmlns=\"http://schemas.openxmlformats.org/spreadsheetml/2006/main\"><sheetData>";
    let tail = b"</sheetData></worksheet>";
    let padded = |w: &mut dyn Write| {
        w.write_all(head).unwrap();
        // White space between elements: XML that holds nothing and compresses to almost nothing.
        let block = vec![b' '; 1 << 20];
        let mut n = 0usize;
        while n < 160 << 20 {
            w.write_all(&block).unwrap();
            n += block.len();
        }
        w.write_all(tail).unwrap();
    };
    let corners = |w: &mut dyn Write| {
        w.write_all(head).unwrap();
        w.write_all(b"<row r=\"1\"><c r=\"A1\" t=\"inlineStr\"><is><t>order_id</t></is></c></row>")
            .unwrap();
        w.write_all(
            b"<row r=\"1048576\"><c r=\"XFD1048576\" t=\"inlineStr\"><is><t>x</t></is></c></row>",
        )
        .unwrap();
        w.write_all(tail).unwrap();
    };
    let before = s.snapshot();
    for (name, fill, says) in [
        (
            "inflating.xlsx",
            &padded as &dyn Fn(&mut dyn Write),
            "decompress to more than 128 MiB",
        ),
        (
            "corners.xlsx",
            &corners as &dyn Fn(&mut dyn Write),
            "span 1048576 rows by 16384 columns",
        ),
    ] {
        let file = s.path().join(name);
        write_zip(&file, &[("xl/worksheets/sheet1.xml", fill)]);
        let size = std::fs::metadata(&file).unwrap().len();
        let m = measured(s.path(), &["receive", name, "--as", "book"]);
        assert_eq!(m.code, 2, "{name}: {}", m.stderr);
        assert_contains(&m.stderr, name);
        assert_contains(&m.stderr, says);
        let peak = m.peak_kib.div_ceil(1024);
        // 17-18 MiB when this test runs alone; beside the others the figure starts at this
        // process's own peak (see the top of the file), hence the room.
        assert!(peak <= 3 * BASE_MIB, "{name}: peak {peak} MiB");
        eprintln!(
            "hostile: {name} ({size} bytes) refused, peak {peak} MiB: {}",
            m.stderr.trim()
        );
    }
    assert_eq!(before, s.snapshot());
}

/// An .ods whose content holds a row of one value repeated across the grid, written with
/// `table:number-rows-repeated` and `table:number-columns-repeated` (a few hundred bytes that
/// the reader would expand to billions of cells), and one whose sheets each stay under the
/// sheet bound but together pass the workbook's: both refused before the workbook is read, in
/// bounded memory. An .ods as spreadsheet programs save it, the rest of the grid written as
/// repeated empty rows and cells, is taken in (the repeat attributes are those of OpenDocument
/// 1.2, part 1, 19.615 and 19.675).
#[test]
fn ods_repeated_rows_and_columns_are_bounded_like_workbook_cells() {
    let s = Sandbox::with_store();
    let doc = |tables: &str| {
        format!(
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?><office:document-content xmlns:office=\"urn:oasis:names:tc:opendocument:xmlns:office:1.0\" xmlns:table=\"urn:oasis:names:tc:opendocument:xmlns:table:1.0\" xmlns:text=\"urn:oasis:names:tc:opendocument:xmlns:text:1.0\" office:version=\"1.2\"><office:body><office:spreadsheet>{tables}</office:spreadsheet></office:body></office:document-content>"
        )
    };
    let cell = |v: &str| {
        format!("<table:table-cell office:value-type=\"string\"><text:p>{v}</text:p></table:table-cell>")
    };
    let header = format!(
        "<table:table-row>{}{}</table:table-row>",
        cell("order_id"),
        cell("shop")
    );
    let write_ods = |name: &str, content: String| {
        let mime = |w: &mut dyn Write| {
            w.write_all(b"application/vnd.oasis.opendocument.spreadsheet")
                .unwrap()
        };
        let body = move |w: &mut dyn Write| w.write_all(content.as_bytes()).unwrap();
        let manifest = |w: &mut dyn Write| {
            w.write_all(b"<?xml version=\"1.0\" encoding=\"UTF-8\"?><manifest:manifest xmlns:manifest=\"urn:oasis:names:tc:opendocument:xmlns:manifest:1.0\"><manifest:file-entry manifest:full-path=\"/\" manifest:media-type=\"application/vnd.oasis.opendocument.spreadsheet\"/><manifest:file-entry manifest:full-path=\"content.xml\" manifest:media-type=\"text/xml\"/></manifest:manifest>")
                .unwrap()
        };
        write_zip(
            &s.path().join(name),
            &[
                ("mimetype", &mime),
                ("META-INF/manifest.xml", &manifest),
                ("content.xml", &body),
            ],
        );
    };
    // A saved sheet: two data rows, then the rest of the grid as empty repeats.
    write_ods(
        "saved.ods",
        doc(&format!(
            "<table:table table:name=\"Orders\"><table:table-column table:number-columns-repeated=\"1024\"/>{header}<table:table-row>{}{}<table:table-cell table:number-columns-repeated=\"1022\"/></table:table-row><table:table-row>{}{}<table:table-cell table:number-columns-repeated=\"1022\"/></table:table-row><table:table-row table:number-rows-repeated=\"1048573\"><table:table-cell table:number-columns-repeated=\"1024\"/></table:table-row></table:table>",
            cell("Q-1"),
            cell("Ferry Lane"),
            cell("Q-2"),
            cell("Mill Row"),
        )),
    );
    let m = measured(s.path(), &["receive", "saved.ods", "--as", "saved"]);
    assert_eq!(m.code, 0, "{}", m.stderr);
    assert_eq!(
        s.ok(&["retrieve", "saved"]),
        "order_id,shop\nQ-1,Ferry Lane\nQ-2,Mill Row\n"
    );
    let before = s.snapshot();
    let row = "<table:table-row table:number-rows-repeated=\"1048000\"><table:table-cell office:value-type=\"string\" table:number-columns-repeated=\"16000\"><text:p>x</text:p></table:table-cell></table:table-row>";
    write_ods(
        "repeated.ods",
        doc(&format!(
            "<table:table table:name=\"Orders\">{header}{row}</table:table>"
        )),
    );
    // Five sheets of 1,000 rows by 1,000 columns: each at the sheet bound, 5,000,000 together.
    let square = "<table:table-row table:number-rows-repeated=\"1000\"><table:table-cell office:value-type=\"string\" table:number-columns-repeated=\"1000\"><text:p>x</text:p></table:table-cell></table:table-row>";
    let tables: String = (1..=5)
        .map(|i| format!("<table:table table:name=\"S{i}\">{square}</table:table>"))
        .collect();
    write_ods("five.ods", doc(&tables));
    for (name, says) in [
        (
            "repeated.ods",
            "sheet \"Orders\" spans 1048001 rows by 16000 columns (16768016000 cells) once its repeated rows and columns are expanded, more than the 1000000 cells a sheet may span",
        ),
        (
            "five.ods",
            "its sheets span more than 4000000 cells together",
        ),
    ] {
        let size = std::fs::metadata(s.path().join(name)).unwrap().len();
        let m = measured(s.path(), &["receive", name, "--as", "book", "--sheet", "1"]);
        assert_eq!(m.code, 2, "{name}: {}", m.stderr);
        assert_contains(&m.stderr, name);
        assert_contains(&m.stderr, says);
        let peak = m.peak_kib.div_ceil(1024);
        assert!(peak <= 3 * BASE_MIB, "{name}: peak {peak} MiB");
        eprintln!(
            "hostile: {name} ({size} bytes) refused, peak {peak} MiB: {}",
            m.stderr.trim()
        );
    }
    assert_eq!(before, s.snapshot());
}

/// JSON Lines are read whole, so a file past the bound is refused by its size before it is
/// read; one just under the bound, of many short values (the most memory per byte), is taken
/// in within the memory bound.
#[test]
fn json_lines_past_their_bound_are_refused_before_they_are_read() {
    let s = Sandbox::with_store();
    let line = b"{\"id\": 1, \"shop\": \"a\", \"ok\": true, \"n\": null}\n";
    let write_lines = |name: &str, bytes: u64| {
        let mut f = std::io::BufWriter::new(std::fs::File::create(s.path().join(name)).unwrap());
        let mut n = 0u64;
        while n + line.len() as u64 <= bytes {
            f.write_all(line).unwrap();
            n += line.len() as u64;
        }
        f.flush().unwrap();
    };
    write_lines("big.jsonl", (24 << 20) + 4096);
    let before = s.snapshot();
    let m = measured(s.path(), &["receive", "big.jsonl", "--as", "lines"]);
    assert_eq!(m.code, 2, "{}", m.stderr);
    assert_contains(
        &m.stderr,
        "more than the 24 MiB a JSON Lines file may be (it is read whole)",
    );
    let refused_peak = m.peak_kib.div_ceil(1024);
    assert!(refused_peak <= BASE_MIB + 16, "peak {refused_peak} MiB");
    assert_eq!(before, s.snapshot());
    std::fs::remove_file(s.path().join("big.jsonl")).unwrap();
    write_lines("under.jsonl", 24 << 20);
    let m = measured(s.path(), &["receive", "under.jsonl", "--as", "lines"]);
    assert_eq!(m.code, 0, "{}", m.stderr);
    let peak = m.peak_kib.div_ceil(1024);
    assert!(peak <= 256, "24 MiB of JSON Lines: peak {peak} MiB");
    eprintln!(
        "hostile: JSON Lines of 24 MiB + 4 KiB refused, peak {refused_peak} MiB; 24 MiB of short values taken in, peak {peak} MiB"
    );
}

/// A comparison by key in which every row changed (200,000 rows, two of four cells changed in
/// each, known by construction): everything is counted, only the first 50,000 changes are
/// listed when no `--limit` is given, and memory stays a few words per row (the rows to compare
/// are held with their values only while they fit 16 MiB a side; these do not).
/// Once, every changed row was kept with both sides' values whatever their number (about 730
/// bytes a row with `--counts`, 1,780 with `--json`: 159 and 361 MiB at this size).
#[test]
fn a_keyed_comparison_in_which_every_row_changed_keeps_a_few_words_per_row() {
    let s = Sandbox::with_store();
    let rows = 200_000u64;
    let write = |name: &str, changed: bool| {
        let mut f = std::io::BufWriter::new(std::fs::File::create(s.path().join(name)).unwrap());
        writeln!(f, "order_id,shop,amount,note").unwrap();
        for i in 0..rows {
            let (shop, amount) = if changed {
                ("Mill Row", i % 1000 + 1)
            } else {
                ("Ferry Lane", i % 1000)
            };
            writeln!(f, "Q-{i:06},{shop},{amount}.50,same note {}", i % 7).unwrap();
        }
        f.flush().unwrap();
    };
    write("v1.csv", false);
    write("v2.csv", true);
    s.ok(&["receive", "v1.csv", "--as", "o"]);
    s.ok(&["receive", "v2.csv", "--as", "o"]);
    let cmp = ["compare", "o:v1", "o:v2", "--key", "order_id"];
    let mut figures = Vec::new();
    for extra in [
        &["--counts"][..],
        &["--counts", "--json"],
        &["--json", "--limit", "10"],
        &[],
        &["--json"],
    ] {
        let mut args = cmp.to_vec();
        args.extend(extra);
        let m = measured(s.path(), &args);
        assert_eq!(m.code, 0, "{}", m.stderr);
        let peak = m.peak_kib.div_ceil(1024);
        figures.push(format!("{}: {peak} MiB", extra.join(" ")));
        if extra == ["--json"] {
            // 50,000 changes listed: the counts come before the listing.
            assert_contains(&m.stdout, "\"n_changes\": 200000,\n  \"listed\": 50000,");
            assert_contains(&m.stdout, "\"changed\": 400000,");
        } else if extra.contains(&"--json") {
            let v: serde_json::Value = serde_json::from_str(&m.stdout).unwrap();
            assert_eq!(v["rows"]["changed"], rows);
            assert_eq!(v["cells"]["changed"], 2 * rows);
            assert_eq!(v["n_changes"], rows);
            let listed = if extra.contains(&"--counts") { 0 } else { 10 };
            assert_eq!(v["listed"], listed);
            if listed > 0 {
                // The last listed change is row 'listed' of both versions, as written above.
                let last = &v["changes"][listed - 1];
                assert_eq!(last["to_row"], listed);
                assert_eq!(last["key"][0], format!("Q-{:06}", listed - 1));
                assert_eq!(last["cells"][0]["old"], "Ferry Lane");
                assert_eq!(last["cells"][0]["new"], "Mill Row");
            }
        } else if extra.is_empty() {
            assert_contains(
                &m.stdout,
                "… and 150,000 more changes not listed (at most 50,000 are listed unless --limit asks for more)",
            );
        } else {
            assert_contains(&m.stdout, "rows: 200,000 before, 200,000 after; 200,000 kept (200,000 of them changed), 0 removed, 0 added");
            assert_contains(&m.stdout, "cells: 400,000 changed");
        }
        let bound = if extra.contains(&"--counts") || extra.contains(&"--limit") {
            BASE_MIB + 64
        } else {
            256
        };
        assert!(
            peak <= bound,
            "compare {}: peak {peak} MiB",
            extra.join(" ")
        );
    }
    eprintln!(
        "hostile: keyed comparison of 200,000 rows, every row changed: {}",
        figures.join(", ")
    );
}
