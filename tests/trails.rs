//! End to end on the demo: for a sample of more than 1,000 cells of the cleaned orders, across
//! every column, the trail is one unbroken chain from the raw cell to the cleaned value, and at
//! every step of a built-in operation the recorded provenance says exactly what the data says:
//! a cell whose value the step changed is listed as changed, and a listed cell changed.

mod common;

use std::collections::{HashMap, HashSet};

use common::Sandbox;
use sluice::store::Store;
use sluice::trace::{trace, End, RowPick, Trail};

/// Checks one trail; returns how many hops it checked.
fn check(store: &Store, t: &Trail, listed: &mut HashMap<String, HashSet<(String, u64)>>) -> usize {
    let mut checked = 0;
    let mut expect_value = t.value.clone();
    let mut expect_at = (t.version.clone(), t.row);
    for h in &t.hops {
        assert_eq!(
            (h.produced.clone(), h.row_after),
            expect_at,
            "the chain is broken at step {} of the trail of {} row {} {}",
            h.step,
            t.version,
            t.row,
            t.column
        );
        assert_eq!(h.value_after, expect_value, "step {}", h.step);
        let same_shape = h.column_after == h.column_before
            && h.produced.split(':').next() == h.read.split(':').next();
        if h.link == "exact" && same_shape {
            let changes = listed.entry(h.produced.clone()).or_insert_with(|| {
                let v = sluice::refs::resolve(&store.lineage, &h.produced).unwrap();
                sluice::provenance::cell_changes_rows(store, &v)
                    .unwrap()
                    .into_iter()
                    .flat_map(|(c, rows)| rows.into_iter().map(move |r| (c.clone(), r)))
                    .collect()
            });
            let is_listed = changes.contains(&(h.column_after.clone(), h.row_after - 1));
            assert_eq!(
                is_listed,
                h.value_after != h.value_before,
                "step {} ({}) on {} row {} {}: listed {is_listed}, {:?} -> {:?}",
                h.step,
                h.operation.as_deref().unwrap_or(""),
                h.produced,
                h.row_after,
                h.column_after,
                h.value_before,
                h.value_after
            );
        }
        expect_value = h.value_before.clone();
        expect_at = (h.read.clone(), h.row_before);
        checked += 1;
    }
    match &t.end {
        End::Raw(o) => {
            if !t.hops.iter().any(|h| h.column_before.contains(" + ")) {
                assert_eq!(
                    o.raw_value, expect_value,
                    "raw end of {} {}",
                    t.version, t.column
                );
                assert_eq!(o.version, expect_at.0);
            }
        }
        End::Branches { sources } => {
            for b in sources {
                checked += check(store, &b.trail, listed);
            }
        }
        End::Made { .. } => {}
    }
    checked
}

#[test]
fn every_sampled_cell_of_the_cleaned_orders_has_an_unbroken_exact_trail() {
    let d = Sandbox::with_demo();
    let store = Store::open(&d.path().join("sluice-store")).unwrap();
    let v = sluice::refs::resolve(&store.lineage, "all_orders").unwrap();
    let mut listed = HashMap::new();
    let mut cells = 0;
    let mut hops = 0;
    // Every seventh row, every column: 88 rows x 12 columns = 1,056 cells.
    for row in (1..=v.n_rows).step_by(7) {
        for column in &v.header {
            let t = trace(&store, "all_orders", &RowPick::Number(row), column).unwrap();
            hops += check(&store, &t, &mut listed);
            cells += 1;
        }
    }
    assert!(cells >= 1000, "{cells} cells");
    assert!(hops > cells * 5, "{hops} hops for {cells} cells");
}
