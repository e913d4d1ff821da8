//! From bytes to records: byte-order mark, text encoding, delimiter detection and parsing, fed a
//! piece at a time. Intake drives a [`RecordStream`] from a second thread's chunks; reading a
//! stored version drives one from a file. Both therefore read a given set of bytes identically.

use std::io::{self, Read};
use std::path::Path;

use encoding_rs::{Decoder, DecoderResult, Encoding, UTF_8};

use super::dialect::{detect_delimiter, detect_line_ending, SAMPLE_BYTES};
use super::parse::{Parser, RawRecord};
use crate::error::{Error, InputProblem, Position, Result};
use crate::hash::STREAM_BUF;
use crate::model::Dialect;

pub const UTF8_BOM: &[u8] = b"\xEF\xBB\xBF";

/// Looks up an encoding by its WHATWG label (`windows-1252`, `latin1`, `utf-16le`, ...).
pub fn encoding_for(label: &str) -> Result<&'static Encoding> {
    Encoding::for_label(label.trim().as_bytes()).ok_or_else(|| {
        Error::usage(format!(
            "unknown encoding \"{label}\"; use a WHATWG encoding label such as utf-8, windows-1252, iso-8859-15, shift_jis or utf-16le"
        ))
    })
}

/// Reads until `buf` is full or the input ends; returns the number of bytes read. Short only at
/// the end of the input.
pub fn read_full(r: &mut impl Read, buf: &mut [u8]) -> io::Result<usize> {
    let mut n = 0;
    while n < buf.len() {
        match r.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => n += k,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(n)
}

/// Validates UTF-8 across piece boundaries.
#[derive(Default)]
pub struct Utf8Check {
    carry: Vec<u8>,
    offset: u64,
}

impl Utf8Check {
    /// Checks the next piece; `Err(byte)` gives the 0-based offset of the first invalid byte.
    pub fn push(&mut self, mut s: &[u8]) -> std::result::Result<(), u64> {
        if !self.carry.is_empty() {
            // Complete the character split across pieces, one byte at a time.
            while !self.carry.is_empty() && !s.is_empty() {
                self.carry.push(s[0]);
                s = &s[1..];
                match std::str::from_utf8(&self.carry) {
                    Ok(_) => {
                        self.offset += self.carry.len() as u64;
                        self.carry.clear();
                    }
                    Err(e) if e.error_len().is_some() => return Err(self.offset),
                    Err(_) => {}
                }
            }
            if s.is_empty() {
                return Ok(());
            }
        }
        match std::str::from_utf8(s) {
            Ok(_) => {
                self.offset += s.len() as u64;
                Ok(())
            }
            Err(e) => {
                let good = e.valid_up_to();
                if e.error_len().is_some() {
                    return Err(self.offset + good as u64);
                }
                self.offset += good as u64;
                self.carry.extend_from_slice(&s[good..]);
                Ok(())
            }
        }
    }

    /// The input ended: a character left incomplete is invalid.
    pub fn finish(&self) -> std::result::Result<(), u64> {
        if self.carry.is_empty() {
            Ok(())
        } else {
            Err(self.offset)
        }
    }
}

/// The bound on one record's field bytes (the header's too) at intake unless the user raises
/// it (`--max-record-mib`): 32 MiB. The parser's record buffer never grows past it, so a file
/// that is one enormous line is refused with its position instead of filling memory.
pub const DEFAULT_MAX_RECORD_BYTES: u64 = 32 << 20;

static MAX_RECORD_BYTES: std::sync::atomic::AtomicU64 =
    std::sync::atomic::AtomicU64::new(DEFAULT_MAX_RECORD_BYTES);

/// Sets the record bound for the rest of the process (the binary calls it once, from
/// `--max-record-mib`, as it installs the progress listener).
pub fn set_max_record_bytes(bytes: u64) {
    MAX_RECORD_BYTES.store(bytes.max(1), std::sync::atomic::Ordering::Relaxed);
}

/// The record bound intake applies now.
pub fn max_record_bytes() -> u64 {
    MAX_RECORD_BYTES.load(std::sync::atomic::Ordering::Relaxed)
}

/// How to read a table's bytes.
#[derive(Debug, Clone)]
pub struct ReadSettings {
    /// `None`: detect from the first bytes.
    pub delimiter: Option<u8>,
    /// `None`: UTF-8 (validated elsewhere, a leading BOM removed).
    pub encoding: Option<&'static Encoding>,
    /// The most field bytes one record may hold (`None`: no bound, for reading stored
    /// versions, which were bounded when they were taken in).
    pub max_record: Option<u64>,
}

impl ReadSettings {
    /// Settings that read a stored version exactly as its intake did.
    pub fn for_dialect(d: &Dialect) -> Result<ReadSettings> {
        Ok(ReadSettings {
            delimiter: Some(d.delimiter_byte()),
            encoding: if d.encoding == "utf-8" {
                None
            } else {
                Some(encoding_for(&d.encoding)?)
            },
            max_record: None,
        })
    }
}

/// Turns pieces of bytes into records.
pub struct RecordStream<'p> {
    path: &'p Path,
    settings: ReadSettings,
    decoder: Option<Decoder>,
    decoded: Vec<u8>,
    parser: Option<Parser>,
    bom: bool,
    line_ending: &'static str,
    delimiter: u8,
    /// Original bytes pushed before the current piece.
    raw_seen: u64,
    /// The first bytes of the input, to size a BOM the decoder removed.
    first_bytes: Vec<u8>,
}

impl<'p> RecordStream<'p> {
    pub fn new(path: &'p Path, settings: ReadSettings) -> Self {
        let decoder = settings
            .encoding
            .filter(|e| *e != UTF_8)
            .map(|e| e.new_decoder_with_bom_removal());
        RecordStream {
            path,
            settings,
            decoder,
            decoded: Vec::new(),
            parser: None,
            bom: false,
            line_ending: "none",
            delimiter: b',',
            raw_seen: 0,
            first_bytes: Vec::new(),
        }
    }

    /// The dialect found so far (complete once the first piece was pushed).
    pub fn dialect(&self, has_header: bool) -> Dialect {
        Dialect {
            delimiter: (self.delimiter as char).to_string(),
            quote: "\"".to_string(),
            line_ending: self.line_ending.to_string(),
            bom: self.bom,
            encoding: self
                .settings
                .encoding
                .map_or("utf-8", |e| e.name())
                .to_lowercase(),
            has_header,
            delimiter_detected: self.settings.delimiter.is_none(),
        }
    }

    pub fn parser(&self) -> Option<&Parser> {
        self.parser.as_ref()
    }

    /// Pushes the next piece. `is_last` tells whether the input ends after it (used only to
    /// know whether the detection sample is the whole file).
    pub fn push(
        &mut self,
        piece: &[u8],
        is_last: bool,
        on_record: &mut impl FnMut(RawRecord<'_>) -> Result<()>,
    ) -> Result<()> {
        if self.first_bytes.len() < 4 {
            let take = (4 - self.first_bytes.len()).min(piece.len());
            self.first_bytes.extend_from_slice(&piece[..take]);
        }
        let mut text: &[u8] = piece;
        if self.decoder.is_some() {
            self.decode(piece, is_last)?;
            text = &self.decoded;
        }
        self.raw_seen += piece.len() as u64;
        // A piece can decode to nothing (half of a UTF-16 unit, the start of a multi-byte
        // character, kept by the decoder for the next piece). The parser takes empty input
        // as the end of the input, which would end the record there; wait for more instead.
        if text.is_empty() && !is_last {
            return Ok(());
        }
        if self.parser.is_none() {
            let mut start = 0u64;
            if self.decoder.is_none() && text.starts_with(UTF8_BOM) {
                self.bom = true;
                text = &text[UTF8_BOM.len()..];
                start = UTF8_BOM.len() as u64;
            }
            let sample = &text[..text.len().min(SAMPLE_BYTES)];
            let complete = is_last && text.len() <= SAMPLE_BYTES;
            self.delimiter = self
                .settings
                .delimiter
                .unwrap_or_else(|| detect_delimiter(sample, complete));
            self.line_ending = detect_line_ending(sample);
            // A BOM the decoder removed still occupies bytes of the file.
            if self.decoder.is_some() {
                start = self.decoded_bom_len();
                self.bom = start > 0;
            }
            let mut parser = Parser::decoded(self.delimiter, start, self.settings.encoding);
            if let Some(max) = self.settings.max_record {
                parser.set_max_record(usize::try_from(max).unwrap_or(usize::MAX));
            }
            self.parser = Some(parser);
        }
        let parser = self.parser.as_mut().expect("parser set above");
        // The decoder's buffer is borrowed through `text`; copy it out of the way only when it
        // is the source, to satisfy the borrow of `self.parser` (no copy on the UTF-8 path).
        if self.decoder.is_some() {
            let buf = std::mem::take(&mut self.decoded);
            let r = parser.feed(&buf, on_record);
            self.decoded = buf;
            r?;
        } else {
            parser.feed(text, on_record)?;
        }
        self.too_long()
    }

    /// The refusal of a record past the bound, once the parser met one.
    fn too_long(&self) -> Result<()> {
        match (
            self.parser.as_ref().and_then(|p| p.too_long()),
            self.settings.max_record,
        ) {
            (Some(u), Some(max)) => Err(Error::input(
                self.path,
                Some(Position {
                    byte: u.byte,
                    line: u.line,
                    record: Some(u.index),
                    column: None,
                }),
                InputProblem::RecordTooLong { max_bytes: max },
            )),
            _ => Ok(()),
        }
    }

    /// Decodes one piece into `self.decoded`, refusing malformed input with the byte offset
    /// of the first bad sequence in the original file.
    fn decode(&mut self, piece: &[u8], is_last: bool) -> Result<()> {
        let Some(dec) = self.decoder.as_mut() else {
            return Ok(());
        };
        self.decoded.clear();
        let need = dec
            .max_utf8_buffer_length_without_replacement(piece.len())
            .unwrap_or(piece.len() * 3 + 16);
        self.decoded.resize(need, 0);
        let mut read_total = 0usize;
        let mut written_total = 0usize;
        loop {
            let (res, read, written) = dec.decode_to_utf8_without_replacement(
                &piece[read_total..],
                &mut self.decoded[written_total..],
                is_last,
            );
            read_total += read;
            written_total += written;
            match res {
                DecoderResult::InputEmpty => break,
                DecoderResult::OutputFull => {
                    let n = self.decoded.len() * 2 + 16;
                    self.decoded.resize(n, 0);
                }
                DecoderResult::Malformed(bad, after) => {
                    // The malformed bytes may have begun in an earlier piece (the decoder
                    // keeps an incomplete sequence between calls), so count from the start
                    // of the file, not of this piece.
                    let byte = (self.raw_seen + read_total as u64)
                        .saturating_sub(u64::from(bad) + u64::from(after));
                    // Lines: those parsed so far plus the line breaks decoded before the error.
                    let parsed_lines = self.parser.as_ref().map_or(1, |p| p.line());
                    let before = &self.decoded[..written_total];
                    let mut more = line_breaks(before);
                    // A CR that ended the last piece the parser saw is a line break of its
                    // own unless an LF follows it (which `line_breaks` counts).
                    if self.parser.as_ref().is_some_and(|p| p.pending_cr())
                        && !before.starts_with(b"\n")
                    {
                        more += 1;
                    }
                    return Err(Error::input(
                        self.path,
                        Some(Position {
                            byte,
                            line: parsed_lines + more,
                            record: None,
                            column: None,
                        }),
                        InputProblem::InvalidForEncoding {
                            encoding: self
                                .settings
                                .encoding
                                .map_or("utf-8", |e| e.name())
                                .to_lowercase(),
                        },
                    ));
                }
            }
        }
        self.decoded.truncate(written_total);
        Ok(())
    }

    /// The length of the byte-order mark the decoder removed at the start of the file, if any.
    fn decoded_bom_len(&self) -> u64 {
        match (self.settings.encoding, self.first_bytes.as_slice()) {
            (Some(e), [0xFF, 0xFE, ..]) if e == encoding_rs::UTF_16LE => 2,
            (Some(e), [0xFE, 0xFF, ..]) if e == encoding_rs::UTF_16BE => 2,
            _ => 0,
        }
    }

    /// Ends the input.
    pub fn finish(
        &mut self,
        on_record: &mut impl FnMut(RawRecord<'_>) -> Result<()>,
    ) -> Result<()> {
        let Some(parser) = self.parser.as_mut() else {
            return Ok(());
        };
        match parser.finish(on_record)? {
            Ok(()) => self.too_long(),
            Err(u) => Err(Error::input(
                self.path,
                Some(Position {
                    byte: u.byte,
                    line: u.line,
                    record: Some(u.index),
                    column: None,
                }),
                InputProblem::UnterminatedQuote,
            )),
        }
    }
}

/// Line breaks in `text` as the parser counts them: LF, CRLF and a lone CR each end a line.
fn line_breaks(text: &[u8]) -> u64 {
    let mut n = 0;
    for i in memchr::memchr2_iter(b'\r', b'\n', text) {
        // The LF of a CRLF was counted with its CR.
        if text[i] == b'\r' || i == 0 || text[i - 1] != b'\r' {
            n += 1;
        }
    }
    n
}

/// Reads all records of `src` with `settings`, single-threaded.
pub fn for_each_record(
    path: &Path,
    mut src: impl Read,
    settings: &ReadSettings,
    mut on_record: impl FnMut(RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    let mut rs = RecordStream::new(path, settings.clone());
    let mut buf = vec![0u8; STREAM_BUF];
    loop {
        let n = read_full(&mut src, &mut buf).map_err(|e| Error::io(path, e))?;
        let last = n < buf.len();
        if n > 0 {
            rs.push(&buf[..n], last, &mut on_record)?;
        }
        if last {
            break;
        }
    }
    rs.finish(&mut on_record)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read_in_pieces(data: &[u8], settings: &ReadSettings, piece: usize) -> String {
        let mut rs = RecordStream::new(Path::new("t.csv"), settings.clone());
        let mut n = 0u64;
        let chunks: Vec<&[u8]> = data.chunks(piece.max(1)).collect();
        for (i, c) in chunks.iter().enumerate() {
            if let Err(e) = rs.push(c, i + 1 == chunks.len(), &mut |_| {
                n += 1;
                Ok(())
            }) {
                return e.to_string();
            }
        }
        match rs.finish(&mut |_| Ok(())) {
            Ok(()) => format!("{n} records"),
            Err(e) => e.to_string(),
        }
    }

    fn records_in_pieces(
        data: &[u8],
        settings: &ReadSettings,
        piece: usize,
    ) -> Vec<(Vec<u8>, u64, u64)> {
        let mut rs = RecordStream::new(Path::new("t.csv"), settings.clone());
        let mut recs = Vec::new();
        let chunks: Vec<&[u8]> = data.chunks(piece).collect();
        for (i, c) in chunks.iter().enumerate() {
            rs.push(c, i + 1 == chunks.len(), &mut |r| {
                recs.push((r.fields.to_vec(), r.byte, r.line));
                Ok(())
            })
            .unwrap();
        }
        rs.finish(&mut |r| {
            recs.push((r.fields.to_vec(), r.byte, r.line));
            Ok(())
        })
        .unwrap();
        recs
    }

    /// Found by the `intake` fuzz target: a piece of UTF-16 that decodes to nothing (one byte
    /// of a two-byte unit) was handed to the parser as empty input, which it takes for the end
    /// of the input, so a record ended there.
    #[test]
    fn a_piece_that_decodes_to_nothing_does_not_end_a_record() {
        let settings = ReadSettings {
            delimiter: Some(b','),
            encoding: Some(encoding_rs::UTF_16LE),
            max_record: None,
        };
        for text in [
            "\0\0\u{a00}",
            "a,b\nc,d\n",
            "shop,amount\nQuillby Cycle Mend,12.50\r\n",
        ] {
            let data: Vec<u8> = text.encode_utf16().flat_map(|u| u.to_le_bytes()).collect();
            let whole = records_in_pieces(&data, &settings, data.len());
            for piece in 1..data.len() {
                assert_eq!(
                    records_in_pieces(&data, &settings, piece),
                    whole,
                    "{text:?} in pieces of {piece}"
                );
            }
        }
        let sjis = ReadSettings {
            delimiter: Some(b','),
            encoding: Some(encoding_for("shift_jis").unwrap()),
            max_record: None,
        };
        // "店,金額" then a line break, in Shift_JIS: two-byte characters split by every cut.
        let data = b"\x93\x58,\x8b\xe0\x8a\x7a\n\x93\x58,\x8b\xe0\n";
        let whole = records_in_pieces(data, &sjis, data.len());
        assert_eq!(whole.len(), 2);
        for piece in 1..data.len() {
            assert_eq!(
                records_in_pieces(data, &sjis, piece),
                whole,
                "shift_jis in pieces of {piece}"
            );
        }
    }

    /// Found by the `intake` fuzz target: the line of a decoding error counted only LF line
    /// breaks in the text decoded before it, so a lone CR (which ends a record) was missed
    /// when the error was in the same piece, and counted by the parser when it was not.
    #[test]
    fn the_line_of_a_decoding_error_counts_lone_cr_line_breaks() {
        // "a\rb\r\nc\n" then an unpaired low surrogate, in UTF-16LE.
        let mut data: Vec<u8> = "a\rb\r\nc\n"
            .encode_utf16()
            .flat_map(|u| u.to_le_bytes())
            .collect();
        data.extend_from_slice(&[0x00, 0xdc, b'x', 0]);
        let settings = ReadSettings {
            delimiter: Some(b','),
            encoding: Some(encoding_rs::UTF_16LE),
            max_record: None,
        };
        let whole = read_in_pieces(&data, &settings, data.len());
        assert!(whole.contains("line 4 (byte 14)"), "{whole}");
        for piece in 1..data.len() {
            assert_eq!(
                read_in_pieces(&data, &settings, piece),
                whole,
                "pieces of {piece}"
            );
        }
        assert_eq!(line_breaks(b"a\rb\r\nc\n\n"), 4);
        // The same with the error right after a CR that ends a piece.
        let mut data: Vec<u8> = "ab\ncd\r"
            .encode_utf16()
            .flat_map(|u| u.to_le_bytes())
            .collect();
        data.extend_from_slice(&[0x00, 0xdc]);
        let whole = read_in_pieces(&data, &settings, data.len());
        assert!(whole.contains("line 3 (byte 12)"), "{whole}");
        for piece in 1..data.len() {
            assert_eq!(
                read_in_pieces(&data, &settings, piece),
                whole,
                "pieces of {piece}"
            );
        }
    }

    /// Found by the `intake` fuzz target: in UTF-16 a malformed sequence can begin in the
    /// piece before the one where the decoder reports it, and the byte position was computed
    /// within the piece, which overflowed (a panic in debug builds, a position near 2^64 in
    /// release builds).
    #[test]
    fn malformed_utf16_begun_in_an_earlier_piece_is_placed_in_the_file() {
        let data = b"\"x\"\"y\x85\x10 a;b\x08\"x\"\"y\xff\xff\";;b\n\"x\"\xdb\xff\xff\xff\xff-\xff\xff\xffy2\n";
        let settings = ReadSettings {
            delimiter: Some(b'\t'),
            encoding: Some(encoding_rs::UTF_16LE),
            max_record: None,
        };
        let whole = read_in_pieces(data, &settings, data.len());
        // 0xDB22 at byte 26 is a high surrogate followed by 0xFFFF, not a low one.
        assert!(whole.contains("line 1 (byte 26)"), "{whole}");
        for piece in 1..data.len() {
            assert_eq!(
                read_in_pieces(data, &settings, piece),
                whole,
                "pieces of {piece}"
            );
        }
    }

    #[test]
    fn utf8_split_across_pieces() {
        let s = "añb€c".as_bytes();
        for cut in 0..s.len() {
            let mut c = Utf8Check::default();
            c.push(&s[..cut]).unwrap();
            c.push(&s[cut..]).unwrap();
            c.finish().unwrap();
        }
        let mut c = Utf8Check::default();
        assert_eq!(c.push(b"ab\xffc"), Err(2));
        let mut c = Utf8Check::default();
        c.push(b"ab\xe2\x82").unwrap();
        assert_eq!(c.finish(), Err(2));
    }
}
