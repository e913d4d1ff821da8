//! Version references as users type them: `orders` (the latest version), `orders@3` (the third
//! version, 1-based) or a hash prefix of at least 6 hex digits. A name is looked up as a dataset
//! first, so a dataset can never be shadowed by a hash prefix (dataset names made only of hex
//! digits are refused at intake for that reason).

use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::store::Lineage;

/// The shortest hash prefix accepted.
pub const MIN_PREFIX: usize = 6;

/// Finds the version `reference` names.
pub fn resolve(lineage: &Lineage, reference: &str) -> Result<Version> {
    let r = reference.trim();
    if r.is_empty() {
        return Err(bad(
            reference,
            "it is empty; name a dataset, NAME@N or a hash prefix",
        ));
    }
    if let Some((name, n)) = r.rsplit_once('@') {
        let seq: u64 = n.parse().ok().filter(|&s| s >= 1).ok_or_else(|| {
            bad(
                reference,
                "after '@' comes a version number starting at 1, e.g. orders@2",
            )
        })?;
        if lineage.dataset(name)?.is_none() {
            return Err(unknown_dataset(lineage, reference, name)?);
        }
        return lineage.version_by_seq(name, seq)?.ok_or_else(|| {
            let n_versions = lineage.versions_of(name).map(|v| v.len()).unwrap_or(0);
            ErrorKind::UnknownRef {
                reference: reference.to_string(),
                hint: format!(
                    "dataset {name} has {n_versions} version{}; see them with `sluice log {name}`",
                    if n_versions == 1 { "" } else { "s" }
                ),
            }
            .into()
        });
    }
    if lineage.dataset(r)?.is_some() {
        return lineage.latest_version(r)?.ok_or_else(|| {
            ErrorKind::UnknownRef {
                reference: reference.to_string(),
                hint: format!("dataset {r} has no version yet"),
            }
            .into()
        });
    }
    let is_hex = r.chars().all(|c| c.is_ascii_hexdigit());
    if is_hex && r.len() >= MIN_PREFIX {
        let prefix = r.to_ascii_lowercase();
        let found = lineage.versions_by_hash_prefix(&prefix)?;
        return match found.len() {
            0 => Err(ErrorKind::UnknownRef {
                reference: reference.to_string(),
                hint: "no version's hash starts with these digits; list versions with `sluice log`"
                    .into(),
            }
            .into()),
            1 => Ok(found.into_iter().next().expect("one element")),
            _ => Err(ErrorKind::AmbiguousRef {
                reference: reference.to_string(),
                candidates: found
                    .iter()
                    .map(|v| format!("{} ({})", v.label(), &v.hash[..12]))
                    .collect(),
            }
            .into()),
        };
    }
    if is_hex {
        return Err(bad(
            reference,
            &format!("a hash prefix needs at least {MIN_PREFIX} hex digits, and no dataset has this name"),
        ));
    }
    Err(unknown_dataset(lineage, reference, r)?)
}

fn bad(reference: &str, why: &str) -> crate::Error {
    ErrorKind::BadRef {
        reference: reference.to_string(),
        why: why.to_string(),
    }
    .into()
}

fn unknown_dataset(lineage: &Lineage, reference: &str, name: &str) -> Result<crate::Error> {
    let names: Vec<String> = lineage.datasets()?.into_iter().map(|d| d.name).collect();
    let hint = if names.is_empty() {
        format!("no dataset \"{name}\": the store has none yet; take a file in with `sluice ingest FILE --as NAME`")
    } else {
        format!(
            "no dataset \"{name}\"; the datasets are: {}",
            names.join(", ")
        )
    };
    Ok(ErrorKind::UnknownRef {
        reference: reference.to_string(),
        hint,
    }
    .into())
}
