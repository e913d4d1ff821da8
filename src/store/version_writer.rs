//! Writing a new version's objects: canonical CSV (the form of [`crate::table::write`]) into an
//! object, with the version's row index and column profile built in the same pass.
//!
//! The writing runs on a thread of its own: the caller (an operation, reading and changing
//! rows) hands rows over in batches of about 1 MiB, and the writer thread quotes, hashes,
//! profiles and indexes them, so that the two halves of the work share the machine's cores.

use std::io;
use std::sync::mpsc::{self, Receiver, SyncSender};
use std::thread::JoinHandle;

use crate::model::ColumnProfile;
use crate::store::objects::{ObjectWriter, Objects};
use crate::table::profile::Profiler;
use crate::table::rowindex;
use crate::table::write::{push_packed, push_record};

/// The line breaks in `s` as the parser counts them: LF, CR LF, and a CR alone.
fn line_breaks(s: &[u8]) -> u64 {
    memchr::memchr2_iter(b'\n', b'\r', s)
        .filter(|&i| s[i] == b'\n' || s.get(i + 1) != Some(&b'\n'))
        .count() as u64
}

/// What writing a version produced.
pub struct Written {
    pub table: ObjectWriter,
    pub index: ObjectWriter,
    pub n_rows: u64,
    pub profiles: Vec<ColumnProfile>,
}

/// Rows handed to the writer thread: field bytes back to back, and the end of every field
/// (32 bits each: a batch holds about [`BATCH_BYTES`]; the nine writers of a ten-step plan
/// hold some 36 batches, whose ends would be half their memory at 64 bits).
#[derive(Default)]
struct Batch {
    bytes: Vec<u8>,
    ends: Vec<u32>,
    rows: usize,
}

/// How many bytes of rows go to the writer thread at once.
const BATCH_BYTES: usize = 1 << 20;

/// Writes a version's rows in order (on a thread of its own).
pub struct CanonicalWriter {
    n_cols: usize,
    batch: Batch,
    to_writer: Option<SyncSender<Batch>>,
    spare: Receiver<Batch>,
    thread: Option<JoinHandle<io::Result<Written>>>,
}

impl CanonicalWriter {
    /// Starts a version with `header`; `null_tokens` count as blanks in its profile.
    pub fn new(objects: &Objects, header: &[String], null_tokens: &[String]) -> io::Result<Self> {
        Self::start(Some(objects), header, null_tokens, &[])
    }

    /// A writer that computes the version's hash, row index hash and profile but keeps no
    /// bytes (replay of a step whose output is already stored); its objects cannot be finished.
    pub fn hashing_only(header: &[String], null_tokens: &[String]) -> io::Result<Self> {
        Self::start(None, header, null_tokens, &[])
    }

    /// [`Self::new`] (or, without `objects`, [`Self::hashing_only`]) that leaves the columns
    /// marked in `unprofiled` out of the profile ([`Profiler::leave_out`]): the caller knows
    /// their profiles already and puts them into [`Written::profiles`].
    pub fn leaving_out(
        objects: Option<&Objects>,
        header: &[String],
        null_tokens: &[String],
        unprofiled: &[bool],
    ) -> io::Result<Self> {
        Self::start(objects, header, null_tokens, unprofiled)
    }

    fn start(
        objects: Option<&Objects>,
        header: &[String],
        null_tokens: &[String],
        unprofiled: &[bool],
    ) -> io::Result<Self> {
        let mut serial = Serial::new(objects, header, null_tokens)?;
        serial.profiler.leave_out(unprofiled);
        let n_cols = header.len();
        let (to_writer, batches) = mpsc::sync_channel::<Batch>(2);
        let (give_back, spare) = mpsc::channel::<Batch>();
        let thread = std::thread::Builder::new()
            .name("sluice-writer".into())
            .spawn(move || {
                let mut ends: Vec<usize> = Vec::with_capacity(n_cols);
                for mut b in batches {
                    let mut start = 0;
                    for row in 0..b.rows {
                        ends.clear();
                        ends.extend(
                            b.ends[row * n_cols..(row + 1) * n_cols]
                                .iter()
                                .map(|&e| e as usize),
                        );
                        serial.write_row(&b.bytes, start, &ends)?;
                        start = ends.last().copied().unwrap_or(start);
                    }
                    b.bytes.clear();
                    b.ends.clear();
                    b.rows = 0;
                    // The caller may be gone already; then the batch is simply dropped.
                    let _ = give_back.send(b);
                }
                serial.finish()
            })?;
        Ok(CanonicalWriter {
            n_cols,
            batch: Batch {
                bytes: Vec::with_capacity(BATCH_BYTES + 4096),
                ends: Vec::new(),
                rows: 0,
            },
            to_writer: Some(to_writer),
            spare,
            thread: Some(thread),
        })
    }

    /// Writes one data row; `fields` must have one value per header column.
    pub fn write_row(&mut self, fields: &[&[u8]]) -> io::Result<()> {
        debug_assert_eq!(fields.len(), self.n_cols);
        self.make_room(fields.iter().map(|f| f.len()).sum())?;
        for f in fields {
            self.batch.bytes.extend_from_slice(f);
            self.batch.ends.push(self.batch.bytes.len() as u32);
        }
        self.batch.rows += 1;
        if self.batch.bytes.len() >= BATCH_BYTES || self.batch.rows >= BATCH_BYTES / 16 {
            self.send()?;
        }
        Ok(())
    }

    /// [`Self::write_row`] for a row held as its fields' bytes back to back and where each
    /// ends (an operation's output row), without a list of slices.
    pub fn write_packed(&mut self, bytes: &[u8], ends: &[usize]) -> io::Result<()> {
        debug_assert_eq!(ends.len(), self.n_cols);
        self.make_room(bytes.len())?;
        let base = self.batch.bytes.len();
        self.batch.bytes.extend_from_slice(bytes);
        self.batch
            .ends
            .extend(ends.iter().map(|e| (base + e) as u32));
        self.batch.rows += 1;
        if self.batch.bytes.len() >= BATCH_BYTES || self.batch.rows >= BATCH_BYTES / 16 {
            self.send()?;
        }
        Ok(())
    }

    /// Sends the batch on first when a row of `len` bytes would take its field ends past 32
    /// bits; a row that long on its own cannot be written.
    fn make_room(&mut self, len: usize) -> io::Result<()> {
        let limit = u32::MAX as usize;
        if len > limit {
            return Err(io::Error::other(format!(
                "a row of {len} bytes is longer than a version can hold (at most {limit})"
            )));
        }
        if self.batch.bytes.len() + len > limit {
            self.send()?;
        }
        Ok(())
    }

    fn send(&mut self) -> io::Result<()> {
        let next = self.spare.try_recv().unwrap_or_default();
        let full = std::mem::replace(&mut self.batch, next);
        let sent = self.to_writer.as_ref().map(|t| t.send(full));
        if let Some(Err(_)) = sent {
            // The writer thread stopped early: its error is what to report.
            return Err(self.join().err().unwrap_or_else(|| {
                io::Error::other("the version writer stopped without saying why")
            }));
        }
        Ok(())
    }

    fn join(&mut self) -> io::Result<Written> {
        self.to_writer = None;
        match self.thread.take() {
            Some(t) => t
                .join()
                .unwrap_or_else(|_| Err(io::Error::other("the version writer thread panicked"))),
            None => Err(io::Error::other("the version writer was already finished")),
        }
    }

    /// Flushes everything; the objects are not persisted yet (the caller decides).
    pub fn finish(mut self) -> io::Result<Written> {
        if self.batch.rows > 0 {
            self.send()?;
        }
        self.join()
    }
}

impl Drop for CanonicalWriter {
    fn drop(&mut self) {
        // A writer given up on (the step failed): stop the thread and wait for it.
        if self.thread.is_some() {
            let _ = self.join();
        }
    }
}

/// The writing itself, row after row, on the writer thread.
struct Serial {
    table: ObjectWriter,
    index: ObjectWriter,
    buf: Vec<u8>,
    index_buf: Vec<u8>,
    rows: rowindex::Builder,
    profiler: Profiler,
    header: Vec<String>,
    n_rows: u64,
    /// Bytes written so far, and line breaks written so far.
    n_bytes: u64,
    n_lines: u64,
}

impl Serial {
    fn new(
        objects: Option<&Objects>,
        header: &[String],
        null_tokens: &[String],
    ) -> io::Result<Self> {
        let writer = |row_index: bool| match objects {
            Some(o) if row_index => o.random_access_writer(),
            Some(o) => o.writer(),
            None => Ok(crate::store::objects::ObjectWriter::hashing_only()),
        };
        let mut w = Serial {
            table: writer(false)?,
            index: writer(true)?,
            buf: Vec::with_capacity(1 << 20),
            index_buf: Vec::with_capacity(256 * 1024),
            rows: rowindex::Builder::new(),
            profiler: Profiler::new(header.len(), null_tokens),
            header: header.to_vec(),
            n_rows: 0,
            n_bytes: 0,
            n_lines: 0,
        };
        w.index.write(&rowindex::Builder::start())?;
        let start = w.buf.len();
        push_record(&mut w.buf, header.iter().map(|h| h.as_bytes()));
        w.account(start);
        Ok(w)
    }

    fn account(&mut self, start: usize) {
        let rec = &self.buf[start..];
        self.n_bytes += rec.len() as u64;
        self.n_lines += line_breaks(rec);
    }

    /// Writes one data row, held in `bytes` as its fields back to back from `start`, each
    /// ending at its entry of `ends` (see [`push_packed`]).
    fn write_row(&mut self, bytes: &[u8], start: usize, ends: &[usize]) -> io::Result<()> {
        debug_assert_eq!(ends.len(), self.header.len());
        let entry_byte = self.n_bytes;
        let entry_line = self.n_lines + 1;
        self.rows.push(entry_byte, entry_line, &mut self.index_buf);
        self.profiler.observe_packed(bytes, start, ends);
        let before = self.buf.len();
        let breaks = push_packed(&mut self.buf, bytes, start, ends);
        self.n_bytes += (self.buf.len() - before) as u64;
        // Line breaks can only be the record's own and those inside its (quoted) fields.
        self.n_lines += 1;
        if breaks {
            let mut from = start;
            for &end in ends {
                self.n_lines += line_breaks(&bytes[from..end]);
                from = end;
            }
        }
        self.n_rows += 1;
        if self.buf.len() >= 1 << 20 {
            self.table.write(&self.buf)?;
            self.buf.clear();
        }
        if self.index_buf.len() >= 256 * 1024 {
            self.index.write(&self.index_buf)?;
            self.index_buf.clear();
        }
        Ok(())
    }

    fn finish(mut self) -> io::Result<Written> {
        self.table.write(&self.buf)?;
        std::mem::take(&mut self.rows).finish(&mut self.index_buf);
        self.index.write(&self.index_buf)?;
        Ok(Written {
            profiles: self.profiler.finish(&self.header),
            table: self.table,
            index: self.index,
            n_rows: self.n_rows,
        })
    }
}
