//! `sort` in a plan: a stable reordering whose row map is the permutation, so trails go through
//! it to the raw line. The order is checked against an outside reference: the standard
//! library's stable sort, `std::slice::sort_by` (stable), Rust standard library, applied to
//! the same rows with a comparator written here from the documented rule (numbers compared as
//! exact decimals when both cells are plain numbers, numbers before text, text by code point,
//! each key ascending or descending).

mod common;

use std::cmp::Ordering;

use common::{assert_contains, Sandbox};
use proptest::prelude::*;
use serde_json::json;

fn plan(by: serde_json::Value) -> String {
    json!({
        "sluice_plan": 2,
        "sources": [{"dataset": "rows", "file": "rows.csv", "reason": "test rows"}],
        "steps": [{"dataset": "rows", "clean": "sort", "settings": {"by": by}, "reason": "in order"}]
    })
    .to_string()
}

#[test]
fn a_trail_goes_through_a_sort_to_the_raw_line() {
    let s = Sandbox::with_store();
    s.file(
        "rows.csv",
        "id,shop,amount\n1,Oxwater,12.50\n2,Fennmarsh,-3\n3,Oxwater,7\n4,Fennmarsh,10\n5,Quillby,7.0\n",
    );
    s.file(
        "p.json",
        plan(json!([{"column": "shop"}, {"column": "amount", "direction": "descending"}])),
    );
    assert_contains(&s.ok(&["run", "p.json"]), "recorded rows:v2");
    // Fennmarsh 10, Fennmarsh -3, Oxwater 12.50, Oxwater 7, Quillby 7.0 (numbers compared as
    // numbers: 12.50 > 7 although "1" < "7" as text).
    assert_eq!(
        s.ok(&["retrieve", "rows"]),
        "id,shop,amount\n4,Fennmarsh,10\n2,Fennmarsh,-3\n1,Oxwater,12.50\n3,Oxwater,7\n5,Quillby,7.0\n"
    );
    // Output row 3 (id 1) is input row 1: raw line 2.
    let trail = s.json(&[
        "trace", "rows", "--row", "3", "--column", "amount", "--json",
    ]);
    assert_eq!(trail["hops"][0]["operation"], "sort");
    assert_eq!(trail["hops"][0]["row_after"], 3);
    assert_eq!(trail["hops"][0]["row_before"], 1);
    assert_eq!(trail["end"]["line"], 2);
    assert_eq!(trail["end"]["raw_value"], "12.50");
    // The step is reproduced from the raw file.
    assert_contains(&s.ok(&["reproduce", "rows"]), "reproduced rows:v2");
    assert_contains(&s.ok(&["verify"]), "intact");
}

#[test]
fn a_sort_on_a_column_that_is_not_there_is_refused() {
    let s = Sandbox::with_store();
    s.file("rows.csv", "id,shop\n1,a\n");
    s.file("p.json", plan(json!([{"column": "colour"}])));
    let err = s.fails(2, &["run", "p.json"]);
    assert_contains(
        &err,
        "column \"colour\" is not in rows:v1; its columns are: id, shop",
    );
    s.file(
        "q.json",
        plan(json!([{"column": "shop", "direction": "sideways"}])),
    );
    let err = s.fails(2, &["run", "q.json"]);
    assert_contains(&err, "unknown variant `sideways`");
}

/// The documented rule, written again here: a plain number is `[+-]digits[.digits]` (the
/// generator below writes no other number shapes), compared exactly; numbers first.
fn as_hundredths(v: &str) -> Option<i128> {
    let (neg, body) = match v.strip_prefix('-') {
        Some(b) => (true, b),
        None => (false, v.strip_prefix('+').unwrap_or(v)),
    };
    let (int, frac) = body.split_once('.').unwrap_or((body, ""));
    if int.is_empty() || !int.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    if frac.len() > 2 || !frac.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    let n: i128 = int.parse::<i128>().ok()? * 100 + format!("{frac:0<2}").parse::<i128>().ok()?;
    Some(if neg { -n } else { n })
}

fn reference_cmp(a: &str, b: &str) -> Ordering {
    match (as_hundredths(a), as_hundredths(b)) {
        (Some(x), Some(y)) => x.cmp(&y),
        (Some(_), None) => Ordering::Less,
        (None, Some(_)) => Ordering::Greater,
        (None, None) => a.cmp(b),
    }
}

fn cell() -> impl Strategy<Value = String> {
    prop_oneof![
        (-30i64..30).prop_map(|n| n.to_string()),
        (-300i64..300).prop_map(|n| format!("{}.{:02}", n / 100, (n % 100).abs())),
        (0i64..20).prop_map(|n| format!("{n}.5")),
        prop::sample::select(vec!["", "a", "B", "b", "Ösel", "zz", "10a", "-"])
            .prop_map(String::from),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(12))]

    /// The output is the input rows in the order the standard library's stable sort gives with
    /// the documented comparator, every input row exactly once, and the row map says so.
    #[test]
    fn sort_is_the_stable_permutation_std_gives(
        rows in prop::collection::vec((cell(), cell()), 1..40),
        first_desc in any::<bool>(),
        second_desc in any::<bool>(),
    ) {
        let s = Sandbox::with_store();
        let mut csv = String::from("id,k1,k2\n");
        for (i, (a, b)) in rows.iter().enumerate() {
            csv.push_str(&format!("{i},{a},{b}\n"));
        }
        s.file("rows.csv", &csv);
        let dir = |d: bool| if d { "descending" } else { "ascending" };
        s.file("p.json", plan(json!([
            {"column": "k1", "direction": dir(first_desc)},
            {"column": "k2", "direction": dir(second_desc)}
        ])));
        s.ok(&["run", "p.json"]);

        let mut expected: Vec<(usize, &(String, String))> = rows.iter().enumerate().collect();
        expected.sort_by(|(_, x), (_, y)| {
            let o = reference_cmp(&x.0, &y.0);
            let o = if first_desc { o.reverse() } else { o };
            o.then_with(|| {
                let o = reference_cmp(&x.1, &y.1);
                if second_desc { o.reverse() } else { o }
            })
        });
        let mut want = String::from("id,k1,k2\n");
        for (i, (a, b)) in &expected {
            want.push_str(&format!("{i},{a},{b}\n"));
        }
        // The canonical CSV writes these cells as they are (no quoting needed).
        prop_assert_eq!(s.ok(&["retrieve", "rows"]), want);

        // The row map: output row r is input row expected[r] (raw line = input row + 2).
        for r in [0, expected.len() / 2, expected.len() - 1] {
            let t = s.json(&["trace", "rows", "--row", &(r + 1).to_string(), "--column", "id", "--json"]);
            prop_assert_eq!(t["end"]["line"].as_u64(), Some(expected[r].0 as u64 + 2));
        }
    }
}

#[test]
fn apply_sorts_from_the_command_line_too() {
    let s = Sandbox::with_store();
    s.file("rows.csv", "id,shop,amount\n1,b,2\n2,a,10\n3,b,9\n4,a,-1\n");
    s.ok(&["receive", "rows.csv", "--as", "rows"]);
    let out = s.ok(&[
        "clean",
        "rows",
        "sort",
        "--by",
        "shop,amount:desc",
        "--why",
        "by shop, largest first",
    ]);
    assert_contains(
        &out,
        "sort put the rows in order by shop, amount (descending)",
    );
    assert_eq!(
        s.ok(&["retrieve", "rows"]),
        "id,shop,amount\n2,a,10\n4,a,-1\n3,b,9\n1,b,2\n"
    );
    // The plan exported from it says the same in settings.
    let plan: serde_json::Value =
        serde_json::from_str(&s.ok(&["export", "rows", "--format", "plan"])).unwrap();
    assert_eq!(plan["steps"][0]["clean"], "sort");
    assert_eq!(
        plan["steps"][0]["settings"],
        json!({"by": [{"column": "shop", "direction": "ascending"}, {"column": "amount", "direction": "descending"}]})
    );
}
