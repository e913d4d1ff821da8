//! Tamper evidence for the segment layout: a changed byte inside a segment's compressed
//! frames, a truncated segment and an index entry pointed at another object's bytes are each
//! found by `sluice verify`, which names the segment file and the object, and exits with code 1.
//! Also: `reclaim` gives back exactly the unreferenced objects, keeps every hash and is
//! recorded in the audit chain, and a writer's lock keeps it waiting.
//!
//! Each test damages a fresh small store in one way. The segment format is described at the top
//! of src/store/segments.rs; the tests edit the bytes that format puts where it says.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;
use sluice::hash::Hash;
use sluice::store::objects::FsBackend;

/// A store with two intakes and one cell operation, packed by `reclaim` into one segment.
fn store() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "quillby.csv",
        "order_id,shop,amount\nWO-1, Quillby Cycle Mend ,12.50\nWO-2,Quillby Cycle Mend,8.00\n",
    );
    s.file(
        "oxwater.csv",
        "order_id,shop\nOX-1,Oxwater Wheelworks\nOX-2,Oxwater Wheelworks\nOX-3,Oxwater Wheelworks\n",
    );
    s.ok(&["receive", "quillby.csv", "--as", "orders"]);
    s.ok(&["clean", "orders", "trim", "--why", "stray spaces"]);
    s.ok(&["receive", "oxwater.csv", "--as", "oxwater"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "the untouched store must verify: {v}");
    s
}

fn store_dir(s: &Sandbox) -> PathBuf {
    s.path().join(sluice::store::STORE_DIR)
}

fn hash_of(s: &Sandbox, reference: &str) -> Hash {
    s.json(&["about", reference, "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .parse()
        .unwrap()
}

fn problems(s: &Sandbox) -> Vec<Value> {
    let r = s.run(&["verify", "--json"]);
    assert_eq!(r.code, 1, "verify must fail:\n{}\n{}", r.stdout, r.stderr);
    let report: Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["intact"], false);
    report["problems"].as_array().unwrap().clone()
}

fn find<'a>(ps: &'a [Value], kind: &str) -> Vec<&'a Value> {
    ps.iter().filter(|p| p["kind"] == kind).collect()
}

fn segment_files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir.join("segments"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "seg"))
        .collect();
    v.sort();
    v
}

#[test]
fn a_flipped_byte_inside_a_frame_is_named_by_segment_and_object() {
    let s = store();
    let h = hash_of(&s, "orders:v1");
    let (seg, e) = FsBackend::new(&store_dir(&s)).locate(&h).unwrap();
    // Past the frame header (4-byte magic, descriptor, window, content size), inside the
    // compressed block (RFC 8878, section 3.1.1).
    let detail = flip_and_verify(&s, &seg, e.offset + 9, &h, 0);
    assert_contains(&detail, &seg.file_name().unwrap().to_string_lossy());
    // `retrieve` refuses rather than give altered bytes.
    assert_ne!(s.run(&["retrieve", "orders:v1"]).code, 0);
}

/// An object of many frames is checked with its frames decoded on threads of their own: a
/// byte flipped in a middle frame is still named, by object and frame.
#[test]
fn a_flipped_byte_in_a_middle_frame_of_a_large_object_is_named() {
    let s = Sandbox::with_store();
    let mut rng = Xorshift64(0x9E37_79B9_7F4A_7C15);
    let mut text = String::from("order_id,serial\n");
    for i in 0..40_000 {
        text.push_str(&format!("WO-{i},{:016x}\n", rng.next()));
    }
    s.file("big.csv", &text);
    s.ok(&["receive", "big.csv", "--as", "big"]);
    let h = hash_of(&s, "big:v1");
    let (seg, e) = FsBackend::new(&store_dir(&s)).locate(&h).unwrap();
    let table =
        sluice::store::segments::read_seek_table(&std::fs::File::open(&seg).unwrap(), &e).unwrap();
    assert!(table.raw.len() >= 4, "{} frames", table.raw.len());
    // Inside frame 2's compressed block, past its header (RFC 8878, section 3.1.1).
    flip_and_verify(&s, &seg, table.starts[2] + 20, &h, 2);
}

/// Flips one bit of the byte at `at` in `seg`, then checks that `verify` names object `h` once
/// as a damaged segment object, at `frame`, and as a damaged object; returns the first detail.
fn flip_and_verify(s: &Sandbox, seg: &Path, at: u64, h: &Hash, frame: usize) -> String {
    let mut bytes = std::fs::read(seg).unwrap();
    bytes[at as usize] ^= 0x20;
    std::fs::write(seg, &bytes).unwrap();
    let ps = problems(s);
    let named = find(&ps, "segment_object");
    assert_eq!(named.len(), 1, "{ps:?}");
    assert_eq!(named[0]["subject"], h.hex());
    let detail = named[0]["detail"].as_str().unwrap().to_string();
    assert_contains(&detail, &format!("frame {frame}"));
    assert!(find(&ps, "object_damaged")
        .iter()
        .any(|p| p["subject"] == h.hex()));
    detail
}

#[test]
fn a_truncated_segment_is_named() {
    let s = store();
    let h = hash_of(&s, "oxwater:v1");
    let (seg, _) = FsBackend::new(&store_dir(&s)).locate(&h).unwrap();
    let len = std::fs::metadata(&seg).unwrap().len();
    std::fs::OpenOptions::new()
        .write(true)
        .open(&seg)
        .unwrap()
        .set_len(len - 7)
        .unwrap();

    let ps = problems(&s);
    let damaged = find(&ps, "segment_damaged");
    assert_eq!(damaged.len(), 1, "{ps:?}");
    assert_eq!(damaged[0]["subject"], seg.display().to_string());
    assert_contains(damaged[0]["detail"].as_str().unwrap(), "truncated");
    // What the segment held is missing as far as the database is concerned.
    assert!(find(&ps, "object_missing")
        .iter()
        .any(|p| p["subject"] == h.hex()));
}

#[test]
fn an_index_entry_pointed_at_another_object_is_named() {
    let s = store();
    // One segment holding every object.
    s.ok(&["reclaim"]);
    let dir = store_dir(&s);
    assert_eq!(segment_files(&dir).len(), 1);
    let seg = segment_files(&dir).remove(0);
    let orders = hash_of(&s, "orders:v1");
    let oxwater = hash_of(&s, "oxwater:v1");

    // The tail: index offset, index length, BLAKE3 of the index, magic (56 bytes).
    let mut bytes = std::fs::read(&seg).unwrap();
    let tail = bytes.len() - 56;
    let index_at = u64::from_le_bytes(bytes[tail..tail + 8].try_into().unwrap()) as usize;
    let index_len = u64::from_le_bytes(bytes[tail + 8..tail + 16].try_into().unwrap()) as usize;
    let entry_of = |b: &[u8], h: &Hash| {
        (index_at + 8..index_at + index_len)
            .step_by(64)
            .find(|&at| &b[at..at + 32] == h.as_bytes())
            .unwrap()
    };
    let (a, b) = (entry_of(&bytes, &orders), entry_of(&bytes, &oxwater));
    // orders:v1's entry now gives oxwater:v1's place, lengths and frame size.
    let theirs = bytes[b + 32..b + 64].to_vec();
    bytes[a + 32..a + 64].copy_from_slice(&theirs);
    // Whoever edits the index can recompute its checksum too.
    let sum = *blake3::hash(&bytes[index_at..index_at + index_len]).as_bytes();
    bytes[tail + 16..tail + 48].copy_from_slice(&sum);
    std::fs::write(&seg, &bytes).unwrap();

    let ps = problems(&s);
    let pointed = find(&ps, "segment_index");
    assert_eq!(pointed.len(), 1, "{ps:?}");
    assert_eq!(pointed[0]["subject"], orders.hex());
    assert_contains(pointed[0]["detail"].as_str().unwrap(), &oxwater.hex());
    // And `cat` does not hand out the other table's bytes under this version's name.
    assert_ne!(s.run(&["retrieve", "orders:v1"]).code, 0);
}

#[test]
fn reclaim_removes_only_unreferenced_objects_and_is_audited() {
    let s = store();
    let dir = store_dir(&s);
    let before: Vec<String> = ["orders:v1", "orders:v2", "oxwater:v1"]
        .iter()
        .map(|r| s.ok(&["retrieve", r]))
        .collect();
    // An object nothing refers to, as an interrupted command leaves one.
    let stray = {
        let store = sluice::store::Store::open(&dir).unwrap();
        let mut w = store.objects.writer().unwrap();
        w.write(b"bytes no step recorded\n").unwrap();
        w.finish().unwrap().0
    };
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true);
    assert_eq!(v["unreferenced_objects"], 1);
    let audited = v["audit_entries_checked"].as_u64().unwrap();

    let done = s.json(&["reclaim", "--json"]);
    assert_eq!(done["objects_removed"], 1, "{done}");
    assert_eq!(done["segments_after"], 1, "{done}");
    assert!(FsBackend::new(&dir).locate(&stray).is_none());
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["unreferenced_objects"], 0);
    assert_eq!(v["audit_entries_checked"].as_u64().unwrap(), audited + 1);
    let action: String = rusqlite::Connection::open(dir.join("lineage.db"))
        .unwrap()
        .query_row(
            "SELECT action FROM audit_log ORDER BY seq DESC LIMIT 1",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(action, "reclaim");
    let after: Vec<String> = ["orders:v1", "orders:v2", "oxwater:v1"]
        .iter()
        .map(|r| s.ok(&["retrieve", r]))
        .collect();
    assert_eq!(before, after);
}

#[test]
fn a_writer_holds_reclaim_off_until_it_ends() {
    let s = store();
    let dir = store_dir(&s);
    let store = sluice::store::Store::open(&dir).unwrap();
    let mut w = store.objects.writer().unwrap();
    w.write(b"WO-9,Fenmouth Spokes\n").unwrap();
    w.finish().unwrap();
    // The writers' lock is held shared: the exclusive lock `reclaim` takes is not free.
    let lock = std::fs::File::open(dir.join("writers.lock")).unwrap();
    assert!(matches!(
        lock.try_lock(),
        Err(std::fs::TryLockError::WouldBlock)
    ));
    drop(store);
    // Released with the store. Another test of this file starting a `sluice` process holds
    // copies of this process's descriptors between its fork and its exec (the lock's among
    // them while it was held), so the lock may take a moment to come free: it must within
    // ten seconds.
    let freed = (0..1000).any(|_| {
        let free = lock.try_lock().is_ok();
        if !free {
            std::thread::sleep(std::time::Duration::from_millis(10));
        }
        free
    });
    assert!(
        freed,
        "the writers' lock is still held after the store was closed"
    );
}
