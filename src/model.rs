//! The records of the lineage graph, in the user's words: [`Dataset`], [`Version`], [`Step`],
//! [`ColumnProfile`], [`AuditEntry`]. They are plain data: the store reads and writes them, the
//! query modules return them, the command line renders them. All of them serialise to the JSON
//! that `--json` prints (the structures are documented in README.md and `schema/`).

use serde::{Deserialize, Serialize};

/// The kind of activity a step was.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StepKind {
    Ingest,
    Operation,
    Command,
    HandEdit,
    Revert,
    Replay,
}

impl StepKind {
    pub fn as_str(self) -> &'static str {
        match self {
            StepKind::Ingest => "ingest",
            StepKind::Operation => "operation",
            StepKind::Command => "command",
            StepKind::HandEdit => "hand_edit",
            StepKind::Revert => "revert",
            StepKind::Replay => "replay",
        }
    }

    pub fn parse(s: &str) -> Option<Self> {
        Some(match s {
            "ingest" => StepKind::Ingest,
            "operation" => StepKind::Operation,
            "command" => StepKind::Command,
            "hand_edit" => StepKind::HandEdit,
            "revert" => StepKind::Revert,
            "replay" => StepKind::Replay,
            _ => return None,
        })
    }
}

/// How a step's row lineage is known.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LineageKind {
    /// Recorded by a sluice operation while it ran.
    Exact,
    /// Inferred afterwards by a diff (outside commands, hand edits).
    Inferred,
    /// No input version (an intake of an outside file).
    None,
}

impl LineageKind {
    pub fn as_str(self) -> &'static str {
        match self {
            LineageKind::Exact => "exact",
            LineageKind::Inferred => "inferred",
            LineageKind::None => "none",
        }
    }

    pub fn parse(s: &str) -> Option<Self> {
        Some(match s {
            "exact" => LineageKind::Exact,
            "inferred" => LineageKind::Inferred,
            "none" => LineageKind::None,
            _ => return None,
        })
    }
}

/// The CSV dialect a version was read with.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Dialect {
    /// The field delimiter as a one-character string: ",", ";", "\t" or "|" (or what was given).
    pub delimiter: String,
    pub quote: String,
    /// "lf", "crlf", "cr", "mixed", or "none" (a single line with no terminator).
    pub line_ending: String,
    /// Whether the file starts with a UTF-8 byte-order mark.
    pub bom: bool,
    /// The text encoding the bytes were decoded from ("utf-8" unless --encoding was given).
    pub encoding: String,
    pub has_header: bool,
    /// Whether the delimiter was detected (true) or given with --delimiter (false).
    pub delimiter_detected: bool,
}

impl Dialect {
    pub fn delimiter_byte(&self) -> u8 {
        self.delimiter.as_bytes().first().copied().unwrap_or(b',')
    }
}

/// What the intake knows about the outside file a raw version came from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SourceFile {
    /// The path as given on the command line.
    pub path: String,
    /// The absolute path at intake time.
    pub absolute_path: String,
    pub n_bytes: u64,
    /// Modification time (RFC 3339 UTC), when the file system reports one.
    pub modified: Option<String>,
}

/// The quality profile of one column of a version.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ColumnProfile {
    pub name: String,
    /// "integer", "decimal", "date", "text", or "empty" when every value is blank.
    pub inferred_type: String,
    pub n_blank: u64,
    pub n_distinct: u64,
    /// False when `n_distinct` is an estimate (columns with very many distinct values).
    pub distinct_exact: bool,
    pub min: Option<String>,
    pub max: Option<String>,
    pub min_len: Option<u64>,
    pub max_len: Option<u64>,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Dataset {
    pub name: String,
    pub key: Option<Vec<String>>,
    pub created_at: String,
    pub n_versions: u64,
}

/// One immutable content of a dataset.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Version {
    #[serde(skip)]
    pub id: i64,
    pub dataset: String,
    /// 1-based number within the dataset (`orders:v3`).
    pub seq: u64,
    /// BLAKE3 of the bytes, 64 hex digits: the version's name.
    pub hash: String,
    /// The object holding per-row byte offsets, line numbers and fingerprints.
    pub row_index: String,
    pub n_rows: u64,
    pub n_cols: u64,
    pub n_bytes: u64,
    pub header: Vec<String>,
    pub dialect: Dialect,
    pub null_tokens: Vec<String>,
    pub created_at: String,
    #[serde(skip)]
    pub step_id: i64,
    /// Whether the version's bytes are kept in the store or computed again from its recipe.
    #[serde(skip)]
    pub storage: Storage,
}

/// Whether a version's bytes (and its row index) are kept in the store. What stays recorded
/// either way: its hash, shape, row count, profile and the recipe of the step that made it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Storage {
    /// Stored (the default, and every version recorded before storage states existed).
    #[default]
    Stored,
    /// Stored, and kept by a person's explicit request: never released.
    Kept,
    /// Not stored: computed again from its recipe (a deterministic built-in step and its
    /// input versions) when something needs its bytes, and checked against its hash.
    Recomputable,
}

impl Storage {
    /// The recorded form (`versions.storage`): NULL for stored, so that rows written before
    /// the column existed and rows written after it encode alike.
    pub fn column(self) -> Option<&'static str> {
        match self {
            Storage::Stored => None,
            Storage::Kept => Some("kept"),
            Storage::Recomputable => Some("recomputable"),
        }
    }

    pub fn from_column(v: Option<&str>) -> Option<Storage> {
        match v {
            None => Some(Storage::Stored),
            Some("kept") => Some(Storage::Kept),
            Some("recomputable") => Some(Storage::Recomputable),
            Some(_) => None,
        }
    }

    /// How screens say it.
    pub fn as_str(self) -> &'static str {
        match self {
            Storage::Stored => "stored",
            Storage::Kept => "kept",
            Storage::Recomputable => "recomputable",
        }
    }

    /// Whether the recorded state says the bytes are kept.
    pub fn holds_bytes(self) -> bool {
        self != Storage::Recomputable
    }
}

impl Version {
    /// `NAME:vN`, the way users refer to it.
    pub fn label(&self) -> String {
        format!("{}:v{}", self.dataset, self.seq)
    }

    /// The subject of the audit entry that recorded this version: `name@seq`, the form the
    /// chain has always held (kept so that old and new chains verify alike; never shown).
    pub fn audit_subject(&self) -> String {
        format!("{}@{}", self.dataset, self.seq)
    }

    /// The short form of the version's hash shown on screens: `blake3:` and 16 hex digits.
    pub fn short_hash(&self) -> String {
        short_hash(&self.hash)
    }
}

/// `blake3:` and the first 16 hex digits of a full hash, as every screen shows one.
pub fn short_hash(hex: &str) -> String {
    format!("blake3:{}", hex.get(..16).unwrap_or(hex))
}

/// One activity that read versions and produced versions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Step {
    pub id: i64,
    pub kind: StepKind,
    pub operation: Option<String>,
    pub params: serde_json::Value,
    pub agent: String,
    pub tool_version: String,
    pub reason: Option<String>,
    pub started_at: String,
    pub ended_at: String,
    pub rows_in: Option<u64>,
    pub rows_out: Option<u64>,
    pub lineage: LineageKind,
    pub source: Option<SourceFile>,
    /// For outside commands and hand edits: what ran and where (command line, working
    /// directory, git commit, branch and modified files, times, exit status), as recorded.
    #[serde(default)]
    pub code: Option<serde_json::Value>,
    /// The step this one repeats on other data (`rerun --with`).
    #[serde(default)]
    pub repeats_step: Option<i64>,
    /// For a revert: the step whose effect it removed.
    #[serde(default)]
    pub reverts_step: Option<i64>,
    /// Labels (`name@seq`) of the versions the step read.
    pub inputs: Vec<String>,
    /// Labels of the versions the step produced.
    pub outputs: Vec<String>,
}

/// One entry of the hash-chained audit log.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct AuditEntry {
    pub seq: u64,
    pub at: String,
    pub agent: String,
    pub action: String,
    pub subject: String,
    /// Canonical JSON text.
    pub details: String,
    pub prev_hash: String,
    pub hash: String,
}

/// One recorded endorsement: a sign-off (kind `version`, `report`, `audit_head`) or a signed
/// change to the keys the store trusts (`admission`, `retirement`). `statement` is the exact
/// text that was signed; `signature` its signature in the OpenSSH format (see `endorse`).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Endorsement {
    pub id: i64,
    pub kind: String,
    /// The signed thing's hash (BLAKE3 hex), or a key's fingerprint for admissions and retirements.
    pub subject: String,
    /// `NAME:vN`, a report's file name, an audit entry's number, or an admitted person's name.
    pub label: String,
    pub meaning: String,
    /// The signer's printed name.
    pub name: String,
    /// RFC 3339 UTC.
    pub signed_at: String,
    /// The signing key's SHA-256 fingerprint (`SHA256:...`).
    pub fingerprint: String,
    /// The signing key as an OpenSSH public key line.
    pub public_key: String,
    /// For an admission: the admitted key as an OpenSSH public key line.
    pub admitted_key: Option<String>,
    pub statement: String,
    pub signature: String,
}

/// A meaning a sign-off may state: built in (prepared, reviewed, approved) or declared by the
/// store (with when).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Meaning {
    pub word: String,
    pub description: String,
    /// When the store declared it; `None` for the built-in meanings.
    pub declared_at: Option<String>,
}

/// A run of the row map: output rows `out_start .. out_start + len` are input rows
/// `in_start .. in_start + len`, in order (0-based data rows).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct RowRun {
    pub out_start: u64,
    pub in_start: u64,
    pub len: u64,
}

/// A step's row map for one of its inputs: sorted, non-overlapping runs of output rows, each
/// a stretch of consecutive input rows. The one home of "which input row did output row R come
/// from" (trace, explain, provenance and withdrawals ask it) and of building runs row by row.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RowMap {
    runs: Vec<RowRun>,
}

impl RowMap {
    /// The map of runs already sorted by output row (as every step records them).
    pub fn from_runs(runs: Vec<RowRun>) -> Self {
        RowMap { runs }
    }

    pub fn runs(&self) -> &[RowRun] {
        &self.runs
    }

    pub fn into_runs(self) -> Vec<RowRun> {
        self.runs
    }

    pub fn is_empty(&self) -> bool {
        self.runs.is_empty()
    }

    /// The input row output row `row` came from, or `None` when no run carries it.
    pub fn input_of(&self, row: u64) -> Option<u64> {
        input_of(&self.runs, row)
    }

    /// Records that output row `out_row` is input row `in_row`; rows must come in output
    /// order. A row that continues the last run lengthens it.
    pub fn push(&mut self, out_row: u64, in_row: u64) {
        self.push_run(out_row, in_row, 1);
    }

    /// Records `len` output rows from `out_row` as the input rows from `in_row`.
    pub fn push_run(&mut self, out_row: u64, in_row: u64, len: u64) {
        match self.runs.last_mut() {
            Some(r) if r.in_start + r.len == in_row && r.out_start + r.len == out_row => {
                r.len += len
            }
            _ => self.runs.push(RowRun {
                out_start: out_row,
                in_start: in_row,
                len,
            }),
        }
    }
}

/// The input row output row `row` came from, through runs sorted by output row.
pub fn input_of(runs: &[RowRun], row: u64) -> Option<u64> {
    let i = runs.partition_point(|r| r.out_start + r.len <= row);
    runs.get(i)
        .filter(|r| r.out_start <= row)
        .map(|r| r.in_start + (row - r.out_start))
}

/// One cell a step changed.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct CellChange {
    /// 0-based data row of the output version.
    pub row_idx: u64,
    pub column: String,
    pub old: Option<String>,
    pub new: Option<String>,
}

/// One input row a step removed, and why.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Drop {
    /// 0-based data row of the input version.
    pub row_idx: u64,
    pub reason: String,
    /// For duplicates: the 0-based input row it duplicated.
    pub duplicate_of: Option<u64>,
}

/// Who is acting (a W3C PROV agent): a person's name, their e-mail address if known, and
/// where sluice learnt them.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Agent {
    pub name: String,
    pub email: Option<String>,
    /// "option", "environment", "store", "os", or "sluice" for sluice's own work.
    pub source: String,
}

impl Agent {
    pub fn new(name: &str, email: Option<&str>, source: &str) -> Agent {
        Agent {
            name: name.trim().to_string(),
            email: email
                .map(str::trim)
                .filter(|e| !e.is_empty())
                .map(str::to_string),
            source: source.to_string(),
        }
    }

    /// The identity as it is recorded and shown: `Ada Moss (ada@example.org)`, or the name alone.
    pub fn identity(&self) -> String {
        match &self.email {
            Some(e) => format!("{} ({e})", self.name),
            None => self.name.clone(),
        }
    }

    /// Reads a recorded identity back into name and e-mail address: the current form
    /// `Name (email)` and the form older stores wrote, `Name <email>`.
    pub fn parse_identity(text: &str, source: &str) -> Agent {
        let t = text.trim();
        for (open, close) in [('(', ')'), ('<', '>')] {
            if let Some(body) = t.strip_suffix(close) {
                if let Some(i) = body.rfind(open) {
                    let email = &body[i + open.len_utf8()..];
                    if email.contains('@') && !email.contains(char::is_whitespace) {
                        return Agent::new(&body[..i], Some(email), source);
                    }
                }
            }
        }
        Agent::new(t, None, source)
    }
}

/// Canonical JSON text of a value: object keys sorted, no insignificant white space. serde_json's
/// map is ordered by key (the `preserve_order` feature is not enabled), so this is a plain
/// compact serialisation.
pub fn canonical_json(v: &serde_json::Value) -> String {
    serde_json::to_string(v).unwrap_or_else(|_| "null".to_string())
}
