//! JSON Lines: one JSON object per line (RFC 8259 values, UTF-8, lines ended by LF or CRLF),
//! read into a table, and the raw text of one value read back for a trail.
//!
//! Keys become columns in the order they are first seen, over the whole file; a line without a
//! key has an empty cell there. Values become cells as follows: a string is its text (escapes
//! decoded), a number is kept exactly as written in the file (the token itself, never through
//! floating point: `12.50` stays `12.50`, `1e3` stays `1e3`), `true` and `false` are the texts
//! `true` and `false`, and `null` is an empty cell. An array or an object as a value is refused
//! with its line, since a table cell cannot hold one. Lines holding only white space are skipped
//! (the row map records which line each row came from); a byte-order mark at the start is
//! ignored.

use std::fmt;
use std::path::Path;

use serde::de::{self, Deserializer, MapAccess, Visitor};
use serde_json::value::RawValue;

use crate::error::{Error, InputProblem, Position, Result};

/// The pairs of one object, in order, with each value's raw text.
struct Pairs<'a>(Vec<(String, &'a RawValue)>);

struct PairsVisitor;

impl<'de> Visitor<'de> for PairsVisitor {
    type Value = Pairs<'de>;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a JSON object")
    }

    fn visit_map<A: MapAccess<'de>>(
        self,
        mut map: A,
    ) -> std::result::Result<Self::Value, A::Error> {
        let mut out = Vec::new();
        while let Some(k) = map.next_key::<String>()? {
            let v: &'de RawValue = map.next_value()?;
            out.push((k, v));
        }
        Ok(Pairs(out))
    }
}

impl<'de> de::Deserialize<'de> for Pairs<'de> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> std::result::Result<Self, D::Error> {
        d.deserialize_map(PairsVisitor)
    }
}

/// A table read from JSON Lines.
#[derive(Debug, Clone, Default)]
pub struct LinesTable {
    pub header: Vec<String>,
    pub rows: Vec<Vec<String>>,
    /// The 1-based line of each row.
    pub lines: Vec<u64>,
    /// Values seen per kind: string, number, boolean, null (plus keys missing on a line).
    pub kinds: [u64; 5],
}

/// The largest JSON Lines file taken in: 24 MiB. The file is read whole and its table held in
/// memory (a few times the file's size for short values) before it is written as a version.
pub const MAX_JSONL_BYTES: u64 = 24 << 20;

/// Names of [`LinesTable::kinds`], in order.
pub const KIND_NAMES: [&str; 5] = ["string", "number", "boolean", "null", "missing"];

/// Whether a file name says JSON Lines.
pub fn is_jsonl(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| matches!(e.to_ascii_lowercase().as_str(), "jsonl" | "ndjson"))
}

/// Each line of `bytes` with its 1-based number and byte offset, without its line ending.
fn lines(bytes: &[u8]) -> impl Iterator<Item = (u64, u64, &[u8])> {
    let mut start = 0usize;
    let mut n = 0u64;
    std::iter::from_fn(move || {
        if start >= bytes.len() {
            return None;
        }
        let end = memchr::memchr(b'\n', &bytes[start..]).map_or(bytes.len(), |i| start + i);
        let mut line = &bytes[start..end];
        if line.last() == Some(&b'\r') {
            line = &line[..line.len() - 1];
        }
        let at = start as u64;
        start = end + 1;
        n += 1;
        Some((n, at, line))
    })
}

fn strip_bom(bytes: &[u8]) -> (&[u8], u64) {
    match bytes.strip_prefix(b"\xEF\xBB\xBF") {
        Some(rest) => (rest, 3),
        None => (bytes, 0),
    }
}

/// What a raw JSON value becomes as a cell, and its kind (an index into [`KIND_NAMES`]).
fn cell(raw: &RawValue) -> std::result::Result<(String, usize), ()> {
    let t = raw.get().trim();
    match t.as_bytes().first() {
        Some(b'"') => serde_json::from_str::<String>(t)
            .map(|s| (s, 0))
            .map_err(|_| ()),
        Some(b'{' | b'[') => Err(()),
        Some(b't') => Ok(("true".into(), 2)),
        Some(b'f') => Ok(("false".into(), 2)),
        Some(b'n') => Ok((String::new(), 3)),
        _ => Ok((t.to_string(), 1)),
    }
}

fn parse_line<'a>(path: &Path, n: u64, at: u64, line: &'a [u8]) -> Result<Pairs<'a>> {
    let pos = |column: Option<u64>| Position {
        byte: at,
        line: n,
        record: None,
        column,
    };
    let text = std::str::from_utf8(line).map_err(|e| {
        Error::input(
            path,
            Some(Position {
                byte: at + e.valid_up_to() as u64,
                ..pos(None)
            }),
            InputProblem::InvalidUtf8,
        )
    })?;
    let trimmed = text.trim_start();
    if !trimmed.starts_with('{') {
        let found = match trimmed.as_bytes().first() {
            Some(b'[') => "an array",
            Some(b'"') => "a string",
            Some(b't' | b'f') => "a boolean",
            Some(b'n') => "null",
            _ => "a number or other value",
        };
        return Err(Error::input(
            path,
            Some(pos(None)),
            InputProblem::NotAnObject {
                found: found.into(),
            },
        ));
    }
    serde_json::from_str::<Pairs<'a>>(text).map_err(|e| {
        Error::input(
            path,
            Some(Position {
                byte: at + e.column().saturating_sub(1) as u64,
                ..pos(Some(e.column() as u64))
            }),
            InputProblem::InvalidJson {
                detail: strip_position(&e.to_string()),
            },
        )
    })
}

/// serde_json's message without its own " at line L column C" (the position is ours).
fn strip_position(msg: &str) -> String {
    match msg.rfind(" at line ") {
        Some(i) => msg[..i].to_string(),
        None => msg.to_string(),
    }
}

/// Reads the JSON Lines file in `bytes` into a table.
pub fn read(bytes: &[u8], path: &Path) -> Result<LinesTable> {
    let (body, skip) = strip_bom(bytes);
    let mut t = LinesTable::default();
    let mut columns: std::collections::HashMap<String, usize> = Default::default();
    for (n, at, line) in lines(body) {
        let at = at + skip;
        if line.iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        let pairs = parse_line(path, n, at, line)?;
        let mut row = vec![None::<String>; t.header.len()];
        for (k, v) in pairs.0 {
            let (text, kind) = cell(v).map_err(|_| {
                Error::input(
                    path,
                    Some(Position {
                        byte: at,
                        line: n,
                        record: None,
                        column: None,
                    }),
                    InputProblem::NestedValue { key: k.clone() },
                )
            })?;
            t.kinds[kind] += 1;
            let c = match columns.get(&k) {
                Some(&c) => c,
                None => {
                    columns.insert(k.clone(), t.header.len());
                    t.header.push(k.clone());
                    row.push(None);
                    t.header.len() - 1
                }
            };
            if row[c].is_some() {
                return Err(Error::input(
                    path,
                    Some(Position {
                        byte: at,
                        line: n,
                        record: None,
                        column: None,
                    }),
                    InputProblem::RepeatedKey { key: k },
                ));
            }
            row[c] = Some(text);
        }
        t.kinds[4] += row.iter().filter(|c| c.is_none()).count() as u64;
        t.rows
            .push(row.into_iter().map(Option::unwrap_or_default).collect());
        t.lines.push(n);
    }
    // Rows read before a column was first seen lack it.
    let width = t.header.len();
    for row in &mut t.rows {
        if row.len() < width {
            t.kinds[4] += (width - row.len()) as u64;
            row.resize(width, String::new());
        }
    }
    Ok(t)
}

/// The raw text of line `line` (1-based) and of the value of `key` on it (`None` when the line
/// has no such key), for a trail.
pub fn raw_value(
    bytes: &[u8],
    path: &Path,
    line: u64,
    key: &str,
) -> Result<(String, Option<String>)> {
    let (body, skip) = strip_bom(bytes);
    for (n, at, text) in lines(body) {
        if n == line {
            let pairs = parse_line(path, n, at + skip, text)?;
            let value = pairs
                .0
                .iter()
                .find(|(k, _)| k == key)
                .map(|(_, v)| v.get().trim().to_string());
            return Ok((String::from_utf8_lossy(text).into_owned(), value));
        }
    }
    Err(Error::input(
        path,
        None,
        InputProblem::InvalidJson {
            detail: format!("the stored file has no line {line}"),
        },
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_in_first_seen_order_and_values_as_written() {
        let src = b"{\"a\": 1.50, \"b\": \"x\\ty\"}\n\n{\"c\": null, \"a\": -2e3, \"b\": true}\n";
        let t = read(src, Path::new("t.jsonl")).unwrap();
        assert_eq!(t.header, ["a", "b", "c"]);
        assert_eq!(t.rows, [vec!["1.50", "x\ty", ""], vec!["-2e3", "true", ""]]);
        assert_eq!(t.lines, [1, 3]);
    }

    #[test]
    fn nested_values_are_refused_with_their_line() {
        let e = read(b"{\"a\": 1}\n{\"a\": [1, 2]}\n", Path::new("t.jsonl")).unwrap_err();
        assert_eq!(e.position().map(|p| p.line), Some(2));
        assert!(e.to_string().contains("\"a\""), "{e}");
    }
}
