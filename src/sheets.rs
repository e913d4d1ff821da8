//! Workbooks: reading one sheet of an Office Open XML workbook (`.xlsx`, `.xlsm`; ECMA-376) or
//! an OpenDocument spreadsheet (`.ods`; OASIS ODF) into text cells, and reading one stored cell
//! back for a trail.
//!
//! The reading itself is calamine's (a maintained, pure-Rust reader of both formats, with the
//! cached results of formulas and the workbook's date system); this module owns what sluice
//! makes of each cell, so that the same workbook always gives the same table:
//!
//! - text as it is; a boolean as `true` or `false`; an empty cell as an empty field;
//! - a number as the shortest decimal that reads back as the same IEEE 754 binary64 value the
//!   workbook holds (xlsx writes numbers as decimal text of a binary64, so for a file written by
//!   a spreadsheet program this is the text in the file; an ODS writer's trailing zeros, as in
//!   `12.50`, are not kept, and digits beyond binary64's 17 significant ones were never there
//!   to keep), with no exponent and no number format applied;
//! - a cell formatted as a date or time (xlsx: a serial day number in the 1900 or 1904 date
//!   system) as ISO 8601: `YYYY-MM-DD` for a whole day, `YYYY-MM-DDTHH:MM:SS[.mmm]` with a time,
//!   `HH:MM:SS[.mmm]` for a time without a day, a duration format as `PT..H..M..S`; ODS dates
//!   and times are ISO 8601 in the file already and are kept as written;
//! - a formula as its cached result (the value the program that saved the file computed; sluice
//!   computes nothing), each one listed with its cell and text in the step record;
//! - an error value (`#DIV/0!`, `#N/A`, ...) as its text, listed and warned about.

use std::io::Cursor;
use std::path::Path;

use calamine::{open_workbook_auto_from_rs, Data, Range, Reader, Sheets};
use serde::Serialize;

use crate::error::{Error, InputProblem, Result};

/// The workbook formats sluice reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WorkbookFormat {
    Xlsx,
    Ods,
}

impl WorkbookFormat {
    pub fn as_str(self) -> &'static str {
        match self {
            WorkbookFormat::Xlsx => "xlsx",
            WorkbookFormat::Ods => "ods",
        }
    }
}

/// A formula cell: where it is, its text, and the cached result that was taken in.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct FormulaCell {
    pub cell: String,
    pub formula: String,
    pub value: String,
}

/// One sheet read into text cells.
#[derive(Debug, Clone)]
pub struct SheetTable {
    pub format: WorkbookFormat,
    pub sheet: String,
    /// 1-based position of the sheet in the workbook.
    pub sheet_index: usize,
    pub sheets: Vec<String>,
    /// The used range's first row and column (0-based), where the header (or first row) is.
    pub first_row: u32,
    pub first_col: u32,
    /// Every row of the used range, in order, each as wide as the range (empty rows included).
    pub rows: Vec<Vec<String>>,
    pub formulas: Vec<FormulaCell>,
    /// Error values: (cell, text).
    pub errors: Vec<(String, String)>,
    /// How many cells of each kind were read: number, date, text, boolean, blank, error.
    pub kinds: [u64; 6],
}

/// Names of [`SheetTable::kinds`], in order.
pub const KIND_NAMES: [&str; 6] = ["number", "date", "text", "boolean", "blank", "error"];

/// A cell as the workbook stores it, for the end of a trail.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct StoredCell {
    /// `Sheet1!C7` (the sheet name in single quotes when it needs them).
    pub reference: String,
    /// The value in the workbook: a number's or date serial's decimal text, the text, ...
    pub stored: String,
    /// number, date, text, boolean, blank or error.
    pub kind: String,
    pub formula: Option<String>,
}

/// The format a file name says, if it is a workbook.
pub fn format_of(path: &Path) -> Option<WorkbookFormat> {
    let ext = path.extension()?.to_str()?.to_ascii_lowercase();
    match ext.as_str() {
        "xlsx" | "xlsm" => Some(WorkbookFormat::Xlsx),
        "ods" => Some(WorkbookFormat::Ods),
        _ => None,
    }
}

/// Column letters of a 0-based column: 0 → A, 25 → Z, 26 → AA.
pub fn column_letters(col: u32) -> String {
    let mut n = col as u64 + 1;
    let mut out = Vec::new();
    while n > 0 {
        let r = ((n - 1) % 26) as u8;
        out.push(b'A' + r);
        n = (n - 1) / 26;
    }
    out.reverse();
    String::from_utf8(out).unwrap_or_default()
}

/// The 0-based column of column letters (`A` → 0), if they are letters.
pub fn column_number(letters: &str) -> Option<u32> {
    if letters.is_empty() || letters.len() > 7 {
        return None;
    }
    let mut n: u64 = 0;
    for b in letters.bytes() {
        if !b.is_ascii_uppercase() {
            return None;
        }
        n = n * 26 + (b - b'A' + 1) as u64;
    }
    u32::try_from(n - 1).ok()
}

/// `A1`-style reference of a 0-based row and column, with its sheet: `Sheet1!C7`, or
/// `'Work orders'!C7` when the name holds anything but letters, digits and `_` (an inner `'`
/// doubled), as spreadsheet programs write references (common practice).
pub fn cell_ref(sheet: &str, row: u32, col: u32) -> String {
    let plain = !sheet.is_empty()
        && sheet.chars().all(|c| c.is_alphanumeric() || c == '_')
        && !sheet.starts_with(|c: char| c.is_ascii_digit());
    let name = if plain {
        sheet.to_string()
    } else {
        format!("'{}'", sheet.replace('\'', "''"))
    };
    format!("{name}!{}{}", column_letters(col), row as u64 + 1)
}

/// The most bytes a workbook's parts may decompress to, all parts together: 128 MiB. A
/// workbook is read whole (calamine builds the sheet in memory), so a small file whose XML
/// inflates to gigabytes is refused before it is read; a sheet this large belongs in a CSV
/// export, which intake reads as a stream.
pub const MAX_WORKBOOK_XML_BYTES: u64 = 128 << 20;

/// The most cells a sheet may span (its used range, rows times columns, for .xlsx also the
/// cells written): 1,000,000.
pub const MAX_SHEET_CELLS: u64 = 1_000_000;

/// The most cells all the sheets of an .ods may span together: 4,000,000. An .ods is read
/// with all its sheets at once (they share one part, `content.xml`), so each sheet's bound
/// alone would not bound the whole.
pub const MAX_ODS_CELLS: u64 = 4 * MAX_SHEET_CELLS;

/// Measures the workbook's parts as they decompress (never trusting the sizes the archive
/// declares) and, for .xlsx, the cells of every sheet and the range they span; refuses a
/// workbook past [`MAX_WORKBOOK_XML_BYTES`] or a sheet past [`MAX_SHEET_CELLS`]. Memory: one
/// 64 KiB buffer.
fn check_bounds(bytes: &[u8], path: &Path) -> Result<()> {
    use std::io::Read;
    let refuse =
        |detail: String| Error::input(path, None, InputProblem::WorkbookTooLarge { detail });
    // Not a zip archive: calamine names the problem.
    let Ok(mut zip) = zip::ZipArchive::new(Cursor::new(bytes)) else {
        return Ok(());
    };
    let mut total = 0u64;
    let mut buf = vec![0u8; 64 * 1024];
    for i in 0..zip.len() {
        let Ok(mut part) = zip.by_index(i) else {
            return Ok(());
        };
        let name = part.name().to_string();
        let sheet = name.starts_with("xl/worksheets/") && name.ends_with(".xml");
        let mut cells = CellCount::default();
        let mut ods = (name == "content.xml").then(OdsCount::default);
        loop {
            let n = match part.read(&mut buf) {
                Ok(0) => break,
                Ok(n) => n,
                // A damaged part: calamine names the problem.
                Err(_) => return Ok(()),
            };
            total += n as u64;
            if total > MAX_WORKBOOK_XML_BYTES {
                return Err(refuse(format!(
                    "its parts decompress to more than {} MiB (the bound for a workbook, which is read whole); export the sheet as CSV and take that in",
                    MAX_WORKBOOK_XML_BYTES >> 20
                )));
            }
            if sheet {
                cells.push(&buf[..n]);
                if let Some(why) = cells.over() {
                    return Err(refuse(format!(
                        "{name}: {why}, more than the {MAX_SHEET_CELLS} cells a sheet may span; export the sheet as CSV and take that in"
                    )));
                }
            }
            if let Some(ods) = &mut ods {
                ods.push(&buf[..n], false);
                if let Some(why) = ods.over() {
                    return Err(refuse(why));
                }
            }
        }
        if let Some(ods) = &mut ods {
            ods.push(&[], true);
            if let Some(why) = ods.over() {
                return Err(refuse(why));
            }
        }
    }
    Ok(())
}

/// Counts, in an .ods `content.xml` fed piece by piece, the cells each sheet (`table:table`)
/// spans once its repeated rows and columns (`table:number-rows-repeated`,
/// `table:number-columns-repeated`) are expanded, as the reader expands them: from the first
/// to the last row that holds a value, by the columns from the first to the last cell that
/// holds one. Empty rows and cells repeated past the last value (spreadsheet programs write
/// the rest of the grid that way) span nothing. A cell holds a value when it names a value
/// type or a formula, or has content (it is not written as an empty element).
#[derive(Default)]
struct OdsCount {
    /// The end of the last piece, for a tag cut between two pieces.
    carry: Vec<u8>,
    /// The current sheet's name, its span so far and the rows read in it.
    sheet: String,
    rows_read: u64,
    first_row: Option<u64>,
    rows_end: u64,
    cols: Option<(u64, u64)>,
    /// The current row: its repeat count, the columns read in it, the span of its values.
    row_repeat: u64,
    col: u64,
    row_cols: Option<(u64, u64)>,
    /// The spans of the sheets already read.
    done: u64,
    over: Option<String>,
}

/// An attribute's number in a tag (`table:number-rows-repeated="12"`); 1 when absent.
fn repeat_of(tag: &[u8], attr: &[u8]) -> u64 {
    let Some(at) = memchr::memmem::find(tag, attr) else {
        return 1;
    };
    let rest = &tag[at + attr.len()..];
    let rest = rest
        .strip_prefix(b"=\"")
        .or_else(|| rest.strip_prefix(b"='"))
        .unwrap_or(rest);
    let digits = rest.iter().take_while(|b| b.is_ascii_digit()).count();
    std::str::from_utf8(&rest[..digits])
        .ok()
        .and_then(|d| d.parse::<u64>().ok())
        .unwrap_or(u64::MAX)
        .max(1)
}

impl OdsCount {
    /// The longest tag looked at; attributes past it are not read.
    const TAG: usize = 4096;

    fn span(&self) -> u64 {
        match (self.first_row, self.cols) {
            (Some(r0), Some((c0, c1))) => (self.rows_end - r0).saturating_mul(c1 - c0),
            _ => 0,
        }
    }

    fn push(&mut self, piece: &[u8], last: bool) {
        let mut text = std::mem::take(&mut self.carry);
        text.extend_from_slice(piece);
        // Tags that start near the end are read with the next piece.
        let done = if last {
            text.len()
        } else {
            text.len().saturating_sub(Self::TAG)
        };
        let mut at = 0usize;
        while let Some(i) = memchr::memchr(b'<', &text[at..]) {
            let p = at + i;
            if p >= done {
                break;
            }
            at = p + 1;
            let window = &text[p..text.len().min(p + Self::TAG)];
            let tag = match memchr::memchr(b'>', window) {
                Some(e) => &window[..=e],
                None => window,
            };
            self.tag(tag);
            if self.over.is_some() {
                return;
            }
        }
        self.carry = text[done..].to_vec();
    }

    fn tag(&mut self, tag: &[u8]) {
        let named = |name: &[u8]| {
            tag.strip_prefix(name).is_some_and(|r| {
                matches!(r.first(), Some(b' ' | b'>' | b'/' | b'\t' | b'\n' | b'\r'))
            })
        };
        if named(b"<table:table") {
            self.done = self.done.saturating_add(self.span());
            self.sheet = String::from_utf8_lossy(
                memchr::memmem::find(tag, b"table:name=\"")
                    .map(|i| {
                        let v = &tag[i + 12..];
                        &v[..memchr::memchr(b'"', v).unwrap_or(v.len())]
                    })
                    .unwrap_or(b""),
            )
            .into_owned();
            self.rows_read = 0;
            self.first_row = None;
            self.rows_end = 0;
            self.cols = None;
        } else if named(b"<table:table-row") {
            self.row_repeat = repeat_of(tag, b"table:number-rows-repeated");
            self.col = 0;
            self.row_cols = None;
            if tag.ends_with(b"/>") {
                self.row_end();
            }
        } else if tag.starts_with(b"</table:table-row") {
            self.row_end();
        } else if named(b"<table:table-cell") || named(b"<table:covered-table-cell") {
            let n = repeat_of(tag, b"table:number-columns-repeated");
            let value = !tag.ends_with(b"/>")
                || memchr::memmem::find(tag, b"office:value-type").is_some()
                || memchr::memmem::find(tag, b"table:formula").is_some();
            if value {
                let (c0, _) = self.row_cols.unwrap_or((self.col, self.col));
                self.row_cols = Some((c0, self.col.saturating_add(n)));
            }
            self.col = self.col.saturating_add(n);
        }
    }

    fn row_end(&mut self) {
        let n = self.row_repeat.max(1);
        if let Some((c0, c1)) = self.row_cols.take() {
            self.first_row.get_or_insert(self.rows_read);
            self.rows_end = self.rows_read.saturating_add(n);
            self.cols = Some(match self.cols {
                Some((a, b)) => (a.min(c0), b.max(c1)),
                None => (c0, c1),
            });
        }
        self.rows_read = self.rows_read.saturating_add(n);
        let span = self.span();
        if span > MAX_SHEET_CELLS {
            let rows = self.rows_end - self.first_row.unwrap_or(0);
            let cols = self.cols.map_or(0, |(a, b)| b - a);
            self.over = Some(format!(
                "content.xml: sheet \"{}\" spans {rows} rows by {cols} columns ({span} cells) once its repeated rows and columns are expanded, more than the {MAX_SHEET_CELLS} cells a sheet may span; export the sheet as CSV and take that in",
                self.sheet
            ));
        } else if self.done.saturating_add(span) > MAX_ODS_CELLS {
            self.over = Some(format!(
                "content.xml: its sheets span more than {MAX_ODS_CELLS} cells together once their repeated rows and columns are expanded (an .ods is read with all its sheets); export the sheet as CSV and take that in"
            ));
        }
    }

    fn over(&self) -> Option<String> {
        self.over.clone()
    }
}

/// Counts the cells (`<c ` elements) of a worksheet's XML fed piece by piece, and the range
/// their references (`r="B7"`) span.
#[derive(Default)]
struct CellCount {
    cells: u64,
    /// The end of the last piece, for a tag cut between two pieces.
    carry: Vec<u8>,
    rows: Option<(u32, u32)>,
    cols: Option<(u32, u32)>,
}

impl CellCount {
    fn push(&mut self, piece: &[u8]) {
        let mut text = std::mem::take(&mut self.carry);
        text.extend_from_slice(piece);
        // Tags that start in the last 64 bytes are read with the next piece.
        let done = text.len().saturating_sub(64);
        for at in memchr::memmem::find_iter(&text, b"<c ") {
            if at >= done {
                break;
            }
            self.cells += 1;
            let tag = &text[at..text.len().min(at + 64)];
            let Some(r) = memchr::memmem::find(tag, b" r=\"") else {
                continue;
            };
            let refs = &tag[r + 4..];
            let letters = refs.iter().take_while(|b| b.is_ascii_uppercase()).count();
            let digits = refs[letters..]
                .iter()
                .take_while(|b| b.is_ascii_digit())
                .count();
            let col = std::str::from_utf8(&refs[..letters])
                .ok()
                .and_then(column_number);
            let row = std::str::from_utf8(&refs[letters..letters + digits])
                .ok()
                .and_then(|d| d.parse::<u32>().ok());
            if let (Some(c), Some(r)) = (col, row) {
                let widen = |span: Option<(u32, u32)>, x: u32| {
                    Some(span.map_or((x, x), |(a, b)| (a.min(x), b.max(x))))
                };
                self.rows = widen(self.rows, r);
                self.cols = widen(self.cols, c);
            }
        }
        self.carry = text[done..].to_vec();
    }

    fn over(&self) -> Option<String> {
        if self.cells > MAX_SHEET_CELLS {
            return Some(format!("it writes {} cells or more", self.cells));
        }
        if let (Some((r0, r1)), Some((c0, c1))) = (self.rows, self.cols) {
            let span = u64::from(r1 - r0 + 1) * u64::from(c1 - c0 + 1);
            if span > MAX_SHEET_CELLS {
                return Some(format!(
                    "its cells span {} rows by {} columns ({span} cells)",
                    r1 - r0 + 1,
                    c1 - c0 + 1
                ));
            }
        }
        None
    }
}

fn open<'a>(bytes: &'a [u8], path: &Path) -> Result<Sheets<Cursor<&'a [u8]>>> {
    check_bounds(bytes, path)?;
    open_workbook_auto_from_rs(Cursor::new(bytes)).map_err(|e| {
        Error::input(
            path,
            None,
            InputProblem::UnreadableWorkbook {
                detail: e.to_string(),
            },
        )
    })
}

/// Which sheet `pick` names (a name, or a 1-based position), or the only one.
fn choose(sheets: &[String], pick: Option<&str>, path: &Path) -> Result<(usize, String)> {
    let problem = match pick {
        None if sheets.len() == 1 => return Ok((0, sheets[0].clone())),
        None => InputProblem::SheetNeeded {
            sheets: sheets.to_vec(),
        },
        Some(p) => {
            if let Some(i) = sheets.iter().position(|s| s == p) {
                return Ok((i, p.to_string()));
            }
            if let Ok(n) = p.parse::<usize>() {
                if n >= 1 && n <= sheets.len() {
                    return Ok((n - 1, sheets[n - 1].clone()));
                }
            }
            InputProblem::NoSuchSheet {
                wanted: p.to_string(),
                sheets: sheets.to_vec(),
            }
        }
    };
    Err(Error::input(path, None, problem))
}

/// Reads the sheet `pick` names (default: the only sheet) of the workbook in `bytes`.
pub fn read_sheet(bytes: &[u8], path: &Path, pick: Option<&str>) -> Result<SheetTable> {
    let mut book = open(bytes, path)?;
    let format = match &book {
        Sheets::Xlsx(_) => WorkbookFormat::Xlsx,
        Sheets::Ods(_) => WorkbookFormat::Ods,
        _ => {
            return Err(Error::input(
                path,
                None,
                InputProblem::UnreadableWorkbook {
                    detail: "a legacy binary workbook (xls or xlsb); save it as .xlsx or .ods"
                        .into(),
                },
            ))
        }
    };
    let sheets = book.sheet_names();
    if sheets.is_empty() {
        return Err(Error::input(
            path,
            None,
            InputProblem::UnreadableWorkbook {
                detail: "the workbook has no sheet".into(),
            },
        ));
    }
    let (index, sheet) = choose(&sheets, pick, path)?;
    let unreadable = |e: calamine::Error| {
        Error::input(
            path,
            None,
            InputProblem::UnreadableWorkbook {
                detail: format!("sheet {sheet}: {e}"),
            },
        )
    };
    let range = book.worksheet_range(&sheet).map_err(unreadable)?;
    let formulas = book.worksheet_formula(&sheet).unwrap_or_default();
    let (Some((r0, c0)), Some((r1, c1))) = (range.start(), range.end()) else {
        return Err(Error::input(
            path,
            None,
            InputProblem::EmptySheet {
                sheet: sheet.clone(),
            },
        ));
    };
    let mut table = SheetTable {
        format,
        sheet: sheet.clone(),
        sheet_index: index + 1,
        sheets,
        first_row: r0,
        first_col: c0,
        rows: Vec::with_capacity((r1 - r0 + 1) as usize),
        formulas: Vec::new(),
        errors: Vec::new(),
        kinds: [0; 6],
    };
    for r in r0..=r1 {
        let mut row = Vec::with_capacity((c1 - c0 + 1) as usize);
        for c in c0..=c1 {
            let data = range.get_value((r, c)).unwrap_or(&Data::Empty);
            let (text, kind) = cell_text(data);
            table.kinds[kind] += 1;
            if kind == 5 {
                table.errors.push((cell_ref(&sheet, r, c), text.clone()));
            }
            if let Some(f) = formula_at(&formulas, r, c) {
                table.formulas.push(FormulaCell {
                    cell: cell_ref(&sheet, r, c),
                    formula: f,
                    value: text.clone(),
                });
            }
            row.push(text);
        }
        table.rows.push(row);
    }
    // Formulas outside the value range (a formula whose cached result is missing).
    if let (Some((fr0, fc0)), Some((fr1, fc1))) = (formulas.start(), formulas.end()) {
        for r in fr0..=fr1 {
            for c in fc0..=fc1 {
                let inside = (r0..=r1).contains(&r) && (c0..=c1).contains(&c);
                if !inside {
                    if let Some(f) = formula_at(&formulas, r, c) {
                        table.formulas.push(FormulaCell {
                            cell: cell_ref(&sheet, r, c),
                            formula: f,
                            value: String::new(),
                        });
                    }
                }
            }
        }
    }
    Ok(table)
}

fn formula_at(formulas: &Range<String>, r: u32, c: u32) -> Option<String> {
    formulas
        .get_value((r, c))
        .filter(|f| !f.is_empty())
        .cloned()
}

/// A number as the shortest decimal that reads back as the same binary64, without exponent.
pub fn number_text(x: f64) -> String {
    if x == 0.0 {
        // Negative zero is zero.
        return "0".into();
    }
    // Rust's Display for f64 is the shortest round-trip form and never uses an exponent.
    format!("{x}")
}

/// The text sluice takes a cell in as, and its kind (an index into [`KIND_NAMES`]).
pub fn cell_text(data: &Data) -> (String, usize) {
    match data {
        Data::Empty => (String::new(), 4),
        Data::String(s) => (s.clone(), 2),
        Data::Int(i) => (i.to_string(), 0),
        Data::Float(x) => (number_text(*x), 0),
        Data::Bool(b) => ((if *b { "true" } else { "false" }).into(), 3),
        Data::DateTimeIso(s) => (s.clone(), 1),
        Data::DurationIso(s) => (s.clone(), 1),
        Data::Error(e) => (e.to_string(), 5),
        Data::DateTime(dt) => {
            if dt.is_duration() {
                return (iso_duration(dt.as_f64()), 1);
            }
            let serial = dt.as_f64();
            let (y, mo, d, h, mi, s, ms) = dt.to_ymd_hms_milli();
            if y == 1900 && mo == 2 && d == 29 {
                // Day 60 of the 1900 date system is a day that never was (kept from an old
                // spreadsheet program's leap-year error): keep the serial number itself.
                return (number_text(serial), 0);
            }
            let time = if ms > 0 {
                format!("{h:02}:{mi:02}:{s:02}.{ms:03}")
            } else {
                format!("{h:02}:{mi:02}:{s:02}")
            };
            if (0.0..1.0).contains(&serial) {
                (time, 1)
            } else if (h, mi, s, ms) == (0, 0, 0, 0) {
                (format!("{y:04}-{mo:02}-{d:02}"), 1)
            } else {
                (format!("{y:04}-{mo:02}-{d:02}T{time}"), 1)
            }
        }
    }
}

/// An ISO 8601 duration (`PT36H5M0S`, milliseconds as a fraction of a second) from days.
fn iso_duration(days: f64) -> String {
    let total_ms = (days * 86_400_000.0).round() as i64;
    let sign = if total_ms < 0 { "-" } else { "" };
    let ms = total_ms.unsigned_abs();
    let (h, rest) = (ms / 3_600_000, ms % 3_600_000);
    let (m, rest) = (rest / 60_000, rest % 60_000);
    let (s, frac) = (rest / 1000, rest % 1000);
    if frac > 0 {
        format!("{sign}PT{h}H{m}M{s}.{frac:03}S")
    } else {
        format!("{sign}PT{h}H{m}M{s}S")
    }
}

/// The stored form of a cell for a trail: a date's serial number rather than the date.
fn stored_text(data: &Data) -> (String, usize) {
    match data {
        Data::DateTime(dt) => (number_text(dt.as_f64()), 1),
        Data::Bool(b) => ((if *b { "TRUE" } else { "FALSE" }).into(), 3),
        other => cell_text(other),
    }
}

/// The cell at 0-based `row`, `col` of sheet `sheet` of the workbook in `bytes`, as stored.
pub fn stored_cell(
    bytes: &[u8],
    path: &Path,
    sheet: &str,
    row: u32,
    col: u32,
) -> Result<StoredCell> {
    let mut book = open(bytes, path)?;
    let range = book.worksheet_range(sheet).map_err(|e| {
        Error::input(
            path,
            None,
            InputProblem::UnreadableWorkbook {
                detail: format!("sheet {sheet}: {e}"),
            },
        )
    })?;
    let formulas = book.worksheet_formula(sheet).unwrap_or_default();
    let data = range.get_value((row, col)).unwrap_or(&Data::Empty);
    let (stored, kind) = stored_text(data);
    Ok(StoredCell {
        reference: cell_ref(sheet, row, col),
        stored,
        kind: KIND_NAMES[kind].to_string(),
        formula: formula_at(&formulas, row, col),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn column_letters_are_bijective_base_26() {
        // The A..Z, AA.. scheme of spreadsheet column names (common practice).
        for (n, s) in [
            (0, "A"),
            (25, "Z"),
            (26, "AA"),
            (51, "AZ"),
            (52, "BA"),
            (701, "ZZ"),
            (702, "AAA"),
            (16383, "XFD"),
        ] {
            assert_eq!(column_letters(n), s);
            assert_eq!(column_number(s), Some(n));
        }
        assert_eq!(column_number("a"), None);
    }

    #[test]
    fn references_quote_sheet_names_that_need_it() {
        assert_eq!(cell_ref("Sheet1", 6, 2), "Sheet1!C7");
        assert_eq!(cell_ref("Work orders", 0, 0), "'Work orders'!A1");
        assert_eq!(cell_ref("Rob's", 1, 1), "'Rob''s'!B2");
    }

    #[test]
    fn numbers_are_shortest_round_trip_without_exponent() {
        assert_eq!(number_text(0.1), "0.1");
        assert_eq!(number_text(0.1 + 0.2), "0.30000000000000004");
        assert_eq!(number_text(1e-7), "0.0000001");
        assert_eq!(number_text(1e21), "1000000000000000000000");
        assert_eq!(number_text(-0.0), "0");
        assert_eq!(number_text(3.0), "3");
    }

    proptest::proptest! {
        /// Law: the text of a number reads back as the same binary64 (Rust's own `f64` parser
        /// as the reader), and has no exponent.
        #[test]
        fn number_text_round_trips(bits in proptest::num::u64::ANY) {
            let x = f64::from_bits(bits);
            proptest::prop_assume!(x.is_finite());
            let t = number_text(x);
            proptest::prop_assert!(!t.contains(['e', 'E']), "{t}");
            let back: f64 = t.parse().unwrap();
            proptest::prop_assert_eq!(back, if x == 0.0 { 0.0 } else { x });
        }
    }

    #[test]
    fn durations_are_iso_8601() {
        assert_eq!(iso_duration(1.5), "PT36H0M0S");
        assert_eq!(iso_duration(1.0 / 24.0 + 1.0 / 1440.0), "PT1H1M0S");
    }
}
