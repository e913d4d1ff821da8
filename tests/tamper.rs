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
    s.ok(&["receive", "quillby.csv", "--as", "orders"]);
    s.ok(&["clean", "orders", "trim", "--why", "stray spaces"]);
    s.ok(&[
        "clean",
        "orders",
        "drop",
        "status = 'cancelled'",
        "--why",
        "not revenue",
    ]);
    s.ok(&["receive", "oxwater.csv", "--as", "oxwater"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "the untouched store must verify: {v}");
    s
}

fn db(s: &Sandbox) -> rusqlite::Connection {
    rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap()
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
    assert_named(&found, "audit_mismatch", "orders:v2", "the entry says");
    assert_named(&found, "audit_mismatch", "orders:v2", &other);
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
        "orders:v3",
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
        "orders:v2",
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
    assert_named(&found, "audit_mismatch", "orders:v4", "has no audit entry");
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
    assert_named(&found, "audit_mismatch", "orders:v2", "has no audit entry");
    // At the end: no chain can show its tail is gone, but the version it recorded is left
    // without its entry, and the head hash verify reports differs from the one written down.
    let s = store();
    let head = s.json(&["verify", "--json"])["audit_head"].clone();
    db(&s)
        .execute("DELETE FROM audit_log WHERE seq = 5", [])
        .unwrap();
    let found = problems(&s);
    assert_named(&found, "audit_mismatch", "oxwater:v1", "has no audit entry");
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
        "orders:v1",
        "{}",
        &first,
    )
    .hex();
    conn.execute(
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (6, '2026-10-01T09:00:00.000Z', 'Someone Else <else@example.org>', 'note',
                 'orders:v1', '{}', ?1, ?2)",
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
    let hash =
        sluice::store::audit::entry_hash(3, "t", "x", "note", "orders:v1", "{}", &prev).hex();
    conn.execute(
        "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
         VALUES (3, 't', 'x', 'note', 'orders:v1', '{}', ?1, ?2)",
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
            "orders:v2",
            "data row 1 column \"amount\"",
        );
        assert_named(
            &found,
            "cell_change",
            "orders:v2",
            "\" 12.50\" -> \"12.50\"",
        );
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
        "orders:v2",
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
        "orders:v2",
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
        "orders:v3",
        "its step records 0 dropped rows, the entry says 1",
    );
}

// ---- every field of every table -------------------------------------------------------------

/// A store whose history writes a row into every table sluice writes today: an intake with a
/// declared key, a trim, a drop by predicate, a rename (column sources), a `number` that keeps
/// an unreadable amount (a cell note), checks that pass and fail, and a hand edit (inputs and
/// an inferred provenance object), a signatory admitted, a meaning declared and a sign-off.
fn rich_store() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "quillby.csv",
        "order_id;shop;status;amount\n\
         WO-1; Quillby Cycle Mend ;open;12,50\n\
         WO-2;Quillby Cycle Mend;cancelled;8,00\n\
         WO-3;  Quillby Cycle Mend;open;n/a\n",
    );
    s.ok(&[
        "receive",
        "quillby.csv",
        "--as",
        "orders",
        "--key",
        "order_id",
        "--why",
        "monthly export",
    ]);
    s.ok(&["clean", "orders", "trim", "--why", "stray spaces"]);
    s.ok(&[
        "clean",
        "orders",
        "drop",
        "status = 'cancelled'",
        "--why",
        "not revenue",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "rename",
        "shop=workshop",
        "--why",
        "one naming",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "number",
        "--columns",
        "amount",
        "--decimal-comma",
        "--on-error",
        "keep",
        "--why",
        "amounts",
    ]);
    s.file(
        "rules.json",
        r#"{"rules": [{"rule": "unique", "columns": ["order_id"]}, {"rule": "not_blank", "columns": ["amount"]}, {"rule": "unique", "columns": ["status"]}]}"#,
    );
    s.run(&["inspect", "orders", "--rules", "rules.json"]);
    let cleaned = s.ok(&["retrieve", "orders"]);
    s.file("fixed.csv", cleaned.replace("WO-3", "WO-33"));
    s.ok(&[
        "receive",
        "fixed.csv",
        "--as",
        "orders",
        "--hand-edit-of",
        "orders",
        "--why",
        "typo",
    ]);
    // A signatory (key made by OpenSSH's ssh-keygen), a declared meaning and a sign-off.
    let made = std::process::Command::new("ssh-keygen")
        .args(["-q", "-t", "ed25519", "-N", "", "-C", "ada", "-f"])
        .arg(s.path().join("ada"))
        .status()
        .expect("ssh-keygen runs (Debian: openssh-client; tests/run installs it)");
    assert!(made.success());
    s.ok(&[
        "signatories",
        "--admit",
        "ada.pub",
        "--name",
        "Ada Moss",
        "--signing-key",
        "ada",
    ]);
    s.ok(&["meanings", "--declare", "filed", "--says", "I filed it"]);
    s.ok(&[
        "endorse",
        "orders",
        "--meaning",
        "filed",
        "--signing-key",
        "ada",
    ]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "the untouched store must verify: {v}");
    s
}

/// A copy of the database with the write-ahead log folded in, to restore after each edit.
fn settle(s: &Sandbox) -> Vec<u8> {
    let c = db(s);
    c.execute_batch("PRAGMA wal_checkpoint(TRUNCATE)").unwrap();
    drop(c);
    std::fs::read(s.path().join("sluice-store/lineage.db")).unwrap()
}

fn restore(s: &Sandbox, saved: &[u8]) {
    for tail in ["-wal", "-shm"] {
        let _ = std::fs::remove_file(s.path().join(format!("sluice-store/lineage.db{tail}")));
    }
    std::fs::write(s.path().join("sluice-store/lineage.db"), saved).unwrap();
}

/// The tables and columns of the database as it declares them (`PRAGMA table_info`), so that a
/// column a later schema adds is edited here without changing this test.
fn schema(c: &rusqlite::Connection) -> Vec<(String, Vec<(String, String)>)> {
    let mut tables: Vec<String> = c
        .prepare("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite%' AND name != 'audit_log' ORDER BY name")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    tables.sort();
    tables
        .into_iter()
        .map(|t| {
            let cols = c
                .prepare(&format!("PRAGMA table_info(\"{t}\")"))
                .unwrap()
                .query_map([], |r| Ok((r.get::<_, String>(1)?, r.get::<_, String>(2)?)))
                .unwrap()
                .map(Result::unwrap)
                .collect();
            (t, cols)
        })
        .collect()
}

/// Another value of the same type: an integer moved by one (within 0/1 for flags), text with
/// its last digit or letter changed (so a hash stays hex, a time a time, JSON JSON), and a
/// value where there was NULL (an empty text, which must differ from NULL).
fn changed(v: &rusqlite::types::Value, declared: &str) -> rusqlite::types::Value {
    use rusqlite::types::Value as V;
    match v {
        V::Integer(i) if *i == 1 => V::Integer(0),
        V::Integer(i) => V::Integer(i + 1),
        V::Real(f) => V::Real(f + 1.0),
        V::Text(t) => {
            let mut chars: Vec<char> = t.chars().collect();
            if let Some(p) = chars.iter().rposition(char::is_ascii_digit) {
                chars[p] = if chars[p] == '9' {
                    '8'
                } else {
                    (chars[p] as u8 + 1) as char
                };
            } else if let Some(p) = chars.iter().rposition(char::is_ascii_alphabetic) {
                chars[p] = if chars[p] == 'a' {
                    'b'
                } else {
                    (chars[p] as u8 - 1) as char
                };
            } else {
                chars.push('x');
            }
            V::Text(chars.into_iter().collect())
        }
        V::Blob(b) => V::Blob([b.as_slice(), b"x"].concat()),
        V::Null if declared == "INTEGER" => V::Integer(0),
        V::Null => V::Text(String::new()),
    }
}

#[test]
fn every_single_field_edit_of_every_table_is_seen() {
    use rusqlite::types::Value as V;
    let s = rich_store();
    let saved = settle(&s);
    let tables = schema(&db(&s));
    // The sqlite3 shell does not enforce foreign keys unless asked; neither does this test.
    let db = |s: &Sandbox| {
        let c = db(s);
        c.execute_batch("PRAGMA foreign_keys = OFF").unwrap();
        c
    };
    let (mut tried, mut refused, mut empty_tables) = (0u32, 0u32, Vec::new());
    let mut refused_changes = Vec::new();
    let mut unseen = Vec::new();
    let check = |what: String, s: &Sandbox, unseen: &mut Vec<String>| {
        let r = s.run(&["verify", "--json"]);
        let named = serde_json::from_str::<Value>(&r.stdout)
            .ok()
            .is_some_and(|v| v["intact"] == false);
        if r.code != 1 || !named {
            unseen.push(format!("{what}: exit {} {}", r.code, r.stderr.trim()));
        }
        restore(s, &saved);
    };
    for (table, cols) in &tables {
        let c = db(&s);
        let rowids: Vec<i64> = c
            .prepare(&format!("SELECT rowid FROM \"{table}\" ORDER BY rowid"))
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .map(Result::unwrap)
            .collect();
        drop(c);
        if rowids.is_empty() {
            empty_tables.push(table.clone());
            continue;
        }
        let mut picks = vec![rowids[0]];
        if rowids.len() > 1 {
            picks.push(rowids[rowids.len() - 1]);
        }
        for (col, declared) in cols {
            for &rowid in &picks {
                let c = db(&s);
                let get = |sql: &str| -> Vec<V> {
                    c.prepare(sql)
                        .unwrap()
                        .query_map([rowid], |r| r.get::<_, V>(0))
                        .unwrap()
                        .map(Result::unwrap)
                        .collect()
                };
                let now = get(&format!(
                    "SELECT \"{col}\" FROM \"{table}\" WHERE rowid = ?1"
                ))
                .remove(0);
                let others = get(&format!(
                    "SELECT DISTINCT \"{col}\" FROM \"{table}\" WHERE rowid != ?1 LIMIT 20"
                ));
                drop(c);
                let mut edits = vec![("changed", changed(&now, declared)), ("NULL", V::Null)];
                if let Some(o) = others.into_iter().find(|o| *o != now) {
                    edits.push(("another row's value", o));
                }
                for (how, value) in edits {
                    if value == now {
                        continue;
                    }
                    let c = db(&s);
                    let done = c.execute(
                        &format!("UPDATE \"{table}\" SET \"{col}\" = ?1 WHERE rowid = ?2"),
                        rusqlite::params![value, rowid],
                    );
                    drop(c);
                    if let Err(e) = done {
                        if how == "changed" {
                            refused_changes.push(format!("{table}.{col}: {e}"));
                        }
                        refused += 1;
                        restore(&s, &saved);
                        continue;
                    }
                    tried += 1;
                    check(
                        format!(
                            "{table}.{col} of rowid {rowid} set to {how} {value:?} (was {now:?})"
                        ),
                        &s,
                        &mut unseen,
                    );
                }
            }
        }
        // A row removed, a row copied in under a new rowid, the whole table dropped.
        for (how, sql) in [
            (
                "row removed",
                format!("DELETE FROM \"{table}\" WHERE rowid = {}", picks[0]),
            ),
            ("table dropped", format!("DROP TABLE \"{table}\"")),
        ] {
            let c = db(&s);
            c.execute_batch("PRAGMA foreign_keys = OFF").unwrap();
            let done = c.execute_batch(&sql);
            drop(c);
            if done.is_err() {
                refused += 1;
                restore(&s, &saved);
                continue;
            }
            tried += 1;
            check(format!("{table}: {how}"), &s, &mut unseen);
        }
    }
    // A table, a view and a trigger that sluice never made.
    for sql in [
        "CREATE TABLE notes (x TEXT)",
        "CREATE VIEW v AS SELECT 1",
        "CREATE TRIGGER t AFTER INSERT ON agents BEGIN SELECT 1; END",
    ] {
        db(&s).execute_batch(sql).unwrap();
        tried += 1;
        check(sql.to_string(), &s, &mut unseen);
    }
    eprintln!(
        "tamper: {tried} single edits tried over {} tables, {refused} refused by SQLite's own constraints, {} unseen; tables empty in this history: {}",
        tables.len(),
        unseen.len(),
        empty_tables.join(", ")
    );
    eprintln!(
        "tamper: changed values SQLite refused: {}",
        refused_changes.join("; ")
    );
    assert!(
        unseen.is_empty(),
        "edits verify did not see:\n{}",
        unseen.join("\n")
    );
}

/// A store written before row commitments still verifies, and says which entries predate them;
/// the first command after that commits to its rows (and records where the old rows end), so an
/// edit of a new row, or a row added after, is seen, while the old entries keep the checks they
/// had.
#[test]
fn a_store_from_before_row_commitments_verifies_and_says_what_its_entries_cover() {
    let s = legacy();
    let v = s.json(&["verify", "--json"]);
    let old = v["entries_without_row_commitments"].as_u64().unwrap();
    assert!(old > 0, "{v}");
    assert!(v["rows_before_commitments"].as_u64().unwrap() > 0, "{v}");
    let text = s.ok(&["verify"]);
    assert_contains(
        &text,
        &format!("note: audit entries 1-{old} were written by an earlier sluice"),
    );
    let name = query_one(&s, "SELECT name FROM datasets ORDER BY id LIMIT 1");
    s.ok(&[
        "clean",
        &name,
        "case",
        "--columns",
        "shop",
        "--to",
        "upper",
        "--why",
        "one spelling",
    ]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["entries_without_row_commitments"].as_u64(), Some(old));
    // The new step's reason edited: seen.
    db(&s)
        .execute(
            "UPDATE steps SET reason = 'forged' WHERE id = (SELECT max(id) FROM steps)",
            [],
        )
        .unwrap();
    let found = problems(&s);
    assert!(
        found.iter().any(|p| p["kind"] == "audit_mismatch"
            && p["detail"]
                .as_str()
                .unwrap()
                .contains("the rows of steps whose id")),
        "{found:?}"
    );
    // A check result added by hand to the old store: no entry commits to it.
    let s = legacy();
    s.ok(&[
        "clean",
        &name,
        "case",
        "--columns",
        "shop",
        "--to",
        "upper",
        "--why",
        "one spelling",
    ]);
    db(&s)
        .execute(
            "INSERT INTO check_results (version_id, rule, passed, n_failing, first_failing, agent_id, checked_at)
             VALUES (1, '{}', 1, 0, '[]', 1, '2026-01-01T00:00:00Z')",
            [],
        )
        .unwrap();
    assert_named(
        &problems(&s),
        "audit_mismatch",
        "check_results",
        "committed to by no audit entry",
    );
}

/// `verify --deep` reads every version again: on an intact store its row indexes and profiles
/// match; a profile edited, or a row index pointed at another version's (same row count), is
/// named by the recomputation itself, beside the commitment that no longer holds.
#[test]
fn deep_verify_recomputes_row_indexes_and_profiles() {
    let s = rich_store();
    let v = s.json(&["verify", "--deep", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    let n = db(&s)
        .query_row("SELECT count(*) FROM versions", [], |r| r.get::<_, u64>(0))
        .unwrap();
    assert_eq!(v["versions_recomputed"].as_u64(), Some(n), "{v}");
    assert_contains(&s.ok(&["verify", "--deep"]), "match what is stored");
    let saved = settle(&s);

    db(&s)
        .execute(
            "UPDATE column_profiles SET max_value = 'WO-9' WHERE version_id = 2 AND name = 'order_id'",
            [],
        )
        .unwrap();
    let r = s.run(&["verify", "--deep", "--json"]);
    assert_eq!(r.code, 1);
    let found: Value = serde_json::from_str(&r.stdout).unwrap();
    let found = found["problems"].as_array().unwrap();
    assert_named(found, "profile", "orders:v2", "order_id");

    restore(&s, &saved);
    // orders:v1 and orders:v2 have the same rows in other bytes (the trim changed cells).
    let other = query_one(&s, "SELECT row_index FROM versions WHERE id = 1");
    db(&s)
        .execute("UPDATE versions SET row_index = ?1 WHERE id = 2", [&other])
        .unwrap();
    let r = s.run(&["verify", "--deep", "--json"]);
    let found: Value = serde_json::from_str(&r.stdout).unwrap();
    let found = found["problems"].as_array().unwrap();
    assert_named(
        found,
        "row_index",
        "orders:v2",
        "does not match the version's bytes",
    );
}
