//! The store's objects: immutable byte strings named by the BLAKE3 hash of their
//! (uncompressed) bytes, kept compressed in segment files under `segments/` (format and
//! guarantees in [`super::segments`]).
//!
//! A new object is compressed frame by frame into a segment of its own under `tmp/`, fsynced,
//! renamed into `segments/` and the folder fsynced; after that it is never modified. `cat`
//! decodes it and re-hashes what it writes, so the bytes are the originals. `reclaim` packs
//! small segments together and drops objects nothing refers to. The [`ObjectBackend`] trait is
//! the seam tests use to inject faults (and [`Countdown`] the way to fail or stop at any one
//! I/O point of the real backend).

use std::collections::{HashMap, HashSet};
use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Write};
use std::ops::ControlFlow;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use super::segments::{self, Entry, SeekTable, SegmentWriter, SEGMENTS_DIR};
use crate::error::{ErrorKind, Result};
use crate::hash::Hash;

/// A temporary object being written. Dropping it without `persist` removes the temporary file.
pub trait TempObject: Write + Send {
    /// Makes the bytes durable and gives them their final name.
    fn persist(self: Box<Self>, hash: &Hash) -> io::Result<()>;

    /// Starts making the bytes written so far durable, so that the final `persist` has less
    /// to wait for. Optional: the default does nothing.
    fn sync_so_far(&mut self) -> io::Result<()> {
        Ok(())
    }
}

/// How many bytes an object writer lets pile up before it asks the backend to sync them. A large
/// object is then flushed to disk while it is still being written (on intake's reading thread,
/// in parallel with parsing) instead of all at once at the end.
pub const SYNC_EVERY: u64 = 32 << 20;

/// Where object bytes live. The file-system backend is the real one; tests wrap it to fail.
pub trait ObjectBackend: Send + Sync {
    fn create_temp(&self) -> io::Result<Box<dyn TempObject>>;
    fn open(&self, hash: &Hash) -> io::Result<Box<dyn Read + Send>>;
    /// Opens an object to be read whole as owned pieces, for a reader that keeps every byte
    /// (no copy into its own buffer). The default cuts what [`Self::open`] reads into pieces;
    /// the real backend hands over a segment object's decoded frames as they are.
    fn open_pieces(&self, hash: &Hash) -> io::Result<Box<dyn segments::Pieces>> {
        Ok(Box::new(segments::ReadPieces::new(self.open(hash)?)))
    }
    /// Reads up to `buf.len()` bytes of object `hash` from `offset`; fewer only at the end. The
    /// default reads from the start and skips; a backend that can seek does better.
    fn read_at(&self, hash: &Hash, offset: u64, buf: &mut [u8]) -> io::Result<usize> {
        let mut r = self.open(hash)?;
        io::copy(&mut (&mut r).take(offset), &mut io::sink())?;
        let mut n = 0;
        while n < buf.len() {
            match r.read(&mut buf[n..])? {
                0 => break,
                k => n += k,
            }
        }
        Ok(n)
    }
    fn exists(&self, hash: &Hash) -> bool;
    fn size(&self, hash: &Hash) -> io::Result<u64>;
    /// Every object name present, for `verify` and `gc`. Names that are not hashes are returned
    /// as strays.
    fn list(&self) -> io::Result<(Vec<Hash>, Vec<PathBuf>)>;
    /// A description of where an object lives, for messages.
    fn describe(&self, hash: &Hash) -> PathBuf;
    /// Called before a command writes objects: the real backend takes the writers' lock
    /// shared so that `reclaim` waits until the command has referenced them or ended.
    fn hold_for_writing(&self) -> io::Result<()> {
        Ok(())
    }

    /// Lets go of the writers' lock this process holds shared (once everything it wrote is
    /// referenced), so that it may take the lock exclusively itself.
    fn release_writing(&self) {}

    /// Like `create_temp`, for an object read mostly a few bytes at a time by offset (a row
    /// index): the real backend compresses it in frames of `frame_size` bytes. The default
    /// ignores the frame size.
    fn create_temp_framed(&self, frame_size: u32) -> io::Result<Box<dyn TempObject>> {
        let _ = frame_size;
        self.create_temp()
    }
    /// Takes the writers' lock exclusively for this process's own writes through this backend
    /// (waiting for every other process that may hold objects not yet referenced), until the
    /// process ends: `transfer` copies objects while no other command writes any.
    fn hold_exclusively(&self) -> io::Result<()> {
        self.hold_for_writing()
    }
    /// Of `hashes` (the objects a write transaction is about to name), those this process
    /// relied on finding in a place other machines also write to, and that are gone from it
    /// now. Asked inside the transaction: `reclaim` removes objects only inside a write
    /// transaction of its own, so one found here stays until this one commits. The store's own
    /// segments need no check (the writers' lock keeps `reclaim` out while a command writes).
    fn confirm_present(&self, hashes: &[Hash]) -> io::Result<Vec<Hash>> {
        let _ = hashes;
        Ok(Vec::new())
    }
    /// Removes the objects of a place other machines also write to that are not in `live`,
    /// for `reclaim` (inside its write transaction): (objects removed, their stored bytes).
    /// The store's own segments are reclaimed by [`FsBackend::reclaim`] instead.
    fn remove_unreferenced(&self, live: &HashSet<Hash>) -> io::Result<(u64, u64)> {
        let _ = live;
        Ok((0, 0))
    }
    /// Publishes every object of a finished segment file (a stage's); the default copies
    /// them through `create_temp`.
    fn adopt_segment(&self, path: &Path) -> io::Result<()> {
        adopt_by_copy(self, path)
    }
}

/// Fault injection for tests: counts the I/O points of object writes (each write of a frame,
/// seek table, index or tail; each sync; each rename; each folder sync) and fails or stops the
/// process at the Nth. `stop` exits at once with [`STOPPED_EXIT`] without cleaning up, as a
/// killed process would; otherwise the Nth point returns an error and later points go on.
pub struct Countdown {
    at: u64,
    stop: bool,
    seen: AtomicU64,
    /// When set, only the points of this name count (`upload`: each request that sends an
    /// object's bytes to a bucket, a multipart upload's parts and completion included).
    only: Option<String>,
}

/// The exit status of a process stopped by a [`Countdown`].
pub const STOPPED_EXIT: i32 = 86;

impl Countdown {
    pub fn new(at: u64, stop: bool) -> Countdown {
        Countdown {
            at,
            stop,
            seen: AtomicU64::new(0),
            only: None,
        }
    }

    /// A countdown of the points named `what` only.
    pub fn of(at: u64, stop: bool, what: &str) -> Countdown {
        Countdown {
            only: Some(what.to_string()),
            ..Countdown::new(at, stop)
        }
    }

    /// How many I/O points have been passed.
    pub fn seen(&self) -> u64 {
        self.seen.load(Ordering::SeqCst)
    }

    pub fn tick(&self, what: &str) -> io::Result<()> {
        if self.only.as_deref().is_some_and(|o| o != what) {
            return Ok(());
        }
        let n = self.seen.fetch_add(1, Ordering::SeqCst) + 1;
        if n != self.at {
            return Ok(());
        }
        if self.stop {
            std::process::exit(STOPPED_EXIT);
        }
        Err(io::Error::other(format!(
            "injected failure at I/O point {n} ({what})"
        )))
    }
}

static COUNTDOWN: std::sync::OnceLock<Arc<Countdown>> = std::sync::OnceLock::new();

/// Installs a countdown every file-system backend of this process consults (the binary does
/// this in debug builds only, for the crash tests).
pub fn install_countdown(c: Arc<Countdown>) {
    let _ = COUNTDOWN.set(c);
}

/// The countdown installed for this process, if any (the bucket backend consults it too).
pub(crate) fn countdown() -> Option<Arc<Countdown>> {
    COUNTDOWN.get().cloned()
}

/// The lock file writers hold shared while they may have objects not yet referenced, and
/// `reclaim` holds exclusive.
pub const WRITERS_LOCK: &str = "writers.lock";

/// The real backend: segment files under `segments/` (see [`segments`]); objects of the
/// earlier loose layout (`objects/`, one file per object) are still read until `reclaim`
/// moves them into a segment.
pub struct FsBackend {
    shared: Arc<Shared>,
}

struct Shared {
    root: PathBuf,
    segments: PathBuf,
    loose: PathBuf,
    tmp: PathBuf,
    index: Mutex<Index>,
    tables: Mutex<HashMap<Hash, Arc<SeekTable>>>,
    /// Frames decoded for reads by offset, emptied with `tables`.
    frames: segments::FrameCache,
    writing: Mutex<Option<File>>,
    faults: Option<Arc<Countdown>>,
    level: i32,
    frame_size: u32,
}

#[derive(Default)]
struct Index {
    loaded: bool,
    known: HashSet<PathBuf>,
    at: HashMap<Hash, (Arc<PathBuf>, Entry)>,
    damaged: Vec<(PathBuf, String)>,
}

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

pub(crate) fn temp_name(what: &str) -> String {
    let n = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.subsec_nanos())
        .unwrap_or(0);
    format!("{what}-{}-{n}-{nanos:09}.part", std::process::id())
}

/// Refuses a path that is a symbolic link.
fn no_link(p: &Path) -> io::Result<()> {
    match fs::symlink_metadata(p) {
        Ok(m) if m.file_type().is_symlink() => Err(io::Error::new(
            io::ErrorKind::InvalidData,
            "a symbolic link inside the store; sluice never follows links out of its store folder",
        )),
        _ => Ok(()),
    }
}

fn sync_dir(dir: &Path) -> io::Result<()> {
    File::open(dir)?.sync_all()
}

/// What `reclaim` did.
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct Reclaimed {
    pub segments_before: u64,
    pub segments_after: u64,
    pub bytes_before: u64,
    pub bytes_after: u64,
    pub objects_kept: u64,
    pub objects_removed: u64,
    pub loose_converted: u64,
    pub temp_files_removed: u64,
    /// Objects nothing refers to removed from the bucket the store keeps its objects in, and
    /// their stored (compressed) bytes; 0 for a store whose objects are in its folder.
    pub bucket_objects_removed: u64,
    pub bucket_bytes_removed: u64,
}

/// Segments smaller than this are packed together by `reclaim` even when all they hold is
/// referenced.
pub const PACK_BELOW: u64 = 8 << 20;

impl FsBackend {
    pub fn new(store_dir: &Path) -> Self {
        Self::with_faults(store_dir, COUNTDOWN.get().cloned())
    }

    /// A backend that consults `faults` at every I/O point of its writes.
    pub fn with_faults(store_dir: &Path, faults: Option<Arc<Countdown>>) -> Self {
        FsBackend {
            shared: Arc::new(Shared {
                root: store_dir.to_path_buf(),
                segments: store_dir.join(SEGMENTS_DIR),
                loose: store_dir.join("objects"),
                tmp: store_dir.join("tmp"),
                index: Mutex::new(Index::default()),
                tables: Mutex::new(HashMap::new()),
                frames: segments::FrameCache::default(),
                writing: Mutex::new(None),
                faults,
                level: segments::LEVEL,
                frame_size: segments::FRAME_SIZE,
            }),
        }
    }

    /// The same store with another compression level and frame size for new objects (the
    /// benchmark measures them this way).
    pub fn with_compression(store_dir: &Path, level: i32, frame_size: u32) -> Self {
        let mut b = Self::new(store_dir);
        if let Some(s) = Arc::get_mut(&mut b.shared) {
            s.level = level;
            s.frame_size = frame_size.clamp(1, segments::MAX_FRAME_SIZE);
        }
        b
    }

    /// Where a segment object lives: its segment and index entry.
    pub fn locate(&self, hash: &Hash) -> Option<(PathBuf, Entry)> {
        self.shared.locate(hash).map(|(p, e)| ((*p).clone(), e))
    }

    /// Every segment with the entries of its index, or what is wrong with it; read afresh.
    pub fn segments(&self) -> io::Result<Vec<(PathBuf, io::Result<Vec<Entry>>)>> {
        no_link(&self.shared.segments)?;
        let (segs, _) = segments::list(&self.shared.segments)?;
        Ok(segs
            .into_iter()
            .map(|p| {
                let r = segments::read_index(&p);
                (p, r)
            })
            .collect())
    }

    /// Re-hashes the object an entry of segment `path` describes, frame by frame; returns the
    /// hash of its bytes.
    pub fn hash_entry(path: &Path, e: &Entry) -> io::Result<Hash> {
        let file = File::open(path)?;
        let table = Arc::new(segments::read_seek_table(&file, e)?);
        // Decoded on threads of their own when there is more than a frame or two (as `open`
        // does), each frame hashed where it was decoded.
        let (h, n) = if table.raw.len() > 2 {
            let mut frames = segments::AheadReader::new(file, table)?;
            let (mut hasher, mut n) = (blake3::Hasher::new(), 0u64);
            while let Some(frame) = segments::Pieces::next_piece(&mut frames)? {
                hasher.update(&frame);
                n += frame.len() as u64;
                segments::Pieces::give_back(&mut frames, frame);
            }
            (Hash::from_bytes(*hasher.finalize().as_bytes()), n)
        } else {
            crate::hash::hash_reader(segments::FrameReader::new(file, table)?)?
        };
        if n != e.raw {
            return Err(io::Error::new(
                io::ErrorKind::InvalidData,
                format!("decodes to {n} bytes, its index entry says {}", e.raw),
            ));
        }
        Ok(h)
    }

    /// Removes every object no name in `live` refers to, packs small segments and the loose
    /// objects of the earlier layout into one new segment, and removes leftover temporary
    /// object files. The caller holds [`FsBackend::exclusive`] and the write transaction.
    pub fn reclaim(&self, live: &HashSet<Hash>) -> io::Result<Reclaimed> {
        let sh = &self.shared;
        let mut out = Reclaimed::default();
        let segs = self.segments()?;
        let mut rewrite = Vec::new();
        let mut placed: HashSet<Hash> = HashSet::new();
        for (path, entries) in &segs {
            let len = fs::symlink_metadata(path)?.len();
            out.segments_before += 1;
            out.bytes_before += len;
            let entries = entries.as_ref().map_err(|e| {
                io::Error::new(
                    io::ErrorKind::InvalidData,
                    format!(
                        "{} is damaged ({e}); run `sluice verify`, and restore the store from a copy before reclaiming",
                        path.display()
                    ),
                )
            })?;
            let all_live = entries
                .iter()
                .all(|e| live.contains(&e.hash) && !placed.contains(&e.hash));
            let unique: HashSet<Hash> = entries.iter().map(|e| e.hash).collect();
            if all_live && unique.len() == entries.len() && len >= PACK_BELOW {
                placed.extend(unique);
            } else {
                rewrite.push((path.clone(), entries.clone()));
            }
        }
        let (loose, _) = list_loose(&sh.loose)?;
        // A lone small segment with nothing to drop stays as it is.
        if loose.is_empty() && rewrite.len() == 1 {
            let entries = &rewrite[0].1;
            let unique: HashSet<Hash> = entries.iter().map(|e| e.hash).collect();
            if unique.len() == entries.len()
                && entries
                    .iter()
                    .all(|e| live.contains(&e.hash) && !placed.contains(&e.hash))
            {
                rewrite.clear();
            }
        }
        for h in &loose {
            out.bytes_before += fs::symlink_metadata(sh.loose_path(h))?.len();
        }
        let tick = |what: &str| sh.tick(what);
        let mut writer: Option<(SegmentWriter, PathBuf)> = None;
        let open_writer = |writer: &mut Option<(SegmentWriter, PathBuf)>| -> io::Result<()> {
            if writer.is_none() {
                no_link(&sh.tmp)?;
                fs::create_dir_all(&sh.tmp)?;
                let p = sh.tmp.join(temp_name("reclaim"));
                *writer = Some((
                    SegmentWriter::create(&p, sh.level, sh.frame_size, &tick)?,
                    p,
                ));
            }
            Ok(())
        };
        for (path, entries) in &rewrite {
            let file = File::open(path)?;
            for e in entries {
                if !live.contains(&e.hash) || placed.contains(&e.hash) {
                    out.objects_removed += u64::from(!live.contains(&e.hash));
                    continue;
                }
                let actual = Self::hash_entry(path, e)?;
                if actual != e.hash {
                    return Err(io::Error::new(
                        io::ErrorKind::InvalidData,
                        format!(
                            "object {} in {} is damaged (its bytes hash to {actual}); run `sluice verify` before reclaiming",
                            e.hash,
                            path.display()
                        ),
                    ));
                }
                open_writer(&mut writer)?;
                if let Some((w, _)) = writer.as_mut() {
                    w.copy_stored(&file, e, &tick)?;
                }
                placed.insert(e.hash);
            }
        }
        for h in &loose {
            if !live.contains(h) || placed.contains(h) {
                out.objects_removed += u64::from(!live.contains(h));
                continue;
            }
            open_writer(&mut writer)?;
            if let Some((w, _)) = writer.as_mut() {
                let mut f = File::open(sh.loose_path(h))?;
                let mut hasher = blake3::Hasher::new();
                let mut buf = vec![0u8; 1 << 20];
                loop {
                    let n = f.read(&mut buf)?;
                    if n == 0 {
                        break;
                    }
                    hasher.update(&buf[..n]);
                    w.write(&buf[..n], &tick)?;
                }
                if hasher.finalize().as_bytes() != h.as_bytes() {
                    return Err(io::Error::new(
                        io::ErrorKind::InvalidData,
                        format!(
                            "loose object {h} is damaged; run `sluice verify` before reclaiming"
                        ),
                    ));
                }
                w.end_object(h, &tick)?;
            }
            placed.insert(*h);
            out.loose_converted += 1;
        }
        if let Some((w, temp)) = writer {
            w.finish(&tick)?;
            fs::create_dir_all(&sh.segments)?;
            let dest = sh.segments.join(segments::fresh_name(
                TEMP_COUNTER.fetch_add(1, Ordering::Relaxed),
            ));
            sh.tick("rename")?;
            fs::rename(&temp, &dest)?;
            sh.tick("sync")?;
            sync_dir(&sh.segments)?;
        }
        // Only now, with every kept object durable in its new segment, the old bytes go.
        for (path, _) in &rewrite {
            fs::remove_file(path)?;
        }
        for h in &loose {
            fs::remove_file(sh.loose_path(h))?;
        }
        if sh.loose.is_dir() {
            for fan in fs::read_dir(&sh.loose)?.flatten() {
                let _ = fs::remove_dir(fan.path());
            }
            let _ = fs::remove_dir(&sh.loose);
        }
        if let Ok(rd) = fs::read_dir(&sh.tmp) {
            for e in rd.flatten() {
                if e.file_type().is_ok_and(|t| t.is_file())
                    && e.file_name().to_string_lossy().ends_with(".part")
                {
                    fs::remove_file(e.path())?;
                    out.temp_files_removed += 1;
                }
            }
        }
        sh.tick("sync")?;
        sync_dir(&sh.segments).or_else(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                Ok(())
            } else {
                Err(e)
            }
        })?;
        *sh.index.lock().unwrap_or_else(|p| p.into_inner()) = Index::default();
        sh.tables.lock().unwrap_or_else(|p| p.into_inner()).clear();
        sh.frames.clear();
        for (path, r) in self.segments()? {
            out.segments_after += 1;
            out.bytes_after += fs::symlink_metadata(&path)?.len();
            out.objects_kept += r.map_or(0, |e| e.len() as u64);
        }
        Ok(out)
    }

    /// Takes the writers' lock exclusively (waiting for every process that may hold objects
    /// not yet referenced); released when the returned file is dropped.
    pub fn exclusive(&self) -> io::Result<File> {
        let f = self.shared.lock_file()?;
        f.lock()?;
        Ok(f)
    }
}

/// The loose objects of the earlier layout under `dir` (`ab/cdef…`), and strays.
fn list_loose(dir: &Path) -> io::Result<(Vec<Hash>, Vec<PathBuf>)> {
    let mut found = Vec::new();
    let mut strays = Vec::new();
    if !dir.exists() {
        return Ok((found, strays));
    }
    no_link(dir)?;
    for fan in fs::read_dir(dir)? {
        let fan = fan?;
        let fan_name = fan.file_name().to_string_lossy().into_owned();
        if !fan.file_type()?.is_dir() {
            strays.push(fan.path());
            continue;
        }
        for obj in fs::read_dir(fan.path())? {
            let obj = obj?;
            let name = format!("{fan_name}{}", obj.file_name().to_string_lossy());
            match name.parse::<Hash>() {
                Ok(h) if obj.file_type()?.is_file() && name == h.hex() => found.push(h),
                _ => strays.push(obj.path()),
            }
        }
    }
    found.sort();
    strays.sort();
    Ok((found, strays))
}

impl Shared {
    fn tick(&self, what: &str) -> io::Result<()> {
        match &self.faults {
            Some(c) => c.tick(what),
            None => Ok(()),
        }
    }

    fn lock_file(&self) -> io::Result<File> {
        no_link(&self.root.join(WRITERS_LOCK))?;
        OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(self.root.join(WRITERS_LOCK))
    }

    /// Holds the writers' lock shared from the first object this process writes until it
    /// ends, so that `reclaim` never removes an object written but not yet referenced.
    fn hold_for_writing(&self) -> io::Result<()> {
        let mut w = self.writing.lock().unwrap_or_else(|p| p.into_inner());
        if w.is_none() {
            let f = self.lock_file()?;
            f.lock_shared()?;
            *w = Some(f);
        }
        Ok(())
    }

    fn loose_path(&self, hash: &Hash) -> PathBuf {
        let hex = hash.hex();
        self.loose.join(&hex[..2]).join(&hex[2..])
    }

    /// A loose object's path, refused when its fan-out folder is a symbolic link.
    fn checked_loose_path(&self, hash: &Hash) -> io::Result<PathBuf> {
        let p = self.loose_path(hash);
        no_link(&self.loose)?;
        if let Some(fan) = p.parent() {
            no_link(fan)?;
        }
        Ok(p)
    }

    /// Reads the index of every segment not read yet (all of them again when `full`).
    fn refresh(&self, idx: &mut Index, full: bool) -> io::Result<()> {
        if full {
            *idx = Index::default();
        }
        idx.loaded = true;
        no_link(&self.segments)?;
        let (segs, _) = segments::list(&self.segments)?;
        for p in segs {
            if idx.known.contains(&p) {
                continue;
            }
            idx.known.insert(p.clone());
            match segments::read_index(&p) {
                Ok(entries) => {
                    let shared = Arc::new(p);
                    for e in entries {
                        idx.at.entry(e.hash).or_insert((Arc::clone(&shared), e));
                    }
                }
                Err(e) => idx.damaged.push((p, e.to_string())),
            }
        }
        Ok(())
    }

    fn locate(&self, hash: &Hash) -> Option<(Arc<PathBuf>, Entry)> {
        let mut idx = self.index.lock().unwrap_or_else(|p| p.into_inner());
        if !idx.loaded {
            let _ = self.refresh(&mut idx, false);
        }
        if let Some(found) = idx.at.get(hash) {
            return Some(found.clone());
        }
        // Another process may have published a segment since.
        let _ = self.refresh(&mut idx, false);
        idx.at.get(hash).cloned()
    }

    fn open_segment(&self, path: &Path) -> io::Result<File> {
        no_link(&self.segments)?;
        if !fs::symlink_metadata(path)?.file_type().is_file() {
            return Err(io::Error::new(
                io::ErrorKind::InvalidData,
                "a segment that is not a plain file",
            ));
        }
        File::open(path)
    }

    fn table(&self, file: &File, e: &Entry) -> io::Result<Arc<SeekTable>> {
        if let Some(t) = self
            .tables
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .get(&e.hash)
        {
            return Ok(Arc::clone(t));
        }
        let t = Arc::new(segments::read_seek_table(file, e)?);
        self.tables
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .insert(e.hash, Arc::clone(&t));
        Ok(t)
    }

    /// Runs `f` on the segment object `hash`: `Ok(None)` when no segment holds it. A segment
    /// removed meanwhile (a `reclaim` moved its objects) makes the index be read again once.
    fn with_object<T>(
        &self,
        hash: &Hash,
        f: impl Fn(File, Arc<SeekTable>) -> io::Result<T>,
    ) -> io::Result<Option<T>> {
        for attempt in 0..2 {
            let Some((path, e)) = self.locate(hash) else {
                return Ok(None);
            };
            match self.open_segment(&path) {
                Ok(file) => {
                    let table = self.table(&file, &e)?;
                    return f(file, table).map(Some);
                }
                Err(err) if err.kind() == io::ErrorKind::NotFound && attempt == 0 => {
                    let mut idx = self.index.lock().unwrap_or_else(|p| p.into_inner());
                    self.refresh(&mut idx, true)?;
                    self.tables
                        .lock()
                        .unwrap_or_else(|p| p.into_inner())
                        .clear();
                    self.frames.clear();
                }
                Err(err) => return Err(err),
            }
        }
        Ok(None)
    }
}

/// An object being written into a segment of its own under `tmp/`.
struct SegTemp {
    writer: Option<SegmentWriter>,
    path: PathBuf,
    shared: Arc<Shared>,
    /// A flush of the bytes written so far, running on a thread of its own so that writing
    /// goes on meanwhile; `persist` waits for it and reports its error.
    syncing: Option<std::thread::JoinHandle<io::Result<()>>>,
}

impl SegTemp {
    fn wait_for_sync(&mut self) -> io::Result<()> {
        match self.syncing.take() {
            Some(t) => t
                .join()
                .unwrap_or_else(|_| Err(io::Error::other("the flush thread panicked"))),
            None => Ok(()),
        }
    }
}

impl Write for SegTemp {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        self.write_all(buf)?;
        Ok(buf.len())
    }
    fn write_all(&mut self, buf: &[u8]) -> io::Result<()> {
        let sh = Arc::clone(&self.shared);
        match &mut self.writer {
            Some(w) => w.write(buf, &|what| sh.tick(what)),
            None => Err(io::Error::other("temporary object already closed")),
        }
    }
    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

impl TempObject for SegTemp {
    fn sync_so_far(&mut self) -> io::Result<()> {
        // One flush at a time: a flush still running covers most of what was written since.
        if self.syncing.as_ref().is_some_and(|t| !t.is_finished()) {
            return Ok(());
        }
        self.wait_for_sync()?;
        if let Some(w) = &self.writer {
            self.shared.tick("sync")?;
            let f = w.file().try_clone()?;
            self.syncing = Some(
                std::thread::Builder::new()
                    .name("sluice-flush".into())
                    .spawn(move || f.sync_data())?,
            );
        }
        Ok(())
    }

    fn persist(mut self: Box<Self>, hash: &Hash) -> io::Result<()> {
        self.wait_for_sync()?;
        let mut w = self
            .writer
            .take()
            .ok_or_else(|| io::Error::other("temporary object already closed"))?;
        let sh = Arc::clone(&self.shared);
        if sh.locate(hash).is_some() {
            // Same name means same bytes: the object is already stored, and stored objects
            // are never modified.
            drop(w);
            return fs::remove_file(&self.path);
        }
        let tick = |what: &str| sh.tick(what);
        w.end_object(hash, &tick)?;
        let entries = w.finish(&tick)?;
        no_link(&sh.segments)?;
        let created = !sh.segments.exists();
        fs::create_dir_all(&sh.segments)?;
        let dest = sh.segments.join(segments::fresh_name(
            TEMP_COUNTER.fetch_add(1, Ordering::Relaxed),
        ));
        sh.tick("rename")?;
        fs::rename(&self.path, &dest)?;
        let synced = sh
            .tick("sync")
            .and_then(|()| sync_dir(&sh.segments))
            .and_then(|()| if created { sync_dir(&sh.root) } else { Ok(()) });
        if let Err(e) = synced {
            // Not known to be durable: the command fails, and leaves nothing behind.
            let _ = fs::remove_file(&dest);
            return Err(e);
        }
        let mut idx = sh.index.lock().unwrap_or_else(|p| p.into_inner());
        idx.known.insert(dest.clone());
        let dest = Arc::new(dest);
        for e in entries {
            idx.at.entry(e.hash).or_insert((Arc::clone(&dest), e));
        }
        Ok(())
    }
}

impl Drop for SegTemp {
    fn drop(&mut self) {
        let _ = self.wait_for_sync();
        if self.writer.take().is_some() || self.path.exists() {
            let _ = fs::remove_file(&self.path);
        }
    }
}

impl ObjectBackend for FsBackend {
    fn create_temp(&self) -> io::Result<Box<dyn TempObject>> {
        self.create_temp_framed(self.shared.frame_size)
    }

    fn hold_exclusively(&self) -> io::Result<()> {
        let mut w = self
            .shared
            .writing
            .lock()
            .unwrap_or_else(|p| p.into_inner());
        // A shared hold of this process goes first, or the exclusive one would wait for it.
        *w = None;
        let f = self.shared.lock_file()?;
        f.lock()?;
        *w = Some(f);
        Ok(())
    }

    fn hold_for_writing(&self) -> io::Result<()> {
        self.shared.hold_for_writing()
    }

    fn release_writing(&self) {
        *self
            .shared
            .writing
            .lock()
            .unwrap_or_else(|p| p.into_inner()) = None;
    }

    fn create_temp_framed(&self, frame_size: u32) -> io::Result<Box<dyn TempObject>> {
        let sh = &self.shared;
        sh.hold_for_writing()?;
        no_link(&sh.tmp)?;
        fs::create_dir_all(&sh.tmp)?;
        let path = sh.tmp.join(temp_name("obj"));
        let frame_size = frame_size.clamp(1, segments::MAX_FRAME_SIZE);
        let writer = SegmentWriter::create(&path, sh.level, frame_size, &|w| sh.tick(w))?;
        Ok(Box::new(SegTemp {
            writer: Some(writer),
            path,
            shared: Arc::clone(sh),
            syncing: None,
        }))
    }

    fn read_at(&self, hash: &Hash, offset: u64, buf: &mut [u8]) -> io::Result<usize> {
        let len = buf.len();
        let got = self.shared.with_object(hash, |file, table| {
            let mut tmp = vec![0u8; len];
            let frames = &self.shared.frames;
            let n = segments::read_at(&file, &table, offset, &mut tmp, &|i, decode| {
                frames.get(hash, i, decode)
            })?;
            tmp.truncate(n);
            Ok(tmp)
        })?;
        if let Some(bytes) = got {
            buf[..bytes.len()].copy_from_slice(&bytes);
            return Ok(bytes.len());
        }
        use std::os::unix::fs::FileExt;
        let p = self.shared.checked_loose_path(hash)?;
        if !fs::symlink_metadata(&p)?.is_file() {
            return Err(io::Error::other("an object that is not a plain file"));
        }
        let f = File::open(&p)?;
        let mut n = 0;
        while n < buf.len() {
            match f.read_at(&mut buf[n..], offset + n as u64)? {
                0 => break,
                k => n += k,
            }
        }
        Ok(n)
    }

    fn open(&self, hash: &Hash) -> io::Result<Box<dyn Read + Send>> {
        if let Some(r) = self.shared.with_object(hash, |file, table| {
            if table.raw.len() > 2 {
                Ok(Box::new(segments::AheadReader::new(file, table)?) as Box<dyn Read + Send>)
            } else {
                Ok(Box::new(segments::FrameReader::new(file, table)?) as Box<dyn Read + Send>)
            }
        })? {
            return Ok(r);
        }
        let p = self.shared.checked_loose_path(hash)?;
        // The store never follows a symlink out of itself: objects must be plain files.
        let meta = fs::symlink_metadata(&p)?;
        if !meta.file_type().is_file() {
            return Err(io::Error::new(
                io::ErrorKind::InvalidData,
                "object is not a regular file",
            ));
        }
        Ok(Box::new(File::open(p)?))
    }

    fn open_pieces(&self, hash: &Hash) -> io::Result<Box<dyn segments::Pieces>> {
        if let Some(r) = self.shared.with_object(hash, |file, table| {
            if table.raw.len() > 2 {
                Ok(Box::new(segments::AheadReader::new(file, table)?) as Box<dyn segments::Pieces>)
            } else {
                Ok(
                    Box::new(segments::ReadPieces::new(segments::FrameReader::new(
                        file, table,
                    )?)) as Box<dyn segments::Pieces>,
                )
            }
        })? {
            return Ok(r);
        }
        Ok(Box::new(segments::ReadPieces::new(self.open(hash)?)))
    }

    fn exists(&self, hash: &Hash) -> bool {
        if self.shared.locate(hash).is_some() {
            return true;
        }
        let Ok(p) = self.shared.checked_loose_path(hash) else {
            return false;
        };
        fs::symlink_metadata(p)
            .map(|m| m.file_type().is_file())
            .unwrap_or(false)
    }

    fn size(&self, hash: &Hash) -> io::Result<u64> {
        if let Some((_, e)) = self.shared.locate(hash) {
            return Ok(e.raw);
        }
        Ok(fs::symlink_metadata(self.shared.checked_loose_path(hash)?)?.len())
    }

    fn list(&self) -> io::Result<(Vec<Hash>, Vec<PathBuf>)> {
        let sh = &self.shared;
        let mut idx = sh.index.lock().unwrap_or_else(|p| p.into_inner());
        sh.refresh(&mut idx, true)?;
        let mut found: Vec<Hash> = idx.at.keys().copied().collect();
        drop(idx);
        let (_, mut strays) = segments::list(&sh.segments)?;
        let (loose, loose_strays) = list_loose(&sh.loose)?;
        found.extend(loose);
        found.sort();
        found.dedup();
        strays.extend(loose_strays);
        strays.sort();
        Ok((found, strays))
    }

    fn describe(&self, hash: &Hash) -> PathBuf {
        match self.shared.locate(hash) {
            Some((p, _)) => (*p).clone(),
            None if self.shared.loose_path(hash).exists() => self.shared.loose_path(hash),
            None => self.shared.segments.clone(),
        }
    }

    fn adopt_segment(&self, path: &Path) -> io::Result<()> {
        let sh = &self.shared;
        sh.hold_for_writing()?;
        fs::create_dir_all(&sh.segments)?;
        let dest = sh.segments.join(segments::fresh_name(
            TEMP_COUNTER.fetch_add(1, Ordering::Relaxed),
        ));
        sh.tick("rename")?;
        if fs::rename(path, &dest).is_err() {
            return adopt_by_copy(self, path);
        }
        sh.tick("sync")?;
        sync_dir(&sh.segments)
    }
}

/// Publishes the objects of segment `path` through `backend`'s own writes (when the segment
/// cannot simply be renamed into place).
fn adopt_by_copy<B: ObjectBackend + ?Sized>(backend: &B, path: &Path) -> io::Result<()> {
    for e in segments::read_index(path)? {
        if backend.exists(&e.hash) {
            continue;
        }
        let file = File::open(path)?;
        let table = Arc::new(segments::read_seek_table(&file, &e)?);
        let mut temp = backend.create_temp()?;
        io::copy(&mut segments::FrameReader::new(file, table)?, &mut temp)?;
        temp.persist(&e.hash)?;
    }
    Ok(())
}
/// The object half of a store: writes and reads objects through a backend, always hashing.
pub struct Objects {
    backend: Box<dyn ObjectBackend>,
    /// While a command stages its objects ([`Objects::begin_stage`]): new objects are written
    /// here, and reads look here first.
    stage: Option<Stage>,
    /// Objects found intact by a check made earlier in this process.
    intact: Mutex<HashSet<Hash>>,
    /// Where the bytes of recomputable versions are computed when read (see
    /// [`Objects::compute_missing_with`]).
    on_demand: Option<OnDemand>,
    /// Versions an erasure order reached: their own object names (bytes and row index)
    /// mapped to the objects holding their erased form, which every read gets instead.
    erased_forms: HashMap<Hash, Hash>,
    /// In a working copy borrowed in part: the objects left in the shared store (a read of
    /// one is refused with that reason rather than reported as a missing object).
    left_in: Option<(String, HashSet<Hash>)>,
}

/// Makes a missing object (a recomputable version's bytes or row index) readable from the
/// scratch folder; `Ok(false)` when the object is not one it can compute.
pub type Compute = Box<dyn Fn(&Hash) -> Result<bool> + Send + Sync>;

/// Objects computed on demand for this process: a scratch folder under the store's `tmp/`,
/// removed when the store is closed (or, after a kill, by the sweep of `tmp/`).
struct OnDemand {
    dir: PathBuf,
    fs: FsBackend,
    compute: Compute,
}

impl Drop for OnDemand {
    fn drop(&mut self) {
        let _ = fs::remove_dir_all(&self.dir);
    }
}

/// A private folder of objects a command wrote but may still give up (a revert that turns out
/// to conflict): published into the store only when the command is about to record them.
struct Stage {
    dir: PathBuf,
    fs: FsBackend,
}

/// A hashing writer for one new object. `finish` persists it and returns its name.
pub struct ObjectWriter {
    temp: Box<dyn TempObject>,
    hasher: blake3::Hasher,
    n_bytes: u64,
    unsynced: u64,
    /// False for a hashing-only writer.
    keeps: bool,
}

/// Where a hashing-only writer's bytes go: nowhere.
struct NullTemp;

impl Write for NullTemp {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        Ok(buf.len())
    }
    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

impl TempObject for NullTemp {
    fn persist(self: Box<Self>, _hash: &Hash) -> io::Result<()> {
        Err(io::Error::other(
            "a hashing-only writer keeps no bytes to store",
        ))
    }
}

impl ObjectWriter {
    /// A writer that only hashes and counts what it is given and keeps nothing (replay of a
    /// step whose output object is already stored needs only the hash); `finish` fails.
    pub fn hashing_only() -> ObjectWriter {
        ObjectWriter {
            temp: Box::new(NullTemp),
            hasher: blake3::Hasher::new(),
            n_bytes: 0,
            unsynced: 0,
            keeps: false,
        }
    }

    /// Whether the bytes written are kept (`finish` stores them); false for
    /// [`ObjectWriter::hashing_only`].
    pub fn keeps_bytes(&self) -> bool {
        self.keeps
    }

    pub fn write(&mut self, data: &[u8]) -> io::Result<()> {
        self.hasher.update(data);
        self.n_bytes += data.len() as u64;
        self.temp.write_all(data)?;
        self.unsynced += data.len() as u64;
        if self.unsynced >= SYNC_EVERY {
            self.temp.sync_so_far()?;
            self.unsynced = 0;
        }
        Ok(())
    }

    pub fn n_bytes(&self) -> u64 {
        self.n_bytes
    }

    /// The hash of what has been written so far.
    pub fn hash(&self) -> Hash {
        Hash::from_bytes(*self.hasher.finalize().as_bytes())
    }

    pub fn finish(self) -> io::Result<(Hash, u64)> {
        let h = self.hash();
        self.temp.persist(&h)?;
        Ok((h, self.n_bytes))
    }
}

impl Objects {
    pub fn new(backend: Box<dyn ObjectBackend>) -> Self {
        Objects {
            backend,
            stage: None,
            intact: Mutex::new(HashSet::new()),
            on_demand: None,
            erased_forms: HashMap::new(),
            left_in: None,
        }
    }

    /// Marks `objects` as left in the shared store `shared` (a working copy borrowed in part):
    /// they are not expected here, and reading one is refused with that reason.
    pub fn read_left_in(&mut self, shared: String, objects: HashSet<Hash>) {
        self.left_in = Some((shared, objects));
    }

    /// Whether this is a working copy borrowed in part.
    pub fn borrowed_in_part(&self) -> bool {
        self.left_in.is_some()
    }

    /// Whether `hash` was left in the shared store this working copy was borrowed from.
    pub fn is_left_in_shared(&self, hash: &Hash) -> bool {
        self.left_in
            .as_ref()
            .is_some_and(|(_, set)| set.contains(hash))
    }

    /// From now on a read of one of `forms`' keys (an erased version's own bytes or row
    /// index) reads the object it maps to, and checks that object's hash.
    pub fn read_erased_forms(&mut self, forms: HashMap<Hash, Hash>) {
        self.erased_forms = forms;
    }

    /// The object a read of `hash` reads: its erased form, or itself.
    pub fn form_of(&self, hash: &Hash) -> Hash {
        self.erased_forms.get(hash).copied().unwrap_or(*hash)
    }

    /// Whether `hash` names an erased version's own bytes or row index.
    pub fn is_erased(&self, hash: &Hash) -> bool {
        self.erased_forms.contains_key(hash)
    }

    /// From now on an object the store does not hold is asked of `compute`, which writes it
    /// into segments under `dir` (a fresh folder under `tmp/`) if it can; reads then find it
    /// there. The engine installs this for recomputable versions (`crate::recompute`); the
    /// store itself never computes anything.
    pub fn compute_missing_with(&mut self, dir: PathBuf, compute: Compute) {
        self.on_demand = Some(OnDemand {
            fs: FsBackend::new(&dir),
            dir,
            compute,
        });
    }

    /// Lets go of the writers' lock held since this process's first object write: call only
    /// when every object it wrote is referenced by a committed transaction.
    pub fn release_writing(&self) {
        self.backend.release_writing();
    }

    /// Checks, inside a write transaction, that the objects it names (`named`, hex) which
    /// this process found or put in a place other machines also write to are still there
    /// ([`ObjectBackend::confirm_present`]); the first one gone is named, and the transaction
    /// is rolled back.
    pub fn confirm_present(&self, named: &[String]) -> Result<()> {
        let hashes: Vec<Hash> = named.iter().filter_map(|h| h.parse().ok()).collect();
        let gone = self.backend.confirm_present(&hashes).map_err(|e| {
            let at = hashes
                .first()
                .map_or_else(PathBuf::new, |h| self.backend.describe(h));
            crate::Error::io(&at, e)
        })?;
        match gone.first() {
            None => Ok(()),
            Some(h) => Err(ErrorKind::Data(format!(
                "the object {} this command relied on was removed ({}) before its step was recorded, by `sluice reclaim` on another machine; nothing was recorded: run the command again",
                h.hex(),
                self.backend.describe(h).display()
            ))
            .into()),
        }
    }

    /// Stops computing missing objects: the scratch folder of the ones computed goes now.
    pub fn stop_computing(&mut self) {
        self.on_demand = None;
    }

    /// Where object `hash` is read from, computing it when it is missing and the engine
    /// installed a way to ([`Objects::compute_missing_with`]).
    fn find(&self, hash: &Hash) -> Result<&dyn ObjectBackend> {
        let hash = &self.form_of(hash);
        let r = self.reader(hash);
        if r.exists(hash) {
            return Ok(r);
        }
        if let Some((shared, set)) = &self.left_in {
            if set.contains(hash) {
                return Err(crate::Error::from(crate::error::ErrorKind::Usage(format!(
                    "object {} was left in the shared store {shared} when this working copy was borrowed in part (`sluice borrow --dataset`); read it there, or borrow the datasets you need",
                    hash.hex()
                ))));
            }
        }
        match &self.on_demand {
            Some(od) if od.fs.exists(hash) => Ok(&od.fs),
            Some(od) if (od.compute)(hash)? && od.fs.exists(hash) => Ok(&od.fs),
            _ => Ok(r),
        }
    }

    /// The store's own backend (never the stage).
    pub fn backend(&self) -> &dyn ObjectBackend {
        &*self.backend
    }

    /// Where object `hash` is read from: the stage when it holds it, else the store.
    fn reader(&self, hash: &Hash) -> &dyn ObjectBackend {
        match &self.stage {
            Some(st) if st.fs.exists(hash) => &st.fs,
            _ => &*self.backend,
        }
    }

    /// From now on new objects go to `dir` (a fresh folder under the store's `tmp/`), and
    /// reads look there first, until [`Objects::publish_stage`] or [`Objects::discard_stage`].
    pub fn begin_stage(&mut self, dir: PathBuf) -> io::Result<()> {
        if self.stage.is_some() {
            return Err(io::Error::other("objects are already being staged"));
        }
        self.backend.hold_for_writing()?;
        fs::create_dir_all(&dir)?;
        let fs_backend = FsBackend::new(&dir);
        self.stage = Some(Stage {
            dir,
            fs: fs_backend,
        });
        Ok(())
    }

    /// Moves every staged segment into the store (durably: rename and folder sync, or a copy
    /// through the backend when the two are not on one file system) and ends the stage.
    pub fn publish_stage(&mut self) -> io::Result<()> {
        let Some(st) = self.stage.take() else {
            return Ok(());
        };
        let (segs, _) = segments::list(&st.dir.join(SEGMENTS_DIR))?;
        for seg in segs {
            self.backend.adopt_segment(&seg)?;
        }
        let _ = fs::remove_dir_all(&st.dir);
        Ok(())
    }

    /// Ends the stage and removes what it holds: the store is as it was before it began.
    pub fn discard_stage(&mut self) {
        if let Some(st) = self.stage.take() {
            let _ = fs::remove_dir_all(&st.dir);
        }
    }

    pub fn writer(&self) -> io::Result<ObjectWriter> {
        self.backend.hold_for_writing()?;
        Ok(ObjectWriter {
            temp: match &self.stage {
                Some(st) => st.fs.create_temp()?,
                None => self.backend.create_temp()?,
            },
            hasher: blake3::Hasher::new(),
            n_bytes: 0,
            unsynced: 0,
            keeps: true,
        })
    }

    /// A writer for an object read a few bytes at a time by offset (a row index, a step's
    /// provenance object): smaller frames ([`segments::RANDOM_ACCESS_FRAME_SIZE`]), since a
    /// trail reads a few of its entries at a time and decodes the frame that holds them.
    pub fn random_access_writer(&self) -> io::Result<ObjectWriter> {
        self.backend.hold_for_writing()?;
        let frame = segments::RANDOM_ACCESS_FRAME_SIZE;
        Ok(ObjectWriter {
            temp: match &self.stage {
                Some(st) => st.fs.create_temp_framed(frame)?,
                None => self.backend.create_temp_framed(frame)?,
            },
            hasher: blake3::Hasher::new(),
            n_bytes: 0,
            unsynced: 0,
            keeps: true,
        })
    }

    /// Whether the store (or the stage) holds object `hash` now; computes nothing.
    pub fn exists(&self, hash: &Hash) -> bool {
        let hash = &self.form_of(hash);
        self.reader(hash).exists(hash)
    }

    /// The uncompressed length of object `hash` (computed first, like a read, when a
    /// recomputable version names it).
    pub fn size(&self, hash: &Hash) -> Result<u64> {
        let hash = &self.form_of(hash);
        let from = self.find(hash)?;
        from.size(hash).map_err(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                crate::Error::from(ErrorKind::ObjectMissing { hash: hash.hex() })
            } else {
                crate::Error::io(&from.describe(hash), e)
            }
        })
    }

    /// Copies object `hash` to `out`, checking the hash as it goes; a failed write is named by
    /// `out_name` (the file, or standard output). The bytes are written before the check
    /// completes (the object may be larger than memory), so on a mismatch the caller gets an
    /// error after the damaged bytes; `retrieve -o FILE` writes to a temporary file first.
    pub fn copy_to(&self, hash: &Hash, out: &mut dyn Write, out_name: &Path) -> Result<u64> {
        let copied = self.each_piece(hash, |piece| {
            out.write_all(piece)
                .map_err(|e| crate::Error::io(out_name, e))?;
            Ok(ControlFlow::Continue(()))
        })?;
        // A copy never stops early.
        Ok(copied.unwrap_or_default())
    }

    /// Calls `f` with object `hash`'s bytes (its erased form's, if any) piece by piece as they
    /// are decoded, never copied to a buffer first, each piece then going back to be decoded
    /// into again; the bytes are re-hashed on the way, and a mismatch is an error after the
    /// last piece. Returns how many bytes there were, or `None` when `f` stopped the read
    /// early (`ControlFlow::Break`; the hash is then not checked).
    pub fn each_piece(
        &self,
        hash: &Hash,
        mut f: impl FnMut(&[u8]) -> Result<ControlFlow<()>>,
    ) -> Result<Option<u64>> {
        let (mut pieces, hash) = self.open_pieces(hash)?;
        let mut hasher = blake3::Hasher::new();
        let path = self.find(&hash)?.describe(&hash);
        let mut n_bytes = 0u64;
        while let Some(piece) = pieces
            .next_piece()
            .map_err(|e| crate::Error::io(&path, e))?
        {
            hasher.update(&piece);
            let flow = f(&piece)?;
            n_bytes += piece.len() as u64;
            pieces.give_back(piece);
            if flow.is_break() {
                return Ok(None);
            }
        }
        let actual = Hash::from_bytes(*hasher.finalize().as_bytes());
        if actual != hash {
            return Err(ErrorKind::ObjectCorrupt {
                hash: hash.hex(),
                actual: actual.hex(),
            }
            .into());
        }
        Ok(Some(n_bytes))
    }

    /// Reads a whole object into memory, checking its hash. For small objects only.
    pub fn read_all(&self, hash: &Hash) -> Result<Vec<u8>> {
        let mut v = Vec::new();
        self.copy_to(hash, &mut v, Path::new("memory"))?;
        Ok(v)
    }

    /// `len` bytes of object `hash` from `offset` (fewer at its end), without checking its hash
    /// (trace reads single rows this way, in constant time; `verify` checks whole objects).
    pub fn read_range(&self, hash: &Hash, offset: u64, len: usize) -> Result<Vec<u8>> {
        let hash = &self.form_of(hash);
        let mut buf = vec![0u8; len];
        let from = self.find(hash)?;
        let n = from.read_at(hash, offset, &mut buf).map_err(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                crate::Error::from(ErrorKind::ObjectMissing { hash: hash.hex() })
            } else {
                crate::Error::io(&from.describe(hash), e)
            }
        })?;
        buf.truncate(n);
        Ok(buf)
    }

    /// Opens an object for reading without checking its hash (callers that stream large objects
    /// check the hash themselves, or rely on `verify`), with the name its bytes must hash to:
    /// `hash`, or for an erased version's bytes or row index, its erased form's.
    pub fn open_raw(&self, hash: &Hash) -> Result<(Box<dyn Read + Send>, Hash)> {
        self.opened(hash, |from, hash| from.open(hash))
    }

    /// [`Self::open_raw`] as owned pieces ([`ObjectBackend::open_pieces`]), for a reader that
    /// keeps every byte it reads; the hash is not checked either.
    pub fn open_pieces(&self, hash: &Hash) -> Result<(Box<dyn segments::Pieces>, Hash)> {
        self.opened(hash, |from, hash| from.open_pieces(hash))
    }

    /// `open` applied to the backend that holds object `hash` (its erased form, if any), a
    /// missing object named as such; with the name of what was opened.
    fn opened<T>(
        &self,
        hash: &Hash,
        open: impl FnOnce(&dyn ObjectBackend, &Hash) -> io::Result<T>,
    ) -> Result<(T, Hash)> {
        let hash = &self.form_of(hash);
        let from = self.find(hash)?;
        let opened = open(from, hash).map_err(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                ErrorKind::ObjectMissing { hash: hash.hex() }.into()
            } else {
                crate::Error::io(&from.describe(hash), e)
            }
        })?;
        Ok((opened, *hash))
    }

    /// Notes that object `hash`, where the store reads it from, was just re-hashed and found
    /// intact (by `verify`'s segment check), so that [`Objects::check`] need not hash it again.
    pub fn note_intact(&self, hash: &Hash) {
        self.intact
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .insert(*hash);
    }

    /// Re-hashes object `hash`; `Ok(None)` when intact, `Ok(Some(actual))` when damaged.
    pub fn check(&self, hash: &Hash) -> Result<Option<Hash>> {
        let hash = &self.form_of(hash);
        if self.stage.is_none()
            && self
                .intact
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .contains(hash)
        {
            return Ok(None);
        }
        // What the store holds: a missing object is not computed to be checked.
        let from = self.reader(hash);
        let r = from.open(hash).map_err(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                crate::Error::from(ErrorKind::ObjectMissing { hash: hash.hex() })
            } else {
                crate::Error::io(&from.describe(hash), e)
            }
        })?;
        let (actual, _) =
            crate::hash::hash_reader(r).map_err(|e| crate::Error::io(&from.describe(hash), e))?;
        Ok(if actual == *hash { None } else { Some(actual) })
    }
}
