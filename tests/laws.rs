//! Laws of the predicate language and of the plan parser, held over generated inputs
//! (proptest). The predicates are checked against a small evaluator written here from the
//! grammar in `src/ops/predicate.rs` (integers only on the numeric side, so that its
//! arithmetic is exact), so a change of precedence or of a comparison's meaning shows up.

use proptest::prelude::*;
use sluice::ops::predicate::Predicate;
use sluice::table::RawRecord;

const HEADER: [&str; 3] = ["status", "amount", "shop name"];

#[derive(Debug, Clone)]
enum Val {
    Col(usize),
    Int(i64),
    Text(String),
}

#[derive(Debug, Clone)]
enum Expr {
    Cmp(Val, &'static str, Val),
    Blank(Val, bool),
    In(Val, Vec<Val>, bool),
    Not(Box<Expr>),
    And(Box<Expr>, Box<Expr>),
    Or(Box<Expr>, Box<Expr>),
}

fn val() -> impl Strategy<Value = Val> {
    prop_oneof![
        (0usize..3).prop_map(Val::Col),
        (-20i64..20).prop_map(Val::Int),
        prop::sample::select(vec!["open", "done", "o'neil", "", "7", "Open"])
            .prop_map(|s| Val::Text(s.to_string())),
    ]
}

fn expr() -> impl Strategy<Value = Expr> {
    let leaf = prop_oneof![
        (
            val(),
            prop::sample::select(vec!["=", "!=", "<", "<=", ">", ">="]),
            val()
        )
            .prop_map(|(a, op, b)| Expr::Cmp(a, op, b)),
        (val(), any::<bool>()).prop_map(|(v, n)| Expr::Blank(v, n)),
        (val(), prop::collection::vec(val(), 1..4), any::<bool>())
            .prop_map(|(v, l, n)| Expr::In(v, l, n)),
    ];
    leaf.prop_recursive(4, 24, 2, |inner| {
        prop_oneof![
            inner.clone().prop_map(|e| Expr::Not(Box::new(e))),
            (inner.clone(), inner.clone()).prop_map(|(a, b)| Expr::And(Box::new(a), Box::new(b))),
            (inner.clone(), inner).prop_map(|(a, b)| Expr::Or(Box::new(a), Box::new(b))),
        ]
    })
}

fn text_of_val(v: &Val) -> String {
    match v {
        Val::Col(0) => "status".into(),
        Val::Col(1) => "amount".into(),
        Val::Col(_) => "`shop name`".into(),
        Val::Int(i) => i.to_string(),
        Val::Text(t) => format!("'{}'", t.replace('\'', "''")),
    }
}

/// Fully parenthesised text, so that the law does not depend on precedence...
fn text_of(e: &Expr) -> String {
    match e {
        Expr::Cmp(a, op, b) => format!("{} {op} {}", text_of_val(a), text_of_val(b)),
        Expr::Blank(v, n) => format!(
            "{} is {}blank",
            text_of_val(v),
            if *n { "not " } else { "" }
        ),
        Expr::In(v, l, n) => format!(
            "{} {}in ({})",
            text_of_val(v),
            if *n { "not " } else { "" },
            l.iter().map(text_of_val).collect::<Vec<_>>().join(", ")
        ),
        Expr::Not(a) => format!("not ({})", text_of(a)),
        Expr::And(a, b) => format!("({}) and ({})", text_of(a), text_of(b)),
        Expr::Or(a, b) => format!("({}) or ({})", text_of(a), text_of(b)),
    }
}

/// ...and text with only the parentheses precedence needs (and binds tighter than or, not
/// tightest), which must mean the same.
fn minimal_text_of(e: &Expr, ctx: u8) -> String {
    // ctx: 0 top or an or operand, 1 an and operand, 2 a not operand.
    let wrap = |s: String, need: bool| if need { format!("({s})") } else { s };
    match e {
        Expr::Or(a, b) => wrap(
            format!("{} or {}", minimal_text_of(a, 0), minimal_text_of(b, 0)),
            ctx > 0,
        ),
        Expr::And(a, b) => wrap(
            format!("{} and {}", minimal_text_of(a, 1), minimal_text_of(b, 1)),
            ctx > 1,
        ),
        Expr::Not(a) => format!("not {}", minimal_text_of(a, 2)),
        leaf => wrap(text_of(leaf), ctx == 2),
    }
}

fn cell<'a>(v: &'a Val, row: &'a [String; 3]) -> String {
    match v {
        Val::Col(i) => row[*i].clone(),
        Val::Int(i) => i.to_string(),
        Val::Text(t) => t.clone(),
    }
}

/// Both sides plain integers: compare as numbers; otherwise byte order of the text.
fn compare(a: &str, b: &str) -> std::cmp::Ordering {
    match (a.parse::<i64>(), b.parse::<i64>()) {
        (Ok(x), Ok(y)) if !a.starts_with('+') && !b.starts_with('+') => x.cmp(&y),
        _ => a.as_bytes().cmp(b.as_bytes()),
    }
}

fn holds(e: &Expr, row: &[String; 3]) -> bool {
    use std::cmp::Ordering::*;
    match e {
        Expr::Cmp(a, op, b) => {
            let o = compare(&cell(a, row), &cell(b, row));
            match *op {
                "=" => o == Equal,
                "!=" => o != Equal,
                "<" => o == Less,
                "<=" => o != Greater,
                ">" => o == Greater,
                _ => o != Less,
            }
        }
        Expr::Blank(v, n) => cell(v, row).is_empty() != *n,
        Expr::In(v, l, n) => {
            let x = cell(v, row);
            l.iter().any(|i| compare(&x, &cell(i, row)) == Equal) != *n
        }
        Expr::Not(a) => !holds(a, row),
        Expr::And(a, b) => holds(a, row) && holds(b, row),
        Expr::Or(a, b) => holds(a, row) || holds(b, row),
    }
}

fn record_holds(p: &Predicate, row: &[String; 3]) -> bool {
    let fields: Vec<u8> = row.concat().into_bytes();
    let mut ends = Vec::new();
    let mut end = 0;
    for f in row {
        end += f.len();
        ends.push(end);
    }
    let r = RawRecord {
        fields: &fields,
        ends: &ends,
        byte: 0,
        line: 1,
        index: 0,
    };
    p.holds(&r, &|v: &[u8]| v.is_empty())
}

fn row() -> impl Strategy<Value = [String; 3]> {
    let c = || {
        prop::sample::select(vec!["open", "done", "o'neil", "", "7", "-3", "12", "Open"])
            .prop_map(String::from)
    };
    (c(), c(), c()).prop_map(|(a, b, d)| [a, b, d])
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    #[test]
    fn predicates_mean_what_the_grammar_says(e in expr(), rows in prop::collection::vec(row(), 1..6)) {
        let header: Vec<String> = HEADER.iter().map(|s| s.to_string()).collect();
        let full = Predicate::parse(&text_of(&e), &header).unwrap();
        let minimal = Predicate::parse(&minimal_text_of(&e, 0), &header).unwrap();
        for r in &rows {
            prop_assert_eq!(record_holds(&full, r), holds(&e, r), "{} on {:?}", text_of(&e), r);
            prop_assert_eq!(record_holds(&minimal, r), holds(&e, r), "{} on {:?}", minimal_text_of(&e, 0), r);
        }
    }

    #[test]
    fn a_cut_predicate_is_refused_with_a_column_not_a_panic(e in expr(), cut in 0usize..200) {
        let header: Vec<String> = HEADER.iter().map(|s| s.to_string()).collect();
        let text = text_of(&e);
        let cut = text.char_indices().map(|(i, _)| i).nth(cut % text.chars().count().max(1)).unwrap_or(0);
        if let Err(err) = Predicate::parse(&text[..cut], &header) {
            prop_assert!(err.to_string().contains("column"), "{}", err);
        }
    }
}

// ---- plans ---------------------------------------------------------------------------------

fn step() -> impl Strategy<Value = serde_json::Value> {
    use serde_json::json;
    let on = prop::sample::select(vec!["orders", "labels"]);
    let op = prop::sample::select(vec![
        ("trim", json!({"inner": true})),
        ("case", json!({"columns": ["email"], "to": "lower"})),
        (
            "number",
            json!({"columns": ["parts_cost"], "decimal_comma": true}),
        ),
        ("date", json!({"columns": ["opened"], "order": "dmy"})),
        ("dedupe", json!({"keep": "last", "key": ["order_id"]})),
        ("drop", json!({"predicate": "status = 'test'"})),
        (
            "rename",
            json!({"columns": [{"from": "e-mail", "to": "email"}]}),
        ),
        (
            "sort",
            json!({"by": [{"column": "opened", "direction": "descending"}, {"column": "order_id"}]}),
        ),
    ]);
    let why = prop::sample::select(vec![
        "stray spaces",
        "one spelling",
        "the till's \"habit\"",
        "é — ü",
    ]);
    prop_oneof![
        (
            on.clone(),
            op,
            why,
            proptest::option::of(prop::sample::select(vec!["cleaned", "q3"]))
        )
            .prop_map(|(on, (clean, settings), why, out)| {
                let mut s =
                    json!({"dataset": on, "clean": clean, "settings": settings, "reason": why});
                if let Some(o) = out {
                    s["save_as"] = json!(o);
                }
                s
            }),
        (on, any::<bool>()).prop_map(|(on, hold)| json!({"dataset": on, "inspect": [
            {"dimension": "uniqueness", "columns": ["order_id"]},
            {"dimension": "validity", "column": "parts_cost", "at_least": "0", "at_most": "5000"}
        ], "hold_point": hold})),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(128))]

    /// A plan read, written back and read again is the same plan, its steps in order.
    #[test]
    fn plans_round_trip_through_their_format(steps in prop::collection::vec(step(), 1..12)) {
        let plan = serde_json::json!({
            "sluice_plan": 2,
            "sources": [{"dataset": "orders", "file": "o.csv"}, {"dataset": "labels", "file": "l.csv", "key": ["label"]}],
            "steps": steps,
        });
        let text = serde_json::to_string_pretty(&plan).unwrap();
        let parsed = sluice::plan::parse(&text, "p.json").unwrap();
        prop_assert_eq!(parsed.steps.len(), steps.len());
        for (p, s) in parsed.steps.iter().zip(&steps) {
            prop_assert_eq!(&p.dataset, s["dataset"].as_str().unwrap());
            prop_assert_eq!(p.reason.as_deref(), s["reason"].as_str());
        }
        let again = sluice::plan::parse(&serde_json::to_string(&parsed).unwrap(), "p.json").unwrap();
        prop_assert_eq!(again, parsed);
    }

    /// A plan cut anywhere is refused with the file's name and a position, never a panic.
    #[test]
    fn a_cut_plan_is_refused_with_a_position(steps in prop::collection::vec(step(), 1..6), at in 0.0f64..1.0) {
        let plan = serde_json::json!({"sluice_plan": 2, "sources": [{"dataset": "orders", "file": "o.csv"}], "steps": steps});
        let text = serde_json::to_string_pretty(&plan).unwrap();
        let cut = ((text.len() - 1) as f64 * at) as usize;
        let cut = (0..=cut).rev().find(|&i| text.is_char_boundary(i)).unwrap_or(0);
        let err = sluice::plan::parse(&text[..cut], "p.json").unwrap_err().to_string();
        prop_assert!(err.contains("p.json"), "{}", err);
        prop_assert!(err.contains("line ") || err.contains("empty"), "{}", err);
    }
}
