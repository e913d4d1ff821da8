//! Re-applying a hand edit. A hand edit's provenance object keeps positions, not values: the
//! row map (which input row each output row is), the changed cells (output row and column)
//! and the dropped input rows. The values a person typed exist only in the version they saved,
//! in their own dialect. So a hand edit is re-applied like this: every output row the row map
//! covers is the input row it names, with the listed changed cells (and cells of columns the
//! input does not have) taken from the recorded output; every other output row (added by
//! hand) is taken whole from the recorded output; every input row the row map does not carry
//! must be listed as dropped, and no carried row may be. The result must equal the recorded
//! output row for row and cell for cell, and every listed cell must really differ from its
//! input cell: that proves the recorded lineage explains the edit exactly. Without the
//! recorded output (missing or damaged) nothing can be re-applied.
//!
//! Values are compared as parsed text, so the person's delimiter, quoting and line endings do
//! not matter. The input version is held in memory while the output is read (hand edits are
//! files a person edited; a very large one needs memory in proportion).

use std::collections::HashMap;

use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::provenance;
use crate::store::Store;

use super::difference::{CellPair, ColumnCount, Difference, Example, EXAMPLES};

/// What re-applying found.
pub(super) enum Reapplied {
    /// The re-applied edit equals the recorded output.
    Same,
    /// It does not: where the lineage and the output disagree.
    Differs(Box<Difference>, String),
}

fn text(field: &[u8]) -> String {
    String::from_utf8_lossy(field).into_owned()
}

/// Re-applies the hand edit `step_id`, which made `output` from `input`.
pub(super) fn reapply(
    store: &Store,
    step_id: i64,
    input: &Version,
    output: &Version,
) -> Result<Reapplied> {
    let mut before: Vec<Vec<String>> = Vec::with_capacity(input.n_rows as usize);
    store.objects.each_row(input, |_, rec| {
        before.push(rec.iter().map(text).collect());
        Ok(())
    })?;

    // Which input row each output row is, by the row map.
    let n_out = output.n_rows as usize;
    let mut source: Vec<Option<u64>> = vec![None; n_out];
    let mut carried = vec![false; before.len()];
    let mut lineage_problems: Vec<String> = Vec::new();
    for run in provenance::row_runs(store, output, input.id)? {
        for k in 0..run.len {
            let (o, i) = (run.out_start + k, run.in_start + k);
            if o as usize >= n_out || i as usize >= before.len() {
                lineage_problems.push(format!(
                    "the row map names output row {} or input row {}, beyond the versions' rows",
                    o + 1,
                    i + 1
                ));
                break;
            }
            source[o as usize] = Some(i);
            carried[i as usize] = true;
        }
    }
    let mut dropped = vec![false; before.len()];
    for d in provenance::drops(store, step_id, input.id)? {
        match dropped.get_mut(d.row_idx as usize) {
            Some(slot) => *slot = true,
            None => lineage_problems.push(format!(
                "a dropped row ({}) is beyond {}'s rows",
                d.row_idx + 1,
                input.label()
            )),
        }
    }
    for (i, (&c, &d)) in carried.iter().zip(&dropped).enumerate() {
        if c == d && lineage_problems.len() < EXAMPLES {
            lineage_problems.push(if c {
                format!("input row {} is both carried and listed as dropped", i + 1)
            } else {
                format!(
                    "input row {} is neither carried to the output nor listed as dropped",
                    i + 1
                )
            });
        }
    }

    // Where each output column's values come from in the input.
    let renamed: HashMap<String, String> = store
        .lineage
        .column_sources(output.id)?
        .into_iter()
        .collect();
    let from_column: Vec<Option<usize>> = output
        .header
        .iter()
        .map(|c| {
            let name = renamed.get(c).unwrap_or(c);
            input.header.iter().position(|h| h == name)
        })
        .collect();
    let mut changed: Vec<Vec<u64>> = vec![Vec::new(); output.header.len()];
    for (column, rows) in provenance::cell_changes_rows(store, output)? {
        let Some(c) = output.header.iter().position(|h| *h == column) else {
            return Err(ErrorKind::Inconsistent(format!(
                "the provenance of step {step_id} names a column \"{column}\" that {} does not have",
                output.label()
            ))
            .into());
        };
        changed[c].extend(rows);
        changed[c].sort_unstable();
    }

    let mut by_column = vec![0u64; output.header.len()];
    let mut rows_changed = 0u64;
    let mut examples: Vec<Example> = Vec::new();
    store.objects.each_row(output, |o, rec| {
        let Some(Some(i)) = source.get(o as usize) else {
            return Ok(()); // added by hand: taken whole from the recorded output
        };
        let old = &before[*i as usize];
        let mut cells = Vec::new();
        for (c, field) in rec.iter().enumerate() {
            let Some(Some(from)) = from_column.get(c) else {
                continue; // a column the input does not have: from the recorded output
            };
            let listed = changed[c].binary_search(&o).is_ok();
            let was = old.get(*from).map(String::as_str).unwrap_or("");
            let now = text(field);
            // Unlisted cells come from the input and must equal the output; listed ones come
            // from the output and must differ from the input.
            if listed == (was == now) {
                by_column[c] += 1;
                cells.push(CellPair {
                    column: output.header[c].clone(),
                    recorded: Some(now),
                    computed: Some(if listed {
                        format!("{was} (listed as changed, but unchanged)")
                    } else {
                        was.to_string()
                    }),
                });
            }
        }
        if !cells.is_empty() {
            rows_changed += 1;
            if examples.len() < EXAMPLES {
                examples.push(Example {
                    kind: "changed".into(),
                    recorded_row: Some(o + 1),
                    computed_row: Some(o + 1),
                    cells,
                });
            }
        }
        Ok(())
    })?;
    if rows_changed == 0 && lineage_problems.is_empty() {
        return Ok(Reapplied::Same);
    }
    let mut detail = String::from(
        "the recorded lineage does not explain the edit: re-applied, it does not give the recorded output",
    );
    for p in &lineage_problems {
        detail.push_str("; ");
        detail.push_str(p);
    }
    Ok(Reapplied::Differs(
        Box::new(Difference {
            recorded: output.label(),
            computed_hash: None,
            recorded_rows: output.n_rows,
            computed_rows: output.n_rows,
            matched_by: "row map".into(),
            rows_changed,
            rows_only_recorded: 0,
            rows_only_computed: 0,
            columns_only_recorded: Vec::new(),
            columns_only_computed: Vec::new(),
            changed_cells: output
                .header
                .iter()
                .zip(&by_column)
                .filter(|(_, n)| **n > 0)
                .map(|(column, cells)| ColumnCount {
                    column: column.clone(),
                    cells: *cells,
                })
                .collect(),
            examples,
        }),
        detail,
    ))
}
