//! `append`: stacking a second source under the first, for merging two exports. The second
//! source's columns are matched to the first's by name, after renaming them through the
//! column map; a column of the first that the second lacks is blank in its rows, and a column
//! of the second that matches nothing stops the step (rename it in the map, or `select` it
//! away first). The row map says for every output row which source and row it came from.

use super::apply::{each_input_row, record, ApplyOptions, Done, Mode, OtherInput, Provenance};
use super::Operation;
use crate::clock;
use crate::error::{Error, Result};
use crate::model::{RowRun, Version};
use crate::refs;
use crate::store::Store;

pub(super) fn run(
    store: &mut Store,
    input: Version,
    opts: &ApplyOptions,
    mode: Mode,
) -> Result<Done> {
    let Operation::Append { other, map } = &opts.op else {
        return Err(Error::usage("append was called for another operation"));
    };
    let dataset = opts
        .output_dataset
        .clone()
        .unwrap_or_else(|| input.dataset.clone());
    crate::intake::validate_dataset_name(&dataset)?;
    let other = refs::resolve(&store.lineage, other)?;
    for m in map {
        if !other.header.contains(&m.from) {
            return Err(Error::usage(format!(
                "column \"{}\" is not in {}; its columns are: {}",
                m.from,
                other.label(),
                other.header.join(", ")
            )));
        }
    }
    // Each of their columns, under the name it takes here.
    let theirs_as_ours: Vec<String> = other
        .header
        .iter()
        .map(|h| {
            map.iter()
                .find(|m| m.from == *h)
                .map_or_else(|| h.clone(), |m| m.to.clone())
        })
        .collect();
    let unmatched: Vec<&String> = theirs_as_ours
        .iter()
        .filter(|n| !input.header.contains(n))
        .collect();
    if !unmatched.is_empty() {
        return Err(Error::usage(format!(
            "{} has column{} {} that {} has not; map them with --map THEIRS=OURS, or select them away first",
            other.label(),
            if unmatched.len() == 1 { "" } else { "s" },
            unmatched.iter().map(|n| format!("\"{n}\"")).collect::<Vec<_>>().join(", "),
            input.label()
        )));
    }
    // For each of our columns, where it is in their rows.
    let from_theirs: Vec<Option<usize>> = input
        .header
        .iter()
        .map(|h| theirs_as_ours.iter().position(|t| t == h))
        .collect();
    let started_at = clock::now_rfc3339();
    let store_dir = store.dir().to_path_buf();
    let store_io = |e: std::io::Error| Error::io(&store_dir.join("tmp"), e);
    let mut writer =
        super::apply::output_writer(store, opts, &input.header, &input.null_tokens, &[])
            .map_err(store_io)?;
    let mut n_ours = 0u64;
    each_input_row(store, &input, |_, r| {
        let fields: Vec<&[u8]> = r.iter().collect();
        writer.write_row(&fields).map_err(store_io)?;
        n_ours += 1;
        Ok(())
    })?;
    let mut n_theirs = 0u64;
    each_input_row(store, &other, |_, r| {
        let fields: Vec<&[u8]> = from_theirs
            .iter()
            .map(|c| c.map_or(&b""[..], |c| r.field(c)))
            .collect();
        writer.write_row(&fields).map_err(store_io)?;
        n_theirs += 1;
        Ok(())
    })?;
    let written = writer.finish().map_err(store_io)?;
    let run = |out_start: u64, len: u64| {
        (len > 0)
            .then_some(RowRun {
                out_start,
                in_start: 0,
                len,
            })
            .into_iter()
            .collect::<Vec<_>>()
    };
    let prov = Provenance {
        runs: run(0, n_ours),
        changes: Default::default(),
        drops: Default::default(),
        notes: Vec::new(),
        sources: Vec::new(),
        table: None,
        other: Some(OtherInput {
            id: other.id,
            runs: run(n_ours, n_theirs),
            sources: input
                .header
                .iter()
                .zip(&from_theirs)
                .filter_map(|(ours, t)| t.map(|t| (ours.clone(), other.header[t].clone())))
                .collect(),
        }),
    };
    let recorded = ApplyOptions {
        op: Operation::Append {
            other: other.hash.clone(),
            map: map.clone(),
        },
        ..opts.clone()
    };
    let header = input.header.clone();
    record(
        store,
        input,
        &dataset,
        &recorded,
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
