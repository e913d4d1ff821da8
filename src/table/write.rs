//! The canonical form of a version: CSV in UTF-8, comma, LF line ends, minimal RFC 4180
//! quoting. The store writes versions in it ([`crate::store::version_writer`]).
//!
//! Canonical means one byte sequence per table: a field is quoted only when it holds a comma, a
//! double quote, CR or LF (inner quotes doubled), or when it is the only field of its record and
//! empty (so the record is not a blank line, which readers skip). No BOM, no trailing spaces,
//! every record ends with LF. The same rows therefore always give the same hash.

use crate::model::Dialect;

/// The bytes that make a field need quotes.
const SPECIAL: [bool; 256] = {
    let mut t = [false; 256];
    t[b',' as usize] = true;
    t[b'"' as usize] = true;
    t[b'\r' as usize] = true;
    t[b'\n' as usize] = true;
    t
};

/// Appends `field` to `out` in canonical form.
pub fn push_field(out: &mut Vec<u8>, field: &[u8], only_field: bool) {
    let needs = field.is_empty() && only_field || field.iter().any(|&b| SPECIAL[b as usize]);
    if !needs {
        out.extend_from_slice(field);
        return;
    }
    out.push(b'"');
    for &b in field {
        if b == b'"' {
            out.push(b'"');
        }
        out.push(b);
    }
    out.push(b'"');
}

/// Appends one record (fields and the LF) to `out` in canonical form.
pub fn push_record<'a>(out: &mut Vec<u8>, fields: impl ExactSizeIterator<Item = &'a [u8]>) {
    let only = fields.len() == 1;
    for (i, f) in fields.enumerate() {
        if i > 0 {
            out.push(b',');
        }
        push_field(out, f, only);
    }
    out.push(b'\n');
}

/// The dialect of every canonical CSV version.
pub fn canonical_dialect() -> Dialect {
    Dialect {
        delimiter: ",".into(),
        quote: "\"".into(),
        line_ending: "lf".into(),
        bom: false,
        encoding: "utf-8".into(),
        has_header: true,
        delimiter_detected: false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::table::parse::parse_all;

    #[test]
    fn minimal_quoting_round_trips() {
        let rows: Vec<Vec<&[u8]>> = vec![
            vec![b"plain", b"with,comma", b"with \"quote\""],
            vec![b"", b"line\nbreak", b" spaced "],
        ];
        let mut out = Vec::new();
        for r in &rows {
            push_record(&mut out, r.iter().copied());
        }
        assert_eq!(
            out,
            b"plain,\"with,comma\",\"with \"\"quote\"\"\"\n,\"line\nbreak\", spaced \n".to_vec()
        );
        let back = parse_all(&out, b',').unwrap();
        for (r, b) in rows.iter().zip(back) {
            assert_eq!(r.iter().map(|f| f.to_vec()).collect::<Vec<_>>(), b);
        }
    }

    #[test]
    fn a_single_empty_field_is_not_a_blank_line() {
        let mut out = Vec::new();
        push_record(&mut out, [b"".as_slice()].into_iter());
        assert_eq!(out, b"\"\"\n".to_vec());
        assert_eq!(parse_all(&out, b',').unwrap(), vec![vec![Vec::<u8>::new()]]);
    }
}
