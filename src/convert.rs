//! Converted intake: files that are not delimited text (workbooks, JSON Lines) taken in as a
//! raw object and a first table version made from it.
//!
//! The outside file's exact bytes are stored and hashed as an object of kind `blob` (the raw
//! intake: `verify` re-hashes it like any object); the table read out of it is written as
//! canonical CSV (`table::write`) and recorded as the dataset's version; one `ingest` step
//! records both: its parameters hold the conversion (`params.convert`: format, raw object,
//! sheet, the sheet column of each table column, the row map from table rows to sheet rows or
//! file lines as runs, the formulas with their cached results, cell counts by kind). A trail
//! that reaches such a version ends at the sheet and cell, or the line, through that row map,
//! with the value as the raw file stores it (see [`locate`]).
//!
//! Unlike delimited text, which streams, these files are read whole into memory: a workbook is
//! a zip archive its reader opens at once, and a JSON Lines file's columns are only known at
//! its end.

use std::collections::HashMap;
use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::clock;
use crate::columnar::{self, ColumnarFormat};
use crate::error::{Error, ErrorKind, InputProblem, Result};
use crate::intake::{IngestOptions, Prepared, PreparedIngest, SourceOptions};
use crate::jsonl;
use crate::model::{SourceFile, Step};
use crate::sheets::{self, WorkbookFormat};
use crate::store::version_writer::CanonicalWriter;
use crate::store::Store;

/// The formats taken in through a conversion.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SourceFormat {
    Workbook(WorkbookFormat),
    JsonLines,
    /// Apache Parquet or Arrow IPC.
    Columnar(ColumnarFormat),
}

impl SourceFormat {
    /// The format a file name's extension says (`.xlsx`, `.xlsm`, `.ods`, `.jsonl`, `.ndjson`);
    /// `None` for delimited text.
    pub fn of(path: &Path) -> Option<SourceFormat> {
        if let Some(f) = sheets::format_of(path) {
            return Some(SourceFormat::Workbook(f));
        }
        if let Some(f) = ColumnarFormat::of(path) {
            return Some(SourceFormat::Columnar(f));
        }
        jsonl::is_jsonl(path).then_some(SourceFormat::JsonLines)
    }

    pub fn as_str(self) -> &'static str {
        match self {
            SourceFormat::Workbook(f) => f.as_str(),
            SourceFormat::JsonLines => "jsonl",
            SourceFormat::Columnar(f) => f.as_str(),
        }
    }
}

/// The raw object of a converted intake.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct RawObject {
    pub hash: String,
    pub n_bytes: u64,
}

/// The part of a conversion's record a trail needs (`params.convert` of the ingest step).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Conversion {
    /// xlsx, ods or jsonl.
    pub format: String,
    pub raw: RawObject,
    /// Workbooks: the sheet, and the column letters of each table column.
    #[serde(default)]
    pub sheet: Option<String>,
    #[serde(default)]
    pub columns: Option<Vec<String>>,
    /// The row map as runs `[first data row, first sheet row or line, count]`, all 1-based.
    /// For columnar files the "line" is the row's 1-based place in the file.
    pub rows: Vec<[u64; 3]>,
    /// Columnar files: rows per Parquet row group or IPC record batch.
    #[serde(default)]
    pub groups: Option<Vec<u64>>,
}

impl Conversion {
    /// The 1-based sheet row or line of 0-based data row `row`.
    pub fn source_row(&self, row: u64) -> Option<u64> {
        let r = row + 1;
        let i = self.rows.partition_point(|run| run[0] + run[2] <= r);
        self.rows
            .get(i)
            .filter(|run| run[0] <= r)
            .map(|run| run[1] + (r - run[0]))
    }
}

/// The conversion an ingest step recorded, if it made its version from another format.
pub fn conversion_of(step: &Step) -> Option<Conversion> {
    serde_json::from_value(step.params.get("convert")?.clone()).ok()
}

/// Where in the raw file a cell of a converted first version is, and what the file holds there.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct RawPlace {
    /// xlsx, ods or jsonl.
    pub format: String,
    pub raw_hash: String,
    /// The sheet row or file line (1-based).
    pub line: u64,
    /// Workbooks: `Sheet1!C7`.
    pub cell: Option<String>,
    /// The value as the raw file stores it (a date's serial number, a number's token, ...).
    pub stored: String,
    /// Workbooks: number, date, text, boolean, blank, error; JSON Lines: the JSON token's kind.
    pub stored_kind: String,
    pub formula: Option<String>,
    /// JSON Lines: the whole line as in the file.
    pub raw_line: Option<String>,
}

/// Finds 0-based data row `row`, column `column` of a converted first version in its raw object.
pub fn locate(
    store: &Store,
    conv: &Conversion,
    header: &[String],
    row: u64,
    column: &str,
) -> Result<RawPlace> {
    let broken = |what: &str| -> Error {
        ErrorKind::Inconsistent(format!(
            "the conversion record of an intake {what}; run `sluice verify`"
        ))
        .into()
    };
    let line = conv
        .source_row(row)
        .ok_or_else(|| broken("has no row map entry for this row"))?;
    let hash = conv
        .raw
        .hash
        .parse()
        .map_err(|e: String| broken(&format!("names a malformed raw object ({e})")))?;
    let bytes = store.objects.read_all(&hash)?;
    let here = PathBuf::from(format!(
        "raw object {}",
        &conv.raw.hash[..12.min(conv.raw.hash.len())]
    ));
    if let Some(format) = columnar_format(&conv.format) {
        let groups = conv.groups.as_deref().unwrap_or_default();
        let (stored, arrow_type) =
            columnar::value_at(&bytes, &here, format, groups, line - 1, column)?;
        let (g, r) = columnar::group_of(groups, line - 1).unwrap_or((0, line - 1));
        let unit = match format {
            ColumnarFormat::Parquet => "row group",
            ColumnarFormat::ArrowIpc => "record batch",
        };
        return Ok(RawPlace {
            format: conv.format.clone(),
            raw_hash: conv.raw.hash.clone(),
            line,
            cell: Some(format!("{unit} {}, row {}", g + 1, r + 1)),
            stored,
            stored_kind: arrow_type,
            formula: None,
            raw_line: None,
        });
    }
    if conv.format == "jsonl" {
        let (text, value) = jsonl::raw_value(&bytes, &here, line, column)?;
        let kind = match value.as_deref().and_then(|v| v.bytes().next()) {
            None => "missing",
            Some(b'"') => "string",
            Some(b't' | b'f') => "boolean",
            Some(b'n') => "null",
            Some(_) => "number",
        };
        return Ok(RawPlace {
            format: conv.format.clone(),
            raw_hash: conv.raw.hash.clone(),
            line,
            cell: None,
            stored: value.unwrap_or_default(),
            stored_kind: kind.into(),
            formula: None,
            raw_line: Some(text),
        });
    }
    let c = header
        .iter()
        .position(|h| h == column)
        .ok_or_else(|| broken("misses a column"))?;
    let letters = conv
        .columns
        .as_ref()
        .and_then(|cols| cols.get(c))
        .ok_or_else(|| broken("has no sheet column for this column"))?;
    let col = sheets::column_number(letters).ok_or_else(|| broken("holds a bad column"))?;
    let sheet = conv
        .sheet
        .as_deref()
        .ok_or_else(|| broken("names no sheet"))?;
    let sheet_row = u32::try_from(line - 1).map_err(|_| broken("holds a bad row"))?;
    let cell = sheets::stored_cell(&bytes, &here, sheet, sheet_row, col)?;
    Ok(RawPlace {
        format: conv.format.clone(),
        raw_hash: conv.raw.hash.clone(),
        line,
        cell: Some(cell.reference),
        stored: cell.stored,
        stored_kind: cell.kind,
        formula: cell.formula,
        raw_line: None,
    })
}

/// A table read out of a raw file, before it is written.
struct Read {
    header: Vec<String>,
    rows: Vec<Vec<String>>,
    /// Per data row, its 1-based sheet row or line.
    source_rows: Vec<u64>,
    /// Per column, where its header is (a cell reference or a line), for messages.
    header_at: Vec<String>,
    /// Per column and data row, how to name a cell in a message.
    cell_name: Box<dyn Fn(usize, usize) -> String>,
    /// Whether a row is named by its key's cell (workbooks) rather than its line.
    by_cell: bool,
    record: serde_json::Value,
    warnings: Vec<String>,
}

fn from_sheet(t: sheets::SheetTable, has_header: bool) -> Read {
    let sheet = t.sheet.clone();
    let (r0, c0) = (t.first_row, t.first_col);
    let width = t.rows.first().map_or(0, |r| r.len());
    let columns: Vec<String> = (0..width as u32)
        .map(|j| sheets::column_letters(c0 + j))
        .collect();
    let mut rows = t.rows.into_iter();
    let header: Vec<String> = if has_header {
        rows.next().unwrap_or_default()
    } else {
        (1..=width).map(|i| format!("col{i}")).collect()
    };
    let first_data = r0 as u64 + 1 + u64::from(has_header);
    let mut data = Vec::new();
    let mut source_rows = Vec::new();
    let mut skipped = 0u64;
    for (i, row) in rows.enumerate() {
        if row.iter().all(|c| c.is_empty()) {
            skipped += 1;
            continue;
        }
        source_rows.push(first_data + i as u64);
        data.push(row);
    }
    let mut warnings = Vec::new();
    if !t.errors.is_empty() {
        warnings.push(format!(
            "{} cell{} hold{} an error value, taken in as its text ({}{})",
            t.errors.len(),
            if t.errors.len() == 1 { "" } else { "s" },
            if t.errors.len() == 1 { "s" } else { "" },
            t.errors
                .iter()
                .take(5)
                .map(|(c, v)| format!("{c} {v}"))
                .collect::<Vec<_>>()
                .join(", "),
            if t.errors.len() > 5 { ", ..." } else { "" }
        ));
    }
    let no_cache: Vec<&str> = t
        .formulas
        .iter()
        .filter(|f| f.value.is_empty())
        .map(|f| f.cell.as_str())
        .collect();
    if !no_cache.is_empty() {
        warnings.push(format!(
            "{} formula{} no saved result, taken in as empty ({}{}); open and save the workbook in a spreadsheet program to store results",
            no_cache.len(),
            if no_cache.len() == 1 { " has" } else { "s have" },
            no_cache.iter().take(5).copied().collect::<Vec<_>>().join(", "),
            if no_cache.len() > 5 { ", ..." } else { "" }
        ));
    }
    let kinds: serde_json::Map<String, serde_json::Value> = sheets::KIND_NAMES
        .iter()
        .zip(t.kinds)
        .map(|(k, n)| (k.to_string(), json!(n)))
        .collect();
    let record = json!({
        "format": t.format.as_str(),
        "sheet": t.sheet,
        "sheet_index": t.sheet_index,
        "sheets": t.sheets,
        "header_row": has_header.then_some(r0 as u64 + 1),
        "columns": columns,
        "cells": kinds,
        "blank_rows_skipped": skipped,
        "formulas": t.formulas,
        "errors": t.errors.iter().map(|(c, v)| json!({"cell": c, "value": v})).collect::<Vec<_>>(),
    });
    let header_at = (0..width as u32)
        .map(|j| sheets::cell_ref(&sheet, r0, c0 + j))
        .collect();
    let rows_for_names = source_rows.clone();
    let sheet_for_names = sheet.clone();
    Read {
        header,
        rows: data,
        source_rows,
        header_at,
        cell_name: Box::new(move |col, row| {
            let r = rows_for_names.get(row).copied().unwrap_or(1);
            sheets::cell_ref(&sheet_for_names, (r - 1) as u32, c0 + col as u32)
        }),
        by_cell: true,
        record,
        warnings,
    }
}

fn from_lines(t: jsonl::LinesTable) -> Read {
    let kinds: serde_json::Map<String, serde_json::Value> = jsonl::KIND_NAMES
        .iter()
        .zip(t.kinds)
        .map(|(k, n)| (k.to_string(), json!(n)))
        .collect();
    let record = json!({
        "format": "jsonl",
        "values": kinds,
    });
    let header_at = t.header.iter().map(|k| format!("key \"{k}\"")).collect();
    let lines = t.lines.clone();
    let names = t.header.clone();
    Read {
        header: t.header,
        rows: t.rows,
        source_rows: t.lines,
        header_at,
        cell_name: Box::new(move |col, row| {
            format!(
                "line {}, key \"{}\"",
                lines.get(row).copied().unwrap_or(0),
                names.get(col).map_or("", |s| s.as_str())
            )
        }),
        by_cell: false,
        record,
        warnings: Vec::new(),
    }
}

fn columnar_format(name: &str) -> Option<ColumnarFormat> {
    match name {
        "parquet" => Some(ColumnarFormat::Parquet),
        "arrow" => Some(ColumnarFormat::ArrowIpc),
        _ => None,
    }
}

fn from_columnar(t: columnar::ColumnarTable, format: ColumnarFormat) -> Read {
    let record = json!({
        "format": format.as_str(),
        "column_types": t.types,
        "groups": t.groups,
        "codecs": t.codecs,
        "created_by": t.created_by,
        "nulls": t.n_nulls,
    });
    let header_at = t.header.iter().map(|k| format!("column \"{k}\"")).collect();
    let n = t.rows.len() as u64;
    let names = t.header.clone();
    let groups = t.groups.clone();
    let unit = match format {
        ColumnarFormat::Parquet => "row group",
        ColumnarFormat::ArrowIpc => "record batch",
    };
    Read {
        header: t.header,
        rows: t.rows,
        source_rows: (1..=n).collect(),
        header_at,
        cell_name: Box::new(move |col, row| {
            let (g, r) = columnar::group_of(&groups, row as u64).unwrap_or((0, row as u64));
            format!(
                "{unit} {}, row {}, column \"{}\"",
                g + 1,
                r + 1,
                names.get(col).map_or("", |s| s.as_str())
            )
        }),
        by_cell: true,
        record,
        warnings: Vec::new(),
    }
}

/// Runs `[first data row, first source row, count]` (1-based) of a row map.
fn runs(source_rows: &[u64]) -> Vec<[u64; 3]> {
    let mut out: Vec<[u64; 3]> = Vec::new();
    for (i, &s) in source_rows.iter().enumerate() {
        let r = i as u64 + 1;
        match out.last_mut() {
            Some(run) if run[0] + run[2] == r && run[1] + run[2] == s => run[2] += 1,
            _ => out.push([r, s, 1]),
        }
    }
    out
}

fn at_cell(path: &Path, at: String, problem: InputProblem) -> Error {
    Error::input(
        path,
        None,
        InputProblem::AtCell {
            at,
            problem: Box::new(problem),
        },
    )
}

fn check_header(path: &Path, read: &Read) -> Result<()> {
    if let Some(j) = read.header.iter().position(|n| n.trim().is_empty()) {
        return Err(at_cell(
            path,
            read.header_at[j].clone(),
            InputProblem::BlankHeaderNames {
                columns: vec![j as u64 + 1],
            },
        ));
    }
    let mut seen: HashMap<&str, usize> = HashMap::new();
    for (j, n) in read.header.iter().enumerate() {
        if seen.insert(n.as_str(), j).is_some() {
            return Err(at_cell(
                path,
                read.header_at[j].clone(),
                InputProblem::DuplicateHeaderNames {
                    names: vec![n.clone()],
                },
            ));
        }
    }
    Ok(())
}

fn check_key(path: &Path, read: &Read, key: &[String], null_tokens: &[String]) -> Result<()> {
    let missing: Vec<String> = key
        .iter()
        .filter(|k| !read.header.contains(k))
        .cloned()
        .collect();
    if !missing.is_empty() {
        return Err(Error::input(
            path,
            None,
            InputProblem::UnknownKeyColumns {
                missing,
                available: read.header.clone(),
            },
        ));
    }
    let idx: Vec<usize> = key
        .iter()
        .filter_map(|k| read.header.iter().position(|h| h == k))
        .collect();
    let mut seen: HashMap<Vec<&str>, Vec<usize>> = HashMap::new();
    for (i, row) in read.rows.iter().enumerate() {
        for &c in &idx {
            let v = &row[c];
            if v.is_empty() || null_tokens.contains(v) {
                return Err(at_cell(
                    path,
                    (read.cell_name)(c, i),
                    InputProblem::BlankKey {
                        column: read.header[c].clone(),
                    },
                ));
            }
        }
        seen.entry(idx.iter().map(|&c| row[c].as_str()).collect())
            .or_default()
            .push(i);
    }
    let mut dups: Vec<(String, Vec<usize>)> = seen
        .into_iter()
        .filter(|(_, rows)| rows.len() > 1)
        .map(|(k, rows)| (k.join(", "), rows))
        .collect();
    if dups.is_empty() {
        return Ok(());
    }
    dups.sort_by(|a, b| a.1.cmp(&b.1));
    let total = dups.len() as u64;
    dups.truncate(10);
    // Where each occurrence is: the cell of the key's first column, or the line.
    let examples = dups
        .into_iter()
        .map(|(k, rows)| {
            let at = rows
                .into_iter()
                .map(|i| {
                    if read.by_cell {
                        (read.cell_name)(idx[0], i)
                    } else {
                        format!("line {}", read.source_rows[i])
                    }
                })
                .collect();
            (k, at)
        })
        .collect();
    Err(Error::input(
        path,
        None,
        InputProblem::DuplicateKeysAt { examples, total },
    ))
}

/// The table in `bytes`, its header checked.
fn read_table(
    bytes: &[u8],
    path: &Path,
    format: SourceFormat,
    sheet: Option<&str>,
    has_header: bool,
) -> Result<Read> {
    let read = match format {
        SourceFormat::Workbook(_) => {
            from_sheet(sheets::read_sheet(bytes, path, sheet)?, has_header)
        }
        SourceFormat::JsonLines => from_lines(jsonl::read(bytes, path)?),
        SourceFormat::Columnar(f) => from_columnar(columnar::read(bytes, path, f)?, f),
    };
    if read.header.is_empty() {
        return Err(Error::input(path, None, InputProblem::NoHeader));
    }
    check_header(path, &read)?;
    Ok(read)
}

/// Writes the table as a version's objects (not yet durable).
fn write_table(
    store: &Store,
    read: &Read,
    null_tokens: &[String],
) -> Result<crate::store::version_writer::Written> {
    let store_io = |e: std::io::Error| Error::io(&store.dir().join("tmp"), e);
    let mut writer =
        CanonicalWriter::new(&store.objects, &read.header, null_tokens).map_err(store_io)?;
    let mut fields: Vec<&[u8]> = Vec::with_capacity(read.header.len());
    for row in &read.rows {
        fields.clear();
        fields.extend(row.iter().map(|c| c.as_bytes()));
        writer.write_row(&fields).map_err(store_io)?;
    }
    writer.finish().map_err(store_io)
}

/// Reads a columnar file batch by batch into a version's objects (not yet durable): the header
/// checked before any row is written, each batch's rows written as they are read, so memory
/// holds one batch as text; the `Read` it returns has no rows (its source rows are counted).
fn stream_columnar(
    store: &Store,
    bytes: &[u8],
    path: &Path,
    format: ColumnarFormat,
    null_tokens: &[String],
) -> Result<(Read, crate::store::version_writer::Written)> {
    let store_io = |e: std::io::Error| Error::io(&store.dir().join("tmp"), e);
    let writer: std::cell::RefCell<Option<CanonicalWriter>> = std::cell::RefCell::new(None);
    let mut n_rows = 0u64;
    let described = columnar::read_batches(
        bytes,
        path,
        format,
        &mut |t| {
            let named = from_columnar(
                columnar::ColumnarTable {
                    header: t.header.clone(),
                    ..columnar::ColumnarTable::default()
                },
                format,
            );
            if named.header.is_empty() {
                return Err(Error::input(path, None, InputProblem::NoHeader));
            }
            check_header(path, &named)?;
            let w =
                CanonicalWriter::new(&store.objects, &t.header, null_tokens).map_err(store_io)?;
            *writer.borrow_mut() = Some(w);
            Ok(())
        },
        &mut |rows| {
            let mut w = writer.borrow_mut();
            let w = w.as_mut().ok_or_else(|| {
                Error::from(ErrorKind::Internal(
                    "columnar rows came before the header".into(),
                ))
            })?;
            let mut fields: Vec<&[u8]> = Vec::new();
            for row in rows {
                fields.clear();
                fields.extend(row.iter().map(|c| c.as_bytes()));
                w.write_row(&fields).map_err(store_io)?;
            }
            n_rows += rows.len() as u64;
            Ok(())
        },
    )?;
    let written = writer
        .into_inner()
        .ok_or_else(|| {
            Error::from(ErrorKind::Internal(
                "a columnar file without a header".into(),
            ))
        })?
        .finish()
        .map_err(store_io)?;
    let mut read = from_columnar(described, format);
    read.source_rows = (1..=n_rows).collect();
    Ok((read, written))
}

/// Converts the raw object of a converted intake again, as `step` recorded it (format, sheet,
/// header, null tokens), and returns the hash of the version that gives; nothing is kept.
pub fn convert_again(store: &Store, step: &Step, conv: &Conversion) -> Result<String> {
    let broken = |what: String| -> Error {
        ErrorKind::Inconsistent(format!(
            "step {} records a conversion that {what}; run `sluice verify`",
            step.id
        ))
        .into()
    };
    let format = match conv.format.as_str() {
        "xlsx" => SourceFormat::Workbook(WorkbookFormat::Xlsx),
        "ods" => SourceFormat::Workbook(WorkbookFormat::Ods),
        "jsonl" => SourceFormat::JsonLines,
        "parquet" => SourceFormat::Columnar(ColumnarFormat::Parquet),
        "arrow" => SourceFormat::Columnar(ColumnarFormat::ArrowIpc),
        other => return Err(broken(format!("names an unknown format \"{other}\""))),
    };
    let hash = conv
        .raw
        .hash
        .parse()
        .map_err(|e: String| broken(format!("names a malformed raw object ({e})")))?;
    let bytes = store.objects.read_all(&hash)?;
    let here = PathBuf::from(format!("raw object {}", &conv.raw.hash));
    let has_header = step
        .params
        .get("has_header")
        .and_then(|h| h.as_bool())
        .unwrap_or(true);
    let null_tokens: Vec<String> = step
        .params
        .get("null_tokens")
        .and_then(|n| serde_json::from_value(n.clone()).ok())
        .unwrap_or_default();
    let written = match format {
        SourceFormat::Columnar(f) => stream_columnar(store, &bytes, &here, f, &null_tokens)?.1,
        _ => {
            let read = read_table(&bytes, &here, format, conv.sheet.as_deref(), has_header)?;
            write_table(store, &read, &null_tokens)?
        }
    };
    Ok(written.table.hash().hex())
}

/// Reads the file at `path` in `format`, stores its bytes as the raw object and writes the table
/// read from it as the dataset's next version, without recording anything yet.
pub fn prepare(
    store: &Store,
    path: &Path,
    opts: &IngestOptions,
    source: &SourceOptions,
    format: SourceFormat,
) -> Result<Prepared> {
    let what = format.as_str();
    if opts.delimiter.is_some() || opts.encoding.is_some() {
        return Err(Error::usage(format!(
            "--delimiter and --encoding are for delimited text; {} is read as {what} by its extension",
            path.display()
        )));
    }
    if let SourceFormat::Columnar(f) = format {
        if source.sheet.is_some() {
            return Err(Error::usage(format!(
                "--sheet is for workbooks (.xlsx, .xlsm, .ods); this file is {}",
                f.title()
            )));
        }
        if !opts.has_header {
            return Err(Error::usage(format!(
                "--no-header does not apply to {}: the file's schema names the columns",
                f.title()
            )));
        }
    }
    if format == SourceFormat::JsonLines {
        if source.sheet.is_some() {
            return Err(Error::usage(
                "--sheet is for workbooks (.xlsx, .xlsm, .ods); this file is JSON Lines",
            ));
        }
        if !opts.has_header {
            return Err(Error::usage(
                "--no-header does not apply to JSON Lines: the keys name the columns",
            ));
        }
    }
    let meta_before = fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta_before.is_dir() {
        return Err(ErrorKind::IsDirectory {
            path: path.to_path_buf(),
        }
        .into());
    }
    if meta_before.len() == 0 {
        return Err(Error::input(path, None, InputProblem::Empty));
    }
    // Both forms are read whole: a file past its bound is refused before it is read.
    match format {
        SourceFormat::JsonLines if meta_before.len() > jsonl::MAX_JSONL_BYTES => {
            return Err(Error::input(
                path,
                None,
                InputProblem::LinesTooLarge {
                    size: meta_before.len(),
                    limit: jsonl::MAX_JSONL_BYTES,
                },
            ));
        }
        SourceFormat::Workbook(_) if meta_before.len() > sheets::MAX_WORKBOOK_XML_BYTES => {
            return Err(Error::input(
                path,
                None,
                InputProblem::WorkbookTooLarge {
                    detail: format!(
                        "the file is {} bytes, more than the {} MiB its parts may decompress to (the bound for a workbook, which is read whole); export the sheet as CSV and take that in",
                        meta_before.len(),
                        sheets::MAX_WORKBOOK_XML_BYTES >> 20
                    ),
                },
            ));
        }
        _ => {}
    }
    let started_at = clock::now_rfc3339();
    let bytes = fs::read(path).map_err(|e| Error::io(path, e))?;
    let meta_after = fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if bytes.len() as u64 != meta_before.len()
        || meta_after.len() != meta_before.len()
        || meta_after.modified().ok() != meta_before.modified().ok()
    {
        return Err(Error::input(path, None, InputProblem::ChangedWhileReading));
    }
    // Without a key to check across all rows, a columnar file is converted batch by batch.
    let (mut read, streamed) = match format {
        SourceFormat::Columnar(f) if opts.key.is_none() => {
            let (read, written) = stream_columnar(store, &bytes, path, f, &opts.null_tokens)?;
            (read, Some(written))
        }
        _ => (
            read_table(
                &bytes,
                path,
                format,
                source.sheet.as_deref(),
                opts.has_header,
            )?,
            None,
        ),
    };
    if read.source_rows.is_empty() {
        read.warnings.push(no_rows_warning(path, read.header.len()));
    }
    if let Some(key) = &opts.key {
        if key.is_empty() || key.iter().any(|c| c.is_empty()) {
            return Err(Error::usage(
                "--key needs one or more column names separated by commas, e.g. --key order_id",
            ));
        }
        check_key(path, &read, key, &opts.null_tokens)?;
    }

    let store_io = |e: std::io::Error| Error::io(&store.dir().join("tmp"), e);
    let mut raw = store.objects.writer().map_err(store_io)?;
    raw.write(&bytes).map_err(store_io)?;
    let written = match streamed {
        Some(w) => w,
        None => write_table(store, &read, &opts.null_tokens)?,
    };
    let table_hex = written.table.hash().hex();
    if let Some(v) = store.lineage.latest_version(&opts.dataset)? {
        if v.hash == table_hex {
            return Ok(Prepared::Unchanged(Box::new(v)));
        }
    }

    let mut convert = read.record;
    if let Some(map) = convert.as_object_mut() {
        map.insert(
            "raw".into(),
            json!({"hash": raw.hash().hex(), "n_bytes": raw.n_bytes()}),
        );
        map.insert("rows".into(), json!(runs(&read.source_rows)));
    }
    let params = json!({
        "convert": convert,
        "has_header": opts.has_header,
        "key": opts.key,
        "null_tokens": opts.null_tokens,
    });
    let source = SourceFile {
        path: path.display().to_string(),
        // The file's real path, without `.` or `..` (`plans/../data/x.csv` is `data/x.csv`).
        absolute_path: std::fs::canonicalize(path)
            .or_else(|_| std::path::absolute(path))
            .unwrap_or_else(|_| PathBuf::from(path))
            .display()
            .to_string(),
        n_bytes: bytes.len() as u64,
        modified: meta_before.modified().ok().map(clock::format_rfc3339),
    };
    Ok(Prepared::Ready(Box::new(PreparedIngest::converted(
        opts,
        path,
        started_at,
        source,
        params,
        raw,
        written,
        read.header,
        read.warnings,
    ))))
}

/// The first bytes of an OLE2 Compound File (the container of legacy `.xls` workbooks, and of
/// encrypted `.xlsx` ones), from the format's published specification ([MS-CFB] 2.2).
const COMPOUND_FILE: [u8; 8] = [0xD0, 0xCF, 0x11, 0xE0, 0xA1, 0xB1, 0x1A, 0xE1];

/// What a file's first bytes and name say before it is read as a table: a legacy binary
/// workbook (or an encrypted one) and a binary `.xlsb` workbook are refused by name, as are an
/// HTML or XML page saved under a spreadsheet's name; a text file named `.xls` is read as
/// delimited text, with a note saying so (returned).
pub fn check_named_format(path: &Path) -> Result<Vec<String>> {
    let mut head = [0u8; 8];
    if !fs::metadata(path).is_ok_and(|m| m.is_file()) {
        // Left to the reader, which names the problem in its own words.
        return Ok(Vec::new());
    }
    let n = match fs::File::open(path) {
        Ok(mut f) => {
            use std::io::Read as _;
            let mut n = 0;
            while n < head.len() {
                match f.read(&mut head[n..]) {
                    Ok(0) => break,
                    Ok(k) => n += k,
                    Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                    Err(_) => return Ok(Vec::new()),
                }
            }
            n
        }
        // Left to the reader, which names the problem in its own words.
        Err(_) => return Ok(Vec::new()),
    };
    let head = &head[..n];
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .unwrap_or_default();
    let name = path.display();
    if head == COMPOUND_FILE {
        return Err(Error::usage(format!(
            "{name} is a legacy binary Excel workbook (the Compound File format of .xls, also used \
             for password-protected workbooks), which sluice does not read; open it in a spreadsheet \
             program and save it as .xlsx (without a password) or export the sheet as CSV, then take \
             that file in"
        )));
    }
    if ext == "xlsb" {
        return Err(Error::usage(format!(
            "{name} is a binary Excel workbook (.xlsb), which sluice does not read; save it as .xlsx \
             or export the sheet as CSV, then take that file in"
        )));
    }
    if ext == "xls" {
        let text = String::from_utf8_lossy(head)
            .trim_start()
            .to_ascii_lowercase();
        if text.starts_with('<') {
            return Err(Error::usage(format!(
                "{name} is named .xls but holds a web page or XML (some systems export HTML under a \
                 spreadsheet's name), not a table sluice reads; open it in a spreadsheet program and \
                 save it as .xlsx or CSV, then take that file in"
            )));
        }
        if head.starts_with(b"PK") {
            return Err(Error::usage(format!(
                "{name} is named .xls but holds a zip container (probably an .xlsx workbook); rename \
                 it to .xlsx and take it in again"
            )));
        }
        return Ok(vec![format!(
            "{name} is named .xls but holds text, not a workbook: it was read as delimited text; \
             check the delimiter and columns below (rename it to .csv or .tsv to say so)"
        )]);
    }
    Ok(Vec::new())
}

/// The warning for a table with a header and no data rows.
pub fn no_rows_warning(path: &Path, n_columns: usize) -> String {
    format!(
        "{} has a header and no data rows: recorded as an empty table of {n_columns} column{}; if \
         rows were expected, check the export (a filter, an empty sheet, the wrong file)",
        path.display(),
        if n_columns == 1 { "" } else { "s" }
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn row_map_runs_and_lookup() {
        let r = runs(&[2, 3, 4, 6, 7, 10]);
        assert_eq!(r, vec![[1, 2, 3], [4, 6, 2], [6, 10, 1]]);
        let c = Conversion {
            format: "xlsx".into(),
            raw: RawObject {
                hash: String::new(),
                n_bytes: 0,
            },
            sheet: None,
            columns: None,
            rows: r,
            groups: None,
        };
        let back: Vec<Option<u64>> = (0..7).map(|i| c.source_row(i)).collect();
        assert_eq!(
            back,
            vec![Some(2), Some(3), Some(4), Some(6), Some(7), Some(10), None]
        );
    }
}
