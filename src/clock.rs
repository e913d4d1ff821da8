//! Time and the Gregorian calendar. sluice writes every timestamp as RFC 3339 UTC
//! (`2026-12-01T21:59:42.123Z`) and checks calendar dates itself, so no locale or time zone
//! database is involved. Only the edges of the engine read the clock (steps, audit entries);
//! operations never do, which is part of what keeps them deterministic.

use std::time::{SystemTime, UNIX_EPOCH};

/// Now, as RFC 3339 UTC with millisecond precision.
pub fn now_rfc3339() -> String {
    format_rfc3339(SystemTime::now())
}

/// A `SystemTime` as RFC 3339 UTC with millisecond precision. Times before 1970 are clamped to
/// the epoch (they do not occur for file modification times in practice).
pub fn format_rfc3339(t: SystemTime) -> String {
    let d = t.duration_since(UNIX_EPOCH).unwrap_or_default();
    let secs = d.as_secs() as i64;
    let millis = d.subsec_millis();
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400);
    let (y, m, day) = civil_from_days(days);
    format!(
        "{y:04}-{m:02}-{day:02}T{:02}:{:02}:{:02}.{millis:03}Z",
        sod / 3600,
        (sod % 3600) / 60,
        sod % 60
    )
}

/// Whether `y` is a leap year in the proleptic Gregorian calendar (ISO 8601-1:2019 uses it):
/// divisible by 4, except centuries, except those divisible by 400.
pub fn is_leap_year(y: i64) -> bool {
    (y % 4 == 0 && y % 100 != 0) || y % 400 == 0
}

/// Number of days in month `m` (1-12) of year `y`, or `None` for a month out of range.
pub fn days_in_month(y: i64, m: u32) -> Option<u32> {
    Some(match m {
        1 | 3 | 5 | 7 | 8 | 10 | 12 => 31,
        4 | 6 | 9 | 11 => 30,
        2 if is_leap_year(y) => 29,
        2 => 28,
        _ => return None,
    })
}

/// Whether y-m-d is a real date in the Gregorian calendar.
pub fn is_valid_date(y: i64, m: u32, d: u32) -> bool {
    matches!(days_in_month(y, m), Some(n) if d >= 1 && d <= n)
}

/// Converts days since 1970-01-01 to (year, month, day). The algorithm is the well-known
/// era-based conversion for the proleptic Gregorian calendar (common practice).
pub fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

/// Recognises an ISO 8601 calendar date in extended format, `YYYY-MM-DD`, that exists in the
/// Gregorian calendar. This is the form the profile calls a date; other spellings are text
/// until a cleaning step normalises them.
pub fn is_iso_date(s: &[u8]) -> bool {
    if s.len() != 10 || s[4] != b'-' || s[7] != b'-' {
        return false;
    }
    let digits = |r: &[u8]| -> Option<u32> {
        let mut v = 0u32;
        for &c in r {
            if !c.is_ascii_digit() {
                return None;
            }
            v = v * 10 + u32::from(c - b'0');
        }
        Some(v)
    };
    match (digits(&s[0..4]), digits(&s[5..7]), digits(&s[8..10])) {
        (Some(y), Some(m), Some(d)) => is_valid_date(i64::from(y), m, d),
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn epoch_and_known_instant() {
        assert_eq!(format_rfc3339(UNIX_EPOCH), "1970-01-01T00:00:00.000Z");
        // 2024-02-29T12:00:00Z is 1709208000 seconds after the epoch (computed with Python's
        // datetime, a general-purpose reference).
        let t = UNIX_EPOCH + std::time::Duration::from_secs(1_709_208_000);
        assert_eq!(format_rfc3339(t), "2024-02-29T12:00:00.000Z");
    }

    // Gregorian leap-year rules, ISO 8601-1:2019 (uses the Gregorian calendar).
    #[test]
    fn gregorian_dates() {
        assert!(is_iso_date(b"2024-02-29"));
        assert!(is_iso_date(b"2000-02-29"));
        assert!(!is_iso_date(b"2023-02-29"));
        assert!(!is_iso_date(b"1900-02-29"));
        assert!(!is_iso_date(b"2024-13-01"));
        // Not ISO 8601: the month and day need two digits.
        assert!(!is_iso_date(b"2024-1-5"));
    }
}
