//! The native module of the Python package (`sluice._engine`): one entry point per engine call,
//! taking plain values and returning JSON text (the engine's own serialised records) or Arrow
//! IPC bytes. The Python side (`sluice/__init__.py`) turns them into objects and frames; nothing
//! here computes what the engine computes.

use std::path::{Path, PathBuf};

use pyo3::create_exception;
use pyo3::exceptions::PyException;
use pyo3::prelude::*;
use pyo3::types::PyBytes;
use serde_json::{json, Value};

use sluice::columnar::write::GivenType;
use sluice::intake::{IngestOptions, SourceOptions};
use sluice::model::Agent;
use sluice::ops::apply::ApplyOptions;
use sluice::outcome::{CleanJson, CompareJson, FrameJson, ReceiveJson, RunJson, WithdrawJson};
use sluice::store::Store;

create_exception!(
    _engine,
    SluiceError,
    PyException,
    "an error of the sluice engine"
);
create_exception!(
    _engine,
    InputError,
    SluiceError,
    "a usage or input error: nothing was recorded"
);
create_exception!(
    _engine,
    DataError,
    SluiceError,
    "the data, the store or the system failed"
);

/// The engine's error as a Python exception: the message as the command line shows it, and
/// `(message, position)` as its arguments, the position a dict (byte, line, record, column)
/// for input errors that have one.
fn raise(e: sluice::Error) -> PyErr {
    let message = e.to_string();
    raise_with(e, message, None)
}

/// As `raise`, with a message of the caller's and the record of what was done before the
/// error (JSON text, as the command prints it), given as the exception's third argument.
fn raise_with(e: sluice::Error, message: String, record: Option<String>) -> PyErr {
    let position = e.position().map(|p| {
        json!({"byte": p.byte, "line": p.line, "record": p.record, "column": p.column}).to_string()
    });
    if e.exit_code() == 2 {
        InputError::new_err((message, position, record))
    } else {
        DataError::new_err((message, position, record))
    }
}

fn to_json(v: &impl serde::Serialize) -> PyResult<String> {
    serde_json::to_string(v).map_err(|e| DataError::new_err((e.to_string(), None::<String>)))
}

fn agent(name: &str, email: Option<&str>) -> Agent {
    Agent::new(name, email, "python")
}

fn open(dir: &str) -> PyResult<Store> {
    Store::discover(Some(Path::new(dir)), Path::new(dir)).map_err(raise)
}

/// Sets up a store in `project`; returns the store's folder.
#[pyfunction]
#[pyo3(signature = (project, name, email=None))]
fn setup(project: &str, name: &str, email: Option<&str>) -> PyResult<String> {
    let store = Store::init_recorded(Path::new(project), &agent(name, email)).map_err(raise)?;
    Ok(store.dir().display().to_string())
}

/// Opens the store at `dir`; returns its folder.
#[pyfunction]
fn store_dir(dir: &str) -> PyResult<String> {
    Ok(open(dir)?.dir().display().to_string())
}

/// Records the file at `path` as the next version of `dataset`.
#[pyfunction]
#[pyo3(signature = (dir, path, dataset, reason, name, email=None, key=None, null_tokens=Vec::new(), sheet=None))]
#[allow(clippy::too_many_arguments)]
fn receive(
    dir: &str,
    path: &str,
    dataset: &str,
    reason: Option<String>,
    name: &str,
    email: Option<&str>,
    key: Option<Vec<String>>,
    null_tokens: Vec<String>,
    sheet: Option<String>,
) -> PyResult<String> {
    let mut store = open(dir)?;
    let opts = IngestOptions {
        dataset: dataset.into(),
        key,
        reason,
        delimiter: None,
        has_header: true,
        encoding: None,
        null_tokens,
        agent: agent(name, email),
    };
    let outcome = sluice::intake::ingest_from(
        &mut store,
        &PathBuf::from(path),
        &opts,
        &SourceOptions { sheet },
    )
    .map_err(raise)?;
    to_json(&ReceiveJson::from_intake(&outcome))
}

/// Records the file at `path` (a frame the caller's code made) as the successor of `from`,
/// with an exact row map from `labels` (0-based input rows) when they allow it.
#[pyfunction]
#[pyo3(signature = (dir, path, from_ref, dataset, reason, name, email, labels, labels_from, file, line, source))]
#[allow(clippy::too_many_arguments)]
fn record_frame(
    dir: &str,
    path: &str,
    from_ref: &str,
    dataset: &str,
    reason: &str,
    name: &str,
    email: Option<&str>,
    labels: Option<Vec<i64>>,
    labels_from: &str,
    file: &str,
    line: u64,
    source: Option<String>,
) -> PyResult<String> {
    use sluice::labelled::{CallingCode, LabelledOptions};
    let mut store = open(dir)?;
    let folder = Path::new(file)
        .parent()
        .filter(|p| p.is_dir())
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."));
    let opts = LabelledOptions {
        ingest: IngestOptions {
            dataset: dataset.into(),
            key: None,
            reason: Some(reason.into()),
            delimiter: None,
            has_header: true,
            encoding: None,
            null_tokens: Vec::new(),
            agent: agent(name, email),
        },
        from: from_ref.into(),
        labels,
        code: CallingCode {
            file: file.into(),
            line,
            folder,
            source,
            labels_from: labels_from.into(),
        },
    };
    let outcome = sluice::labelled::record(&mut store, Path::new(path), &opts).map_err(raise)?;
    to_json(&FrameJson::from(&outcome))
}

/// Applies one built-in operation (`clean` and `settings` as in a plan step) to `reference`.
#[pyfunction]
#[pyo3(signature = (dir, reference, clean, settings, reason, name, email=None, save_as=None))]
#[allow(clippy::too_many_arguments)]
fn apply(
    dir: &str,
    reference: &str,
    clean: &str,
    settings: &str,
    reason: &str,
    name: &str,
    email: Option<&str>,
    save_as: Option<String>,
) -> PyResult<String> {
    let settings: Option<serde_json::Map<String, Value>> = serde_json::from_str(settings)
        .map_err(|e| InputError::new_err((format!("settings: {e}"), None::<String>)))?;
    let op = sluice::plan::operation_from(clean, settings)
        .map_err(|e| InputError::new_err((e, None::<String>)))?;
    let mut store = open(dir)?;
    let opts = ApplyOptions {
        op,
        reason: reason.into(),
        output_dataset: save_as,
        agent: agent(name, email),
        map_table_file: None,
        replay: None,
        repeats: None,
    };
    let outcome = sluice::ops::apply::apply(&mut store, reference, &opts).map_err(raise)?;
    to_json(&CleanJson::new(&opts.op, &outcome))
}

/// Runs the plan in `text` (read from `plan_dir`), binding `inputs` (name, file or reference).
#[pyfunction]
#[pyo3(signature = (dir, text, plan_name, plan_dir, inputs, name, email=None))]
fn run_plan(
    dir: &str,
    text: &str,
    plan_name: &str,
    plan_dir: &str,
    inputs: Vec<(String, String)>,
    name: &str,
    email: Option<&str>,
) -> PyResult<String> {
    use sluice::plan::Binding;
    let plan = sluice::plan::parse(text, plan_name).map_err(raise)?;
    let mut store = open(dir)?;
    let bindings = inputs
        .into_iter()
        .map(|(n, v)| {
            let p = Path::new(plan_dir).join(&v);
            let b = if p.is_file() {
                Binding::File(p)
            } else {
                Binding::Version(v)
            };
            (n, b)
        })
        .collect();
    let opts = sluice::plan::RunOptions {
        plan_dir: PathBuf::from(plan_dir),
        bindings,
        agent: agent(name, email),
    };
    match sluice::plan::run(&mut store, &plan, &opts) {
        Ok(r) => to_json(&RunJson::new(&r.done, None)),
        Err(f) => {
            // As `run --json`: the record of what was done, then the error; here the record
            // goes with the exception.
            let at = sluice::outcome::stopped_at(&f.at);
            let error = f.error.to_string();
            let record = to_json(&RunJson::new(&f.done, Some((&at, &error))))?;
            let kept = f.done.iter().filter(|d| d.recorded().is_some()).count();
            let msg = format!(
                "the run stopped at {at}: {error} (the {kept} version(s) recorded before it are kept)"
            );
            Err(raise_with(f.error, msg, Some(record)))
        }
    }
}

/// Column types given as (column, type) pairs, read as `retrieve --column-type` reads them.
fn given_types(types: Vec<(String, String)>) -> PyResult<Vec<(String, GivenType)>> {
    types
        .into_iter()
        .map(|(c, t)| {
            GivenType::parse(&t)
                .map(|g| (c.clone(), g))
                .map_err(|e| InputError::new_err((format!("types[{c:?}]: {e}"), None::<String>)))
        })
        .collect()
}

/// A version's rows as Arrow IPC file bytes: typed from the profile, or every column as text,
/// the `types` given as given.
#[pyfunction]
#[pyo3(signature = (dir, reference, typed, types=Vec::new()))]
fn read_ipc<'py>(
    py: Python<'py>,
    dir: &str,
    reference: &str,
    typed: bool,
    types: Vec<(String, String)>,
) -> PyResult<Bound<'py, PyBytes>> {
    let given = given_types(types)?;
    let store = open(dir)?;
    let v = sluice::refs::resolve(&store.lineage, reference).map_err(raise)?;
    let mut out = Vec::new();
    sluice::columnar::write::write_ipc(&store, &v, typed, &given, &mut out).map_err(raise)?;
    Ok(PyBytes::new(py, &out))
}

/// Writes a version's rows to `path` in `format` (csv, tsv, jsonl, parquet, arrow), through a
/// temporary file renamed into place when complete.
#[pyfunction]
#[pyo3(signature = (dir, reference, format, path, types=Vec::new(), deliver=None, name=None, email=None))]
#[allow(clippy::too_many_arguments)]
fn write_file(
    dir: &str,
    reference: &str,
    format: &str,
    path: &str,
    types: Vec<(String, String)>,
    deliver: Option<&str>,
    name: Option<&str>,
    email: Option<&str>,
) -> PyResult<Option<String>> {
    let column_types: Vec<String> = types.iter().map(|(c, t)| format!("{c}={t}")).collect();
    let given = given_types(types)?;
    let form = format.to_string();
    if let Some(why) = deliver {
        sluice::delivery::check_reason(why).map_err(raise)?;
    }
    use sluice::columnar::write::OutFormat;
    use sluice::export::{Format, TextFormat};
    let format = match format {
        "csv" => Format::Text(TextFormat::Csv),
        "tsv" => Format::Text(TextFormat::Tsv),
        "jsonl" => Format::Text(TextFormat::Jsonl),
        "parquet" => Format::Columnar(OutFormat::Parquet),
        "arrow" => Format::Columnar(OutFormat::ArrowIpc),
        other => {
            return Err(InputError::new_err((
                format!("format \"{other}\": expected csv, tsv, jsonl, parquet or arrow"),
                None::<String>,
            )))
        }
    };
    let mut store = open(dir)?;
    let v = sluice::refs::resolve(&store.lineage, reference).map_err(raise)?;
    let target = Path::new(path);
    let tmp = target.with_extension("sluice-part");
    let io = |e: std::io::Error| raise(sluice::Error::io(target, e));
    let file = std::io::BufWriter::new(std::fs::File::create(&tmp).map_err(io)?);
    let mut f = sluice::delivery::Tally::new(file, deliver.is_some());
    let written = sluice::export::write_in_with(&store, &v, format, &given, &mut f)
        .map_err(raise)
        .and_then(|()| std::io::Write::flush(&mut f).map_err(io));
    let (file_hash, bytes) = f.finish();
    drop(f);
    let recorded = written.and_then(|()| match deliver {
        None => Ok(None),
        Some(why) => {
            let who = agent(name.unwrap_or_default(), email);
            let handover = sluice::delivery::Handover {
                version: &v,
                format: &form,
                column_types: &column_types,
                file: path,
                file_hash: &file_hash,
                bytes,
                why,
            };
            sluice::delivery::record(&mut store, &handover, &who)
                .map(Some)
                .map_err(raise)
        }
    });
    let recorded = match recorded {
        Ok(r) => r,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(e);
        }
    };
    std::fs::rename(&tmp, target).map_err(io)?;
    recorded.map(|d| to_json(&d)).transpose()
}

/// One version in full (`about`).
#[pyfunction]
fn about(dir: &str, reference: &str) -> PyResult<String> {
    let store = open(dir)?;
    to_json(&sluice::history::about(&store, reference).map_err(raise)?)
}

/// A cell's trail back to its raw file (`row` 1-based).
#[pyfunction]
fn trace(dir: &str, reference: &str, row: u64, column: &str) -> PyResult<String> {
    let store = open(dir)?;
    let pick = sluice::trace::RowPick::Number(row);
    to_json(&sluice::trace::trace(&store, reference, &pick, column).map_err(raise)?)
}

/// The arithmetic of a summary cell (`row` 1-based).
#[pyfunction]
fn explain(dir: &str, reference: &str, row: u64, column: &str, limit: usize) -> PyResult<String> {
    let store = open(dir)?;
    let pick = sluice::trace::RowPick::Number(row);
    to_json(&sluice::explain::explain(&store, reference, &pick, column, limit).map_err(raise)?)
}

/// The integrity check.
#[pyfunction]
fn verify(dir: &str, deep: bool) -> PyResult<String> {
    let store = open(dir)?;
    to_json(&sluice::verify::verify_with(&store, deep).map_err(raise)?)
}

/// The lineage report of a version, as data (the fields of the report's JSON form).
#[pyfunction]
#[pyo3(signature = (dir, reference, sample, name, email=None))]
fn report(
    dir: &str,
    reference: &str,
    sample: usize,
    name: &str,
    email: Option<&str>,
) -> PyResult<String> {
    let mut store = open(dir)?;
    let opts = sluice::report::ReportOptions {
        sample,
        replay: false,
        excluded: 10,
        agent: agent(name, email).identity(),
    };
    to_json(&sluice::report::build(&mut store, reference, &opts).map_err(raise)?)
}

/// The lineage report of a version written to `path` (HTML, Markdown or JSON by its ending, as
/// `sluice report` writes it) and recorded in the audit chain; returns the file's hash, the
/// report's own hash and the audit entry's number.
#[pyfunction]
#[pyo3(signature = (dir, reference, path, sample, reproduce, name, email=None))]
fn write_report(
    dir: &str,
    reference: &str,
    path: &str,
    sample: usize,
    reproduce: bool,
    name: &str,
    email: Option<&str>,
) -> PyResult<String> {
    use sluice::report::Format;
    let mut store = open(dir)?;
    let format = match Path::new(path).extension().and_then(|e| e.to_str()) {
        Some("html" | "htm") => Format::Html,
        Some("md" | "markdown") => Format::Markdown,
        Some("json") => Format::Json,
        _ => {
            return Err(InputError::new_err((
                format!("{path}: expected a file name ending in .html, .md or .json"),
                None::<String>,
            )))
        }
    };
    let who = agent(name, email);
    let opts = sluice::report::ReportOptions {
        sample,
        replay: reproduce,
        excluded: 10,
        agent: who.identity(),
    };
    let w = sluice::report::write(&mut store, &who, reference, format, Path::new(path), &opts)
        .map_err(raise)?;
    to_json(&serde_json::json!({
        "path": path,
        "hash": w.hash,
        "own_hash": w.own_hash,
        "audit_entry": w.entry.seq,
        "verdict": w.report.verification.verdict,
    }))
}

/// Two versions compared, as `compare --json` gives it: how rows were paired, the counts, and
/// at most `limit` changes listed (none with `counts`; by default as many as the command lists).
#[pyfunction]
#[pyo3(signature = (dir, a, b, key=None, limit=None, counts=false))]
fn compare(
    dir: &str,
    a: &str,
    b: &str,
    key: Option<Vec<String>>,
    limit: Option<usize>,
    counts: bool,
) -> PyResult<String> {
    use sluice::diff::{DiffOptions, KeyChoice};
    let store = open(dir)?;
    let opts = DiffOptions {
        key: match key {
            Some(k) => KeyChoice::Columns(k),
            None => KeyChoice::Declared,
        },
    };
    let listed = if counts {
        0
    } else {
        limit.unwrap_or(sluice::diff::LISTED_BY_DEFAULT)
    };
    let d = sluice::diff::diff_listed(&store, a, b, &opts, listed).map_err(raise)?;
    to_json(&CompareJson::new(&d, listed))
}

/// Takes out the step that made `reference` (as `withdraw --json` reports it: what was
/// recorded, or the conflicts that refused it).
#[pyfunction]
#[pyo3(signature = (dir, reference, reason, accept_conflicts, name, email=None))]
fn withdraw(
    dir: &str,
    reference: &str,
    reason: &str,
    accept_conflicts: bool,
    name: &str,
    email: Option<&str>,
) -> PyResult<String> {
    let mut store = open(dir)?;
    let opts = sluice::revert::RevertOptions {
        reason: reason.into(),
        force: accept_conflicts,
        agent: agent(name, email),
    };
    let outcome = sluice::revert::revert(&mut store, reference, &opts).map_err(raise)?;
    to_json(&WithdrawJson::from(&outcome))
}

/// The audit trail, oldest first, optionally of one dataset.
#[pyfunction]
#[pyo3(signature = (dir, dataset=None))]
fn timeline(dir: &str, dataset: Option<String>) -> PyResult<String> {
    let store = open(dir)?;
    let filter = sluice::history::TimelineFilter {
        dataset,
        ..Default::default()
    };
    to_json(&sluice::history::timeline(&store, &filter).map_err(raise)?)
}

#[pymodule]
fn _engine(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("SluiceError", m.py().get_type::<SluiceError>())?;
    m.add("InputError", m.py().get_type::<InputError>())?;
    m.add("DataError", m.py().get_type::<DataError>())?;
    m.add("TOOL_VERSION", sluice::TOOL_VERSION)?;
    for f in [
        wrap_pyfunction!(setup, m)?,
        wrap_pyfunction!(store_dir, m)?,
        wrap_pyfunction!(receive, m)?,
        wrap_pyfunction!(apply, m)?,
        wrap_pyfunction!(record_frame, m)?,
        wrap_pyfunction!(run_plan, m)?,
        wrap_pyfunction!(read_ipc, m)?,
        wrap_pyfunction!(write_file, m)?,
        wrap_pyfunction!(about, m)?,
        wrap_pyfunction!(trace, m)?,
        wrap_pyfunction!(explain, m)?,
        wrap_pyfunction!(verify, m)?,
        wrap_pyfunction!(report, m)?,
        wrap_pyfunction!(write_report, m)?,
        wrap_pyfunction!(compare, m)?,
        wrap_pyfunction!(withdraw, m)?,
        wrap_pyfunction!(timeline, m)?,
    ] {
        m.add_function(f)?;
    }
    Ok(())
}
