//! The per-column quality profile computed in the same pass that takes a file in: blanks,
//! distinct values, inferred type, minimum and maximum, shortest and longest value.
//!
//! Definitions (also in README.md):
//! - blank: an empty value, or one equal to a declared null token;
//! - type: `integer` when every non-blank value is an optional sign and digits; `decimal` when
//!   every non-blank value is an integer or digits with one `.`; `date` when every non-blank value
//!   is an ISO 8601 calendar date `YYYY-MM-DD` that exists; else `text`; `empty` when all values
//!   are blank;
//! - min/max: numeric order (exact, on the digits, never through floating point) for integer and
//!   decimal columns, byte order of the UTF-8 text otherwise (which is chronological for ISO
//!   dates);
//! - lengths count Unicode scalar values;
//! - distinct: exact up to [`EXACT_DISTINCT_LIMIT`] distinct values (counted by 64-bit hash, so
//!   two different values collide with probability about n²/2⁶⁵), beyond that a HyperLogLog
//!   estimate with 2¹⁴ registers (standard error about 0.8%), marked as an estimate.
//!
//! Memory is bounded per column: at most the exact set, or 16 KiB of registers, plus the current
//! minimum and maximum values.

use std::cmp::Ordering;
use std::collections::HashSet;

use xxhash_rust::xxh3::xxh3_64;

use crate::clock::is_iso_date;
use crate::model::ColumnProfile;

pub const EXACT_DISTINCT_LIMIT: usize = 1 << 12;
const HLL_BITS: u32 = 14;
const HLL_REGISTERS: usize = 1 << HLL_BITS;

/// Counts distinct values: exactly while few, then by HyperLogLog.
enum Distinct {
    /// Values are already hashed with XXH3: the set uses those bits as they are.
    Exact(HashSet<u64, crate::hash::AsIsBuild>),
    Estimate(Box<[u8; HLL_REGISTERS]>),
}

impl Distinct {
    fn new() -> Self {
        Distinct::Exact(HashSet::default())
    }

    fn insert(&mut self, h: u64) {
        match self {
            Distinct::Exact(set) => {
                set.insert(h);
                if set.len() > EXACT_DISTINCT_LIMIT {
                    let mut regs = Box::new([0u8; HLL_REGISTERS]);
                    for &v in set.iter() {
                        hll_add(&mut regs, v);
                    }
                    *self = Distinct::Estimate(regs);
                }
            }
            Distinct::Estimate(regs) => hll_add(regs, h),
        }
    }

    fn count(&self) -> (u64, bool) {
        match self {
            Distinct::Exact(set) => (set.len() as u64, true),
            Distinct::Estimate(regs) => (hll_estimate(regs), false),
        }
    }
}

fn hll_add(regs: &mut [u8; HLL_REGISTERS], h: u64) {
    let idx = (h >> (64 - HLL_BITS)) as usize;
    let rest = h << HLL_BITS;
    let rank = (rest.leading_zeros().min(64 - HLL_BITS) + 1) as u8;
    if rank > regs[idx] {
        regs[idx] = rank;
    }
}

/// The HyperLogLog estimate (Flajolet, Fusy, Gandouet, Meunier 2007) with the usual
/// small-range correction by linear counting; 64-bit hashes make the large-range correction
/// unnecessary.
fn hll_estimate(regs: &[u8; HLL_REGISTERS]) -> u64 {
    let m = HLL_REGISTERS as f64;
    let alpha = 0.7213 / (1.0 + 1.079 / m);
    let mut sum = 0.0f64;
    let mut zeros = 0usize;
    for &r in regs.iter() {
        sum += 2f64.powi(-i32::from(r));
        if r == 0 {
            zeros += 1;
        }
    }
    let e = alpha * m * m / sum;
    let e = if e <= 2.5 * m && zeros > 0 {
        m * (m / zeros as f64).ln()
    } else {
        e
    };
    e.round() as u64
}

/// What kind of number a text is, if any.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NumberShape {
    Integer,
    Decimal,
}

/// `[+-]digits` is an integer; `[+-]digits.digits`, `[+-]digits.` or `[+-].digits` a decimal.
pub fn number_shape(s: &[u8]) -> Option<NumberShape> {
    let body = match s.first() {
        Some(b'+') | Some(b'-') => &s[1..],
        _ => s,
    };
    if body.is_empty() {
        return None;
    }
    let mut dot = false;
    let mut digits = 0usize;
    for &c in body {
        match c {
            b'0'..=b'9' => digits += 1,
            b'.' if !dot => dot = true,
            _ => return None,
        }
    }
    if digits == 0 {
        return None;
    }
    Some(if dot {
        NumberShape::Decimal
    } else {
        NumberShape::Integer
    })
}

/// Compares two texts that both have a [`number_shape`], exactly, by their digits.
pub fn cmp_numbers(a: &[u8], b: &[u8]) -> Ordering {
    let (na, ia, fa) = split_number(a);
    let (nb, ib, fb) = split_number(b);
    let za = ia.is_empty() && fa.is_empty();
    let zb = ib.is_empty() && fb.is_empty();
    // Negative zero equals zero.
    let na = na && !za;
    let nb = nb && !zb;
    match (na, nb) {
        (false, true) => return Ordering::Greater,
        (true, false) => return Ordering::Less,
        _ => {}
    }
    let mag = ia
        .len()
        .cmp(&ib.len())
        .then_with(|| ia.cmp(ib))
        .then_with(|| fa.cmp(fb));
    if na {
        mag.reverse()
    } else {
        mag
    }
}

/// (negative, integer digits without leading zeros, fraction digits without trailing zeros).
fn split_number(s: &[u8]) -> (bool, &[u8], &[u8]) {
    let (neg, body) = match s.first() {
        Some(b'-') => (true, &s[1..]),
        Some(b'+') => (false, &s[1..]),
        _ => (false, s),
    };
    let (int, frac) = match body.iter().position(|&c| c == b'.') {
        Some(p) => (&body[..p], &body[p + 1..]),
        None => (body, &body[body.len()..]),
    };
    let lead = int.iter().take_while(|&&c| c == b'0').count();
    let trail = frac.iter().rev().take_while(|&&c| c == b'0').count();
    (neg, &int[lead..], &frac[..frac.len() - trail])
}

/// How much of a column's smallest and largest value a profile keeps: the first 256 bytes (cut
/// back to a whole character) and then `…`. Byte order is preserved by cutting (a cut value
/// orders as the whole one does against any other value cut the same way), so the kept start
/// is exact; a number longer than this is profiled as text. One huge cell therefore costs the
/// profile, and the database, at most this much per column.
pub const KEPT_VALUE_BYTES: usize = 256;

/// The part of a value the profile compares and keeps: one byte more than it shows, so that
/// `finish` knows whether the value was cut.
fn kept(v: &[u8]) -> &[u8] {
    &v[..v.len().min(KEPT_VALUE_BYTES + 1)]
}

/// A kept value as the profile shows it: whole, or its first bytes up to a whole character
/// and `…`.
fn shown(v: &[u8]) -> String {
    if v.len() <= KEPT_VALUE_BYTES {
        return String::from_utf8_lossy(v).into_owned();
    }
    let mut end = KEPT_VALUE_BYTES;
    while end > 0 && (v[end] & 0xC0) == 0x80 {
        end -= 1;
    }
    format!("{}\u{2026}", String::from_utf8_lossy(&v[..end]))
}

struct Column {
    n_blank: u64,
    n_values: u64,
    distinct: Distinct,
    all_integer: bool,
    all_number: bool,
    all_date: bool,
    num_min: Vec<u8>,
    num_max: Vec<u8>,
    text_min: Vec<u8>,
    text_max: Vec<u8>,
    min_len: u64,
    max_len: u64,
    /// Every number seen so far was an integer of at most 18 characters.
    fast_ints: bool,
    int_min: i64,
    int_max: i64,
    /// Left out of this profile: its values are not looked at (see [`Profiler::leave_out`]).
    left_out: bool,
}

/// Parses `[+-]digits` of at most 18 characters (so it fits in an i64).
fn parse_small_int(v: &[u8]) -> i64 {
    let (neg, digits) = match v.first() {
        Some(b'-') => (true, &v[1..]),
        Some(b'+') => (false, &v[1..]),
        _ => (false, v),
    };
    let mut n = 0i64;
    for &c in digits {
        n = n * 10 + i64::from(c - b'0');
    }
    if neg {
        -n
    } else {
        n
    }
}

impl Column {
    fn new() -> Self {
        Column {
            n_blank: 0,
            n_values: 0,
            distinct: Distinct::new(),
            all_integer: true,
            all_number: true,
            all_date: true,
            num_min: Vec::new(),
            num_max: Vec::new(),
            text_min: Vec::new(),
            text_max: Vec::new(),
            min_len: u64::MAX,
            max_len: 0,
            fast_ints: true,
            int_min: 0,
            int_max: 0,
            left_out: false,
        }
    }

    fn observe(&mut self, v: &[u8]) {
        // `v` is never empty here: blanks are counted by the caller.
        let first = self.n_values == 0;
        self.n_values += 1;
        self.distinct.insert(xxh3_64(v));
        let len = v.iter().filter(|&&b| (b & 0xC0) != 0x80).count() as u64;
        self.min_len = self.min_len.min(len);
        self.max_len = self.max_len.max(len);
        if self.all_number {
            self.observe_number(v, first);
        }
        let v = kept(v);
        if first {
            set(&mut self.text_min, v);
            set(&mut self.text_max, v);
        } else {
            // The first byte decides most comparisons without a full compare.
            let b = v[0];
            let lo = self.text_min[0];
            if b < lo || (b == lo && v < self.text_min.as_slice()) {
                set(&mut self.text_min, v);
            }
            let hi = self.text_max[0];
            if b > hi || (b == hi && v > self.text_max.as_slice()) {
                set(&mut self.text_max, v);
            }
        }
        if self.all_date && !is_iso_date(v) {
            self.all_date = false;
        }
    }

    fn observe_number(&mut self, v: &[u8], first: bool) {
        let Some(shape) = number_shape(v).filter(|_| v.len() <= KEPT_VALUE_BYTES) else {
            self.all_number = false;
            self.all_integer = false;
            return;
        };
        if shape == NumberShape::Decimal {
            self.all_integer = false;
        }
        // Fast path while every number so far is an integer that fits in an i64 (18 digits
        // always do): compare machine integers; the texts of the extremes are kept as well.
        if self.fast_ints && shape == NumberShape::Integer && v.len() <= 18 {
            let n = parse_small_int(v);
            if first || n < self.int_min {
                self.int_min = n;
                set(&mut self.num_min, v);
            }
            if first || n > self.int_max {
                self.int_max = n;
                set(&mut self.num_max, v);
            }
            return;
        }
        self.fast_ints = false;
        if first || cmp_numbers(v, &self.num_min) == Ordering::Less {
            set(&mut self.num_min, v);
        }
        if first || cmp_numbers(v, &self.num_max) == Ordering::Greater {
            set(&mut self.num_max, v);
        }
    }

    fn finish(&self, name: &str) -> ColumnProfile {
        let (n_distinct, distinct_exact) = self.distinct.count();
        let text = |v: &[u8]| Some(shown(v));
        let (ty, min, max) = if self.n_values == 0 {
            ("empty", None, None)
        } else if self.all_integer {
            ("integer", text(&self.num_min), text(&self.num_max))
        } else if self.all_number {
            ("decimal", text(&self.num_min), text(&self.num_max))
        } else if self.all_date {
            ("date", text(&self.text_min), text(&self.text_max))
        } else {
            ("text", text(&self.text_min), text(&self.text_max))
        };
        ColumnProfile {
            name: name.to_string(),
            inferred_type: ty.to_string(),
            n_blank: self.n_blank,
            n_distinct,
            distinct_exact,
            min,
            max,
            min_len: (self.n_values > 0).then_some(self.min_len),
            max_len: (self.n_values > 0).then_some(self.max_len),
        }
    }
}

fn set(dst: &mut Vec<u8>, v: &[u8]) {
    dst.clear();
    dst.extend_from_slice(v);
}

/// Accumulates the profile of every column over the data rows.
pub struct Profiler {
    columns: Vec<Column>,
    null_tokens: Vec<Vec<u8>>,
}

impl Profiler {
    pub fn new(n_cols: usize, null_tokens: &[String]) -> Self {
        Profiler {
            columns: (0..n_cols).map(|_| Column::new()).collect(),
            null_tokens: null_tokens.iter().map(|t| t.as_bytes().to_vec()).collect(),
        }
    }

    pub fn is_blank(&self, v: &[u8]) -> bool {
        v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v)
    }

    /// Leaves the columns marked true out: their values are not looked at, and their profiles
    /// from [`Self::finish`] are those of an empty column, for the caller to replace with one
    /// it knows to be the same (a column copied unchanged from another version's, row for row).
    pub fn leave_out(&mut self, columns: &[bool]) {
        for (col, &out) in self.columns.iter_mut().zip(columns) {
            col.left_out = out;
        }
    }

    /// Observes one data row; `fields` yields exactly one value per column.
    pub fn observe<'a>(&mut self, fields: impl Iterator<Item = &'a [u8]>) {
        for (i, v) in fields.enumerate() {
            let col = &mut self.columns[i];
            if col.left_out {
                continue;
            }
            let blank = v.is_empty() || self.null_tokens.iter().any(|t| t.as_slice() == v);
            if blank {
                col.n_blank += 1;
            } else {
                col.observe(v);
            }
        }
    }

    /// [`Self::observe`] for a row held in `bytes` as its fields back to back from `start`, each
    /// ending at its entry of `ends`.
    pub fn observe_packed(&mut self, bytes: &[u8], start: usize, ends: &[usize]) {
        let mut from = start;
        self.observe(ends.iter().map(|&end| {
            let field = &bytes[from..end];
            from = end;
            field
        }));
    }

    pub fn finish(&self, names: &[String]) -> Vec<ColumnProfile> {
        self.columns
            .iter()
            .zip(names)
            .map(|(c, n)| c.finish(n))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numeric_order_is_exact() {
        assert_eq!(cmp_numbers(b"10", b"9"), Ordering::Greater);
        assert_eq!(cmp_numbers(b"-10", b"-9"), Ordering::Less);
        assert_eq!(cmp_numbers(b"1.50", b"1.5"), Ordering::Equal);
        assert_eq!(cmp_numbers(b"007", b"7"), Ordering::Equal);
        assert_eq!(cmp_numbers(b"-0", b"0"), Ordering::Equal);
        // Beyond what a 64-bit float can tell apart.
        assert_eq!(
            cmp_numbers(b"9007199254740993", b"9007199254740992"),
            Ordering::Greater
        );
        assert_eq!(cmp_numbers(b"0.1", b".09"), Ordering::Greater);
    }

    #[test]
    fn long_values_are_kept_as_their_start_and_still_ordered() {
        let long_b = format!("b{}", "é".repeat(500_000));
        let long_a = format!("a{}", "x".repeat(300));
        let digits = "9".repeat(KEPT_VALUE_BYTES + 1);
        let mut p = Profiler::new(2, &[]);
        for (t, n) in [
            (long_b.as_str(), "12"),
            ("c", digits.as_str()),
            (long_a.as_str(), "3"),
        ] {
            p.observe([t.as_bytes(), n.as_bytes()].into_iter());
        }
        let prof = p.finish(&["t".to_string(), "n".to_string()]);
        let min = prof[0].min.clone().unwrap();
        assert_eq!(min, format!("a{}\u{2026}", "x".repeat(255)));
        let max = prof[0].max.clone().unwrap();
        assert_eq!(max, "c");
        assert_eq!(prof[0].max_len, Some(500_001));
        // A number longer than the kept part makes the column text, ordered as text.
        assert_eq!(prof[1].inferred_type, "text");
        assert_eq!(prof[1].max, Some(format!("{}\u{2026}", "9".repeat(256))));
        assert_eq!(prof[1].min.as_deref(), Some("12"));
        // Cut back to a whole character: 'b' and 127 two-byte characters.
        let mut p = Profiler::new(1, &[]);
        p.observe([long_b.as_bytes()].into_iter());
        let prof = p.finish(&["t".to_string()]);
        assert_eq!(prof[0].max, Some(format!("b{}\u{2026}", "é".repeat(127))));
    }

    #[test]
    fn integer_fast_path_hands_over_to_exact_comparison() {
        let names = vec!["n".to_string()];
        let mut p = Profiler::new(1, &[]);
        for v in ["5", "-12", "007", "99999999999999999999", "3.5", "-0"] {
            p.observe(std::iter::once(v.as_bytes()));
        }
        let prof = p.finish(&names);
        assert_eq!(prof[0].inferred_type, "decimal");
        assert_eq!(prof[0].min.as_deref(), Some("-12"));
        assert_eq!(prof[0].max.as_deref(), Some("99999999999999999999"));
    }

    #[test]
    fn types_and_ranges() {
        let names: Vec<String> = ["n", "d", "dt", "t", "e"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let mut p = Profiler::new(5, &["NA".to_string()]);
        for row in [
            ["10", "1.5", "2024-02-29", "b", ""],
            ["-3", "2", "2023-12-01", "a", "NA"],
            ["NA", "-0.25", "", "ccc", ""],
        ] {
            p.observe(row.iter().map(|s| s.as_bytes()));
        }
        let prof = p.finish(&names);
        assert_eq!(prof[0].inferred_type, "integer");
        assert_eq!(
            (prof[0].min.as_deref(), prof[0].max.as_deref()),
            (Some("-3"), Some("10"))
        );
        assert_eq!(prof[0].n_blank, 1);
        assert_eq!(prof[1].inferred_type, "decimal");
        assert_eq!(
            (prof[1].min.as_deref(), prof[1].max.as_deref()),
            (Some("-0.25"), Some("2"))
        );
        assert_eq!(prof[2].inferred_type, "date");
        assert_eq!(prof[2].min.as_deref(), Some("2023-12-01"));
        assert_eq!(prof[3].inferred_type, "text");
        assert_eq!((prof[3].min_len, prof[3].max_len), (Some(1), Some(3)));
        assert_eq!(prof[4].inferred_type, "empty");
        assert_eq!(prof[4].n_blank, 3);
    }

    proptest::proptest! {
        // A column left out of a profile is not looked at; the others come out exactly as in
        // the profile of every column. (A fused run takes an unchanged column's profile from
        // the step before and profiles only the rest.)
        #[test]
        fn leaving_columns_out_does_not_change_the_others(
            rows in proptest::collection::vec(
                proptest::collection::vec(
                    proptest::string::string_regex("|NA|-?[0-9]{1,3}(\\.[0-9]{0,2})?|2024-0[1-2]-[0-3][0-9]|[a-c é]{1,4}").unwrap(),
                    3),
                0..40),
            out in proptest::collection::vec(proptest::bool::ANY, 3),
        ) {
            let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
            let nulls = ["NA".to_string()];
            let mut whole = Profiler::new(3, &nulls);
            let mut part = Profiler::new(3, &nulls);
            part.leave_out(&out);
            let mut packed = Profiler::new(3, &nulls);
            for row in &rows {
                whole.observe(row.iter().map(|v| v.as_bytes()));
                part.observe(row.iter().map(|v| v.as_bytes()));
                let mut bytes = b"lead".to_vec();
                let mut ends = Vec::new();
                for v in row {
                    bytes.extend_from_slice(v.as_bytes());
                    ends.push(bytes.len());
                }
                packed.observe_packed(&bytes, 4, &ends);
            }
            let (whole, part) = (whole.finish(&names), part.finish(&names));
            proptest::prop_assert_eq!(&packed.finish(&names), &whole);
            for c in 0..3 {
                if out[c] {
                    proptest::prop_assert_eq!(part[c].n_blank, 0);
                    proptest::prop_assert_eq!(part[c].inferred_type.as_str(), "empty");
                } else {
                    proptest::prop_assert_eq!(&part[c], &whole[c]);
                }
            }
        }
    }

    #[test]
    fn distinct_switches_to_an_estimate_within_its_error() {
        let mut d = Distinct::new();
        let n = 200_000u64;
        for i in 0..n {
            d.insert(xxh3_64(&i.to_le_bytes()));
        }
        let (est, exact) = d.count();
        assert!(!exact);
        let err = (est as f64 - n as f64).abs() / n as f64;
        // 2^14 registers: standard error 1.04/sqrt(16384) ~ 0.8%; allow four of them.
        assert!(err < 0.033, "estimate {est} for {n}");
    }
}
