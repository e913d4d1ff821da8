//! Segment files, the store's object layout: immutable files under `segments/` that each hold
//! one or more objects compressed with Zstandard (RFC 8878), an index of what they hold at their
//! end, and a tail that finds the index.
//!
//! A segment (all integers little-endian):
//!
//! ```text
//! "SLSG" u32 format (1)
//! object bytes, one object after another; each object is
//!     its Zstandard frames, each compressing `frame_size` bytes of the object (the last fewer),
//!     independently decodable, with the content checksum on,
//!     then a seek table as a skippable frame, per the Zstandard project's seekable format:
//!     u32 0x184D2A5E, u32 size of what follows, per frame u32 compressed size and u32
//!     decompressed size, then u32 number of frames, u8 descriptor (0: no per-frame checksums),
//!     u32 0x8F92EAB1
//! index block: "SLSI" u32 entries, then per object 64 bytes:
//!     32 hash (BLAKE3 of the uncompressed bytes), u64 offset of its first frame,
//!     u64 stored length (frames and seek table), u64 uncompressed length,
//!     u32 frame size (uncompressed bytes per frame), i32 Zstandard level
//! tail (56 bytes): u64 offset of the index block, u64 its length,
//!     32 BLAKE3 of the index block, "SLSGTAIL"
//! ```
//!
//! Each object's stored range is on its own a valid Zstandard stream in the seekable format
//! (`zstd -d` decodes it; the seek table is a skippable frame). Every frame but the last holds
//! exactly `frame_size` bytes, so the frame that holds an uncompressed offset is found by one
//! division: a read by offset decodes one frame (two when it crosses a frame's end). Objects are
//! compressed one by one and frame by frame, never against each other, so one object's bytes can
//! later be replaced (rewritten into a new segment) without touching any other object's frames,
//! hashes or proofs.
//!
//! Segments are written under `tmp/`, fsynced and renamed into `segments/`, then the folder is
//! fsynced; after that they are never modified, only removed whole by `reclaim` once every object
//! they hold that is still referenced has been copied into a new segment.

use std::fs::{self, File};
use std::io::{self, Read, Write};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::hash::Hash;

pub const SEGMENTS_DIR: &str = "segments";
pub const SEGMENT_SUFFIX: &str = ".seg";
pub const MAGIC: &[u8; 4] = b"SLSG";
pub const FORMAT: u32 = 1;
pub const HEADER_LEN: u64 = 8;
const INDEX_MAGIC: &[u8; 4] = b"SLSI";
const TAIL_MAGIC: &[u8; 8] = b"SLSGTAIL";
pub const TAIL_LEN: u64 = 8 + 8 + 32 + 8;
pub const ENTRY_LEN: usize = 32 + 8 + 8 + 8 + 4 + 4;
/// Uncompressed bytes per frame (see DEVELOPERS.md, "On-disk format", for the measurements).
pub const FRAME_SIZE: u32 = 256 << 10;
/// Uncompressed bytes per frame of an object read a few bytes at a time by offset: a row
/// index (48 bytes at a time) and a step's provenance object (its block table and one block).
pub const RANDOM_ACCESS_FRAME_SIZE: u32 = 32 << 10;
/// The Zstandard level new objects are written at.
pub const LEVEL: i32 = 1;
/// The largest frame size a reader accepts (a received store could claim any).
pub const MAX_FRAME_SIZE: u32 = 64 << 20;
const SKIPPABLE_MAGIC: u32 = 0x184D_2A5E;
const SEEKABLE_MAGIC: u32 = 0x8F92_EAB1;
const SEEK_FOOTER_LEN: u64 = 9;

/// Where one object is in a segment, and how it was compressed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Entry {
    pub hash: Hash,
    pub offset: u64,
    pub stored: u64,
    pub raw: u64,
    pub frame_size: u32,
    pub level: i32,
}

impl Entry {
    fn encode(&self, out: &mut Vec<u8>) {
        out.extend_from_slice(self.hash.as_bytes());
        out.extend_from_slice(&self.offset.to_le_bytes());
        out.extend_from_slice(&self.stored.to_le_bytes());
        out.extend_from_slice(&self.raw.to_le_bytes());
        out.extend_from_slice(&self.frame_size.to_le_bytes());
        out.extend_from_slice(&self.level.to_le_bytes());
    }

    fn decode(b: &[u8]) -> Entry {
        let u64_at = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap_or([0; 8]));
        let u32_at = |i: usize| u32::from_le_bytes(b[i..i + 4].try_into().unwrap_or([0; 4]));
        Entry {
            hash: Hash::from_bytes(b[..32].try_into().unwrap_or([0; 32])),
            offset: u64_at(32),
            stored: u64_at(40),
            raw: u64_at(48),
            frame_size: u32_at(56),
            level: u32_at(60) as i32,
        }
    }
}

/// One I/O point of a segment write, for fault injection (see `objects::Countdown`).
pub type Tick<'a> = &'a dyn Fn(&str) -> io::Result<()>;

/// Writes one segment: objects one after another, then the index and the tail.
pub struct SegmentWriter {
    file: File,
    pos: u64,
    entries: Vec<Entry>,
    compressor: zstd::bulk::Compressor<'static>,
    level: i32,
    frame_size: u32,
    /// The object being written: where it starts, its frames, the bytes not yet in a frame.
    start: u64,
    frames: Vec<(u32, u32)>,
    pending: Vec<u8>,
    raw: u64,
    /// The last frame compressed, its buffer reused for the next.
    frame: Vec<u8>,
}

fn bad(msg: impl Into<String>) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidData, msg.into())
}

impl SegmentWriter {
    /// Starts a segment in a new file at `path` (which must not exist).
    pub fn create(path: &Path, level: i32, frame_size: u32, tick: Tick) -> io::Result<Self> {
        let mut file = fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(path)?;
        let mut head = MAGIC.to_vec();
        head.extend_from_slice(&FORMAT.to_le_bytes());
        let started = tick("write")
            .and_then(|()| file.write_all(&head))
            .and_then(|()| zstd::bulk::Compressor::new(level))
            .and_then(|mut c| {
                c.set_parameter(zstd::stream::raw::CParameter::ChecksumFlag(true))?;
                Ok(c)
            });
        let compressor = match started {
            Ok(c) => c,
            Err(e) => {
                drop(file);
                let _ = fs::remove_file(path);
                return Err(e);
            }
        };
        Ok(SegmentWriter {
            file,
            pos: HEADER_LEN,
            entries: Vec::new(),
            compressor,
            level,
            frame_size,
            start: HEADER_LEN,
            frames: Vec::new(),
            pending: Vec::with_capacity(frame_size as usize),
            raw: 0,
            frame: Vec::new(),
        })
    }

    /// The file, for syncing what was written so far.
    pub fn file(&self) -> &File {
        &self.file
    }

    fn put(&mut self, bytes: &[u8], tick: Tick) -> io::Result<()> {
        tick("write")?;
        self.file.write_all(bytes)?;
        self.pos += bytes.len() as u64;
        Ok(())
    }

    fn compress_pending(&mut self, tick: Tick) -> io::Result<()> {
        if self.pending.is_empty() {
            return Ok(());
        }
        let pending = std::mem::take(&mut self.pending);
        let done = self.compress_frame(&pending, tick);
        self.pending = pending;
        self.pending.clear();
        done
    }

    /// Compresses `raw` as one frame into the reused output buffer and writes it.
    fn compress_frame(&mut self, raw: &[u8], tick: Tick) -> io::Result<()> {
        let mut frame = std::mem::take(&mut self.frame);
        frame.clear();
        frame.reserve(zstd::zstd_safe::compress_bound(raw.len()));
        let done = self
            .compressor
            .compress_to_buffer(raw, &mut frame)
            .and_then(|_| {
                let sizes = (
                    u32::try_from(frame.len()).map_err(|_| bad("a compressed frame over 4 GiB"))?,
                    raw.len() as u32,
                );
                self.put(&frame, tick)?;
                self.frames.push(sizes);
                Ok(())
            });
        self.frame = frame;
        done
    }

    /// Adds uncompressed bytes of the current object. A whole frame's worth of `data` met at a
    /// frame boundary is compressed where it lies, without a copy.
    pub fn write(&mut self, mut data: &[u8], tick: Tick) -> io::Result<()> {
        let whole = self.frame_size as usize;
        while !data.is_empty() {
            if self.pending.is_empty() && data.len() >= whole {
                self.compress_frame(&data[..whole], tick)?;
                self.raw += whole as u64;
                data = &data[whole..];
                continue;
            }
            let room = self.frame_size as usize - self.pending.len();
            let take = room.min(data.len());
            self.pending.extend_from_slice(&data[..take]);
            self.raw += take as u64;
            data = &data[take..];
            if self.pending.len() == self.frame_size as usize {
                self.compress_pending(tick)?;
            }
        }
        Ok(())
    }

    /// Ends the current object, named `hash`, with its seek table; the next `write` starts
    /// another.
    pub fn end_object(&mut self, hash: &Hash, tick: Tick) -> io::Result<Entry> {
        self.compress_pending(tick)?;
        let mut table = Vec::with_capacity(8 + self.frames.len() * 8 + 9);
        table.extend_from_slice(&SKIPPABLE_MAGIC.to_le_bytes());
        table.extend_from_slice(&((self.frames.len() * 8 + 9) as u32).to_le_bytes());
        for (c, d) in &self.frames {
            table.extend_from_slice(&c.to_le_bytes());
            table.extend_from_slice(&d.to_le_bytes());
        }
        table.extend_from_slice(&(self.frames.len() as u32).to_le_bytes());
        table.push(0);
        table.extend_from_slice(&SEEKABLE_MAGIC.to_le_bytes());
        self.put(&table, tick)?;
        let e = Entry {
            hash: *hash,
            offset: self.start,
            stored: self.pos - self.start,
            raw: self.raw,
            frame_size: self.frame_size,
            level: self.level,
        };
        self.entries.push(e);
        self.frames.clear();
        self.raw = 0;
        self.start = self.pos;
        Ok(e)
    }

    /// Copies an object's stored range as it is (its frames and seek table) from another
    /// segment; `entry` describes it there.
    pub fn copy_stored(&mut self, from: &File, entry: &Entry, tick: Tick) -> io::Result<Entry> {
        let mut left = entry.stored;
        let mut at = entry.offset;
        let mut buf = vec![0u8; 1 << 20];
        let start = self.pos;
        while left > 0 {
            let n = left.min(buf.len() as u64) as usize;
            from.read_exact_at(&mut buf[..n], at)?;
            self.put(&buf[..n], tick)?;
            left -= n as u64;
            at += n as u64;
        }
        let e = Entry {
            offset: start,
            ..*entry
        };
        self.entries.push(e);
        self.start = self.pos;
        Ok(e)
    }

    /// Writes the index and the tail and syncs the file; returns the entries.
    pub fn finish(mut self, tick: Tick) -> io::Result<Vec<Entry>> {
        let mut index = INDEX_MAGIC.to_vec();
        index.extend_from_slice(&(self.entries.len() as u32).to_le_bytes());
        for e in &self.entries {
            e.encode(&mut index);
        }
        let index_at = self.pos;
        let mut tail = Vec::with_capacity(TAIL_LEN as usize);
        tail.extend_from_slice(&index_at.to_le_bytes());
        tail.extend_from_slice(&(index.len() as u64).to_le_bytes());
        tail.extend_from_slice(blake3::hash(&index).as_bytes());
        tail.extend_from_slice(TAIL_MAGIC);
        self.put(&index, tick)?;
        self.put(&tail, tick)?;
        tick("sync")?;
        self.file.sync_all()?;
        Ok(self.entries)
    }
}

/// Reads a segment's index, checking its tail, checksum and that every entry lies inside the
/// object bytes. A damaged or truncated segment is an error that says what is wrong.
pub fn read_index(path: &Path) -> io::Result<Vec<Entry>> {
    let meta = fs::symlink_metadata(path)?;
    if !meta.file_type().is_file() {
        return Err(bad(
            "not a plain file (a link or a folder); sluice never follows links out of the store",
        ));
    }
    let file = File::open(path)?;
    let len = file.metadata()?.len();
    if len < HEADER_LEN + TAIL_LEN {
        return Err(bad(format!(
            "truncated: {len} bytes, shorter than a segment's header and tail"
        )));
    }
    let mut head = [0u8; HEADER_LEN as usize];
    file.read_exact_at(&mut head, 0)?;
    if &head[..4] != MAGIC {
        return Err(bad("not a segment (bad magic)"));
    }
    let format = u32::from_le_bytes([head[4], head[5], head[6], head[7]]);
    if format != FORMAT {
        return Err(bad(format!(
            "segment format {format} is not known to this build"
        )));
    }
    let mut tail = [0u8; TAIL_LEN as usize];
    file.read_exact_at(&mut tail, len - TAIL_LEN)?;
    if &tail[48..] != TAIL_MAGIC {
        return Err(bad(
            "truncated or its tail damaged: the last bytes are not a segment tail",
        ));
    }
    let index_at = u64::from_le_bytes(tail[..8].try_into().unwrap_or([0; 8]));
    let index_len = u64::from_le_bytes(tail[8..16].try_into().unwrap_or([0; 8]));
    if index_at < HEADER_LEN || index_at.checked_add(index_len) != Some(len - TAIL_LEN) {
        return Err(bad(
            "the tail does not point at an index just before it (truncated or extended)",
        ));
    }
    let n_bytes = usize::try_from(index_len).map_err(|_| bad("index too large"))?;
    if n_bytes < 8 || !(n_bytes - 8).is_multiple_of(ENTRY_LEN) {
        return Err(bad("the index is not a whole number of entries"));
    }
    let mut index = vec![0u8; n_bytes];
    file.read_exact_at(&mut index, index_at)?;
    if blake3::hash(&index).as_bytes() != &tail[16..48] {
        return Err(bad(
            "the index does not match its checksum in the tail (a changed byte)",
        ));
    }
    if &index[..4] != INDEX_MAGIC {
        return Err(bad("the index has a bad magic"));
    }
    let count = u32::from_le_bytes(index[4..8].try_into().unwrap_or([0; 4])) as usize;
    if count != (n_bytes - 8) / ENTRY_LEN {
        return Err(bad("the index's entry count disagrees with its length"));
    }
    let mut entries = Vec::with_capacity(count);
    for chunk in index[8..].chunks_exact(ENTRY_LEN) {
        let e = Entry::decode(chunk);
        let inside = e.offset >= HEADER_LEN
            && e.offset
                .checked_add(e.stored)
                .is_some_and(|end| end <= index_at)
            && e.stored >= 8 + SEEK_FOOTER_LEN;
        if !inside || e.frame_size == 0 || e.frame_size > MAX_FRAME_SIZE {
            return Err(bad(format!(
                "the index entry of {} points outside the segment's object bytes or names an impossible frame size",
                e.hash
            )));
        }
        entries.push(e);
    }
    Ok(entries)
}

/// An object's seek table, read and checked against its index entry.
#[derive(Debug)]
pub struct SeekTable {
    /// Absolute offset in the segment of each frame's start, and of the end of the last.
    pub starts: Vec<u64>,
    /// Uncompressed bytes per frame.
    pub raw: Vec<u32>,
    pub frame_size: u32,
}

pub fn read_seek_table(file: &File, e: &Entry) -> io::Result<SeekTable> {
    let end = e.offset + e.stored;
    let mut foot = [0u8; SEEK_FOOTER_LEN as usize];
    file.read_exact_at(&mut foot, end - SEEK_FOOTER_LEN)?;
    let n = u32::from_le_bytes(foot[..4].try_into().unwrap_or([0; 4])) as u64;
    let magic = u32::from_le_bytes(foot[5..9].try_into().unwrap_or([0; 4]));
    let damaged = |what: &str| bad(format!("object {}: {what}", e.hash));
    if magic != SEEKABLE_MAGIC || foot[4] != 0 {
        return Err(damaged("its seek table's footer is damaged"));
    }
    let table_len = 8 + n * 8 + SEEK_FOOTER_LEN;
    if table_len > e.stored {
        return Err(damaged("its seek table is longer than the object"));
    }
    let mut table = vec![0u8; (table_len - SEEK_FOOTER_LEN) as usize];
    file.read_exact_at(&mut table, end - table_len)?;
    if u32::from_le_bytes(table[..4].try_into().unwrap_or([0; 4])) != SKIPPABLE_MAGIC
        || u64::from(u32::from_le_bytes(table[4..8].try_into().unwrap_or([0; 4])))
            != n * 8 + SEEK_FOOTER_LEN
    {
        return Err(damaged("its seek table's frame header is damaged"));
    }
    let mut starts = Vec::with_capacity(n as usize + 1);
    let mut raw = Vec::with_capacity(n as usize);
    let mut at = e.offset;
    let mut total = 0u64;
    for (i, pair) in table[8..].chunks_exact(8).enumerate() {
        let c = u32::from_le_bytes(pair[..4].try_into().unwrap_or([0; 4]));
        let d = u32::from_le_bytes(pair[4..].try_into().unwrap_or([0; 4]));
        let last = i as u64 + 1 == n;
        if d > e.frame_size || (!last && d != e.frame_size) || d == 0 {
            return Err(damaged(&format!(
                "frame {i} holds {d} bytes; every frame but the last must hold the frame size {}",
                e.frame_size
            )));
        }
        starts.push(at);
        raw.push(d);
        at += u64::from(c);
        total += u64::from(d);
    }
    starts.push(at);
    if at != end - table_len || total != e.raw {
        return Err(damaged(
            "its seek table does not add up to its stored and uncompressed lengths",
        ));
    }
    Ok(SeekTable {
        starts,
        raw,
        frame_size: e.frame_size,
    })
}

/// Decodes frame `i` of an object.
pub fn decode_frame(
    file: &File,
    table: &SeekTable,
    i: usize,
    dec: &mut zstd::bulk::Decompressor<'static>,
) -> io::Result<Vec<u8>> {
    let mut out = Vec::new();
    decode_frame_into(file, table, i, dec, &mut Vec::new(), &mut out)?;
    Ok(out)
}

/// [`decode_frame`] into `out` (its earlier contents replaced), reading the compressed bytes
/// into `comp`: both buffers are reused from frame to frame, nothing allocated once they are
/// large enough.
fn decode_frame_into(
    file: &File,
    table: &SeekTable,
    i: usize,
    dec: &mut zstd::bulk::Decompressor<'static>,
    comp: &mut Vec<u8>,
    out: &mut Vec<u8>,
) -> io::Result<()> {
    let (from, to) = (table.starts[i], table.starts[i + 1]);
    let (n_comp, n_raw) = ((to - from) as usize, table.raw[i] as usize);
    comp.resize(n_comp, 0);
    file.read_exact_at(comp, from)?;
    out.clear();
    out.reserve(n_raw);
    dec.decompress_to_buffer(comp.as_slice(), out)
        .map_err(|e| bad(format!("frame {i} at byte {from} does not decode ({e})")))?;
    if out.len() != n_raw {
        return Err(bad(format!(
            "frame {i} at byte {from} decodes to {} bytes, its seek table says {}",
            out.len(),
            n_raw
        )));
    }
    Ok(())
}

/// Reads an object from its segment frame by frame (memory: one frame).
pub struct FrameReader {
    file: File,
    table: std::sync::Arc<SeekTable>,
    next: usize,
    out: Vec<u8>,
    pos: usize,
    dec: zstd::bulk::Decompressor<'static>,
}

impl FrameReader {
    pub fn new(file: File, table: std::sync::Arc<SeekTable>) -> io::Result<Self> {
        Ok(FrameReader {
            file,
            table,
            next: 0,
            out: Vec::new(),
            pos: 0,
            dec: zstd::bulk::Decompressor::new()?,
        })
    }
}

impl Read for FrameReader {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        while self.pos == self.out.len() {
            if self.next >= self.table.raw.len() {
                return Ok(0);
            }
            self.out = decode_frame(&self.file, &self.table, self.next, &mut self.dec)?;
            self.next += 1;
            self.pos = 0;
        }
        let n = buf.len().min(self.out.len() - self.pos);
        buf[..n].copy_from_slice(&self.out[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

/// How many threads decode an object's frames for [`AheadReader`].
const DECODERS: usize = 2;

/// Reads an object from its segment with the decoding on threads of their own ([`DECODERS`]
/// of them, frame `i` decoded by thread `i % DECODERS`, each a few frames ahead of the
/// reader), so that decoding overlaps itself and whatever the reader does with the bytes
/// (hashing and writing them, for `retrieve`). Frames reach the reader in order, and each
/// frame's buffer goes back to its thread once read, to be decoded into again (with the
/// compressed bytes' buffer, also kept by the thread, nothing is allocated per frame). Memory:
/// about four frames per decoding thread.
pub struct AheadReader {
    frames: Vec<std::sync::mpsc::Receiver<io::Result<Vec<u8>>>>,
    /// Per decoding thread: where a frame's buffer goes back once read, to be decoded into
    /// again (no allocation per frame).
    spent: Vec<std::sync::mpsc::Sender<Vec<u8>>>,
    /// The frame to take next, and how many there are.
    next: usize,
    n_frames: usize,
    out: Vec<u8>,
    pos: usize,
    done: bool,
}

impl AheadReader {
    pub fn new(file: File, table: std::sync::Arc<SeekTable>) -> io::Result<Self> {
        let file = std::sync::Arc::new(file);
        let n_frames = table.raw.len();
        let mut frames = Vec::with_capacity(DECODERS);
        let mut spent = Vec::with_capacity(DECODERS);
        for first in 0..DECODERS {
            let (tx, rx) = std::sync::mpsc::sync_channel(2);
            let (give_back, returned) = std::sync::mpsc::channel::<Vec<u8>>();
            let mut dec = zstd::bulk::Decompressor::new()?;
            let (file, table) = (file.clone(), table.clone());
            std::thread::Builder::new()
                .name("sluice-decode".into())
                .spawn(move || {
                    let mut comp = Vec::new();
                    for i in (first..table.raw.len()).step_by(DECODERS) {
                        let mut out = returned.try_recv().unwrap_or_default();
                        let r = decode_frame_into(&file, &table, i, &mut dec, &mut comp, &mut out)
                            .map(|()| out);
                        let failed = r.is_err();
                        if tx.send(r).is_err() || failed {
                            return;
                        }
                    }
                })?;
            frames.push(rx);
            spent.push(give_back);
        }
        Ok(AheadReader {
            frames,
            spent,
            next: 0,
            n_frames,
            out: Vec::new(),
            pos: 0,
            done: false,
        })
    }
}

impl AheadReader {
    /// The next decoded frame, taken off its decoding thread, in order; `None` at the end.
    fn take(&mut self) -> io::Result<Option<Vec<u8>>> {
        if self.done || self.next >= self.n_frames {
            return Ok(None);
        }
        match self.frames[self.next % DECODERS].recv() {
            Ok(frame) => {
                self.next += 1;
                frame.inspect_err(|_| self.done = true).map(Some)
            }
            Err(_) => {
                self.done = true;
                Err(bad(format!(
                    "frame {} was not decoded (its decoding thread stopped)",
                    self.next
                )))
            }
        }
    }
}

/// An object read as a sequence of owned pieces, in order, for a reader that keeps every byte
/// it reads ([`crate::diff::read`]): each piece is handed over as it was decoded, never copied
/// into a buffer of the reader's, so the memory it lies in is first touched on the thread
/// that decoded it.
pub trait Pieces: Send {
    /// The next piece (never empty); `None` at the end of the object.
    fn next_piece(&mut self) -> io::Result<Option<Vec<u8>>>;

    /// Takes back a piece handed over earlier that its reader no longer needs, to decode a
    /// later frame into (memory already touched, so no fresh pages); the default drops it.
    fn give_back(&mut self, piece: Vec<u8>) {
        drop(piece);
    }
}

impl Pieces for AheadReader {
    fn next_piece(&mut self) -> io::Result<Option<Vec<u8>>> {
        if self.pos < self.out.len() {
            let rest = self.out.split_off(self.pos);
            self.pos = self.out.len();
            return Ok(Some(rest));
        }
        // A frame handed over comes back only through `give_back`: until then its thread
        // decodes the next one into a fresh buffer.
        self.take()
    }

    fn give_back(&mut self, piece: Vec<u8>) {
        // To the thread of the next frame not yet taken (which may have stopped: the piece is
        // then simply dropped).
        let _ = self.spent[self.next % DECODERS].send(piece);
    }
}

/// Any reader as [`Pieces`] of up to [`PIECE_LEN`] bytes (each read until full or at the end),
/// read into a piece given back when there is one.
pub struct ReadPieces<R> {
    reader: R,
    spare: Option<Vec<u8>>,
}

impl<R> ReadPieces<R> {
    pub fn new(reader: R) -> Self {
        ReadPieces {
            reader,
            spare: None,
        }
    }
}

/// The size of the pieces [`ReadPieces`] hands over: a frame of the default size.
pub const PIECE_LEN: usize = FRAME_SIZE as usize;

impl<R: Read + Send> Pieces for ReadPieces<R> {
    fn next_piece(&mut self) -> io::Result<Option<Vec<u8>>> {
        let mut piece = self.spare.take().unwrap_or_default();
        piece.clear();
        piece.reserve(PIECE_LEN);
        (&mut self.reader)
            .take(PIECE_LEN as u64)
            .read_to_end(&mut piece)?;
        Ok((!piece.is_empty()).then_some(piece))
    }

    fn give_back(&mut self, piece: Vec<u8>) {
        self.spare = Some(piece);
    }
}

impl Read for AheadReader {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        while self.pos == self.out.len() {
            let Some(frame) = self.take()? else {
                return Ok(0);
            };
            let read = std::mem::replace(&mut self.out, frame);
            // The frame read before goes back to the thread that decoded it (which may have
            // stopped: it is then simply dropped).
            if let Some(back) = (self.next - 1).checked_sub(1).map(|k| k % DECODERS) {
                let _ = self.spent[back].send(read);
            }
            self.pos = 0;
        }
        let n = buf.len().min(self.out.len() - self.pos);
        buf[..n].copy_from_slice(&self.out[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

/// Where [`read_at`] takes frame `i` from: `decode` it, or give one kept from an earlier read.
pub type FrameSource<'s> =
    &'s dyn Fn(usize, &dyn Fn() -> io::Result<Vec<u8>>) -> io::Result<Arc<Vec<u8>>>;

/// A decoded frame, named by its object and its number.
type KeptFrame = ((Hash, usize), Arc<Vec<u8>>);

/// Reads `buf.len()` bytes from uncompressed `offset` (fewer at the end), decoding only the
/// frames that hold them; `frame(i, decode)` gives frame `i`, decoded by `decode` or kept from
/// an earlier read.
pub fn read_at(
    file: &File,
    table: &SeekTable,
    offset: u64,
    buf: &mut [u8],
    frame: FrameSource<'_>,
) -> io::Result<usize> {
    let mut i = (offset / u64::from(table.frame_size)) as usize;
    let mut within = (offset % u64::from(table.frame_size)) as usize;
    let mut n = 0;
    while n < buf.len() && i < table.raw.len() {
        let decode = || decode_frame(file, table, i, &mut zstd::bulk::Decompressor::new()?);
        let frame = frame(i, &decode)?;
        if within < frame.len() {
            let k = (frame.len() - within).min(buf.len() - n);
            buf[n..n + k].copy_from_slice(&frame[within..within + k]);
            n += k;
        }
        within = 0;
        i += 1;
    }
    Ok(n)
}

/// How many decoded frames a store keeps for reads by offset ([`FrameCache`]): 4 MiB of
/// frames of the default size.
const CACHED_FRAMES: usize = 16;

/// Frames decoded for reads by offset, the latest [`CACHED_FRAMES`] of them: a trail reads the
/// first bytes of the same provenance objects, and rows near each other, again and again.
/// Keyed by object and frame, and emptied whenever the store's seek tables are (an object's
/// frames are fixed once published, as its seek table is).
#[derive(Default)]
pub struct FrameCache(std::sync::Mutex<std::collections::VecDeque<KeptFrame>>);

impl FrameCache {
    /// Frame `i` of object `hash`: kept from an earlier read, else decoded and kept.
    pub fn get(
        &self,
        hash: &Hash,
        i: usize,
        decode: &dyn Fn() -> io::Result<Vec<u8>>,
    ) -> io::Result<Arc<Vec<u8>>> {
        let key = (*hash, i);
        {
            let mut kept = self.0.lock().unwrap_or_else(|p| p.into_inner());
            if let Some(at) = kept.iter().position(|(k, _)| *k == key) {
                let hit = kept.remove(at);
                let frame = hit.as_ref().map(|(_, f)| Arc::clone(f));
                if let (Some(hit), Some(frame)) = (hit, frame) {
                    kept.push_front(hit);
                    return Ok(frame);
                }
            }
        }
        let frame = Arc::new(decode()?);
        let mut kept = self.0.lock().unwrap_or_else(|p| p.into_inner());
        kept.push_front((key, Arc::clone(&frame)));
        kept.truncate(CACHED_FRAMES);
        Ok(frame)
    }

    /// Forgets every frame.
    pub fn clear(&self) {
        self.0.lock().unwrap_or_else(|p| p.into_inner()).clear();
    }
}

/// A fresh segment file name: creation time in nanoseconds, process and a counter, so names
/// sort by age and two writers never pick the same one.
pub fn fresh_name(counter: u64) -> String {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos());
    format!(
        "{nanos:020}-{}-{counter}{SEGMENT_SUFFIX}",
        std::process::id()
    )
}

/// The segment files in `dir` (sorted), and the other entries there (strays).
pub fn list(dir: &Path) -> io::Result<(Vec<PathBuf>, Vec<PathBuf>)> {
    let mut segs = Vec::new();
    let mut strays = Vec::new();
    match fs::read_dir(dir) {
        Ok(rd) => {
            for e in rd {
                let e = e?;
                let name = e.file_name().to_string_lossy().into_owned();
                if name.ends_with(SEGMENT_SUFFIX) && e.file_type()?.is_file() {
                    segs.push(e.path());
                } else {
                    strays.push(e.path());
                }
            }
        }
        Err(e) if e.kind() == io::ErrorKind::NotFound => {}
        Err(e) => return Err(e),
    }
    segs.sort();
    strays.sort();
    Ok((segs, strays))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn no_tick(_: &str) -> io::Result<()> {
        Ok(())
    }

    /// However an object's bytes are handed to the writer (a byte at a time, in pieces that
    /// cross frame boundaries, whole frames at a boundary, all at once), the segment is the
    /// same: the frames are cut at the same places and compressed alike.
    #[test]
    fn a_segment_does_not_depend_on_how_its_bytes_were_handed_over() {
        let dir = tempfile::tempdir().unwrap();
        let data: Vec<u8> = (0..20_000u32)
            .flat_map(|i| (i * 7 % 253).to_le_bytes())
            .collect();
        let hash = Hash::from_bytes(*blake3::hash(&data).as_bytes());
        let written = |name: &str, cuts: &[usize]| -> Vec<u8> {
            let path = dir.path().join(name);
            let mut w = SegmentWriter::create(&path, 1, 1000, &no_tick).unwrap();
            let (mut rest, mut k) = (&data[..], 0);
            while !rest.is_empty() {
                let n = cuts[k % cuts.len()].min(rest.len());
                w.write(&rest[..n], &no_tick).unwrap();
                rest = &rest[n..];
                k += 1;
            }
            w.end_object(&hash, &no_tick).unwrap();
            w.finish(&no_tick).unwrap();
            fs::read(&path).unwrap()
        };
        let all = written("all.seg", &[data.len()]);
        for (name, cuts) in [
            ("bytes.seg", &[1][..]),
            ("odd.seg", &[7, 993, 1000, 3005]),
            ("frames.seg", &[1000]),
            ("mixed.seg", &[400, 2600, 1000, 1]),
        ] {
            assert!(written(name, cuts) == all, "{name}");
        }
    }

    #[test]
    fn objects_read_back_whole_and_by_offset() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.seg");
        let mut w = SegmentWriter::create(&path, 3, 1000, &no_tick).unwrap();
        let first: Vec<u8> = (0..4321u32).flat_map(|i| (i % 251).to_le_bytes()).collect();
        w.write(&first, &no_tick).unwrap();
        let h1 = Hash::from_bytes(*blake3::hash(&first).as_bytes());
        w.end_object(&h1, &no_tick).unwrap();
        let h2 = Hash::from_bytes(*blake3::hash(b"").as_bytes());
        w.end_object(&h2, &no_tick).unwrap();
        w.finish(&no_tick).unwrap();

        let entries = read_index(&path).unwrap();
        assert_eq!(entries.len(), 2);
        assert_eq!(entries[0].raw, first.len() as u64);
        assert_eq!(entries[1].raw, 0);
        let file = File::open(&path).unwrap();
        let table = std::sync::Arc::new(read_seek_table(&file, &entries[0]).unwrap());
        let mut all = Vec::new();
        FrameReader::new(file.try_clone().unwrap(), table.clone())
            .unwrap()
            .read_to_end(&mut all)
            .unwrap();
        assert_eq!(all, first);
        let mut ahead = Vec::new();
        AheadReader::new(file.try_clone().unwrap(), table.clone())
            .unwrap()
            .read_to_end(&mut ahead)
            .unwrap();
        assert_eq!(ahead, first);
        // Handed over as pieces: the frames as decoded, whole from the start or after a read
        // that stopped inside one; any reader cut into pieces of the default frame size.
        let pieces = |p: &mut dyn Pieces| {
            let mut out = Vec::new();
            while let Some(piece) = p.next_piece().unwrap() {
                assert!(!piece.is_empty());
                out.push(piece);
            }
            out
        };
        let mut fresh = AheadReader::new(file.try_clone().unwrap(), table.clone()).unwrap();
        let frames = pieces(&mut fresh);
        assert_eq!(frames.len(), table.raw.len());
        assert_eq!(frames.concat(), first);
        let mut begun = AheadReader::new(file.try_clone().unwrap(), table.clone()).unwrap();
        let mut head = [0u8; 1500];
        begun.read_exact(&mut head).unwrap();
        let rest = pieces(&mut begun);
        assert_eq!([&head[..], &rest.concat()].concat(), first);
        let cut = pieces(&mut ReadPieces::new(&first[..]));
        assert_eq!(cut.len(), first.len().div_ceil(PIECE_LEN));
        assert_eq!(cut.concat(), first);
        // Pieces given back are decoded or read into again, and the bytes stay the same.
        let recycled = |p: &mut dyn Pieces| {
            let mut out = Vec::new();
            while let Some(piece) = p.next_piece().unwrap() {
                out.extend_from_slice(&piece);
                p.give_back(piece);
            }
            out
        };
        assert_eq!(recycled(&mut ReadPieces::new(&first[..])), first);
        let mut ahead = AheadReader::new(file.try_clone().unwrap(), table.clone()).unwrap();
        assert_eq!(recycled(&mut ahead), first);
        // A reader's next piece is read into the one given back (told by its capacity).
        let long: Vec<u8> = (0..PIECE_LEN * 5 / 2).map(|i| (i % 251) as u8).collect();
        let mut reader = ReadPieces::new(&long[..]);
        let _ = reader.next_piece().unwrap();
        reader.give_back(Vec::with_capacity(3 * PIECE_LEN));
        let second = reader.next_piece().unwrap().unwrap();
        assert!(second.capacity() >= 3 * PIECE_LEN);
        assert_eq!(second, &long[PIECE_LEN..2 * PIECE_LEN]);
        // Reads by offset, each frame decoded afresh and through a cache of decoded frames
        // (the second read at 1990 is served from it): the same bytes.
        let cache = FrameCache::default();
        let name = Hash::from_bytes(*blake3::hash(&first).as_bytes());
        let fresh: FrameSource<'_> = &|_, decode| decode().map(Arc::new);
        let kept: FrameSource<'_> = &|i, decode| cache.get(&name, i, decode);
        for frame in [fresh, kept, kept] {
            let mut buf = [0u8; 1500];
            let n = read_at(&file, &table, 1990, &mut buf, frame).unwrap();
            assert_eq!(&buf[..n], &first[1990..3490]);
            let n = read_at(&file, &table, first.len() as u64 - 10, &mut buf, frame).unwrap();
            assert_eq!(&buf[..n], &first[first.len() - 10..]);
        }

        // The object's stored range alone decodes with the reference library's streaming
        // decoder (it skips the seek table, a skippable frame, RFC 8878 section 3.1.2).
        let e = entries[0];
        let mut range = vec![0u8; e.stored as usize];
        file.read_exact_at(&mut range, e.offset).unwrap();
        assert_eq!(zstd::stream::decode_all(&range[..]).unwrap(), first);
    }

    #[test]
    fn a_truncated_or_flipped_segment_is_named() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("b.seg");
        let mut w = SegmentWriter::create(&path, 1, 64, &no_tick).unwrap();
        w.write(b"order_id,shop\nWO-1,Quillby\n", &no_tick).unwrap();
        w.end_object(&Hash::from_bytes([7; 32]), &no_tick).unwrap();
        w.finish(&no_tick).unwrap();
        let bytes = fs::read(&path).unwrap();
        fs::write(&path, &bytes[..bytes.len() - 3]).unwrap();
        assert!(read_index(&path)
            .unwrap_err()
            .to_string()
            .contains("truncated"));
        let mut flipped = bytes.clone();
        let at = bytes.len() - TAIL_LEN as usize - 5;
        flipped[at] ^= 1;
        fs::write(&path, &flipped).unwrap();
        assert!(read_index(&path)
            .unwrap_err()
            .to_string()
            .contains("checksum"));
    }
}
