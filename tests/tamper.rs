//! Tamper evidence: every kind of change someone could make to a store behind sluice's back is
//! found by `sluice verify`, which names what was changed (the object by hash, the version by
//! `NAME@N`, the audit entry by sequence number) and exits with code 1. Each test damages a fresh
//! copy of a small store in one way, so that a detection cannot be credited to another change.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;

/// A store with an intake, a cell operation (provenance object with changed cells), a filter
/// (provenance object with drops) and a second intake: five audit entries.
fn store() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "quillby.csv",
        "order_id,shop,status,amount\n\
         WO-1, Quillby Cycle Mend ,open,12.50\n\
         WO-2,Quillby Cycle Mend,cancelled,8.00\n\
         WO-3,  Quillby Cycle Mend,open,30.00\n\
         WO-4,Quillby Cycle Mend,open,4.25\n",
    );
    s.file(
        "oxwater.csv",
        "order_id,shop\nOX-1,Oxwater Wheelworks\nOX-2,Oxwater Wheelworks\n",
    );
    s.ok(&["ingest", "quillby.csv", "--as", "orders"]);
    s.ok(&["apply", "orders", "trim", "--why", "stray spaces"]);
    s.ok(&[
        "apply",
        "orders",
        "drop",
        "status = 'cancelled'",
        "--why",
        "not revenue",
    ]);
    s.ok(&["ingest", "oxwater.csv", "--as", "oxwater"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "the untouched store must verify: {v}");
    s
}

fn db(s: &Sandbox) -> rusqlite::Connection {
    rusqlite::Connection::open(s.path().join(".sluice/lineage.db")).unwrap()
}

fn store_dir(s: &Sandbox) -> PathBuf {
    s.path().join(sluice::store::STORE_DIR)
}

fn query_one(s: &Sandbox, sql: &str) -> String {
    db(s).query_row(sql, [], |r| r.get(0)).unwrap()
}

/// Runs `verify --json`, insists on exit code 1 and returns the problems.
fn problems(s: &Sandbox) -> Vec<Value> {
    let r = s.run(&["verify", "--json"]);
    assert_eq!(r.code, 1, "verify must fail:\n{}\n{}", r.stdout, r.stderr);
    let report: Value = serde_json::from_str(&r.stdout).unwrap();
    assert_eq!(report["intact"], false);
    // The text form names the same problems.
    let text = s.run(&["verify"]);
    assert_eq!(text.code, 1);
    assert_contains(&text.stdout, "damaged:");
    report["problems"].as_array().unwrap().clone()
}

/// Asserts some problem has `kind`, `subject` and a detail containing `detail`.
#[track_caller]
fn assert_named(found: &[Value], kind: &str, subject: &str, detail: &str) {
    let hit = found.iter().any(|p| {
        p["kind"] == kind
            && p["subject"] == subject
            && p["detail"].as_str().unwrap_or("").contains(detail)
    });
    assert!(
        hit,
        "\nexpected a problem {kind} / {subject} / ...{detail}...\n{}\nfound:\n{}\n",
        rule(),
        serde_json::to_string_pretty(found).unwrap()
    );
    eprintln!("tamper: detected as {kind} on {subject}");
}

#[test]
fn one_flipped_byte_in_each_kind_of_object_is_named_by_hash() {
    for (what, sql) in [
        (
            "table",
            "SELECT hash FROM versions WHERE seq = 2 AND dataset_id = 1",
        ),
        (
            "row index",
            "SELECT row_index FROM versions WHERE seq = 3 AND dataset_id = 1",
        ),
        (
            "provenance",
            "SELECT provenance FROM steps WHERE operation = 'drop'",
        ),
    ] {
        let s = store();
        let hash = query_one(&s, sql);
        let mut len = 0;
        damage_object(&store_dir(&s), &hash, |b| {
            len = b.len();
            b[len / 2] ^= 0x20;
        });
        let found = problems(&s);
        eprintln!("tamper: flipped byte {} of the {what} object", len / 2);
        assert_named(&found, "object_damaged", &hash, "hashes to");
    }
}

#[test]
fn a_truncated_object_is_named_with_both_sizes() {
    let s = store();
    let hash = query_one(
        &s,
        "SELECT hash FROM versions WHERE seq = 1 AND dataset_id = 1",
    );
    let mut len = 0;
    damage_object(&store_dir(&s), &hash, |b| {
        len = b.len();
        b.truncate(len - 7);
    });
    let found = problems(&s);
    assert_named(
        &found,
        "object_size",
        &hash,
        &format!("{} bytes, {} were recorded", len - 7, len),
    );
    assert_named(&found, "object_damaged", &hash, "hashes to");
}

#[test]
fn a_missing_object_is_named_with_its_path() {
    let s = store();
    let hash = query_one(&s, "SELECT provenance FROM steps WHERE operation = 'trim'");
    remove_object(&store_dir(&s), &hash);
    let found = problems(&s);
    assert_named(&found, "object_missing", &hash, "blob object is missing");
}

#[test]
fn a_provenance_reference_pointed_at_another_object_is_named() {
    // The drop step's provenance object is a well-formed object of the store, so only the
    // audit entry that recorded the trim step can show the reference was changed.
    let s = store();
    let other = query_one(&s, "SELECT provenance FROM steps WHERE operation = 'drop'");
    db(&s)
        .execute(
            "UPDATE steps SET provenance = ?1 WHERE operation = 'trim'",
            [&other],
        )
        .unwrap();
    let found = problems(&s);
    assert_named(&found, "audit_mismatch", "orders@2", "the entry says");
    assert_named(&found, "audit_mismatch", "orders@2", &other);
    // Removing the reference is found the same way.
    let s = store();
    db(&s)
        .execute(
            "UPDATE steps SET provenance = NULL WHERE operation = 'drop'",
            [],
        )
        .unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit_mismatch",
        "orders@3",
        "its step's provenance object is none",
    );
}

#[test]
fn a_version_hash_pointed_at_another_table_is_named() {
    let s = store();
    let raw = query_one(
        &s,
        "SELECT hash FROM versions WHERE seq = 1 AND dataset_id = 1",
    );
    db(&s)
        .execute(
            "UPDATE versions SET hash = ?1 WHERE seq = 2 AND dataset_id = 1",
            [&raw],
        )
        .unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit_mismatch",
        "orders@2",
        &format!("its hash is {raw}"),
    );
}

#[test]
fn a_version_added_without_an_audit_entry_is_named() {
    let s = store();
    let conn = db(&s);
    conn.execute(
        "INSERT INTO versions (dataset_id, seq, hash, row_index, step_id, n_rows, n_cols, n_bytes,
             header, dialect, null_tokens, created_at)
         SELECT dataset_id, 4, hash, row_index, step_id, n_rows, n_cols, n_bytes, header, dialect,
             null_tokens, created_at FROM versions WHERE dataset_id = 1 AND seq = 3",
        [],
    )
    .unwrap();
    drop(conn);
    let found = problems(&s);
    assert_named(&found, "audit_mismatch", "orders@4", "has no audit entry");
}

// ---- the audit chain ---------------------------------------------------------------------

#[test]
fn an_edited_audit_entry_is_named_by_its_sequence_number() {
    let s = store();
    db(&s)
        .execute(
            "UPDATE audit_log SET agent = 'Someone Else <else@example.org>' WHERE seq = 3",
            [],
        )
        .unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 3",
        "its content does not match its hash",
    );
}

#[test]
fn an_edited_audit_entry_with_its_hash_recomputed_breaks_the_link_to_the_next() {
    // Someone who knows the encoding can fix the edited entry's own hash; the entry after it
    // still names the old hash.
    let s = store();
    let conn = db(&s);
    let (at, agent, action, subject, details, prev): (
        String,
        String,
        String,
        String,
        String,
        String,
    ) = conn
        .query_row(
            "SELECT at, agent, action, subject, details, prev_hash FROM audit_log WHERE seq = 3",
            [],
            |r| {
                Ok((
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                ))
            },
        )
        .unwrap();
    let details = details.replace("\"cells_changed\":", "\"cells_changed\":1");
    let hash =
        sluice::store::audit::entry_hash(3, &at, &agent, &action, &subject, &details, &prev).hex();
    conn.execute(
        "UPDATE audit_log SET details = ?1, hash = ?2 WHERE seq = 3",
        rusqlite::params![details, hash],
    )
    .unwrap();
    drop(conn);
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 4",
        "does not follow the entry before it",
    );
}

#[test]
fn a_deleted_audit_entry_is_named_where_the_chain_breaks() {
    // In the middle: the chain breaks at the next entry.
    let s = store();
    db(&s)
        .execute("DELETE FROM audit_log WHERE seq = 3", [])
        .unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 4",
        "expected sequence number 3",
    );
    assert_named(&found, "audit_mismatch", "orders@2", "has no audit entry");
    // At the end: no chain can show its tail is gone, but the version it recorded is left
    // without its entry, and the head hash verify reports differs from the one written down.
    let s = store();
    let head = s.json(&["verify", "--json"])["audit_head"].clone();
    db(&s)
        .execute("DELETE FROM audit_log WHERE seq = 5", [])
        .unwrap();
    let found = problems(&s);
    assert_named(&found, "audit_mismatch", "oxwater@1", "has no audit entry");
    let r = s.run(&["verify", "--json"]);
    let report: Value = serde_json::from_str(&r.stdout).unwrap();
    assert_ne!(report["audit_head"], head);
}

#[test]
fn reordered_audit_entries_are_named() {
    let s = store();
    let conn = db(&s);
    // Swap the contents of entries 3 and 4 (keeping each row's sequence number).
    conn.execute_batch(
        "CREATE TEMP TABLE a AS SELECT * FROM audit_log WHERE seq IN (3, 4);
         DELETE FROM audit_log WHERE seq IN (3, 4);
         INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
             SELECT 7 - seq, at, agent, action, subject, details, prev_hash, hash FROM a;",
    )
    .unwrap_or_else(|e| panic!("swap: {e}"));
    drop(conn);
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 3",
        "does not follow the entry before it",
    );
    assert_named(
        &found,
        "audit",
        "audit entry 3",
        "its content does not match its hash",
    );
}

#[test]
fn an_audit_entry_inserted_out_of_chain_is_named() {
    // Appended at the end with a previous-hash that is not the last entry's.
    let s = store();
    let conn = db(&s);
    let first: String = conn
        .query_row("SELECT hash FROM audit_log WHERE seq = 1", [], |r| r.get(0))
        .unwrap();
    let hash = sluice::store::audit::entry_hash(
        6,
        "2026-10-01T09:00:00.000Z",
        "Someone Else <else@example.org>",
        "note",
        "orders@1",
        "{}",
        &first,
    )
    .hex();
    conn.execute(
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (6, '2026-10-01T09:00:00.000Z', 'Someone Else <else@example.org>', 'note',
                 'orders@1', '{}', ?1, ?2)",
        [&first, &hash],
    )
    .unwrap();
    drop(conn);
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 6",
        "does not follow the entry before it",
    );

    // Inserted in the middle: sequence numbers are unique, so the entries from there on were
    // renumbered to make room.
    let s = store();
    let conn = db(&s);
    conn.execute_batch(
        "UPDATE audit_log SET seq = seq + 1000 WHERE seq >= 3;
         UPDATE audit_log SET seq = seq - 999 WHERE seq >= 1000;",
    )
    .unwrap();
    let prev: String = conn
        .query_row("SELECT hash FROM audit_log WHERE seq = 2", [], |r| r.get(0))
        .unwrap();
    let hash = sluice::store::audit::entry_hash(3, "t", "x", "note", "orders@1", "{}", &prev).hex();
    conn.execute(
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (3, 't', 'x', 'note', 'orders@1', '{}', ?1, ?2)",
        [&prev, &hash],
    )
    .unwrap();
    drop(conn);
    let found = problems(&s);
    assert_named(
        &found,
        "audit",
        "audit entry 4",
        "does not follow the entry before it",
    );
    assert_named(
        &found,
        "audit",
        "audit entry 4",
        "its content does not match its hash",
    );
}

// ---- cell changes kept as rows by schema 1 -------------------------------------------------

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        let dest = to.join(e.file_name());
        if e.file_type().unwrap().is_dir() {
            copy_dir(&e.path(), &dest);
        } else {
            std::fs::copy(e.path(), &dest).unwrap();
        }
    }
}

/// A copy of the schema-1 fixture, whose trim step kept its one changed cell (data row 1,
/// amount, " 12.50" -> "12.50") as a `cell_changes` row.
fn legacy() -> Sandbox {
    let s = Sandbox::new();
    copy_dir(
        Path::new(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/fixtures/store_v1"
        )),
        s.path(),
    );
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    s
}

#[test]
fn an_edited_legacy_cell_change_row_is_named_with_what_the_versions_hold() {
    for (column, value) in [("new_value", "1250.00"), ("old_value", " 99.99")] {
        let s = legacy();
        db(&s)
            .execute(&format!("UPDATE cell_changes SET {column} = ?1"), [value])
            .unwrap();
        let found = problems(&s);
        assert_named(
            &found,
            "cell_change",
            "orders@2",
            "data row 1 column \"amount\"",
        );
        assert_named(&found, "cell_change", "orders@2", "\" 12.50\" -> \"12.50\"");
    }
    // Moved to another cell, whose values are not those.
    let s = legacy();
    db(&s)
        .execute("UPDATE cell_changes SET row_idx = 1", [])
        .unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "cell_change",
        "orders@2",
        "data row 2 column \"amount\"",
    );
}

#[test]
fn a_deleted_legacy_cell_change_row_is_named_by_the_count_its_audit_entry_kept() {
    let s = legacy();
    db(&s).execute("DELETE FROM cell_changes", []).unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit_mismatch",
        "orders@2",
        "its step records 0 changed cells, the entry says 1",
    );
}

#[test]
fn a_deleted_legacy_drop_row_is_named_by_the_count_its_audit_entry_kept() {
    let s = legacy();
    db(&s).execute("DELETE FROM drops", []).unwrap();
    let found = problems(&s);
    assert_named(
        &found,
        "audit_mismatch",
        "orders@3",
        "its step records 0 dropped rows, the entry says 1",
    );
}
