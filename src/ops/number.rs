//! Reading amounts written as text into canonical decimal numbers, exactly: the digits are
//! moved, never converted through binary floating point.
//!
//! Accepted (each a fact of common practice, not of one standard):
//! - a currency sign `$ € £ ¥` or an ISO 4217 code (`USD`, `EUR`, `GBP`, ...; the list is
//!   [`CURRENCY_CODES`]) before or after the number, with or without a space;
//! - a sign before the number (`-12`, `+12`), a minus after it (`12-`, as some ledgers print),
//!   or parentheses around it (`(12.00)`, accounting style), each meaning negative;
//! - thousands separators in groups of three: `,` (or `.` with `--decimal-comma`), a space, a
//!   no-break or thin space, or `'`; a group that is not three digits is an error, so `12,5` is
//!   never read as 125;
//! - the decimal point `.`, or `,` with `--decimal-comma`;
//! - a trailing `%`, read as a fraction: `12.5%` is `0.125` (the point moves two places).
//!
//! The result is written with `-` for negatives, `.` as the decimal point, no separators or
//! currency, no leading zeros (one `0` before the point), and the fraction digits as written
//! (`12.50` stays `12.50`; a percentage gains two). Negative zero is written as zero.

/// The ISO 4217 codes recognised beside a number (the commonly traded currencies; from memory
/// of the standard's list).
pub const CURRENCY_CODES: &[&str] = &[
    "AUD", "BRL", "CAD", "CHF", "CNY", "CZK", "DKK", "EUR", "GBP", "HKD", "HUF", "INR", "JPY",
    "KRW", "MXN", "NOK", "NZD", "PLN", "SEK", "SGD", "USD", "ZAR",
];

const CURRENCY_SIGNS: &[char] = &['$', '€', '£', '¥'];

fn is_group_separator(c: char, decimal_comma: bool) -> bool {
    matches!(c, ' ' | '\u{a0}' | '\u{202f}' | '\u{2009}' | '\'')
        || (c == ',' && !decimal_comma)
        || (c == '.' && decimal_comma)
}

/// Strips one currency sign or code from either end of `s`.
fn strip_currency(s: &str) -> &str {
    let s = s.trim();
    for sign in CURRENCY_SIGNS {
        if let Some(rest) = s.strip_prefix(*sign) {
            return rest.trim();
        }
        if let Some(rest) = s.strip_suffix(*sign) {
            return rest.trim();
        }
    }
    for code in CURRENCY_CODES {
        if let Some(rest) = s.strip_prefix(code) {
            if !rest.starts_with(|c: char| c.is_ascii_alphabetic()) {
                return rest.trim();
            }
        }
        if let Some(rest) = s.strip_suffix(code) {
            if !rest.ends_with(|c: char| c.is_ascii_alphabetic()) {
                return rest.trim();
            }
        }
    }
    s
}

/// Whether `text` is already an amount as [`parse_amount`] writes it with a decimal point
/// (`-?(0|[1-9][0-9]*)(\.[0-9]+)?`, not a negative zero), so reading it would give it back
/// unchanged: checked without allocating, for the many cells a `number` step leaves as they are.
pub fn already_canonical(text: &str, decimal_comma: bool) -> bool {
    let b = text.as_bytes();
    if decimal_comma || b.is_empty() {
        return false;
    }
    let negative = b[0] == b'-';
    let digits = if negative { &b[1..] } else { b };
    let (int, frac) = match memchr::memchr(b'.', digits) {
        Some(i) => (&digits[..i], Some(&digits[i + 1..])),
        None => (digits, None),
    };
    let int_ok = match int {
        [b'0'] => true,
        [first, rest @ ..] => (b'1'..=b'9').contains(first) && rest.iter().all(u8::is_ascii_digit),
        [] => false,
    };
    let frac_ok = frac.is_none_or(|f| !f.is_empty() && f.iter().all(u8::is_ascii_digit));
    let zero = int == b"0" && frac.is_none_or(|f| f.iter().all(|&c| c == b'0'));
    int_ok && frac_ok && !(negative && zero)
}

/// Reads one amount; `None` when the text is not an amount in the accepted forms.
pub fn parse_amount(text: &str, decimal_comma: bool) -> Option<String> {
    let mut s = text.trim();
    let mut negative = false;
    if let Some(inner) = s.strip_prefix('(').and_then(|r| r.strip_suffix(')')) {
        negative = true;
        s = inner.trim();
    }
    // Signs may stand outside or inside the currency: "-€12", "€-12", "12 EUR-".
    let mut take_sign = |s: &mut &str| {
        if let Some(r) = s.strip_prefix('-') {
            if negative {
                return false;
            }
            negative = true;
            *s = r.trim_start();
        } else if let Some(r) = s.strip_prefix('+') {
            *s = r.trim_start();
        } else if let Some(r) = s.strip_suffix('-') {
            if negative {
                return false;
            }
            negative = true;
            *s = r.trim_end();
        }
        true
    };
    if !take_sign(&mut s) {
        return None;
    }
    s = strip_currency(s);
    if !take_sign(&mut s) {
        return None;
    }
    let percent = match s.strip_suffix('%') {
        Some(r) => {
            s = r.trim_end();
            true
        }
        None => false,
    };
    let point = if decimal_comma { ',' } else { '.' };
    let (int_text, frac_text) = match s.split_once(point) {
        Some((i, f)) => (i, Some(f)),
        None => (s, None),
    };
    // The integer part: digits, optionally in groups of three after the first.
    let mut int_digits = String::new();
    let mut groups: Vec<usize> = vec![0];
    let mut sep: Option<char> = None;
    for c in int_text.chars() {
        if c.is_ascii_digit() {
            int_digits.push(c);
            *groups.last_mut()? += 1;
        } else if is_group_separator(c, decimal_comma) {
            // One kind of separator per number.
            if sep.is_some_and(|x| x != c) {
                return None;
            }
            sep = Some(c);
            groups.push(0);
        } else {
            return None;
        }
    }
    if groups.len() > 1 && (groups[0] == 0 || groups[0] > 3 || groups[1..].iter().any(|&g| g != 3))
    {
        return None;
    }
    let frac_digits = match frac_text {
        Some(f) => {
            if !f.chars().all(|c| c.is_ascii_digit()) {
                return None;
            }
            f.to_string()
        }
        None => String::new(),
    };
    if int_digits.is_empty() && frac_digits.is_empty() {
        return None;
    }
    let (mut int_digits, mut frac_digits) = (int_digits, frac_digits);
    if percent {
        // Divide by 100: move the point two places left.
        let mut all = format!("{int_digits}{frac_digits}");
        let scale = frac_digits.len() + 2;
        while all.len() < scale {
            all.insert(0, '0');
        }
        let cut = all.len() - scale;
        frac_digits = all[cut..].to_string();
        int_digits = all[..cut].to_string();
    }
    let int_digits = int_digits.trim_start_matches('0');
    let int_digits = if int_digits.is_empty() {
        "0"
    } else {
        int_digits
    };
    let is_zero = int_digits == "0" && frac_digits.chars().all(|c| c == '0');
    let mut out = String::new();
    if negative && !is_zero {
        out.push('-');
    }
    out.push_str(int_digits);
    if frac_text.is_some() || percent {
        out.push('.');
        out.push_str(&frac_digits);
    }
    Some(out)
}

/// Advice for amounts that could not be read: when the other decimal mark reads some of them,
/// which option to change, and how many it would read. `None` when it reads none.
pub fn decimal_mark_advice<'a>(
    failing: impl IntoIterator<Item = &'a str>,
    decimal_comma: bool,
    retry: &str,
) -> Option<String> {
    let (mut n, mut read) = (0u64, 0u64);
    for v in failing {
        n += 1;
        if parse_amount(v, !decimal_comma).is_some() {
            read += 1;
        }
    }
    if read == 0 {
        return None;
    }
    let (mark, change, plan) = if decimal_comma {
        (
            "a decimal point",
            "without --decimal-comma",
            "\"decimal_comma\": false",
        )
    } else {
        (
            "a decimal comma",
            "with --decimal-comma",
            "\"decimal_comma\": true",
        )
    };
    let how_many = if read == n {
        format!(
            "{} read as amounts written with {mark}",
            if n == 1 { "it" } else { "all of them" }
        )
    } else {
        format!("{read} of the {n} read as amounts written with {mark}")
    };
    Some(format!(
        "{how_many}: retry {change} (`{retry}`; in a plan, {plan})"
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        /// Law: a text the quick check calls canonical reads back as itself.
        #[test]
        fn canonical_texts_read_back_unchanged(text in "-?[0-9]{0,4}(\\.[0-9]{0,3})?|[-+$€ ,.0-9a-z]{0,8}") {
            if already_canonical(&text, false) {
                prop_assert_eq!(parse_amount(&text, false), Some(text.clone()));
            }
            prop_assert!(!already_canonical(&text, true));
        }
    }

    #[test]
    fn the_quick_check_knows_canonical_amounts() {
        for t in ["0", "12", "-12", "12.50", "0.5", "-0.01", "1204.50"] {
            assert!(already_canonical(t, false), "{t}");
        }
        for t in [
            "", "-", "012", "-0", "-0.00", "12.", ".5", "1,204.50", "€12", " 12", "+12", "1e3",
        ] {
            assert!(!already_canonical(t, false), "{t}");
        }
    }

    // Each row: input, decimal comma?, expected. All "common practice": no single standard
    // defines how amounts are written in exports; the percent rule is ours (documented).
    const CASES: &[(&str, bool, Option<&str>)] = &[
        ("12.50", false, Some("12.50")),
        ("1,204.50", false, Some("1204.50")),
        ("$1,204.50", false, Some("1204.50")),
        ("€12.50", false, Some("12.50")),
        ("12.50 €", false, Some("12.50")),
        ("EUR 12.50", false, Some("12.50")),
        ("12.50USD", false, Some("12.50")),
        ("£0.99", false, Some("0.99")),
        ("¥1,000", false, Some("1000")),
        ("(5.00)", false, Some("-5.00")),
        ("5.00-", false, Some("-5.00")),
        ("-€12", false, Some("-12")),
        ("€-12", false, Some("-12")),
        ("+7", false, Some("7")),
        ("007", false, Some("7")),
        (".5", false, Some("0.5")),
        ("12.5%", false, Some("0.125")),
        ("5%", false, Some("0.05")),
        ("0.5%", false, Some("0.005")),
        ("-0.00", false, Some("0.00")),
        ("1 204.50", false, Some("1204.50")),
        ("1'204.50", false, Some("1204.50")),
        ("1.204,50", true, Some("1204.50")),
        ("12,50 €", true, Some("12.50")),
        ("€ 92,19", true, Some("92.19")),
        ("1 204,5", true, Some("1204.5")),
        // Refused: never guessed.
        ("12,5", false, None),
        ("1,20,4.50", false, None),
        ("1,204.50", true, None),
        ("12.5.0", false, None),
        ("abc", false, None),
        ("", false, None),
        ("-", false, None),
        ("--5", false, None),
        ("(-5)", false, None),
        ("1,204 500", false, None),
        ("XYZ 12", false, None),
        ("12 EURO", false, None),
    ];

    #[test]
    fn amount_table() {
        for &(text, dc, expected) in CASES {
            assert_eq!(
                parse_amount(text, dc).as_deref(),
                expected,
                "{text:?} (decimal comma {dc})"
            );
        }
    }

    // The table in README.md.
    #[test]
    fn readme_examples() {
        for (text, plain, comma) in [
            ("$1,204.50", Some("1204.50"), None),
            ("1.204,50 €", None, Some("1204.50")),
            ("(5.00)", Some("-5.00"), None),
            ("5,00-", None, Some("-5.00")),
            ("12.5%", Some("0.125"), None),
            ("12,5", None, Some("12.5")),
        ] {
            assert_eq!(parse_amount(text, false).as_deref(), plain, "{text}");
            assert_eq!(
                parse_amount(text, true).as_deref(),
                comma,
                "{text} with decimal comma"
            );
        }
    }

    #[test]
    fn beyond_floating_point() {
        // 2^53 + 1 is not representable in a 64-bit float; the digits survive here.
        assert_eq!(
            parse_amount("9,007,199,254,740,993", false).as_deref(),
            Some("9007199254740993")
        );
        assert_eq!(
            parse_amount("0.1000000000000000055511151231257827", false).as_deref(),
            Some("0.1000000000000000055511151231257827")
        );
    }
}
