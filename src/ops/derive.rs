//! Derived columns: `split` (one column into several on a separator), `combine` (several into
//! one with a separator) and `extract` (a substring by position, or the first group of a
//! regular expression, into a new column). The source columns stay; the new columns are placed
//! after them. The values of a derived column are not cell changes: the step records which
//! input columns each new column came from (`column_sources`), and trace follows those.

use regex::Regex;

use crate::error::{Error, Result};
use crate::table::RawRecord;

/// How one derived output column is computed from a row.
#[derive(Debug, Clone)]
pub enum Derivation {
    /// Part `part` (0-based) of `source` split on `sep`; the last part takes the rest.
    SplitPart {
        source: usize,
        sep: String,
        part: usize,
        last: bool,
    },
    /// The non-blank values of `sources` joined with `with`.
    Combine { sources: Vec<usize>, with: String },
    /// Characters `from..from+len` (0-based, in characters) of `source`.
    Range {
        source: usize,
        from: usize,
        len: Option<usize>,
    },
    /// The first group of `re` in `source` (the whole match when it has no group); blank when
    /// it does not match.
    Pattern { source: usize, re: Regex },
}

impl Derivation {
    /// The input columns the derived column reads.
    pub fn sources(&self) -> Vec<usize> {
        match self {
            Derivation::SplitPart { source, .. }
            | Derivation::Range { source, .. }
            | Derivation::Pattern { source, .. } => vec![*source],
            Derivation::Combine { sources, .. } => sources.clone(),
        }
    }

    /// The value for one row; `is_blank` says which values count as blank.
    pub fn value(&self, r: &RawRecord<'_>, is_blank: &dyn Fn(&[u8]) -> bool) -> String {
        let text = |c: usize| String::from_utf8_lossy(r.field(c)).into_owned();
        match self {
            Derivation::SplitPart {
                source,
                sep,
                part,
                last,
            } => {
                let v = text(*source);
                let mut pieces = v.splitn(part + if *last { 1 } else { 2 }, sep.as_str());
                pieces.nth(*part).unwrap_or("").to_string()
            }
            Derivation::Combine { sources, with } => sources
                .iter()
                .filter(|&&c| !is_blank(r.field(c)))
                .map(|&c| text(c))
                .collect::<Vec<_>>()
                .join(with),
            Derivation::Range { source, from, len } => {
                let v = text(*source);
                let chars = v.chars().skip(*from);
                match len {
                    Some(n) => chars.take(*n).collect(),
                    None => chars.collect(),
                }
            }
            Derivation::Pattern { source, re } => {
                let v = text(*source);
                match re.captures(&v) {
                    Some(c) => c
                        .get(1)
                        .or_else(|| c.get(0))
                        .map(|m| m.as_str().to_string())
                        .unwrap_or_default(),
                    None => String::new(),
                }
            }
        }
    }
}

pub(super) fn find(header: &[String], name: &str, label: &str) -> Result<usize> {
    header.iter().position(|h| h == name).ok_or_else(|| {
        Error::usage(format!(
            "column \"{name}\" is not in {label}; its columns are: {}",
            header.join(", ")
        ))
    })
}

pub(super) fn compile(pattern: &str) -> Result<Regex> {
    Regex::new(pattern).map_err(|e| {
        Error::usage(format!(
            "\"{pattern}\" is not a valid regular expression: {}",
            e.to_string().lines().last().unwrap_or("")
        ))
    })
}
