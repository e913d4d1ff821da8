//! What changed inside a cell, character by character: the old and the new value cut into
//! pieces that are kept, removed or added (a minimal edit script over Unicode scalar values,
//! Myers' algorithm from the `similar` crate), so that a removed trailing space can be shown.

use serde::Serialize;
use similar::{Algorithm, ChangeTag, TextDiff};

/// Values longer than this (in bytes, both together) are only trimmed of their common start
/// and end: the middle is shown as removed and added whole, which bounds the work per cell.
pub const MAX_DETAILED: usize = 8192;

#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(tag = "op", content = "text", rename_all = "lowercase")]
pub enum Piece {
    Same(String),
    Removed(String),
    Added(String),
}

/// The pieces of `old` and `new`, in order; kept pieces belong to both.
pub fn pieces(old: &str, new: &str) -> Vec<Piece> {
    let mut out: Vec<Piece> = Vec::new();
    let mut add = |tag: ChangeTag, s: &str| {
        if s.is_empty() {
            return;
        }
        match (out.last_mut(), tag) {
            (Some(Piece::Same(t)), ChangeTag::Equal)
            | (Some(Piece::Removed(t)), ChangeTag::Delete)
            | (Some(Piece::Added(t)), ChangeTag::Insert) => t.push_str(s),
            _ => out.push(match tag {
                ChangeTag::Equal => Piece::Same(s.to_string()),
                ChangeTag::Delete => Piece::Removed(s.to_string()),
                ChangeTag::Insert => Piece::Added(s.to_string()),
            }),
        }
    };
    if old.len() + new.len() > MAX_DETAILED {
        let head = common_prefix(old, new);
        let tail = common_prefix_rev(&old[head..], &new[head..]);
        add(ChangeTag::Equal, &old[..head]);
        add(ChangeTag::Delete, &old[head..old.len() - tail]);
        add(ChangeTag::Insert, &new[head..new.len() - tail]);
        add(ChangeTag::Equal, &old[old.len() - tail..]);
        return out;
    }
    let diff = TextDiff::configure()
        .algorithm(Algorithm::Myers)
        .diff_chars(old, new);
    for c in diff.iter_all_changes() {
        add(c.tag(), c.value());
    }
    out
}

/// Bytes of the longest common start, on a character boundary.
fn common_prefix(a: &str, b: &str) -> usize {
    a.char_indices()
        .zip(b.chars())
        .find(|((_, x), y)| x != y)
        .map(|((i, _), _)| i)
        .unwrap_or(a.len().min(b.len()))
}

/// Bytes of the longest common end, on a character boundary.
fn common_prefix_rev(a: &str, b: &str) -> usize {
    let mut n = 0;
    for (x, y) in a.chars().rev().zip(b.chars().rev()) {
        if x != y {
            break;
        }
        n += x.len_utf8();
    }
    n
}

#[cfg(test)]
mod tests {
    use super::*;

    fn old_of(p: &[Piece]) -> String {
        p.iter()
            .filter_map(|x| match x {
                Piece::Same(s) | Piece::Removed(s) => Some(s.as_str()),
                Piece::Added(_) => None,
            })
            .collect()
    }

    fn new_of(p: &[Piece]) -> String {
        p.iter()
            .filter_map(|x| match x {
                Piece::Same(s) | Piece::Added(s) => Some(s.as_str()),
                Piece::Removed(_) => None,
            })
            .collect()
    }

    #[test]
    fn a_removed_trailing_space_is_one_piece() {
        let p = pieces("Brake Tune ", "Brake Tune");
        assert_eq!(
            p,
            vec![Piece::Same("Brake Tune".into()), Piece::Removed(" ".into())]
        );
    }

    #[test]
    fn pieces_rebuild_both_values() {
        for (a, b) in [
            ("Quillby", "Oxwater"),
            ("", "x"),
            ("née", "nee"),
            ("a€b", "a€€b"),
        ] {
            let p = pieces(a, b);
            assert_eq!((old_of(&p), new_of(&p)), (a.to_string(), b.to_string()));
        }
        let long_a = format!("{}x{}", "é".repeat(5000), "z".repeat(10));
        let long_b = format!("{}y{}", "é".repeat(5000), "z".repeat(10));
        let p = pieces(&long_a, &long_b);
        assert_eq!((old_of(&p), new_of(&p)), (long_a.clone(), long_b.clone()));
        assert_eq!(p[1], Piece::Removed("x".into()));
    }
}
