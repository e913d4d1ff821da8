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

/// Appends `field` to `out` in canonical form. A quoted field is copied in pieces between its
/// inner quotes, not byte by byte.
pub fn push_field(out: &mut Vec<u8>, field: &[u8], only_field: bool) {
    // Fields are short: a table lookup per byte beats setting up a vector search.
    let needs = field.is_empty() && only_field || field.iter().any(|&b| SPECIAL[b as usize]);
    if !needs {
        out.extend_from_slice(field);
        return;
    }
    out.reserve(field.len() + 2);
    out.push(b'"');
    let mut from = 0;
    for q in memchr::memchr_iter(b'"', field) {
        // Each inner quote is doubled: the piece up to and with it, then the quote again.
        out.extend_from_slice(&field[from..=q]);
        out.push(b'"');
        from = q + 1;
    }
    out.extend_from_slice(&field[from..]);
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

/// [`push_record`] for a record held in `bytes` as its fields back to back: field `i` ends at
/// `ends[i]` and starts where the one before it ends (the first at `start`). The same output
/// bytes. A record with no byte that needs quoting (most records, decided by one scan of the
/// whole record) is copied field by field with commas between, without looking at each field
/// again. Returns whether a field holds CR or LF (the record then spans more than one line).
pub fn push_packed(out: &mut Vec<u8>, bytes: &[u8], start: usize, ends: &[usize]) -> bool {
    let record = &bytes[start..ends.last().copied().unwrap_or(start)];
    let only = ends.len() == 1;
    let plain = memchr::memchr3(b',', b'"', b'\n', record).is_none()
        && memchr::memchr(b'\r', record).is_none()
        && !(only && record.is_empty());
    out.reserve(record.len() + ends.len() + 1);
    let mut from = start;
    for (i, &end) in ends.iter().enumerate() {
        if i > 0 {
            out.push(b',');
        }
        if plain {
            out.extend_from_slice(&bytes[from..end]);
        } else {
            push_field(out, &bytes[from..end], only);
        }
        from = end;
    }
    out.push(b'\n');
    !plain && memchr::memchr2(b'\n', b'\r', record).is_some()
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

    proptest::proptest! {
        // The packed form writes exactly what the field-by-field form writes (minimal quoting
        // as RFC 4180 allows it), and says whether a field breaks the line.
        #[test]
        fn packed_records_are_written_as_field_by_field_ones(
            fields in proptest::collection::vec(
                proptest::string::string_regex("[a ,\"\r\né]{0,5}").unwrap(), 0..5),
            lead in proptest::string::string_regex("[x,\"]{0,3}").unwrap(),
        ) {
            let mut expected = b"before".to_vec();
            push_record(&mut expected, fields.iter().map(|f| f.as_bytes()));
            let mut bytes = lead.as_bytes().to_vec();
            let start = bytes.len();
            let mut ends = Vec::new();
            for f in &fields {
                bytes.extend_from_slice(f.as_bytes());
                ends.push(bytes.len());
            }
            let mut got = b"before".to_vec();
            let breaks = push_packed(&mut got, &bytes, start, &ends);
            proptest::prop_assert_eq!(&got, &expected);
            let has_break = fields.iter().any(|f| f.contains('\n') || f.contains('\r'));
            proptest::prop_assert_eq!(breaks, has_break);
        }
    }

    proptest::proptest! {
        // A field written by `push_field` is what the rule of the module's opening says
        // (quoted only when it holds a comma, a quote, CR or LF, inner quotes doubled; written
        // out byte by byte here), and the `csv` crate's reader (RFC 4180) gives it back whole.
        #[test]
        fn a_field_is_quoted_by_the_rule_and_read_back_whole(
            field in proptest::collection::vec(
                proptest::sample::select(vec![b'a', b' ', b',', b'"', b'\r', b'\n', 0xC3, 0xA9]),
                0..40),
            only in proptest::bool::ANY,
        ) {
            let mut got = Vec::new();
            push_field(&mut got, &field, only);
            let special = |b: &u8| matches!(b, b',' | b'"' | b'\r' | b'\n');
            let mut expected = Vec::new();
            if field.iter().any(special) || (only && field.is_empty()) {
                expected.push(b'"');
                for &b in &field {
                    if b == b'"' {
                        expected.push(b'"');
                    }
                    expected.push(b);
                }
                expected.push(b'"');
            } else {
                expected.extend_from_slice(&field);
            }
            proptest::prop_assert_eq!(&got, &expected);
            got.extend_from_slice(b",x\n");
            let mut reader = csv::ReaderBuilder::new()
                .has_headers(false)
                .from_reader(got.as_slice());
            let mut record = csv::ByteRecord::new();
            proptest::prop_assert!(reader.read_byte_record(&mut record).unwrap_or(false));
            proptest::prop_assert_eq!(record.get(0), Some(field.as_slice()));
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
