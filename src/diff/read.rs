//! Reading the two versions for a diff: every row of a version's object (through the one
//! reader of stored rows, [`crate::table::stored`]), rows picked by offset ([`RawRows`]), the row fingerprints of its row index object, and
//! [`RowStore`], a compact owned store of the few rows a diff needs to look at again.

use std::io::Read;
use std::path::Path;
use std::sync::Arc;

use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::Version;
use crate::store::objects::Objects;
use crate::store::segments::Pieces;
use crate::table::parse::Parser;
use crate::table::rowindex::{self, ENTRY_LEN, HEADER_LEN};
use crate::table::RawRecord;

fn parse_hash(hex: &str) -> Result<Hash> {
    hex.parse()
        .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))
}

/// How many bytes the store holds for `v`'s rows under `name`, the name they are read as
/// ([`Objects::open_raw`]): an erased form is shorter than the bytes recorded.
fn stored_len(objects: &Objects, v: &Version, name: &Hash) -> Result<u64> {
    if *name == parse_hash(&v.hash)? {
        return Ok(v.n_bytes);
    }
    objects.size(name)
}

/// A reader that hashes what passes through it (and reports how far it is, when asked to).
struct Hashing<R> {
    inner: R,
    hasher: blake3::Hasher,
    progress: Option<crate::progress::Task>,
}

impl<R> Hashing<R> {
    /// Hashes bytes read past the inner reader (and counts them).
    fn saw(&mut self, bytes: &[u8]) {
        self.hasher.update(bytes);
        if let Some(p) = &mut self.progress {
            p.add(bytes.len() as u64);
        }
    }
}

impl<R: Read> Read for Hashing<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.saw(&buf[..n]);
        Ok(n)
    }
}

fn check_hash(expected: &Hash, hasher: &blake3::Hasher) -> Result<()> {
    let actual = Hash::from_bytes(*hasher.finalize().as_bytes());
    if &actual != expected {
        return Err(ErrorKind::ObjectCorrupt {
            hash: expected.hex(),
            actual: actual.hex(),
        }
        .into());
    }
    Ok(())
}

/// Calls `f` with every data row of `v` (0-based row and record) in order. Only the object
/// store is needed, so that the two versions of a diff can be read on two threads.
pub fn each_row(
    objects: &Objects,
    v: &Version,
    f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
) -> Result<()> {
    objects.each_row_doing(v, "comparing", f)
}

/// The fingerprint of every row of `v` (from its row index object where it holds them, else
/// recomputed from the version's bytes).
pub fn fingerprints(objects: &Objects, v: &Version) -> Result<Vec<u64>> {
    Ok(row_index(objects, v)?.0)
}

/// The fingerprint and the byte offset of every row of `v`: the offsets from its row index
/// object, the fingerprints from it too when it holds them (format 1), else recomputed from the
/// version's bytes (one more read of them).
pub fn row_index(objects: &Objects, v: &Version) -> Result<(Vec<u64>, Vec<u64>)> {
    let (stored, offsets) = offsets(objects, v)?;
    let fps = match stored {
        Some(fps) => fps,
        None => {
            let offsets: Arc<[u64]> = offsets.as_slice().into();
            recompute_fingerprints(objects, v, &offsets, false)?.0
        }
    };
    Ok((fps, offsets))
}

/// The byte offset of every row of `v` from its row index object (checked against its hash
/// and its row count), and the fingerprints the object holds if it is of format 1.
pub fn offsets(objects: &Objects, v: &Version) -> Result<(Option<Vec<u64>>, Vec<u64>)> {
    let (inner, hash) = objects.open_raw(&parse_hash(&v.row_index)?)?;
    let mut reader = Hashing {
        inner,
        hasher: blake3::Hasher::new(),
        progress: None,
    };
    let damaged = |why: &str| {
        Error::from(ErrorKind::Inconsistent(format!(
            "the row index of {} is damaged ({why}); run `sluice verify`",
            v.label()
        )))
    };
    let io = |e| Error::io(Path::new(&v.row_index), e);
    let mut head = [0u8; HEADER_LEN];
    reader.read_exact(&mut head).map_err(io)?;
    let format = rowindex::format_of(&head).map_err(|_| damaged("unknown header"))?;
    if format == rowindex::COMPACT_FORMAT {
        let mut data = head.to_vec();
        reader.read_to_end(&mut data).map_err(io)?;
        check_hash(&hash, &reader.hasher)?;
        let offsets = rowindex::offsets(&data).map_err(|e| damaged(&e.to_string()))?;
        if offsets.len() as u64 != v.n_rows {
            return Err(damaged("its length does not match the row count"));
        }
        return Ok((None, offsets));
    }
    let mut fps = Vec::with_capacity(v.n_rows as usize);
    let mut offsets = Vec::with_capacity(v.n_rows as usize);
    let mut buf = vec![0u8; ENTRY_LEN * 16384];
    let mut filled = 0usize;
    loop {
        let n = reader.read(&mut buf[filled..]).map_err(io)?;
        filled += n;
        let whole = filled / ENTRY_LEN * ENTRY_LEN;
        for e in buf[..whole].chunks_exact(ENTRY_LEN) {
            let word = |i: usize| {
                let mut w = [0u8; 8];
                w.copy_from_slice(&e[i..i + 8]);
                u64::from_le_bytes(w)
            };
            offsets.push(word(0));
            fps.push(word(16));
        }
        buf.copy_within(whole..filled, 0);
        filled -= whole;
        if n == 0 {
            break;
        }
    }
    if filled != 0 || fps.len() as u64 != v.n_rows {
        return Err(damaged("its length does not match the row count"));
    }
    check_hash(&hash, &reader.hasher)?;
    Ok((Some(fps), offsets))
}

/// [`row_index`] for a pass that cuts rows out of `v` afterwards: the fingerprints, and the
/// offsets as a [`Cut`] which, with `keep`, also holds the version's bytes when its
/// fingerprints had to be computed from them (they are then read once for both passes).
pub fn row_index_cut(objects: &Objects, v: &Version, keep: bool) -> Result<(Vec<u64>, Cut)> {
    let (stored, offsets) = offsets(objects, v)?;
    let mut cut = Cut::offsets(offsets);
    let fps = match stored {
        Some(fps) => fps,
        None => {
            let (fps, kept) = recompute_fingerprints(objects, v, &cut.offsets, keep)?;
            cut.kept = kept;
            fps
        }
    };
    Ok((fps, cut))
}

/// Every row's fingerprint computed from the version's bytes: rows cut out by `offsets` and
/// split directly where they hold no quote (parsed otherwise), or, for a version in another
/// encoding than UTF-8, read through the one reader of stored rows. With `keep` (and rows
/// that can be cut out), the version's bytes are handed back too.
fn recompute_fingerprints(
    objects: &Objects,
    v: &Version,
    offsets: &Arc<[u64]>,
    keep: bool,
) -> Result<(Vec<u64>, Option<Arc<Kept>>)> {
    let mut fps = Vec::with_capacity(offsets.len());
    let mut scratch = Vec::new();
    if !cuttable(v) {
        each_row(objects, v, |_, r| {
            fps.push(rowindex::fingerprint(&r, &mut scratch));
            Ok(())
        })?;
        return Ok((fps, None));
    }
    let mut raw = RawRows::open(objects, v, &Cut::offsets(Arc::clone(offsets)), keep)?;
    let mut ends = Vec::new();
    for row in 0..offsets.len() as u64 {
        fps.push(raw.fingerprint(row, &mut ends, &mut scratch)?);
    }
    Ok((fps, raw.done()?))
}

/// The fingerprint of a record split at `ends` (each field's end in `bytes`; the next field
/// starts one delimiter later), as [`rowindex::fingerprint`] defines it.
pub fn plain_fingerprint(bytes: &[u8], ends: &[usize], scratch: &mut Vec<u8>) -> u64 {
    scratch.clear();
    let mut start = 0;
    for &e in ends {
        scratch.extend_from_slice(&bytes[start..e]);
        start = e + 1;
    }
    for (i, &e) in ends.iter().enumerate() {
        scratch.extend_from_slice(&((e - i) as u32).to_le_bytes());
    }
    xxhash_rust::xxh3::xxh3_64(scratch)
}

/// Owned rows, kept compactly: the field bytes of all rows in one buffer and the field ends in
/// another (no allocation per row or per cell), each row known by its 0-based row number.
#[derive(Debug, Default, Clone)]
pub struct RowStore {
    rows: Vec<u64>,
    fields: Vec<u8>,
    ends: Vec<usize>,
    /// Per stored row: where its fields and ends stop in the two buffers.
    stops: Vec<(usize, usize)>,
}

/// A borrowed view of one stored row.
#[derive(Debug, Clone, Copy)]
pub struct RowRef<'a> {
    fields: &'a [u8],
    ends: &'a [usize],
}

impl<'a> From<&RawRecord<'a>> for RowRef<'a> {
    fn from(r: &RawRecord<'a>) -> Self {
        RowRef {
            fields: r.fields,
            ends: r.ends,
        }
    }
}

impl<'a> RowRef<'a> {
    /// Equal values in every field (the same bytes split the same way).
    pub fn same_values(&self, other: &RowRef<'_>) -> bool {
        self.fields == other.fields && self.ends == other.ends
    }

    pub fn len(&self) -> usize {
        self.ends.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    pub fn field(&self, i: usize) -> &'a [u8] {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.fields[start..self.ends[i]]
    }

    /// The cell as text (stored versions are UTF-8 once decoded; anything else is shown with
    /// replacement characters rather than refused).
    pub fn text(&self, i: usize) -> String {
        String::from_utf8_lossy(self.field(i)).into_owned()
    }

    pub fn texts(&self) -> Vec<String> {
        (0..self.len()).map(|i| self.text(i)).collect()
    }
}

impl RowStore {
    pub fn new() -> Self {
        RowStore::default()
    }

    pub fn len(&self) -> usize {
        self.rows.len()
    }

    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Bytes of cell data held.
    pub fn n_bytes(&self) -> usize {
        self.fields.len()
    }

    /// Adds row `row`; rows must be pushed in increasing order.
    pub fn push(&mut self, row: u64, r: &RawRecord<'_>) {
        debug_assert!(self.rows.last().is_none_or(|&l| l < row));
        self.rows.push(row);
        // Field ends are kept relative to the row's first byte, as the parser gives them.
        self.fields.extend_from_slice(r.fields);
        self.ends.extend_from_slice(r.ends);
        self.stops.push((self.fields.len(), self.ends.len()));
    }

    /// Adds a row held elsewhere; rows must be pushed in increasing order.
    pub fn push_ref(&mut self, row: u64, r: RowRef<'_>) {
        self.push(row, &RawRecord::packed(r.fields, r.ends, 0));
    }

    /// The row number of the `i`-th stored row.
    pub fn row_at(&self, i: usize) -> u64 {
        self.rows[i]
    }

    /// The `i`-th stored row.
    pub fn at(&self, i: usize) -> RowRef<'_> {
        let (fs, es) = if i == 0 { (0, 0) } else { self.stops[i - 1] };
        let (fe, ee) = self.stops[i];
        RowRef {
            fields: &self.fields[fs..fe],
            ends: &self.ends[es..ee],
        }
    }

    /// Row `row`, if it was stored.
    pub fn get(&self, row: u64) -> Option<RowRef<'_>> {
        self.rows.binary_search(&row).ok().map(|i| self.at(i))
    }
}

/// Frees `value` on a thread of its own, so that giving back a large block (the kept bytes of
/// two versions: tens of thousands of pages) overlaps with the work that follows; inline when
/// no thread can be started.
pub fn free_aside<T: Send + 'static>(value: T) {
    // When no thread can be started, the closure, and the value in it, is dropped right here.
    let _ = std::thread::Builder::new()
        .name("sluice-free".into())
        .spawn(move || drop(value));
}

/// `f` of each item of `items`, in order: over the two halves at once when there are at least
/// `alone` of them (the second half on another thread, its results put after the first's),
/// else on this thread.
pub fn each_in_halves<T: Sync, R: Send>(
    items: &[T],
    alone: usize,
    f: impl Fn(&T) -> Option<R> + Sync,
) -> Vec<R> {
    let run = |part: &[T]| -> Vec<R> { part.iter().filter_map(&f).collect() };
    if items.len() < alone.max(2) {
        return run(items);
    }
    let (first, second) = items.split_at(items.len() / 2);
    std::thread::scope(|s| {
        let later = s.spawn(|| run(second));
        let mut out = run(first);
        match later.join() {
            Ok(rest) => out.extend(rest),
            Err(panic) => std::panic::resume_unwind(panic),
        }
        out
    })
}

/// Runs `fa` on another thread and `fb` on this one, and returns both results: the two
/// versions of a diff are read at the same time, one per core.
pub fn both<A: Send, B>(
    fa: impl FnOnce() -> Result<A> + Send,
    fb: impl FnOnce() -> Result<B>,
) -> Result<(A, B)> {
    std::thread::scope(|s| {
        let h = s.spawn(fa);
        let rb = fb();
        let ra = h
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        Ok((ra?, rb?))
    })
}

/// Whether rows of `v` can be cut out of its bytes by offset and parsed one by one: UTF-8
/// text, where the row index's byte offsets point into the bytes as stored.
pub fn cuttable(v: &Version) -> bool {
    v.dialect.encoding == "utf-8"
}

/// Up to this many bytes of both versions together, a comparison whose rows are cut out by
/// offset keeps what its first pass read and its second pass cuts its rows out of memory: each
/// version is then decoded and hashed once, not twice. Past it the second pass reads the
/// objects again, so memory stays bounded.
pub const KEEP_BYTES: u64 = 256 << 20;

/// A version's bytes, read once and kept for a later pass: the pieces the object was read in (a
/// segment object's frames, each where its decoding thread put it: nothing is copied, and the
/// kernel's first touch of that memory happens on the decoding threads), and where each
/// starts. A first pass that meets the other side's rows as it reads ([`super::meet`]) gives
/// back the pieces whose rows all have an equal on the other side, after copying out the rows
/// that may not ([`RawRows::let_go`]): the bytes before [`Self::whole_from`] are then only those
/// rows.
#[derive(Debug, Default)]
pub struct Kept {
    pieces: Vec<Vec<u8>>,
    /// Where each piece starts in the version's bytes.
    starts: Vec<u64>,
    len: u64,
    /// `pieces[..first]` were given back (and are empty); they end where `pieces[first]`
    /// starts.
    first: usize,
    /// The rows copied out of pieces before they were given back, one after another.
    copied: Vec<u8>,
    /// Per copied row, ascending: its byte range in the version and where it starts in
    /// `copied`.
    rows: Vec<(u64, u64, usize)>,
}

impl Kept {
    fn push(&mut self, piece: Vec<u8>) {
        self.starts.push(self.len);
        self.len += piece.len() as u64;
        self.pieces.push(piece);
    }

    /// How many bytes were read (kept whole, or given back with some rows copied out).
    pub fn len(&self) -> u64 {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Where the bytes kept whole start: before it, only the copied rows are held.
    pub fn whole_from(&self) -> u64 {
        self.starts.get(self.first).copied().unwrap_or(self.len)
    }

    /// Whether every byte read is still held (no piece was given back).
    pub fn is_whole(&self) -> bool {
        self.first == 0
    }

    /// How many bytes of rows were copied out of pieces given back.
    pub fn copied_len(&self) -> usize {
        self.copied.len()
    }

    /// Whether the bytes `from..to` (one row's) can be had: kept whole, or copied as that row.
    pub fn holds(&self, from: u64, to: u64) -> bool {
        if to > self.len || from > to {
            return false;
        }
        from >= self.whole_from() || from == to || self.copied_row(from, to).is_some()
    }

    /// Where the row `from..to` was copied to, if it was.
    fn copied_row(&self, from: u64, to: u64) -> Option<usize> {
        let i = self.rows.binary_search_by_key(&from, |r| r.0).ok()?;
        let (_, end, at) = self.rows[i];
        (end == to).then_some(at)
    }

    /// Where bytes `from..to` (non-empty, within [`Self::len`]) lie: within one piece, or
    /// across several ([`Held::Spill`], after copying them into `spill`), or, before
    /// [`Self::whole_from`], in the copy of that row (`None` when the row was not copied).
    /// `at` is the piece the last call found: rows are mostly asked for in order, so the next
    /// is that one or the one after.
    fn locate(&self, from: u64, to: u64, at: &mut usize, spill: &mut Vec<u8>) -> Option<Held> {
        if from < self.whole_from() {
            let c = self.copied_row(from, to)?;
            return Some(Held::Copied(c, c + (to - from) as usize));
        }
        let holds = |c: usize| {
            c < self.pieces.len()
                && self.starts[c] <= from
                && from < self.starts[c] + self.pieces[c].len() as u64
        };
        let c = if holds(*at) {
            *at
        } else if holds(*at + 1) {
            *at + 1
        } else {
            self.starts
                .partition_point(|&s| s <= from)
                .saturating_sub(1)
        };
        *at = c;
        let (start, piece) = (self.starts[c], &self.pieces[c]);
        if to <= start + piece.len() as u64 {
            return Some(Held::Piece(
                c,
                (from - start) as usize,
                (to - start) as usize,
            ));
        }
        // A row that crosses from one piece into the next: copied apart.
        spill.clear();
        let mut k = c;
        while (spill.len() as u64) < to - from {
            let (s, p) = (self.starts[k], &self.pieces[k]);
            let a = from.max(s) - s;
            let b = to.min(s + p.len() as u64) - s;
            spill.extend_from_slice(&p[a as usize..b as usize]);
            k += 1;
        }
        Some(Held::Spill)
    }

    /// Copies the row `from..to` (held whole, not yet copied, after every row copied so far).
    fn copy_row(&mut self, from: u64, to: u64, spill: &mut Vec<u8>) -> Option<()> {
        let mut at = self.first;
        let held = self.locate(from, to, &mut at, spill)?;
        let bytes = match held {
            Held::Piece(c, a, b) => &self.pieces[c][a..b],
            Held::Spill => &spill[..],
            Held::Copied(..) | Held::Buf(..) => return None,
        };
        let start = self.copied.len();
        self.copied.extend_from_slice(bytes);
        self.rows.push((from, to, start));
        Some(())
    }

    /// Gives back, through `give`, the pieces that end at or before `boundary`.
    fn give_back_before(&mut self, boundary: u64, mut give: impl FnMut(Vec<u8>)) {
        while self.first < self.pieces.len()
            && self.starts[self.first] + self.pieces[self.first].len() as u64 <= boundary
        {
            give(std::mem::take(&mut self.pieces[self.first]));
            self.first += 1;
        }
    }
}

/// Where a row [`RawRows::fill`] found lies: in the reading buffer, in a kept piece, or in the
/// spill buffer a row crossing two kept pieces was copied into.
#[derive(Debug, Clone, Copy)]
enum Held {
    Buf(usize, usize),
    Piece(usize, usize, usize),
    Spill,
    /// A range of [`Kept::copied`].
    Copied(usize, usize),
}

/// What a diff's first pass leaves for its second about one version: the byte offset of every
/// row (from its row index), and the version's whole bytes when the first pass kept them
/// ([`RawRows::open`]), already checked against the version's hash.
#[derive(Debug, Clone)]
pub struct Cut {
    pub offsets: Arc<[u64]>,
    pub kept: Option<Arc<Kept>>,
}

impl Cut {
    pub fn offsets(offsets: impl Into<Arc<[u64]>>) -> Cut {
        Cut {
            offsets: offsets.into(),
            kept: None,
        }
    }
}

/// The bytes of single rows of a stored version, cut out by the offsets of its row index while
/// the object is read once from start to end (and re-hashed; [`RawRows::finish`] checks it),
/// or from the bytes a first pass kept ([`Cut::kept`], checked then: nothing is read or hashed
/// again). Nothing is parsed but the rows asked for.
pub struct RawRows {
    reader: Hashing<Box<dyn Read + Send>>,
    hash: Hash,
    offsets: Arc<[u64]>,
    n_bytes: u64,
    /// Read bytes in `buf[..filled]`; the rest is room for the next read, zeroed once when it
    /// was first allocated and reused since (no zeroing per read).
    buf: Vec<u8>,
    filled: usize,
    /// The object offset of `buf[0]`.
    buf_start: u64,
    /// One parser for every row parsed (restarted per row, never built again).
    parser: Parser,
    label: String,
    /// Where every byte read stays, for [`RawRows::done`], read from `pieces` (and hashed by
    /// `reader`'s hasher); `buf` is then unused.
    keeping: Option<Kept>,
    pieces: Option<Box<dyn Pieces>>,
    /// The version's bytes, kept by an earlier pass: rows are cut out of them instead.
    kept: Option<Arc<Kept>>,
    /// The kept piece the last row was found in, and where a row crossing pieces is copied.
    piece_at: usize,
    spill: Vec<u8>,
}

impl RawRows {
    pub fn new(objects: &Objects, v: &Version, offsets: impl Into<Arc<[u64]>>) -> Result<RawRows> {
        let (inner, hash) = objects.open_raw(&parse_hash(&v.hash)?)?;
        Ok(RawRows::over(
            v,
            (hash, stored_len(objects, v, &hash)?),
            offsets.into(),
            inner,
            Some(Self::progress(v)),
        ))
    }

    fn progress(v: &Version) -> crate::progress::Task {
        crate::progress::Task::begin(
            || format!("comparing {}", v.label()),
            Some(v.n_bytes),
            crate::progress::Unit::Bytes,
        )
    }

    /// Rows of `v` read from `inner` (nothing, for kept bytes), which must be `n_bytes` bytes
    /// that hash to `hash`.
    fn over(
        v: &Version,
        (hash, n_bytes): (Hash, u64),
        offsets: Arc<[u64]>,
        inner: Box<dyn Read + Send>,
        progress: Option<crate::progress::Task>,
    ) -> RawRows {
        RawRows {
            reader: Hashing {
                inner,
                hasher: blake3::Hasher::new(),
                progress,
            },
            hash,
            offsets,
            n_bytes,
            buf: Vec::new(),
            filled: 0,
            buf_start: 0,
            parser: Parser::new(v.dialect.delimiter_byte(), 0),
            label: v.label(),
            keeping: None,
            pieces: None,
            kept: None,
            piece_at: 0,
            spill: Vec::new(),
        }
    }

    /// Rows of `v` for a pass over all of them: cut out of the bytes `cut` holds when an
    /// earlier pass kept them, else read from the object, keeping every byte read when `keep`
    /// says so, for [`Self::done`] to hand over for a later pass.
    pub fn open(objects: &Objects, v: &Version, cut: &Cut, keep: bool) -> Result<RawRows> {
        if !keep || cut.kept.is_some() {
            return RawRows::cut(objects, v, cut);
        }
        let (pieces, hash) = objects.open_pieces(&parse_hash(&v.hash)?)?;
        let mut raw = RawRows::over(
            v,
            (hash, stored_len(objects, v, &hash)?),
            Arc::clone(&cut.offsets),
            Box::new(std::io::empty()),
            Some(Self::progress(v)),
        );
        raw.keeping = Some(Kept::default());
        raw.pieces = Some(pieces);
        Ok(raw)
    }

    /// Rows of `v` cut out as `cut` says: from its kept bytes when an earlier pass kept them,
    /// else read from the object again ([`Self::new`]).
    pub fn cut(objects: &Objects, v: &Version, cut: &Cut) -> Result<RawRows> {
        let Some(bytes) = &cut.kept else {
            return RawRows::new(objects, v, Arc::clone(&cut.offsets));
        };
        // Checked when they were read: nothing is hashed again, only their length held to
        // what the store holds under the name the rows are read as.
        let hash = objects.form_of(&parse_hash(&v.hash)?);
        let mut raw = RawRows::over(
            v,
            (hash, stored_len(objects, v, &hash)?),
            Arc::clone(&cut.offsets),
            Box::new(std::io::empty()),
            None,
        );
        raw.kept = Some(Arc::clone(bytes));
        if bytes.len() != raw.n_bytes {
            return Err(raw.short());
        }
        Ok(raw)
    }

    /// The bytes [`Self::fill`] found.
    #[inline]
    fn data(&self, at: Held) -> &[u8] {
        held(at, &self.kept, &self.keeping, &self.buf, &self.spill)
    }

    /// The bytes of row `row` (its record, line ending and any blank lines after it). Rows
    /// must be asked for in increasing order.
    #[inline]
    pub fn bytes(&mut self, row: u64) -> Result<&[u8]> {
        let at = self.fill(row)?;
        Ok(self.data(at))
    }

    /// Reads until row `row` is whole in the buffer (or kept); returns where it lies.
    #[inline]
    fn fill(&mut self, row: u64) -> Result<Held> {
        // The common case, kept small enough to inline into a pass over every row: the row
        // lies whole in the kept piece the row before was found in (a given-back piece is
        // empty, so never found here).
        let i = row as usize;
        if let (Some(&start), Some(&end)) = (self.offsets.get(i), self.offsets.get(i + 1)) {
            if let Some(k) = self.kept.as_deref().or(self.keeping.as_ref()) {
                let c = self.piece_at;
                if let (Some(&s), Some(p)) = (k.starts.get(c), k.pieces.get(c)) {
                    if s <= start && start < end && end <= s + p.len() as u64 {
                        return Ok(Held::Piece(c, (start - s) as usize, (end - s) as usize));
                    }
                }
            }
        }
        self.fill_any(row)
    }

    /// [`Self::fill`] in every case.
    fn fill_any(&mut self, row: u64) -> Result<Held> {
        let i = row as usize;
        let (Some(&start), end) = (self.offsets.get(i), self.offsets.get(i + 1)) else {
            return Err(self.short());
        };
        let end = end.copied().unwrap_or(self.n_bytes);
        if start < self.buf_start || end < start || end > self.n_bytes {
            return Err(self.short());
        }
        if let Some(k) = &mut self.keeping {
            // Every piece stays as it was read.
            let pieces = self.pieces.as_mut().ok_or_else(|| {
                Error::from(ErrorKind::Inconsistent(
                    "a reader keeping bytes has nothing to read them from".into(),
                ))
            })?;
            while k.len() < end {
                let piece = pieces
                    .next_piece()
                    .map_err(|e| Error::io(Path::new(&self.label), e))?
                    .ok_or_else(|| short(&self.label))?;
                self.reader.saw(&piece);
                k.push(piece);
            }
        }
        let kept = self.kept.as_deref().or(self.keeping.as_ref());
        if let Some(k) = kept {
            if end > k.len() {
                return Err(self.short());
            }
            if start == end {
                self.spill.clear();
                return Ok(Held::Spill);
            }
            return k
                .locate(start, end, &mut self.piece_at, &mut self.spill)
                .ok_or_else(|| not_kept(&self.label, row));
        }
        // Read until the row is whole, first dropping what lies before it (only then, so that
        // the buffer moves once per piece read, not once per row).
        while self.buf_start + (self.filled as u64) < end {
            let drop_n = ((start - self.buf_start) as usize).min(self.filled);
            if drop_n > 0 {
                self.buf.copy_within(drop_n..self.filled, 0);
                self.filled -= drop_n;
                self.buf_start += drop_n as u64;
            }
            let have = self.filled;
            if self.buf.len() < have + crate::hash::STREAM_BUF {
                self.buf.resize(have + crate::hash::STREAM_BUF, 0);
            }
            let n = self
                .reader
                .read(&mut self.buf[have..])
                .map_err(|e| Error::io(Path::new(&self.label), e))?;
            self.filled += n;
            if n == 0 {
                return Err(self.short());
            }
        }
        let from = (start - self.buf_start) as usize;
        let to = (end - self.buf_start) as usize;
        Ok(Held::Buf(from, to))
    }

    /// Parses row `row` into `out`.
    pub fn parse_into(&mut self, row: u64, out: &mut RowStore) -> Result<()> {
        self.with_record(row, |r| out.push(row, r))
    }

    /// Parses row `row` and calls `f` with its record.
    pub fn with_record(&mut self, row: u64, f: impl FnOnce(&RawRecord<'_>)) -> Result<()> {
        let at = self.fill(row)?;
        let bytes = held(at, &self.kept, &self.keeping, &self.buf, &self.spill);
        let p = &mut self.parser;
        p.restart(0);
        let mut f = Some(f);
        let mut keep = |r: RawRecord<'_>| -> Result<()> {
            if let Some(f) = f.take() {
                f(&r);
            }
            Ok(())
        };
        p.feed(bytes, &mut keep)?;
        let closed = p.finish(&mut keep)?;
        if closed.is_err() || f.is_some() {
            return Err(self.short());
        }
        Ok(())
    }

    /// The fields `0..=last` of row `row` when they can be split off its bytes directly: none
    /// of the bytes up to the end of field `last` is a quote or a line break, so csv_core
    /// would read exactly the pieces between the delimiters. Fills `ends` (relative to the
    /// record's first byte) and returns the record's bytes; `None` when the row needs parsing.
    pub fn plain_prefix<'s>(
        &'s mut self,
        row: u64,
        last: usize,
        ends: &mut Vec<usize>,
    ) -> Result<Option<&'s [u8]>> {
        let at = self.fill(row)?;
        let delimiter = self.parser.delimiter();
        let bytes = self.data(at);
        ends.clear();
        for (i, &c) in bytes.iter().enumerate() {
            if c == delimiter {
                ends.push(i);
                if ends.len() > last {
                    return Ok(Some(bytes));
                }
            } else if c == b'"' || c == b'\r' || c == b'\n' {
                // A quote needs csv_core; the record (or the line) may end here: parse it.
                return Ok(None);
            }
        }
        Ok(None)
    }

    /// Row `row` split directly when it holds no quote: fills `ends` with each field's end
    /// (relative to the record's first byte; the next field starts one delimiter later) and
    /// returns the record's bytes without its line ending; `None` when it needs parsing.
    pub fn plain_row<'s>(
        &'s mut self,
        row: u64,
        ends: &mut Vec<usize>,
    ) -> Result<Option<&'s [u8]>> {
        let at = self.fill(row)?;
        let delimiter = self.parser.delimiter();
        let bytes = self.data(at);
        let rec = match memchr::memchr2(b'\r', b'\n', bytes) {
            Some(e) => &bytes[..e],
            None => bytes,
        };
        if rec.is_empty() || memchr::memchr(b'"', rec).is_some() {
            return Ok(None);
        }
        ends.clear();
        ends.extend(memchr::memchr_iter(delimiter, rec));
        ends.push(rec.len());
        Ok(Some(rec))
    }

    /// The fingerprint of row `row` ([`rowindex::fingerprint`]).
    pub fn fingerprint(
        &mut self,
        row: u64,
        ends: &mut Vec<usize>,
        scratch: &mut Vec<u8>,
    ) -> Result<u64> {
        if let Some(rec) = self.plain_row(row, ends)? {
            return Ok(plain_fingerprint(rec, ends, scratch));
        }
        let mut fp = 0;
        self.with_record(row, |r| fp = rowindex::fingerprint(r, scratch))?;
        Ok(fp)
    }

    /// The first row of the kept piece that holds row `upto`'s first byte (of the last piece
    /// read, when that byte is not read yet): the rows before it lie in pieces
    /// [`Self::let_go`] can give back. At most `upto`; 0 when nothing is being kept.
    pub fn held_from_row(&self, upto: u64) -> u64 {
        let Some(k) = &self.keeping else {
            return 0;
        };
        let Some(last) = k.pieces.len().checked_sub(1) else {
            return 0;
        };
        let at = self
            .offsets
            .get(upto as usize)
            .copied()
            .unwrap_or(self.n_bytes);
        let c = k
            .starts
            .partition_point(|&s| s <= at)
            .saturating_sub(1)
            .clamp(k.first.min(last), last);
        let boundary = k.starts[c];
        self.offsets.partition_point(|&o| o < boundary) as u64
    }

    /// Copies the rows `copy` (ascending, after every row copied before, each before `bound`,
    /// which [`Self::held_from_row`] gave) out of the kept pieces, then gives back to be
    /// decoded into again every piece that ends at or before row `bound`'s first byte: the rows
    /// of those pieces not copied are no longer held ([`Kept::whole_from`]).
    pub fn let_go(&mut self, bound: u64, copy: &[u64]) -> Result<()> {
        let (Some(k), Some(pieces)) = (self.keeping.as_mut(), self.pieces.as_mut()) else {
            return Ok(());
        };
        let end = |i: usize| self.offsets.get(i).copied().unwrap_or(self.n_bytes);
        for &row in copy {
            let i = row as usize;
            let (from, to) = (end(i), end(i + 1));
            if from < to && k.copy_row(from, to, &mut self.spill).is_none() {
                return Err(not_kept(&self.label, row));
            }
        }
        k.give_back_before(end(bound as usize), |p| pieces.give_back(p));
        Ok(())
    }

    /// How many bytes of rows [`Self::let_go`] copied so far.
    pub fn copied_len(&self) -> usize {
        self.keeping.as_ref().map_or(0, Kept::copied_len)
    }

    /// Reads the rest of the object and checks its hash (nothing to do for kept bytes, checked
    /// when they were read).
    pub fn finish(mut self) -> Result<()> {
        if self.kept.is_some() {
            return Ok(());
        }
        let mut sink = vec![0u8; crate::hash::STREAM_BUF];
        while self
            .reader
            .read(&mut sink)
            .map_err(|e| Error::io(Path::new(&self.label), e))?
            > 0
        {}
        check_hash(&self.hash, &self.reader.hasher)
    }

    /// [`Self::finish`], handing over the version's whole bytes (checked) when this reader
    /// kept them ([`Self::open`]), for [`Cut::kept`].
    pub fn done(mut self) -> Result<Option<Arc<Kept>>> {
        let (Some(mut kept), Some(mut pieces)) = (self.keeping.take(), self.pieces.take()) else {
            return self.finish().map(|()| None);
        };
        let io = |e| Error::io(Path::new(&self.label), e);
        // Nothing may follow the recorded length.
        while kept.len() <= self.n_bytes {
            let Some(piece) = pieces.next_piece().map_err(io)? else {
                break;
            };
            self.reader.saw(&piece);
            kept.push(piece);
        }
        if kept.len() != self.n_bytes {
            return Err(self.short());
        }
        check_hash(&self.hash, &self.reader.hasher)?;
        Ok(Some(Arc::new(kept)))
    }

    fn short(&self) -> Error {
        short(&self.label)
    }
}

/// The error for a row a first pass did not keep, asked for from what it kept (the readers of
/// a second pass check first, [`wanted_rows_reader`]).
fn not_kept(label: &str, row: u64) -> Error {
    ErrorKind::Inconsistent(format!(
        "row {} of {label} was not kept by the first pass of this comparison",
        row + 1
    ))
    .into()
}

/// The error for a version whose bytes do not match its row index.
fn short(label: &str) -> Error {
    ErrorKind::Inconsistent(format!(
        "the bytes of {label} do not match its row index; run `sluice verify`"
    ))
    .into()
}

/// The bytes a [`RawRows`] cuts its rows out of: those an earlier pass kept, those this pass
/// keeps, or its reading buffer (a function of the fields, so that the parser can be borrowed
/// beside them).
#[inline]
fn held<'h>(
    at: Held,
    kept: &'h Option<Arc<Kept>>,
    keeping: &'h Option<Kept>,
    buf: &'h [u8],
    spill: &'h [u8],
) -> &'h [u8] {
    match at {
        Held::Buf(from, to) => &buf[from..to],
        Held::Spill => spill,
        Held::Piece(c, from, to) => match kept.as_deref().or(keeping.as_ref()) {
            Some(k) => &k.pieces[c][from..to],
            None => &[],
        },
        Held::Copied(from, to) => match kept.as_deref().or(keeping.as_ref()) {
            Some(k) => &k.copied[from..to],
            None => &[],
        },
    }
}

/// A reader of the rows `wanted` (0-based, ascending) of `v`, which can be cut out by offset:
/// out of the bytes a first pass kept (`known`) when they hold every one of those rows, else
/// out of the object, read again (the row index too, when no first pass read it).
fn wanted_rows_reader(
    objects: &Objects,
    v: &Version,
    known: Option<&Cut>,
    wanted: &[u64],
) -> Result<RawRows> {
    let mut cut = match known {
        Some(c) => c.clone(),
        None => Cut::offsets(offsets(objects, v)?.1),
    };
    if let Some(k) = cut.kept.as_deref().filter(|k| !k.is_whole()) {
        let all = wanted.iter().all(|&w| {
            let i = w as usize;
            let to = cut.offsets.get(i + 1).copied().unwrap_or(k.len());
            cut.offsets.get(i).is_some_and(|&from| k.holds(from, to))
        });
        if !all {
            cut.kept = None;
        }
    }
    RawRows::cut(objects, v, &cut)
}

/// Reads the rows `wanted` (0-based, ascending) of `v` into a [`RowStore`].
pub fn rows_of(objects: &Objects, v: &Version, wanted: &[u64]) -> Result<RowStore> {
    rows_at(objects, v, None, wanted)
}

/// [`rows_of`], with what a first pass left about `v` when it read its row index already (and
/// perhaps kept its bytes).
pub fn rows_at(
    objects: &Objects,
    v: &Version,
    known: Option<&Cut>,
    wanted: &[u64],
) -> Result<RowStore> {
    let mut out = RowStore::new();
    each_wanted(objects, v, known, wanted, |row, r| out.push(row, r))?;
    Ok(out)
}

/// Calls `f` with each row of `wanted` (0-based, ascending, no repeats) of `v`, in order; rows
/// are cut out by offset when the version allows it (out of what a first pass kept, `known`,
/// when that holds them all), so only they are parsed.
pub fn each_wanted(
    objects: &Objects,
    v: &Version,
    known: Option<&Cut>,
    wanted: &[u64],
    mut f: impl FnMut(u64, &RawRecord<'_>),
) -> Result<()> {
    if wanted.is_empty() {
        return Ok(());
    }
    if cuttable(v) {
        let mut raw = wanted_rows_reader(objects, v, known, wanted)?;
        for &w in wanted {
            raw.with_record(w, |r| f(w, r))?;
        }
        return raw.finish();
    }
    let mut next = 0usize;
    each_row(objects, v, |row, r| {
        if next < wanted.len() && wanted[next] == row {
            f(row, &r);
            next += 1;
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Kept pieces give every range of bytes exactly as one contiguous buffer would, whether
    /// it lies in one piece or crosses two or more, asked for in order or not.
    #[test]
    fn kept_pieces_give_every_range_as_one_buffer_would() {
        let whole: Vec<u8> = (0..=255u8).cycle().take(97).collect();
        let mut sevens = vec![7; 13];
        sevens.push(6);
        for sizes in [vec![97], vec![1, 96], vec![40, 1, 1, 30, 25], sevens] {
            assert_eq!(sizes.iter().sum::<usize>(), whole.len());
            let mut kept = Kept::default();
            let mut at = 0;
            for n in &sizes {
                kept.push(whole[at..at + n].to_vec());
                at += n;
            }
            assert_eq!(kept.len(), whole.len() as u64);
            let (mut piece, mut spill) = (0, Vec::new());
            let mut ranges = Vec::new();
            for from in 0..whole.len() {
                for to in from + 1..=whole.len() {
                    ranges.push((from, to));
                }
            }
            // In order, then backwards.
            let backwards: Vec<_> = ranges.iter().rev().copied().collect();
            for (from, to) in ranges.into_iter().chain(backwards) {
                let at = kept.locate(from as u64, to as u64, &mut piece, &mut spill);
                let got = match at {
                    Some(Held::Piece(c, a, b)) => &kept.pieces[c][a..b],
                    Some(Held::Spill) => &spill[..],
                    other => panic!("{other:?} for bytes kept whole"),
                };
                assert_eq!(got, &whole[from..to], "{sizes:?} {from}..{to}");
            }
        }
    }

    /// Rows copied out before their pieces are given back are found as they were, every other
    /// row before where the whole bytes start is not held (and asked for, not found), and the
    /// bytes from there on are still given as one buffer would.
    #[test]
    fn rows_copied_before_their_pieces_go_are_found_and_no_others() {
        let whole: Vec<u8> = (0..=255u8).cycle().take(120).collect();
        // Rows of 1 to 11 bytes, some crossing pieces of 17 bytes.
        let mut bounds = vec![0u64];
        while *bounds.last().unwrap() < 120 {
            let next = bounds.last().unwrap() + 1 + bounds.len() as u64 % 11;
            bounds.push(next.min(120));
        }
        let rows: Vec<(u64, u64)> = bounds.windows(2).map(|w| (w[0], w[1])).collect();
        for cut_row in [0usize, 1, 5, rows.len() / 2, rows.len() - 1, rows.len()] {
            for every in [1usize, 2, 3] {
                let mut kept = Kept::default();
                for piece in whole.chunks(17) {
                    kept.push(piece.to_vec());
                }
                let copy: Vec<usize> = (0..cut_row).filter(|r| r % every == 0).collect();
                let mut spill = Vec::new();
                for &r in &copy {
                    let (from, to) = rows[r];
                    assert!(kept.copy_row(from, to, &mut spill).is_some());
                }
                let boundary = rows.get(cut_row).map_or(120, |r| r.0);
                let mut given = 0;
                kept.give_back_before(boundary, |p| given += p.len());
                let whole_from = kept.whole_from();
                assert!(whole_from <= boundary);
                assert_eq!(given as u64, whole_from);
                assert_eq!(kept.is_whole(), whole_from == 0);
                let mut at = 0;
                for (r, &(from, to)) in rows.iter().enumerate() {
                    let expect_held = from >= whole_from || copy.contains(&r);
                    assert_eq!(
                        kept.holds(from, to),
                        expect_held,
                        "row {r} cut at {cut_row}"
                    );
                    let got = match kept.locate(from, to, &mut at, &mut spill) {
                        Some(Held::Piece(c, a, b)) => kept.pieces[c][a..b].to_vec(),
                        Some(Held::Spill) => spill.clone(),
                        Some(Held::Copied(a, b)) => kept.copied[a..b].to_vec(),
                        Some(Held::Buf(..)) => panic!("kept bytes found in the reading buffer"),
                        None => {
                            assert!(!expect_held, "row {r} held but not found");
                            continue;
                        }
                    };
                    assert!(expect_held);
                    assert_eq!(got, &whole[from as usize..to as usize], "row {r}");
                }
            }
        }
    }
}
