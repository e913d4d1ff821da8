//! sluice keeps the provenance of cleaned data.
//!
//! Every dataset version is recorded by the BLAKE3 hash of its bytes, every transform as a step
//! in a lineage graph held in SQLite, so that any cleaned value can be traced back to the raw
//! line it came from. The flow runs one way:
//!
//! - read: [`table`] detects, decodes, parses and profiles delimited text; [`sheets`] reads
//!   workbooks, [`jsonl`] JSON Lines and [`columnar`] Parquet and Arrow IPC files;
//! - operate: [`ops`] holds the built-in cleaning operations and records them; [`plan`] runs
//!   and exports lists of them; [`checks`] evaluates declared rules;
//! - record: [`intake`] takes outside files in ([`convert`] those that are not delimited text); [`exec`] runs outside commands and, with
//!   [`inferred`], records their outputs and hand edits with lineage inferred by a diff;
//!   [`store`] keeps objects and the lineage database (the only module that touches SQLite);
//!   [`provenance`] keeps each step's row map, changed cells and drops compactly;
//! - query: [`history`] (log, show), [`diff`], [`trace`] (where a value came from),
//!   [`explain`] (why a total is what it is), [`graph`] (impact, drawings), [`replay`],
//!   [`verify`], [`refs`] (version references); [`sharing`] moves work between a local and a shared store; [`export`] writes a version as CSV, TSV or
//!   JSON Lines; [`outcome`] holds the records the recording commands and `compare` return,
//!   which the binary prints with `--json` and the Python package returns.
//!
//! The engine never prints: it returns values and typed [`Error`]s, and the binary renders them.
//!
//! ```
//! use sluice::{intake, model::Agent, store::Store};
//! let dir = tempfile::tempdir().unwrap();
//! std::fs::write(dir.path().join("shops.csv"), "shop,city\nQuillby Cycle Mend,Quillby\n").unwrap();
//! let agent = Agent::new("Robin Example", Some("robin@example.org"), "option");
//! let mut store = Store::init_recorded(dir.path(), &agent).unwrap();
//! let opts = intake::IngestOptions {
//!     dataset: "shops".into(), key: None, reason: Some("first export".into()), delimiter: None,
//!     has_header: true, encoding: None, null_tokens: vec![], agent,
//! };
//! match intake::ingest(&mut store, &dir.path().join("shops.csv"), &opts).unwrap() {
//!     intake::IngestOutcome::Recorded { version, .. } => assert_eq!(version.n_rows, 1),
//!     intake::IngestOutcome::Unchanged { .. } => unreachable!("a new dataset always records"),
//! }
//! assert!(sluice::verify::verify(&store).unwrap().intact);
//! ```

pub mod agent;
pub mod checks;
pub mod clock;
pub mod code;
pub mod columnar;
pub mod commitment;
pub mod convert;
pub mod delivery;
pub mod demo;
pub mod diff;
pub mod endorse;
pub mod erasure;
pub mod error;
pub mod exec;
pub mod explain;
pub mod export;
pub mod graph;
pub mod hash;
pub mod history;
pub mod inferred;
pub mod intake;
pub mod jsonl;
pub mod labelled;
pub mod model;
pub mod ops;
pub mod outcome;
pub mod plan;
pub mod progress;
pub mod prov;
pub mod provenance;
pub mod recompute;
pub mod recording;
pub mod refs;
pub mod replay;
pub mod report;
pub mod revert;
pub mod sharing;
pub mod sheets;
pub mod store;
pub mod table;
pub mod trace;
pub mod verify;

pub use error::{Error, ErrorKind, InputProblem, Position, Result};

/// The version of this build, recorded with every step.
pub const TOOL_VERSION: &str = concat!("sluice ", env!("CARGO_PKG_VERSION"));
