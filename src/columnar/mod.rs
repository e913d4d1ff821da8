//! Columnar files: Apache Parquet and Arrow IPC read into a table of text cells (for a converted
//! intake) and one stored value read back for a trail, through the Apache Arrow project's own
//! crates; [`write`] writes a version as either format (`retrieve --format parquet|arrow`).
//!
//! What a column's values become as cells (text, exactly, never through a locale):
//! - integers in decimal; booleans `true`/`false`; floating point as the shortest decimal that
//!   reads back as the same value (`NaN`, `inf`, `-inf` as such);
//! - decimals exactly, with their scale (`Decimal128(10, 2)` value 1250 is `12.50`);
//! - dates as ISO 8601 `YYYY-MM-DD`; times as `HH:MM:SS` with as many fraction digits as the
//!   unit holds (3 for milliseconds, 6 for microseconds, 9 for nanoseconds); timestamps as
//!   `YYYY-MM-DDTHH:MM:SS[.fraction]`, followed by `Z` when the column has a time zone (the
//!   value is then an instant, written in UTC; the zone itself is recorded with the column's
//!   type) and by nothing when it has none (a wall-clock time); durations as `PT<seconds>S`;
//! - text as it is; binary as lowercase hexadecimal; dictionary-encoded columns as their
//!   values; a null as an empty cell.
//!
//! Nested columns (lists, structs, maps, unions) and intervals are refused with the column's
//! name: a table cell cannot hold them.

use std::path::Path;

use arrow_array::cast::AsArray;
use arrow_array::types::{
    Decimal128Type, Decimal256Type, Decimal32Type, Decimal64Type, Float16Type, Float32Type,
    Float64Type, Int16Type, Int32Type, Int64Type, Int8Type, UInt16Type, UInt32Type, UInt64Type,
    UInt8Type,
};
use arrow_array::{Array, BooleanArray, Date32Array, RecordBatch};
use arrow_schema::{DataType, Schema, SchemaRef, TimeUnit};
use serde::Serialize;

use crate::clock::civil_from_days;
use crate::error::{Error, ErrorKind, InputProblem, Result};

pub mod write;

/// The two columnar formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnarFormat {
    Parquet,
    /// The Arrow IPC file format (Feather version 2) or stream format.
    ArrowIpc,
}

impl ColumnarFormat {
    /// The format a file name's extension says: `.parquet`, `.pq`; `.arrow`, `.feather`,
    /// `.ipc`, `.arrows`.
    pub fn of(path: &Path) -> Option<ColumnarFormat> {
        let ext = path.extension()?.to_str()?.to_ascii_lowercase();
        match ext.as_str() {
            "parquet" | "pq" => Some(ColumnarFormat::Parquet),
            "arrow" | "feather" | "ipc" | "arrows" => Some(ColumnarFormat::ArrowIpc),
            _ => None,
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            ColumnarFormat::Parquet => "parquet",
            ColumnarFormat::ArrowIpc => "arrow",
        }
    }

    /// The format's name on screens and in messages.
    pub fn title(self) -> &'static str {
        match self {
            ColumnarFormat::Parquet => "Apache Parquet",
            ColumnarFormat::ArrowIpc => "Arrow IPC",
        }
    }
}

/// The type of one column as the file declares it, and how its values became text.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ColumnType {
    pub name: String,
    /// Arrow's name of the type, e.g. `Decimal128(10, 2)`, `Timestamp(µs, "UTC")`.
    pub arrow_type: String,
    /// integer, float, decimal, boolean, date, time, timestamp, duration, text, binary, null.
    pub kind: String,
    /// Decimals: digits after the point.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub scale: Option<i8>,
    /// Times, timestamps and durations: second, millisecond, microsecond or nanosecond.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    /// Timestamps: the column's time zone (values are written in UTC, ending in `Z`), or
    /// `None` for a wall-clock time without zone.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub zone: Option<String>,
    /// Whether the file holds the column dictionary-encoded (taken in as its values).
    pub dictionary: bool,
    pub nullable: bool,
}

/// A table read out of a columnar file.
#[derive(Debug, Clone, Default)]
pub struct ColumnarTable {
    pub header: Vec<String>,
    pub rows: Vec<Vec<String>>,
    pub types: Vec<ColumnType>,
    /// Rows per Parquet row group, or per IPC record batch, in file order.
    pub groups: Vec<u64>,
    /// Parquet: the compression codecs the column chunks use, sorted.
    pub codecs: Vec<String>,
    /// Parquet: the writer the file names.
    pub created_by: Option<String>,
    pub n_nulls: u64,
    /// What the table holds in memory as text so far: the cells' bytes plus
    /// [`CELL_OVERHEAD`] each, counted against [`MAX_COLUMNAR_TEXT_BYTES`].
    pub held_bytes: u64,
}

/// The most a columnar file's table may hold in memory as text. A columnar file is converted
/// whole, and a small file can expand a thousandfold (a dictionary-encoded column repeating a
/// long value, a page of one value compressed away), so its expansion is counted as the
/// batches are turned into text and refused past this bound, before memory runs out.
pub const MAX_COLUMNAR_TEXT_BYTES: u64 = 2 << 30;

/// What a cell costs in memory besides its bytes (a `String`'s own size), for the bound.
pub const CELL_OVERHEAD: u64 = std::mem::size_of::<String>() as u64;

fn unreadable(path: &Path, format: ColumnarFormat, detail: impl std::fmt::Display) -> Error {
    Error::input(
        path,
        None,
        InputProblem::UnreadableColumnar {
            format: format.title().into(),
            detail: detail.to_string(),
        },
    )
}

fn unit_name(u: &TimeUnit) -> &'static str {
    match u {
        TimeUnit::Second => "second",
        TimeUnit::Millisecond => "millisecond",
        TimeUnit::Microsecond => "microsecond",
        TimeUnit::Nanosecond => "nanosecond",
    }
}

/// How a value type becomes text, or why it cannot; `None` for a nested or unsupported type.
fn kind_of(t: &DataType) -> Option<&'static str> {
    use DataType::*;
    Some(match t {
        Null => "null",
        Boolean => "boolean",
        Int8 | Int16 | Int32 | Int64 | UInt8 | UInt16 | UInt32 | UInt64 => "integer",
        Float16 | Float32 | Float64 => "float",
        Decimal32(..) | Decimal64(..) | Decimal128(..) | Decimal256(..) => "decimal",
        Date32 | Date64 => "date",
        Time32(_) | Time64(_) => "time",
        Timestamp(..) => "timestamp",
        Duration(_) => "duration",
        Utf8 | LargeUtf8 | Utf8View => "text",
        Binary | LargeBinary | BinaryView | FixedSizeBinary(_) => "binary",
        _ => return None,
    })
}

/// The column types of `schema`, or the first column that cannot be a table column.
fn column_types(path: &Path, format: ColumnarFormat, schema: &Schema) -> Result<Vec<ColumnType>> {
    let mut out = Vec::with_capacity(schema.fields().len());
    for f in schema.fields() {
        let (value_type, dictionary) = match f.data_type() {
            DataType::Dictionary(_, v) => (v.as_ref(), true),
            t => (t, false),
        };
        let Some(kind) = kind_of(value_type) else {
            return Err(Error::input(
                path,
                None,
                InputProblem::NestedColumn {
                    format: format.title().into(),
                    column: f.name().clone(),
                    type_name: f.data_type().to_string(),
                },
            ));
        };
        let (scale, unit, zone) = match value_type {
            DataType::Decimal32(_, s)
            | DataType::Decimal64(_, s)
            | DataType::Decimal128(_, s)
            | DataType::Decimal256(_, s) => (Some(*s), None, None),
            DataType::Time32(u) | DataType::Time64(u) | DataType::Duration(u) => {
                (None, Some(unit_name(u).to_string()), None)
            }
            DataType::Timestamp(u, z) => (
                None,
                Some(unit_name(u).to_string()),
                z.as_ref().map(|z| z.to_string()),
            ),
            _ => (None, None, None),
        };
        out.push(ColumnType {
            name: f.name().clone(),
            arrow_type: f.data_type().to_string(),
            kind: kind.into(),
            scale,
            unit,
            zone,
            dictionary,
            nullable: f.is_nullable(),
        });
    }
    Ok(out)
}

/// Fraction digits of a unit, and how many of it make a second.
fn per_second(u: &TimeUnit) -> (usize, i64) {
    match u {
        TimeUnit::Second => (0, 1),
        TimeUnit::Millisecond => (3, 1_000),
        TimeUnit::Microsecond => (6, 1_000_000),
        TimeUnit::Nanosecond => (9, 1_000_000_000),
    }
}

pub(crate) fn date_text(days: i64) -> String {
    let (y, m, d) = civil_from_days(days);
    if (0..=9999).contains(&y) {
        format!("{y:04}-{m:02}-{d:02}")
    } else {
        // ISO 8601's expanded years carry a sign.
        format!("{y:+05}-{m:02}-{d:02}")
    }
}

fn clock_text(secs_of_day: i64, frac: i64, digits: usize) -> String {
    let (h, mi, s) = (secs_of_day / 3600, secs_of_day / 60 % 60, secs_of_day % 60);
    if digits == 0 {
        format!("{h:02}:{mi:02}:{s:02}")
    } else {
        format!("{h:02}:{mi:02}:{s:02}.{frac:0digits$}")
    }
}

fn timestamp_text(v: i64, u: &TimeUnit, zoned: bool) -> String {
    let (digits, per) = per_second(u);
    let secs = v.div_euclid(per);
    let frac = v.rem_euclid(per);
    let days = secs.div_euclid(86_400);
    let tod = secs.rem_euclid(86_400);
    format!(
        "{}T{}{}",
        date_text(days),
        clock_text(tod, frac, digits),
        if zoned { "Z" } else { "" }
    )
}

fn duration_text(v: i64, u: &TimeUnit) -> String {
    let (digits, per) = per_second(u);
    let sign = if v < 0 { "-" } else { "" };
    let a = v.unsigned_abs();
    let per = per as u64;
    if digits == 0 {
        format!("{sign}PT{a}S")
    } else {
        format!("{sign}PT{}.{:0digits$}S", a / per, a % per)
    }
}

fn hex(bytes: &[u8]) -> String {
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push_str(&format!("{b:02x}"));
    }
    s
}

/// Appends the text of every value of `a` (a flat type, see [`kind_of`]) to `out`, an empty
/// string for a null.
fn column_texts(a: &dyn Array, out: &mut Vec<String>) -> std::result::Result<(), String> {
    macro_rules! each {
        ($arr:expr, $f:expr) => {{
            let arr = $arr;
            for i in 0..arr.len() {
                out.push(if arr.is_null(i) {
                    String::new()
                } else {
                    $f(arr, i)
                });
            }
        }};
    }
    macro_rules! prim {
        ($t:ty) => {
            each!(
                a.as_primitive::<$t>(),
                |x: &arrow_array::PrimitiveArray<$t>, i| x.value(i).to_string()
            )
        };
    }
    macro_rules! dec {
        ($t:ty) => {
            each!(
                a.as_primitive::<$t>(),
                |x: &arrow_array::PrimitiveArray<$t>, i| x.value_as_string(i)
            )
        };
    }
    use DataType::*;
    match a.data_type() {
        Null => out.extend(std::iter::repeat_n(String::new(), a.len())),
        Boolean => each!(a.as_boolean(), |x: &BooleanArray, i| x.value(i).to_string()),
        Int8 => prim!(Int8Type),
        Int16 => prim!(Int16Type),
        Int32 => prim!(Int32Type),
        Int64 => prim!(Int64Type),
        UInt8 => prim!(UInt8Type),
        UInt16 => prim!(UInt16Type),
        UInt32 => prim!(UInt32Type),
        UInt64 => prim!(UInt64Type),
        Float16 => prim!(Float16Type),
        Float32 => prim!(Float32Type),
        Float64 => prim!(Float64Type),
        Decimal32(..) => dec!(Decimal32Type),
        Decimal64(..) => dec!(Decimal64Type),
        Decimal128(..) => dec!(Decimal128Type),
        Decimal256(..) => dec!(Decimal256Type),
        Date32 => each!(
            a.as_primitive::<arrow_array::types::Date32Type>(),
            |x: &Date32Array, i| { date_text(i64::from(x.value(i))) }
        ),
        Date64 => each!(
            a.as_primitive::<arrow_array::types::Date64Type>(),
            |x: &arrow_array::Date64Array, i| {
                let ms = x.value(i);
                if ms.rem_euclid(86_400_000) == 0 {
                    date_text(ms.div_euclid(86_400_000))
                } else {
                    timestamp_text(ms, &TimeUnit::Millisecond, false)
                }
            }
        ),
        Time32(u) => {
            let (digits, per) = per_second(u);
            let vals: Vec<Option<i64>> = match u {
                TimeUnit::Second => a
                    .as_primitive::<arrow_array::types::Time32SecondType>()
                    .iter()
                    .map(|v| v.map(i64::from))
                    .collect(),
                _ => a
                    .as_primitive::<arrow_array::types::Time32MillisecondType>()
                    .iter()
                    .map(|v| v.map(i64::from))
                    .collect(),
            };
            out.extend(vals.into_iter().map(|v| {
                v.map(|v| clock_text(v.div_euclid(per), v.rem_euclid(per), digits))
                    .unwrap_or_default()
            }));
        }
        Time64(u) => {
            let (digits, per) = per_second(u);
            let vals: Vec<Option<i64>> = match u {
                TimeUnit::Nanosecond => a
                    .as_primitive::<arrow_array::types::Time64NanosecondType>()
                    .iter()
                    .collect(),
                _ => a
                    .as_primitive::<arrow_array::types::Time64MicrosecondType>()
                    .iter()
                    .collect(),
            };
            out.extend(vals.into_iter().map(|v| {
                v.map(|v| clock_text(v.div_euclid(per), v.rem_euclid(per), digits))
                    .unwrap_or_default()
            }));
        }
        Timestamp(u, z) => {
            use arrow_array::types::*;
            let vals: Vec<Option<i64>> = match u {
                TimeUnit::Second => a.as_primitive::<TimestampSecondType>().iter().collect(),
                TimeUnit::Millisecond => a
                    .as_primitive::<TimestampMillisecondType>()
                    .iter()
                    .collect(),
                TimeUnit::Microsecond => a
                    .as_primitive::<TimestampMicrosecondType>()
                    .iter()
                    .collect(),
                TimeUnit::Nanosecond => {
                    a.as_primitive::<TimestampNanosecondType>().iter().collect()
                }
            };
            out.extend(vals.into_iter().map(|v| {
                v.map(|v| timestamp_text(v, u, z.is_some()))
                    .unwrap_or_default()
            }));
        }
        Duration(u) => {
            use arrow_array::types::*;
            let vals: Vec<Option<i64>> = match u {
                TimeUnit::Second => a.as_primitive::<DurationSecondType>().iter().collect(),
                TimeUnit::Millisecond => {
                    a.as_primitive::<DurationMillisecondType>().iter().collect()
                }
                TimeUnit::Microsecond => {
                    a.as_primitive::<DurationMicrosecondType>().iter().collect()
                }
                TimeUnit::Nanosecond => a.as_primitive::<DurationNanosecondType>().iter().collect(),
            };
            out.extend(
                vals.into_iter()
                    .map(|v| v.map(|v| duration_text(v, u)).unwrap_or_default()),
            );
        }
        Utf8 => out.extend(
            a.as_string::<i32>()
                .iter()
                .map(|v| v.unwrap_or("").to_string()),
        ),
        LargeUtf8 => out.extend(
            a.as_string::<i64>()
                .iter()
                .map(|v| v.unwrap_or("").to_string()),
        ),
        Utf8View => out.extend(
            a.as_string_view()
                .iter()
                .map(|v| v.unwrap_or("").to_string()),
        ),
        Binary => out.extend(
            a.as_binary::<i32>()
                .iter()
                .map(|v| v.map(hex).unwrap_or_default()),
        ),
        LargeBinary => out.extend(
            a.as_binary::<i64>()
                .iter()
                .map(|v| v.map(hex).unwrap_or_default()),
        ),
        BinaryView => out.extend(
            a.as_binary_view()
                .iter()
                .map(|v| v.map(hex).unwrap_or_default()),
        ),
        FixedSizeBinary(_) => out.extend(
            a.as_fixed_size_binary()
                .iter()
                .map(|v| v.map(hex).unwrap_or_default()),
        ),
        Dictionary(..) => {
            let d = a
                .as_any_dictionary_opt()
                .ok_or_else(|| "a dictionary column the reader cannot open".to_string())?;
            if matches!(d.values().data_type(), Dictionary(..)) {
                return Err("a dictionary of dictionaries".into());
            }
            let mut values = Vec::with_capacity(d.values().len());
            column_texts(d.values().as_ref(), &mut values)?;
            let keys = d.normalized_keys();
            for (i, k) in keys.into_iter().enumerate() {
                out.push(if a.is_null(i) {
                    String::new()
                } else {
                    values.get(k).cloned().unwrap_or_default()
                });
            }
        }
        other => return Err(format!("values of type {other}")),
    }
    Ok(())
}

/// Adds the rows of `batch` to `table`.
fn push_batch(
    table: &mut ColumnarTable,
    batch: &RecordBatch,
    path: &Path,
    format: ColumnarFormat,
    limit: u64,
) -> Result<()> {
    let n = batch.num_rows();
    let first = table.rows.len();
    table
        .rows
        .extend(std::iter::repeat_with(|| Vec::with_capacity(batch.num_columns())).take(n));
    let mut texts = Vec::with_capacity(n);
    for (j, col) in batch.columns().iter().enumerate() {
        texts.clear();
        column_texts(col.as_ref(), &mut texts).map_err(|d| {
            unreadable(
                path,
                format,
                format!("column \"{}\": {d}", table.header.get(j).map_or("", |s| s)),
            )
        })?;
        table.n_nulls += col.logical_null_count() as u64;
        table.held_bytes = texts.iter().fold(table.held_bytes, |held, t| {
            held.saturating_add(t.len() as u64 + CELL_OVERHEAD)
        });
        if table.held_bytes > limit {
            return Err(unreadable(
                path,
                format,
                format!(
                    "its table grows past {} MiB as text by column \"{}\" of the rows up to {}; a columnar file is converted in memory, so split it (by row group) or save it as CSV and take that in",
                    limit >> 20,
                    table.header.get(j).map_or("", |s| s),
                    first + n
                ),
            ));
        }
        for (row, t) in table.rows[first..].iter_mut().zip(texts.drain(..)) {
            row.push(t);
        }
    }
    Ok(())
}

/// Reads a whole columnar file held in `bytes`.
pub fn read(bytes: &[u8], path: &Path, format: ColumnarFormat) -> Result<ColumnarTable> {
    match format {
        ColumnarFormat::Parquet => read_parquet(bytes, path, None, MAX_COLUMNAR_TEXT_BYTES),
        ColumnarFormat::ArrowIpc => read_ipc(bytes, path, MAX_COLUMNAR_TEXT_BYTES),
    }
}

/// What a reading does with each batch's rows: keep them all in the table, or hand them on
/// and keep none (the table then holds one batch at a time, and the bound on its text applies
/// to that batch).
type Rows<'a> = Option<&'a mut dyn FnMut(&[Vec<String>]) -> Result<()>>;

/// Reads a columnar file held in `bytes` batch by batch: `start` sees the table's header and
/// column types before any row, `rows` gets each batch's rows as text; returns the table's
/// description (types, row groups or record batches, codecs, writer, nulls) without rows.
/// Memory holds one batch as text, not the table.
pub fn read_batches(
    bytes: &[u8],
    path: &Path,
    format: ColumnarFormat,
    start: &mut dyn FnMut(&ColumnarTable) -> Result<()>,
    rows: &mut dyn FnMut(&[Vec<String>]) -> Result<()>,
) -> Result<ColumnarTable> {
    let mut table = match format {
        ColumnarFormat::Parquet => read_parquet_with(
            bytes,
            path,
            None,
            MAX_COLUMNAR_TEXT_BYTES,
            start,
            Some(rows),
        )?,
        ColumnarFormat::ArrowIpc => {
            read_ipc_with(bytes, path, MAX_COLUMNAR_TEXT_BYTES, start, Some(rows))?
        }
    };
    table.rows = Vec::new();
    table.held_bytes = 0;
    Ok(table)
}

/// Adds a batch to `table`, or, when `rows` takes them, hands its rows on in place of the
/// previous batch's.
fn take_batch(
    table: &mut ColumnarTable,
    batch: &RecordBatch,
    path: &Path,
    format: ColumnarFormat,
    limit: u64,
    rows: &mut Rows<'_>,
) -> Result<()> {
    if let Some(f) = rows {
        table.rows.clear();
        table.held_bytes = 0;
        push_batch(table, batch, path, format, limit)?;
        f(&table.rows)
    } else {
        push_batch(table, batch, path, format, limit)
    }
}

fn read_parquet(
    bytes: &[u8],
    path: &Path,
    only_group: Option<usize>,
    limit: u64,
) -> Result<ColumnarTable> {
    read_parquet_with(bytes, path, only_group, limit, &mut |_| Ok(()), None)
}

fn read_parquet_with(
    bytes: &[u8],
    path: &Path,
    only_group: Option<usize>,
    limit: u64,
    start: &mut dyn FnMut(&ColumnarTable) -> Result<()>,
    mut rows: Rows<'_>,
) -> Result<ColumnarTable> {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let format = ColumnarFormat::Parquet;
    let data = bytes::Bytes::copy_from_slice(bytes);
    let builder =
        ParquetRecordBatchReaderBuilder::try_new(data).map_err(|e| unreadable(path, format, e))?;
    let meta = builder.metadata().clone();
    let mut table = ColumnarTable {
        header: builder
            .schema()
            .fields()
            .iter()
            .map(|f| f.name().clone())
            .collect(),
        types: column_types(path, format, builder.schema())?,
        groups: meta
            .row_groups()
            .iter()
            .map(|g| g.num_rows().max(0) as u64)
            .collect(),
        created_by: meta.file_metadata().created_by().map(str::to_string),
        ..ColumnarTable::default()
    };
    let mut codecs: Vec<String> = meta
        .row_groups()
        .iter()
        .flat_map(|g| g.columns().iter().map(|c| c.compression().to_string()))
        .collect();
    codecs.sort();
    codecs.dedup();
    table.codecs = codecs;
    let builder = match only_group {
        Some(g) => builder.with_row_groups(vec![g]),
        None => builder,
    };
    let reader = builder
        .with_batch_size(8192)
        .build()
        .map_err(|e| unreadable(path, format, e))?;
    start(&table)?;
    for batch in reader {
        let batch = batch.map_err(|e| unreadable(path, format, e))?;
        take_batch(&mut table, &batch, path, format, limit, &mut rows)?;
    }
    Ok(table)
}

/// The Arrow IPC file format starts (and ends) with these bytes; the stream format does not.
const IPC_FILE_MAGIC: &[u8] = b"ARROW1";

fn read_ipc(bytes: &[u8], path: &Path, limit: u64) -> Result<ColumnarTable> {
    read_ipc_with(bytes, path, limit, &mut |_| Ok(()), None)
}

fn read_ipc_with(
    bytes: &[u8],
    path: &Path,
    limit: u64,
    seen: &mut dyn FnMut(&ColumnarTable) -> Result<()>,
    mut rows: Rows<'_>,
) -> Result<ColumnarTable> {
    let format = ColumnarFormat::ArrowIpc;
    let mut table = ColumnarTable::default();
    let mut start = |schema: &SchemaRef, table: &mut ColumnarTable| -> Result<()> {
        table.header = schema.fields().iter().map(|f| f.name().clone()).collect();
        table.types = column_types(path, format, schema)?;
        seen(table)
    };
    if bytes.starts_with(IPC_FILE_MAGIC) {
        let reader = arrow_ipc::reader::FileReader::try_new(std::io::Cursor::new(bytes), None)
            .map_err(|e| unreadable(path, format, e))?;
        start(&reader.schema(), &mut table)?;
        for batch in reader {
            let batch = batch.map_err(|e| unreadable(path, format, e))?;
            table.groups.push(batch.num_rows() as u64);
            take_batch(&mut table, &batch, path, format, limit, &mut rows)?;
        }
    } else {
        let reader = arrow_ipc::reader::StreamReader::try_new(std::io::Cursor::new(bytes), None)
            .map_err(|e| unreadable(path, format, e))?;
        start(&reader.schema(), &mut table)?;
        for batch in reader {
            let batch = batch.map_err(|e| unreadable(path, format, e))?;
            table.groups.push(batch.num_rows() as u64);
            take_batch(&mut table, &batch, path, format, limit, &mut rows)?;
        }
    }
    Ok(table)
}

/// The row group (or record batch) of 0-based file row `row`, and the row inside it, both
/// 0-based.
pub fn group_of(groups: &[u64], row: u64) -> Option<(usize, u64)> {
    let mut first = 0u64;
    for (g, &n) in groups.iter().enumerate() {
        if row < first + n {
            return Some((g, row - first));
        }
        first += n;
    }
    None
}

/// One stored value read back from a columnar raw object: 0-based file row `row`, column
/// `column`. Returns the value's text and the column's Arrow type.
pub fn value_at(
    bytes: &[u8],
    path: &Path,
    format: ColumnarFormat,
    groups: &[u64],
    row: u64,
    column: &str,
) -> Result<(String, String)> {
    let (g, in_group) = group_of(groups, row).ok_or_else(|| {
        Error::from(ErrorKind::Inconsistent(format!(
            "row {} is past the end of the raw {} file; run `sluice verify`",
            row + 1,
            format.title()
        )))
    })?;
    let (table, at) = match format {
        // Only the row group that holds the row is decoded.
        ColumnarFormat::Parquet => (
            read_parquet(bytes, path, Some(g), MAX_COLUMNAR_TEXT_BYTES)?,
            in_group,
        ),
        ColumnarFormat::ArrowIpc => (read_ipc(bytes, path, MAX_COLUMNAR_TEXT_BYTES)?, row),
    };
    let c = table
        .header
        .iter()
        .position(|h| h == column)
        .ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent(format!(
                "the raw {} file has no column \"{column}\"; run `sluice verify`",
                format.title()
            )))
        })?;
    let text = table
        .rows
        .get(at as usize)
        .and_then(|r| r.get(c))
        .cloned()
        .unwrap_or_default();
    Ok((text, table.types[c].arrow_type.clone()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn timestamps_keep_their_unit() {
        // 1,000,000,000 seconds after the epoch is 2001-09-09T01:46:40Z (common practice).
        assert_eq!(
            timestamp_text(1_000_000_000_123, &TimeUnit::Millisecond, true),
            "2001-09-09T01:46:40.123Z"
        );
        assert_eq!(
            timestamp_text(-1, &TimeUnit::Microsecond, false),
            "1969-12-31T23:59:59.999999"
        );
        assert_eq!(duration_text(-1_500, &TimeUnit::Millisecond), "-PT1.500S");
    }

    /// An Arrow IPC file of `rows` rows repeating one value of `width` bytes.
    fn repeated(rows: usize, width: usize) -> Vec<u8> {
        use arrow_array::{ArrayRef, StringArray};
        let value = "x".repeat(width);
        let col: ArrayRef = std::sync::Arc::new(StringArray::from(vec![value.as_str(); rows]));
        let batch = RecordBatch::try_from_iter([("note", col)]).unwrap();
        let mut out = Vec::new();
        let mut w = arrow_ipc::writer::FileWriter::try_new(&mut out, &batch.schema()).unwrap();
        w.write(&batch).unwrap();
        w.finish().unwrap();
        drop(w);
        out
    }

    #[test]
    fn a_table_that_grows_past_the_bound_as_text_is_refused() {
        let bytes = repeated(1000, 1000);
        let path = Path::new("notes.arrow");
        // 1000 cells of 1000 bytes: 1,000,000 bytes of text and the cells' own size.
        let whole = 1000 * (1000 + CELL_OVERHEAD);
        let t = read_ipc(&bytes, path, whole).expect("exactly at the bound is accepted");
        assert_eq!((t.rows.len(), t.held_bytes), (1000, whole));
        let e = read_ipc(&bytes, path, whole - 1).unwrap_err().to_string();
        assert!(e.contains("grows past") && e.contains("\"note\""), "{e}");
    }

    #[test]
    fn rows_find_their_group() {
        assert_eq!(group_of(&[3, 2], 0), Some((0, 0)));
        assert_eq!(group_of(&[3, 2], 3), Some((1, 0)));
        assert_eq!(group_of(&[3, 2], 5), None);
    }
}
