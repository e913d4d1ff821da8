//! Version references as users type them: `orders` (the latest version), `orders:v3` or
//! `orders:3` (the third version, 1-based), or `blake3:` followed by at least 8 hex digits of a
//! version's hash. A hash always carries its `blake3:` label, so a dataset name can never be
//! read as a hash or the other way round.

use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::store::Lineage;

/// The fewest hex digits of a hash accepted after `blake3:`.
pub const MIN_DIGITS: usize = 8;

/// The label written before a hash.
pub const HASH_LABEL: &str = "blake3:";

/// Finds the version `reference` names.
pub fn resolve(lineage: &Lineage, reference: &str) -> Result<Version> {
    let r = reference.trim();
    if r.is_empty() {
        return Err(bad(
            reference,
            "it is empty; name a dataset (NAME), a version (NAME:vN) or a hash (blake3:HEX)",
        ));
    }
    if let Some(hex) = r.strip_prefix(HASH_LABEL) {
        return by_hash(lineage, reference, hex);
    }
    if let Some((name, n)) = r.rsplit_once(':') {
        let digits = n.strip_prefix('v').unwrap_or(n);
        let seq: u64 = digits
            .parse()
            .ok()
            .filter(|&s| s >= 1 && digits.bytes().all(|b| b.is_ascii_digit()))
            .ok_or_else(|| {
                bad(
                    reference,
                    &format!(
                        "after the ':' comes a version number starting at 1, e.g. {}:v2",
                        if name.is_empty() { "orders" } else { name }
                    ),
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
                    "dataset {name} has {n_versions} version{}; see them with `sluice timeline --dataset {name}`",
                    if n_versions == 1 { "" } else { "s" }
                ),
            }
            .into()
        });
    }
    if let Some((name, n)) = r.rsplit_once('@') {
        if !name.is_empty() && !n.is_empty() && n.bytes().all(|b| b.is_ascii_digit()) {
            return Err(bad(
                reference,
                &format!("a version is written NAME:vN, e.g. {name}:v{n}"),
            ));
        }
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
    if r.len() >= MIN_DIGITS && r.chars().all(|c| c.is_ascii_hexdigit()) {
        return Err(bad(
            reference,
            &format!("no dataset has this name; to name a version by its hash, write blake3: before the digits (blake3:{r})"),
        ));
    }
    Err(unknown_dataset(lineage, reference, r)?)
}

/// `blake3:HEX`: the versions whose hash starts with the digits. Several versions may share a
/// full hash (the same bytes recorded twice); they can only be told apart by name.
fn by_hash(lineage: &Lineage, reference: &str, hex: &str) -> Result<Version> {
    if hex.len() < MIN_DIGITS || !hex.chars().all(|c| c.is_ascii_hexdigit()) || hex.len() > 64 {
        return Err(bad(
            reference,
            &format!(
                "after blake3: come {MIN_DIGITS} to 64 hex digits (0-9, a-f) of a version's hash"
            ),
        ));
    }
    let prefix = hex.to_ascii_lowercase();
    let found = lineage.versions_by_hash_prefix(&prefix)?;
    match found.len() {
        0 => Err(ErrorKind::UnknownRef {
            reference: reference.to_string(),
            hint:
                "no version's hash starts with these digits; list versions with `sluice timeline`"
                    .into(),
        }
        .into()),
        1 => Ok(found.into_iter().next().expect("one element")),
        _ if found.iter().all(|v| v.hash == found[0].hash) => Err(ErrorKind::SameBytes {
            reference: reference.to_string(),
            labels: found.iter().map(Version::label).collect(),
        }
        .into()),
        _ => Err(ErrorKind::AmbiguousRef {
            reference: reference.to_string(),
            candidates: found
                .iter()
                .map(|v| format!("{} ({})", v.label(), v.short_hash()))
                .collect(),
        }
        .into()),
    }
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
        format!("no dataset \"{name}\": the store has none yet; receive a file with `sluice receive FILE --as NAME`")
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
