//! Sign-offs (`endorse`, `signatories`, `meanings`) checked against an implementation that is
//! not ours: OpenSSH's `ssh-keygen` makes the keys (`-t ed25519`, RFC 8032 keys in the OpenSSH
//! private key format, with and without a passphrase) and checks every signature sluice writes
//! (`ssh-keygen -Y verify`, PROTOCOL.sshsig), accepting it as written and rejecting it after one
//! changed byte. The rest holds the promises of a sign-off: signing the audit head ties the
//! history to it (a chain rebuilt or cut short no longer matches), `verify` names a bad, missing
//! or unknown-key signature, and a signature is never carried to another version.
//! `tests/run` installs `ssh-keygen` (Debian's openssh-client) when it is missing.

mod common;

use std::path::PathBuf;
use std::process::{Command, Stdio};

use common::*;
use serde_json::Value;

/// The namespace sluice signs under (`endorse::NAMESPACE`); ssh-keygen must be told it.
const NAMESPACE: &str = "sluice-endorsement";

/// Makes an Ed25519 key pair with ssh-keygen: `NAME` and `NAME.pub` in the sandbox.
fn keygen(s: &Sandbox, name: &str, passphrase: &str) -> PathBuf {
    let path = s.path().join(name);
    let st = Command::new("ssh-keygen")
        .args(["-q", "-t", "ed25519", "-N", passphrase, "-C", name, "-f"])
        .arg(&path)
        .status()
        .expect("ssh-keygen runs (Debian: apt-get install openssh-client; tests/run installs it)");
    assert!(st.success(), "ssh-keygen could not make a key");
    path
}

/// The public key line ssh-keygen wrote, without its comment.
fn public_line(s: &Sandbox, name: &str) -> String {
    let text = std::fs::read_to_string(s.path().join(format!("{name}.pub"))).unwrap();
    text.split_whitespace()
        .take(2)
        .collect::<Vec<_>>()
        .join(" ")
}

/// `ssh-keygen -Y verify` of `message` and `signature` against an allowed-signers file that
/// names the holder of key `name` (the file format of ssh-keygen(1), "ALLOWED SIGNERS").
/// Returns whether ssh-keygen accepted the signature, and what it said.
fn ssh_keygen_verify(s: &Sandbox, name: &str, message: &[u8], signature: &str) -> (bool, String) {
    let allowed = s.file(
        "allowed_signers",
        format!("{name}@threerivers.example {}\n", public_line(s, name)),
    );
    let sig = s.file("statement.sig", signature);
    let mut child = Command::new("ssh-keygen")
        .args(["-Y", "verify", "-f"])
        .arg(&allowed)
        .args([
            "-I",
            &format!("{name}@threerivers.example"),
            "-n",
            NAMESPACE,
            "-s",
        ])
        .arg(&sig)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("ssh-keygen runs");
    use std::io::Write;
    child.stdin.take().unwrap().write_all(message).unwrap();
    let out = child.wait_with_output().unwrap();
    (
        out.status.success(),
        format!(
            "{}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        ),
    )
}

/// Splits an endorsement file into the signed statement and the armored signature.
fn split(file: &str) -> (String, String) {
    let at = file
        .find("-----BEGIN SSH SIGNATURE-----")
        .expect("an armored SSH signature");
    (file[..at].to_string(), file[at..].to_string())
}

/// A store with a raw file, a trim and a filter, and Ada Moss admitted as its first signatory.
fn store() -> Sandbox {
    let s = Sandbox::with_store();
    s.file(
        "quillby.csv",
        "order_id,shop,status,parts_cost\n\
         WO-1, Quillby Cycle Mend ,done,12.50\n\
         WO-2,Quillby Cycle Mend,cancelled,8.00\n\
         WO-3,  Quillby Cycle Mend,done,30.00\n",
    );
    s.ok(&[
        "receive",
        "quillby.csv",
        "--as",
        "orders",
        "--why",
        "Q3 export",
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
    keygen(&s, "ada", "");
    s.ok(&[
        "signatories",
        "--admit",
        "ada.pub",
        "--name",
        "Ada Moss",
        "--signing-key",
        "ada",
    ]);
    s
}

/// [`store`] with its latest version (`orders:v3`) approved by Ada Moss.
fn approved() -> Sandbox {
    let s = store();
    s.ok(&[
        "endorse",
        "orders",
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
    ]);
    s
}

fn db(s: &Sandbox) -> rusqlite::Connection {
    rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap()
}

/// Runs `verify --json` (with any extra arguments) and returns the problems; exit 1 required.
fn problems(s: &Sandbox, extra: &[&str]) -> Vec<Value> {
    let mut args = vec!["verify", "--json"];
    args.extend_from_slice(extra);
    let r = s.run(&args);
    assert_eq!(r.code, 1, "verify must fail:\n{}\n{}", r.stdout, r.stderr);
    let v: Value = serde_json::from_str(&r.stdout).unwrap();
    v["problems"].as_array().unwrap().clone()
}

#[track_caller]
fn assert_named(found: &[Value], kind: &str, subject: &str, detail: &str) {
    assert!(
        found.iter().any(|p| p["kind"] == kind
            && p["subject"] == subject
            && p["detail"].as_str().unwrap_or("").contains(detail)),
        "expected {kind} / {subject} / ...{detail}...\nfound:\n{}",
        serde_json::to_string_pretty(found).unwrap()
    );
}

/// The audit chain rebuilt as someone without a key could rebuild it: entries renumbered from
/// 1 and every hash and previous-hash recomputed (`store::audit::entry_hash`, the documented
/// encoding), so that the chain alone shows nothing.
fn rebuild_chain(c: &rusqlite::Connection) {
    let rows: Vec<(i64, String, String, String, String, String)> = c
        .prepare("SELECT seq, at, agent, action, subject, details FROM audit_log ORDER BY seq")
        .unwrap()
        .query_map([], |r| {
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                r.get(3)?,
                r.get(4)?,
                r.get(5)?,
            ))
        })
        .unwrap()
        .map(Result::unwrap)
        .collect();
    c.execute("DELETE FROM audit_log", []).unwrap();
    let mut prev = sluice::store::audit::GENESIS.to_string();
    for (i, (_, at, agent, action, subject, details)) in rows.into_iter().enumerate() {
        let seq = i as u64 + 1;
        let hash =
            sluice::store::audit::entry_hash(seq, &at, &agent, &action, &subject, &details, &prev)
                .hex();
        c.execute(
            "INSERT INTO audit_log (seq, at, agent, action, subject, details, prev_hash, hash)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            rusqlite::params![seq as i64, at, agent, action, subject, details, prev, hash],
        )
        .unwrap();
        prev = hash;
    }
}

#[test]
fn ssh_keygen_verifies_each_kind_of_sign_off_and_rejects_one_changed_byte() {
    let s = store();
    s.ok(&["report", "orders", "-o", "orders-report.md"]);
    let mut checked = 0;
    for (what, args) in [
        (
            "version",
            vec!["endorse", "orders", "--meaning", "approved"],
        ),
        (
            "report",
            vec![
                "endorse",
                "--report",
                "orders-report.md",
                "--meaning",
                "reviewed",
            ],
        ),
        (
            "audit head",
            vec!["endorse", "--audit-head", "--meaning", "prepared"],
        ),
    ] {
        let mut args = args.clone();
        args.extend(["--signing-key", "ada", "-o", "kept.endorsement"]);
        s.ok(&args);
        let file = std::fs::read_to_string(s.path().join("kept.endorsement")).unwrap();
        let (statement, signature) = split(&file);
        let (ok, said) = ssh_keygen_verify(&s, "ada", statement.as_bytes(), &signature);
        assert!(ok, "ssh-keygen refused sluice's {what} signature: {said}");
        assert_contains(&said, "Good \"sluice-endorsement\" signature");
        eprintln!(
            "endorse: ssh-keygen -Y verify accepts the {what} sign-off: {}",
            said.trim()
        );

        // One changed byte of the statement: the label's last character, or a digit of the time.
        for at in [statement.len() - 2, statement.find("at: ").unwrap() + 20] {
            let mut changed = statement.clone().into_bytes();
            changed[at] ^= 0x01;
            let (ok, said) = ssh_keygen_verify(&s, "ada", &changed, &signature);
            assert!(
                !ok,
                "ssh-keygen accepted a statement with byte {at} changed: {said}"
            );
        }
        // One changed byte inside the signature's base64 (a character of its last line).
        let mut sig = signature.clone().into_bytes();
        let last_line = signature.trim_end().rfind('\n').unwrap() - 8;
        sig[last_line] = if sig[last_line] == b'A' { b'B' } else { b'A' };
        let (ok, said) = ssh_keygen_verify(
            &s,
            "ada",
            statement.as_bytes(),
            &String::from_utf8(sig).unwrap(),
        );
        assert!(
            !ok,
            "ssh-keygen accepted a signature with one byte changed: {said}"
        );
        checked += 1;
    }
    assert_eq!(checked, 3);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(
        v["endorsements_checked"], 4,
        "one admission and three sign-offs: {v}"
    );
}

#[test]
fn the_signature_about_shows_is_the_one_ssh_keygen_accepts() {
    let s = approved();
    let about = s.json(&["about", "orders", "--json"]);
    assert_eq!(about["signed"], true, "{about}");
    let so = &about["sign_offs"][0];
    assert_eq!(so["meaning"], "approved");
    assert_eq!(so["name"], "Ada Moss");
    assert_eq!(so["status"], "verified");
    assert_eq!(so["label"], "orders:v3");
    assert_eq!(so["hash"], about["version"]["hash"]);
    let fp = so["fingerprint"].as_str().unwrap();
    // The fingerprint is the one ssh-keygen computes for the key (ssh-keygen -l).
    let out = Command::new("ssh-keygen")
        .args(["-l", "-f"])
        .arg(s.path().join("ada.pub"))
        .output()
        .unwrap();
    assert_contains(&String::from_utf8_lossy(&out.stdout), fp);
    let (ok, said) = ssh_keygen_verify(
        &s,
        "ada",
        so["statement"].as_str().unwrap().as_bytes(),
        so["signature"].as_str().unwrap(),
    );
    assert!(ok, "{said}");
    let text = s.ok(&["about", "orders"]);
    assert_contains(&text, "signed off   approved · Ada Moss");
    assert_contains(&text, "(signature verified)");
    assert_contains(&s.ok(&["about", "orders:v2"]), "signed off   no (unsigned)");
}

#[test]
fn a_key_protected_by_a_passphrase_is_opened_with_the_one_in_the_environment() {
    let s = store();
    keygen(&s, "bo", "chain-ring 42");
    let admit = [
        "signatories",
        "--admit",
        "bo.pub",
        "--name",
        "Bo Reed",
        "--signing-key",
        "ada",
    ];
    s.ok(&admit);
    let sign = [
        "endorse",
        "orders",
        "--meaning",
        "reviewed",
        "--signing-key",
        "bo",
    ];
    let err = s.fails(2, &sign);
    assert_contains(&err, "protected by a passphrase");
    assert_contains(&err, "SLUICE_KEY_PASSPHRASE");
    let wrong = s
        .command(&sign)
        .env("SLUICE_KEY_PASSPHRASE", "chain-ring 43")
        .output()
        .unwrap();
    assert_eq!(wrong.status.code(), Some(2));
    assert_contains(
        &String::from_utf8_lossy(&wrong.stderr),
        "the passphrase does not open the key",
    );
    let right = s
        .command(&sign)
        .env("SLUICE_KEY_PASSPHRASE", "chain-ring 42")
        .output()
        .unwrap();
    assert!(
        right.status.success(),
        "{}",
        String::from_utf8_lossy(&right.stderr)
    );
    assert_contains(
        &String::from_utf8_lossy(&right.stdout),
        "as reviewed: Bo Reed",
    );
    let about = s.json(&["about", "orders", "--json"]);
    assert_eq!(about["sign_offs"][0]["name"], "Bo Reed");
    assert_eq!(about["sign_offs"][0]["status"], "verified");
}

#[test]
fn only_signatories_sign_and_the_list_changes_only_by_signed_entries() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id,name\n1,Ada\n");
    s.ok(&["receive", "a.csv", "--as", "a"]);
    keygen(&s, "ada", "");
    keygen(&s, "bo", "");
    keygen(&s, "cy", "");
    // The first key is admitted by its holder: signed with another key, it is refused.
    let err = s.fails(
        2,
        &[
            "signatories",
            "--admit",
            "ada.pub",
            "--name",
            "Ada Moss",
            "--signing-key",
            "bo",
        ],
    );
    assert_contains(&err, "sign its admission with its own private key");
    // A key that is not a signatory cannot sign off.
    let err = s.fails(
        2,
        &[
            "endorse",
            "a",
            "--meaning",
            "approved",
            "--signing-key",
            "ada",
        ],
    );
    assert_contains(&err, "is not among this store's signatories");
    s.ok(&[
        "signatories",
        "--admit",
        "ada.pub",
        "--name",
        "Ada Moss",
        "--signing-key",
        "ada",
    ]);
    // Bo cannot admit himself once the store has a signatory.
    let err = s.fails(
        2,
        &[
            "signatories",
            "--admit",
            "bo.pub",
            "--name",
            "Bo Reed",
            "--signing-key",
            "bo",
        ],
    );
    assert_contains(&err, "is not among this store's signatories");
    s.ok(&[
        "signatories",
        "--admit",
        "bo.pub",
        "--name",
        "Bo Reed",
        "--signing-key",
        "ada",
    ]);
    s.ok(&[
        "endorse",
        "a",
        "--meaning",
        "prepared",
        "--signing-key",
        "bo",
    ]);
    let list = s.json(&["signatories", "--json"]);
    let bo_fp = list["signatories"][1]["fingerprint"]
        .as_str()
        .unwrap()
        .to_string();
    assert_eq!(list["signatories"][1]["name"], "Bo Reed");
    assert_eq!(
        list["signatories"][1]["admitted_by"],
        list["signatories"][0]["fingerprint"]
    );
    // Cy's key, never admitted, cannot retire anyone; Ada retires Bo.
    let err = s.fails(
        2,
        &["signatories", "--retire", &bo_fp, "--signing-key", "cy"],
    );
    assert_contains(&err, "is not among this store's signatories");
    s.ok(&["signatories", "--retire", &bo_fp, "--signing-key", "ada"]);
    let err = s.fails(
        2,
        &[
            "endorse",
            "a",
            "--meaning",
            "approved",
            "--signing-key",
            "bo",
        ],
    );
    assert_contains(&err, "is not among this store's signatories");
    // Bo's sign-off from before stays verified: his key was trusted when he signed.
    let about = s.json(&["about", "a", "--json"]);
    assert_eq!(about["sign_offs"][0]["status"], "verified", "{about}");
    // The last key cannot be retired: the store would trust no one.
    let ada_fp = list["signatories"][0]["fingerprint"]
        .as_str()
        .unwrap()
        .to_string();
    let err = s.fails(
        2,
        &["signatories", "--retire", &ada_fp, "--signing-key", "ada"],
    );
    assert_contains(&err, "last signatory");
    // A meaning must be known; a declared one may be used.
    let err = s.fails(
        2,
        &["endorse", "a", "--meaning", "filed", "--signing-key", "ada"],
    );
    assert_contains(&err, "declare it first");
    s.ok(&[
        "meanings",
        "--declare",
        "filed",
        "--says",
        "I filed these figures with the county",
    ]);
    s.ok(&["endorse", "a", "--meaning", "filed", "--signing-key", "ada"]);
    let m = s.json(&["meanings", "--json"]);
    assert_eq!(m["meanings"][3]["word"], "filed", "{m}");
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    // Every change is in the audit chain, in order.
    let actions: Vec<String> = db(&s)
        .prepare("SELECT action FROM audit_log WHERE seq > 2 ORDER BY seq")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert_eq!(
        actions,
        [
            "signatory_admitted",
            "signatory_admitted",
            "endorsed",
            "signatory_retired",
            "meaning_declared",
            "endorsed"
        ]
    );
}

#[test]
fn a_signed_head_no_longer_matches_a_chain_rebuilt_with_one_entry_changed() {
    let s = store();
    s.ok(&[
        "endorse",
        "--audit-head",
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
        "-o",
        "head.endorsement",
    ]);
    let head_seq = {
        let (statement, _) =
            split(&std::fs::read_to_string(s.path().join("head.endorsement")).unwrap());
        statement
            .lines()
            .find_map(|l| l.strip_prefix("label: "))
            .unwrap()
            .to_string()
    };
    let v = s.json(&["verify", "--json", "--endorsement", "head.endorsement"]);
    assert_eq!(v["intact"], true, "{v}");
    // The time of the trim's entry moved by a minute, and the chain rebuilt after it.
    let c = db(&s);
    c.execute(
        "UPDATE audit_log SET at = replace(at, substr(at, 15, 2), printf('%02d', (substr(at, 15, 2) + 1) % 60)) WHERE action = 'apply' AND seq = 3",
        [],
    )
    .unwrap();
    rebuild_chain(&c);
    drop(c);
    let found = problems(&s, &[]);
    // The chain itself is consistent again: only the signed head gives the change away.
    assert!(
        found.iter().all(|p| p["kind"] != "audit"),
        "{}",
        serde_json::to_string_pretty(&found).unwrap()
    );
    let subject = format!("audit entry {head_seq}");
    assert_named(
        &found,
        "signed_subject",
        &subject,
        "the chain was rebuilt or changed",
    );
    // The endorsement kept outside the store finds it too.
    let found = problems(&s, &["--endorsement", "head.endorsement"]);
    assert_named(&found, "signed_subject", &subject, "head.endorsement");
}

#[test]
fn a_store_cut_short_before_its_signed_head_is_found_by_the_endorsement_kept_outside() {
    let s = store();
    let before: i64 = db(&s)
        .query_row("SELECT max(seq) FROM audit_log", [], |r| r.get(0))
        .unwrap();
    s.ok(&[
        "endorse",
        "--audit-head",
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
        "-o",
        "head.endorsement",
    ]);
    // The last entries cut off: the admission and the sign-off, with the rows they wrote, so
    // that what is left is a consistent store of the history before them.
    let c = db(&s);
    c.execute("DELETE FROM endorsements", []).unwrap();
    c.execute("DELETE FROM audit_log WHERE seq >= ?1", [before])
        .unwrap();
    drop(c);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(
        v["intact"], true,
        "a store cut short looks whole by itself: {v}"
    );
    let found = problems(&s, &["--endorsement", "head.endorsement"]);
    assert_named(
        &found,
        "signed_subject",
        &format!("audit entry {before}"),
        "entries were cut off the end",
    );
    assert_named(
        &found,
        "signature_unknown_key",
        &format!("audit entry {before}"),
        "never admitted",
    );
}

#[test]
fn verify_names_a_bad_a_missing_and_an_unknown_key_signature() {
    // Bad: one byte of the stored signature changed.
    let s = approved();
    let c = db(&s);
    let sig: String = c
        .query_row(
            "SELECT signature FROM endorsements WHERE kind = 'version'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    let mut b = sig.clone().into_bytes();
    let at = sig.trim_end().rfind('\n').unwrap() - 8;
    b[at] = if b[at] == b'A' { b'B' } else { b'A' };
    c.execute(
        "UPDATE endorsements SET signature = ?1 WHERE kind = 'version'",
        [String::from_utf8(b).unwrap()],
    )
    .unwrap();
    drop(c);
    let found = problems(&s, &[]);
    assert_named(&found, "signature_bad", "orders:v3", "does not verify");
    assert_eq!(
        s.json(&["about", "orders", "--json"])["sign_offs"][0]["status"],
        "bad_signature"
    );

    // Bad: the meaning changed in the record (approved -> reviewed), the signature kept.
    let s = approved();
    db(&s)
        .execute(
            "UPDATE endorsements SET meaning = 'reviewed' WHERE kind = 'version'",
            [],
        )
        .unwrap();
    let found = problems(&s, &[]);
    assert_named(&found, "signature_bad", "orders:v3", "meaning");

    // Missing: the signature emptied.
    let s = approved();
    db(&s)
        .execute(
            "UPDATE endorsements SET signature = '' WHERE kind = 'version'",
            [],
        )
        .unwrap();
    let found = problems(&s, &[]);
    assert_named(&found, "signature_missing", "orders:v3", "has no signature");
    assert_eq!(
        s.json(&["about", "orders", "--json"])["sign_offs"][0]["status"],
        "missing_signature"
    );

    // Unknown key: the admission taken out with its audit entry and the chain rebuilt, so that
    // the chain and the row commitments hold and only the signature check sees it.
    let s = approved();
    let c = db(&s);
    c.execute("DELETE FROM endorsements WHERE kind = 'admission'", [])
        .unwrap();
    c.execute(
        "DELETE FROM audit_log WHERE action = 'signatory_admitted'",
        [],
    )
    .unwrap();
    rebuild_chain(&c);
    drop(c);
    let found = problems(&s, &[]);
    assert_eq!(
        found.len(),
        1,
        "{}",
        serde_json::to_string_pretty(&found).unwrap()
    );
    assert_named(
        &found,
        "signature_unknown_key",
        "orders:v3",
        "not among the store's signatories",
    );
    assert_eq!(
        s.json(&["about", "orders", "--json"])["sign_offs"][0]["status"],
        "unknown_key"
    );
}

#[test]
fn a_withdrawn_step_or_a_rerun_makes_unsigned_versions() {
    let s = approved();
    assert_eq!(s.json(&["about", "orders:v3", "--json"])["signed"], true);
    // Withdrawing the trim records the table before it (v4) and the filter again on top (v5).
    s.ok(&["withdraw", "orders:v2", "--why", "the spaces mark a branch"]);
    for v in ["orders:v4", "orders:v5"] {
        let about = s.json(&["about", v, "--json"]);
        assert_eq!(about["signed"], false, "{v}: {about}");
        assert_eq!(about["sign_offs"], Value::Array(vec![]), "{v}");
    }
    // The chain on next quarter's export: every version it makes is unsigned.
    s.file(
        "quillby_q4.csv",
        "order_id,shop,status,parts_cost\nWO-9, Quillby Cycle Mend ,done,3.00\n",
    );
    s.ok(&[
        "rerun",
        "orders:v3",
        "--with",
        "orders=quillby_q4.csv",
        "--why",
        "Q4",
    ]);
    let latest = s.json(&["about", "orders", "--json"]);
    assert_ne!(latest["version"]["seq"], 3);
    assert_eq!(latest["signed"], false, "{latest}");
    // The signed version keeps its sign-off.
    assert_eq!(s.json(&["about", "orders:v3", "--json"])["signed"], true);
    assert_eq!(s.json(&["verify", "--json"])["intact"], true);
}

/// The engine function the report calls: sign-offs by a version's or a report's hash, each
/// with its verification status, or marked not checked.
#[test]
fn the_engine_lists_sign_offs_by_hash_with_their_status() {
    let s = store();
    s.ok(&["report", "orders", "-o", "orders-report.md"]);
    s.ok(&[
        "endorse",
        "orders",
        "--meaning",
        "prepared",
        "--signing-key",
        "ada",
    ]);
    s.ok(&[
        "endorse",
        "orders",
        "--meaning",
        "approved",
        "--signing-key",
        "ada",
    ]);
    s.ok(&[
        "endorse",
        "--report",
        "orders-report.md",
        "--meaning",
        "reviewed",
        "--signing-key",
        "ada",
    ]);
    let store = sluice::store::Store::open(s.path()).unwrap();
    let v = sluice::refs::resolve(&store.lineage, "orders").unwrap();
    let offs = sluice::endorse::sign_offs(&store, &v.hash, true).unwrap();
    let meanings: Vec<&str> = offs.iter().map(|o| o.meaning.as_str()).collect();
    assert_eq!(meanings, ["prepared", "approved"]);
    assert!(offs
        .iter()
        .all(|o| o.status == sluice::endorse::SignatureStatus::Verified
            && o.name == "Ada Moss"
            && o.fingerprint.starts_with("SHA256:")));
    let unchecked = sluice::endorse::sign_offs_of_version(&store, &v, false).unwrap();
    assert!(unchecked
        .iter()
        .all(|o| o.status == sluice::endorse::SignatureStatus::NotChecked));
    let report = blake3::hash(&std::fs::read(s.path().join("orders-report.md")).unwrap())
        .to_hex()
        .to_string();
    let offs = sluice::endorse::sign_offs(&store, &report, true).unwrap();
    assert_eq!(offs.len(), 1);
    assert_eq!(
        (offs[0].kind.as_str(), offs[0].meaning.as_str()),
        ("report", "reviewed")
    );
    // `identify` of the report file names its sign-off, with its status.
    let id = s.json(&["identify", "orders-report.md", "--json"]);
    assert_eq!(id["sign_offs"][0]["meaning"], "reviewed", "{id}");
    assert_eq!(id["sign_offs"][0]["status"], "verified", "{id}");
    assert_contains(
        &s.ok(&["identify", "orders-report.md"]),
        "signed off   reviewed · Ada Moss",
    );
    // A file that is not a report this store wrote cannot be signed as one.
    s.file("other.md", "# not a report\n");
    let err = s.fails(
        2,
        &[
            "endorse",
            "--report",
            "other.md",
            "--meaning",
            "reviewed",
            "--signing-key",
            "ada",
        ],
    );
    assert_contains(&err, "is not a report this store wrote");
}

#[test]
fn a_failed_sign_off_leaves_the_store_as_it_was() {
    let s = store();
    let before = s.snapshot();
    s.fails(
        2,
        &[
            "endorse",
            "orders",
            "--meaning",
            "approved",
            "--signing-key",
            "missing-key",
        ],
    );
    s.fails(
        2,
        &[
            "endorse",
            "orders:v9",
            "--meaning",
            "approved",
            "--signing-key",
            "ada",
        ],
    );
    s.fails(
        2,
        &[
            "endorse",
            "orders",
            "--meaning",
            "approved",
            "--signing-key",
            "ada.pub",
        ],
    );
    s.fails(
        2,
        &[
            "endorse",
            "orders",
            "--meaning",
            "approved",
            "--signing-key",
            "ada",
            "-o",
            "no/such/folder/x.endorsement",
        ],
    );
    assert_eq!(s.snapshot(), before);
}

/// The report's sign-off block reads the store's sign-offs and checks each signature: an
/// approval verifies, and after its signature is changed in the database the same report shows
/// it failed (and the report's verification fails with it).
#[test]
fn the_report_shows_each_sign_off_and_whether_it_verifies() {
    let s = approved();
    s.ok(&["report", "orders", "-o", "orders.json"]);
    let report: Value =
        serde_json::from_str(&std::fs::read_to_string(s.path().join("orders.json")).unwrap())
            .unwrap();
    let lines = report["signoffs"].as_array().expect("signoffs listed");
    assert_eq!(lines.len(), 1, "{report}");
    assert_eq!(lines[0]["meaning"], "approved");
    assert_eq!(lines[0]["name"], "Ada Moss");
    assert_eq!(lines[0]["status"], "verified");
    s.ok(&["report", "orders", "-o", "orders.md"]);
    let md = std::fs::read_to_string(s.path().join("orders.md")).unwrap();
    assert!(md.contains("Ada Moss"), "{md}");
    assert!(md.contains("signature verified"), "{md}");

    // One changed byte of the stored signature.
    let c = db(&s);
    let sig: String = c
        .query_row(
            "SELECT signature FROM endorsements WHERE meaning = 'approved'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    // The last line of the armored body before the END line holds signature bytes.
    let mut lines: Vec<String> = sig.lines().map(str::to_string).collect();
    let body = lines.len() - 2;
    let mut chars: Vec<char> = lines[body].chars().collect();
    chars[4] = if chars[4] == 'Q' { 'R' } else { 'Q' };
    lines[body] = chars.into_iter().collect();
    let flipped = lines.join("\n") + if sig.ends_with('\n') { "\n" } else { "" };
    assert_ne!(flipped, sig);
    c.execute(
        "UPDATE endorsements SET signature = ?1 WHERE meaning = 'approved'",
        [&flipped],
    )
    .unwrap();
    drop(c);
    s.fails(1, &["report", "orders", "-o", "tampered.json"]);
    let report: Value =
        serde_json::from_str(&std::fs::read_to_string(s.path().join("tampered.json")).unwrap())
            .unwrap();
    assert_ne!(report["signoffs"][0]["status"], "verified", "{report}");
    assert_eq!(report["verification"]["verdict"], "failed", "{report}");
}
