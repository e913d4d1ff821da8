//! The difference between a recorded version and the bytes a replay computed instead: a short
//! summary (rows only in one of them, rows changed, changed cells per column, a few examples)
//! made by the diff engine ([`crate::diff`]), so that the first step that no longer gives its
//! recorded output says how its output differs.
//!
//! The computed bytes are a file under the store's `tmp/`; to compare them the diff engine
//! needs them as a version, so they are drafted like an intake (table and row index objects
//! written, nothing recorded) into a stage of their own under `tmp/`
//! ([`crate::store::Objects::begin_stage`]), compared, and the stage removed: the store is
//! left as it was.

use std::path::Path;

use serde::Serialize;

use crate::diff::{self, ChangeKind, DiffOptions, KeyChoice, MatchedBy};
use crate::error::Result;
use crate::intake::{self, IngestOptions, Prepared};
use crate::model::{Agent, Version};
use crate::store::Store;

/// How many changed, missing or new rows a summary shows.
pub const EXAMPLES: usize = 3;

/// One cell of an example: its column and the two values.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct CellPair {
    pub column: String,
    pub recorded: Option<String>,
    pub computed: Option<String>,
}

/// One example row. Rows are 1-based data rows, as on screen.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Example {
    /// "changed", "only_recorded" (the recomputed output lacks it), "only_computed".
    pub kind: String,
    pub recorded_row: Option<u64>,
    pub computed_row: Option<u64>,
    /// The changed cells of a changed row; the first cells of a row only one side has.
    pub cells: Vec<CellPair>,
}

/// Changed cells in one column.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ColumnCount {
    pub column: String,
    pub cells: u64,
}

/// Recorded against recomputed.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Difference {
    /// The recorded version (`name@n`) and the hash of the bytes computed now.
    pub recorded: String,
    pub computed_hash: Option<String>,
    pub recorded_rows: u64,
    pub computed_rows: u64,
    /// "key order_id" or "order".
    pub matched_by: String,
    pub rows_changed: u64,
    pub rows_only_recorded: u64,
    pub rows_only_computed: u64,
    pub columns_only_recorded: Vec<String>,
    pub columns_only_computed: Vec<String>,
    /// Columns with changed cells, in the computed output's column order.
    pub changed_cells: Vec<ColumnCount>,
    pub examples: Vec<Example>,
}

/// Compares the recorded version with the file `computed` (bytes a replayed step gave).
pub fn against_file(store: &mut Store, recorded: &Version, computed: &Path) -> Result<Difference> {
    let opts = IngestOptions {
        dataset: recorded.dataset.clone(),
        key: None,
        reason: None,
        delimiter: None,
        has_header: true,
        encoding: None,
        null_tokens: recorded.null_tokens.clone(),
        agent: Agent::new("sluice reproduce", None, "builtin"),
    };
    // The draft's objects go to a stage of their own, removed again afterwards: the store is
    // left as it was.
    store.begin_stage("compare")?;
    let result = (|| match intake::prepare(store, computed, &opts)? {
        Prepared::Unchanged(v) => summarize(store, recorded, &v),
        Prepared::Ready(mut p) => {
            let draft = p.draft(store)?;
            summarize(store, recorded, &draft)
        }
    })();
    store.objects.discard_stage();
    result
}

fn summarize(store: &Store, recorded: &Version, computed: &Version) -> Result<Difference> {
    let d = diff::diff_versions(
        store,
        recorded,
        computed,
        &DiffOptions {
            key: KeyChoice::Declared,
        },
    )?;
    let mut examples = Vec::new();
    let mut shown = [0usize; 3];
    for c in &d.changes {
        let slot = match c.kind {
            ChangeKind::Changed => 0,
            ChangeKind::Removed => 1,
            ChangeKind::Added => 2,
        };
        if shown[slot] >= EXAMPLES {
            continue;
        }
        shown[slot] += 1;
        let cells = match c.kind {
            ChangeKind::Changed => d.pairing.cells[c.cells.clone()]
                .iter()
                .map(|cell| CellPair {
                    column: cell.column.clone(),
                    recorded: Some(cell.old.clone()),
                    computed: Some(cell.new.clone()),
                })
                .collect(),
            ChangeKind::Removed => first_cells(
                &d.from.header,
                c.a_row.and_then(|r| d.from_rows.get(r)),
                true,
            ),
            ChangeKind::Added => {
                first_cells(&d.to.header, c.b_row.and_then(|r| d.to_rows.get(r)), false)
            }
        };
        examples.push(Example {
            kind: match c.kind {
                ChangeKind::Changed => "changed",
                ChangeKind::Removed => "only_recorded",
                ChangeKind::Added => "only_computed",
            }
            .to_string(),
            recorded_row: c.a_row.map(|r| r + 1),
            computed_row: c.b_row.map(|r| r + 1),
            cells,
        });
    }
    Ok(Difference {
        recorded: recorded.label(),
        computed_hash: Some(computed.hash.clone()),
        recorded_rows: recorded.n_rows,
        computed_rows: computed.n_rows,
        matched_by: match &d.matched_by {
            MatchedBy::Key(k) => format!("key {}", k.join(",")),
            MatchedBy::Order => "order".into(),
        },
        rows_changed: d.n_changed(),
        rows_only_recorded: d.n_removed(),
        rows_only_computed: d.n_added(),
        columns_only_recorded: d.columns.removed.clone(),
        columns_only_computed: d.columns.added.clone(),
        changed_cells: d
            .changed_by_column
            .iter()
            .filter(|(_, n)| *n > 0)
            .map(|(column, cells)| ColumnCount {
                column: column.clone(),
                cells: *cells,
            })
            .collect(),
        examples,
    })
}

/// The first few cells of a row only one side has.
fn first_cells(
    header: &[String],
    row: Option<diff::RowRef<'_>>,
    recorded_side: bool,
) -> Vec<CellPair> {
    let Some(row) = row else {
        return Vec::new();
    };
    header
        .iter()
        .enumerate()
        .take(4.min(row.len()))
        .map(|(i, column)| {
            let text = Some(row.text(i));
            CellPair {
                column: column.clone(),
                recorded: if recorded_side { text.clone() } else { None },
                computed: if recorded_side { None } else { text },
            }
        })
        .collect()
}
