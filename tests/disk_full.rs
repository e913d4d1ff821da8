//! A full disk during intake: the engine must report "no space left", leave the store exactly as
//! it was (no version, no audit entry, no object, no temporary file) and take the same file in
//! once space is back. The same holds for `apply` and for a plan's `run` (a real tmpfs that
//! the step's output does not fit on).
//!
//! The library tests inject the failure through an object backend that wraps the real one and
//! refuses writes past a byte limit with `ErrorKind::StorageFull` (the kind Rust's standard
//! library gives the OS error ENOSPC, from memory); the binary test fills a real 2 MiB
//! tmpfs.

mod common;

use std::fs;
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use common::{assert_contains, Sandbox, Xorshift64};
use sluice::hash::Hash;
use sluice::intake::{self, IngestOptions, IngestOutcome};
use sluice::model::Agent;
use sluice::store::objects::{FsBackend, ObjectBackend, TempObject};
use sluice::store::Store;
use sluice::table::rowindex;

/// Which temporary objects refuse writes past the limit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Target {
    /// The copy of the input file's bytes.
    Table,
    /// The row index (it starts with the row index magic bytes).
    RowIndex,
    /// Every object, as on a really full disk.
    Every,
}

#[derive(Default)]
struct Injected {
    table: AtomicU64,
    row_index: AtomicU64,
}

struct FullDisk {
    inner: FsBackend,
    limit: u64,
    target: Target,
    injected: Arc<Injected>,
}

struct FullTemp {
    inner: Box<dyn TempObject>,
    limit: u64,
    target: Target,
    written: u64,
    /// Known from the first bytes written: `Some(true)` for a row index.
    is_index: Option<bool>,
    injected: Arc<Injected>,
}

impl Write for FullTemp {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        if buf.is_empty() {
            return Ok(0);
        }
        let is_index = *self
            .is_index
            .get_or_insert_with(|| buf.starts_with(rowindex::MAGIC));
        let targeted = match self.target {
            Target::Table => !is_index,
            Target::RowIndex => is_index,
            Target::Every => true,
        };
        if !targeted {
            return self.inner.write(buf);
        }
        let room = self.limit.saturating_sub(self.written);
        if room == 0 {
            let counter = if is_index {
                &self.injected.row_index
            } else {
                &self.injected.table
            };
            counter.fetch_add(1, Ordering::SeqCst);
            return Err(io::Error::new(
                io::ErrorKind::StorageFull,
                "no space left on device",
            ));
        }
        // Like a real file system, accept what still fits, then refuse.
        let take = buf.len().min(usize::try_from(room).unwrap_or(usize::MAX));
        let n = self.inner.write(&buf[..take])?;
        self.written += n as u64;
        Ok(n)
    }

    fn flush(&mut self) -> io::Result<()> {
        self.inner.flush()
    }
}

impl TempObject for FullTemp {
    fn persist(self: Box<Self>, hash: &Hash) -> io::Result<()> {
        self.inner.persist(hash)
    }
}

impl ObjectBackend for FullDisk {
    fn create_temp(&self) -> io::Result<Box<dyn TempObject>> {
        Ok(Box::new(FullTemp {
            inner: self.inner.create_temp()?,
            limit: self.limit,
            target: self.target,
            written: 0,
            is_index: None,
            injected: Arc::clone(&self.injected),
        }))
    }
    fn open(&self, hash: &Hash) -> io::Result<Box<dyn Read + Send>> {
        self.inner.open(hash)
    }
    fn exists(&self, hash: &Hash) -> bool {
        self.inner.exists(hash)
    }
    fn size(&self, hash: &Hash) -> io::Result<u64> {
        self.inner.size(hash)
    }
    fn list(&self) -> io::Result<(Vec<Hash>, Vec<PathBuf>)> {
        self.inner.list()
    }
    fn describe(&self, hash: &Hash) -> PathBuf {
        self.inner.describe(hash)
    }
}

fn agent() -> Agent {
    Agent::new("Test Runner", Some("runner@example.org"), "option")
}

fn options(dataset: &str) -> IngestOptions {
    IngestOptions {
        dataset: dataset.into(),
        key: Some(vec!["order_id".into()]),
        reason: Some("quarter export".into()),
        delimiter: None,
        has_header: true,
        encoding: None,
        null_tokens: vec![],
        agent: agent(),
    }
}

const SHOPS: [&str; 3] = [
    "Quillby Cycle Mend",
    "Oxwater Wheelworks",
    "Fennmarsh Bike Clinic",
];
const REPAIRS: [&str; 4] = [
    "brake cable",
    "wheel true",
    "chain and cassette",
    "puncture",
];

/// Work orders until the text reaches `min_bytes`; returns the text and its number of rows.
fn work_orders(min_bytes: usize) -> (String, u64) {
    let mut s = String::from("order_id,shop,day,repair,amount\n");
    let mut n = 0u64;
    while s.len() < min_bytes {
        s.push_str(&format!(
            "WO-{n:07},{},2026-{:02}-{:02},{},{}.{:02}\n",
            SHOPS[(n % 3) as usize],
            7 + n % 3,
            1 + n % 28,
            REPAIRS[(n % 4) as usize],
            5 + n % 90,
            n % 100
        ));
        n += 1;
    }
    (s, n)
}

/// A project with a store holding one version of `orders`, and a ~3 MB export to take in.
struct Project {
    dir: tempfile::TempDir,
    big: PathBuf,
    big_len: u64,
    big_rows: u64,
    big_index_len: u64,
}

fn project() -> Project {
    let dir = tempfile::tempdir().unwrap();
    let mut store = Store::init_recorded(dir.path(), &agent()).unwrap();
    let seed = dir.path().join("seed.csv");
    fs::write(
        &seed,
        "order_id,shop,amount\nWO-1,Quillby Cycle Mend,12.50\nWO-2,Oxwater Wheelworks,8.00\n",
    )
    .unwrap();
    intake::ingest(&mut store, &seed, &options("orders")).unwrap();
    let (text, rows) = work_orders(3_000_000);
    let big = dir.path().join("q3.csv");
    fs::write(&big, &text).unwrap();
    Project {
        big_len: text.len() as u64,
        big_rows: rows,
        big_index_len: index_len(text.as_bytes()),
        big,
        dir,
    }
}

impl Project {
    fn store_dir(&self) -> PathBuf {
        self.dir.path().join("sluice-store")
    }

    /// Everything observable about the store, read through the library: steps and versions,
    /// the audit log, the recorded objects, and every file under objects/ and tmp/.
    fn snapshot(&self) -> String {
        let store = Store::open(&self.store_dir()).unwrap();
        let log = serde_json::to_string_pretty(
            &sluice::history::timeline(&store, &Default::default()).unwrap(),
        )
        .unwrap();
        let audit = store.lineage.audit_entries().unwrap();
        let objects = store.lineage.objects().unwrap();
        let mut files = Vec::new();
        for sub in ["objects", "tmp"] {
            list_files(&self.store_dir().join(sub), &mut files);
        }
        files.sort();
        format!(
            "{log}\n--\n{audit:?}\n--\n{objects:?}\n--\n{}",
            files.join("\n")
        )
    }

    fn temp_files(&self) -> Vec<String> {
        let mut v = Vec::new();
        list_files(&self.store_dir().join("tmp"), &mut v);
        v
    }
}

fn list_files(dir: &Path, out: &mut Vec<String>) {
    if let Ok(rd) = fs::read_dir(dir) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_dir() {
                list_files(&p, out);
            } else {
                let len = e.metadata().map(|m| m.len()).unwrap_or(0);
                out.push(format!("{} {len}", p.display()));
            }
        }
    }
}

/// Takes the big export in through a disk that fills up after `limit` bytes of each targeted
/// object, and checks everything that must hold afterwards.
fn check_full_disk(p: &Project, target: Target, limit: u64) {
    let before = p.snapshot();
    let injected = Arc::new(Injected::default());
    let backend = FullDisk {
        inner: FsBackend::new(&p.store_dir()),
        limit,
        target,
        injected: Arc::clone(&injected),
    };
    let mut store = Store::open_with_backend(&p.store_dir(), Box::new(backend)).unwrap();
    let err = match intake::ingest(&mut store, &p.big, &options("orders")) {
        Err(e) => e,
        Ok(IngestOutcome::Recorded { version, .. }) => panic!(
            "{target:?} limit {limit}: the ingest succeeded on a full disk ({})",
            version.label()
        ),
        Ok(IngestOutcome::Unchanged { .. }) => {
            panic!("{target:?} limit {limit}: the ingest reported no change")
        }
    };
    drop(store);

    let table = injected.table.load(Ordering::SeqCst);
    let index = injected.row_index.load(Ordering::SeqCst);
    match target {
        Target::Table => assert!(table > 0, "limit {limit}: the table object never filled up"),
        Target::RowIndex => {
            assert!(index > 0, "limit {limit}: the row index never filled up")
        }
        Target::Every => assert!(table + index > 0, "limit {limit}: no write was refused"),
    }

    let msg = err.to_string();
    let tmp = p.store_dir().join("tmp");
    assert!(
        msg.contains(&format!(
            "{}: no space left on the device; free some space and run the command again",
            tmp.display()
        )),
        "{target:?} limit {limit}: unclear message: {msg}"
    );
    match err.kind() {
        sluice::ErrorKind::Io { source, .. } => {
            assert_eq!(source.kind(), io::ErrorKind::StorageFull, "{msg}")
        }
        other => panic!("{target:?} limit {limit}: expected an I/O error, got {other:?}"),
    }
    // A full disk is a failure of the system, not a usage error: exit code 1.
    assert_eq!(err.exit_code(), 1);

    assert_eq!(
        p.temp_files(),
        Vec::<String>::new(),
        "{target:?} limit {limit}: temporary files left in sluice-store/tmp"
    );
    assert_eq!(
        before,
        p.snapshot(),
        "{target:?} limit {limit}: the store changed"
    );
    let store = Store::open(&p.store_dir()).unwrap();
    let report = sluice::verify::verify(&store).unwrap();
    assert!(
        report.intact,
        "{target:?} limit {limit}: {:?}",
        report.problems
    );
    assert_eq!(report.leftover_temp_files, 0);
    assert_eq!(report.unreferenced_objects, 0);
    eprintln!(
        "disk full: {target:?} limited to {limit} bytes: refused ({} table and {} row index writes refused), store unchanged",
        table, index
    );
}

/// After the failures, the real backend takes the same file in; also confirms the object sizes
/// the mid-object limits were computed from.
fn ingest_for_real(p: &Project, index_len: u64) {
    let mut store = Store::open(&p.store_dir()).unwrap();
    match intake::ingest(&mut store, &p.big, &options("orders")).unwrap() {
        IngestOutcome::Recorded { version, .. } => {
            assert_eq!(version.label(), "orders:v2");
            assert_eq!(version.n_rows, p.big_rows);
            assert_eq!(version.n_bytes, p.big_len);
            let recorded = store.lineage.objects().unwrap();
            let index = recorded
                .iter()
                .find(|(h, _, _)| *h == version.row_index)
                .expect("row index object recorded");
            assert_eq!(index.2, index_len, "row index size");
        }
        IngestOutcome::Unchanged { .. } => panic!("the real ingest recorded nothing"),
    }
    let report = sluice::verify::verify(&store).unwrap();
    assert!(report.intact, "{:?}", report.problems);
    assert_eq!(report.leftover_temp_files, 0);
}

/// The length of the compact row index of `text` (every record after the header, by its byte
/// offset and line, through the format's one encoder).
fn index_len(text: &[u8]) -> u64 {
    let mut parser = sluice::table::parse::Parser::new(b',', 0);
    let mut rows = Vec::new();
    let mut keep = |r: sluice::table::RawRecord<'_>| -> Result<(), ()> {
        rows.push((r.byte, r.line));
        Ok(())
    };
    parser.feed(text, &mut keep).unwrap();
    let _ = parser.finish(&mut keep).unwrap();
    rowindex::encode(rows.into_iter().skip(1)).len() as u64
}

#[test]
fn disk_full_while_copying_the_table_leaves_the_store_unchanged() {
    let p = project();
    // 0: the very first write; 100 and 5000: inside the first 1 MiB piece; the middle of the
    // ~3 MB file: a later piece, after earlier ones were written.
    for limit in [0, 100, 5000, p.big_len / 2] {
        check_full_disk(&p, Target::Table, limit);
    }
    ingest_for_real(&p, p.big_index_len);
}

#[test]
fn disk_full_while_writing_the_row_index_leaves_the_store_unchanged() {
    let p = project();
    let index = p.big_index_len;
    // 0: the index header itself; 100 and 5000: the first batch of entries; the middle of the
    // index (over 1 MB for this file): after several batches went out.
    for limit in [0, 100, 5000, index / 2] {
        check_full_disk(&p, Target::RowIndex, limit);
    }
    ingest_for_real(&p, index);
}

#[test]
fn disk_full_for_every_object_leaves_the_store_unchanged() {
    let p = project();
    for limit in [0, 100, 5000, p.big_len / 2] {
        check_full_disk(&p, Target::Every, limit);
    }
    ingest_for_real(&p, p.big_index_len);
}

// ---- a real full file system -------------------------------------------------------------

/// The tests that fill a real file system mount a small tmpfs (of `size`), which needs root.
fn must_be_root(size: &str) {
    // SAFETY: geteuid has no preconditions and cannot fail.
    let root = unsafe { libc::geteuid() == 0 };
    assert!(
        root,
        "this test mounts a {size} tmpfs to fill it, which needs root; run the test suite as root"
    );
}

/// A tmpfs mounted for the duration of a test; unmounted when dropped, even if the test fails.
struct TmpfsMount {
    at: PathBuf,
}

impl TmpfsMount {
    fn new(at: &Path, size: &str) -> TmpfsMount {
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(at)
            .output()
            .unwrap_or_else(|e| panic!("cannot run mount to create a {size} tmpfs: {e}"));
        assert!(
            out.status.success(),
            "mounting a {size} tmpfs on {} failed (this test needs the right to mount): {}",
            at.display(),
            String::from_utf8_lossy(&out.stderr).trim()
        );
        TmpfsMount {
            at: at.to_path_buf(),
        }
    }
}

impl Drop for TmpfsMount {
    fn drop(&mut self) {
        let ok = Command::new("umount")
            .arg(&self.at)
            .status()
            .is_ok_and(|s| s.success());
        if !ok {
            // Still busy: detach it so the temporary folder can go.
            let _ = Command::new("umount").arg("-l").arg(&self.at).status();
        }
    }
}

#[test]
fn disk_full_on_a_small_tmpfs_reports_no_space_left_and_leaves_the_store_unchanged() {
    must_be_root("2 MiB");
    // The 16 MB export lives outside the small file system; the store lives on it. Objects
    // are stored compressed, so the export holds rows with random serial numbers (which do not
    // compress below half) and is large enough that even its compressed copy does not fit.
    let exports = tempfile::tempdir().unwrap();
    let text = padded_orders(120_000);
    let big = exports.path().join("q3.csv");
    fs::write(&big, &text).unwrap();

    let s = Sandbox::new();
    let _mount = TmpfsMount::new(s.path(), "2m"); // dropped (unmounted) before `s`
    s.ok(&["setup"]);
    s.file("seed.csv", "order_id,shop\nWO-1,Fennmarsh Bike Clinic\n");
    s.ok(&["receive", "seed.csv", "--as", "orders"]);

    let before = s.snapshot();
    let err = s.fails(1, &["receive", big.to_str().unwrap(), "--as", "orders"]);
    let after = s.snapshot();
    assert_contains(&err, "sluice-store/tmp: no space left on the device");
    assert_contains(&err, "free some space and run the command again");
    assert!(
        !err.contains("panicked"),
        "the binary panicked instead of reporting:\n{err}"
    );
    assert_eq!(before, after, "the store changed after:\n{err}");
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["leftover_temp_files"], 0, "{v}");
}

/// A file of work orders with padded names, so that `trim` changes every row, and a serial
/// number of 48 pseudo-random hex digits per row (xorshift64, Marsaglia 2003), which no
/// compressor shrinks below half, so that the stored objects keep a predictable size.
fn padded_orders(rows: usize) -> String {
    let mut t = String::from("order_id,shop,notes,serial\n");
    let mut rng = Xorshift64(0x9E37_79B9_7F4A_7C15);
    for i in 0..rows {
        let mut serial = String::new();
        for _ in 0..3 {
            serial.push_str(&format!("{:016x}", rng.next()));
        }
        t.push_str(&format!(
            "WO-{i:06},  Oxwater Wheelworks  ,  brake cable replaced and gears indexed {i}  ,{serial}\n"
        ));
    }
    t
}

#[test]
fn disk_full_during_apply_and_run_reports_no_space_left_and_leaves_the_store_unchanged() {
    must_be_root("2 MiB");
    let exports = tempfile::tempdir().unwrap();
    // About 4.1 MB, stored compressed in about 1.2 MB with its row index: its copy fits on the
    // file system, a cleaned copy as well does not.
    let text = padded_orders(36_000);
    let file = exports.path().join("oxwater.csv");
    fs::write(&file, &text).unwrap();
    let plan = exports.path().join("plan.json");
    fs::write(
        &plan,
        r#"{"sluice_plan": 2, "steps": [
             {"dataset": "orders", "clean": "trim", "settings": {"inner": true}, "reason": "padded names"},
             {"dataset": "orders", "clean": "case", "settings": {"columns": ["shop"], "to": "upper"}, "reason": "one spelling"}]}"#,
    )
    .unwrap();

    let s = Sandbox::new();
    let _mount = TmpfsMount::new(s.path(), "2m"); // dropped (unmounted) before `s`
    s.ok(&["setup"]);
    s.ok(&["receive", file.to_str().unwrap(), "--as", "orders"]);
    let free = {
        let out = Command::new("df").arg("-k").arg(s.path()).output().unwrap();
        String::from_utf8_lossy(&out.stdout).into_owned()
    };
    for args in [
        vec!["clean", "orders", "trim", "--why", "padded names"],
        vec!["run", plan.to_str().unwrap()],
    ] {
        let before = s.snapshot();
        let err = s.fails(1, &args);
        let after = s.snapshot();
        assert_contains(&err, "no space left on the device");
        assert_contains(&err, "free some space and run the command again");
        assert!(!err.contains("panicked"), "{err}");
        assert_eq!(
            before, after,
            "sluice {} changed the store:\n{err}",
            args[0]
        );
        let v = s.json(&["verify", "--json"]);
        assert_eq!(v["intact"], true, "{v}");
        assert_eq!(v["leftover_temp_files"], 0, "{v}");
        eprintln!(
            "disk full: sluice {} on a 2 MiB tmpfs refused, store unchanged: {}",
            args[0],
            err.lines().next().unwrap_or("")
        );
    }
    eprintln!("disk full: the file system after the intake:\n{free}");
}

/// `retrieve -o` hands what it wrote to the disk every 8 MiB on a thread of its own (so that the
/// sync before the file is renamed into place has little left to wait for). A version of 16 MB
/// to a folder with room comes back byte for byte; to a 12 MiB file system it fails after one of
/// those syncs, says the disk is full (naming the file), and leaves no file, whole or partial,
/// under any name.
#[test]
fn retrieve_to_a_full_disk_reports_it_and_leaves_no_file() {
    must_be_root("12 MiB");
    let text = padded_orders(120_000);
    assert!(text.len() > 15 << 20);
    let s = Sandbox::with_store();
    s.file("q3.csv", &text);
    s.ok(&["receive", "q3.csv", "--as", "orders"]);
    s.ok(&["retrieve", "orders", "-o", "back.csv"]);
    assert!(fs::read(s.path().join("back.csv")).unwrap() == text.as_bytes());

    let out = tempfile::tempdir().unwrap();
    let _mount = TmpfsMount::new(out.path(), "12m"); // dropped (unmounted) before `out`
    let target = out.path().join("q3.csv");
    let err = s.fails(1, &["retrieve", "orders", "-o", target.to_str().unwrap()]);
    assert_contains(&err, &format!("{}: no space left", target.display()));
    assert!(
        !err.contains("panicked"),
        "the binary panicked instead of reporting:\n{err}"
    );
    let left: Vec<_> = fs::read_dir(out.path())
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert!(left.is_empty(), "left behind: {left:?}");
}
