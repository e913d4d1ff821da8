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
    /// "object_missing", "object_damaged", "object_size", "row_index", "database", "audit".
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
    /// Object files no database row refers to (left by an interrupted command; harmless).
    pub unreferenced_objects: u64,
    /// Temporary files left by interrupted commands (harmless).
    pub leftover_temp_files: u64,
    pub problems: Vec<Problem>,
}

fn problem(kind: &str, subject: impl Into<String>, detail: impl Into<String>) -> Problem {
    Problem {
        kind: kind.to_string(),
        subject: subject.into(),
        detail: detail.into(),
    }
}

pub fn verify(store: &Store) -> Result<VerifyReport> {
    let mut problems = Vec::new();
    for p in store.lineage.integrity_problems()? {
        problems.push(problem("database", "lineage.db", p));
    }
    for p in store.lineage.consistency_problems()? {
        problems.push(problem("database", "lineage.db", p));
    }

    let recorded = store.lineage.objects()?;
    let mut bytes_checked = 0u64;
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

    let versions = store.lineage.all_versions()?;
    for v in &versions {
        if damaged.contains(&v.row_index) {
            continue;
        }
        let Ok(h) = v.row_index.parse::<Hash>() else {
            continue;
        };
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
        let Some(hex) = store.lineage.step_provenance(v.step_id)? else {
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
        let inputs = store.lineage.step_input_versions(v.step_id)?;
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

    let entries = store.lineage.audit_entries()?;
    for p in audit::chain_problems(&entries) {
        let subject = p.split(':').next().unwrap_or("audit").to_string();
        problems.push(problem("audit", subject, p));
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
    let leftover = std::fs::read_dir(store.dir().join("tmp"))
        .map(|d| d.count() as u64)
        .unwrap_or(0);

    Ok(VerifyReport {
        intact: problems.is_empty(),
        schema_version: store.lineage.schema_version()?,
        objects_checked: recorded.len() as u64,
        bytes_checked,
        versions_checked: versions.len() as u64,
        audit_entries_checked: entries.len() as u64,
        unreferenced_objects: unreferenced,
        leftover_temp_files: leftover,
        problems,
    })
}
