//! Detecting how a delimited file is written: which of `,` `;` tab `|` separates its fields, and
//! how its lines end. Detection reads only a sample from the start of the file; a delimiter given
//! on the command line always wins, and what was detected is recorded with the version so that
//! the same bytes are always read the same way.

use super::parse::{Parser, RawRecord};

/// The candidates, in the order that breaks ties.
pub const CANDIDATES: [u8; 4] = [b',', b';', b'\t', b'|'];

/// How many bytes from the start of the file detection looks at.
pub const SAMPLE_BYTES: usize = 64 * 1024;

/// How many records of the sample detection considers.
const SAMPLE_RECORDS: usize = 200;

/// Picks the delimiter under which the sample's records have the most consistent field count
/// (more than one field), less the records in which a quote character ends up inside a value
/// (a sign that the quoting does not fit that delimiter), preferring more fields, then the
/// order of [`CANDIDATES`]. A sample in
/// which no candidate gives more than one field is one column, read with `,`.
///
/// `complete` says whether the sample is the whole file; if not, its last record may be cut
/// short and is left out.
pub fn detect_delimiter(sample: &[u8], complete: bool) -> u8 {
    let mut best: Option<(u8, i64, usize)> = None; // (delimiter, score, fields)
    for &d in &CANDIDATES {
        let (counts, polluted) = field_counts(sample, d, complete);
        if counts.is_empty() {
            continue;
        }
        // The most common field count, and how many records have it.
        let mut sorted = counts.clone();
        sorted.sort_unstable();
        let (mut mode, mut mode_n, mut i) = (0usize, 0usize, 0usize);
        while i < sorted.len() {
            let j = sorted[i..].iter().take_while(|&&c| c == sorted[i]).count();
            if j > mode_n || (j == mode_n && sorted[i] > mode) {
                mode = sorted[i];
                mode_n = j;
            }
            i += j;
        }
        if mode < 2 {
            continue;
        }
        let score = mode_n as i64 - polluted as i64;
        let better = match best {
            None => true,
            Some((_, n, f)) => score > n || (score == n && mode > f),
        };
        if better {
            best = Some((d, score, mode));
        }
    }
    best.map_or(b',', |(d, _, _)| d)
}

/// Field counts of the sample's records, and how many records have a quote inside a value.
fn field_counts(sample: &[u8], delimiter: u8, complete: bool) -> (Vec<usize>, usize) {
    let mut p = Parser::new(delimiter, 0);
    let mut counts = Vec::new();
    let mut polluted = 0usize;
    let mut cb = |r: RawRecord<'_>| -> Result<(), ()> {
        if counts.len() < SAMPLE_RECORDS + 1 {
            counts.push(r.len());
            if memchr::memchr(b'"', r.fields).is_some() {
                polluted += 1;
            }
            Ok(())
        } else {
            Err(())
        }
    };
    if p.feed(sample, &mut cb).is_ok() && complete {
        let _ = p.finish(&mut cb);
    }
    if counts.len() > SAMPLE_RECORDS {
        counts.truncate(SAMPLE_RECORDS);
    }
    (counts, polluted)
}

/// Names the line endings used outside quoted fields in the sample: "lf", "crlf", "cr",
/// "mixed", or "none" when the sample holds no line break.
pub fn detect_line_ending(sample: &[u8]) -> &'static str {
    let (mut lf, mut crlf, mut cr) = (0u64, 0u64, 0u64);
    let mut in_quotes = false;
    let mut i = 0;
    while i < sample.len() {
        match sample[i] {
            b'"' => in_quotes = !in_quotes,
            b'\r' if !in_quotes => {
                if sample.get(i + 1) == Some(&b'\n') {
                    crlf += 1;
                    i += 1;
                } else if i + 1 < sample.len() {
                    cr += 1;
                }
            }
            b'\n' if !in_quotes => lf += 1,
            _ => {}
        }
        i += 1;
    }
    match (lf > 0, crlf > 0, cr > 0) {
        (false, false, false) => "none",
        (true, false, false) => "lf",
        (false, true, false) => "crlf",
        (false, false, true) => "cr",
        _ => "mixed",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn detects_each_candidate() {
        assert_eq!(detect_delimiter(b"a,b,c\n1,2,3\n", true), b',');
        assert_eq!(detect_delimiter(b"a;b;c\n1,5;2;3\n", true), b';');
        assert_eq!(detect_delimiter(b"a\tb\n1\t2\n", true), b'\t');
        assert_eq!(detect_delimiter(b"a|b\n1|2\n", true), b'|');
        assert_eq!(detect_delimiter(b"just one column\nanother\n", true), b',');
    }

    #[test]
    fn quoted_delimiters_do_not_count() {
        // Commas only inside quotes; semicolons separate.
        assert_eq!(
            detect_delimiter(b"\"a,1\";\"b,2\"\n\"c,3\";\"d,4\"\n", true),
            b';'
        );
    }

    #[test]
    fn line_endings() {
        assert_eq!(detect_line_ending(b"a\nb\n"), "lf");
        assert_eq!(detect_line_ending(b"a\r\nb\r\n"), "crlf");
        assert_eq!(detect_line_ending(b"a\rb\rc"), "cr");
        assert_eq!(detect_line_ending(b"a\r\nb\nc"), "mixed");
        assert_eq!(detect_line_ending(b"\"x\ny\",z"), "none");
    }
}
