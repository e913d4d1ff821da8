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

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let header: Vec<String> = HEADER.iter().map(|s| s.to_string()).collect();
    let p = match Predicate::parse(text, &header) {
        Ok(p) => p,
        Err(e) => {
            let msg = e.to_string();
            assert!(!msg.is_empty());
            return;
        }
    };
    let negated = Predicate::parse(&format!("not ({text})"), &header)
        .unwrap_or_else(|e| panic!("{text:?} parses but its negation does not: {e}"));
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
