//! Per-cell text operations. White space is Unicode White_Space (`char::is_whitespace`), so a
//! no-break space copied from a spreadsheet counts; case mapping is Unicode's default,
//! locale-independent mapping.

use super::CaseTo;

/// Removes leading and trailing white space; with `inner`, also turns every run of white space
/// inside the value into one ASCII space.
pub fn trim(v: &str, inner: bool) -> String {
    let t = v.trim_matches(char::is_whitespace);
    if !inner {
        return t.to_string();
    }
    let mut out = String::with_capacity(t.len());
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
    out
}

/// Changes case. `Title`: the first letter of every word upper case, the rest lower case; a
/// word starts at a letter or digit that follows anything else (space, hyphen, apostrophe,
/// the start of the value).
pub fn case(v: &str, to: CaseTo) -> String {
    match to {
        CaseTo::Lower => v.to_lowercase(),
        CaseTo::Upper => v.to_uppercase(),
        CaseTo::Title => {
            let mut out = String::with_capacity(v.len());
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
            out
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
