//! The engine's error type: a small box around a kind enum, so that `Result<T>` stays one
//! pointer wide on the happy path, with accessors for callers that branch on what went wrong.
//!
//! Input errors carry a [`Position`] (byte offset 0-based, line 1-based, record 0-based, column
//! 1-based on screen). Messages are lowercase, name the thing, and where there is an obvious next
//! step they say which command to try.

use std::fmt;
use std::path::{Path, PathBuf};

/// A position inside an input file. `byte` is 0-based; `line` is 1-based; `record` is the
/// 0-based index of the record in the file (the header, when present, is record 0), when the
/// problem was found inside a record; `column` is the 1-based field number when the problem is
/// inside one field.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Position {
    pub byte: u64,
    pub line: u64,
    pub record: Option<u64>,
    pub column: Option<u64>,
}

impl fmt::Display for Position {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.record {
            Some(r) => write!(f, "record {r} (line {}, byte {}", self.line, self.byte)?,
            None => write!(f, "line {} (byte {}", self.line, self.byte)?,
        }
        if let Some(c) = self.column {
            write!(f, ", field {c}")?;
        }
        write!(f, ")")
    }
}

/// What is wrong with an input file. Each variant renders as one clear sentence.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum InputProblem {
    Empty,
    NoHeader,
    RaggedRow {
        expected: u64,
        found: u64,
    },
    InvalidUtf8,
    InvalidForEncoding {
        encoding: String,
    },
    NulByte,
    UnterminatedQuote,
    /// A record (or the header) with more field bytes than the bound.
    RecordTooLong {
        max_bytes: u64,
    },
    BlankHeaderNames {
        columns: Vec<u64>,
    },
    DuplicateHeaderNames {
        names: Vec<String>,
    },
    UnknownKeyColumns {
        missing: Vec<String>,
        available: Vec<String>,
    },
    BlankKey {
        column: String,
    },
    DuplicateKeys {
        examples: Vec<(String, Vec<u64>)>,
        total: u64,
    },
    ChangedWhileReading,
    /// A workbook the reader cannot open or read (not a workbook, damaged, a legacy format).
    UnreadableWorkbook {
        detail: String,
    },
    /// A workbook past the bounds on its decompressed size or on a sheet's cells.
    WorkbookTooLarge {
        detail: String,
    },
    /// A JSON Lines file past the size read whole.
    LinesTooLarge {
        size: u64,
        limit: u64,
    },
    /// A workbook with several sheets and no `--sheet`.
    SheetNeeded {
        sheets: Vec<String>,
    },
    NoSuchSheet {
        wanted: String,
        sheets: Vec<String>,
    },
    EmptySheet {
        sheet: String,
    },
    /// Duplicate keys of a workbook, each with the sheet cells that hold it.
    DuplicateKeysAt {
        examples: Vec<(String, Vec<String>)>,
        total: u64,
    },
    /// A problem at one cell of a workbook (`at` is a reference such as `Orders!B1`).
    AtCell {
        at: String,
        problem: Box<InputProblem>,
    },
    /// JSON Lines: a line that is not valid JSON (the parser's message).
    InvalidJson {
        detail: String,
    },
    /// JSON Lines: a line whose value is not an object.
    NotAnObject {
        found: String,
    },
    /// JSON Lines: an array or object as a value.
    NestedValue {
        key: String,
    },
    /// JSON Lines: the same key twice in one object.
    RepeatedKey {
        key: String,
    },
    /// A Parquet or Arrow IPC file its reader cannot open or decode.
    UnreadableColumnar {
        format: String,
        detail: String,
    },
    /// A value that does not fit the type the user gave its column for a columnar output.
    NotOfType {
        column: String,
        /// 1-based data row.
        row: u64,
        given: String,
        value: String,
        why: String,
    },
    /// A Parquet or Arrow IPC column of a nested or otherwise non-tabular type.
    NestedColumn {
        format: String,
        column: String,
        type_name: String,
    },
}

fn quoted_list(names: &[String]) -> String {
    names
        .iter()
        .map(|n| format!("\"{n}\""))
        .collect::<Vec<_>>()
        .join(", ")
}

impl fmt::Display for InputProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        use InputProblem::*;
        match self {
            Empty => write!(f, "the file is empty (0 bytes); expected at least a header line"),
            NoHeader => write!(
                f,
                "the file holds no record (only blank lines); expected at least a header line"
            ),
            RaggedRow { expected, found } => write!(
                f,
                "expected {expected} fields, found {found}; every record needs as many fields as the header \
                 (check for an unquoted delimiter inside a value, or pass --delimiter if the detected one is wrong)"
            ),
            InvalidUtf8 => write!(
                f,
                "invalid UTF-8; if the file was saved in a legacy encoding, pass it, e.g. --encoding windows-1252"
            ),
            InvalidForEncoding { encoding } => write!(
                f,
                "a byte sequence that is not valid {encoding}; check which encoding the file was saved in"
            ),
            NulByte => write!(
                f,
                "a NUL byte (0x00); this looks like a binary file or UTF-16 text, not CSV \
                 (for UTF-16 pass --encoding utf-16le or utf-16be)"
            ),
            RecordTooLong { max_bytes } => write!(
                f,
                "this record holds more than {} MiB, the bound on one record (header included) that keeps memory bounded; \
                 if the file really holds records this long, raise it with --max-record-mib",
                max_bytes.div_ceil(1 << 20)
            ),
            UnterminatedQuote => write!(
                f,
                "a quoted field is never closed before the end of the file; add the closing \" or escape the inner quote as \"\""
            ),
            BlankHeaderNames { columns } => write!(
                f,
                "blank header name in column{} {}; every column needs a name (pass --no-header if the file has no header line)",
                if columns.len() == 1 { "" } else { "s" },
                join_u64(columns)
            ),
            DuplicateHeaderNames { names } => write!(
                f,
                "duplicate header name{} {}; column names must be unique",
                if names.len() == 1 { "" } else { "s" },
                names.iter().map(|n| format!("\"{n}\"")).collect::<Vec<_>>().join(", ")
            ),
            UnknownKeyColumns { missing, available } => write!(
                f,
                "key column{} {} not in the header; the columns are: {}",
                if missing.len() == 1 { "" } else { "s" },
                missing.iter().map(|n| format!("\"{n}\"")).collect::<Vec<_>>().join(", "),
                available.join(", ")
            ),
            BlankKey { column } => write!(
                f,
                "blank value in key column \"{column}\"; a key must identify every row"
            ),
            DuplicateKeys { examples, total } => {
                write!(
                    f,
                    "{total} key value{} more than once: ",
                    if *total == 1 { " occurs" } else { "s occur" }
                )?;
                let shown: Vec<String> = examples
                    .iter()
                    .map(|(k, lines)| format!("\"{k}\" (lines {})", join_u64(lines)))
                    .collect();
                write!(f, "{}", shown.join("; "))?;
                if (*total as usize) > examples.len() {
                    write!(f, "; and {} more", *total as usize - examples.len())?;
                }
                write!(f, "; choose a key that is unique, or ingest without --key")
            }
            ChangedWhileReading => write!(
                f,
                "the file changed while it was being read; take it in again once whatever writes it has finished"
            ),
            UnreadableColumnar { format, detail } => write!(
                f,
                "cannot be read as {format} ({detail}); expected a file written by a Parquet or Arrow library, whole and undamaged"
            ),
            NestedColumn {
                format,
                column,
                type_name,
            } => write!(
                f,
                "column \"{column}\" of this {format} file holds {type_name}, which a table cell cannot hold; flatten or drop the column before taking the file in"
            ),
            WorkbookTooLarge { detail } => write!(f, "workbook refused: {detail}"),
            LinesTooLarge { size, limit } => write!(
                f,
                "JSON Lines file refused: it is {size} bytes, more than the {} MiB a JSON Lines file may be (it is read whole); split it, or convert it to CSV, which is read as a stream",
                limit >> 20
            ),
            UnreadableWorkbook { detail } => write!(
                f,
                "cannot be read as a workbook ({detail}); expected an .xlsx or .ods file saved by a spreadsheet program"
            ),
            SheetNeeded { sheets } => write!(
                f,
                "the workbook has {} sheets ({}); choose one with --sheet NAME or --sheet N (1 to {})",
                sheets.len(),
                quoted_list(sheets),
                sheets.len()
            ),
            NoSuchSheet { wanted, sheets } => write!(
                f,
                "no sheet \"{wanted}\"; the sheets are {} (give a name or a position, 1 to {})",
                quoted_list(sheets),
                sheets.len()
            ),
            EmptySheet { sheet } => write!(
                f,
                "sheet \"{sheet}\" holds no cell; expected at least a header row"
            ),
            DuplicateKeysAt { examples, total } => {
                write!(
                    f,
                    "{total} key value{} more than once: ",
                    if *total == 1 { " occurs" } else { "s occur" }
                )?;
                let shown: Vec<String> = examples
                    .iter()
                    .map(|(k, at)| format!("\"{k}\" ({})", at.join(", ")))
                    .collect();
                write!(f, "{}", shown.join("; "))?;
                if (*total as usize) > examples.len() {
                    write!(f, "; and {} more", *total as usize - examples.len())?;
                }
                write!(f, "; choose a key that is unique, or ingest without --key")
            }
            AtCell { at, problem } => write!(f, "cell {at}: {problem}"),
            NotOfType {
                column,
                row,
                given,
                value,
                why,
            } => write!(
                f,
                "data row {row}, column \"{column}\": \"{value}\" {why}, so it cannot be written as {given}; give the column another type, or clean the value first"
            ),
            InvalidJson { detail } => write!(
                f,
                "not valid JSON ({detail}); every line must hold one JSON object"
            ),
            NotAnObject { found } => write!(
                f,
                "expected a JSON object ({{\"column\": value, ...}}), found {found}; every line must hold one object"
            ),
            NestedValue { key } => write!(
                f,
                "the value of \"{key}\" is an array or an object; only text, numbers, true, false and null can become a cell (flatten it first)"
            ),
            RepeatedKey { key } => write!(
                f,
                "the key \"{key}\" appears twice in one object; each key names one column"
            ),
        }
    }
}

/// "a", "a and b", "a, b and c".
fn join_and(items: &[String]) -> String {
    match items {
        [] => String::new(),
        [one] => one.clone(),
        [init @ .., last] => format!("{} and {last}", init.join(", ")),
    }
}

fn join_u64(v: &[u64]) -> String {
    v.iter()
        .map(|n| n.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

/// The kinds of error the engine reports.
#[derive(Debug, thiserror::Error)]
pub enum ErrorKind {
    #[error("{path}: {problem}", path = path.display())]
    Input {
        path: PathBuf,
        position: Option<Position>,
        problem: InputProblem,
    },
    #[error("{}", render_io(path, source))]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}: is a directory, not a file; name a file to take in", path = path.display())]
    IsDirectory { path: PathBuf },
    #[error("no store here or in any parent folder of {start}; create one with `sluice setup`, or point at one with --store PATH or SLUICE_STORE", start = start.display())]
    NoStore { start: PathBuf },
    #[error("no store at {path}; create one with `sluice setup {project}`, or point --store at a folder that holds a sluice-store folder", path = path.display(), project = project.display())]
    NoStoreAt { path: PathBuf, project: PathBuf },
    #[error("{path}: a store in the old hidden folder; rename it to sluice-store (`mv {path} {new}`), then run the command again", path = path.display(), new = project.join("sluice-store").display())]
    LegacyStore { path: PathBuf, project: PathBuf },
    #[error("{path}: a store already exists here; use it as it is, or pick another folder", path = path.display())]
    StoreExists { path: PathBuf },
    #[error("{path}: this store was written by a newer sluice (schema version {found}; this build knows up to {known}); upgrade sluice to use it", path = path.display())]
    SchemaTooNew {
        path: PathBuf,
        found: i64,
        known: i64,
    },
    #[error("{path}: the lineage database cannot be read ({detail}); restore it from a backup (the objects beside it are plain files named by their BLAKE3 hash and can be checked on their own)", path = path.display())]
    CorruptDatabase { path: PathBuf, detail: String },
    /// SQLite itself failed (a busy or read-only database, a failed migration).
    #[error("lineage database: {0}")]
    Sqlite(String),
    /// The PostgreSQL server that holds a shared store's lineage refused or failed (cannot be
    /// reached, a refused login, a permission its role lacks, a failed statement).
    #[error("lineage database server: {0}")]
    Server(String),
    /// A shared store moved on since a local copy was taken from it (or holds what the local
    /// store never had): named, never merged.
    #[error("{0}")]
    MovedOn(String),
    /// The store's records do not hold together (a row that names a missing step, a
    /// provenance object that does not decode): damage, or a store edited by hand.
    #[error("the store's records do not hold together: {0}")]
    Inconsistent(String),
    /// A condition sluice itself should never reach (a worker thread that panicked).
    #[error("internal error: {0}; please report it with the command that was run")]
    Internal(String),
    #[error("unknown version \"{reference}\"; {hint}")]
    UnknownRef { reference: String, hint: String },
    #[error("{reference} matches {} versions: {}; give more digits or name one as NAME:vN", candidates.len(), candidates.join(", "))]
    AmbiguousRef {
        reference: String,
        candidates: Vec<String>,
    },
    #[error(
        "the versions {} hold identical bytes ({reference}); name one as NAME:vN",
        join_and(labels)
    )]
    SameBytes {
        reference: String,
        labels: Vec<String>,
    },
    #[error("invalid version reference \"{reference}\": {why}")]
    BadRef { reference: String, why: String },
    #[error("object {hash} is damaged: its content hashes to {actual}; run `sluice verify` to list every damaged object")]
    ObjectCorrupt { hash: String, actual: String },
    #[error(
        "object {hash} is missing from the store; run `sluice verify` to list every missing object"
    )]
    ObjectMissing { hash: String },
    /// A recomputable version computed again from its recipe did not give its recorded bytes.
    #[error("step {step} ({operation}) computed {version} again as {actual}, but {expected} was recorded; its recipe or its inputs changed: run `sluice verify`, and `sluice reproduce {version}` to see the difference")]
    RecomputeMismatch {
        step: i64,
        operation: String,
        version: String,
        expected: String,
        actual: String,
    },
    #[error("{0}")]
    Usage(String),
    /// The data does not meet what a step needs (an amount that cannot be read, ...).
    #[error("{0}")]
    Data(String),
}

fn render_io(path: &Path, source: &std::io::Error) -> String {
    use std::io::ErrorKind as K;
    let p = path.display();
    match source.kind() {
        K::NotFound => format!("{p}: no such file or folder; check the path"),
        K::PermissionDenied => {
            format!("{p}: permission denied; check the file's owner and mode (ls -l)")
        }
        K::StorageFull => format!(
            "{p}: no space left on the device; free some space and run the command again (the store is unchanged)"
        ),
        _ => format!("{p}: {}", lower_first(&source.to_string())),
    }
}

fn lower_first(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(f) => f.to_lowercase().collect::<String>() + c.as_str(),
        None => String::new(),
    }
}

/// The engine's error: one box around an [`ErrorKind`].
#[derive(Debug)]
pub struct Error(Box<ErrorKind>);

pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    pub fn kind(&self) -> &ErrorKind {
        &self.0
    }

    pub fn into_kind(self) -> ErrorKind {
        *self.0
    }

    /// The position inside an input file, for input errors that have one.
    pub fn position(&self) -> Option<&Position> {
        match &*self.0 {
            ErrorKind::Input { position, .. } => position.as_ref(),
            _ => None,
        }
    }

    pub fn input(path: &Path, position: Option<Position>, problem: InputProblem) -> Self {
        ErrorKind::Input {
            path: path.to_path_buf(),
            position,
            problem,
        }
        .into()
    }

    pub fn io(path: &Path, source: std::io::Error) -> Self {
        ErrorKind::Io {
            path: path.to_path_buf(),
            source,
        }
        .into()
    }

    pub fn usage(msg: impl Into<String>) -> Self {
        ErrorKind::Usage(msg.into()).into()
    }

    /// The process exit code this error maps to: 1 when the data or the store is at fault
    /// (damage found), 2 for usage and input errors.
    pub fn exit_code(&self) -> i32 {
        match &*self.0 {
            ErrorKind::ObjectCorrupt { .. }
            | ErrorKind::ObjectMissing { .. }
            | ErrorKind::RecomputeMismatch { .. }
            | ErrorKind::CorruptDatabase { .. }
            | ErrorKind::Sqlite(_)
            | ErrorKind::Server(_)
            | ErrorKind::MovedOn(_)
            | ErrorKind::Inconsistent(_)
            | ErrorKind::Internal(_)
            | ErrorKind::Data(_) => 1,
            // A full disk is a failure of the system, not of the user's input.
            ErrorKind::Io { source, .. } if source.kind() == std::io::ErrorKind::StorageFull => 1,
            _ => 2,
        }
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &*self.0 {
            // Input errors put the position between the file and the problem, the way people
            // read them: "orders.csv: record 3 (line 4, byte 57): expected 8 fields, found 7".
            ErrorKind::Input {
                path,
                position: Some(p),
                problem,
            } => write!(f, "{}: {p}: {problem}", path.display()),
            k => k.fmt(f),
        }
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        std::error::Error::source(&*self.0)
    }
}

impl From<ErrorKind> for Error {
    fn from(k: ErrorKind) -> Self {
        Error(Box::new(k))
    }
}
