//! Writing a new version: canonical CSV (UTF-8, comma, LF line ends, minimal RFC 4180 quoting)
//! into an object, with the version's row index and column profile built in the same pass.
//!
//! Canonical means one byte sequence per table: a field is quoted only when it holds a comma, a
//! double quote, CR or LF (inner quotes doubled), or when it is the only field of its record and
//! empty (so the record is not a blank line, which readers skip). No BOM, no trailing spaces,
//! every record ends with LF. The same rows therefore always give the same hash.

use std::io;

use crate::model::{ColumnProfile, Dialect};
use crate::store::objects::{ObjectWriter, Objects};
use crate::table::profile::Profiler;
use crate::table::rowindex::{self, RowEntry};

/// Appends `field` to `out` in canonical form.
pub fn push_field(out: &mut Vec<u8>, field: &[u8], only_field: bool) {
    let needs = field.is_empty() && only_field
        || field
            .iter()
            .any(|&b| b == b',' || b == b'"' || b == b'\r' || b == b'\n');
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

/// What writing a version produced.
pub struct Written {
    pub table: ObjectWriter,
    pub index: ObjectWriter,
    pub n_rows: u64,
    pub profiles: Vec<ColumnProfile>,
}

/// Writes a version's rows in order.
pub struct CanonicalWriter {
    table: ObjectWriter,
    index: ObjectWriter,
    buf: Vec<u8>,
    index_buf: Vec<u8>,
    scratch: Vec<u8>,
    ends: Vec<usize>,
    profiler: Profiler,
    header: Vec<String>,
    n_rows: u64,
    /// Bytes written so far, and line breaks written so far.
    n_bytes: u64,
    n_lines: u64,
}

impl CanonicalWriter {
    /// Starts a version with `header`; `null_tokens` count as blanks in its profile.
    pub fn new(objects: &Objects, header: &[String], null_tokens: &[String]) -> io::Result<Self> {
        let mut w = CanonicalWriter {
            table: objects.writer()?,
            index: objects.writer()?,
            buf: Vec::with_capacity(1 << 20),
            index_buf: Vec::with_capacity(256 * 1024),
            scratch: Vec::new(),
            ends: Vec::new(),
            profiler: Profiler::new(header.len(), null_tokens),
            header: header.to_vec(),
            n_rows: 0,
            n_bytes: 0,
            n_lines: 0,
        };
        w.index.write(&rowindex::header())?;
        let start = w.buf.len();
        push_record(&mut w.buf, header.iter().map(|h| h.as_bytes()));
        w.account(start);
        Ok(w)
    }

    fn account(&mut self, start: usize) {
        let rec = &self.buf[start..];
        self.n_bytes += rec.len() as u64;
        self.n_lines += memchr::memchr_iter(b'\n', rec).count() as u64;
    }

    /// Writes one data row; `fields` must have one value per header column.
    pub fn write_row(&mut self, fields: &[&[u8]]) -> io::Result<()> {
        debug_assert_eq!(fields.len(), self.header.len());
        let entry_byte = self.n_bytes;
        let entry_line = self.n_lines + 1;
        self.ends.clear();
        let mut end = 0usize;
        for f in fields {
            end += f.len();
            self.ends.push(end);
        }
        self.scratch.clear();
        for f in fields {
            self.scratch.extend_from_slice(f);
        }
        let fields_concat = std::mem::take(&mut self.scratch);
        let mut fp_scratch = Vec::new();
        let fingerprint = rowindex::fingerprint_parts(&fields_concat, &self.ends, &mut fp_scratch);
        self.scratch = fields_concat;
        rowindex::encode_entry(
            &RowEntry {
                byte: entry_byte,
                line: entry_line,
                fingerprint,
            },
            &mut self.index_buf,
        );
        self.profiler.observe(fields.iter().copied());
        let start = self.buf.len();
        push_record(&mut self.buf, fields.iter().copied());
        self.account(start);
        self.n_rows += 1;
        if self.buf.len() >= 1 << 20 {
            self.table.write(&self.buf)?;
            self.buf.clear();
        }
        if self.index_buf.len() >= 256 * 1024 {
            self.index.write(&self.index_buf)?;
            self.index_buf.clear();
        }
        Ok(())
    }

    /// Flushes everything; the objects are not persisted yet (the caller decides).
    pub fn finish(mut self) -> io::Result<Written> {
        self.table.write(&self.buf)?;
        self.index.write(&self.index_buf)?;
        Ok(Written {
            profiles: self.profiler.finish(&self.header),
            table: self.table,
            index: self.index,
            n_rows: self.n_rows,
        })
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
