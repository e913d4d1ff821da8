//! Group summaries: one output row per distinct combination of the `by` columns, in the order
//! the groups first appear, with `count` (rows in the group) and the asked aggregates of named
//! columns: `sum` and `mean` exact in decimal (see [`super::decimal`]), `min` and `max` in
//! exact numeric order, all over the group's non-blank values. Values that are not plain
//! numbers stop the step, listed (run `number` first).
//!
//! Provenance: which input rows an output row aggregates is not stored; it is recomputed on
//! demand from the immutable input: exactly the input rows whose `by` values equal the output
//! row's. The output dataset's key is the `by` columns.

use std::collections::HashMap;

use serde::{Deserialize, Serialize};

use super::apply::{each_input_row, record, ApplyOptions, Done, Mode, Provenance};
use super::decimal::Decimal;
use super::Operation;
use crate::clock;
use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;
use crate::table::profile::{cmp_numbers, number_shape};
use crate::table::RawRecord;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AggFunc {
    Sum,
    Mean,
    Min,
    Max,
}

impl AggFunc {
    pub fn name(self) -> &'static str {
        match self {
            AggFunc::Sum => "sum",
            AggFunc::Mean => "mean",
            AggFunc::Min => "min",
            AggFunc::Max => "max",
        }
    }
}

/// One aggregate column: `func` of input column `column`, named `func_column` in the output.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Aggregate {
    pub func: AggFunc,
    pub column: String,
}

impl Aggregate {
    pub fn output_name(&self) -> String {
        format!("{}_{}", self.func.name(), self.column)
    }
}

/// The aggregates of one column over one group, kept as values come: an exact sum, the count
/// of values, the least and greatest in exact numeric order. `explain` uses it too, so a total
/// is done again exactly as `summarize` did it.
#[derive(Debug, Clone, Default)]
pub(crate) struct AggState {
    pub sum: Decimal,
    pub n_values: u64,
    min: Option<String>,
    max: Option<String>,
}

/// Why a value could not be added.
pub(crate) enum NotAdded {
    /// Not a plain number.
    NotANumber,
    /// The sum no longer fits.
    Overflow,
}

impl AggState {
    /// Adds non-blank value `v`.
    pub fn add(&mut self, v: &[u8]) -> std::result::Result<(), NotAdded> {
        let text = std::str::from_utf8(v).unwrap_or("");
        let d = (number_shape(v).is_some())
            .then(|| Decimal::parse(text))
            .flatten()
            .ok_or(NotAdded::NotANumber)?;
        self.sum = self.sum.checked_add(d).ok_or(NotAdded::Overflow)?;
        self.n_values += 1;
        if self
            .min
            .as_deref()
            .is_none_or(|m| cmp_numbers(v, m.as_bytes()).is_lt())
        {
            self.min = Some(text.to_string());
        }
        if self
            .max
            .as_deref()
            .is_none_or(|m| cmp_numbers(v, m.as_bytes()).is_gt())
        {
            self.max = Some(text.to_string());
        }
        Ok(())
    }

    /// The aggregate as the summary writes it (blank over no values).
    pub fn value(&self, func: AggFunc) -> String {
        match func {
            _ if self.n_values == 0 => String::new(),
            AggFunc::Sum => self.sum.to_string(),
            AggFunc::Mean => self
                .sum
                .mean(self.n_values)
                .map(|m| m.to_string())
                .unwrap_or_default(),
            AggFunc::Min => self.min.clone().unwrap_or_default(),
            AggFunc::Max => self.max.clone().unwrap_or_default(),
        }
    }
}

struct Group {
    key: Vec<String>,
    count: u64,
    aggs: Vec<AggState>,
}

fn position(header: &[String], name: &str, label: &str) -> Result<usize> {
    header.iter().position(|h| h == name).ok_or_else(|| {
        Error::usage(format!(
            "column \"{name}\" is not in {label}; its columns are: {}",
            header.join(", ")
        ))
    })
}

/// Runs `summarize` over `input` and records the result as a new dataset.
pub(super) fn run(
    store: &mut Store,
    input: Version,
    opts: &ApplyOptions,
    mode: Mode,
) -> Result<Done> {
    let mut summary = Summary::new(&input, opts)?;
    each_input_row(store, &input, |row, r: RawRecord<'_>| {
        summary.add(row, &r);
        Ok(())
    })?;
    summary.record(store, input, opts, mode)
}

/// A summary taking its input's rows as they pass: read from a stored version by [`run`], or
/// handed on by the last step of a fused stretch of a plan (`apply::compute_chain_summed`),
/// so that the summary of a plan's cleaned table costs no second read of it.
pub(crate) struct Summary {
    /// The dataset the summary makes.
    dataset: String,
    by: Vec<String>,
    aggregates: Vec<Aggregate>,
    by_idx: Vec<usize>,
    agg_idx: Vec<usize>,
    out_header: Vec<String>,
    null_tokens: Vec<Vec<u8>>,
    started_at: String,
    groups: Vec<Group>,
    index: HashMap<Vec<u8>, usize>,
    key_buf: Vec<u8>,
    bad: Vec<(u64, String, String)>,
    overflow: bool,
}

impl Summary {
    /// Checks `opts` (a `summarize`) against `input`'s header and starts the summary.
    pub(crate) fn new(input: &Version, opts: &ApplyOptions) -> Result<Summary> {
        let Operation::Summarize { by, aggregates } = &opts.op else {
            return Err(Error::usage("summarize was called for another operation"));
        };
        let label = input.label();
        let dataset = match &opts.output_dataset {
            Some(d) if *d != input.dataset => d.clone(),
            _ => return Err(Error::usage(
                "summarize makes a new dataset: name it with --as NAME (e.g. --as revenue_by_shop)",
            )),
        };
        crate::intake::validate_dataset_name(&dataset)?;
        if by.is_empty() {
            return Err(Error::usage(
                "summarize needs --by COLUMN[,COLUMN..] to group on",
            ));
        }
        let by_idx: Vec<usize> = by
            .iter()
            .map(|c| position(&input.header, c, &label))
            .collect::<Result<_>>()?;
        let agg_idx: Vec<usize> = aggregates
            .iter()
            .map(|a| position(&input.header, &a.column, &label))
            .collect::<Result<_>>()?;
        let mut out_header: Vec<String> = by.clone();
        out_header.push("count".to_string());
        out_header.extend(aggregates.iter().map(Aggregate::output_name));
        let mut seen = std::collections::BTreeSet::new();
        for h in &out_header {
            if !seen.insert(h) {
                return Err(Error::usage(format!(
                    "column \"{h}\" would appear twice in the summary; group by other columns or rename first"
                )));
            }
        }
        Ok(Summary {
            dataset,
            by: by.clone(),
            aggregates: aggregates.clone(),
            by_idx,
            agg_idx,
            out_header,
            null_tokens: input
                .null_tokens
                .iter()
                .map(|t| t.as_bytes().to_vec())
                .collect(),
            started_at: clock::now_rfc3339(),
            groups: Vec::new(),
            index: HashMap::new(),
            key_buf: Vec::new(),
            bad: Vec::new(),
            overflow: false,
        })
    }

    /// Takes input row `row` (0-based) into its group.
    pub(crate) fn add(&mut self, row: u64, r: &RawRecord<'_>) {
        // The group key as bytes: each value with its length, so ("ab","c") != ("a","bc").
        self.key_buf.clear();
        for &c in &self.by_idx {
            let v = r.field(c);
            self.key_buf
                .extend_from_slice(&(v.len() as u64).to_le_bytes());
            self.key_buf.extend_from_slice(v);
        }
        let g = match self.index.get(&self.key_buf) {
            Some(&g) => g,
            None => {
                self.groups.push(Group {
                    key: self
                        .by_idx
                        .iter()
                        .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
                        .collect(),
                    count: 0,
                    aggs: vec![AggState::default(); self.aggregates.len()],
                });
                self.index
                    .insert(self.key_buf.clone(), self.groups.len() - 1);
                self.groups.len() - 1
            }
        };
        let group = &mut self.groups[g];
        group.count += 1;
        for (k, &c) in self.agg_idx.iter().enumerate() {
            let v = r.field(c);
            if v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v) {
                continue;
            }
            match group.aggs[k].add(v) {
                Ok(()) => {}
                Err(NotAdded::Overflow) => self.overflow = true,
                Err(NotAdded::NotANumber) => {
                    if self.bad.len() < 10 {
                        let text = String::from_utf8_lossy(v).into_owned();
                        self.bad
                            .push((row, self.aggregates[k].column.clone(), text));
                    } else {
                        self.bad.push((row, String::new(), String::new()));
                    }
                }
            }
        }
    }

    /// Writes the summary of every row taken and records it as the step on `input`, or
    /// refuses values that were not plain numbers (listed) and sums that overflowed.
    pub(super) fn record(
        self,
        store: &mut Store,
        input: Version,
        opts: &ApplyOptions,
        mode: Mode,
    ) -> Result<Done> {
        let label = input.label();
        let bad = &self.bad;
        if !bad.is_empty() {
            let shown: Vec<String> = bad
                .iter()
                .filter(|(_, c, _)| !c.is_empty())
                .map(|(row, col, v)| format!("data row {} {col} \"{v}\"", row + 1))
                .collect();
            return Err(ErrorKind::Data(format!(
                "{label}: {} value{} to aggregate {} not plain numbers: {}{}; read them first with `sluice clean {label} number --columns ...`",
                bad.len(),
                if bad.len() == 1 { "" } else { "s" },
                if bad.len() == 1 { "is" } else { "are" },
                shown.join(", "),
                if bad.len() > shown.len() { ", ..." } else { "" }
            ))
            .into());
        }
        if self.overflow {
            return Err(ErrorKind::Data(format!(
                "{label}: a sum does not fit in 38 significant digits; summarize fewer rows or fewer fraction digits"
            ))
            .into());
        }
        let store_dir = store.dir().to_path_buf();
        let store_io = |e: std::io::Error| Error::io(&store_dir.join("tmp"), e);
        let mut writer = super::apply::output_writer(store, opts, &self.out_header, &[], &[])
            .map_err(store_io)?;
        for g in &self.groups {
            let mut cells: Vec<String> = g.key.clone();
            cells.push(g.count.to_string());
            for (a, st) in self.aggregates.iter().zip(&g.aggs) {
                cells.push(st.value(a.func));
            }
            let fields: Vec<&[u8]> = cells.iter().map(|c| c.as_bytes()).collect();
            writer.write_row(&fields).map_err(store_io)?;
        }
        let written = writer.finish().map_err(store_io)?;
        let sources = self
            .aggregates
            .iter()
            .map(|a| (a.output_name(), a.column.clone()))
            .collect();
        let prov = Provenance {
            runs: Vec::new(),
            changes: Default::default(),
            drops: Default::default(),
            notes: Vec::new(),
            sources,
            table: None,
            other: None,
        };
        record(
            store,
            input,
            &self.dataset,
            opts,
            &self.started_at,
            written,
            &self.out_header,
            prov,
            Some(self.by),
            Vec::new(),
            None,
            mode,
        )
    }
}
