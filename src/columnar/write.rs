//! Writing a version as Apache Parquet or Arrow IPC (`retrieve --format parquet|arrow`), typed
//! from its profile, deterministically: the same version gives the same bytes.

use std::path::Path;
use std::sync::Arc;

use arrow_array::{ArrayRef, Date32Array, Decimal128Array, Int64Array, RecordBatch, StringArray};
use arrow_schema::{Field, Schema};

use crate::error::{Error, ErrorKind, Result};
use crate::model::{ColumnProfile, Version};
use crate::store::Store;

/// The Arrow type a version's column is written as, from its profile: integers as 64-bit
/// integers (when every value fits), decimals as `Decimal128` with the largest scale seen
/// (when the digits fit in 38), ISO dates as `Date32`, anything else as text; blank cells
/// (empty, or a null token of the version) are nulls.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum OutType {
    Int64,
    Decimal { precision: u8, scale: i8 },
    Date,
    Text,
}

/// Splits a plain decimal (`-12.50`, `+3`, `.5`) into sign, integer digits and fraction
/// digits; `None` for anything else.
fn split_decimal(s: &str) -> Option<(bool, &str, &str)> {
    let (neg, rest) = match s.as_bytes().first()? {
        b'-' => (true, &s[1..]),
        b'+' => (false, &s[1..]),
        _ => (false, s),
    };
    let (int, frac) = rest.split_once('.').unwrap_or((rest, ""));
    if int.is_empty() && frac.is_empty() {
        return None;
    }
    if !int.bytes().all(|b| b.is_ascii_digit()) || !frac.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    Some((neg, int, frac))
}

fn out_type(profile: Option<&ColumnProfile>, values: &[Option<&str>]) -> OutType {
    let kind = profile.map_or("text", |p| p.inferred_type.as_str());
    let present = || values.iter().flatten();
    match kind {
        "integer" if present().all(|v| v.parse::<i64>().is_ok()) => OutType::Int64,
        "integer" | "decimal" => {
            let mut int_digits = 1usize;
            let mut scale = 0usize;
            for v in present() {
                let Some((_, int, frac)) = split_decimal(v) else {
                    return OutType::Text;
                };
                int_digits = int_digits.max(int.trim_start_matches('0').len());
                scale = scale.max(frac.len());
            }
            if int_digits + scale <= 38 {
                OutType::Decimal {
                    precision: (int_digits + scale) as u8,
                    scale: scale as i8,
                }
            } else {
                OutType::Text
            }
        }
        "date" if present().all(|v| crate::clock::is_iso_date(v.as_bytes())) => OutType::Date,
        _ => OutType::Text,
    }
}

fn days_from_civil(y: i64, m: u32, d: u32) -> i64 {
    // The inverse of `civil_from_days` (the same well-known era-based algorithm).
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y.rem_euclid(400);
    let m = i64::from(m);
    let doy = (153 * (if m > 2 { m - 3 } else { m + 9 }) + 2) / 5 + i64::from(d) - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

fn build_array(t: OutType, values: &[Option<&str>]) -> ArrayRef {
    match t {
        OutType::Int64 => Arc::new(Int64Array::from_iter(
            values.iter().map(|v| v.and_then(|v| v.parse::<i64>().ok())),
        )),
        OutType::Decimal { precision, scale } => {
            let a = Decimal128Array::from_iter(values.iter().map(|v| {
                let (neg, int, frac) = split_decimal(v.as_ref()?)?;
                let mut digits = String::with_capacity(int.len() + scale as usize);
                digits.push_str(int);
                digits.push_str(frac);
                for _ in frac.len()..scale as usize {
                    digits.push('0');
                }
                let n: i128 = if digits.is_empty() {
                    0
                } else {
                    digits.parse().ok()?
                };
                Some(if neg { -n } else { n })
            }));
            Arc::new(
                a.with_precision_and_scale(precision.max(1), scale)
                    .unwrap_or_else(|_| Decimal128Array::from(Vec::<i128>::new())),
            )
        }
        OutType::Date => Arc::new(Date32Array::from_iter(values.iter().map(|v| {
            let v = (*v)?;
            let y: i64 = v.get(..4)?.parse().ok()?;
            let m: u32 = v.get(5..7)?.parse().ok()?;
            let d: u32 = v.get(8..10)?.parse().ok()?;
            i32::try_from(days_from_civil(y, m, d)).ok()
        }))),
        OutType::Text => Arc::new(StringArray::from_iter(values.iter().copied())),
    }
}

/// The output formats of [`write_version`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutFormat {
    Parquet,
    ArrowIpc,
}

/// Rows per Parquet row group and per IPC record batch written.
const ROWS_PER_GROUP: usize = 128 * 1024;

/// A version's rows as one Arrow record batch, with types from its profile (the whole table
/// in memory).
pub fn version_batch(store: &Store, v: &Version) -> Result<RecordBatch> {
    batch_of(store, v, true)
}

/// A version's rows as one record batch, typed from the profile or, with `typed` false,
/// every column as text (blanks still nulls).
fn batch_of(store: &Store, v: &Version, typed: bool) -> Result<RecordBatch> {
    let profiles = if typed {
        store.lineage.profiles(v.id)?
    } else {
        Vec::new()
    };
    let mut cells: Vec<Vec<String>> = vec![Vec::with_capacity(v.n_rows as usize); v.header.len()];
    store.objects.each_row(v, |_, r| {
        for (j, f) in r.iter().enumerate() {
            if let Some(col) = cells.get_mut(j) {
                col.push(String::from_utf8_lossy(f).into_owned());
            }
        }
        Ok(())
    })?;
    let mut fields = Vec::with_capacity(v.header.len());
    let mut arrays = Vec::with_capacity(v.header.len());
    for (j, name) in v.header.iter().enumerate() {
        let values: Vec<Option<&str>> = cells[j]
            .iter()
            .map(|c| (!c.is_empty() && !v.null_tokens.iter().any(|t| t == c)).then_some(c.as_str()))
            .collect();
        let profile = profiles.iter().find(|p| &p.name == name);
        let t = out_type(profile, &values);
        let array = build_array(t, &values);
        fields.push(Field::new(name, array.data_type().clone(), true));
        arrays.push(array);
    }
    let schema = Arc::new(Schema::new(fields));
    RecordBatch::try_new(schema, arrays).map_err(|e| {
        ErrorKind::Internal(format!("building the table of {}: {e}", v.label())).into()
    })
}

/// Writes version `v` as an Arrow IPC file into `out`, typed from its profile or, with `typed`
/// false, every column as text: the form a dataframe library reads without a CSV round trip.
pub fn write_ipc(
    store: &Store,
    v: &Version,
    typed: bool,
    out: &mut dyn std::io::Write,
) -> Result<()> {
    let batch = batch_of(store, v, typed)?;
    let internal = |e: &dyn std::fmt::Display| -> Error {
        ErrorKind::Internal(format!("writing {} as Arrow IPC: {e}", v.label())).into()
    };
    let mut w =
        arrow_ipc::writer::FileWriter::try_new(out, &batch.schema()).map_err(|e| internal(&e))?;
    w.write(&batch).map_err(|e| internal(&e))?;
    w.finish().map_err(|e| internal(&e))
}

/// Writes version `v` as Parquet or Arrow IPC into `out`. The bytes depend only on the
/// version's rows and this build: the same version always gives the same bytes (Parquet with
/// Zstandard at level 3 and a fixed writer name; IPC uncompressed, which every reader takes).
pub fn write_version(
    store: &Store,
    v: &Version,
    format: OutFormat,
    out: &mut dyn std::io::Write,
) -> Result<()> {
    let batch = version_batch(store, v)?;
    let internal = |e: &dyn std::fmt::Display| -> Error {
        ErrorKind::Internal(format!("writing {} as {:?}: {e}", v.label(), format)).into()
    };
    let bytes = match format {
        OutFormat::Parquet => {
            use parquet::basic::{Compression, ZstdLevel};
            use parquet::file::properties::WriterProperties;
            let level = ZstdLevel::try_new(3).map_err(|e| internal(&e))?;
            let props = WriterProperties::builder()
                .set_compression(Compression::ZSTD(level))
                .set_created_by(crate::TOOL_VERSION.to_string())
                .set_max_row_group_row_count(Some(ROWS_PER_GROUP))
                .build();
            let mut buf = Vec::new();
            let mut w = parquet::arrow::ArrowWriter::try_new(&mut buf, batch.schema(), Some(props))
                .map_err(|e| internal(&e))?;
            w.write(&batch).map_err(|e| internal(&e))?;
            w.close().map_err(|e| internal(&e))?;
            buf
        }
        OutFormat::ArrowIpc => {
            let mut buf = Vec::new();
            let mut w = arrow_ipc::writer::FileWriter::try_new(&mut buf, &batch.schema())
                .map_err(|e| internal(&e))?;
            let mut start = 0;
            while start < batch.num_rows() {
                let n = ROWS_PER_GROUP.min(batch.num_rows() - start);
                w.write(&batch.slice(start, n)).map_err(|e| internal(&e))?;
                start += n;
            }
            w.finish().map_err(|e| internal(&e))?;
            drop(w);
            buf
        }
    };
    out.write_all(&bytes)
        .map_err(|e| Error::io(Path::new("(output)"), e))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::clock::civil_from_days;

    #[test]
    fn dates_round_trip_through_days() {
        for days in [-719_528i64, -1, 0, 1, 19_000, 2_932_896] {
            let (y, m, d) = civil_from_days(days);
            assert_eq!(days_from_civil(y, m, d), days);
        }
        // 1970-01-01 is day 0 of the Unix epoch (POSIX, common practice).
        assert_eq!(super::super::date_text(0), "1970-01-01");
        assert_eq!(super::super::date_text(-1), "1969-12-31");
    }

    #[test]
    fn decimals_split_and_type() {
        assert_eq!(split_decimal("-12.50"), Some((true, "12", "50")));
        assert_eq!(split_decimal(".5"), Some((false, "", "5")));
        assert_eq!(split_decimal("1e3"), None);
        let vals = [Some("1.5"), Some("-20.25"), None];
        let p = ColumnProfile {
            name: "a".into(),
            inferred_type: "decimal".into(),
            n_blank: 1,
            n_distinct: 2,
            distinct_exact: true,
            min: None,
            max: None,
            min_len: None,
            max_len: None,
        };
        assert_eq!(
            out_type(Some(&p), &vals),
            OutType::Decimal {
                precision: 4,
                scale: 2
            }
        );
    }
}
