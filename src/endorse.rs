//! Sign-offs: a person's signature, with a stated meaning, over a version, a written report or
//! the audit head, and the list of keys the store trusts (its signatories), changed only by
//! signed admissions and retirements. All of it is kept as endorsements (`model::Endorsement`):
//! the exact statement signed and its signature, Ed25519 (RFC 8032) in the OpenSSH signature
//! format (PROTOCOL.sshsig) under the namespace [`NAMESPACE`], made and checked by RustCrypto's
//! `ssh-key` crate, so that `ssh-keygen -Y verify` can check every one of them as well.
//!
//! The trusted keys are what the admissions and retirements leave when read in recording
//! order ([`assess`]). The first key is admitted by its holder alone: its admission must be
//! signed by the key it admits (proof that the holder has the private key). Every later
//! admission or retirement must be signed by a key trusted at that point. A store cannot prove
//! who admitted its first key; an organisation writes that key's fingerprint down outside the
//! store (README.md, "Sign-offs").
//!
//! The statement (UTF-8, one `field: value` per line, in this order):
//!
//! ```text
//! sluice endorsement 1
//! kind: version | report | audit_head | admission | retirement
//! meaning: approved
//! name: Ada Moss
//! at: 2026-12-03T07:00:00.000Z
//! key: SHA256:...            (the signing key's fingerprint)
//! store: blake3:...          (the hash of the store's first audit entry)
//! subject: blake3:...        (or the fingerprint of the key admitted or retired)
//! label: q3_by_shop:v1       (NAME:vN, a report's file, an audit entry's number, a name)
//! admitted-key: ssh-ed25519 AAAA...   (admissions only)
//! ```

use std::path::Path;

use serde::Serialize;
use ssh_key::{Algorithm, HashAlg, LineEnding, PrivateKey, PublicKey, SshSig};

use crate::error::{Error, ErrorKind, Result};
use crate::model::{Agent, Endorsement, Meaning, Version};
use crate::store::Store;

/// The signature namespace of every sluice endorsement (PROTOCOL.sshsig: a signature made for
/// one purpose cannot be taken for another's).
pub const NAMESPACE: &str = "sluice-endorsement";

/// The first line of every statement.
const HEADER: &str = "sluice endorsement 1";

/// The meanings every store knows.
pub const BUILT_IN_MEANINGS: &[(&str, &str)] = &[
    ("prepared", "I prepared this and stand behind its content"),
    (
        "reviewed",
        "I reviewed this and found it fit for its purpose",
    ),
    ("approved", "I approve this for release or filing"),
];

/// The caution that goes with sign-offs wherever they are shown to a reader (README.md and the
/// report's sign-off block).
pub const CAUTION: &str = "These signatures support, but do not by themselves make a system \
compliant with, electronic-record and electronic-signature rules such as US 21 CFR Part 11 or \
the EU's eIDAS regulation. What a signature means for your organisation, and whether these fit \
its rules, is for its compliance staff to decide; this is not legal advice.";

/// The audit action of a sign-off, an admission, a retirement and a declared meaning.
pub const ENDORSED: &str = "endorsed";
pub const ADMITTED: &str = "signatory_admitted";
pub const RETIRED: &str = "signatory_retired";
pub const MEANING_DECLARED: &str = "meaning_declared";

/// The action a written report is recorded under (`report::AUDIT_ACTION`; the report module
/// sits above this one).
const REPORT_WRITTEN: &str = "report_written";

/// A private key loaded for signing.
pub struct SigningKey {
    key: PrivateKey,
}

impl SigningKey {
    /// The key's SHA-256 fingerprint, as `ssh-keygen -l` prints it (`SHA256:...`).
    pub fn fingerprint(&self) -> String {
        self.key
            .public_key()
            .fingerprint(HashAlg::Sha256)
            .to_string()
    }

    /// The public half as an OpenSSH public key line, without comment.
    pub fn public_line(&self) -> String {
        public_line(self.key.public_key())
    }
}

fn public_line(k: &PublicKey) -> String {
    let mut k = k.clone();
    k.set_comment("");
    k.to_openssh()
        .map(|s| s.trim().to_string())
        .unwrap_or_default()
}

/// Reads an OpenSSH private key file (what `ssh-keygen -t ed25519` writes). A key protected
/// by a passphrase needs `passphrase`; only Ed25519 keys are accepted.
pub fn load_key(path: &Path, passphrase: Option<&str>) -> Result<SigningKey> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let key = PrivateKey::from_openssh(text.trim()).map_err(|_| {
        Error::usage(format!(
            "{} is not an OpenSSH private key; give the private key file `ssh-keygen -t ed25519` writes (not the .pub file)",
            path.display()
        ))
    })?;
    let key = if key.is_encrypted() {
        let Some(p) = passphrase else {
            return Err(Error::usage(format!(
                "the key {} is protected by a passphrase; put the passphrase in SLUICE_KEY_PASSPHRASE",
                path.display()
            )));
        };
        key.decrypt(p.as_bytes()).map_err(|_| {
            Error::usage(format!(
                "the passphrase does not open the key {}; check SLUICE_KEY_PASSPHRASE",
                path.display()
            ))
        })?
    } else {
        key
    };
    if key.algorithm() != Algorithm::Ed25519 {
        return Err(Error::usage(format!(
            "the key {} is {}; sign-offs take Ed25519 keys (make one with `ssh-keygen -t ed25519`)",
            path.display(),
            key.algorithm()
        )));
    }
    Ok(SigningKey { key })
}

/// Reads an OpenSSH public key line (a `.pub` file's content); only Ed25519.
pub fn parse_public_key(text: &str) -> Result<PublicKey> {
    let k = PublicKey::from_openssh(text.trim()).map_err(|_| {
        Error::usage(
            "not an OpenSSH public key line (the .pub file `ssh-keygen -t ed25519` writes)",
        )
    })?;
    if k.algorithm() != Algorithm::Ed25519 {
        return Err(Error::usage(format!(
            "the public key is {}; sign-offs take Ed25519 keys",
            k.algorithm()
        )));
    }
    Ok(k)
}

/// How a signature checks out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SignatureStatus {
    /// The signature is over the statement, by the key named, and that key was trusted then.
    Verified,
    /// The signature does not verify, or the record says something else than the statement.
    BadSignature,
    /// The record has no signature.
    MissingSignature,
    /// The signature verifies but its key was not among the store's signatories then.
    UnknownKey,
    /// Not checked (asked for without checking).
    NotChecked,
}

impl SignatureStatus {
    pub fn describe(self) -> &'static str {
        match self {
            SignatureStatus::Verified => "signature verified",
            SignatureStatus::BadSignature => "BAD SIGNATURE",
            SignatureStatus::MissingSignature => "SIGNATURE MISSING",
            SignatureStatus::UnknownKey => "UNKNOWN KEY",
            SignatureStatus::NotChecked => "signature not checked",
        }
    }
}

/// One sign-off, as a report or `about` shows it.
#[derive(Debug, Clone, Serialize)]
pub struct SignOff {
    /// The endorsement's number in the store.
    pub id: i64,
    /// "version", "report" or "audit_head".
    pub kind: String,
    pub meaning: String,
    /// The signer's printed name.
    pub name: String,
    /// When it was signed, RFC 3339 UTC.
    pub at: String,
    /// The signing key's SHA-256 fingerprint.
    pub fingerprint: String,
    /// What was signed: `NAME:vN`, a report's file name, an audit entry's number.
    pub label: String,
    /// The signed thing's BLAKE3 hash.
    pub hash: String,
    pub status: SignatureStatus,
    /// The exact text signed and its signature (`-----BEGIN SSH SIGNATURE-----`), for a check by
    /// another implementation (`ssh-keygen -Y verify -n sluice-endorsement`).
    pub statement: String,
    pub signature: String,
}

/// A key the store trusts, or trusted once.
#[derive(Debug, Clone, Serialize)]
pub struct Signatory {
    pub name: String,
    pub fingerprint: String,
    pub public_key: String,
    pub admitted_at: String,
    /// The fingerprint of the key that signed the admission (its own for the first).
    pub admitted_by: String,
    pub retired_at: Option<String>,
}

/// One thing found wrong with the endorsements.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Finding {
    /// "signature_bad", "signature_missing", "signature_unknown_key", "signed_subject".
    pub kind: &'static str,
    pub subject: String,
    pub detail: String,
}

/// Every endorsement checked in recording order: each one's status, the signatories that
/// result, and what is wrong.
pub struct Assessment {
    pub statuses: Vec<(Endorsement, SignatureStatus)>,
    pub signatories: Vec<Signatory>,
    pub findings: Vec<Finding>,
}

/// The statement's fields, in order.
struct Statement<'a> {
    kind: &'a str,
    meaning: &'a str,
    name: &'a str,
    at: &'a str,
    key: &'a str,
    store: &'a str,
    subject: &'a str,
    label: &'a str,
    admitted_key: Option<&'a str>,
}

impl Statement<'_> {
    fn text(&self) -> String {
        let mut t = format!(
            "{HEADER}\nkind: {}\nmeaning: {}\nname: {}\nat: {}\nkey: {}\nstore: {}\nsubject: {}\nlabel: {}\n",
            self.kind, self.meaning, self.name, self.at, self.key, self.store, self.subject, self.label
        );
        if let Some(k) = self.admitted_key {
            t.push_str(&format!("admitted-key: {k}\n"));
        }
        t
    }
}

/// The statement's fields read back, by name.
fn fields(statement: &str) -> Option<Vec<(&str, &str)>> {
    let mut lines = statement.lines();
    if lines.next()? != HEADER {
        return None;
    }
    lines.map(|l| l.split_once(": ")).collect()
}

fn field<'a>(f: &[(&'a str, &'a str)], name: &str) -> Option<&'a str> {
    f.iter().find(|(k, _)| *k == name).map(|(_, v)| *v)
}

/// The subject as a statement writes it: BLAKE3 hashes with their `blake3:` prefix.
fn subject_text(kind: &str, subject: &str) -> String {
    match kind {
        "admission" | "retirement" => subject.to_string(),
        _ => format!("blake3:{subject}"),
    }
}

/// The hash of the store's first audit entry: what ties a statement to this store.
fn store_id(store: &Store) -> Result<String> {
    Ok(store
        .lineage
        .audit_entries()?
        .first()
        .map(|e| format!("blake3:{}", e.hash))
        .unwrap_or_default())
}

fn one_line(what: &str, value: &str) -> Result<()> {
    if value.trim().is_empty() || value.contains(['\n', '\r']) || value.trim() != value {
        return Err(Error::usage(format!(
            "the {what} {value:?} must be one line of text, without spaces at either end"
        )));
    }
    Ok(())
}

/// The signature check of one endorsement, without the question of trust.
fn signature_status(e: &Endorsement) -> (SignatureStatus, Option<String>) {
    if e.signature.trim().is_empty() {
        return (
            SignatureStatus::MissingSignature,
            Some("it has no signature".into()),
        );
    }
    let Ok(sig) = SshSig::from_pem(e.signature.trim()) else {
        return (
            SignatureStatus::BadSignature,
            Some("its signature is not an SSH signature".into()),
        );
    };
    let Ok(key) = PublicKey::from_openssh(&e.public_key) else {
        return (
            SignatureStatus::BadSignature,
            Some("its public key cannot be read".into()),
        );
    };
    if key.fingerprint(HashAlg::Sha256).to_string() != e.fingerprint {
        return (
            SignatureStatus::BadSignature,
            Some("its fingerprint is not that of its public key".into()),
        );
    }
    if key.verify(NAMESPACE, e.statement.as_bytes(), &sig).is_err() {
        return (
            SignatureStatus::BadSignature,
            Some("the signature does not verify over the statement with the key named".into()),
        );
    }
    // The record's fields must be the ones signed.
    let Some(f) = fields(&e.statement) else {
        return (
            SignatureStatus::BadSignature,
            Some("the signed statement is not a sluice endorsement".into()),
        );
    };
    let subject = subject_text(&e.kind, &e.subject);
    for (name, value) in [
        ("kind", e.kind.as_str()),
        ("meaning", &e.meaning),
        ("name", &e.name),
        ("at", &e.signed_at),
        ("key", &e.fingerprint),
        ("subject", &subject),
        ("label", &e.label),
    ] {
        if field(&f, name) != Some(value) {
            return (
                SignatureStatus::BadSignature,
                Some(format!(
                    "the record's {name} ({value:?}) is not the one signed ({:?})",
                    field(&f, name).unwrap_or("")
                )),
            );
        }
    }
    if field(&f, "admitted-key") != e.admitted_key.as_deref() {
        return (
            SignatureStatus::BadSignature,
            Some("the record's admitted key is not the one signed".into()),
        );
    }
    (SignatureStatus::Verified, None)
}

/// How an endorsement names what it signed, for messages.
fn named(e: &Endorsement) -> String {
    match e.kind.as_str() {
        "audit_head" => format!("audit entry {}", e.label),
        "report" => format!("report {}", e.label),
        "admission" | "retirement" => e.subject.clone(),
        _ => e.label.clone(),
    }
}

/// Checks every endorsement in recording order (see the module documentation) and what each
/// sign-off names: the version with that number and hash, a recorded report with that hash,
/// the audit entry with that number and hash; and that each statement names this store.
pub fn assess(store: &Store) -> Result<Assessment> {
    let rows = store.lineage.endorsements()?;
    let entries = store.lineage.audit_entries()?;
    let this_store = entries
        .first()
        .map(|e| format!("blake3:{}", e.hash))
        .unwrap_or_default();
    let mut signatories: Vec<Signatory> = Vec::new();
    let mut statuses = Vec::with_capacity(rows.len());
    let mut findings = Vec::new();
    let trusted = |sigs: &[Signatory], fp: &str| {
        sigs.iter()
            .any(|s| s.fingerprint == fp && s.retired_at.is_none())
    };
    for e in rows {
        let (mut status, why) = signature_status(&e);
        let what = named(&e);
        if let Some(why) = why {
            let kind = if status == SignatureStatus::MissingSignature {
                "signature_missing"
            } else {
                "signature_bad"
            };
            findings.push(Finding {
                kind,
                subject: what.clone(),
                detail: format!(
                    "endorsement {} ({} {}, by {}, {}): {why}",
                    e.id, e.kind, e.meaning, e.name, e.fingerprint
                ),
            });
        }
        if status == SignatureStatus::Verified {
            let f = fields(&e.statement).unwrap_or_default();
            if field(&f, "store") != Some(this_store.as_str()) {
                status = SignatureStatus::BadSignature;
                findings.push(Finding {
                    kind: "signature_bad",
                    subject: what.clone(),
                    detail: format!(
                        "endorsement {}: its statement names another store ({}), not this one ({this_store}): it was copied from another store, or this store's audit chain was rebuilt from its first entry",
                        e.id,
                        field(&f, "store").unwrap_or("")
                    ),
                });
            }
        }
        let first = signatories.is_empty();
        if status == SignatureStatus::Verified {
            let self_signed = e.kind == "admission"
                && e.subject == e.fingerprint
                && e.admitted_key.as_deref() == Some(e.public_key.as_str());
            let ok = if first && e.kind == "admission" {
                self_signed
            } else {
                trusted(&signatories, &e.fingerprint)
            };
            if !ok {
                status = SignatureStatus::UnknownKey;
                findings.push(Finding {
                    kind: "signature_unknown_key",
                    subject: what.clone(),
                    detail: format!(
                        "endorsement {} ({} {}, by {}): signed with key {}, which was not among the store's signatories then{}",
                        e.id,
                        e.kind,
                        e.meaning,
                        e.name,
                        e.fingerprint,
                        if first && e.kind == "admission" {
                            " (the first admission must be signed by the key it admits)"
                        } else {
                            ""
                        }
                    ),
                });
            }
        }
        if status == SignatureStatus::Verified {
            match e.kind.as_str() {
                "admission" => {
                    if let Some(k) = &e.admitted_key {
                        signatories
                            .retain(|s| s.fingerprint != e.subject || s.retired_at.is_some());
                        signatories.push(Signatory {
                            name: e.label.clone(),
                            fingerprint: e.subject.clone(),
                            public_key: k.clone(),
                            admitted_at: e.signed_at.clone(),
                            admitted_by: e.fingerprint.clone(),
                            retired_at: None,
                        });
                    }
                }
                "retirement" => {
                    for s in signatories.iter_mut() {
                        if s.fingerprint == e.subject && s.retired_at.is_none() {
                            s.retired_at = Some(e.signed_at.clone());
                        }
                    }
                }
                _ => {}
            }
        }
        if let Some(problem) = subject_problem(store, &entries, &e)? {
            findings.push(Finding {
                kind: "signed_subject",
                subject: what,
                detail: format!(
                    "endorsement {} ({} by {}): {problem}",
                    e.id, e.meaning, e.name
                ),
            });
        }
        statuses.push((e, status));
    }
    Ok(Assessment {
        statuses,
        signatories,
        findings,
    })
}

/// What is wrong with the thing a sign-off names, if anything.
fn subject_problem(
    store: &Store,
    entries: &[crate::model::AuditEntry],
    e: &Endorsement,
) -> Result<Option<String>> {
    Ok(match e.kind.as_str() {
        "version" => {
            let found = store
                .lineage
                .versions_by_hash_prefix(&e.subject)?
                .into_iter()
                .any(|v| v.hash == e.subject && v.label() == e.label);
            (!found).then(|| {
                format!(
                    "the store has no version {} with hash blake3:{} (the version it signed was changed or removed)",
                    e.label, e.subject
                )
            })
        }
        "report" => {
            let found = entries.iter().any(|a| {
                a.action == REPORT_WRITTEN
                    && serde_json::from_str::<serde_json::Value>(&a.details)
                        .ok()
                        .is_some_and(|d| d["report"] == e.subject.as_str())
            });
            (!found).then(|| {
                format!(
                    "no report with hash blake3:{} is recorded in the audit chain",
                    e.subject
                )
            })
        }
        "audit_head" => head_problem(entries, &e.label, &e.subject),
        _ => None,
    })
}

/// Whether the chain still holds the signed head: entry `seq` with hash `hash`.
fn head_problem(entries: &[crate::model::AuditEntry], seq: &str, hash: &str) -> Option<String> {
    let Ok(n) = seq.parse::<u64>() else {
        return Some(format!("{seq:?} is not an audit entry's number"));
    };
    let last = entries.last().map_or(0, |e| e.seq);
    match entries.iter().find(|e| e.seq == n) {
        None => Some(format!(
            "the audit chain ends at entry {last}, before the signed head (entry {n}): entries were cut off the end"
        )),
        Some(a) if a.hash != hash => Some(format!(
            "audit entry {n} is no longer the signed head (its hash is {}, the signature is over {hash}): the chain was rebuilt or changed",
            a.hash
        )),
        Some(_) => None,
    }
}

/// The keys the store trusts now (retired ones too, with when).
pub fn signatories(store: &Store) -> Result<Vec<Signatory>> {
    Ok(assess(store)?.signatories)
}

/// The meanings a sign-off may state: the built-in ones, then those the store declared.
pub fn meanings(store: &Store) -> Result<Vec<Meaning>> {
    let mut out: Vec<Meaning> = BUILT_IN_MEANINGS
        .iter()
        .map(|(w, d)| Meaning {
            word: (*w).to_string(),
            description: (*d).to_string(),
            declared_at: None,
        })
        .collect();
    out.extend(store.lineage.meanings()?);
    Ok(out)
}

/// Declares a meaning sign-offs may state (recorded in the audit chain).
pub fn declare_meaning(
    store: &mut Store,
    word: &str,
    description: &str,
    agent: &Agent,
) -> Result<Meaning> {
    one_line("meaning", word)?;
    if !word
        .chars()
        .all(|c| c.is_alphanumeric() || c == '-' || c == '_' || c == ' ')
    {
        return Err(Error::usage(format!(
            "the meaning {word:?} may hold letters, digits, spaces, - and _ only"
        )));
    }
    one_line("description", description)?;
    if meanings(store)?.iter().any(|m| m.word == word) {
        return Err(Error::usage(format!(
            "the meaning {word:?} is already known; `sluice meanings` lists them"
        )));
    }
    if ["admitted", "retired"].contains(&word) {
        return Err(Error::usage(format!(
            "{word:?} is the meaning of a change to the signatories; choose another word"
        )));
    }
    let at = crate::clock::now_rfc3339();
    let m = Meaning {
        word: word.to_string(),
        description: description.to_string(),
        declared_at: Some(at.clone()),
    };
    store.write(|tx| {
        let id = tx.insert_meaning(&m, &at)?;
        tx.audit(
            agent,
            MEANING_DECLARED,
            word,
            &serde_json::json!({ "meaning": id, "description": description }),
            &at,
        )
    })?;
    Ok(m)
}

/// What a sign-off is over.
pub enum Target<'a> {
    /// A version, by reference (`NAME`, `NAME:vN`, `blake3:HEX`).
    Version(&'a str),
    /// A written report, by its bytes (it must be recorded in this store's audit chain).
    Report(&'a [u8]),
    /// The audit chain's last entry, and so the whole history up to it.
    AuditHead,
}

/// Signs `target` with `key` under `meaning`, and records the endorsement with its audit
/// entry. The key must be among the store's signatories; the printed name is the one it was
/// admitted under.
pub fn endorse(
    store: &mut Store,
    target: Target<'_>,
    meaning: &str,
    key: &SigningKey,
    agent: &Agent,
) -> Result<Endorsement> {
    if !meanings(store)?.iter().any(|m| m.word == meaning) {
        let known: Vec<String> = meanings(store)?.into_iter().map(|m| m.word).collect();
        return Err(Error::usage(format!(
            "the meaning {meaning:?} is not known to this store (known: {}); declare it first with `sluice meanings --declare WORD --says TEXT`",
            known.join(", ")
        )));
    }
    let signer = active_signatory(store, key)?;
    let entries = store.lineage.audit_entries()?;
    let (kind, subject, label) = match target {
        Target::Version(reference) => {
            let v = crate::refs::resolve(&store.lineage, reference)?;
            ("version", v.hash.clone(), v.label())
        }
        Target::Report(bytes) => {
            let hash = blake3::hash(bytes).to_hex().to_string();
            let entry = entries.iter().find(|a| {
                a.action == REPORT_WRITTEN
                    && serde_json::from_str::<serde_json::Value>(&a.details)
                        .ok()
                        .is_some_and(|d| d["report"] == hash.as_str())
            });
            let Some(entry) = entry else {
                return Err(Error::usage(format!(
                    "this file (blake3:{hash}) is not a report this store wrote, or it was changed since; sign the file `sluice report` wrote, as it was written"
                )));
            };
            let d: serde_json::Value = serde_json::from_str(&entry.details).unwrap_or_default();
            let file = d["file"].as_str().unwrap_or("report").to_string();
            let file = Path::new(&file)
                .file_name()
                .map_or(file.clone(), |f| f.to_string_lossy().into_owned());
            ("report", hash, file)
        }
        Target::AuditHead => {
            let Some(last) = entries.last() else {
                return Err(Error::usage("the audit chain is empty; nothing to sign"));
            };
            ("audit_head", last.hash.clone(), last.seq.to_string())
        }
    };
    let head = entries.last().map(|e| e.seq);
    let e = signed(
        store,
        key,
        &signer.name,
        kind,
        meaning,
        &subject,
        &label,
        None,
    )?;
    record(store, e, agent, ENDORSED, head)
}

/// The signatory `key` belongs to, if the store trusts it now.
fn active_signatory(store: &Store, key: &SigningKey) -> Result<Signatory> {
    let fp = key.fingerprint();
    signatories(store)?
        .into_iter()
        .find(|s| s.fingerprint == fp && s.retired_at.is_none())
        .ok_or_else(|| {
            Error::usage(format!(
                "the key {fp} is not among this store's signatories; `sluice signatories` lists them, and one of them admits a new key with `sluice signatories --admit FILE.pub --name NAME --signing-key THEIR_KEY`"
            ))
        })
}

/// Admits a key to the signatories under a printed name, signed by `key`: the key itself for
/// the store's first signatory, else a signatory's key.
pub fn admit(
    store: &mut Store,
    public_key: &str,
    name: &str,
    key: &SigningKey,
    agent: &Agent,
) -> Result<Endorsement> {
    one_line("name", name)?;
    let admitted = parse_public_key(public_key)?;
    let admitted_fp = admitted.fingerprint(HashAlg::Sha256).to_string();
    let current = signatories(store)?;
    let signer_name = if current.is_empty() {
        if key.fingerprint() != admitted_fp {
            return Err(Error::usage(format!(
                "the store has no signatory yet: the first key is admitted by its holder, so sign its admission with its own private key (the key given is {}, the key admitted {admitted_fp})",
                key.fingerprint()
            )));
        }
        name.to_string()
    } else {
        if current
            .iter()
            .any(|s| s.fingerprint == admitted_fp && s.retired_at.is_none())
        {
            return Err(Error::usage(format!(
                "the key {admitted_fp} is already a signatory"
            )));
        }
        active_signatory(store, key)?.name
    };
    let head = store.lineage.audit_entries()?.last().map(|e| e.seq);
    let line = public_line(&admitted);
    let e = signed(
        store,
        key,
        &signer_name,
        "admission",
        "admitted",
        &admitted_fp,
        name,
        Some(&line),
    )?;
    record(store, e, agent, ADMITTED, head)
}

/// Retires a signatory's key, signed by a signatory's key (its own included). The last key
/// the store trusts cannot be retired.
pub fn retire(
    store: &mut Store,
    fingerprint: &str,
    key: &SigningKey,
    agent: &Agent,
) -> Result<Endorsement> {
    let current = signatories(store)?;
    let active: Vec<&Signatory> = current.iter().filter(|s| s.retired_at.is_none()).collect();
    let Some(target) = active.iter().find(|s| s.fingerprint == fingerprint) else {
        return Err(Error::usage(format!(
            "{fingerprint} is not a key the store trusts now; `sluice signatories` lists them"
        )));
    };
    if active.len() == 1 {
        return Err(Error::usage(
            "this is the store's last signatory; admit another key before retiring it",
        ));
    }
    let signer = active_signatory(store, key)?;
    let head = store.lineage.audit_entries()?.last().map(|e| e.seq);
    let e = signed(
        store,
        key,
        &signer.name,
        "retirement",
        "retired",
        fingerprint,
        &target.name.clone(),
        None,
    )?;
    record(store, e, agent, RETIRED, head)
}

/// Builds and signs a statement.
#[allow(clippy::too_many_arguments)]
fn signed(
    store: &Store,
    key: &SigningKey,
    name: &str,
    kind: &str,
    meaning: &str,
    subject: &str,
    label: &str,
    admitted_key: Option<&str>,
) -> Result<Endorsement> {
    let at = crate::clock::now_rfc3339();
    let fingerprint = key.fingerprint();
    let store_line = store_id(store)?;
    let subject_line = subject_text(kind, subject);
    let statement = Statement {
        kind,
        meaning,
        name,
        at: &at,
        key: &fingerprint,
        store: &store_line,
        subject: &subject_line,
        label,
        admitted_key,
    }
    .text();
    let signature = key
        .key
        .sign(NAMESPACE, HashAlg::Sha512, statement.as_bytes())
        .and_then(|s| s.to_pem(LineEnding::LF))
        .map_err(|e| ErrorKind::Internal(format!("signing failed: {e}")))?;
    Ok(Endorsement {
        id: 0,
        kind: kind.to_string(),
        subject: subject.to_string(),
        label: label.to_string(),
        meaning: meaning.to_string(),
        name: name.to_string(),
        signed_at: at,
        fingerprint,
        public_key: key.public_line(),
        admitted_key: admitted_key.map(str::to_string),
        statement,
        signature,
    })
}

/// Records a signed endorsement and its audit entry in one transaction, refusing when the
/// chain moved on since the statement was made (another command wrote meanwhile).
fn record(
    store: &mut Store,
    mut e: Endorsement,
    agent: &Agent,
    action: &str,
    head: Option<u64>,
) -> Result<Endorsement> {
    let subject = named(&e);
    store.write(|tx| {
        if tx.audit_head()?.map(|(s, _)| s) != head {
            return Err(Error::usage(
                "the store changed while the statement was being signed; run the command again",
            ));
        }
        e.id = tx.insert_endorsement(&e)?;
        tx.audit(
            agent,
            action,
            &subject,
            &serde_json::json!({
                "endorsement": e.id,
                "kind": e.kind,
                "meaning": e.meaning,
                "signed": e.subject,
                "name": e.name,
                "fingerprint": e.fingerprint,
            }),
            &e.signed_at,
        )
    })?;
    Ok(e)
}

fn sign_off(e: &Endorsement, status: SignatureStatus) -> SignOff {
    SignOff {
        id: e.id,
        kind: e.kind.clone(),
        meaning: e.meaning.clone(),
        name: e.name.clone(),
        at: e.signed_at.clone(),
        fingerprint: e.fingerprint.clone(),
        label: e.label.clone(),
        hash: e.subject.clone(),
        status,
        statement: e.statement.clone(),
        signature: e.signature.clone(),
    }
}

fn select(store: &Store, check: bool, keep: impl Fn(&Endorsement) -> bool) -> Result<Vec<SignOff>> {
    if check {
        Ok(assess(store)?
            .statuses
            .iter()
            .filter(|(e, _)| keep(e))
            .map(|(e, s)| sign_off(e, *s))
            .collect())
    } else {
        Ok(store
            .lineage
            .endorsements()?
            .iter()
            .filter(|e| keep(e))
            .map(|e| sign_off(e, SignatureStatus::NotChecked))
            .collect())
    }
}

/// The sign-offs over the version or report whose BLAKE3 hash (hex) is `hash`, oldest first,
/// each with its signature checked (`check`) or marked not checked. A version's sign-offs name
/// it by `NAME:vN` too: where two versions hold the same bytes, use [`sign_offs_of_version`].
pub fn sign_offs(store: &Store, hash: &str, check: bool) -> Result<Vec<SignOff>> {
    select(store, check, |e| {
        matches!(e.kind.as_str(), "version" | "report") && e.subject == hash
    })
}

/// The sign-offs over this very version (its hash and its `NAME:vN`): a version withdrawn and
/// made again, or made by a rerun, is another version and has none of its predecessor's.
pub fn sign_offs_of_version(store: &Store, v: &Version, check: bool) -> Result<Vec<SignOff>> {
    let label = v.label();
    select(store, check, |e| {
        e.kind == "version" && e.subject == v.hash && e.label == label
    })
}

/// The sign-offs over the audit head, oldest first.
pub fn head_sign_offs(store: &Store, check: bool) -> Result<Vec<SignOff>> {
    select(store, check, |e| e.kind == "audit_head")
}

/// An endorsement as a file a person keeps outside the store: the statement, then the armored
/// signature. `ssh-keygen -Y verify` takes the part before `-----BEGIN SSH SIGNATURE-----` as
/// the message and the rest as the signature.
pub fn as_file(e: &Endorsement) -> String {
    format!(
        "{}{}",
        e.statement,
        e.signature.trim_end().to_string() + "\n"
    )
}

/// Holds an endorsement file kept outside the store against the store: its signature, its key
/// (one the store admitted), and what it signed (for the audit head: the chain still reaches
/// that entry with that hash, so a chain rebuilt or cut off is found).
pub fn check_file(store: &Store, text: &str) -> Result<Vec<Finding>> {
    let marker = "-----BEGIN SSH SIGNATURE-----";
    let bad = |detail: String| Finding {
        kind: "signature_bad",
        subject: "endorsement file".into(),
        detail,
    };
    let Some(at) = text.find(marker) else {
        return Ok(vec![Finding {
            kind: "signature_missing",
            subject: "endorsement file".into(),
            detail: "the file holds no SSH signature".into(),
        }]);
    };
    let (statement, pem) = text.split_at(at);
    let Some(f) = fields(statement) else {
        return Ok(vec![bad("the file is not a sluice endorsement".into())]);
    };
    let get = |n: &str| field(&f, n).unwrap_or("").to_string();
    let (kind, label) = (get("kind"), get("label"));
    let shown = if kind == "audit_head" {
        format!("audit entry {label}")
    } else {
        label.clone()
    };
    let subject = get("subject");
    let subject_hash = subject
        .strip_prefix("blake3:")
        .unwrap_or(&subject)
        .to_string();
    let mut out = Vec::new();
    let sig = match SshSig::from_pem(pem.trim()) {
        Ok(s) => s,
        Err(_) => return Ok(vec![bad("its signature is not an SSH signature".into())]),
    };
    let key = PublicKey::from(sig.public_key().clone());
    let fp = key.fingerprint(HashAlg::Sha256).to_string();
    if key.verify(NAMESPACE, statement.as_bytes(), &sig).is_err() || get("key") != fp {
        out.push(bad(format!(
            "the signature does not verify over the statement ({kind} {label})"
        )));
        return Ok(out);
    }
    let assessment = assess(store)?;
    if !assessment.signatories.iter().any(|s| s.fingerprint == fp) {
        out.push(Finding {
            kind: "signature_unknown_key",
            subject: shown.clone(),
            detail: format!(
                "the endorsement file is signed with {fp}, which the store never admitted"
            ),
        });
    }
    let entries = store.lineage.audit_entries()?;
    if get("store") != store_id(store)? {
        out.push(Finding {
            kind: "signed_subject",
            subject: shown.clone(),
            detail: "the endorsement names another store, or this store's audit chain was rebuilt from its first entry".into(),
        });
    }
    let problem = match kind.as_str() {
        "audit_head" => head_problem(&entries, &label, &subject_hash),
        "version" | "report" => {
            let e = Endorsement {
                id: 0,
                kind: kind.clone(),
                subject: subject_hash,
                label: label.clone(),
                meaning: String::new(),
                name: String::new(),
                signed_at: String::new(),
                fingerprint: String::new(),
                public_key: String::new(),
                admitted_key: None,
                statement: String::new(),
                signature: String::new(),
            };
            subject_problem(store, &entries, &e)?
        }
        _ => None,
    };
    if let Some(p) = problem {
        out.push(Finding {
            kind: "signed_subject",
            subject: shown,
            detail: format!("the endorsement file's {kind} does not match the store: {p}"),
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn statement(admitted_key: Option<&str>) -> String {
        Statement {
            kind: "version",
            meaning: "approved",
            name: "Ada Moss",
            at: "2026-10-05T09:00:00.000Z",
            key: "SHA256:abc",
            store: "blake3:00",
            subject: "blake3:11",
            label: "q3_by_shop:v1",
            admitted_key,
        }
        .text()
    }

    #[test]
    fn a_statement_reads_back_field_by_field() {
        let text = statement(None);
        assert!(text.starts_with("sluice endorsement 1\nkind: version\n"));
        let f = fields(&text).unwrap();
        assert_eq!(field(&f, "label"), Some("q3_by_shop:v1"));
        assert_eq!(field(&f, "at"), Some("2026-10-05T09:00:00.000Z"));
        assert_eq!(field(&f, "admitted-key"), None);
        let with_key = statement(Some("ssh-ed25519 AAAA"));
        assert_eq!(
            field(&fields(&with_key).unwrap(), "admitted-key"),
            Some("ssh-ed25519 AAAA")
        );
        // Another first line, or a line without a field name, is not a statement.
        assert!(fields("sluice endorsement 2\nkind: version\n").is_none());
        assert!(fields("sluice endorsement 1\nkind version\n").is_none());
    }

    #[test]
    fn one_line_values_only() {
        assert!(one_line("name", "Ada Moss").is_ok());
        for bad in ["", " Ada", "Ada\nkind: report", "Ada\r"] {
            assert!(one_line("name", bad).is_err(), "{bad:?}");
        }
    }

    fn entry(seq: u64, hash: &str) -> crate::model::AuditEntry {
        crate::model::AuditEntry {
            seq,
            at: String::new(),
            agent: String::new(),
            action: String::new(),
            subject: String::new(),
            details: "{}".into(),
            prev_hash: String::new(),
            hash: hash.into(),
        }
    }

    #[test]
    fn a_signed_head_is_held_against_the_chain() {
        let chain = [entry(1, "a"), entry(2, "b"), entry(3, "c")];
        assert_eq!(head_problem(&chain, "2", "b"), None);
        assert!(head_problem(&chain, "2", "x")
            .unwrap()
            .contains("rebuilt or changed"));
        assert!(head_problem(&chain[..1], "2", "b")
            .unwrap()
            .contains("ends at entry 1, before the signed head (entry 2)"));
    }
}
