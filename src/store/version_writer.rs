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
use crate::table::rowindex::{self, RowEntry};
use crate::table::write::push_record;

/// What writing a version produced.
pub struct Written {
    pub table: ObjectWriter,
    pub index: ObjectWriter,
    pub n_rows: u64,
    pub profiles: Vec<ColumnProfile>,
}

/// Rows handed to the writer thread: field bytes back to back, and the end of every field.
#[derive(Default)]
struct Batch {
    bytes: Vec<u8>,
    ends: Vec<usize>,
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
        Self::start(Some(objects), header, null_tokens)
    }

    /// A writer that computes the version's hash, row index hash and profile but keeps no
    /// bytes (replay of a step whose output is already stored); its objects cannot be finished.
    pub fn hashing_only(header: &[String], null_tokens: &[String]) -> io::Result<Self> {
        Self::start(None, header, null_tokens)
    }

    fn start(
        objects: Option<&Objects>,
        header: &[String],
        null_tokens: &[String],
    ) -> io::Result<Self> {
        let mut serial = Serial::new(objects, header, null_tokens)?;
        let n_cols = header.len();
        let (to_writer, batches) = mpsc::sync_channel::<Batch>(2);
        let (give_back, spare) = mpsc::channel::<Batch>();
        let thread = std::thread::Builder::new()
            .name("sluice-writer".into())
            .spawn(move || {
                for mut b in batches {
                    let mut fields: Vec<&[u8]> = Vec::with_capacity(n_cols);
                    let mut start = 0;
                    for row in 0..b.rows {
                        fields.clear();
                        for &end in &b.ends[row * n_cols..(row + 1) * n_cols] {
                            fields.push(&b.bytes[start..end]);
                            start = end;
                        }
                        serial.write_row(&fields)?;
                    }
                    drop(fields);
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
        for f in fields {
            self.batch.bytes.extend_from_slice(f);
            self.batch.ends.push(self.batch.bytes.len());
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
        let base = self.batch.bytes.len();
        self.batch.bytes.extend_from_slice(bytes);
        self.batch.ends.extend(ends.iter().map(|e| base + e));
        self.batch.rows += 1;
        if self.batch.bytes.len() >= BATCH_BYTES || self.batch.rows >= BATCH_BYTES / 16 {
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
    scratch: Vec<u8>,
    fp_scratch: Vec<u8>,
    ends: Vec<usize>,
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
            Some(o) if row_index => o.row_index_writer(),
            Some(o) => o.writer(),
            None => Ok(crate::store::objects::ObjectWriter::hashing_only()),
        };
        let mut w = Serial {
            table: writer(false)?,
            index: writer(true)?,
            buf: Vec::with_capacity(1 << 20),
            index_buf: Vec::with_capacity(256 * 1024),
            scratch: Vec::new(),
            fp_scratch: Vec::new(),
            ends: Vec::new(),
            profiler: Profiler::new(header.len(), null_tokens),
            header: header.to_vec(),
            n_rows: 0,
            n_bytes: 0,
            n_lines: 0,
        };
        w.index.write(&rowindex::header())?;
        let start = w.buf.len();
        push_record(&mut w.buf, header.iter().map(|h| h.as_bytes()));
        w.account(start);
        Ok(w)
    }

    fn account(&mut self, start: usize) {
        let rec = &self.buf[start..];
        self.n_bytes += rec.len() as u64;
        self.n_lines += memchr::memchr_iter(b'\n', rec).count() as u64;
    }

    /// [`Self::account`] for a data row whose fields are known: line breaks can only be the
    /// record's own and those inside its (quoted) fields.
    fn account_row(&mut self, start: usize, fields: &[&[u8]]) {
        self.n_bytes += (self.buf.len() - start) as u64;
        self.n_lines += 1;
        for f in fields {
            if f.contains(&b'\n') {
                self.n_lines += memchr::memchr_iter(b'\n', f).count() as u64;
            }
        }
    }

    fn write_row(&mut self, fields: &[&[u8]]) -> io::Result<()> {
        debug_assert_eq!(fields.len(), self.header.len());
        let entry_byte = self.n_bytes;
        let entry_line = self.n_lines + 1;
        self.ends.clear();
        let mut end = 0usize;
        for f in fields {
            end += f.len();
            self.ends.push(end);
        }
        self.scratch.clear();
        for f in fields {
            self.scratch.extend_from_slice(f);
        }
        let fields_concat = std::mem::take(&mut self.scratch);
        let mut fp_scratch = std::mem::take(&mut self.fp_scratch);
        let fingerprint = rowindex::fingerprint_parts(&fields_concat, &self.ends, &mut fp_scratch);
        self.scratch = fields_concat;
        self.fp_scratch = fp_scratch;
        rowindex::encode_entry(
            &RowEntry {
                byte: entry_byte,
                line: entry_line,
                fingerprint,
            },
            &mut self.index_buf,
        );
        self.profiler.observe(fields.iter().copied());
        let start = self.buf.len();
        push_record(&mut self.buf, fields.iter().copied());
        self.account_row(start, fields);
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
        self.index.write(&self.index_buf)?;
        Ok(Written {
            profiles: self.profiler.finish(&self.header),
            table: self.table,
            index: self.index,
            n_rows: self.n_rows,
        })
    }
}
