//! Per-cell text operations. White space is Unicode White_Space (`char::is_whitespace`), so a
//! no-break space copied from a spreadsheet counts; case mapping is Unicode's default,
//! locale-independent mapping.

use super::CaseTo;

/// Removes leading and trailing white space; with `inner`, also turns every run of white space
/// inside the value into one ASCII space.
pub fn trim(v: &str, inner: bool) -> String {
    let mut out = String::new();
    trim_into(v, inner, &mut out);
    out
}

/// [`trim`] into `out` (cleared first), so that a caller can reuse one buffer for every cell.
pub fn trim_into(v: &str, inner: bool, out: &mut String) {
    out.clear();
    let t = v.trim_matches(char::is_whitespace);
    if !inner {
        out.push_str(t);
        return;
    }
    let mut in_space = false;
    for c in t.chars() {
        if c.is_whitespace() {
            if !in_space {
                out.push(' ');
            }
            in_space = true;
        } else {
            out.push(c);
            in_space = false;
        }
    }
}

/// ASCII bytes that are White_Space (`char::is_whitespace`); every other White_Space character
/// is outside ASCII.
fn ascii_space(b: u8) -> bool {
    matches!(b, b' ' | b'\t' | b'\n' | b'\x0B' | b'\x0C' | b'\r')
}

/// True when `trim` would certainly leave `v` as it is, decided on the bytes without decoding
/// (false means "maybe changed": ask [`trim`]). Most cells of a real export take this path.
pub fn trim_keeps(v: &[u8], inner: bool) -> bool {
    let (Some(&first), Some(&last)) = (v.first(), v.last()) else {
        return true;
    };
    // A byte of 0x80 or more may start or end a non-ASCII space: decide those the slow way.
    if first >= 0x80 || last >= 0x80 || ascii_space(first) || ascii_space(last) {
        return false;
    }
    if !inner {
        return true;
    }
    let mut prev_space = false;
    for &b in v {
        if b >= 0x80 || (ascii_space(b) && (b != b' ' || prev_space)) {
            return false;
        }
        prev_space = b == b' ';
    }
    true
}

/// True when `case` would certainly leave `v` as it is, decided on the bytes (false means
/// "maybe changed": ask [`case`]).
pub fn case_keeps(v: &[u8], to: CaseTo) -> bool {
    match to {
        CaseTo::Lower => v.iter().all(|&b| b < 0x80 && !b.is_ascii_uppercase()),
        CaseTo::Upper => v.iter().all(|&b| b < 0x80 && !b.is_ascii_lowercase()),
        CaseTo::Title => false,
    }
}

/// Changes case. `Title`: the first letter of every word upper case, the rest lower case; a
/// word starts at a letter or digit that follows anything else (space, hyphen, apostrophe,
/// the start of the value).
pub fn case(v: &str, to: CaseTo) -> String {
    let mut out = String::new();
    case_into(v, to, &mut out);
    out
}

/// [`case`] into `out` (cleared first). ASCII text, most cells, is mapped byte by byte: for
/// ASCII letters Unicode's default case mapping is the ASCII one.
pub fn case_into(v: &str, to: CaseTo, out: &mut String) {
    out.clear();
    match to {
        CaseTo::Lower if v.is_ascii() => {
            out.push_str(v);
            out.make_ascii_lowercase();
        }
        CaseTo::Upper if v.is_ascii() => {
            out.push_str(v);
            out.make_ascii_uppercase();
        }
        CaseTo::Lower => out.push_str(&v.to_lowercase()),
        CaseTo::Upper => out.push_str(&v.to_uppercase()),
        CaseTo::Title => {
            let mut at_start = true;
            for c in v.chars() {
                if c.is_alphanumeric() {
                    if at_start {
                        out.extend(c.to_uppercase());
                    } else {
                        out.extend(c.to_lowercase());
                    }
                    at_start = false;
                } else {
                    out.push(c);
                    at_start = true;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn trim_outer_and_inner() {
        assert_eq!(trim("  Flat repair ", false), "Flat repair");
        assert_eq!(trim("\u{a0}Ada  Quenwick\t", false), "Ada  Quenwick");
        assert_eq!(trim(" Ada \t Quenwick ", true), "Ada Quenwick");
        assert_eq!(trim("", true), "");
    }

    // The examples in README.md, so the documentation cannot drift from the code.
    #[test]
    fn readme_examples() {
        assert_eq!(trim(" Ada  Quenwick ", false), "Ada  Quenwick");
        assert_eq!(trim(" Ada  Quenwick ", true), "Ada Quenwick");
        assert_eq!(trim("Brake Tune ", true), "Brake Tune");
        for (v, l, u, t) in [
            (
                "Maya.T@Example.org",
                "maya.t@example.org",
                "MAYA.T@EXAMPLE.ORG",
                "Maya.T@Example.Org",
            ),
            (
                "BRAKE tune-up",
                "brake tune-up",
                "BRAKE TUNE-UP",
                "Brake Tune-Up",
            ),
        ] {
            assert_eq!(case(v, CaseTo::Lower), l);
            assert_eq!(case(v, CaseTo::Upper), u);
            assert_eq!(case(v, CaseTo::Title), t);
        }
    }

    proptest::proptest! {
        // The byte-level shortcuts never claim "unchanged" for a value the full operations
        // would change.
        #[test]
        fn shortcuts_agree_with_the_operations(
            v in proptest::string::string_regex("[ a\t\u{a0}\u{2003}Bé\x0bZ-]{0,6}").unwrap()
        ) {
            for inner in [false, true] {
                if trim_keeps(v.as_bytes(), inner) {
                    proptest::prop_assert_eq!(trim(&v, inner), v.clone());
                }
            }
            for to in [CaseTo::Lower, CaseTo::Upper, CaseTo::Title] {
                if case_keeps(v.as_bytes(), to) {
                    proptest::prop_assert_eq!(case(&v, to), v.clone());
                }
            }
        }
    }

    proptest::proptest! {
        // The byte-by-byte mapping of ASCII text, and the reused buffer, give what the standard
        // library's full Unicode case mapping gives (`str::to_lowercase`, `str::to_uppercase`:
        // Unicode's default case mapping, the reference), whatever the buffer held before.
        #[test]
        fn case_into_agrees_with_the_standard_mapping(
            v in proptest::string::string_regex("[ -~]{0,12}|[ aZ\u{130}\u{3a3}ßé-]{0,8}").unwrap(),
            stale in proptest::string::string_regex(".{0,8}").unwrap(),
        ) {
            let mut buf = stale.clone();
            case_into(&v, CaseTo::Lower, &mut buf);
            proptest::prop_assert_eq!(&buf, &v.to_lowercase());
            let mut buf = stale.clone();
            case_into(&v, CaseTo::Upper, &mut buf);
            proptest::prop_assert_eq!(&buf, &v.to_uppercase());
            let mut buf = stale;
            trim_into(&v, false, &mut buf);
            proptest::prop_assert_eq!(buf.as_str(), v.trim_matches(char::is_whitespace));
        }
    }

    #[test]
    fn shortcuts_take_the_common_cells() {
        assert!(trim_keeps(b"Ada Quenwick", true));
        assert!(trim_keeps(b"", false));
        assert!(!trim_keeps(b"Ada  Quenwick", true));
        assert!(trim_keeps(b"Ada  Quenwick", false));
        assert!(!trim_keeps(b" Ada", false));
        assert!(!trim_keeps("Ada\u{a0}".as_bytes(), false));
        assert!(case_keeps(b"ada@example.org", CaseTo::Lower));
        assert!(!case_keeps(b"Ada@example.org", CaseTo::Lower));
    }

    #[test]
    fn case_mappings() {
        assert_eq!(
            case("Maya.T@Example.org", CaseTo::Lower),
            "maya.t@example.org"
        );
        assert_eq!(case("straße", CaseTo::Upper), "STRASSE");
        assert_eq!(
            case("BRAKE tune-up o'neil", CaseTo::Title),
            "Brake Tune-Up O'Neil"
        );
    }
}
