//! Writing a version as Apache Parquet or Arrow IPC (`retrieve --format parquet|arrow`), typed
//! from its profile, deterministically: the same version gives the same bytes.

use std::path::Path;
use std::sync::Arc;

use arrow_array::{
    ArrayRef, Date32Array, Decimal128Array, Int64Array, RecordBatch, StringArray,
    TimestampMicrosecondArray, TimestampMillisecondArray, TimestampNanosecondArray,
    TimestampSecondArray,
};
use arrow_schema::{DataType, Field, Schema, TimeUnit};

use crate::error::{Error, ErrorKind, Result};
use crate::model::Version;
use crate::store::Store;

/// The Arrow type a version's column is written as, from its profile: integers as 64-bit
/// integers (when every value fits), decimals as `Decimal128` with the largest scale seen
/// (when the digits fit in 38), ISO dates as `Date32`, anything else as text; blank cells
/// (empty, or a null token of the version) are nulls.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum OutType {
    Int64,
    Decimal {
        precision: u8,
        scale: i8,
    },
    Date,
    /// Only when given: a count of `unit` since the Unix epoch, in UTC when the column has a
    /// zone (its offset in seconds).
    Timestamp {
        unit: Unit,
        zone: Option<i64>,
    },
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
        // Timestamps are only ever given, and given columns are built by `column_array`.
        OutType::Text | OutType::Timestamp { .. } => {
            Arc::new(StringArray::from_iter(values.iter().copied()))
        }
    }
}

/// The output formats of [`write_version`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutFormat {
    Parquet,
    ArrowIpc,
}

/// Rows per Parquet row group and per IPC record batch written; also the rows held in memory
/// at once while a version is written.
const ROWS_PER_GROUP: usize = 128 * 1024;

/// The unit of a timestamp column given by the user, and its digits after the second.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    Second,
    Milli,
    Micro,
    Nano,
}

impl Unit {
    fn digits(self) -> u32 {
        match self {
            Unit::Second => 0,
            Unit::Milli => 3,
            Unit::Micro => 6,
            Unit::Nano => 9,
        }
    }

    fn arrow(self) -> TimeUnit {
        match self {
            Unit::Second => TimeUnit::Second,
            Unit::Milli => TimeUnit::Millisecond,
            Unit::Micro => TimeUnit::Microsecond,
            Unit::Nano => TimeUnit::Nanosecond,
        }
    }

    fn name(self) -> &'static str {
        match self {
            Unit::Second => "s",
            Unit::Milli => "ms",
            Unit::Micro => "us",
            Unit::Nano => "ns",
        }
    }
}

/// A column type the user gives for a columnar output, instead of the one the profile
/// suggests: `integer`, `decimal(P,S)`, `date`, `timestamp(UNIT)` or `timestamp(UNIT, ZONE)`
/// (UNIT `s`, `ms`, `us` or `ns`; ZONE `UTC` or an offset such as `+02:00`), `text`. Every
/// value of the column is checked against it; nothing is rounded or cut.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum GivenType {
    Integer,
    Decimal {
        precision: u8,
        scale: i8,
    },
    Date,
    Timestamp {
        unit: Unit,
        /// The zone as written (`UTC`, `+02:00`) and its offset from UTC in seconds.
        zone: Option<(String, i64)>,
    },
    Text,
}

/// `UTC`, `Z`, `+HH:MM` or `-HH:MM` as seconds east of UTC.
fn zone_offset(z: &str) -> Option<i64> {
    if z == "UTC" || z == "Z" {
        return Some(0);
    }
    let b = z.as_bytes();
    if b.len() != 6 || !matches!(b[0], b'+' | b'-') || b[3] != b':' {
        return None;
    }
    let h: i64 = z.get(1..3)?.parse().ok()?;
    let m: i64 = z.get(4..6)?.parse().ok()?;
    if h > 23
        || m > 59
        || !z[1..3]
            .bytes()
            .chain(z[4..6].bytes())
            .all(|c| c.is_ascii_digit())
    {
        return None;
    }
    Some(if b[0] == b'-' { -1 } else { 1 } * (h * 3600 + m * 60))
}

impl GivenType {
    /// Reads a type as written after `COLUMN=` (see the type's description).
    pub fn parse(text: &str) -> std::result::Result<GivenType, String> {
        let t = text.trim();
        let args = |name: &str| -> Option<Vec<String>> {
            let inner = t
                .strip_prefix(name)?
                .trim()
                .strip_prefix('(')?
                .strip_suffix(')')?;
            Some(inner.split(',').map(|a| a.trim().to_string()).collect())
        };
        let expected = "expected integer, decimal(P,S), date, timestamp(UNIT) or timestamp(UNIT, ZONE) with UNIT s, ms, us or ns and ZONE UTC or an offset such as +02:00, or text";
        match t {
            "integer" => return Ok(GivenType::Integer),
            "date" => return Ok(GivenType::Date),
            "text" => return Ok(GivenType::Text),
            _ => {}
        }
        if let Some(a) = args("decimal") {
            let (p, s) = match a.as_slice() {
                [p, s] => (p.parse::<u8>().ok(), s.parse::<i8>().ok()),
                _ => (None, None),
            };
            return match (p, s) {
                (Some(p), Some(s)) if (1..=38).contains(&p) && s >= 0 && s as u8 <= p => {
                    Ok(GivenType::Decimal {
                        precision: p,
                        scale: s,
                    })
                }
                _ => Err(format!(
                    "\"{text}\": a decimal takes a precision of 1 to 38 digits and a scale of 0 to the precision, e.g. decimal(12,2)"
                )),
            };
        }
        if let Some(a) = args("timestamp") {
            let unit = match a.first().map(String::as_str) {
                Some("s") => Unit::Second,
                Some("ms") => Unit::Milli,
                Some("us") => Unit::Micro,
                Some("ns") => Unit::Nano,
                _ => return Err(format!("\"{text}\": {expected}")),
            };
            let zone = match a.get(1) {
                None => None,
                Some(z) => match zone_offset(z) {
                    Some(o) if a.len() == 2 => Some((if z == "Z" { "UTC".into() } else { z.clone() }, o)),
                    _ => {
                        return Err(format!(
                            "\"{text}\": the zone must be UTC or an offset such as +02:00 (named zones are not read, since their offsets change over the year)"
                        ))
                    }
                },
            };
            return Ok(GivenType::Timestamp { unit, zone });
        }
        Err(format!("\"{text}\": {expected}"))
    }

    /// The type as the user writes it.
    pub fn name(&self) -> String {
        match self {
            GivenType::Integer => "integer".into(),
            GivenType::Decimal { precision, scale } => format!("decimal({precision},{scale})"),
            GivenType::Date => "date".into(),
            GivenType::Timestamp { unit, zone: None } => format!("timestamp({})", unit.name()),
            GivenType::Timestamp {
                unit,
                zone: Some((z, _)),
            } => format!("timestamp({}, {z})", unit.name()),
            GivenType::Text => "text".into(),
        }
    }

    fn out_type(&self) -> OutType {
        match self {
            GivenType::Integer => OutType::Int64,
            GivenType::Decimal { precision, scale } => OutType::Decimal {
                precision: *precision,
                scale: *scale,
            },
            GivenType::Date => OutType::Date,
            GivenType::Timestamp { unit, zone } => OutType::Timestamp {
                unit: *unit,
                zone: zone.as_ref().map(|z| z.1),
            },
            GivenType::Text => OutType::Text,
        }
    }
}

/// Columns with the types the user gave, by name.
pub type GivenTypes = [(String, GivenType)];

/// Parses `COLUMN=TYPE` (the last `=` separates, so a column name may hold one).
pub fn parse_given(pair: &str) -> std::result::Result<(String, GivenType), String> {
    let (c, t) = pair.rsplit_once('=').ok_or_else(|| {
        format!("\"{pair}\": expected COLUMN=TYPE, e.g. amount=decimal(12,2) or paid_at=timestamp(ms, UTC)")
    })?;
    Ok((c.to_string(), GivenType::parse(t)?))
}

/// Why `v` cannot be written as `t`, or the value to write (`Ok(None)` for a null).
fn integer_value(v: &str) -> std::result::Result<i64, String> {
    v.parse::<i64>().map_err(|_| {
        "is not a whole number from -9223372036854775808 to 9223372036854775807".into()
    })
}

fn decimal_value(v: &str, precision: u8, scale: i8) -> std::result::Result<i128, String> {
    let (neg, int, frac) = split_decimal(v)
        .ok_or("is not a plain decimal number (digits, one point, an optional sign)")?;
    let scale = scale as usize;
    if frac.len() > scale && frac[scale..].bytes().any(|b| b != b'0') {
        return Err(format!(
            "has {} after the point, more than the scale of {scale} keeps (nothing is rounded)",
            n_digits(frac.trim_end_matches('0').len())
        ));
    }
    let int = int.trim_start_matches('0');
    if int.len() + scale > precision as usize {
        return Err(format!(
            "has {} before the point; a precision of {precision} with a scale of {scale} leaves room for {}",
            n_digits(int.len()),
            precision as usize - scale
        ));
    }
    let frac = &frac[..frac.len().min(scale)];
    let mut digits = String::with_capacity(int.len() + scale);
    digits.push_str(int);
    digits.push_str(frac);
    for _ in frac.len()..scale {
        digits.push('0');
    }
    let n: i128 = if digits.is_empty() {
        0
    } else {
        digits.parse().map_err(|_| "is out of range".to_string())?
    };
    Ok(if neg { -n } else { n })
}

/// "1 digit", "3 digits".
fn n_digits(n: usize) -> String {
    if n == 1 {
        "1 digit".into()
    } else {
        format!("{n} digits")
    }
}

fn date_value(v: &str) -> std::result::Result<i32, String> {
    if !crate::clock::is_iso_date(v.as_bytes()) {
        return Err("is not an ISO 8601 calendar date (YYYY-MM-DD)".into());
    }
    let y: i64 = v[..4].parse().map_err(|_| "has no year")?;
    let m: u32 = v[5..7].parse().map_err(|_| "has no month")?;
    let d: u32 = v[8..10].parse().map_err(|_| "has no day")?;
    i32::try_from(days_from_civil(y, m, d)).map_err(|_| "is out of range".into())
}

/// An ISO 8601 date and time (`2026-10-01T09:14:03.250+02:00`; a space for the `T`; seconds
/// and their fraction optional; `Z` or an offset optional) as a count of `unit` since the Unix
/// epoch: in UTC when the column has a zone (a time without an offset is taken as the zone's
/// time), as written when it has none (a time with an offset is then refused).
fn timestamp_value(v: &str, unit: Unit, zone: Option<i64>) -> std::result::Result<i64, String> {
    const FORM: &str = "is not an ISO 8601 date and time (YYYY-MM-DDTHH:MM[:SS[.FFF]] with Z or an offset such as +02:00 when it has one)";
    let b = v.as_bytes();
    if b.len() < 16 || !matches!(b[10], b'T' | b' ') || b[13] != b':' {
        return Err(FORM.into());
    }
    let days = i64::from(date_value(&v[..10]).map_err(|_| FORM.to_string())?);
    let num = |s: &str| -> std::result::Result<i64, String> {
        if s.bytes().all(|c| c.is_ascii_digit()) && !s.is_empty() {
            s.parse().map_err(|_| FORM.to_string())
        } else {
            Err(FORM.into())
        }
    };
    let (h, m) = (num(&v[11..13])?, num(&v[14..16])?);
    let mut rest = &v[16..];
    let mut sec = 0;
    let mut frac = "";
    if let Some(r) = rest.strip_prefix(':') {
        sec = num(r.get(..2).ok_or(FORM)?)?;
        rest = &r[2..];
        if let Some(r) = rest.strip_prefix('.') {
            let n = r.bytes().take_while(u8::is_ascii_digit).count();
            if n == 0 {
                return Err(FORM.into());
            }
            frac = &r[..n];
            rest = &r[n..];
        }
    }
    if h > 23 || m > 59 || sec > 59 {
        return Err("has an hour, minute or second out of range".into());
    }
    let offset = match rest {
        "" => None,
        z => Some(zone_offset(z).ok_or(FORM)?),
    };
    let digits = unit.digits() as usize;
    if frac.len() > digits && frac[digits..].bytes().any(|c| c != b'0') {
        return Err(format!(
            "has {} after the second, more than a unit of {} keeps (nothing is cut)",
            n_digits(frac.trim_end_matches('0').len()),
            unit.name()
        ));
    }
    let shift =
        match (offset, zone) {
            (Some(o), Some(_)) => o,
            (None, Some(z)) => z,
            (None, None) => 0,
            (Some(_), None) => return Err(
                "carries a UTC offset, but the type has no zone: give one, e.g. timestamp(ms, UTC)"
                    .into(),
            ),
        };
    let secs = days * 86_400 + h * 3600 + m * 60 + sec - shift;
    let mut sub: i64 = 0;
    for i in 0..digits {
        sub = sub * 10 + frac.as_bytes().get(i).map_or(0, |c| i64::from(c - b'0'));
    }
    secs.checked_mul(10i64.pow(digits as u32))
        .and_then(|s| s.checked_add(sub))
        .ok_or_else(|| format!("is out of the range a unit of {} holds", unit.name()))
}

/// What the whole version says of one column, gathered in a first pass for the type from the
/// profile: whether every present value is a 64-bit integer, a plain decimal (and its widest
/// integer part and scale), an ISO date.
#[derive(Debug, Clone, Copy)]
struct Scan {
    all_i64: bool,
    all_decimal: bool,
    int_digits: usize,
    scale: usize,
    all_dates: bool,
}

impl Scan {
    fn new() -> Scan {
        Scan {
            all_i64: true,
            all_decimal: true,
            int_digits: 1,
            scale: 0,
            all_dates: true,
        }
    }

    fn see(&mut self, v: &str) {
        if self.all_i64 && v.parse::<i64>().is_err() {
            self.all_i64 = false;
        }
        if self.all_decimal {
            match split_decimal(v) {
                Some((_, int, frac)) => {
                    self.int_digits = self.int_digits.max(int.trim_start_matches('0').len());
                    self.scale = self.scale.max(frac.len());
                }
                None => self.all_decimal = false,
            }
        }
        if self.all_dates && !crate::clock::is_iso_date(v.as_bytes()) {
            self.all_dates = false;
        }
    }

    fn out_type(&self, kind: &str) -> OutType {
        match kind {
            "integer" if self.all_i64 => OutType::Int64,
            "integer" | "decimal" if self.all_decimal && self.int_digits + self.scale <= 38 => {
                OutType::Decimal {
                    precision: (self.int_digits + self.scale) as u8,
                    scale: self.scale as i8,
                }
            }
            "date" if self.all_dates => OutType::Date,
            _ => OutType::Text,
        }
    }
}

/// A version's rows as one Arrow record batch, with types from its profile (the whole table
/// in memory).
pub fn version_batch(store: &Store, v: &Version) -> Result<RecordBatch> {
    let types = column_types(store, v, true, &[])?;
    let mut whole = None;
    // With no bound on the rows, the one batch is the whole table.
    each_batch(store, v, &types, usize::MAX, |b| {
        whole = Some(b);
        Ok(())
    })?;
    Ok(whole.unwrap_or_else(|| RecordBatch::new_empty(schema_of(v, &types))))
}

/// The output type of every column: the given ones as given (an unknown column refused), the
/// others from the profile and a first pass over the rows when `typed`, else text.
fn column_types(
    store: &Store,
    v: &Version,
    typed: bool,
    given: &GivenTypes,
) -> Result<Vec<(OutType, Option<GivenType>)>> {
    for (c, _) in given {
        if !v.header.iter().any(|h| h == c) {
            return Err(Error::usage(format!(
                "column \"{c}\" is not in {}; its columns are: {}",
                v.label(),
                v.header.join(", ")
            )));
        }
    }
    let given_of = |name: &str| {
        given
            .iter()
            .rev()
            .find(|(c, _)| c == name)
            .map(|g| g.1.clone())
    };
    let profiles = if typed {
        store.lineage.profiles(v.id)?
    } else {
        Vec::new()
    };
    let kinds: Vec<Option<String>> = v
        .header
        .iter()
        .map(|name| {
            if given_of(name).is_some() {
                return None;
            }
            profiles
                .iter()
                .find(|p| &p.name == name)
                .map(|p| p.inferred_type.clone())
                .filter(|k| matches!(k.as_str(), "integer" | "decimal" | "date"))
        })
        .collect();
    let mut scans = vec![Scan::new(); v.header.len()];
    if kinds.iter().any(Option::is_some) {
        store.objects.each_row(v, |_, r| {
            for (j, f) in r.iter().enumerate() {
                if kinds.get(j).is_some_and(Option::is_some) {
                    let cell = String::from_utf8_lossy(f);
                    if !is_blank(v, &cell) {
                        scans[j].see(&cell);
                    }
                }
            }
            Ok(())
        })?;
    }
    Ok(v.header
        .iter()
        .enumerate()
        .map(|(j, name)| match given_of(name) {
            Some(g) => (g.out_type(), Some(g)),
            None => (
                kinds[j]
                    .as_deref()
                    .map_or(OutType::Text, |k| scans[j].out_type(k)),
                None,
            ),
        })
        .collect())
}

fn is_blank(v: &Version, cell: &str) -> bool {
    cell.is_empty() || v.null_tokens.iter().any(|t| t == cell)
}

fn arrow_type(t: OutType) -> DataType {
    match t {
        OutType::Int64 => DataType::Int64,
        OutType::Decimal { precision, scale } => DataType::Decimal128(precision.max(1), scale),
        OutType::Date => DataType::Date32,
        OutType::Timestamp { unit, zone } => {
            DataType::Timestamp(unit.arrow(), zone.map(|z| Arc::from(zone_name(z).as_str())))
        }
        OutType::Text => DataType::Utf8,
    }
}

/// An offset in seconds as Arrow names a fixed zone: `UTC` (for `UTC`, `Z` and `+00:00`
/// alike), `-05:30`.
fn zone_name(offset: i64) -> String {
    if offset == 0 {
        return "UTC".into();
    }
    let sign = if offset < 0 { '-' } else { '+' };
    let o = offset.abs();
    format!("{sign}{:02}:{:02}", o / 3600, o % 3600 / 60)
}

fn schema_of(v: &Version, types: &[(OutType, Option<GivenType>)]) -> Arc<Schema> {
    Arc::new(Schema::new(
        v.header
            .iter()
            .zip(types)
            .map(|(name, (t, _))| Field::new(name, arrow_type(*t), true))
            .collect::<Vec<_>>(),
    ))
}

/// One column of a batch from its cells, each checked against a given type: the first that
/// does not fit is refused with its place (the version, the line and data row, the column).
fn column_array(
    v: &Version,
    j: usize,
    t: OutType,
    given: Option<&GivenType>,
    cells: &[Option<String>],
    places: &[(u64, u64, u64)],
) -> Result<ArrayRef> {
    let Some(g) = given else {
        let values: Vec<Option<&str>> = cells.iter().map(|c| c.as_deref()).collect();
        return Ok(build_array(t, &values));
    };
    let refuse = |i: usize, value: &str, why: String| -> Error {
        let (byte, line, row) = places[i];
        Error::input(
            Path::new(&v.label()),
            Some(crate::error::Position {
                byte,
                line,
                record: Some(row),
                column: Some(j as u64 + 1),
            }),
            crate::error::InputProblem::NotOfType {
                column: v.header[j].clone(),
                row,
                given: g.name(),
                value: value.to_string(),
                why,
            },
        )
    };
    macro_rules! checked {
        ($f:expr) => {
            cells
                .iter()
                .enumerate()
                .map(|(i, c)| match c {
                    None => Ok(None),
                    Some(c) => $f(c.as_str()).map(Some).map_err(|why| refuse(i, c, why)),
                })
                .collect::<Result<Vec<_>>>()?
        };
    }
    Ok(match t {
        OutType::Int64 => Arc::new(Int64Array::from(checked!(integer_value))),
        OutType::Decimal { precision, scale } => Arc::new(
            Decimal128Array::from(checked!(|c| decimal_value(c, precision, scale)))
                .with_precision_and_scale(precision, scale)
                .map_err(|e| ErrorKind::Internal(format!("decimal({precision},{scale}): {e}")))?,
        ),
        OutType::Date => Arc::new(Date32Array::from(checked!(date_value))),
        OutType::Timestamp { unit, zone } => {
            let values: Vec<Option<i64>> = checked!(|c| timestamp_value(c, unit, zone));
            let tz = zone.map(zone_name);
            match unit {
                Unit::Second => Arc::new(TimestampSecondArray::from(values).with_timezone_opt(tz)),
                Unit::Milli => {
                    Arc::new(TimestampMillisecondArray::from(values).with_timezone_opt(tz))
                }
                Unit::Micro => {
                    Arc::new(TimestampMicrosecondArray::from(values).with_timezone_opt(tz))
                }
                Unit::Nano => {
                    Arc::new(TimestampNanosecondArray::from(values).with_timezone_opt(tz))
                }
            }
        }
        OutType::Text => {
            let values: Vec<Option<&str>> = cells.iter().map(|c| c.as_deref()).collect();
            build_array(OutType::Text, &values)
        }
    })
}

/// Reads `v` once and hands its rows to `f` as record batches of at most `rows` rows (one
/// empty batch for a version without rows), so at most one batch of cells is in memory.
fn each_batch(
    store: &Store,
    v: &Version,
    types: &[(OutType, Option<GivenType>)],
    rows: usize,
    mut f: impl FnMut(RecordBatch) -> Result<()>,
) -> Result<()> {
    let schema = schema_of(v, types);
    let width = v.header.len();
    let room = rows.min(ROWS_PER_GROUP);
    let mut cells: Vec<Vec<Option<String>>> = vec![Vec::with_capacity(room); width];
    // Where each row of the batch is: byte, line, 1-based data row (for a refused value).
    let mut places: Vec<(u64, u64, u64)> = Vec::with_capacity(room);
    let mut row = 0u64;
    let mut sent = false;
    let flush = |cells: &mut Vec<Vec<Option<String>>>,
                 places: &mut Vec<(u64, u64, u64)>,
                 f: &mut dyn FnMut(RecordBatch) -> Result<()>|
     -> Result<()> {
        let arrays = (0..width)
            .map(|j| column_array(v, j, types[j].0, types[j].1.as_ref(), &cells[j], places))
            .collect::<Result<Vec<_>>>()?;
        let batch = RecordBatch::try_new(schema.clone(), arrays).map_err(|e| -> Error {
            ErrorKind::Internal(format!("building the table of {}: {e}", v.label())).into()
        })?;
        for c in cells.iter_mut() {
            c.clear();
        }
        places.clear();
        f(batch)
    };
    store.objects.each_row(v, |_, r| {
        row += 1;
        for (j, field) in r.iter().enumerate().take(width) {
            let c = String::from_utf8_lossy(field);
            cells[j].push((!is_blank(v, &c)).then(|| c.into_owned()));
        }
        places.push((r.byte, r.line, row));
        if places.len() >= rows {
            sent = true;
            flush(&mut cells, &mut places, &mut f)?;
        }
        Ok(())
    })?;
    if !places.is_empty() || !sent {
        flush(&mut cells, &mut places, &mut f)?;
    }
    Ok(())
}

/// Writes version `v` as an Arrow IPC file into `out`, typed from its profile or, with `typed`
/// false, every column as text, the `given` columns as given: the form a dataframe library
/// reads without a CSV round trip.
pub fn write_ipc(
    store: &Store,
    v: &Version,
    typed: bool,
    given: &GivenTypes,
    out: &mut dyn std::io::Write,
) -> Result<()> {
    let types = column_types(store, v, typed, given)?;
    ipc_into(store, v, &types, out)
}

fn ipc_into(
    store: &Store,
    v: &Version,
    types: &[(OutType, Option<GivenType>)],
    out: &mut dyn std::io::Write,
) -> Result<()> {
    let internal = |e: &dyn std::fmt::Display| -> Error {
        ErrorKind::Internal(format!("writing {} as Arrow IPC: {e}", v.label())).into()
    };
    let mut w = arrow_ipc::writer::FileWriter::try_new(out, &schema_of(v, types))
        .map_err(|e| internal(&e))?;
    each_batch(store, v, types, ROWS_PER_GROUP, |b| {
        w.write(&b).map_err(|e| internal(&e))
    })?;
    w.finish().map_err(|e| internal(&e))
}

/// Writes version `v` as Parquet or Arrow IPC into `out`, typed from its profile, the `given`
/// columns as given (every value checked). The bytes depend only on the version's rows, the
/// given types and this build: the same version always gives the same bytes (Parquet with
/// Zstandard at level 3 and a fixed writer name; IPC uncompressed, which every reader takes).
/// The rows pass a row group (or record batch) at a time: memory holds one, not the table.
pub fn write_version(
    store: &Store,
    v: &Version,
    format: OutFormat,
    given: &GivenTypes,
    out: &mut dyn std::io::Write,
) -> Result<()> {
    let types = column_types(store, v, true, given)?;
    let internal = |e: &dyn std::fmt::Display| -> Error {
        ErrorKind::Internal(format!("writing {} as {:?}: {e}", v.label(), format)).into()
    };
    let written = |e: std::io::Error| Error::io(Path::new("(output)"), e);
    match format {
        OutFormat::Parquet => {
            use parquet::basic::{Compression, ZstdLevel};
            use parquet::file::properties::WriterProperties;
            let level = ZstdLevel::try_new(3).map_err(|e| internal(&e))?;
            let props = WriterProperties::builder()
                .set_compression(Compression::ZSTD(level))
                .set_created_by(crate::TOOL_VERSION.to_string())
                .set_max_row_group_row_count(Some(ROWS_PER_GROUP))
                .build();
            // The writer needs a sendable sink: it writes into a buffer that is emptied into
            // `out` after every row group, so the buffer holds one row group at most.
            let mut w =
                parquet::arrow::ArrowWriter::try_new(Vec::new(), schema_of(v, &types), Some(props))
                    .map_err(|e| internal(&e))?;
            each_batch(store, v, &types, ROWS_PER_GROUP, |b| {
                w.write(&b).map_err(|e| internal(&e))?;
                w.flush().map_err(|e| internal(&e))?;
                out.write_all(&std::mem::take(w.inner_mut()))
                    .map_err(written)
            })?;
            let rest = w.into_inner().map_err(|e| internal(&e))?;
            out.write_all(&rest).map_err(written)
        }
        OutFormat::ArrowIpc => ipc_into(store, v, &types, out),
    }
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
        let mut scan = Scan::new();
        for v in ["1.5", "-20.25"] {
            scan.see(v);
        }
        assert_eq!(
            scan.out_type("decimal"),
            OutType::Decimal {
                precision: 4,
                scale: 2
            }
        );
    }
}
