//! Proving a store is intact: every recorded object re-hashed, every row index well formed,
//! every database reference resolved, the audit chain checked from the first entry to the last.
//! `verify` reads only; it never repairs.

use serde::Serialize;

use crate::error::Result;
use crate::hash::Hash;
use crate::store::{audit, Store};
use crate::table::rowindex;

/// One thing found wrong.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Problem {
    /// "object_missing", "object_damaged", "object_size", "row_index", "database", "audit",
    /// "provenance", "cell_change", "audit_mismatch", "stray_file", "segment_damaged",
    /// "segment_object", "segment_index", "profile" (`--deep`), "signature_bad",
    /// "signature_missing", "signature_unknown_key", "signed_subject" (sign-offs and the
    /// signatories, `endorse`).
    pub kind: String,
    /// What is affected: an object hash, a table, an audit sequence number.
    pub subject: String,
    pub detail: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct VerifyReport {
    pub intact: bool,
    pub schema_version: i64,
    pub objects_checked: u64,
    pub bytes_checked: u64,
    pub versions_checked: u64,
    pub audit_entries_checked: u64,
    /// The hash of the last audit entry: written down elsewhere (a report, a filing, an email),
    /// it lets a later `verify` show that no entry was cut off the end of the chain.
    pub audit_head: Option<String>,
    /// Object files no database row refers to (left by an interrupted command; harmless).
    pub unreferenced_objects: u64,
    /// Temporary files left by interrupted commands (harmless).
    pub leftover_temp_files: u64,
    /// Audit entries written before entries committed to every row their command wrote (by an
    /// earlier sluice); they commit to their own fields and to the version, step, row index and
    /// provenance they name. Always the first entries of the chain.
    pub entries_without_row_commitments: u64,
    /// Database rows written in that time, which no row commitment covers.
    pub rows_before_commitments: u64,
    /// With `--deep`: versions whose row index and profile were computed again from their
    /// bytes, and recomputable versions computed again from their recipes.
    pub versions_recomputed: u64,
    /// Versions whose bytes the store keeps (stored or kept by request).
    pub versions_stored: u64,
    /// Versions recorded by hash and recipe whose bytes are computed when needed.
    pub versions_recomputable: u64,
    /// In a working copy borrowed in part: objects the lineage names that were left in the
    /// shared store (not checked here; `publish` finds them there).
    #[serde(skip_serializing_if = "is_zero")]
    pub objects_left_in_shared_store: u64,
    /// Recipes checked: the step is a built-in operation, its parameters read back in their
    /// canonical form and equal those its audit entry recorded, its input versions exist.
    pub recipes_checked: u64,
    /// Erasure orders carried out in the store, each with the versions whose remaining cells
    /// were proved against the commitment recorded before the erasure.
    pub erasure_orders: Vec<ErasureChecked>,
    /// Endorsements (sign-offs, admissions and retirements of signatories) whose signatures
    /// were checked against the keys the store trusted when each was made.
    pub endorsements_checked: u64,
    pub problems: Vec<Problem>,
}

/// One erasure order as `verify` found it.
#[derive(Debug, Clone, Serialize)]
pub struct ErasureChecked {
    pub order: i64,
    pub request: String,
    pub ordered_at: String,
    /// The versions it reached, each proved: its remaining cells with the kept leaves give
    /// the root recorded before the erasure, and its erased cells are empty.
    pub versions_proved: u64,
    pub cells_erased: u64,
}

/// Every version an erasure order reached, proved from what the store keeps now: its stored
/// form read (and hash-checked), each remaining cell's leaf computed from its value and its
/// salt (the punctured salt tree of the latest order that reached it), each erased cell's kept
/// leaf taken in its place, and the root computed again must be the one recorded before the
/// first erasure; every erased cell must be empty in the stored form. An earlier order's record
/// of a version a later order erased more of must name the same root, and its kept leaves must
/// be among the later one's (its salts were emptied then). A changed remaining cell, a moved
/// cell, a changed kept leaf or a cell erased beyond the orders gives a problem (kind
/// "erasure") naming the version and order.
fn erasure_problems(
    store: &Store,
    versions: &[crate::model::Version],
) -> Result<(Vec<ErasureChecked>, Vec<Problem>)> {
    use std::collections::BTreeMap;
    let mut out = Vec::new();
    let mut problems = Vec::new();
    let orders = store.lineage.erasure_orders()?;
    if orders.is_empty() {
        return Ok((out, problems));
    }
    let erased = store.lineage.erased_versions()?;
    let mut chains: BTreeMap<i64, Vec<&crate::store::erasure_records::ErasedVersion>> =
        BTreeMap::new();
    for e in &erased {
        chains.entry(e.version_id).or_default().push(e);
    }
    // The proof of each version from its latest record: Ok(kept leaves) or what is wrong.
    let mut proofs: BTreeMap<i64, std::result::Result<KeptLeaves, String>> = BTreeMap::new();
    for (id, chain) in &chains {
        let Some(v) = versions.iter().find(|v| v.id == *id) else {
            continue;
        };
        let Some(last) = chain.last() else { continue };
        let total: u64 = chain.iter().map(|e| e.n_erased).sum();
        proofs.insert(*id, prove_erased(store, v, last, total));
    }
    for o in &orders {
        let mut checked = ErasureChecked {
            order: o.id,
            request: o.request.clone(),
            ordered_at: o.ordered_at.clone(),
            versions_proved: 0,
            cells_erased: 0,
        };
        for e in erased.iter().filter(|e| e.order_id == o.id) {
            let Some(v) = versions.iter().find(|v| v.id == e.version_id) else {
                continue;
            };
            let mut say = |detail: String| {
                problems.push(problem(
                    "erasure",
                    v.label(),
                    format!("{detail} (erasure order {})", o.id),
                ))
            };
            let chain = &chains[&e.version_id];
            let last = chain.last().map_or(e.order_id, |l| l.order_id);
            match &proofs[&e.version_id] {
                Err(why) => {
                    // Said once, under the order whose record the proof used.
                    if last == e.order_id {
                        say(why.clone());
                    }
                    continue;
                }
                Ok(latest) if last != e.order_id => {
                    let later = chain.last().map_or(0, |l| l.order_id);
                    let Some(kept) = kept_leaves(&e.kept) else {
                        say("its kept leaves are malformed".into());
                        continue;
                    };
                    if chain.last().is_some_and(|l| l.root != e.root) {
                        say(format!(
                            "its recorded commitment differs from the one erasure order {later} recorded for the same version"
                        ));
                        continue;
                    }
                    if kept.iter().any(|(i, l)| latest.get(i) != Some(l)) {
                        say(format!(
                            "a leaf it kept is not among those erasure order {later} kept for the same version"
                        ));
                        continue;
                    }
                    if !e.salts.is_empty() {
                        say(format!(
                            "it still keeps salts that erasure order {later} punctured further"
                        ));
                        continue;
                    }
                }
                Ok(_) => {}
            }
            checked.versions_proved += 1;
            checked.cells_erased += e.n_erased;
        }
        out.push(checked);
    }
    Ok((out, problems))
}

type KeptLeaves = std::collections::BTreeMap<u64, crate::commitment::Bytes32>;

/// Each kept cell number (u64 LE) with its 32-byte leaf; `None` when malformed.
fn kept_leaves(b: &[u8]) -> Option<KeptLeaves> {
    if !b.len().is_multiple_of(40) {
        return None;
    }
    b.chunks_exact(40)
        .map(|c| {
            let i = u64::from_le_bytes(c[..8].try_into().ok()?);
            let l: crate::commitment::Bytes32 = c[8..].try_into().ok()?;
            Some((i, l))
        })
        .collect()
}

/// Proves version `v` from its latest erasure record `e` (see [`erasure_problems`]), whose
/// kept leaves must number `total`, the cells all its orders erased.
fn prove_erased(
    store: &Store,
    v: &crate::model::Version,
    e: &crate::store::erasure_records::ErasedVersion,
    total: u64,
) -> std::result::Result<KeptLeaves, String> {
    use crate::commitment::{self, Committer, Salts};
    let salts = Salts::from_bytes(&e.salts).ok_or("its kept salts are malformed")?;
    if !e.marked.len().is_multiple_of(8) {
        return Err("its kept leaves are malformed".into());
    }
    let kept = kept_leaves(&e.kept).ok_or("its kept leaves are malformed")?;
    if kept.len() as u64 != total {
        return Err(format!(
            "{total} erased cells are recorded, {} kept leaves",
            kept.len()
        ));
    }
    let n_cols = v.header.len() as u64;
    let mut c = Committer::new(&salts, v.n_rows, n_cols, kept.clone());
    let mut not_empty = None;
    store
        .objects
        .each_row(v, |row, r| {
            let cells: Vec<&[u8]> = (0..r.len()).map(|i| r.field(i)).collect();
            for (col, value) in cells.iter().enumerate() {
                let i = row * n_cols + col as u64;
                if kept.contains_key(&i) && !value.is_empty() && not_empty.is_none() {
                    not_empty = Some((row, col));
                }
            }
            c.row(cells);
            Ok(())
        })
        .map_err(|err| format!("its erased form cannot be read: {err}"))?;
    if let Some((row, col)) = not_empty {
        return Err(format!(
            "row {} column {} is recorded as erased but holds a value",
            row + 1,
            v.header.get(col).map_or("?", |s| s.as_str())
        ));
    }
    if let Some(i) = c.missing {
        return Err(format!(
            "cell {} (row {}) has neither a salt nor a kept leaf",
            i,
            i / n_cols.max(1) + 1
        ));
    }
    if commitment::hex(&c.finish().root(&v.header)) != e.root {
        return Err("its remaining cells do not give the commitment recorded before the erasure: a remaining cell or a kept leaf was changed".into());
    }
    Ok(kept)
}

fn problem(kind: &str, subject: impl Into<String>, detail: impl Into<String>) -> Problem {
    Problem {
        kind: kind.to_string(),
        subject: subject.into(),
        detail: detail.into(),
    }
}

pub fn verify(store: &Store) -> Result<VerifyReport> {
    verify_with(store, false)
}

/// [`verify`], and with `deep` also every version's row index and profile computed again from
/// its bytes and compared with what is stored ([`deep_problems`]).
pub fn verify_with(store: &Store, deep: bool) -> Result<VerifyReport> {
    store.lineage.snapshot(|| {
        let mut report = verify_snapshot(store)?;
        if deep {
            let (problems, n) = deep_problems(store, &report)?;
            report.versions_recomputed = n;
            report.problems.extend(problems);
            report.intact = report.problems.is_empty();
        }
        Ok(report)
    })
}

fn verify_snapshot(store: &Store) -> Result<VerifyReport> {
    let mut problems = Vec::new();
    let mut un = Unreadable::default();
    for p in un.or_default(store.lineage.integrity_problems()) {
        problems.push(problem("database", "lineage.db", p));
    }
    for p in un.or_default(store.lineage.consistency_problems()) {
        problems.push(problem("database", "lineage.db", p));
    }

    problems.extend(segment_problems(store)?);

    // Objects only recomputable versions name are not expected in the store.
    let unstored = un.or_default(store.lineage.unstored_objects());
    let recorded = un.or_default(store.lineage.objects());
    let mut bytes_checked = 0u64;
    let mut not_stored = 0u64;
    let mut left_in_shared = 0u64;
    let mut damaged = std::collections::HashSet::new();
    for (hex, kind, n_bytes) in &recorded {
        let Ok(hash) = hex.parse::<Hash>() else {
            problems.push(problem(
                "database",
                hex.clone(),
                "an object row holds a malformed hash",
            ));
            continue;
        };
        let backend = store.objects.backend();
        if unstored.contains(hex) && !backend.exists(&hash) {
            not_stored += 1;
            continue;
        }
        // An erased version's own bytes are gone by design; its erased form is an object
        // row of its own, checked here, and its cells are proved by `erasure_problems`.
        if store.objects.is_erased(&hash) {
            continue;
        }
        if store.objects.is_left_in_shared(&hash) && !backend.exists(&hash) {
            left_in_shared += 1;
            continue;
        }
        if !backend.exists(&hash) {
            problems.push(problem(
                "object_missing",
                hex.clone(),
                format!(
                    "{kind} object is missing ({})",
                    backend.describe(&hash).display()
                ),
            ));
            damaged.insert(hex.clone());
            continue;
        }
        match backend.size(&hash) {
            Ok(sz) if sz != *n_bytes => problems.push(problem(
                "object_size",
                hex.clone(),
                format!(
                    "{kind} object has {sz} bytes, {n_bytes} were recorded (truncated or extended)"
                ),
            )),
            _ => {}
        }
        match store.objects.check(&hash) {
            Ok(None) => bytes_checked += n_bytes,
            Ok(Some(actual)) => {
                problems.push(problem(
                    "object_damaged",
                    hex.clone(),
                    format!(
                        "{kind} object's content hashes to {actual}, not to its name ({})",
                        backend.describe(&hash).display()
                    ),
                ));
                damaged.insert(hex.clone());
            }
            Err(e) => {
                problems.push(problem("object_damaged", hex.clone(), e.to_string()));
                damaged.insert(hex.clone());
            }
        }
    }

    let versions = un.or_default(store.lineage.all_versions());
    for v in &versions {
        if damaged.contains(&v.row_index) {
            continue;
        }
        let Ok(h) = v.row_index.parse::<Hash>() else {
            continue;
        };
        if (unstored.contains(&v.row_index) || store.objects.is_left_in_shared(&h))
            && !store.objects.backend().exists(&h)
        {
            continue;
        }
        match store.objects.read_all(&h) {
            Ok(data) => match rowindex::validate(&data) {
                Ok(n) if n == v.n_rows => {}
                Ok(n) => problems.push(problem(
                    "row_index",
                    v.label(),
                    format!("row index lists {n} rows, the version has {}", v.n_rows),
                )),
                Err(e) => problems.push(problem("row_index", v.label(), e.to_string())),
            },
            Err(e) => problems.push(problem("row_index", v.label(), e.to_string())),
        }
    }

    // Each step's provenance object reads back and points only at rows its versions have.
    for v in &versions {
        let Some(hex) = un.or_default(store.lineage.step_provenance(v.step_id)) else {
            continue;
        };
        if damaged.contains(&hex) {
            continue;
        }
        let Ok(h) = hex.parse::<Hash>() else {
            continue;
        };
        let decoded = store
            .objects
            .read_all(&h)
            .and_then(|data| crate::provenance::decode(&data, &hex));
        let inputs = un.or_default(store.lineage.step_input_versions(v.step_id));
        let input_rows = inputs
            .iter()
            .find(|(role, _)| role == "input")
            .map(|(_, i)| i.n_rows);
        match decoded {
            Ok(d) => {
                let past_output = d
                    .changes
                    .iter()
                    .filter(|(name, rows)| {
                        !v.header.contains(name) || rows.last().is_some_and(|&r| r >= v.n_rows)
                    })
                    .count();
                let past_input = d
                    .drops
                    .last()
                    .is_some_and(|dr| input_rows.is_none_or(|n| dr.row_idx >= n));
                let bad_runs = d.runs.iter().any(|(position, set)| {
                    let rows_in = inputs.get(*position as usize).map(|(_, i)| i.n_rows);
                    set.iter().any(|r| {
                        r.out_start + r.len > v.n_rows
                            || rows_in.is_none_or(|n| r.in_start + r.len > n)
                    })
                });
                if past_output > 0 || past_input || bad_runs {
                    problems.push(problem(
                        "provenance",
                        v.label(),
                        format!(
                            "the provenance object {hex} names cells or rows the versions of its step do not have"
                        ),
                    ));
                }
            }
            Err(e) => problems.push(problem("provenance", v.label(), e.to_string())),
        }
    }

    // Cell changes kept as database rows by schema 3 and earlier: each old value must be the
    // input cell the row map points at, each new value the output cell.
    for v in &versions {
        if damaged.contains(&v.hash) || unstored.contains(&v.hash) {
            continue;
        }
        let Some((recorded, actual)) = un.or_default(
            crate::provenance::legacy_changes_as_versions_hold_them(store, v),
        ) else {
            continue;
        };
        for (i, r) in recorded.iter().enumerate() {
            let holds = actual.get(i);
            let same = holds.is_some_and(|a| {
                a.row_idx == r.row_idx && a.column == r.column && a.old == r.old && a.new == r.new
            });
            if !same {
                problems.push(problem(
                    "cell_change",
                    v.label(),
                    format!(
                        "the cell change recorded at data row {} column {:?} ({:?} -> {:?}) does not match the versions, which hold {:?} -> {:?} (the row was edited)",
                        r.row_idx + 1,
                        r.column,
                        r.old.as_deref().unwrap_or(""),
                        r.new.as_deref().unwrap_or(""),
                        holds.and_then(|a| a.old.as_deref()).unwrap_or(""),
                        holds.and_then(|a| a.new.as_deref()).unwrap_or(""),
                    ),
                ));
            }
        }
    }

    let endorsements = un.or_default(crate::endorse::assess(store).map(Some));
    let endorsements_checked = endorsements.as_ref().map_or(0, |a| a.statuses.len() as u64);
    for f in endorsements.map(|a| a.findings).unwrap_or_default() {
        problems.push(problem(f.kind, f.subject, f.detail));
    }

    let entries = un.or_default(store.lineage.audit_entries());
    let recipes = un.or_default(recipe_problems(store, &versions, &entries));
    problems.extend(recipes.1);
    for p in audit::chain_problems(&entries) {
        let subject = p.split(':').next().unwrap_or("audit").to_string();
        problems.push(problem("audit", subject, p));
    }
    problems.extend(un.or_default(audit_against_records(store, &versions, &entries)));
    let rows = un
        .or_default(row_commitments(store, &entries).map(Some))
        .unwrap_or(RowCheck {
            problems: Vec::new(),
            legacy_entries: 0,
            legacy_rows: 0,
        });
    problems.extend(rows.problems);
    let (erasure_orders, erasure_found) = un.or_default(erasure_problems(store, &versions));
    problems.extend(erasure_found);
    for e in un.errors {
        problems.push(problem(
            "database",
            "lineage.db",
            format!("the database cannot be read as sluice wrote it: {e}"),
        ));
    }

    let recorded_set: std::collections::HashSet<&str> =
        recorded.iter().map(|(h, _, _)| h.as_str()).collect();
    let (present, strays) = store
        .objects
        .backend()
        .list()
        .map_err(|e| crate::Error::io(&store.dir().join("objects"), e))?;
    let unreferenced = present
        .iter()
        .filter(|h| !recorded_set.contains(h.hex().as_str()))
        .count() as u64;
    for s in strays {
        problems.push(problem(
            "stray_file",
            s.display().to_string(),
            "a file in the object folder that is not named by a hash (objects are never renamed or edited by sluice)",
        ));
    }
    // A version an erasure order reached is stored whatever it was before: its erased form is
    // the only copy of its other cells (`recompute::must_stay_stored`).
    let reached: std::collections::HashSet<i64> = store
        .lineage
        .erased_versions()?
        .iter()
        .map(|e| e.version_id)
        .collect();
    let n_recomputable = versions
        .iter()
        .filter(|v| !v.storage.holds_bytes() && !reached.contains(&v.id))
        .count() as u64;
    let leftover = std::fs::read_dir(store.dir().join("tmp"))
        .map(|d| d.count() as u64)
        .unwrap_or(0);

    Ok(VerifyReport {
        intact: problems.is_empty(),
        schema_version: store.lineage.schema_version().unwrap_or(0),
        objects_checked: recorded.len() as u64 - not_stored - left_in_shared,
        bytes_checked,
        versions_checked: versions.len() as u64,
        audit_entries_checked: entries.len() as u64,
        audit_head: entries.last().map(|e| e.hash.clone()),
        unreferenced_objects: unreferenced,
        leftover_temp_files: leftover,
        entries_without_row_commitments: rows.legacy_entries,
        rows_before_commitments: rows.legacy_rows,
        versions_recomputed: 0,
        versions_stored: versions.len() as u64 - n_recomputable,
        versions_recomputable: n_recomputable,
        objects_left_in_shared_store: left_in_shared,
        recipes_checked: recipes.0,
        erasure_orders,
        endorsements_checked,
        problems,
    })
}

/// The recipe of every recomputable version, checked without computing anything: the step
/// that made it is a built-in operation (deterministic), its parameters read back as an
/// operation this build knows and are in canonical form, they equal what the step's audit
/// entry recorded, and its input versions exist. Returns how many were checked and the
/// problems (kind "recipe", named by the version and its step).
fn recipe_problems(
    store: &Store,
    versions: &[crate::model::Version],
    entries: &[crate::model::AuditEntry],
) -> Result<(u64, Vec<Problem>)> {
    use crate::model::{StepKind, Storage};
    let mut out = Vec::new();
    let mut n = 0u64;
    for v in versions
        .iter()
        .filter(|v| v.storage == Storage::Recomputable)
    {
        n += 1;
        let mut say = |detail: String| out.push(problem("recipe", v.label(), detail));
        let Some(step) = store.lineage.step(v.step_id)? else {
            say(format!("the step {} that made it is missing", v.step_id));
            continue;
        };
        if step.kind != StepKind::Operation {
            say(format!(
                "it is recorded as recomputable, but it is {} (step {}), which cannot be computed again",
                crate::recompute::made_by(step.kind),
                step.id
            ));
            continue;
        }
        match serde_json::from_value::<crate::ops::Operation>(step.params.clone()) {
            Ok(op) if op.params() != step.params => say(format!(
                "the parameters of step {} are not in canonical form: {}",
                step.id, step.params
            )),
            Ok(_) => {}
            Err(e) => say(format!(
                "the parameters of step {} cannot be read as an operation ({e})",
                step.id
            )),
        }
        let recorded = entries
            .iter()
            .filter(|e| e.action == "apply" && e.subject == v.audit_subject())
            .filter_map(|e| serde_json::from_str::<serde_json::Value>(&e.details).ok())
            .find_map(|d| d.get("operation").cloned());
        if let Some(said) = recorded {
            if said != step.params {
                say(format!(
                    "the parameters of step {} are {}, but its audit entry recorded {said} (the recipe was edited)",
                    step.id, step.params
                ));
            }
        }
        let inputs = store.lineage.step_input_versions(step.id)?;
        if !inputs.iter().any(|(role, _)| role == "input") {
            say(format!("step {} records no input version", step.id));
        }
    }
    Ok((n, out))
}

/// An endorsement file kept outside the store (`sluice endorse -o FILE`), held against the
/// store: its signature, its key, and what it signed (for the audit head: that the chain still
/// reaches that entry with that hash). Returns the problems found, named by `file`.
pub fn endorsement_file(store: &Store, file: &str, text: &str) -> Result<Vec<Problem>> {
    Ok(crate::endorse::check_file(store, text)?
        .into_iter()
        .map(|f| problem(f.kind, f.subject, format!("{file}: {}", f.detail)))
        .collect())
}

/// The audit entry that recorded a version names its hash, its step, its row index and its
/// provenance object (`details.version`, `step`, `row_index`, `provenance`; the subject is
/// `NAME@N`). The chain makes those entries tamper-evident, so comparing them with the database
/// rows finds an edit the chain alone cannot see: a version's hash, number or step changed, a
/// provenance reference pointed at another object, a version or step added without an entry,
/// or a change or drop count that no longer matches what the step recorded.
fn audit_against_records(
    store: &Store,
    versions: &[crate::model::Version],
    entries: &[crate::model::AuditEntry],
) -> Result<Vec<Problem>> {
    let mut out = Vec::new();
    let mut named = std::collections::HashSet::new();
    for e in entries {
        let Ok(details) = serde_json::from_str::<serde_json::Value>(&e.details) else {
            out.push(problem(
                "audit",
                e.seq.to_string(),
                format!("audit entry {}: its details are not JSON", e.seq),
            ));
            continue;
        };
        let (Some(hash), Some(step)) = (
            details.get("version").and_then(|v| v.as_str()),
            details.get("step").and_then(|v| v.as_i64()),
        ) else {
            continue;
        };
        if e.action == "check" {
            continue;
        }
        let Some(v) = versions.iter().find(|v| v.audit_subject() == e.subject) else {
            out.push(problem(
                "audit_mismatch",
                e.subject.clone(),
                format!(
                    "audit entry {} records version {} and the database has no such version (it was removed or renumbered)",
                    e.seq, e.subject
                ),
            ));
            continue;
        };
        named.insert(v.id);
        let mut differs = Vec::new();
        if v.hash != hash {
            differs.push(format!("its hash is {}, the entry says {hash}", v.hash));
        }
        if v.step_id != step {
            differs.push(format!(
                "it was made by step {}, the entry says step {step}",
                v.step_id
            ));
        }
        if let Some(ix) = details.get("row_index").and_then(|x| x.as_str()) {
            if v.row_index != ix {
                differs.push(format!(
                    "its row index is {}, the entry says {ix}",
                    v.row_index
                ));
            }
        }
        if matches!(
            e.action.as_str(),
            "apply" | "command" | "hand_edit" | "ingest"
        ) {
            let said = details
                .get("provenance")
                .and_then(|x| x.as_str())
                .map(str::to_string);
            let holds = store.lineage.step_provenance(v.step_id)?;
            if said != holds {
                differs.push(format!(
                    "its step's provenance object is {}, the entry says {}",
                    holds.as_deref().unwrap_or("none"),
                    said.as_deref().unwrap_or("none")
                ));
            }
        }
        if e.action == "apply" && differs.is_empty() {
            let counted = |key: &str| details.get(key).and_then(|x| x.as_u64());
            // Damaged or unreadable provenance was reported above; counts are compared only
            // when it reads back.
            if let Ok(changes) = crate::provenance::change_counts(store, v) {
                let n: u64 = changes.iter().map(|(_, k)| k).sum();
                if counted("cells_changed").is_some_and(|said| said != n) {
                    differs.push(format!(
                        "its step records {n} changed cells, the entry says {}",
                        counted("cells_changed").unwrap_or(0)
                    ));
                }
            }
            let input = store
                .lineage
                .step_input_versions(v.step_id)?
                .into_iter()
                .find(|(role, _)| role == "input");
            if let Some((_, input)) = input {
                if let Ok(drops) = crate::provenance::drops(store, v.step_id, input.id) {
                    let n = drops.len() as u64;
                    if counted("rows_dropped").is_some_and(|said| said != n) {
                        differs.push(format!(
                            "its step records {n} dropped rows, the entry says {}",
                            counted("rows_dropped").unwrap_or(0)
                        ));
                    }
                }
            }
        }
        if !differs.is_empty() {
            out.push(problem(
                "audit_mismatch",
                v.label(),
                format!(
                    "version {} does not match audit entry {}: {} (the database was edited after the entry was written)",
                    v.label(),
                    e.seq,
                    differs.join("; ")
                ),
            ));
        }
    }
    for v in versions {
        if !named.contains(&v.id) {
            out.push(problem(
                "audit_mismatch",
                v.label(),
                format!(
                    "version {} has no audit entry (it was added to the database outside sluice, or its entry was removed)",
                    v.label()
                ),
            ));
        }
    }
    Ok(out)
}

/// The segment files held against their indexes: each segment's tail, index checksum and
/// entry bounds read (a truncated segment or a changed index byte is named with its file), and
/// every object of every index decoded frame by frame through its seek table and re-hashed,
/// referenced or not: a changed byte in a frame is named by segment, object and frame, and an
/// index entry pointed at another object's bytes by both objects. Objects found intact here
/// are not hashed a second time by the object check.
fn segment_problems(store: &Store) -> Result<Vec<Problem>> {
    use crate::store::objects::FsBackend;
    let backend = FsBackend::new(store.dir());
    let segs = backend
        .segments()
        .map_err(|e| crate::Error::io(&store.dir().join("segments"), e))?;
    let mut problems = Vec::new();
    let indexed: std::collections::HashSet<Hash> = segs
        .iter()
        .filter_map(|(_, r)| r.as_ref().ok())
        .flatten()
        .map(|e| e.hash)
        .collect();
    for (path, entries) in &segs {
        let name = path.display().to_string();
        let entries = match entries {
            Ok(e) => e,
            Err(e) => {
                problems.push(problem(
                    "segment_damaged",
                    name,
                    format!("the segment cannot be read: {e}"),
                ));
                continue;
            }
        };
        for e in entries {
            match FsBackend::hash_entry(path, e) {
                Ok(actual) if actual == e.hash => {
                    if backend.locate(&e.hash).is_some_and(|(p, at)| p == *path && at == *e) {
                        store.objects.note_intact(&e.hash);
                    }
                }
                Ok(actual) if indexed.contains(&actual) => problems.push(problem(
                    "segment_index",
                    e.hash.hex(),
                    format!(
                        "the index entry of {} in {name} points at the bytes of another object, {actual} (bytes {}..{})",
                        e.hash,
                        e.offset,
                        e.offset + e.stored
                    ),
                )),
                Ok(actual) => problems.push(problem(
                    "segment_object",
                    e.hash.hex(),
                    format!(
                        "the object at bytes {}..{} of {name} hashes to {actual}, not to its name",
                        e.offset,
                        e.offset + e.stored
                    ),
                )),
                Err(err) => problems.push(problem(
                    "segment_object",
                    e.hash.hex(),
                    format!(
                        "the object at bytes {}..{} of {name} cannot be decoded: {err}",
                        e.offset,
                        e.offset + e.stored
                    ),
                )),
            }
        }
    }
    Ok(problems)
}

/// Errors met while reading the database, which `verify` reports as damage (a dropped table,
/// malformed JSON in a column) instead of stopping at the first.
#[derive(Default)]
struct Unreadable {
    errors: Vec<String>,
}

impl Unreadable {
    fn or_default<T: Default>(&mut self, r: Result<T>) -> T {
        match r {
            Ok(v) => v,
            Err(e) => {
                let text = e.to_string();
                if !self.errors.contains(&text) {
                    self.errors.push(text);
                }
                T::default()
            }
        }
    }
}

/// What [`row_commitments`] found.
struct RowCheck {
    problems: Vec<Problem>,
    legacy_entries: u64,
    legacy_rows: u64,
}

/// Every row of every table held against the audit entries that commit to it (see
/// `store::audit`): each selector's rows read now must hash to the digest of the latest entry
/// that names the same selector (a dataset's declared key may change later, so an earlier
/// entry's digest of the same rows is superseded), and every row must be named by some entry,
/// unless it predates the commitments (a store written by an earlier build: its entries and
/// rows up to the bound the first committing entry recorded). Tables, views and triggers that
/// are not sluice's are named too.
fn row_commitments(store: &Store, entries: &[crate::model::AuditEntry]) -> Result<RowCheck> {
    use std::collections::{BTreeMap, HashMap, HashSet};
    let mut out = Vec::new();
    let mut latest: BTreeMap<audit::Selector, (u64, String, u64, String, u64)> = BTreeMap::new();
    // What erasures overwrote, by the entry that says so (see `Overwritten`).
    let mut overwritten: Vec<(u64, crate::store::erasure_records::Overwritten)> = Vec::new();
    let mut legacy_entries = 0u64;
    let mut first_committed: Option<serde_json::Value> = None;
    for e in entries {
        let details: serde_json::Value = serde_json::from_str(&e.details).unwrap_or_default();
        let Some(rows) = details.get("rows").and_then(|r| r.as_array()) else {
            if first_committed.is_none() {
                legacy_entries += 1;
            } else {
                out.push(problem(
                    "audit",
                    format!("audit entry {}", e.seq),
                    format!(
                        "audit entry {}: ({} {}) commits to none of the rows its command wrote, though entries before it do (it was not written by this sluice)",
                        e.seq, e.action, e.subject
                    ),
                ));
            }
            continue;
        };
        if first_committed.is_none() {
            first_committed = Some(details.clone());
        }
        if let Some(list) = details.get("overwritten").and_then(|o| o.as_array()) {
            for o in list {
                match serde_json::from_value(o.clone()) {
                    Ok(w) => overwritten.push((e.seq, w)),
                    Err(_) => out.push(problem(
                        "audit",
                        format!("audit entry {}", e.seq),
                        format!(
                            "audit entry {}: names overwritten rows in a form sluice never writes ({o})",
                            e.seq
                        ),
                    )),
                }
            }
        }
        for r in rows {
            let Some((sel, n, digest, form)) = audit::Selector::from_json(r) else {
                out.push(problem(
                    "audit",
                    format!("audit entry {}", e.seq),
                    format!(
                        "audit entry {}: names rows sluice never commits to ({r})",
                        e.seq
                    ),
                ));
                continue;
            };
            latest.insert(
                sel,
                (
                    e.seq,
                    format!("{} {}", e.action, e.subject),
                    n,
                    digest,
                    form,
                ),
            );
        }
    }
    // A later entry whose selector covers an earlier one's whole range (an erasure commits
    // anew to the whole of each table whose fields it overwrote) supersedes it.
    let superseded: Vec<audit::Selector> = latest
        .iter()
        .filter(|(s, (seq, ..))| {
            latest.iter().any(|(t, (later, ..))| {
                later > seq
                    && t.table == s.table
                    && t.by == s.by
                    && t.from <= s.from
                    && s.to <= t.to
            })
        })
        .map(|(s, _)| s.clone())
        .collect();
    for s in &superseded {
        latest.remove(s);
    }
    let mut covered: HashMap<&str, HashSet<i64>> = HashMap::new();
    let mut unreadable: HashSet<&str> = HashSet::new();
    overwritten.sort_by_key(|w| std::cmp::Reverse(w.0));
    for (sel, (seq, what, n, digest, form)) in &latest {
        let rows = match store.lineage.selected_rows(sel) {
            Ok(rows) => rows,
            Err(e) => {
                if unreadable.insert(sel.table) {
                    out.push(problem(
                        "database",
                        sel.table,
                        format!(
                            "the table {} cannot be read ({e}); audit entries commit to its rows",
                            sel.table
                        ),
                    ));
                }
                continue;
            }
        };
        let now = if *form == 1 {
            audit::rows_digest(sel, &rows)
        } else {
            audit::leaves_digest(sel, &as_committed(sel, *seq, &rows, &overwritten))
        };
        if now != *digest {
            out.push(problem(
                "audit_mismatch",
                format!("{} {}", sel.table, describe_range(sel)),
                format!(
                    "the rows of {} whose {} is {} ({} now) differ from what audit entry {seq} ({what}) committed to ({n}): a field was edited, or a row added or removed",
                    sel.table,
                    sel.by,
                    describe_range(sel),
                    rows.len(),
                ),
            ));
        }
        covered
            .entry(sel.table)
            .or_default()
            .extend(rows.iter().map(|(id, _)| *id));
    }
    let bound = |table: &str| -> i64 {
        match &first_committed {
            None => i64::MAX,
            Some(d) => d
                .get("legacy_rows")
                .and_then(|b| b.get(table))
                .and_then(serde_json::Value::as_i64)
                .unwrap_or(0),
        }
    };
    let mut legacy_rows = 0u64;
    let present = store.lineage.schema_objects()?;
    for table in audit::TABLES {
        if unreadable.contains(table) {
            continue;
        }
        if !present.iter().any(|(t, n)| t == "table" && n == table) {
            out.push(problem(
                "database",
                *table,
                format!("the table {table} is missing from the database (it was dropped)"),
            ));
            continue;
        }
        let ids = store.lineage.rowids(table)?;
        let seen = covered.get(table);
        let limit = bound(table);
        let mut stray = Vec::new();
        for id in ids {
            if seen.is_some_and(|s| s.contains(&id)) {
                continue;
            }
            if id <= limit {
                legacy_rows += 1;
            } else {
                stray.push(id);
            }
        }
        if !stray.is_empty() {
            let shown: Vec<String> = stray.iter().take(10).map(|i| i.to_string()).collect();
            out.push(problem(
                "audit_mismatch",
                *table,
                format!(
                    "{} row(s) of {table} are committed to by no audit entry (rowid {}{}): added outside sluice",
                    stray.len(),
                    shown.join(", "),
                    if stray.len() > 10 { ", ..." } else { "" }
                ),
            ));
        }
    }
    for (kind, name) in present {
        if kind == "table" && (name == "audit_log" || audit::TABLES.contains(&name.as_str())) {
            continue;
        }
        out.push(problem(
            "database",
            name.clone(),
            format!("the database holds a {kind} {name} that sluice never made"),
        ));
    }
    Ok(RowCheck {
        problems: out,
        legacy_entries,
        legacy_rows,
    })
}

/// The leaves of a selector's rows as the entry `seq` committed to them: each row's leaf now,
/// with every later erasure's overwriting undone, latest first (`overwritten` is sorted so):
/// the leaves it left in place are taken out, and the ones it kept from before put back.
fn as_committed(
    sel: &audit::Selector,
    seq: u64,
    rows: &[(i64, Vec<u8>)],
    overwritten: &[(u64, crate::store::erasure_records::Overwritten)],
) -> Vec<[u8; 32]> {
    let mut leaves: Vec<[u8; 32]> = rows.iter().map(|(_, e)| audit::row_leaf(e)).collect();
    for (at, w) in overwritten {
        if *at <= seq || w.table != sel.table || !sel.covers(w.key) {
            continue;
        }
        for a in &w.after {
            let Some(a) = crate::commitment::from_hex(a) else {
                continue;
            };
            if let Some(i) = leaves.iter().position(|l| *l == a) {
                leaves.swap_remove(i);
            }
        }
        leaves.extend(
            w.before
                .iter()
                .filter_map(|b| crate::commitment::from_hex(b)),
        );
    }
    leaves
}

fn describe_range(sel: &audit::Selector) -> String {
    let key = |k: &audit::Key| match k {
        audit::Key::Int(i) => i.to_string(),
        audit::Key::Text(t) => t.clone(),
    };
    if sel.from == sel.to {
        key(&sel.from)
    } else {
        format!("{}..{}", key(&sel.from), key(&sel.to))
    }
}

/// Whether `v`, or a version a step on its way read, has an object that a working copy
/// borrowed in part left in the shared store (always false in a whole store).
fn outside_the_part(store: &Store, v: &crate::model::Version) -> Result<bool> {
    let left = |x: &crate::model::Version| {
        [&x.hash, &x.row_index].into_iter().any(|hex| {
            hex.parse::<Hash>()
                .is_ok_and(|h| store.objects.is_left_in_shared(&h))
        })
    };
    if !store.objects.borrowed_in_part() {
        return Ok(false);
    }
    if left(v) {
        return Ok(true);
    }
    for step in crate::plan::steps_behind(store, v)? {
        for (_, input) in store.lineage.step_input_versions(step)? {
            if left(&input) {
                return Ok(true);
            }
        }
    }
    Ok(false)
}

/// The deep check: each version whose objects read back intact is read again, and its row
/// index and column profile are computed as intake and the writer compute them, then compared
/// with the stored row index object (a compact one written again byte for byte; one of format
/// 1 row by row, offsets and fingerprints) and the
/// `column_profiles` rows. A difference means the store was written by something else than
/// sluice, or by a sluice with a bug: the row commitments only prove the rows are the ones
/// recorded, not that they were right. Returns the problems and the number of versions done.
fn deep_problems(store: &Store, report: &VerifyReport) -> Result<(Vec<Problem>, u64)> {
    use std::path::Path;
    let mut out = Vec::new();
    let mut done = 0u64;
    let damaged: std::collections::HashSet<&str> =
        report.problems.iter().map(|p| p.subject.as_str()).collect();
    for v in store.lineage.all_versions()? {
        if damaged.contains(v.hash.as_str()) || damaged.contains(v.row_index.as_str()) {
            continue;
        }
        let Ok(hash) = v.hash.parse::<Hash>() else {
            continue;
        };
        // In a working copy borrowed in part, a version whose bytes, or whose stored
        // ancestors' bytes, were left in the shared store is checked there, not here.
        if outside_the_part(store, &v)? {
            continue;
        }
        // A version whose bytes are not stored is computed again from its recipe and its
        // hash checked; its row index and profile come from the same writer as a stored one's.
        let erased = store.objects.is_erased(&hash);
        if !store.bytes_stored(&v)? && !erased {
            // A recipe that reads a version an erasure reached cannot give its hash again.
            if !crate::erasure::unreproducible(store, [v.step_id])?.is_empty() {
                continue;
            }
            match crate::recompute::check_recipe(store, &v) {
                Ok(()) => done += 1,
                Err(e) => out.push(problem("recompute", v.label(), e.to_string())),
            }
            continue;
        }
        let Ok(ix_hash) = v.row_index.parse::<Hash>() else {
            continue;
        };
        // Format 1 is compared row by row (offsets and fingerprints); the compact format is
        // written again from the rows read and must come out byte for byte the same.
        let compact = match store
            .objects
            .read_range(&ix_hash, 0, rowindex::HEADER_LEN)
            .and_then(|h| {
                rowindex::format_of(&h).map_err(|e| crate::Error::io(Path::new(&v.row_index), e))
            }) {
            Ok(f) => f == rowindex::COMPACT_FORMAT,
            Err(e) => {
                out.push(problem("row_index", v.label(), e.to_string()));
                continue;
            }
        };
        let settings = crate::table::stream::ReadSettings::for_dialect(&v.dialect)?;
        let mut profiler = crate::table::profile::Profiler::new(v.header.len(), &v.null_tokens);
        let mut header_seen = !v.dialect.has_header;
        let (mut fps, mut offsets) = (Vec::new(), Vec::new());
        let mut built = rowindex::Builder::start().to_vec();
        let mut builder = rowindex::Builder::new();
        let mut scratch = Vec::new();
        let read = store.objects.open_raw(&hash).and_then(|(src, _)| {
            crate::table::stream::for_each_record(Path::new(&v.label()), src, &settings, |r| {
                if !header_seen {
                    header_seen = true;
                    return Ok(());
                }
                profiler.observe(r.iter());
                if compact {
                    builder.push(r.byte, r.line, &mut built);
                } else {
                    offsets.push(r.byte);
                    fps.push(rowindex::fingerprint(&r, &mut scratch));
                }
                Ok(())
            })
        });
        if let Err(e) = read {
            out.push(problem("row_index", v.label(), e.to_string()));
            continue;
        }
        done += 1;
        let mismatch = if compact {
            let n_read = builder.n_rows();
            builder.finish(&mut built);
            if Hash::of(&built) == store.objects.form_of(&ix_hash) {
                None
            } else {
                let ours = rowindex::positions(&built).unwrap_or_default();
                let theirs = store
                    .objects
                    .read_all(&ix_hash)
                    .ok()
                    .and_then(|d| rowindex::positions(&d).ok())
                    .unwrap_or_default();
                let first = (0..ours.len().max(theirs.len()))
                    .find(|&i| ours.get(i) != theirs.get(i))
                    .unwrap_or(0);
                Some((n_read, theirs.len(), first))
            }
        } else {
            match crate::diff::read::offsets(&store.objects, &v) {
                Ok((Some(stored_fps), stored_offsets)) => {
                    if (fps.as_slice(), offsets.as_slice())
                        == (stored_fps.as_slice(), stored_offsets.as_slice())
                    {
                        None
                    } else {
                        let first = (0..fps.len().max(stored_fps.len()))
                            .find(|&i| {
                                fps.get(i) != stored_fps.get(i)
                                    || offsets.get(i) != stored_offsets.get(i)
                            })
                            .unwrap_or(0);
                        Some((fps.len() as u64, stored_fps.len(), first))
                    }
                }
                Ok((None, _)) => Some((fps.len() as u64, 0, 0)),
                Err(e) => {
                    out.push(problem("row_index", v.label(), e.to_string()));
                    continue;
                }
            }
        };
        if let Some((n_read, n_indexed, first)) = mismatch {
            out.push(problem(
                "row_index",
                v.label(),
                format!(
                    "the row index {} does not match the version's bytes read again ({} rows read, {} indexed; first difference at data row {})",
                    v.row_index,
                    n_read,
                    n_indexed,
                    first + 1
                ),
            ));
        }
        let computed = profiler.finish(&v.header);
        let recorded = store.lineage.profiles(v.id)?;
        // An erased version's profile describes it as recorded (less the extremes that were
        // erased values); its erased form is proved by its cell commitment instead.
        if computed != recorded && !erased {
            let which: Vec<String> = computed
                .iter()
                .zip(recorded.iter())
                .filter(|(a, b)| a != b)
                .map(|(a, _)| a.name.clone())
                .collect();
            out.push(problem(
                "profile",
                v.label(),
                format!(
                    "the recorded column profile does not match the version's bytes read again (columns: {}; {} profiled, {} recorded)",
                    if which.is_empty() { "-".to_string() } else { which.join(", ") },
                    computed.len(),
                    recorded.len()
                ),
            ));
        }
    }
    Ok((out, done))
}

fn is_zero(n: &u64) -> bool {
    *n == 0
}
