//! Writing a version in another text format for `sluice retrieve --format`: canonical CSV, tab-
//! separated values or JSON Lines. The stored bytes are never changed; these are renderings
//! of the same rows.
//!
//! - `csv`: canonical CSV (`table::write`: comma, LF, quotes only where RFC 4180 needs them);
//!   for every version sluice wrote itself this is exactly the stored bytes, and a raw file in
//!   another dialect (semicolons, CRLF, a legacy encoding) is rewritten into it.
//! - `tsv`: the header and rows joined by tabs, each line ended by LF, as the IANA registration
//!   of `text/tab-separated-values` describes: no quoting, and no field may hold a tab or a line
//!   break. Such a cell is refused, with its row and column, rather than escaped in a way
//!   readers would not undo.
//! - `jsonl`: one JSON object per data row (RFC 8259), the header's names as keys in column
//!   order, every cell as a JSON string (cells are text; an empty cell is `""`), escaped by
//!   serde_json (`"`, `\`, control characters; other characters as UTF-8).
//! - `parquet`, `arrow`: the columnar formats, through [`crate::columnar::write::write_version`].

use std::io::Write;

use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;
use crate::table::write::push_record;

/// An output format of `cat --format`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TextFormat {
    Csv,
    Tsv,
    Jsonl,
}

/// Any output format of `retrieve --format`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Text(TextFormat),
    Columnar(crate::columnar::write::OutFormat),
}

/// Writes every row of `v` to `out` in `format`, text or columnar.
pub fn write_in(store: &Store, v: &Version, format: Format, out: &mut dyn Write) -> Result<()> {
    write_in_with(store, v, format, &[], out)
}

/// As [`write_in`], with column types the user gave for a columnar format (refused for text,
/// where every cell is text).
pub fn write_in_with(
    store: &Store,
    v: &Version,
    format: Format,
    given: &crate::columnar::write::GivenTypes,
    out: &mut dyn Write,
) -> Result<()> {
    match format {
        Format::Text(_) if !given.is_empty() => Err(Error::usage(
            "column types are for the columnar formats: give --format parquet or --format arrow, or leave the types out",
        )),
        Format::Text(t) => write_as(store, v, t, out),
        Format::Columnar(c) => crate::columnar::write::write_version(store, v, c, given, out),
    }
}

fn io(e: std::io::Error) -> Error {
    Error::io(std::path::Path::new("(output)"), e)
}

fn tsv_field(v: &Version, row: Option<u64>, column: &str, field: &[u8]) -> Result<()> {
    if let Some(b) = field.iter().find(|b| matches!(b, b'\t' | b'\n' | b'\r')) {
        let what = match b {
            b'\t' => "a tab",
            _ => "a line break",
        };
        let place = match row {
            Some(r) => format!("data row {r}, column {column}"),
            None => format!("the header name \"{column}\""),
        };
        return Err(ErrorKind::Data(format!(
            "{} cannot be written as tab-separated values: {place} holds {what}, which the format has no way to write; use --format csv or --format jsonl, or replace it first (`sluice clean {} replace ...`)",
            v.label(),
            v.dataset
        ))
        .into());
    }
    Ok(())
}

fn tsv_line(out: &mut Vec<u8>, fields: &[&[u8]]) {
    for (i, f) in fields.iter().enumerate() {
        if i > 0 {
            out.push(b'\t');
        }
        out.extend_from_slice(f);
    }
    out.push(b'\n');
}

fn json_line(out: &mut Vec<u8>, keys: &[String], fields: &[&[u8]]) -> Result<()> {
    out.push(b'{');
    for (i, (k, f)) in keys.iter().zip(fields).enumerate() {
        if i > 0 {
            out.push(b',');
        }
        serde_json::to_writer(&mut *out, k)
            .map_err(|e| Error::from(ErrorKind::Data(e.to_string())))?;
        out.push(b':');
        let text = String::from_utf8_lossy(f);
        serde_json::to_writer(&mut *out, text.as_ref())
            .map_err(|e| Error::from(ErrorKind::Data(e.to_string())))?;
    }
    out.extend_from_slice(b"}\n");
    Ok(())
}

/// Writes every row of `v` to `out` in `format`. A TSV that cannot be written fails before
/// anything is written only for the header; rows are checked as they go, so the caller writes
/// to a temporary file when it must not leave part of one.
pub fn write_as(store: &Store, v: &Version, format: TextFormat, out: &mut dyn Write) -> Result<()> {
    let mut buf: Vec<u8> = Vec::with_capacity(1 << 20);
    let header: Vec<&[u8]> = v.header.iter().map(|h| h.as_bytes()).collect();
    match format {
        TextFormat::Csv => push_record(&mut buf, header.iter().copied()),
        TextFormat::Tsv => {
            for h in &v.header {
                tsv_field(v, None, h, h.as_bytes())?;
            }
            tsv_line(&mut buf, &header);
        }
        TextFormat::Jsonl => {}
    }
    store.objects.each_row(v, |row, r| {
        let fields: Vec<&[u8]> = r.iter().collect();
        match format {
            TextFormat::Csv => push_record(&mut buf, fields.iter().copied()),
            TextFormat::Tsv => {
                for (f, h) in fields.iter().zip(&v.header) {
                    tsv_field(v, Some(row + 1), h, f)?;
                }
                tsv_line(&mut buf, &fields);
            }
            TextFormat::Jsonl => json_line(&mut buf, &v.header, &fields)?,
        }
        if buf.len() >= 1 << 20 {
            out.write_all(&buf).map_err(io)?;
            buf.clear();
        }
        Ok(())
    })?;
    out.write_all(&buf).map_err(io)?;
    Ok(())
}
