//! `sort`: rows put in order by one or more columns, each ascending or descending. The sort is
//! stable: rows with equal keys keep their input order. Two values that both read as plain
//! decimal numbers are compared exactly as numbers (`-2` before `10`, `1.50` equal to `1.5`);
//! otherwise they are compared as text, by Unicode code point. So that the order is total even
//! in a column that mixes the two, numbers come before text there. Blank values are text (the
//! empty text, first among texts). The row map is the permutation: every output row points at
//! the input row it is, recorded as runs like any other step's, so trails and explanations
//! follow it as they follow a filter. The whole table is held in memory while it is sorted.

use std::cmp::Ordering;

use serde::{Deserialize, Serialize};

use super::apply::{each_input_row, record, ApplyOptions, Done, Mode, Provenance};
use super::Operation;
use crate::clock;
use crate::error::{Error, Result};
use crate::model::{RowRun, Version};
use crate::store::Store;
use crate::table::profile::{cmp_numbers, number_shape};

/// One column of a sort and its direction.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SortKey {
    pub column: String,
    #[serde(default)]
    pub direction: Direction,
}

/// Ascending (the default) or descending.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Direction {
    #[default]
    Ascending,
    Descending,
}

/// Two cells in sort order: exact decimal comparison when both are plain numbers, numbers
/// before text when one is, code-point order otherwise (UTF-8 byte order is code-point order).
pub fn compare_values(a: &[u8], b: &[u8]) -> Ordering {
    match (number_shape(a).is_some(), number_shape(b).is_some()) {
        (true, true) => cmp_numbers(a, b),
        (true, false) => Ordering::Less,
        (false, true) => Ordering::Greater,
        (false, false) => a.cmp(b),
    }
}

/// The stable order of rows given their key cells (`keys[row][k]` for the k-th sort column):
/// the input row of each output row.
pub fn permutation(keys: &[Vec<Vec<u8>>], directions: &[Direction]) -> Vec<u64> {
    let mut order: Vec<u64> = (0..keys.len() as u64).collect();
    order.sort_by(|&x, &y| {
        let (kx, ky) = (&keys[x as usize], &keys[y as usize]);
        for (k, d) in directions.iter().enumerate() {
            let o = compare_values(&kx[k], &ky[k]);
            let o = match d {
                Direction::Ascending => o,
                Direction::Descending => o.reverse(),
            };
            if o != Ordering::Equal {
                return o;
            }
        }
        Ordering::Equal
    });
    order
}

/// The row map of a permutation: runs of output rows that are consecutive input rows.
pub fn runs_of(order: &[u64]) -> Vec<RowRun> {
    let mut map = crate::model::RowMap::default();
    for (out, &input) in order.iter().enumerate() {
        map.push(out as u64, input);
    }
    map.into_runs()
}

pub(super) fn run(
    store: &mut Store,
    input: Version,
    opts: &ApplyOptions,
    mode: Mode,
) -> Result<Done> {
    let Operation::Sort { by } = &opts.op else {
        return Err(Error::usage("sort was called for another operation"));
    };
    if by.is_empty() {
        return Err(Error::usage(
            "sort needs at least one column in \"by\", e.g. [{\"column\": \"opened\"}]",
        ));
    }
    let label = input.label();
    let cols: Vec<usize> = by
        .iter()
        .map(|k| {
            input
                .header
                .iter()
                .position(|h| *h == k.column)
                .ok_or_else(|| {
                    Error::usage(format!(
                        "column \"{}\" is not in {label}; its columns are: {}",
                        k.column,
                        input.header.join(", ")
                    ))
                })
        })
        .collect::<Result<_>>()?;
    let directions: Vec<Direction> = by.iter().map(|k| k.direction).collect();
    let dataset = opts
        .output_dataset
        .clone()
        .unwrap_or_else(|| input.dataset.clone());
    let started_at = clock::now_rfc3339();
    // Every row's cells (one buffer and the end of each cell) and its key cells.
    let mut rows: Vec<(Vec<u8>, Vec<usize>)> = Vec::new();
    let mut keys: Vec<Vec<Vec<u8>>> = Vec::new();
    each_input_row(store, &input, |_, r| {
        let mut bytes = Vec::new();
        let mut ends = Vec::with_capacity(r.len());
        for f in r.iter() {
            bytes.extend_from_slice(f);
            ends.push(bytes.len());
        }
        rows.push((bytes, ends));
        keys.push(cols.iter().map(|&c| r.field(c).to_vec()).collect());
        Ok(())
    })?;
    let order = permutation(&keys, &directions);
    drop(keys);
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: std::io::Error| Error::io(&store_dir.join("tmp"), e);
    let mut writer =
        super::apply::output_writer(store, opts, &input.header, &input.null_tokens, &[])
            .map_err(store_io)?;
    for &i in &order {
        let (bytes, ends) = &rows[i as usize];
        let mut start = 0;
        let fields: Vec<&[u8]> = ends
            .iter()
            .map(|&end| {
                let f = &bytes[start..end];
                start = end;
                f
            })
            .collect();
        writer.write_row(&fields).map_err(store_io)?;
    }
    let written = writer.finish().map_err(store_io)?;
    let prov = Provenance {
        runs: runs_of(&order),
        changes: Default::default(),
        drops: Default::default(),
        notes: Vec::new(),
        sources: Vec::new(),
        table: None,
        other: None,
    };
    let header = input.header.clone();
    record(
        store,
        input,
        &dataset,
        opts,
        &started_at,
        written,
        &header,
        prov,
        None,
        Vec::new(),
        None,
        mode,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_compare_exactly_and_before_text() {
        assert_eq!(compare_values(b"-2", b"10"), Ordering::Less);
        assert_eq!(compare_values(b"1.50", b"1.5"), Ordering::Equal);
        assert_eq!(compare_values(b"9", b"10"), Ordering::Less);
        assert_eq!(compare_values(b"10", b"9a"), Ordering::Less);
        assert_eq!(compare_values(b"", b"a"), Ordering::Less);
        assert_eq!(compare_values("Ösel".as_bytes(), b"Zed"), Ordering::Greater);
    }

    #[test]
    fn a_permutation_is_recorded_as_runs() {
        let runs = runs_of(&[2, 3, 0, 1, 4]);
        let as_tuples: Vec<(u64, u64, u64)> = runs
            .iter()
            .map(|r| (r.out_start, r.in_start, r.len))
            .collect();
        assert_eq!(as_tuples, vec![(0, 2, 2), (2, 0, 2), (4, 4, 1)]);
    }
}
