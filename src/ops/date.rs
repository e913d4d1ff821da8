//! Reading dates written in mixed formats into ISO 8601 (`YYYY-MM-DD`, or
//! `YYYY-MM-DDTHH:MM:SS` with the fraction and offset when the value has them).
//!
//! Accepted forms:
//! - ISO 8601 calendar dates `2026-07-03` and `20260703` (basic format), week dates
//!   `2026-W27-5` and ordinal dates `2026-184`, each optionally followed by a time
//!   (`T` or one space, `HH:MM`, `HH:MM:SS`, `HH:MM:SS.fff`) and an offset (`Z`, `+02:00`,
//!   `-0500`);
//! - numeric dates with `/`, `.` or `-` between day, month and a four-digit year, in the order
//!   given by `--order dmy|mdy|ymd`; without an order a date is read only when just one order
//!   makes it a real date (`13/04/2026`), and `03/04/2026` is refused as ambiguous;
//! - English month names or their first three letters: `3 Jul 2026`, `Jul 3, 2026`,
//!   `3 July 2026`, `July 3 2026`.
//!
//! Years must have four digits (a two-digit year would be a guess about the century). Dates
//! must exist in the Gregorian calendar (ISO 8601 uses it): `2023-02-29` is an error, never
//! rolled over to March.

use crate::clock::{days_in_month, is_leap_year, is_valid_date};

/// The order of the parts of a numeric date.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DateOrder {
    Dmy,
    Mdy,
    Ymd,
}

/// Why a value could not be read as a date.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum DateProblem {
    /// Day and month could be either way round; `--order` decides.
    Ambiguous,
    /// The parts are understood, but no such day exists.
    NoSuchDate,
    /// Not a date in any accepted form.
    NotADate,
}

const MONTHS: [&str; 12] = [
    "january",
    "february",
    "march",
    "april",
    "may",
    "june",
    "july",
    "august",
    "september",
    "october",
    "november",
    "december",
];

fn month_from_name(w: &str) -> Option<u32> {
    let w = w.to_lowercase();
    let w = w.trim_end_matches('.');
    if w.len() < 3 {
        return None;
    }
    MONTHS
        .iter()
        .position(|m| {
            *m == w || (w.len() == 3 && m.starts_with(w)) || (w == "sept" && *m == "september")
        })
        .map(|i| i as u32 + 1)
}

fn digits(s: &str) -> Option<u32> {
    (!s.is_empty() && s.len() <= 4 && s.bytes().all(|b| b.is_ascii_digit()))
        .then(|| s.parse().ok())
        .flatten()
}

fn ymd(y: u32, m: u32, d: u32) -> Result<String, DateProblem> {
    if is_valid_date(i64::from(y), m, d) {
        Ok(format!("{y:04}-{m:02}-{d:02}"))
    } else {
        Err(DateProblem::NoSuchDate)
    }
}

/// Reads one date; `Ok(iso)` or why not.
pub fn parse_date(text: &str, order: Option<DateOrder>) -> Result<String, DateProblem> {
    let s = text.trim();
    if let Some(r) = iso(s) {
        return r;
    }
    if let Some(r) = named_month(s) {
        return r;
    }
    numeric(s, order)
}

/// ISO 8601 forms, with an optional time and offset. `None` when `s` is not shaped like one.
fn iso(s: &str) -> Option<Result<String, DateProblem>> {
    let (date, time) = match s.find(['T', ' ']) {
        Some(i) => (&s[..i], Some(&s[i + 1..])),
        None => (s, None),
    };
    let b = date.as_bytes();
    let day = if b.len() == 10 && b[4] == b'-' && b[7] == b'-' {
        let (y, m, d) = (
            digits(&date[0..4])?,
            digits(&date[5..7])?,
            digits(&date[8..10])?,
        );
        ymd(y, m, d)
    } else if b.len() == 8 && b.iter().all(u8::is_ascii_digit) {
        let (y, m, d) = (
            digits(&date[0..4])?,
            digits(&date[4..6])?,
            digits(&date[6..8])?,
        );
        ymd(y, m, d)
    } else if b.len() == 10 && &date[4..6] == "-W" && b[8] == b'-' {
        let (y, w, wd) = (
            digits(&date[0..4])?,
            digits(&date[6..8])?,
            digits(&date[9..10])?,
        );
        week_date(y as i64, w, wd)
    } else if b.len() == 8 && b[4] == b'-' && b[5..].iter().all(u8::is_ascii_digit) {
        let (y, n) = (digits(&date[0..4])?, digits(&date[5..8])?);
        ordinal_date(y as i64, n)
    } else {
        return None;
    };
    let day = match day {
        Ok(d) => d,
        Err(e) => return Some(Err(e)),
    };
    match time {
        None => Some(Ok(day)),
        Some(t) => Some(
            clock_time(t)
                .map(|t| format!("{day}T{t}"))
                .ok_or(DateProblem::NotADate),
        ),
    }
}

/// `HH:MM[:SS[.fff]]` and an optional `Z` / `±HH:MM` / `±HHMM`, written back in full.
fn clock_time(t: &str) -> Option<String> {
    let (main, offset) = match t.find(['Z', '+', '-']) {
        Some(i) => (&t[..i], Some(&t[i..])),
        None => (t, None),
    };
    let parts: Vec<&str> = main.split(':').collect();
    if parts.len() < 2 || parts.len() > 3 {
        return None;
    }
    let h = digits(parts[0]).filter(|_| parts[0].len() == 2)?;
    let m = digits(parts[1]).filter(|_| parts[1].len() == 2)?;
    let (sec, frac) = match parts.get(2) {
        None => (0, String::new()),
        Some(sp) => {
            let (whole, frac) = match sp.split_once('.') {
                Some((w, f)) if !f.is_empty() && f.bytes().all(|b| b.is_ascii_digit()) => {
                    (w, format!(".{f}"))
                }
                Some(_) => return None,
                None => (*sp, String::new()),
            };
            (digits(whole).filter(|_| whole.len() == 2)?, frac)
        }
    };
    // 24:00 and leap seconds are left out on purpose: they need a calendar decision.
    if h > 23 || m > 59 || sec > 59 {
        return None;
    }
    let off = match offset {
        None => String::new(),
        Some("Z") => "Z".to_string(),
        Some(o) => {
            let sign = &o[..1];
            let rest = o[1..].replace(':', "");
            if rest.len() != 4 {
                return None;
            }
            let (oh, om) = (digits(&rest[..2])?, digits(&rest[2..])?);
            if oh > 23 || om > 59 {
                return None;
            }
            format!("{sign}{oh:02}:{om:02}")
        }
    };
    Some(format!("{h:02}:{m:02}:{sec:02}{frac}{off}"))
}

/// Days since 1970-01-01 of a Gregorian date (the inverse of `clock::civil_from_days`).
fn days_from_civil(y: i64, m: u32, d: u32) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y.rem_euclid(400);
    let mp = (i64::from(m) + 9) % 12;
    let doy = (153 * mp + 2) / 5 + i64::from(d) - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

fn from_days(days: i64) -> String {
    let (y, m, d) = crate::clock::civil_from_days(days);
    format!("{y:04}-{m:02}-{d:02}")
}

/// ISO week date: week 1 is the week with the year's first Thursday; days 1 (Monday) to 7.
fn week_date(y: i64, week: u32, weekday: u32) -> Result<String, DateProblem> {
    if !(1..=7).contains(&weekday) || week == 0 {
        return Err(DateProblem::NoSuchDate);
    }
    // 1970-01-01 was a Thursday: weekday (1 = Monday) of a day number is (days + 3) mod 7 + 1.
    let weekday_of = |days: i64| (days + 3).rem_euclid(7) + 1;
    let jan4 = days_from_civil(y, 1, 4);
    let week1_monday = jan4 - (weekday_of(jan4) - 1);
    let next_jan4 = days_from_civil(y + 1, 1, 4);
    let next_week1_monday = next_jan4 - (weekday_of(next_jan4) - 1);
    let weeks_in_year = (next_week1_monday - week1_monday) / 7;
    if i64::from(week) > weeks_in_year {
        return Err(DateProblem::NoSuchDate);
    }
    Ok(from_days(
        week1_monday + 7 * (i64::from(week) - 1) + i64::from(weekday) - 1,
    ))
}

fn ordinal_date(y: i64, n: u32) -> Result<String, DateProblem> {
    let len = if is_leap_year(y) { 366 } else { 365 };
    if n == 0 || n > len {
        return Err(DateProblem::NoSuchDate);
    }
    Ok(from_days(days_from_civil(y, 1, 1) + i64::from(n) - 1))
}

/// `3 Jul 2026`, `Jul 3, 2026`, `3 July 2026`, `July 3 2026`.
fn named_month(s: &str) -> Option<Result<String, DateProblem>> {
    let words: Vec<&str> = s
        .split(|c: char| c.is_whitespace() || c == ',')
        .filter(|w| !w.is_empty())
        .collect();
    if words.len() != 3 {
        return None;
    }
    let (d, m, y) = if let Some(m) = month_from_name(words[1]) {
        (words[0], m, words[2])
    } else if let Some(m) = month_from_name(words[0]) {
        (words[1], m, words[2])
    } else {
        return None;
    };
    let d = d.trim_end_matches(['.', 's', 't', 'n', 'd', 'r', 'h']);
    let (d, y) = (digits(d)?, digits(y).filter(|_| y.len() == 4)?);
    Some(ymd(y, m, d))
}

fn numeric(s: &str, order: Option<DateOrder>) -> Result<String, DateProblem> {
    let sep = s
        .chars()
        .find(|c| matches!(c, '/' | '.' | '-'))
        .ok_or(DateProblem::NotADate)?;
    let parts: Vec<&str> = s.split(sep).collect();
    if parts.len() != 3 || parts.iter().any(|p| digits(p).is_none()) {
        return Err(DateProblem::NotADate);
    }
    let n: Vec<u32> = parts.iter().filter_map(|p| digits(p)).collect();
    if parts[0].len() == 4 {
        // Year first is always year, month, day.
        return ymd(n[0], n[1], n[2]);
    }
    if parts[2].len() != 4 {
        return Err(DateProblem::NotADate);
    }
    let (a, b, y) = (n[0], n[1], n[2]);
    match order {
        Some(DateOrder::Dmy) => ymd(y, b, a),
        Some(DateOrder::Mdy) => ymd(y, a, b),
        Some(DateOrder::Ymd) => Err(DateProblem::NotADate),
        None => {
            let as_dmy = is_valid_date(i64::from(y), b, a);
            let as_mdy = is_valid_date(i64::from(y), a, b);
            match (as_dmy, as_mdy) {
                (true, true) if a == b => ymd(y, a, b),
                (true, true) => Err(DateProblem::Ambiguous),
                (true, false) => ymd(y, b, a),
                (false, true) => ymd(y, a, b),
                (false, false) => {
                    // Both readings fail: say "no such date" when a reading has a real month.
                    if days_in_month(i64::from(y), b).is_some()
                        || days_in_month(i64::from(y), a).is_some()
                    {
                        Err(DateProblem::NoSuchDate)
                    } else {
                        Err(DateProblem::NotADate)
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // ISO 8601-1:2019 (Gregorian calendar): valid and invalid dates, basic format, week dates.
    // Week-date values as given in the project's reference sheet, verified with Python
    // datetime's isocalendar (a general-purpose reference).
    #[test]
    fn iso_8601_reference_values() {
        assert_eq!(parse_date("2024-02-29", None), Ok("2024-02-29".into()));
        assert_eq!(parse_date("2000-02-29", None), Ok("2000-02-29".into()));
        assert_eq!(parse_date("20240229", None), Ok("2024-02-29".into()));
        assert_eq!(parse_date("2024-W09-4", None), Ok("2024-02-29".into()));
        assert_eq!(parse_date("2020-W53-7", None), Ok("2021-01-03".into()));
        assert_eq!(parse_date("2025-W01-1", None), Ok("2024-12-30".into()));
        assert_eq!(parse_date("2024-060", None), Ok("2024-02-29".into()));
        assert_eq!(parse_date("2023-02-29", None), Err(DateProblem::NoSuchDate));
        assert_eq!(parse_date("1900-02-29", None), Err(DateProblem::NoSuchDate));
        assert_eq!(parse_date("2024-13-01", None), Err(DateProblem::NoSuchDate));
        assert_eq!(parse_date("2021-W53-1", None), Err(DateProblem::NoSuchDate));
        // Not ISO 8601 (the month and day need two digits), but year first is unambiguous:
        // read as year, month, day and written in ISO form.
        assert_eq!(parse_date("2024-1-5", None), Ok("2024-01-05".into()));
    }

    #[test]
    fn times_and_offsets() {
        assert_eq!(
            parse_date("2026-07-03T14:05", None),
            Ok("2026-07-03T14:05:00".into())
        );
        assert_eq!(
            parse_date("2026-07-03 14:05:09.25Z", None),
            Ok("2026-07-03T14:05:09.25Z".into())
        );
        assert_eq!(
            parse_date("2026-07-03T14:05:00+0200", None),
            Ok("2026-07-03T14:05:00+02:00".into())
        );
        assert_eq!(
            parse_date("2026-07-03T24:00", None),
            Err(DateProblem::NotADate)
        );
    }

    #[test]
    fn numeric_orders_and_ambiguity() {
        assert_eq!(parse_date("03/04/2026", None), Err(DateProblem::Ambiguous));
        assert_eq!(
            parse_date("03/04/2026", Some(DateOrder::Dmy)),
            Ok("2026-04-03".into())
        );
        assert_eq!(
            parse_date("03/04/2026", Some(DateOrder::Mdy)),
            Ok("2026-03-04".into())
        );
        assert_eq!(parse_date("13/04/2026", None), Ok("2026-04-13".into()));
        assert_eq!(parse_date("04/13/2026", None), Ok("2026-04-13".into()));
        assert_eq!(parse_date("05.05.2026", None), Ok("2026-05-05".into()));
        assert_eq!(
            parse_date("3/7/2026", Some(DateOrder::Dmy)),
            Ok("2026-07-03".into())
        );
        assert_eq!(parse_date("2026/07/03", None), Ok("2026-07-03".into()));
        assert_eq!(
            parse_date("31/02/2026", Some(DateOrder::Dmy)),
            Err(DateProblem::NoSuchDate)
        );
        assert_eq!(
            parse_date("03/04/26", Some(DateOrder::Dmy)),
            Err(DateProblem::NotADate)
        );
    }

    // The table in README.md.
    #[test]
    fn readme_examples() {
        use DateOrder::{Dmy, Mdy};
        let none = Err(DateProblem::Ambiguous);
        assert_eq!(parse_date("03/04/2026", None), none);
        assert_eq!(
            parse_date("03/04/2026", Some(Dmy)).as_deref(),
            Ok("2026-04-03")
        );
        assert_eq!(
            parse_date("03/04/2026", Some(Mdy)).as_deref(),
            Ok("2026-03-04")
        );
        assert_eq!(parse_date("13/04/2026", None).as_deref(), Ok("2026-04-13"));
        assert_eq!(
            parse_date("13/04/2026", Some(Mdy)),
            Err(DateProblem::NoSuchDate)
        );
        for o in [None, Some(Dmy), Some(Mdy)] {
            assert_eq!(parse_date("8 Jul 2026", o).as_deref(), Ok("2026-07-08"));
            assert_eq!(
                parse_date("2026-07-03 14:05+0200", o).as_deref(),
                Ok("2026-07-03T14:05:00+02:00")
            );
            assert_eq!(parse_date("2023-02-29", o), Err(DateProblem::NoSuchDate));
        }
    }

    #[test]
    fn month_names() {
        assert_eq!(parse_date("8 Jul 2026", None), Ok("2026-07-08".into()));
        assert_eq!(parse_date("Jul 8, 2026", None), Ok("2026-07-08".into()));
        assert_eq!(
            parse_date("8 September 2026", None),
            Ok("2026-09-08".into())
        );
        assert_eq!(parse_date("Sept 8 2026", None), Ok("2026-09-08".into()));
        assert_eq!(
            parse_date("31 Jun 2026", None),
            Err(DateProblem::NoSuchDate)
        );
        assert_eq!(parse_date("someday", None), Err(DateProblem::NotADate));
    }
}
