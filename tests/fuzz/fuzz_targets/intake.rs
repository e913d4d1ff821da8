//! Intake's reading side on arbitrary bytes: byte-order mark handling, decoding, delimiter and
//! line-ending detection, the push parser and UTF-8 validation. Laws checked on every input:
//! nothing panics; reading the bytes in one piece and in several pieces (split where the input
//! says) gives the same error, or when none the same records with the same positions; positions only
//! move forward; the UTF-8 check finds the same first bad byte whatever the pieces.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;
use sluice::table::stream::{ReadSettings, RecordStream, Utf8Check};

/// One record as the parser gave it: fields, their ends, byte, line, index.
type Seen = (Vec<u8>, Vec<usize>, u64, u64, u64);

fn read(data: &[u8], settings: &ReadSettings, cuts: &[usize]) -> (Vec<Seen>, Option<String>) {
    let path = Path::new("fuzz.csv");
    let mut rs = RecordStream::new(path, settings.clone());
    let mut seen = Vec::new();
    let mut on_record = |r: sluice::table::RawRecord<'_>| {
        seen.push((r.fields.to_vec(), r.ends.to_vec(), r.byte, r.line, r.index));
        Ok(())
    };
    let mut start = 0;
    let mut bounds: Vec<usize> = cuts
        .iter()
        .copied()
        .filter(|&c| c > 0 && c < data.len())
        .collect();
    bounds.sort_unstable();
    bounds.dedup();
    bounds.push(data.len());
    for end in bounds {
        if let Err(e) = rs.push(&data[start..end], end == data.len(), &mut on_record) {
            return (seen, Some(e.to_string()));
        }
        start = end;
    }
    let err = rs.finish(&mut on_record).err().map(|e| e.to_string());
    (seen, err)
}

fn utf8_first_bad(data: &[u8], cuts: &[usize]) -> Result<(), u64> {
    let mut check = Utf8Check::default();
    let mut start = 0;
    for &c in cuts.iter().chain(std::iter::once(&data.len())) {
        let c = c.clamp(start, data.len());
        check.push(&data[start..c])?;
        start = c;
    }
    check.finish()
}

fuzz_target!(|input: &[u8]| {
    if input.len() < 3 {
        return;
    }
    let (control, data) = (&input[..3], &input[3..]);
    let delimiter = match control[0] & 3 {
        0 => None,
        1 => Some(b','),
        2 => Some(b';'),
        _ => Some(b'\t'),
    };
    let encoding = match (control[0] >> 2) & 3 {
        1 => Some(encoding_rs_for("windows-1252")),
        2 => Some(encoding_rs_for("utf-16le")),
        _ => None,
    };
    let settings = ReadSettings {
        delimiter,
        encoding,
        max_record: None,
    };
    let (whole, whole_err) = read(data, &settings, &[]);
    for r in whole.windows(2) {
        assert!(
            r[0].2 < r[1].2,
            "record bytes go back: {} then {}",
            r[0].2,
            r[1].2
        );
        assert!(
            r[0].3 <= r[1].3,
            "record lines go back: {} then {}",
            r[0].3,
            r[1].3
        );
        assert_eq!(r[0].4 + 1, r[1].4, "record numbers skip");
    }
    // The split comparison needs the delimiter the whole read detected, since detection
    // looks only at the first piece.
    let mut pinned = settings.clone();
    if pinned.delimiter.is_none() {
        let mut rs = RecordStream::new(Path::new("fuzz.csv"), settings.clone());
        if rs.push(data, true, &mut |_| Ok(())).is_err() {
            return;
        }
        pinned.delimiter = rs.dialect(true).delimiter.bytes().next();
        let (again, again_err) = read(data, &pinned, &[]);
        assert_eq!(
            (&whole, &whole_err),
            (&again, &again_err),
            "pinning the detected delimiter changed the records"
        );
    }
    let a = (control[1] as usize * data.len()) / 256;
    let b = (control[2] as usize * data.len()) / 256;
    for cuts in [
        vec![a],
        vec![a, b],
        (1..data.len())
            .step_by(1 + control[2] as usize % 7)
            .collect(),
    ] {
        let (split, split_err) = read(data, &pinned, &cuts);
        assert_eq!(
            whole_err, split_err,
            "errors differ when read in pieces at {cuts:?}"
        );
        // Records before an error may differ (a piece refused whole yields none); intake
        // records nothing of a refused file, so only complete reads must agree.
        if whole_err.is_none() {
            assert_eq!(
                whole, split,
                "records differ when read in pieces at {cuts:?}"
            );
        }
        assert_eq!(
            utf8_first_bad(data, &[]),
            utf8_first_bad(data, &cuts),
            "UTF-8 check differs at {cuts:?}"
        );
    }
    assert_eq!(
        utf8_first_bad(data, &[]).err(),
        std::str::from_utf8(data)
            .err()
            .map(|e| e.valid_up_to() as u64),
        "the UTF-8 check disagrees with the standard library"
    );
});

fn encoding_rs_for(label: &str) -> &'static encoding_rs::Encoding {
    sluice::table::stream::encoding_for(label).expect("a known label")
}
