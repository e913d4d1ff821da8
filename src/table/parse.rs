//! A push parser for delimited text: feed it the input in pieces of any size and it calls back
//! once per record, with the record's fields and where it started (byte offset and line). It is
//! built on `csv_core` (RFC 4180 quoting; CRLF, LF and CR all end a record) and adds what intake
//! needs on top: positions that count every byte, line numbers that count LF, CRLF and lone CR
//! alike, and detection of a quoted field left open at the end of the input.
//!
//! Blank lines between records are skipped, as csv_core does; they still count as lines.
//!
//! When the text was decoded from another encoding, positions still count bytes of the
//! original file: every consumed piece of UTF-8 is weighed by the length it has in that
//! encoding (exact, because intake refuses text that does not decode cleanly).

use csv_core::{ReadRecordResult, Reader, ReaderBuilder};
use encoding_rs::Encoding;

/// One parsed record. Field `i` is `fields[ends[i-1]..ends[i]]` (with `ends[-1]` = 0).
pub struct RawRecord<'a> {
    pub fields: &'a [u8],
    pub ends: &'a [usize],
    /// 0-based byte offset of the record's first byte.
    pub byte: u64,
    /// 1-based line on which the record starts.
    pub line: u64,
    /// 0-based index of the record among all records (header included).
    pub index: u64,
}

impl<'a> RawRecord<'a> {
    /// A row held as its fields' bytes back to back and where each ends, as row `index` of
    /// a table that is not a file (an operation's output): no byte offset or line to give.
    pub fn packed(fields: &'a [u8], ends: &'a [usize], index: u64) -> Self {
        RawRecord {
            fields,
            ends,
            byte: 0,
            line: 0,
            index,
        }
    }
}

impl RawRecord<'_> {
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    pub fn field(&self, i: usize) -> &[u8] {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.fields[start..self.ends[i]]
    }

    pub fn iter(&self) -> impl Iterator<Item = &[u8]> + '_ {
        (0..self.ends.len()).map(move |i| self.field(i))
    }

    /// Where this record starts, for messages; `column` is a 1-based field number.
    pub fn position(&self, column: Option<u64>) -> crate::error::Position {
        crate::error::Position {
            byte: self.byte,
            line: self.line,
            record: Some(self.index),
            column,
        }
    }
}

/// Why parsing stopped early at the end of the input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Unterminated {
    /// Where the record holding the open quote starts.
    pub byte: u64,
    pub line: u64,
    pub index: u64,
}

pub struct Parser {
    rdr: Reader,
    out: Vec<u8>,
    ends: Vec<usize>,
    out_len: usize,
    n_ends: usize,
    /// Bytes of the original input consumed so far, plus the starting offset.
    consumed: u64,
    /// The encoding the text was decoded from (`None`: the text is the original).
    source_encoding: Option<&'static Encoding>,
    /// Bytes of an incomplete UTF-8 character at the end of the last weighed piece.
    weigh_carry: Vec<u8>,
    delimiter: u8,
    /// Whether whole lines without quotes are split directly instead of by csv_core.
    fast_path: bool,
    /// Line terminators seen so far (so the current line is `lines + 1`).
    lines: u64,
    /// The last byte seen was a CR whose partner (an LF or not) is in the next piece.
    pending_cr: bool,
    in_record: bool,
    rec_byte: u64,
    rec_line: u64,
    n_records: u64,
    /// The most bytes one record's fields may take (see [`Parser::set_max_record`]).
    max_record: usize,
    /// Set when a record grew past `max_record`; parsing stops there.
    too_long: Option<Unterminated>,
}

impl Parser {
    /// A parser for fields separated by `delimiter`; positions start at `start_offset` (the
    /// length of a byte-order mark that was removed before parsing, for instance).
    pub fn new(delimiter: u8, start_offset: u64) -> Parser {
        Parser::decoded(delimiter, start_offset, None)
    }

    /// A parser for text decoded from `source_encoding`, whose positions count bytes of the
    /// original input.
    pub fn decoded(
        delimiter: u8,
        start_offset: u64,
        source_encoding: Option<&'static Encoding>,
    ) -> Parser {
        let mut rdr = ReaderBuilder::new()
            .delimiter(delimiter)
            .quote(b'"')
            .double_quote(true)
            .build();
        // csv_core removes a byte-order mark at the start of the first input it is given. The
        // caller removes a real one; records the fast path reads never reach csv_core, so give
        // it one blank line now (skipped, as blank lines are) lest a BOM inside the file be
        // taken for one later.
        let _ = rdr.read_record(b"\n", &mut [0u8; 1], &mut [0usize; 1]);
        Parser {
            rdr,
            out: vec![0; 64 * 1024],
            ends: vec![0; 256],
            out_len: 0,
            n_ends: 0,
            consumed: start_offset,
            source_encoding: source_encoding.filter(|e| *e != encoding_rs::UTF_8),
            weigh_carry: Vec::new(),
            delimiter,
            fast_path: true,
            lines: 0,
            pending_cr: false,
            in_record: false,
            rec_byte: 0,
            rec_line: 0,
            n_records: 0,
            max_record: usize::MAX,
            too_long: None,
        }
    }

    /// Bounds one record's field bytes: a record that needs more stops the parser, which then
    /// reports where that record starts through [`Parser::too_long`]. Unbounded by default.
    pub fn set_max_record(&mut self, bytes: usize) {
        self.max_record = bytes;
    }

    /// Where the record that passed the bound starts, once one has.
    pub fn too_long(&self) -> Option<&Unterminated> {
        self.too_long.as_ref()
    }

    /// Doubles the field buffer, unless that passes the bound: then records where the record
    /// starts and returns false.
    fn grow_out(&mut self) -> bool {
        let n = self.out.len() * 2;
        if self.out.len() >= self.max_record {
            self.too_long = Some(Unterminated {
                byte: self.rec_byte,
                line: self.rec_line,
                index: self.n_records,
            });
            return false;
        }
        self.out
            .resize(n.min(self.max_record.max(self.out.len() + 1)), 0);
        true
    }

    /// Makes the parser read a new input from its start, as a new parser would, but keeps its
    /// buffers and csv_core's tables (building those costs far more than parsing a short
    /// record, so a caller parsing many separate rows restarts one parser). Positions start at
    /// `start_offset`.
    pub fn restart(&mut self, start_offset: u64) {
        self.rdr.reset();
        // As in `decoded`: one blank line first, so that a BOM in the input is data.
        let _ = self.rdr.read_record(b"\n", &mut [0u8; 1], &mut [0usize; 1]);
        self.out_len = 0;
        self.n_ends = 0;
        self.consumed = start_offset;
        self.weigh_carry.clear();
        self.lines = 0;
        self.pending_cr = false;
        self.in_record = false;
        self.rec_byte = 0;
        self.rec_line = 0;
        self.n_records = 0;
    }

    pub fn delimiter(&self) -> u8 {
        self.delimiter
    }

    pub fn n_records(&self) -> u64 {
        self.n_records
    }

    /// Bytes consumed so far (plus the start offset).
    pub fn position(&self) -> u64 {
        self.consumed
    }

    /// The current 1-based line.
    pub fn line(&self) -> u64 {
        self.lines + 1
    }

    /// Whether the last byte seen was a CR not yet counted, its partner (an LF or not) being
    /// in the next piece.
    pub fn pending_cr(&self) -> bool {
        self.pending_cr
    }

    fn count_lines(&mut self, s: &[u8]) {
        if s.is_empty() {
            return;
        }
        if self.pending_cr {
            // A CR that ended the previous piece is a line break of its own unless this piece
            // starts with its LF (then the LF is the one counted).
            if s[0] != b'\n' {
                self.lines += 1;
            }
            self.pending_cr = false;
        }
        for i in memchr::memchr2_iter(b'\n', b'\r', s) {
            if s[i] == b'\n' {
                self.lines += 1;
            } else if i + 1 < s.len() {
                if s[i + 1] != b'\n' {
                    self.lines += 1;
                }
            } else {
                self.pending_cr = true;
            }
        }
    }

    fn advance(&mut self, s: &[u8]) {
        self.count_lines(s);
        self.consumed += match self.source_encoding {
            None => s.len() as u64,
            Some(enc) => original_len(enc, s, &mut self.weigh_carry),
        };
    }

    /// Parses `input`, calling `on_record` for every record completed inside it.
    pub fn feed<E>(
        &mut self,
        mut input: &[u8],
        on_record: &mut impl FnMut(RawRecord<'_>) -> Result<(), E>,
    ) -> Result<(), E> {
        loop {
            if self.too_long.is_some() {
                return Ok(());
            }
            if !self.in_record {
                let skip = input
                    .iter()
                    .take_while(|&&b| b == b'\n' || b == b'\r')
                    .count();
                self.advance(&input[..skip]);
                input = &input[skip..];
                if input.is_empty() {
                    return Ok(());
                }
                if self.pending_cr {
                    // The piece ended in CR and the next byte is not LF: settle the count
                    // before recording where this record starts.
                    self.lines += 1;
                    self.pending_cr = false;
                }
                self.in_record = true;
                self.rec_byte = self.consumed;
                self.rec_line = self.lines + 1;
                if self.fast_path {
                    if let Some(nl) = memchr::memchr(b'\n', input) {
                        let body_end = if nl > 0 && input[nl - 1] == b'\r' {
                            nl - 1
                        } else {
                            nl
                        };
                        let line = &input[..body_end];
                        // A whole line with no quote and no other CR holds exactly the fields
                        // between its delimiters, as csv_core would read them.
                        if memchr::memchr2(b'"', b'\r', line).is_none() {
                            self.split_plain(line);
                            if self.too_long.is_some() {
                                return Ok(());
                            }
                            // One line break, and no CR but the one before it: count it here
                            // rather than scan the line again.
                            let taken = &input[..nl + 1];
                            self.consumed += match self.source_encoding {
                                None => taken.len() as u64,
                                Some(enc) => original_len(enc, taken, &mut self.weigh_carry),
                            };
                            self.lines += 1;
                            input = &input[nl + 1..];
                            self.emit(on_record)?;
                            continue;
                        }
                    }
                }
            }
            let (res, nin, nout, nend) = self.rdr.read_record(
                input,
                &mut self.out[self.out_len..],
                &mut self.ends[self.n_ends..],
            );
            self.advance(&input[..nin]);
            input = &input[nin..];
            self.out_len += nout;
            self.n_ends += nend;
            match res {
                ReadRecordResult::InputEmpty => return Ok(()),
                ReadRecordResult::OutputFull => {
                    if !self.grow_out() {
                        return Ok(());
                    }
                }
                ReadRecordResult::OutputEndsFull => {
                    let n = self.ends.len() * 2;
                    self.ends.resize(n, 0);
                }
                ReadRecordResult::Record => self.emit(on_record)?,
                ReadRecordResult::End => return Ok(()),
            }
        }
    }

    /// Splits a line without quotes at every delimiter into the output buffers.
    fn split_plain(&mut self, line: &[u8]) {
        if self.out.len() < line.len()
            && line.len() > self.max_record
            && line.len() - memchr::memchr_iter(self.delimiter, line).count() > self.max_record
        {
            // Too long: kept from the bound's check by the slow path, which stops there.
            self.too_long = Some(Unterminated {
                byte: self.rec_byte,
                line: self.rec_line,
                index: self.n_records,
            });
            self.out_len = 0;
            self.n_ends = 0;
            return;
        }
        if self.out.len() < line.len() {
            self.out.resize(line.len().next_power_of_two(), 0);
        }
        let mut out_pos = 0usize;
        let mut k = 0usize;
        let mut start = 0usize;
        for pos in memchr::memchr_iter(self.delimiter, line).chain(std::iter::once(line.len())) {
            let f = &line[start..pos];
            self.out[out_pos..out_pos + f.len()].copy_from_slice(f);
            out_pos += f.len();
            if k == self.ends.len() {
                let n = self.ends.len() * 2;
                self.ends.resize(n, 0);
            }
            self.ends[k] = out_pos;
            k += 1;
            start = pos + 1;
        }
        self.out_len = out_pos;
        self.n_ends = k;
    }

    /// Turns the fast path for plain lines off (tests compare both paths).
    pub fn set_fast_path(&mut self, on: bool) {
        self.fast_path = on;
    }

    fn emit<E>(
        &mut self,
        on_record: &mut impl FnMut(RawRecord<'_>) -> Result<(), E>,
    ) -> Result<(), E> {
        let rec = RawRecord {
            fields: &self.out[..self.out_len],
            ends: &self.ends[..self.n_ends],
            byte: self.rec_byte,
            line: self.rec_line,
            index: self.n_records,
        };
        let r = on_record(rec);
        self.n_records += 1;
        self.out_len = 0;
        self.n_ends = 0;
        self.in_record = false;
        r
    }

    /// Ends the input: emits the last record if it had no line terminator, or reports a quoted
    /// field that was never closed.
    pub fn finish<E>(
        &mut self,
        on_record: &mut impl FnMut(RawRecord<'_>) -> Result<(), E>,
    ) -> Result<Result<(), Unterminated>, E> {
        if self.pending_cr {
            self.lines += 1;
            self.pending_cr = false;
        }
        if !self.in_record || self.too_long.is_some() {
            return Ok(Ok(()));
        }
        // csv_core ends an open quoted field silently at the end of input. To tell that case
        // from a last record without a line terminator, give the reader a line break: outside
        // quotes it completes the record (with the same fields the end of input would give),
        // inside quotes it is copied into the field and the record stays open.
        if self.out_len == self.out.len() {
            let n = self.out.len() * 2;
            self.out.resize(n, 0);
        }
        if self.n_ends == self.ends.len() {
            let n = self.ends.len() * 2;
            self.ends.resize(n, 0);
        }
        let (res, _, nout, nend) = self.rdr.read_record(
            b"\n",
            &mut self.out[self.out_len..],
            &mut self.ends[self.n_ends..],
        );
        self.out_len += nout;
        self.n_ends += nend;
        match res {
            ReadRecordResult::Record => {
                self.emit(on_record)?;
                return Ok(Ok(()));
            }
            ReadRecordResult::InputEmpty => {
                return Ok(Err(Unterminated {
                    byte: self.rec_byte,
                    line: self.rec_line,
                    index: self.n_records,
                }))
            }
            _ => {}
        }
        loop {
            let (res, _, nout, nend) = self.rdr.read_record(
                &[],
                &mut self.out[self.out_len..],
                &mut self.ends[self.n_ends..],
            );
            self.out_len += nout;
            self.n_ends += nend;
            match res {
                ReadRecordResult::OutputFull => {
                    if !self.grow_out() {
                        return Ok(Ok(()));
                    }
                }
                ReadRecordResult::OutputEndsFull => {
                    let n = self.ends.len() * 2;
                    self.ends.resize(n, 0);
                }
                ReadRecordResult::Record => {
                    self.emit(on_record)?;
                    return Ok(Ok(()));
                }
                ReadRecordResult::InputEmpty | ReadRecordResult::End => return Ok(Ok(())),
            }
        }
    }
}

/// The length in `enc` of the UTF-8 bytes `s`. A character cut at the end of `s` is kept in
/// `carry` and weighed with the next piece.
pub fn original_len(enc: &'static Encoding, s: &[u8], carry: &mut Vec<u8>) -> u64 {
    // Count characters by their leading bytes, so pieces may split a character anywhere.
    let leading = |b: &u8| (b & 0xC0) != 0x80;
    if enc.is_single_byte() {
        return s.iter().filter(|b| leading(b)).count() as u64;
    }
    if enc == encoding_rs::UTF_16LE || enc == encoding_rs::UTF_16BE {
        let chars = s.iter().filter(|b| leading(b)).count() as u64;
        let astral = s.iter().filter(|&&b| b >= 0xF0).count() as u64;
        return 2 * chars + 2 * astral;
    }
    // Multi-byte legacy encodings: encode the complete characters and count.
    carry.extend_from_slice(s);
    let valid = match std::str::from_utf8(carry) {
        Ok(t) => t.len(),
        Err(e) => e.valid_up_to(),
    };
    let text = std::str::from_utf8(&carry[..valid]).unwrap_or("");
    let mut encoder = enc.new_encoder();
    let mut scratch = vec![0u8; 4096];
    let mut total = 0u64;
    let mut rest = text;
    loop {
        let (res, read, written) =
            encoder.encode_from_utf8_without_replacement(rest, &mut scratch, false);
        total += written as u64;
        rest = &rest[read..];
        match res {
            encoding_rs::EncoderResult::InputEmpty => break,
            encoding_rs::EncoderResult::OutputFull => {}
            // Text that came out of this decoder always encodes back; count the character as
            // one byte rather than stop.
            encoding_rs::EncoderResult::Unmappable(_) => total += 1,
        }
    }
    carry.drain(..valid);
    total
}

/// Parses a whole in-memory text into records of owned strings (for small inputs and tests).
pub fn parse_all(data: &[u8], delimiter: u8) -> Result<Vec<Vec<Vec<u8>>>, Unterminated> {
    let mut p = Parser::new(delimiter, 0);
    let mut out = Vec::new();
    let mut push = |r: RawRecord<'_>| -> Result<(), ()> {
        out.push(r.iter().map(|f| f.to_vec()).collect());
        Ok(())
    };
    let _ = p.feed(data, &mut push);
    match p.finish(&mut push) {
        Ok(Ok(())) => Ok(out),
        Ok(Err(u)) => Err(u),
        Err(()) => Ok(out),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strs(recs: Vec<Vec<Vec<u8>>>) -> Vec<Vec<String>> {
        recs.into_iter()
            .map(|r| {
                r.into_iter()
                    .map(|f| String::from_utf8(f).unwrap())
                    .collect()
            })
            .collect()
    }

    // RFC 4180 section 2, rules 5-7: quoted fields may hold commas, line breaks and doubled
    // quotes. Expected fields as stated in the RFC (and as Python's csv module parses them).
    #[test]
    fn rfc4180_quoted_fields() {
        let data = b"\"aaa\",\"b\r\nbb\",\"ccc\"\r\nzzz,\"y,y\",\"x\"\"x\"";
        assert_eq!(
            strs(parse_all(data, b',').unwrap()),
            vec![vec!["aaa", "b\r\nbb", "ccc"], vec!["zzz", "y,y", "x\"x"]]
        );
    }

    // RFC 4180 section 2: empty fields, quoted or not.
    #[test]
    fn rfc4180_empty_fields() {
        let data = b"a,,c\r\n,\"\",\r\n";
        assert_eq!(
            strs(parse_all(data, b',').unwrap()),
            vec![vec!["a", "", "c"], vec!["", "", ""]]
        );
    }

    #[test]
    fn positions_count_every_kind_of_line_break() {
        let data = b"h1,h2\r\na,b\n\nc,d\re,f";
        let mut p = Parser::new(b',', 0);
        let mut seen = Vec::new();
        let mut cb = |r: RawRecord<'_>| -> Result<(), ()> {
            seen.push((r.index, r.byte, r.line));
            Ok(())
        };
        // Feed one byte at a time: piece boundaries must not change positions.
        for b in data.chunks(1) {
            p.feed(b, &mut cb).unwrap();
        }
        p.finish(&mut cb).unwrap().unwrap();
        assert_eq!(seen, vec![(0, 0, 1), (1, 7, 2), (2, 12, 4), (3, 16, 5)]);
    }

    type Seen = (Vec<(Vec<Vec<u8>>, u64, u64, u64)>, Option<(u64, u64, u64)>);

    fn parse_with(data: &[u8], delimiter: u8, piece: usize, fast: bool) -> Seen {
        let mut p = Parser::new(delimiter, 0);
        p.set_fast_path(fast);
        let mut recs = Vec::new();
        let mut cb = |r: RawRecord<'_>| -> Result<(), ()> {
            recs.push((
                r.iter().map(|f| f.to_vec()).collect(),
                r.byte,
                r.line,
                r.index,
            ));
            Ok(())
        };
        for chunk in data.chunks(piece.max(1)) {
            p.feed(chunk, &mut cb).unwrap();
        }
        let end = p
            .finish(&mut cb)
            .unwrap()
            .err()
            .map(|u| (u.byte, u.line, u.index));
        (recs, end)
    }

    proptest::proptest! {
        // The fast path for plain lines must read exactly what csv_core reads: same fields,
        // positions, lines and end state, however the input is cut into pieces.
        #[test]
        fn fast_path_reads_what_csv_core_reads(
            data in proptest::collection::vec(
                proptest::sample::select(vec![b'a', b'b', b',', b';', b'"', b'\n', b'\r', b' ', 0xEF, 0xBB, 0xBF]),
                0..120,
            ),
            piece in 1usize..40,
            semicolon in proptest::bool::ANY,
        ) {
            let d = if semicolon { b';' } else { b',' };
            proptest::prop_assert_eq!(parse_with(&data, d, piece, true), parse_with(&data, d, 1 << 20, false));
        }
    }

    #[test]
    fn a_byte_order_mark_inside_the_file_is_data() {
        let data = b"a,b\n\xEF\xBB\xBF\"x\",y\n";
        let (recs, _) = parse_with(data, b',', 1 << 20, true);
        assert_eq!(recs[1].0[0], b"\xEF\xBB\xBF\"x\"".to_vec());
    }

    #[test]
    fn a_restarted_parser_reads_as_a_new_one() {
        let inputs: [&[u8]; 4] = [
            b"a,\"open\n",
            b"\xEF\xBB\xBFx,y\r\n",
            b"\"q\"\"1\",2\n\n",
            b"p,q",
        ];
        let mut reused = Parser::new(b',', 0);
        for input in inputs {
            let run = |p: &mut Parser| {
                let mut recs = Vec::new();
                let mut cb = |r: RawRecord<'_>| -> Result<(), ()> {
                    recs.push((
                        r.iter().map(|f| f.to_vec()).collect::<Vec<_>>(),
                        r.byte,
                        r.line,
                    ));
                    Ok(())
                };
                p.feed(input, &mut cb).unwrap();
                let end = p.finish(&mut cb).unwrap().err().map(|u| (u.byte, u.line));
                (recs, end)
            };
            reused.restart(0);
            assert_eq!(run(&mut reused), run(&mut Parser::new(b',', 0)));
        }
    }

    #[test]
    fn open_quote_at_end_is_reported() {
        let err = parse_all(b"a,b\n1,\"never closed\n2,3\n", b',').unwrap_err();
        assert_eq!((err.index, err.line, err.byte), (1, 2, 4));
        // A closed quote followed by end of input is fine.
        assert_eq!(parse_all(b"a,\"b\"", b',').unwrap().len(), 1);
    }
}
