//! The predicate language of `keep` and `drop` on arbitrary text: lexing and parsing never
//! panic, whatever the nesting, quoting or regular expression, and a refusal is a message; a
//! predicate that parses evaluates on rows of every shape, and `not (P)` parses and holds
//! exactly where P does not.
#![no_main]

use libfuzzer_sys::fuzz_target;
use sluice::ops::predicate::Predicate;
use sluice::table::RawRecord;

const HEADER: [&str; 5] = ["order_id", "shop", "status", "parts_cost", "odd name; DROP"];

const ROWS: [[&str; 5]; 6] = [
    ["WO-1", "Quillby Cycle Mend", "open", "12.50", ""],
    ["WO-2", "Oxwater Wheelworks", "cancelled", "-3", "NA"],
    ["", "", "", "", ""],
    ["WO-4", "Fennmarsh Bike Clinic", "Open ", "1e3", "x"],
    ["10", "9", "0010", "007.000", "é\u{2003}"],
    ["WO-6", "'quoted'", "o'neil", "12,50", "`"],
];

/// Whether a refusal is the nesting limit's.
fn too_deep(e: &sluice::Error) -> bool {
    e.to_string().contains("nest more than")
}

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let header: Vec<String> = HEADER.iter().map(|s| s.to_string()).collect();
    // Deep nesting: the first character, when it is a digit, asks for the rest wrapped in
    // (digit * 150) levels alternating "(" and "not": past the limit it must be refused by
    // the nesting check (never a stack overflow), within it parse exactly when the rest does.
    if let Some(d) = text.chars().next().and_then(|c| c.to_digit(10)) {
        let inner = &text[1..];
        let levels = d as usize * 150;
        let mut wrapped = String::new();
        for i in 0..levels {
            wrapped.push_str(if i % 2 == 0 { "(" } else { "not " });
        }
        wrapped.push_str(inner);
        wrapped.push_str(&")".repeat(levels.div_ceil(2)));
        let alone = Predicate::parse(inner, &header);
        match Predicate::parse(&wrapped, &header) {
            Ok(_) => assert!(alone.is_ok(), "{wrapped:?} parses, {inner:?} alone does not"),
            Err(e) if levels > sluice::ops::predicate::MAX_NESTING => assert!(
                too_deep(&e) || alone.is_err(),
                "{levels} levels refused, but not for their depth: {e}"
            ),
            Err(e) => assert!(
                alone.is_err() || too_deep(&e),
                "{inner:?} parses, wrapped in {levels} levels it does not: {e}"
            ),
        }
    }
    let p = match Predicate::parse(text, &header) {
        Ok(p) => p,
        Err(e) => {
            let msg = e.to_string();
            assert!(!msg.is_empty());
            return;
        }
    };
    let negated = match Predicate::parse(&format!("not ({text})"), &header) {
        Ok(n) => n,
        // Two more levels may pass the nesting limit.
        Err(e) if too_deep(&e) => return,
        Err(e) => panic!("{text:?} parses but its negation does not: {e}"),
    };
    let is_blank = |v: &[u8]| v.is_empty() || v == b"NA";
    for row in ROWS {
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
        assert_ne!(
            p.holds(&r, &is_blank),
            negated.holds(&r, &is_blank),
            "{text:?} and its negation agree on {row:?}"
        );
    }
});
