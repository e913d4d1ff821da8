//! Immutable, content-addressed object files under `.sluice/objects/`.
//!
//! An object is named by the BLAKE3 hash of its bytes and lives at `objects/ab/cdef…` (the
//! first two hex digits are a fan-out folder). It is written to `.sluice/tmp/`, fsynced, renamed
//! into place and its folder fsynced; after that it is never modified. Objects are stored
//! uncompressed: `cat` is then a plain copy, and the bytes on disk are the bytes that were hashed,
//! so anyone can check an object with any BLAKE3 tool. Compression can come later behind the
//! same [`ObjectBackend`] trait, which also lets tests inject write failures.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use crate::error::{ErrorKind, Result};
use crate::hash::{for_each_piece, Hash};

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
}

/// The real backend: files under a `.sluice/` folder.
pub struct FsBackend {
    objects: PathBuf,
    tmp: PathBuf,
}

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

impl FsBackend {
    pub fn new(store_dir: &Path) -> Self {
        FsBackend {
            objects: store_dir.join("objects"),
            tmp: store_dir.join("tmp"),
        }
    }

    fn path_of(&self, hash: &Hash) -> PathBuf {
        let hex = hash.hex();
        self.objects.join(&hex[..2]).join(&hex[2..])
    }

    /// The path of an object, refused when its fan-out folder is a symbolic link (which would
    /// lead reads and writes out of the store).
    fn checked_path_of(&self, hash: &Hash) -> io::Result<PathBuf> {
        let p = self.path_of(hash);
        if let Some(fan) = p.parent() {
            no_link(fan)?;
        }
        Ok(p)
    }
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

struct FsTemp {
    file: Option<File>,
    path: PathBuf,
    objects: PathBuf,
    /// A flush of the bytes written so far, running on a thread of its own so that writing
    /// goes on meanwhile; `persist` waits for it and reports its error.
    syncing: Option<std::thread::JoinHandle<io::Result<()>>>,
}

impl FsTemp {
    fn wait_for_sync(&mut self) -> io::Result<()> {
        match self.syncing.take() {
            Some(t) => t
                .join()
                .unwrap_or_else(|_| Err(io::Error::other("the flush thread panicked"))),
            None => Ok(()),
        }
    }
}

impl Write for FsTemp {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        match &mut self.file {
            Some(f) => f.write(buf),
            None => Err(io::Error::other("temporary object already closed")),
        }
    }
    fn write_all(&mut self, buf: &[u8]) -> io::Result<()> {
        match &mut self.file {
            Some(f) => f.write_all(buf),
            None => Err(io::Error::other("temporary object already closed")),
        }
    }
    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

impl TempObject for FsTemp {
    fn sync_so_far(&mut self) -> io::Result<()> {
        // One flush at a time: a flush still running covers most of what was written since.
        if self.syncing.as_ref().is_some_and(|t| !t.is_finished()) {
            return Ok(());
        }
        self.wait_for_sync()?;
        if let Some(f) = &self.file {
            let f = f.try_clone()?;
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
        let file = self
            .file
            .take()
            .ok_or_else(|| io::Error::other("temporary object already closed"))?;
        file.sync_all()?;
        drop(file);
        let hex = hash.hex();
        let dir = self.objects.join(&hex[..2]);
        no_link(&dir)?;
        let created_dir = !dir.exists();
        fs::create_dir_all(&dir)?;
        let dest = dir.join(&hex[2..]);
        if dest.exists() {
            // Same name means same bytes: the object is already there, and existing objects are
            // never modified.
            fs::remove_file(&self.path)?;
        } else {
            fs::rename(&self.path, &dest)?;
            sync_dir(&dir)?;
            if created_dir {
                sync_dir(&self.objects)?;
            }
        }
        Ok(())
    }
}

impl Drop for FsTemp {
    fn drop(&mut self) {
        let _ = self.wait_for_sync();
        if self.file.take().is_some() || self.path.exists() {
            let _ = fs::remove_file(&self.path);
        }
    }
}

fn sync_dir(dir: &Path) -> io::Result<()> {
    File::open(dir)?.sync_all()
}

impl ObjectBackend for FsBackend {
    fn create_temp(&self) -> io::Result<Box<dyn TempObject>> {
        no_link(&self.tmp)?;
        fs::create_dir_all(&self.tmp)?;
        let n = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.subsec_nanos())
            .unwrap_or(0);
        let path = self
            .tmp
            .join(format!("obj-{}-{n}-{nanos:09}.part", std::process::id()));
        let file = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&path)?;
        Ok(Box::new(FsTemp {
            file: Some(file),
            path,
            objects: self.objects.clone(),
            syncing: None,
        }))
    }

    fn read_at(&self, hash: &Hash, offset: u64, buf: &mut [u8]) -> io::Result<usize> {
        use std::os::unix::fs::FileExt;
        let p = self.checked_path_of(hash)?;
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
        let p = self.checked_path_of(hash)?;
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

    fn exists(&self, hash: &Hash) -> bool {
        let Ok(p) = self.checked_path_of(hash) else {
            return false;
        };
        fs::symlink_metadata(p)
            .map(|m| m.file_type().is_file())
            .unwrap_or(false)
    }

    fn size(&self, hash: &Hash) -> io::Result<u64> {
        Ok(fs::symlink_metadata(self.checked_path_of(hash)?)?.len())
    }

    fn list(&self) -> io::Result<(Vec<Hash>, Vec<PathBuf>)> {
        let mut found = Vec::new();
        let mut strays = Vec::new();
        if !self.objects.exists() {
            return Ok((found, strays));
        }
        for fan in fs::read_dir(&self.objects)? {
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

    fn describe(&self, hash: &Hash) -> PathBuf {
        self.path_of(hash)
    }
}

/// The object half of a store: writes and reads objects through a backend, always hashing.
pub struct Objects {
    backend: Box<dyn ObjectBackend>,
    /// While a command stages its objects ([`Objects::begin_stage`]): new objects are written
    /// here, and reads look here first.
    stage: Option<Stage>,
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
        }
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
        fs::create_dir_all(dir.join("objects"))?;
        let fs_backend = FsBackend {
            objects: dir.join("objects"),
            tmp: dir.join("tmp"),
        };
        self.stage = Some(Stage {
            dir,
            fs: fs_backend,
        });
        Ok(())
    }

    /// Moves every staged object into the store (durably: rename and folder sync, or a copy
    /// through the backend when the two are not on one file system) and ends the stage.
    pub fn publish_stage(&mut self) -> io::Result<()> {
        let Some(st) = self.stage.take() else {
            return Ok(());
        };
        let (found, _) = st.fs.list()?;
        for hash in found {
            if self.backend.exists(&hash) {
                continue;
            }
            let from = st.fs.path_of(&hash);
            let dest = self.backend.describe(&hash);
            let moved = dest.parent().is_some_and(|dir| {
                fs::create_dir_all(dir).is_ok()
                    && fs::rename(&from, &dest).is_ok()
                    && sync_dir(dir).is_ok()
            });
            if !moved || !self.backend.exists(&hash) {
                let mut temp = self.backend.create_temp()?;
                io::copy(&mut File::open(&from)?, &mut temp)?;
                temp.persist(&hash)?;
            }
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
        Ok(ObjectWriter {
            temp: match &self.stage {
                Some(st) => st.fs.create_temp()?,
                None => self.backend.create_temp()?,
            },
            hasher: blake3::Hasher::new(),
            n_bytes: 0,
            unsynced: 0,
        })
    }

    pub fn exists(&self, hash: &Hash) -> bool {
        self.reader(hash).exists(hash)
    }

    /// Copies object `hash` to `out`, checking the hash as it goes. The bytes are written before
    /// the check completes (the object may be larger than memory), so on a mismatch the caller
    /// gets an error after the damaged bytes; `cat -o FILE` writes to a temporary file first.
    pub fn copy_to(&self, hash: &Hash, out: &mut dyn Write) -> Result<u64> {
        let r = self.open_raw(hash)?;
        let mut hasher = blake3::Hasher::new();
        let path = self.reader(hash).describe(hash);
        let n_bytes = for_each_piece(
            r,
            |e| crate::Error::io(&path, e),
            |piece| {
                hasher.update(piece);
                out.write_all(piece)
                    .map_err(|e| crate::Error::io(Path::new("output"), e))
            },
        )?;
        let actual = Hash::from_bytes(*hasher.finalize().as_bytes());
        if actual != *hash {
            return Err(ErrorKind::ObjectCorrupt {
                hash: hash.hex(),
                actual: actual.hex(),
            }
            .into());
        }
        Ok(n_bytes)
    }

    /// Reads a whole object into memory, checking its hash. For small objects only.
    pub fn read_all(&self, hash: &Hash) -> Result<Vec<u8>> {
        let mut v = Vec::new();
        self.copy_to(hash, &mut v)?;
        Ok(v)
    }

    /// `len` bytes of object `hash` from `offset` (fewer at its end), without checking its hash
    /// (trace reads single rows this way, in constant time; `verify` checks whole objects).
    pub fn read_range(&self, hash: &Hash, offset: u64, len: usize) -> Result<Vec<u8>> {
        let mut buf = vec![0u8; len];
        let n = self
            .reader(hash)
            .read_at(hash, offset, &mut buf)
            .map_err(|e| {
                if e.kind() == io::ErrorKind::NotFound {
                    crate::Error::from(ErrorKind::ObjectMissing { hash: hash.hex() })
                } else {
                    crate::Error::io(&self.reader(hash).describe(hash), e)
                }
            })?;
        buf.truncate(n);
        Ok(buf)
    }

    /// Opens an object for reading without checking its hash (callers that stream large objects
    /// check the hash themselves, or rely on `verify`).
    pub fn open_raw(&self, hash: &Hash) -> Result<Box<dyn Read + Send>> {
        self.reader(hash).open(hash).map_err(|e| {
            if e.kind() == io::ErrorKind::NotFound {
                ErrorKind::ObjectMissing { hash: hash.hex() }.into()
            } else {
                crate::Error::io(&self.reader(hash).describe(hash), e)
            }
        })
    }

    /// Re-hashes object `hash`; `Ok(None)` when intact, `Ok(Some(actual))` when damaged.
    pub fn check(&self, hash: &Hash) -> Result<Option<Hash>> {
        let r = self.open_raw(hash)?;
        let (actual, _) = crate::hash::hash_reader(r)
            .map_err(|e| crate::Error::io(&self.reader(hash).describe(hash), e))?;
        Ok(if actual == *hash { None } else { Some(actual) })
    }
}
