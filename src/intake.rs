//! Intake: recording an outside file as a new version of a dataset.
//!
//! One pass over the file, in three threads. The reading thread reads 1 MiB pieces, checks them
//! (UTF-8, NUL bytes) and parses them into batches of records, then hands each piece to the
//! writing thread, which hashes it, compresses it and writes it to a temporary object; the
//! calling thread checks the records (header, field counts, keys), profiles the columns and
//! writes the row index. Three threads on two cores keep both busy whichever part is the
//! heaviest on a given file. Memory stays bounded by a few pieces in flight plus the
//! profile (see `table::profile`), whatever the size of the file; only `--key` keeps 16 bytes per
//! row, to find duplicate keys. A [`Feed`] may be handed each checked batch of records as well
//! (a plan's first steps, computed in the same read of the file on a thread of their own).
//!
//! Nothing is referenced until everything has been checked: the objects are made durable, then
//! one transaction records the step, the version, its profile and the audit entry. A failure at
//! any point before that commit leaves the store as it was.

use std::collections::{BTreeMap, HashSet};
use std::fs::{self, File};
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::mpsc;

use serde_json::json;
use xxhash_rust::xxh3::Xxh3;

use crate::clock;
use crate::error::{Error, ErrorKind, InputProblem, Position, Result};
use crate::hash::STREAM_BUF;
use crate::model::{Agent, ColumnProfile, Dialect, LineageKind, SourceFile, StepKind, Version};
use crate::store::objects::ObjectWriter;
use crate::store::{NewStep, NewVersion, Store, Tx};
use crate::table::batch::RecordBatch;
use crate::table::profile::{number_shape, Profiler};
use crate::table::rowindex;
use crate::table::stream::{encoding_for, read_full, Utf8Check};
use crate::table::{for_each_record, RawRecord, ReadSettings, RecordStream};

/// What `sluice receive` was asked to do.
#[derive(Debug, Clone)]
pub struct IngestOptions {
    pub dataset: String,
    pub key: Option<Vec<String>>,
    pub reason: Option<String>,
    pub delimiter: Option<u8>,
    pub has_header: bool,
    pub encoding: Option<String>,
    pub null_tokens: Vec<String>,
    pub agent: Agent,
}

/// What an intake did.
#[derive(Debug, Clone)]
pub enum IngestOutcome {
    Recorded {
        version: Version,
        step_id: i64,
        warnings: Vec<String>,
    },
    /// The bytes equal the dataset's latest version: nothing was recorded.
    Unchanged { version: Version },
}

/// Checks a dataset name: 1 to 64 of letters, digits, `_`, `-`, `.`, starting with a letter,
/// and not made only of hex digits (it would read as a hash prefix).
pub fn validate_dataset_name(name: &str) -> Result<()> {
    let ok_chars = name
        .chars()
        .all(|c| c.is_ascii_alphanumeric() || matches!(c, '_' | '-' | '.'));
    let starts = name.chars().next().is_some_and(|c| c.is_ascii_alphabetic());
    if name.is_empty() || name.len() > 64 || !ok_chars || !starts {
        return Err(Error::usage(format!(
            "invalid dataset name \"{name}\"; use 1 to 64 letters, digits, '_', '-' or '.', starting with a letter (e.g. work_orders)"
        )));
    }
    if name.len() >= 6 && name.chars().all(|c| c.is_ascii_hexdigit()) {
        return Err(Error::usage(format!(
            "invalid dataset name \"{name}\": it would read as a version hash prefix; add a letter beyond a-f or a '_'"
        )));
    }
    Ok(())
}

enum Msg {
    Batch(RecordBatch),
    /// The input ended; the dialect it was read with.
    End(Dialect),
}

/// Pieces of the file waiting for the thread that writes its copy.
const PIECES_IN_FLIGHT: usize = 4;

/// Field data per batch before it is handed to the consuming thread.
const BATCH_BYTES: usize = 512 * 1024;

/// The result of the reading thread.
struct ReadSide {
    table: ObjectWriter,
    n_bytes: u64,
}

/// What the parsing side learnt.
struct Scan {
    header: Vec<String>,
    n_rows: u64,
    dialect: Dialect,
    profiles: Vec<ColumnProfile>,
    row_index: ObjectWriter,
    key_hashes: Vec<(u64, u64)>,
    warnings: Vec<String>,
}

fn store_io(store_dir: &Path, e: std::io::Error) -> Error {
    Error::io(&store_dir.join("tmp"), e)
}

/// How to read a file that is not delimited text: which sheet of a workbook. The format itself
/// is told by the file name's extension (see [`crate::convert::SourceFormat::of`]).
#[derive(Debug, Clone, Default)]
pub struct SourceOptions {
    /// A sheet's name or 1-based position; default: the only sheet.
    pub sheet: Option<String>,
}

/// Reads, checks and stores the file at `path` as the next version of `opts.dataset`, without
/// recording it yet (see [`PreparedIngest::commit`]).
pub fn prepare(store: &Store, path: &Path, opts: &IngestOptions) -> Result<Prepared> {
    prepare_from(store, path, opts, &SourceOptions::default())
}

/// [`prepare`], for any format sluice reads: delimited text is stored as it is; a workbook or a
/// JSON Lines file is stored as a raw object and converted into a canonical CSV version (see
/// [`crate::convert`]).
pub fn prepare_from(
    store: &Store,
    path: &Path,
    opts: &IngestOptions,
    source: &SourceOptions,
) -> Result<Prepared> {
    prepare_feeding(store, path, opts, source, None)
}

/// What receives a file's data rows while intake reads them, once intake has checked each
/// (a plan's first steps computed in the same pass: `plan::run`). A feed sees rows of a file
/// that may still be refused later (a ragged row further on): what it makes counts only if
/// the intake succeeds.
pub trait Feed {
    /// The header, before any row, and an estimate of how many rows will follow.
    fn header(&mut self, header: &[String], rows: u64);
    /// A batch of checked records, parsed as a read of the stored version gives them: its
    /// first `skip` records are not data (the header), the next is data row `first_row`
    /// (0-based), and the rest follow in order. Gives back a batch intake may fill again.
    fn batch(&mut self, batch: RecordBatch, skip: usize, first_row: u64) -> RecordBatch;
}

/// Whether [`prepare_feeding`] can hand the rows of `path` to a feed: delimited text read as
/// UTF-8 (the rows it parses are then those a read of the stored copy gives).
pub fn can_feed(path: &Path, opts: &IngestOptions, source: &SourceOptions) -> bool {
    crate::convert::SourceFormat::of(path).is_none()
        && source.sheet.is_none()
        && opts
            .encoding
            .as_deref()
            .is_none_or(|e| encoding_for(e).is_ok_and(|e| e == encoding_rs::UTF_8))
}

/// [`prepare_from`], handing every data row to `feed` as it is checked (only when
/// [`can_feed`]; otherwise the feed is given nothing).
pub fn prepare_feeding(
    store: &Store,
    path: &Path,
    opts: &IngestOptions,
    source: &SourceOptions,
    feed: Option<&mut dyn Feed>,
) -> Result<Prepared> {
    validate_dataset_name(&opts.dataset)?;
    let feed = feed.filter(|_| can_feed(path, opts, source));
    let named = crate::convert::check_named_format(path)?;
    if let Some(format) = crate::convert::SourceFormat::of(path) {
        return crate::convert::prepare(store, path, opts, source, format);
    }
    if source.sheet.is_some() {
        return Err(Error::usage(format!(
            "--sheet is for workbooks (.xlsx, .xlsm, .ods); {} is read as delimited text",
            path.display()
        )));
    }
    let encoding = match &opts.encoding {
        Some(label) => Some(encoding_for(label)?),
        None => None,
    };
    if let Some(k) = &opts.key {
        if k.is_empty() || k.iter().any(|c| c.is_empty()) {
            return Err(Error::usage(
                "--key needs one or more column names separated by commas, e.g. --key order_id",
            ));
        }
    }
    let meta_before = fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta_before.is_dir() {
        return Err(ErrorKind::IsDirectory {
            path: path.to_path_buf(),
        }
        .into());
    }
    if meta_before.len() == 0 {
        return Err(Error::input(path, None, InputProblem::Empty));
    }
    let file = File::open(path).map_err(|e| Error::io(path, e))?;
    let started_at = clock::now_rfc3339();

    let (read_side, scan) = run_pipeline(store, path, file, encoding, opts, feed)?;

    // Duplicate keys: equal hashes are candidates, confirmed on the values themselves.
    if let Some(key) = &opts.key {
        check_duplicate_keys(path, &scan, key, encoding)?;
    }

    let meta_after = fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta_after.len() != meta_before.len()
        || read_side.n_bytes != meta_before.len()
        || meta_after.modified().ok() != meta_before.modified().ok()
    {
        return Err(Error::input(path, None, InputProblem::ChangedWhileReading));
    }

    let hash = read_side.table.hash().hex();
    if store
        .lineage
        .latest_version(&opts.dataset)?
        .is_some_and(|v| v.hash == hash)
    {
        if let Some(v) = store.lineage.latest_version(&opts.dataset)? {
            return Ok(Prepared::Unchanged(Box::new(v)));
        }
    }

    let n_bytes = read_side.table.n_bytes();
    let table_hash = read_side.table.hash();
    let ended_at = clock::now_rfc3339();

    let n_columns = scan.header.len();
    let source = SourceFile {
        path: path.display().to_string(),
        // The file's real path, without `.` or `..` (`plans/../data/x.csv` is `data/x.csv`).
        absolute_path: std::fs::canonicalize(path)
            .or_else(|_| std::path::absolute(path))
            .unwrap_or_else(|_| PathBuf::from(path))
            .display()
            .to_string(),
        n_bytes,
        modified: meta_before.modified().ok().map(clock::format_rfc3339),
    };
    let params = json!({
        "delimiter": scan.dialect.delimiter,
        "delimiter_detected": scan.dialect.delimiter_detected,
        "encoding": scan.dialect.encoding,
        "has_header": opts.has_header,
        "key": opts.key,
        "null_tokens": opts.null_tokens,
    });
    Ok(Prepared::Ready(Box::new(PreparedIngest {
        opts: opts.clone(),
        path: path.to_path_buf(),
        started_at,
        ended_at,
        source,
        params,
        table_hex: table_hash.hex(),
        n_bytes,
        index_hex: scan.row_index.hash().hex(),
        index_bytes: scan.row_index.n_bytes(),
        objects: Some((read_side.table, scan.row_index)),
        raw: None,
        raw_object: None,
        n_rows: scan.n_rows,
        header: scan.header,
        dialect: scan.dialect,
        profiles: scan.profiles,
        warnings: {
            let mut w = named;
            w.extend(scan.warnings);
            if scan.n_rows == 0 && opts.has_header {
                w.push(crate::convert::no_rows_warning(path, n_columns));
            }
            w
        },
    })))
}

/// Records the file at `path` as a new version of `opts.dataset`.
pub fn ingest(store: &mut Store, path: &Path, opts: &IngestOptions) -> Result<IngestOutcome> {
    ingest_from(store, path, opts, &SourceOptions::default())
}

/// [`ingest`] with the options of formats other than delimited text.
pub fn ingest_from(
    store: &mut Store,
    path: &Path,
    opts: &IngestOptions,
    source: &SourceOptions,
) -> Result<IngestOutcome> {
    let prepared = prepare_from(store, path, opts, source)?;
    record_prepared(store, prepared, opts)
}

/// Records an intake [`prepare_feeding`] read and checked, as [`ingest_from`] does.
pub fn record_prepared(
    store: &mut Store,
    prepared: Prepared,
    opts: &IngestOptions,
) -> Result<IngestOutcome> {
    let mut ready = match prepared {
        Prepared::Unchanged(version) => return Ok(IngestOutcome::Unchanged { version: *version }),
        Prepared::Ready(p) => p,
    };
    let store_dir = store.dir().to_path_buf();
    match store.write(|tx| ready.commit(&store_dir, tx))? {
        Some((version_id, step_id)) => {
            let version = store.lineage.version_by_id(version_id)?.ok_or_else(|| {
                Error::from(ErrorKind::Inconsistent("the new version vanished".into()))
            })?;
            Ok(IngestOutcome::Recorded {
                version,
                step_id,
                warnings: ready.warnings.clone(),
            })
        }
        None => {
            let version = store
                .lineage
                .latest_version(&opts.dataset)?
                .ok_or_else(|| {
                    Error::from(ErrorKind::Inconsistent(
                        "the latest version vanished".into(),
                    ))
                })?;
            Ok(IngestOutcome::Unchanged { version })
        }
    }
}

/// An intake read and checked, its objects written but not yet given their names, waiting to
/// be recorded; other steps (a `map` with a table file) commit it in their own transaction so
/// that nothing at all is left if they fail.
pub struct PreparedIngest {
    opts: IngestOptions,
    path: PathBuf,
    /// The table and row index objects, persisted by `commit`.
    objects: Option<(ObjectWriter, ObjectWriter)>,
    /// A converted intake's raw object (the workbook or JSON Lines bytes, kind `blob`), and
    /// its hash and size.
    raw: Option<ObjectWriter>,
    raw_object: Option<(String, u64)>,
    started_at: String,
    ended_at: String,
    source: SourceFile,
    params: serde_json::Value,
    table_hex: String,
    n_bytes: u64,
    index_hex: String,
    index_bytes: u64,
    n_rows: u64,
    pub header: Vec<String>,
    pub dialect: Dialect,
    profiles: Vec<ColumnProfile>,
    warnings: Vec<String>,
}

/// How a prepared intake is recorded as the successor of a version (see
/// [`PreparedIngest::commit_as`]): the step's kind, its inputs (the version it succeeds first,
/// with role `input`), and the lineage inferred by a diff.
pub struct Succession<'a> {
    pub kind: StepKind,
    /// (version id, role), the version succeeded first.
    pub inputs: Vec<(i64, &'a str)>,
    /// The hash of the version succeeded, for the audit entry.
    pub from_hash: &'a str,
    pub rows_in: u64,
    /// When the step began (an outside command: before it ran).
    pub started_at: String,
    /// The provenance object (hash, size), already durable.
    pub provenance: Option<(&'a str, u64)>,
    pub code: Option<&'a serde_json::Value>,
    /// How rows were matched, kept in the step's parameters.
    pub inferred_by: serde_json::Value,
    /// Renamed columns: (output column, input column).
    pub column_sources: Vec<(String, String)>,
    /// Exact when the row map came from row labels the work kept, inferred when from a diff.
    pub lineage: LineageKind,
}

/// The result of [`prepare`].
pub enum Prepared {
    /// The bytes equal the dataset's latest version.
    Unchanged(Box<Version>),
    Ready(Box<PreparedIngest>),
}

impl PreparedIngest {
    pub fn hash(&self) -> &str {
        &self.table_hex
    }

    pub fn null_tokens(&self) -> &[String] {
        &self.opts.null_tokens
    }

    /// Problems worth a warning found while reading (the file is still taken in).
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }

    /// The file the intake reads (its bytes hash to [`PreparedIngest::hash`]).
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// `name (hash)`, for messages before the version exists.
    pub fn label(&self) -> String {
        format!(
            "{} ({})",
            self.opts.dataset,
            crate::model::short_hash(&self.table_hex)
        )
    }

    /// Makes the table and row index objects durable (they stay unreferenced until a commit)
    /// and describes the version they will be, so that it can be compared with others before
    /// it is recorded. The description's `id` and `step_id` are 0; its `seq` is the next one.
    pub fn draft(&mut self, store: &Store) -> Result<Version> {
        self.persist(store.dir())?;
        let seq = store
            .lineage
            .latest_version(&self.opts.dataset)?
            .map_or(1, |v| v.seq + 1);
        Ok(Version {
            id: 0,
            dataset: self.opts.dataset.clone(),
            seq,
            hash: self.table_hex.clone(),
            row_index: self.index_hex.clone(),
            n_rows: self.n_rows,
            n_cols: self.header.len() as u64,
            n_bytes: self.n_bytes,
            header: self.header.clone(),
            dialect: self.dialect.clone(),
            null_tokens: self.opts.null_tokens.clone(),
            created_at: self.ended_at.clone(),
            step_id: 0,
            storage: crate::model::Storage::Stored,
        })
    }

    /// A converted intake (see [`crate::convert`]): the raw object, the version written from
    /// the table read out of it, and the step's parameters.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn converted(
        opts: &IngestOptions,
        path: &Path,
        started_at: String,
        source: SourceFile,
        params: serde_json::Value,
        raw: ObjectWriter,
        written: crate::store::version_writer::Written,
        header: Vec<String>,
        warnings: Vec<String>,
    ) -> PreparedIngest {
        let raw_object = Some((raw.hash().hex(), raw.n_bytes()));
        PreparedIngest {
            opts: opts.clone(),
            path: path.to_path_buf(),
            started_at,
            ended_at: clock::now_rfc3339(),
            source,
            params,
            table_hex: written.table.hash().hex(),
            n_bytes: written.table.n_bytes(),
            index_hex: written.index.hash().hex(),
            index_bytes: written.index.n_bytes(),
            n_rows: written.n_rows,
            objects: Some((written.table, written.index)),
            raw: Some(raw),
            raw_object,
            header,
            dialect: crate::table::write::canonical_dialect(),
            profiles: written.profiles,
            warnings,
        }
    }

    fn persist(&mut self, store_dir: &Path) -> Result<()> {
        if let Some(raw) = self.raw.take() {
            raw.finish().map_err(|e| store_io(store_dir, e))?;
        }
        if let Some((table, index)) = self.objects.take() {
            table.finish().map_err(|e| store_io(store_dir, e))?;
            index.finish().map_err(|e| store_io(store_dir, e))?;
        }
        Ok(())
    }

    /// Makes the objects durable, then records the version, its ingest step and the audit
    /// entry in `tx`; `None` when another command recorded the same bytes as the dataset's
    /// latest version meanwhile.
    pub fn commit(&mut self, store_dir: &Path, tx: &mut Tx<'_>) -> Result<Option<(i64, i64)>> {
        self.commit_as(store_dir, tx, None)
    }

    /// [`PreparedIngest::commit`], recording the file as the successor of other versions when
    /// `succession` says so (an outside command's output or a hand edit) instead of as a plain
    /// intake.
    pub fn commit_as(
        &mut self,
        store_dir: &Path,
        tx: &mut Tx<'_>,
        succession: Option<&Succession<'_>>,
    ) -> Result<Option<(i64, i64)>> {
        self.persist(store_dir)?;
        let opts = &self.opts;
        if tx.latest_version_hash(&opts.dataset)?.as_deref() == Some(self.table_hex.as_str()) {
            return Ok(None);
        }
        let mut params = self.params.clone();
        if let (Some(s), Some(map)) = (succession, params.as_object_mut()) {
            map.insert("inferred_by".into(), s.inferred_by.clone());
        }
        if let Some((hash, n)) = succession.and_then(|s| s.provenance) {
            tx.insert_object(hash, n, "blob", &self.ended_at)?;
        }
        if let Some((hash, n)) = &self.raw_object {
            tx.insert_object(hash, *n, "blob", &self.ended_at)?;
        }
        let step_id = tx.insert_step(&NewStep {
            kind: succession.map_or(StepKind::Ingest, |s| s.kind),
            operation: None,
            params,
            agent: &opts.agent,
            reason: opts.reason.as_deref(),
            started_at: succession
                .map_or_else(|| self.started_at.clone(), |s| s.started_at.clone()),
            ended_at: self.ended_at.clone(),
            rows_in: succession.map(|s| s.rows_in),
            rows_out: Some(self.n_rows),
            lineage: succession.map_or(LineageKind::None, |s| s.lineage),
            source: Some(&self.source),
            inputs: succession.map_or_else(Vec::new, |s| s.inputs.clone()),
            provenance: succession.and_then(|s| s.provenance.map(|p| p.0)),
            code: succession.and_then(|s| s.code),
            repeats_step: None,
        })?;
        let (version_id, seq) = tx.insert_version(&NewVersion {
            dataset: &opts.dataset,
            key: opts.key.as_deref(),
            step_id,
            hash: &self.table_hex,
            n_bytes: self.n_bytes,
            row_index: &self.index_hex,
            row_index_bytes: self.index_bytes,
            n_rows: self.n_rows,
            header: &self.header,
            dialect: &self.dialect,
            null_tokens: &opts.null_tokens,
            profiles: &self.profiles,
            created_at: &self.ended_at,
            storage: crate::model::Storage::Stored,
        })?;
        let mut details = json!({
            "version": self.table_hex,
            "row_index": self.index_hex,
            "step": step_id,
            "source": self.source.absolute_path,
            "n_rows": self.n_rows,
            "n_bytes": self.n_bytes,
        });
        if let (Some((hash, _)), Some(map)) = (&self.raw_object, details.as_object_mut()) {
            map.insert("raw_object".into(), json!(hash));
        }
        if let Some(s) = succession {
            tx.insert_column_sources(step_id, version_id, s.inputs[0].0, &s.column_sources)?;
            if let Some(map) = details.as_object_mut() {
                map.insert("kind".into(), json!(s.kind.as_str()));
                map.insert("from".into(), json!(s.from_hash));
                map.insert("provenance".into(), json!(s.provenance.map(|p| p.0)));
            }
        }
        tx.audit(
            &opts.agent,
            succession.map_or("ingest", |s| s.kind.as_str()),
            &format!("{}@{seq}", opts.dataset),
            &details,
            &self.ended_at,
        )?;
        Ok(Some((version_id, step_id)))
    }
}

fn run_pipeline(
    store: &Store,
    path: &Path,
    mut file: File,
    encoding: Option<&'static encoding_rs::Encoding>,
    opts: &IngestOptions,
    feed: Option<&mut dyn Feed>,
) -> Result<(ReadSide, Scan)> {
    let file_len = file.metadata().map(|m| m.len()).unwrap_or(0);
    let store_dir = store.dir().to_path_buf();
    let objects = &store.objects;
    let utf8 = encoding.is_none_or(|e| e == encoding_rs::UTF_8);
    let check_nul =
        encoding.is_none_or(|e| e != encoding_rs::UTF_16LE && e != encoding_rs::UTF_16BE);

    std::thread::scope(|scope| {
        // Batches parsed ahead of the calling thread (fewer when it hands them on to a feed,
        // which holds some of its own).
        let (tx, rx) = mpsc::sync_channel::<Msg>(if feed.is_some() { 4 } else { 8 });
        let (recycle_tx, recycle_rx) = mpsc::channel::<RecordBatch>();
        // The raw copy is hashed, compressed and written on a thread of its own: pieces go to
        // it once checked and parsed, and come back to be filled again.
        let (piece_tx, piece_rx) = mpsc::sync_channel::<Vec<u8>>(PIECES_IN_FLIGHT);
        let (empty_tx, empty_rx) = mpsc::channel::<Vec<u8>>();
        let store_dir_w = store_dir.clone();
        let writer = scope.spawn(move || -> Result<ObjectWriter> {
            let mut table = objects.writer().map_err(|e| store_io(&store_dir_w, e))?;
            while let Ok(piece) = piece_rx.recv() {
                table.write(&piece).map_err(|e| store_io(&store_dir_w, e))?;
                let _ = empty_tx.send(piece);
            }
            Ok(table)
        });
        let settings = ReadSettings {
            delimiter: opts.delimiter,
            encoding,
            max_record: Some(crate::table::stream::max_record_bytes()),
        };
        let has_header = opts.has_header;
        let reader = scope.spawn(move || -> Result<Option<u64>> {
            let mut check = Utf8Check::default();
            let mut rs = RecordStream::new(path, settings);
            let mut offset = 0u64;
            let mut buf = vec![0u8; STREAM_BUF];
            let mut batch = RecordBatch::new();
            let mut progress = crate::progress::Task::begin(
                || format!("taking in {}", path.display()),
                file.metadata().ok().map(|m| m.len()),
                crate::progress::Unit::Bytes,
            );
            // Hands a full batch to the other thread; false when that thread has stopped.
            let send = |batch: &mut RecordBatch| -> bool {
                let next = recycle_rx.try_recv().unwrap_or_default();
                tx.send(Msg::Batch(std::mem::replace(batch, next))).is_ok()
            };
            loop {
                if buf.is_empty() {
                    buf = empty_rx.try_recv().unwrap_or_default();
                    buf.resize(STREAM_BUF, 0);
                }
                let n = read_full(&mut file, &mut buf).map_err(|e| Error::io(path, e))?;
                let piece = &buf[..n];
                if check_nul {
                    if let Some(i) = memchr::memchr(0, piece) {
                        let byte = offset + i as u64;
                        return Err(Error::input(
                            path,
                            Some(position_of(path, byte)),
                            InputProblem::NulByte,
                        ));
                    }
                }
                if utf8 {
                    if let Err(byte) = check.push(piece) {
                        return Err(Error::input(
                            path,
                            Some(position_of(path, byte)),
                            InputProblem::InvalidUtf8,
                        ));
                    }
                }
                offset += n as u64;
                progress.add(n as u64);
                let last = n < STREAM_BUF;
                if n > 0 {
                    let mut stopped = false;
                    rs.push(piece, last, &mut |r: RawRecord<'_>| {
                        batch.push(&r);
                        if batch.n_bytes() >= BATCH_BYTES && !send(&mut batch) {
                            stopped = true;
                        }
                        Ok(())
                    })?;
                    if stopped {
                        // The consuming side stopped (it found a problem): stop reading.
                        return Ok(None);
                    }
                    let mut full = std::mem::take(&mut buf);
                    full.truncate(n);
                    if piece_tx.send(full).is_err() {
                        // The writing side stopped (a write failed): its error is reported.
                        return Ok(None);
                    }
                }
                if last {
                    break;
                }
            }
            drop(piece_tx);
            if utf8 {
                if let Err(byte) = check.finish() {
                    return Err(Error::input(
                        path,
                        Some(position_of(path, byte)),
                        InputProblem::InvalidUtf8,
                    ));
                }
            }
            rs.finish(&mut |r: RawRecord<'_>| {
                batch.push(&r);
                Ok(())
            })?;
            if !batch.is_empty() && !send(&mut batch) {
                return Ok(None);
            }
            let _ = tx.send(Msg::End(rs.dialect(has_header)));
            Ok(Some(offset))
        });

        let fed = feed.map(|feed| Fed {
            feed,
            file_len,
            announced: false,
            header_seen: !opts.has_header,
            row: 0,
        });
        let parsed = parse_side(objects, &store_dir, path, opts, rx, recycle_tx, fed);
        let read = reader
            .join()
            .map_err(|_| Error::from(ErrorKind::Internal("the reading thread panicked".into())))?;
        let written = writer
            .join()
            .map_err(|_| Error::from(ErrorKind::Internal("the writing thread panicked".into())))?;
        // The consuming side only saw records the reader had checked and parsed, so a problem
        // it found comes earlier in the file than the reader's: report it first; the writer
        // only saw pieces both had accepted.
        match (parsed, read, written) {
            (Err(e), _, _) => Err(e),
            (Ok(_), Err(e), _) => Err(e),
            (Ok(_), Ok(_), Err(e)) => Err(e),
            (Ok(Some(scan)), Ok(Some(n_bytes)), Ok(table)) => {
                Ok((ReadSide { table, n_bytes }, scan))
            }
            _ => Err(ErrorKind::Internal("intake stopped without a reason".into()).into()),
        }
    })
}

/// The 1-based line of byte `byte`, found by reading the file again (error path only).
fn position_of(path: &Path, byte: u64) -> Position {
    let mut line = 1u64;
    if let Ok(f) = File::open(path) {
        let mut r = f.take(byte);
        let mut buf = vec![0u8; 64 * 1024];
        while let Ok(n) = r.read(&mut buf) {
            if n == 0 {
                break;
            }
            line += memchr::memchr_iter(b'\n', &buf[..n]).count() as u64;
        }
    }
    Position {
        byte,
        line,
        record: None,
        column: None,
    }
}

struct Sink<'a> {
    path: &'a Path,
    has_header: bool,
    key: Option<&'a [String]>,
    header: Option<Vec<String>>,
    key_idx: Vec<usize>,
    profiler: Option<Profiler>,
    null_tokens: &'a [String],
    n_rows: u64,
    index_buf: Vec<u8>,
    index: ObjectWriter,
    store_dir: &'a Path,
    key_hashes: Vec<(u64, u64)>,
    rows: rowindex::Builder,
}

impl Sink<'_> {
    fn on_record(&mut self, rec: RawRecord<'_>) -> Result<()> {
        if self.header.is_none() {
            self.set_header(&rec)?;
            if self.has_header {
                return Ok(());
            }
        }
        let n_cols = self.header.as_ref().map_or(0, |h| h.len());
        if rec.len() != n_cols {
            return Err(Error::input(
                self.path,
                Some(rec.position(None)),
                InputProblem::RaggedRow {
                    expected: n_cols as u64,
                    found: rec.len() as u64,
                },
            ));
        }
        let profiler = self
            .profiler
            .as_mut()
            .expect("profiler set with the header");
        if !self.key_idx.is_empty() {
            let mut h = Xxh3::new();
            for (j, &c) in self.key_idx.iter().enumerate() {
                let v = rec.field(c);
                if profiler.is_blank(v) {
                    let names = self.header.as_ref().expect("header set");
                    return Err(Error::input(
                        self.path,
                        Some(rec.position(Some(c as u64 + 1))),
                        InputProblem::BlankKey {
                            column: names[self.key_idx[j]].clone(),
                        },
                    ));
                }
                h.update(&(v.len() as u64).to_le_bytes());
                h.update(v);
            }
            self.key_hashes.push((h.digest(), self.n_rows));
        }
        profiler.observe(rec.iter());
        self.rows.push(rec.byte, rec.line, &mut self.index_buf);
        if self.index_buf.len() >= 256 * 1024 {
            self.index
                .write(&self.index_buf)
                .map_err(|e| store_io(self.store_dir, e))?;
            self.index_buf.clear();
        }
        self.n_rows += 1;
        Ok(())
    }

    fn set_header(&mut self, rec: &RawRecord<'_>) -> Result<()> {
        let names: Vec<String> = if self.has_header {
            rec.iter()
                .map(|f| String::from_utf8_lossy(f).into_owned())
                .collect()
        } else {
            (1..=rec.len()).map(|i| format!("col{i}")).collect()
        };
        let pos = Some(rec.position(None));
        let blank: Vec<u64> = names
            .iter()
            .enumerate()
            .filter(|(_, n)| n.trim().is_empty())
            .map(|(i, _)| i as u64 + 1)
            .collect();
        if !blank.is_empty() {
            return Err(Error::input(
                self.path,
                pos,
                InputProblem::BlankHeaderNames { columns: blank },
            ));
        }
        let mut seen = BTreeMap::<&str, usize>::new();
        for n in &names {
            *seen.entry(n.as_str()).or_default() += 1;
        }
        let dups: Vec<String> = names
            .iter()
            .filter(|n| seen.get(n.as_str()).copied().unwrap_or(0) > 1)
            .fold(Vec::new(), |mut acc, n| {
                if !acc.contains(n) {
                    acc.push(n.clone());
                }
                acc
            });
        if !dups.is_empty() {
            return Err(Error::input(
                self.path,
                pos,
                InputProblem::DuplicateHeaderNames { names: dups },
            ));
        }
        if let Some(key) = self.key {
            let missing: Vec<String> = key.iter().filter(|k| !names.contains(k)).cloned().collect();
            if !missing.is_empty() {
                return Err(Error::input(
                    self.path,
                    None,
                    InputProblem::UnknownKeyColumns {
                        missing,
                        available: names.clone(),
                    },
                ));
            }
            self.key_idx = key
                .iter()
                .filter_map(|k| names.iter().position(|n| n == k))
                .collect();
        }
        self.profiler = Some(Profiler::new(names.len(), self.null_tokens));
        self.header = Some(names);
        Ok(())
    }
}

/// A feed and where it is in the file.
struct Fed<'f> {
    feed: &'f mut dyn Feed,
    file_len: u64,
    /// Whether the feed has been given the header.
    announced: bool,
    header_seen: bool,
    row: u64,
}

impl Fed<'_> {
    /// Hands a batch intake has checked to the feed; the header first, with the rows the file
    /// would hold if all were as long as this batch's. Returns a batch to fill again.
    fn batch(&mut self, header: &[String], batch: RecordBatch) -> RecordBatch {
        if !self.announced {
            let (mut first, mut last, mut n) = (None, 0u64, 0u64);
            let _ = batch.for_each(|r| -> std::result::Result<(), ()> {
                first.get_or_insert(r.byte);
                last = r.byte;
                n += 1;
                Ok(())
            });
            let span = last.saturating_sub(first.unwrap_or(0));
            let estimate = if n > 1 && span > 0 {
                self.file_len.saturating_mul(n - 1) / span
            } else {
                0
            };
            self.feed.header(header, estimate + estimate / 64);
            self.announced = true;
        }
        let skip = usize::from(!self.header_seen && !batch.is_empty());
        self.header_seen |= skip > 0;
        let first_row = self.row;
        self.row += (batch.len() - skip) as u64;
        self.feed.batch(batch, skip, first_row)
    }
}

fn parse_side(
    objects: &crate::store::Objects,
    store_dir: &Path,
    path: &Path,
    opts: &IngestOptions,
    rx: mpsc::Receiver<Msg>,
    recycle: mpsc::Sender<RecordBatch>,
    mut fed: Option<Fed<'_>>,
) -> Result<Option<Scan>> {
    let mut index = objects
        .random_access_writer()
        .map_err(|e| store_io(store_dir, e))?;
    index
        .write(&rowindex::Builder::start())
        .map_err(|e| store_io(store_dir, e))?;
    let mut sink = Sink {
        path,
        has_header: opts.has_header,
        key: opts.key.as_deref(),
        header: None,
        key_idx: Vec::new(),
        profiler: None,
        null_tokens: &opts.null_tokens,
        n_rows: 0,
        index_buf: Vec::with_capacity(512 * 1024),
        index,
        store_dir,
        key_hashes: Vec::new(),
        rows: rowindex::Builder::new(),
    };
    let mut dialect = None;
    while let Ok(msg) = rx.recv() {
        match msg {
            Msg::Batch(mut batch) => {
                batch.for_each(|r| sink.on_record(r))?;
                if let (Some(fed), Some(header)) = (&mut fed, &sink.header) {
                    batch = fed.batch(header, batch);
                }
                batch.clear();
                let _ = recycle.send(batch);
            }
            Msg::End(d) => {
                dialect = Some(d);
                break;
            }
        }
    }
    let Some(dialect) = dialect else {
        // The reading side stopped early; its error is the one to report.
        return Ok(None);
    };
    let Some(header) = sink.header.take() else {
        return Err(Error::input(path, None, InputProblem::NoHeader));
    };
    std::mem::take(&mut sink.rows).finish(&mut sink.index_buf);
    sink.index
        .write(&sink.index_buf)
        .map_err(|e| store_io(store_dir, e))?;
    let profiles = sink
        .profiler
        .as_ref()
        .map(|p| p.finish(&header))
        .unwrap_or_default();
    let mut warnings = Vec::new();
    if opts.has_header {
        if let Some(w) = header_looks_like_data(&header, &profiles) {
            warnings.push(w);
        }
    }
    Ok(Some(Scan {
        dialect,
        header,
        n_rows: sink.n_rows,
        profiles,
        row_index: sink.index,
        key_hashes: sink.key_hashes,
        warnings,
    }))
}

/// A header whose names read as numbers or dates in columns whose data are numbers or dates is
/// probably a data row.
fn header_looks_like_data(header: &[String], profiles: &[ColumnProfile]) -> Option<String> {
    let suspicious: Vec<&str> = header
        .iter()
        .zip(profiles)
        .filter(|(name, p)| {
            let b = name.as_bytes();
            match p.inferred_type.as_str() {
                "integer" | "decimal" => number_shape(b).is_some(),
                "date" => crate::clock::is_iso_date(b),
                _ => false,
            }
        })
        .map(|(n, _)| n.as_str())
        .collect();
    (!suspicious.is_empty()).then(|| {
        format!(
            "the header holds {} that look{} like data ({}); if the file has no header line, take it in again with --no-header",
            if suspicious.len() == 1 { "a name" } else { "names" },
            if suspicious.len() == 1 { "s" } else { "" },
            suspicious.join(", ")
        )
    })
}

fn check_duplicate_keys(
    path: &Path,
    scan: &Scan,
    key: &[String],
    encoding: Option<&'static encoding_rs::Encoding>,
) -> Result<()> {
    let mut hashes = scan.key_hashes.clone();
    hashes.sort_unstable();
    let mut candidates = HashSet::new();
    for w in hashes.windows(2) {
        if w[0].0 == w[1].0 {
            candidates.insert(w[0].1);
            candidates.insert(w[1].1);
        }
    }
    if candidates.is_empty() {
        return Ok(());
    }
    let key_idx: Vec<usize> = key
        .iter()
        .filter_map(|k| scan.header.iter().position(|n| n == k))
        .collect();
    let mut groups: BTreeMap<String, Vec<u64>> = BTreeMap::new();
    let mut row = 0u64;
    let mut header_seen = !scan.dialect.has_header;
    let settings = ReadSettings {
        delimiter: Some(scan.dialect.delimiter_byte()),
        encoding,
        max_record: None,
    };
    let f = File::open(path).map_err(|e| Error::io(path, e))?;
    for_each_record(path, f, &settings, |r| {
        if !header_seen {
            header_seen = true;
            return Ok(());
        }
        if candidates.contains(&row) {
            let k: Vec<String> = key_idx
                .iter()
                .map(|&c| String::from_utf8_lossy(r.field(c)).into_owned())
                .collect();
            groups.entry(k.join(", ")).or_default().push(r.line);
        }
        row += 1;
        Ok(())
    })?;
    let dups: Vec<(String, Vec<u64>)> = groups
        .into_iter()
        .filter(|(_, rows)| rows.len() > 1)
        .collect();
    if dups.is_empty() {
        return Ok(());
    }
    let total = dups.len() as u64;
    Err(Error::input(
        path,
        None,
        InputProblem::DuplicateKeys {
            examples: dups.into_iter().take(10).collect(),
            total,
        },
    ))
}
