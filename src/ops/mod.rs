//! Built-in cleaning operations. Each is deterministic (no clock, no locale, no hash-map order
//! in its output) and explains every output cell: copied through the row map, or changed with
//! its old value recorded. [`text`] holds the per-cell text operations; [`apply`] runs an
//! operation over a stored version and records the result with its provenance.

pub mod append;
pub mod apply;
pub mod date;
pub mod decimal;
pub mod derive;
mod keyset;
pub mod number;
pub mod predicate;
pub mod rowwise;
pub mod sort;
pub mod summarize;
pub mod text;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// The target case of `case`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CaseTo {
    Lower,
    Upper,
    Title,
}

/// Which of several duplicate rows `dedupe` keeps.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum KeepWhich {
    First,
    Last,
}

/// What `number` does with a value that is not an amount.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OnError {
    /// Leave the text as it was, with a note on the cell.
    Keep,
    /// Empty the cell, with a note on it.
    Blank,
    /// Refuse the step, listing the cells.
    Fail,
}

/// One column renamed by `rename`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Renaming {
    pub from: String,
    pub to: String,
}

/// An operation and its parameters, as recorded with the step (canonical JSON, tagged by
/// `op`) and as written in a plan. A recorded step always holds every field; in a plan the
/// fields marked `default` may be left out and take the value the command line gives them.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "op", rename_all = "snake_case", deny_unknown_fields)]
pub enum Operation {
    /// Leading and trailing white space removed; with `inner`, runs of white space inside a
    /// value become one space.
    Trim {
        columns: Option<Vec<String>>,
        #[serde(default)]
        inner: bool,
    },
    /// Letters changed to one case.
    Case {
        columns: Option<Vec<String>>,
        to: CaseTo,
    },
    /// Rows that repeat an earlier (or, with `keep: last`, a later) row removed: whole rows,
    /// or rows with equal values in the `key` columns. Each removed row records the row it
    /// duplicated.
    Dedupe {
        key: Option<Vec<String>>,
        #[serde(default = "keep_first")]
        keep: KeepWhich,
    },
    /// Every occurrence of `find` in the values replaced by `with`: literal text, or with
    /// `regex` a regular expression (Rust `regex` syntax) whose `with` may name groups as `$1`.
    Replace {
        columns: Option<Vec<String>>,
        find: String,
        with: String,
        #[serde(default)]
        regex: bool,
    },
    /// Values replaced through a two-column mapping table (another version): a value equal to
    /// a `from` entry becomes its `to` entry. `table` is recorded as the table version's hash.
    /// Values with no entry follow `unmatched`; blank cells are left alone.
    Map {
        columns: Vec<String>,
        table: String,
        from: Option<String>,
        to: Option<String>,
        #[serde(default = "on_error_keep")]
        unmatched: OnError,
    },
    /// A left join: for each row, the row of `table` whose `table_on` columns (default: the
    /// same names as `on`) equal its `on` columns, whose `take` columns are appended. A key the
    /// table does not have leaves them blank (noted), or with `unmatched_fail` stops the step;
    /// a table with a key on two rows is refused. `table` is recorded as the version's hash.
    Lookup {
        table: String,
        on: Vec<String>,
        table_on: Option<Vec<String>>,
        take: Vec<String>,
        #[serde(default)]
        unmatched_fail: bool,
    },
    /// The rows of version `other` stacked under this one's: its columns matched by name,
    /// after renaming them through `map` (theirs to ours); a column of ours it lacks is blank.
    /// `other` is recorded as the version's hash; each output row keeps its origin in the row
    /// map.
    Append {
        other: String,
        #[serde(default)]
        map: Vec<Renaming>,
    },
    /// Blank cells (empty or a null token) of `columns` filled with `value`, or with the value
    /// of column `from` in the same row when that is not blank.
    Fill {
        columns: Vec<String>,
        value: Option<String>,
        from: Option<String>,
    },
    /// Amounts written as text read into canonical decimal numbers (see [`number`]).
    Number {
        columns: Vec<String>,
        #[serde(default)]
        decimal_comma: bool,
        #[serde(default = "on_error_fail")]
        on_error: OnError,
    },
    /// Dates in mixed formats written as ISO 8601 (see [`date`]).
    Date {
        columns: Vec<String>,
        order: Option<date::DateOrder>,
        #[serde(default = "on_error_fail")]
        on_error: OnError,
    },
    /// `column` split on `on` into new columns `into` (placed after it; the last takes the rest,
    /// missing parts are blank).
    Split {
        column: String,
        on: String,
        into: Vec<String>,
    },
    /// The non-blank values of `columns` joined with `with` into a new column `into`, placed
    /// after the last of them.
    Combine {
        columns: Vec<String>,
        with: String,
        into: String,
    },
    /// Part of `column` into a new column `into`, placed after it: characters `from` (1-based)
    /// for `len` characters, or the first group of the regular expression `regex`.
    Extract {
        column: String,
        into: String,
        from: Option<u64>,
        len: Option<u64>,
        regex: Option<String>,
    },
    /// Columns renamed; values and order unchanged.
    Rename { columns: Vec<Renaming> },
    /// Only the named columns, in the order named.
    Select { columns: Vec<String> },
    /// One row per group of equal `by` values with its count and aggregates (see
    /// [`summarize`]); the result is a new dataset keyed by `by`.
    Summarize {
        by: Vec<String>,
        aggregates: Vec<summarize::Aggregate>,
    },
    /// Only the rows where the predicate holds are kept (see [`predicate`]).
    #[serde(rename = "keep")]
    KeepRows { predicate: String },
    /// The rows where the predicate holds are removed (see [`predicate`]).
    #[serde(rename = "drop")]
    DropRows { predicate: String },
    /// Rows put in a stable order by one or more columns, each ascending or descending (see
    /// [`sort`]); the row map records the permutation.
    Sort { by: Vec<sort::SortKey> },
}

fn keep_first() -> KeepWhich {
    KeepWhich::First
}

fn on_error_keep() -> OnError {
    OnError::Keep
}

fn on_error_fail() -> OnError {
    OnError::Fail
}

impl Operation {
    pub fn name(&self) -> &'static str {
        match self {
            Operation::Trim { .. } => "trim",
            Operation::Case { .. } => "case",
            Operation::Dedupe { .. } => "dedupe",
            Operation::KeepRows { .. } => "keep",
            Operation::DropRows { .. } => "drop",
            Operation::Fill { .. } => "fill",
            Operation::Replace { .. } => "replace",
            Operation::Map { .. } => "map",
            Operation::Lookup { .. } => "lookup",
            Operation::Append { .. } => "append",
            Operation::Split { .. } => "split",
            Operation::Combine { .. } => "combine",
            Operation::Extract { .. } => "extract",
            Operation::Summarize { .. } => "summarize",
            Operation::Number { .. } => "number",
            Operation::Date { .. } => "date",
            Operation::Rename { .. } => "rename",
            Operation::Select { .. } => "select",
            Operation::Sort { .. } => "sort",
        }
    }

    pub fn params(&self) -> serde_json::Value {
        serde_json::to_value(self).unwrap_or(serde_json::Value::Null)
    }

    fn columns(&self) -> Option<&[String]> {
        match self {
            Operation::Trim { columns, .. }
            | Operation::Case { columns, .. }
            | Operation::Replace { columns, .. } => columns.as_deref(),
            Operation::Dedupe { key, .. } => key.as_deref(),
            Operation::Fill { columns, .. }
            | Operation::Number { columns, .. }
            | Operation::Date { columns, .. }
            | Operation::Map { columns, .. }
            | Operation::Select { columns } => Some(columns),
            Operation::KeepRows { .. }
            | Operation::DropRows { .. }
            | Operation::Rename { .. }
            | Operation::Summarize { .. }
            | Operation::Split { .. }
            | Operation::Combine { .. }
            | Operation::Extract { .. }
            | Operation::Lookup { .. }
            | Operation::Sort { .. }
            | Operation::Append { .. } => None,
        }
    }

    /// Whether the operation changes cells (and keeps every row) rather than choosing rows.
    pub fn changes_cells(&self) -> bool {
        matches!(
            self,
            Operation::Trim { .. }
                | Operation::Case { .. }
                | Operation::Fill { .. }
                | Operation::Number { .. }
                | Operation::Date { .. }
                | Operation::Replace { .. }
                | Operation::Map { .. }
        )
    }

    /// The 0-based positions of the columns the operation works on (all when none are named).
    pub fn target_columns(&self, header: &[String], version_label: &str) -> Result<Vec<usize>> {
        match self.columns() {
            None => Ok((0..header.len()).collect()),
            Some(names) => names
                .iter()
                .map(|n| {
                    header.iter().position(|h| h == n).ok_or_else(|| {
                        Error::usage(format!(
                            "column \"{n}\" is not in {version_label}; its columns are: {}",
                            header.join(", ")
                        ))
                    })
                })
                .collect(),
        }
    }

    /// The output columns: for each, its name, the input column it comes from (for a derived
    /// column, its first source), and how a derived column is computed.
    pub fn derived_columns(
        &self,
        header: &[String],
        version_label: &str,
    ) -> Result<Vec<(String, usize, Option<derive::Derivation>)>> {
        use derive::{compile, find, Derivation};
        let mut out: Vec<(String, usize, Option<Derivation>)> = header
            .iter()
            .cloned()
            .zip(0..)
            .map(|(n, i)| (n, i, None))
            .collect();
        let (after, new): (usize, Vec<(String, Derivation)>) = match self {
            Operation::Split { column, on, into } => {
                let c = find(header, column, version_label)?;
                if on.is_empty() || into.is_empty() {
                    return Err(Error::usage(
                        "split needs --on SEPARATOR and --into COL[,COL..]",
                    ));
                }
                let n = into.len();
                let new = into
                    .iter()
                    .enumerate()
                    .map(|(part, name)| {
                        (
                            name.clone(),
                            Derivation::SplitPart {
                                source: c,
                                sep: on.clone(),
                                part,
                                last: part + 1 == n,
                            },
                        )
                    })
                    .collect();
                (c, new)
            }
            Operation::Combine {
                columns,
                with,
                into,
            } => {
                let idx: Vec<usize> = columns
                    .iter()
                    .map(|c| find(header, c, version_label))
                    .collect::<Result<_>>()?;
                let last = *idx
                    .iter()
                    .max()
                    .ok_or_else(|| Error::usage("combine needs --columns"))?;
                (
                    last,
                    vec![(
                        into.clone(),
                        Derivation::Combine {
                            sources: idx,
                            with: with.clone(),
                        },
                    )],
                )
            }
            Operation::Extract {
                column,
                into,
                from,
                len,
                regex,
            } => {
                let c = find(header, column, version_label)?;
                let d = match (regex, from) {
                    (Some(re), None) => Derivation::Pattern { source: c, re: compile(re)? },
                    (None, Some(f)) if *f >= 1 => Derivation::Range {
                        source: c,
                        from: (*f - 1) as usize,
                        len: len.map(|l| l as usize),
                    },
                    _ => {
                        return Err(Error::usage(
                            "extract takes either --from N [--len L] (characters, counted from 1) or --regex RE",
                        ))
                    }
                };
                (c, vec![(into.clone(), d)])
            }
            Operation::Lookup { on, take, .. } => {
                let first = find(header, on.first().map_or("", |s| s.as_str()), version_label)?;
                for name in take {
                    out.push((name.clone(), first, None));
                }
                let names: Vec<(String, usize)> =
                    out.iter().map(|(n, i, _)| (n.clone(), *i)).collect();
                check_unique(&names)?;
                return Ok(out);
            }
            _ => {
                return Ok(self
                    .output_columns(header, version_label)?
                    .into_iter()
                    .map(|(n, i)| (n, i, None))
                    .collect())
            }
        };
        let at = after + 1;
        for (k, (name, d)) in new.into_iter().enumerate() {
            let first = d.sources()[0];
            out.insert(at + k, (name, first, Some(d)));
        }
        let names: Vec<(String, usize)> = out.iter().map(|(n, i, _)| (n.clone(), *i)).collect();
        check_unique(&names)?;
        Ok(out)
    }

    /// The output columns: for each, its name and the input column it comes from.
    pub fn output_columns(
        &self,
        header: &[String],
        version_label: &str,
    ) -> Result<Vec<(String, usize)>> {
        let same = || header.iter().cloned().zip(0..).collect::<Vec<_>>();
        match self {
            Operation::Rename { columns } => {
                let mut out = same();
                for r in columns {
                    let i = header.iter().position(|h| *h == r.from).ok_or_else(|| {
                        Error::usage(format!(
                            "column \"{}\" is not in {version_label}; its columns are: {}",
                            r.from,
                            header.join(", ")
                        ))
                    })?;
                    if r.to.trim().is_empty() {
                        return Err(Error::usage(format!(
                            "the new name of column \"{}\" is blank",
                            r.from
                        )));
                    }
                    out[i].0 = r.to.clone();
                }
                check_unique(&out)?;
                Ok(out)
            }
            Operation::Select { columns } => {
                let idx = self.target_columns(header, version_label)?;
                let out: Vec<(String, usize)> = columns.iter().cloned().zip(idx).collect();
                check_unique(&out)?;
                if out.is_empty() {
                    return Err(Error::usage("select needs at least one column"));
                }
                Ok(out)
            }
            _ => Ok(same()),
        }
    }

    /// True when [`Operation::cell_into`] would certainly leave the value as it is, decided on
    /// its bytes without decoding them; false means "ask `cell_into`".
    pub fn cell_keeps(&self, value: &[u8]) -> bool {
        match self {
            Operation::Trim { inner, .. } => text::trim_keeps(value, *inner),
            Operation::Case { to, .. } => text::case_keeps(value, *to),
            _ => false,
        }
    }

    /// The new value of a cell of trim or case, written into `out` (a buffer reused from cell
    /// to cell); false when the value stays as it is (or the operation is another one).
    pub fn cell_into(&self, value: &str, out: &mut String) -> bool {
        match self {
            Operation::Trim { inner, .. } => text::trim_into(value, *inner, out),
            Operation::Case { to, .. } => text::case_into(value, *to, out),
            _ => return false,
        }
        out.as_str() != value
    }
}

fn check_unique(cols: &[(String, usize)]) -> Result<()> {
    let mut seen = std::collections::BTreeSet::new();
    for (name, _) in cols {
        if !seen.insert(name.as_str()) {
            return Err(Error::usage(format!(
                "column \"{name}\" would appear twice in the result; column names must be unique"
            )));
        }
    }
    Ok(())
}
