//! Date reading checked against Python's datetime module (a general-purpose reference): every
//! day from 1999 to 2031, written as an ISO week date, an ordinal date and in basic format,
//! must read back as the calendar date Python gives.

use sluice::ops::date::parse_date;

#[test]
fn week_and_ordinal_dates_agree_with_python_datetime() {
    let script = r#"
import datetime
d = datetime.date(1999, 1, 1)
while d.year < 2032:
    y, w, wd = d.isocalendar()
    print(f"{y:04d}-W{w:02d}-{wd} {d.year:04d}-{d.timetuple().tm_yday:03d} {d:%Y%m%d} {d.isoformat()}")
    d += datetime.timedelta(days=1)
"#;
    let out = std::process::Command::new("python3")
        .args(["-c", script])
        .output()
        .expect("python3 is needed for the reference checks");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    let mut n = 0;
    for line in text.lines() {
        let f: Vec<&str> = line.split(' ').collect();
        for form in &f[..3] {
            assert_eq!(parse_date(form, None).as_deref(), Ok(f[3]), "{form}");
        }
        n += 1;
    }
    assert!(n > 12_000, "only {n} days checked");
}
