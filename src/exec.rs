//! Outside commands (`sluice capture`): running a program that sluice does not know on stored
//! versions, and recording what it wrote as new versions whose step is the command.
//!
//! Before the run each input version is copied to a file in a fresh folder under the store's
//! `tmp/` (removed afterwards, whatever happens), and the command learns the paths two ways:
//! placeholders in its arguments (`{NAME}` for an input, `{out:NAME}` for an output, replaced
//! here because only the engine knows the paths) and environment variables set for the child
//! alone (`SLUICE_INPUT_<NAME>`, `SLUICE_OUTPUT_<NAME>`, the name upper-cased with every other
//! character than a letter or digit turned into `_`). The state of the code is read from git
//! before the run ([`crate::code::code_state`]).
//!
//! After a run that exited with status 0 the copies are hashed again (an input the command
//! changed is refused), every output file is read like an intake, and its lineage to the input
//! of the same dataset (else the first input) is inferred by a diff ([`crate::inferred`]). All
//! outputs are recorded in one transaction, or none. A run that fails records nothing but one
//! audit entry saying so. The command's standard output goes to sluice's standard error, so
//! that sluice's own report stays alone on standard output.

use std::fs;
use std::io;
use std::path::PathBuf;
use std::process::{Command, Stdio};
use std::time::SystemTime;

use serde_json::json;

use crate::clock;
use crate::code::{self, CodeState};
use crate::diff::KeyChoice;
use crate::error::{Error, ErrorKind, Result};
use crate::hash::hash_reader;
use crate::inferred::{self, RecordedSuccessor};
use crate::intake::{self, IngestOptions, Prepared};
use crate::model::{Agent, StepKind, Version};
use crate::refs;
use crate::store::Store;

/// What `sluice capture` was asked to do.
#[derive(Debug, Clone)]
pub struct ExecOptions {
    /// (placeholder name, version reference), in the order given.
    pub inputs: Vec<(String, String)>,
    /// (dataset name, file the command writes), in the order given; relative files are
    /// relative to `cwd`.
    pub outputs: Vec<(String, PathBuf)>,
    /// The program and its arguments as typed, placeholders included.
    pub command: Vec<String>,
    /// The folder the command runs in (and whose git repository is read).
    pub cwd: PathBuf,
    pub reason: String,
    pub agent: Agent,
    /// Match each output's rows to its input's by order (a diff without a key) even when a key
    /// is declared: for a command that rewrites key values, whose rows a diff by key would all
    /// report as removed and added. The step's `params.inferred_by` says which matching was used.
    pub match_by_order: bool,
}

/// Why a run recorded nothing.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ExecFailure {
    /// The program could not be started (`found` false when there is no such program).
    NotStarted { found: bool, detail: String },
    /// It exited with a status other than 0.
    Exited(i32),
    /// It was ended by a signal.
    Killed(i32),
    /// It exited with 0 but did not write these outputs (dataset name, file).
    MissingOutputs(Vec<(String, String)>),
    /// It changed the copies of these inputs (placeholder names) while it ran.
    InputsModified(Vec<String>),
}

impl ExecFailure {
    /// The exit code sluice gives: the command's own non-zero status; 128 + the signal for a
    /// command ended by one; 127 for a program that does not exist and 126 for one that cannot
    /// be started (the shells' convention, common practice); 1 when the command exited with 0
    /// but its outputs are missing or it changed an input.
    pub fn exit_code(&self) -> i32 {
        match self {
            ExecFailure::NotStarted { found: false, .. } => 127,
            ExecFailure::NotStarted { found: true, .. } => 126,
            ExecFailure::Exited(n) => *n,
            ExecFailure::Killed(sig) => 128 + sig,
            ExecFailure::MissingOutputs(_) | ExecFailure::InputsModified(_) => 1,
        }
    }

    /// What went wrong, for the audit entry and the message.
    pub fn describe(&self) -> String {
        match self {
            ExecFailure::NotStarted { detail, .. } => format!("the command could not be started: {detail}"),
            ExecFailure::Exited(n) => format!("the command exited with status {n}"),
            ExecFailure::Killed(sig) => format!("the command was ended by signal {sig}"),
            ExecFailure::MissingOutputs(list) => format!(
                "the command exited with status 0 but did not write {}",
                list.iter()
                    .map(|(n, f)| format!("{f} (output {n})"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            ExecFailure::InputsModified(names) => format!(
                "the command changed the {} it was given to read ({}); sluice records nothing it cannot trust",
                if names.len() == 1 { "input" } else { "inputs" },
                names.join(", ")
            ),
        }
    }
}

/// What a run did.
#[derive(Debug, Clone)]
pub enum ExecOutcome {
    /// The command succeeded and its outputs were recorded (`unchanged`: outputs whose bytes
    /// equal their dataset's latest version, recorded as nothing new).
    Recorded {
        recorded: Vec<RecordedSuccessor>,
        unchanged: Vec<Version>,
        code: serde_json::Value,
    },
    /// The command failed; only the failure's audit entry was recorded.
    Failed {
        failure: ExecFailure,
        code: serde_json::Value,
    },
}

/// The environment variable name for placeholder `name` with `prefix` (`SLUICE_INPUT_`).
pub fn env_name(prefix: &str, name: &str) -> String {
    let mut s = String::from(prefix);
    s.extend(name.chars().map(|c| {
        if c.is_ascii_alphanumeric() {
            c.to_ascii_uppercase()
        } else {
            '_'
        }
    }));
    s
}

/// Replaces `{NAME}` by the input's file and `{out:NAME}` by the output's in one argument.
pub fn substitute(
    arg: &str,
    inputs: &[(String, PathBuf)],
    outputs: &[(String, PathBuf)],
) -> String {
    let mut s = arg.to_string();
    for (name, path) in outputs {
        s = s.replace(&format!("{{out:{name}}}"), &path.display().to_string());
    }
    for (name, path) in inputs {
        s = s.replace(&format!("{{{name}}}"), &path.display().to_string());
    }
    s
}

/// A folder removed when dropped.
struct TempFolder(PathBuf);

impl Drop for TempFolder {
    fn drop(&mut self) {
        let _ = fs::remove_dir_all(&self.0);
    }
}

fn check_options(opts: &ExecOptions) -> Result<()> {
    if opts.command.is_empty() || opts.command[0].is_empty() {
        return Err(Error::usage(
            "give the command after `--`, e.g. sluice capture --input orders --output orders=out.csv --why \"...\" -- python3 clean.py {orders} out.csv",
        ));
    }
    if opts.outputs.is_empty() {
        return Err(Error::usage(
            "name at least one file the command writes with --output NAME=FILE",
        ));
    }
    if opts.reason.trim().is_empty() {
        return Err(Error::usage("say why the command is run with --why TEXT"));
    }
    let mut seen: Vec<&str> = Vec::new();
    for (name, _) in &opts.inputs {
        intake::validate_dataset_name(name)?;
        if seen.contains(&name.as_str()) {
            return Err(Error::usage(format!(
                "--input {name} is given twice; give each input once"
            )));
        }
        seen.push(name);
    }
    let mut outs: Vec<&str> = Vec::new();
    for (name, file) in &opts.outputs {
        intake::validate_dataset_name(name)?;
        if outs.contains(&name.as_str()) {
            return Err(Error::usage(format!(
                "--output {name} is given twice; one file per dataset"
            )));
        }
        if file.as_os_str().is_empty() {
            return Err(Error::usage(format!(
                "--output {name}= names no file; write --output {name}=FILE"
            )));
        }
        outs.push(name);
    }
    Ok(())
}

/// Runs the command and records its outputs (see the module's description).
pub fn exec(store: &mut Store, opts: &ExecOptions) -> Result<ExecOutcome> {
    check_options(opts)?;
    let mut inputs: Vec<(String, Version)> = Vec::with_capacity(opts.inputs.len());
    for (name, reference) in &opts.inputs {
        inputs.push((name.clone(), refs::resolve(&store.lineage, reference)?));
    }
    // The command runs in `cwd`, so every path it is given is absolute.
    let absolute = |p: PathBuf| std::path::absolute(&p).unwrap_or(p);
    let outputs: Vec<(String, PathBuf)> = opts
        .outputs
        .iter()
        .map(|(n, f)| (n.clone(), absolute(opts.cwd.join(f))))
        .collect();

    // The inputs, copied where the command can read them.
    let folder = absolute(store.dir().join("tmp")).join(format!(
        "exec-{}-{}",
        std::process::id(),
        SystemTime::now()
            .duration_since(SystemTime::UNIX_EPOCH)
            .map_or(0, |d| d.as_nanos())
    ));
    fs::create_dir_all(&folder).map_err(|e| Error::io(&folder, e))?;
    let folder = TempFolder(folder);
    let mut files: Vec<(String, PathBuf)> = Vec::with_capacity(inputs.len());
    for (name, v) in &inputs {
        let ext = if v.dialect.delimiter == "\t" {
            "tsv"
        } else {
            "csv"
        };
        let path = folder.0.join(format!("{name}.{ext}"));
        let mut f = fs::File::create(&path).map_err(|e| Error::io(&path, e))?;
        let hash = v
            .hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        store.objects.copy_to(&hash, &mut f, &path)?;
        f.sync_all().map_err(|e| Error::io(&path, e))?;
        files.push((name.clone(), path));
    }
    let ran: Vec<String> = opts
        .command
        .iter()
        .map(|a| substitute(a, &files, &outputs))
        .collect();
    // When an output file is already there, the command must write it anew.
    let before: Vec<Option<SystemTime>> = outputs
        .iter()
        .map(|(_, p)| fs::metadata(p).ok().and_then(|m| m.modified().ok()))
        .collect();

    let (mut git, git_problem): (Option<CodeState>, Option<String>) =
        match code::code_state(&opts.cwd) {
            Ok(g) => (g, None),
            Err(e) => (None, Some(e)),
        };
    // The files the command line names (a script, a settings file), stored as they are now,
    // before the command runs; an untracked or ignored one makes the code state dirty.
    let named = named_files(store, opts)?;
    if let Some(g) = git.as_mut() {
        for f in &named {
            g.note_named_file(&f.in_repository, &f.git);
        }
    }
    let started_at = clock::now_rfc3339();
    let mut child = Command::new(&ran[0]);
    child
        .args(&ran[1..])
        .current_dir(&opts.cwd)
        .stdin(Stdio::null())
        .stdout(Stdio::from(io::stderr()));
    for (name, path) in &files {
        child.env(env_name("SLUICE_INPUT_", name), path);
    }
    for (name, path) in &outputs {
        child.env(env_name("SLUICE_OUTPUT_", name), path);
    }
    let status = child.status();
    let ended_at = clock::now_rfc3339();

    let mut code = json!({
        "command": opts.command,
        "ran": ran,
        "cwd": std::path::absolute(&opts.cwd).unwrap_or_else(|_| opts.cwd.clone()).display().to_string(),
        "started_at": started_at,
        "ended_at": ended_at,
        "git": git,
        "inputs": inputs.iter().map(|(n, v)| json!({
            "name": n, "version": v.label(), "hash": v.hash,
            "env": env_name("SLUICE_INPUT_", n),
        })).collect::<Vec<_>>(),
        "outputs": opts.outputs.iter().map(|(n, f)| json!({
            "name": n, "file": f.display().to_string(),
            "env": env_name("SLUICE_OUTPUT_", n),
        })).collect::<Vec<_>>(),
        "files": named.iter().map(|f| json!({
            "path": f.path, "hash": f.hash, "n_bytes": f.n_bytes, "git": f.git,
            "executable": f.executable,
        })).collect::<Vec<_>>(),
    });
    if let (Some(p), Some(map)) = (&git_problem, code.as_object_mut()) {
        map.insert("git_problem".into(), json!(p));
    }
    let set_status = |code: &mut serde_json::Value, s: serde_json::Value| {
        if let Some(map) = code.as_object_mut() {
            map.insert("exit_status".into(), s);
        }
    };

    let failure = match status {
        Err(e) => Some(ExecFailure::NotStarted {
            found: e.kind() != io::ErrorKind::NotFound,
            detail: if e.kind() == io::ErrorKind::NotFound {
                format!(
                    "no program \"{}\" was found; check its name and PATH",
                    ran[0]
                )
            } else {
                format!("{}: {e}", ran[0])
            },
        }),
        Ok(st) => {
            set_status(&mut code, json!(st.code()));
            match st.code() {
                Some(0) => None,
                Some(n) => Some(ExecFailure::Exited(n)),
                None => Some(ExecFailure::Killed(signal_of(&st))),
            }
        }
    };
    let failure = failure.or_else(|| {
        let missing: Vec<(String, String)> = outputs
            .iter()
            .zip(&before)
            .zip(&opts.outputs)
            .filter(|(((_, p), was), _)| {
                // A link is not a written file: following it would record bytes from a path
                // the user did not name.
                let now = fs::symlink_metadata(p).ok().filter(|m| m.is_file());
                match now {
                    None => true,
                    Some(m) => was.is_some() && m.modified().ok() == **was,
                }
            })
            .map(|(((_, p), _), (n, f))| {
                let shown = match fs::read_link(p) {
                    Ok(to) => format!(
                        "{} (a symbolic link to {}, not a file; have the command write the file itself)",
                        f.display(),
                        to.display()
                    ),
                    Err(_) => f.display().to_string(),
                };
                (n.clone(), shown)
            })
            .collect();
        (!missing.is_empty()).then_some(ExecFailure::MissingOutputs(missing))
    });
    let failure = match failure {
        Some(f) => Some(f),
        None => {
            let mut changed = Vec::new();
            for ((name, path), (_, v)) in files.iter().zip(&inputs) {
                let same = fs::File::open(path)
                    .and_then(hash_reader)
                    .is_ok_and(|(h, _)| h.hex() == v.hash);
                if !same {
                    changed.push(name.clone());
                }
            }
            (!changed.is_empty()).then_some(ExecFailure::InputsModified(changed))
        }
    };
    if let Some(failure) = failure {
        record_failure(store, opts, &code, &failure.describe(), &ended_at)?;
        return Ok(ExecOutcome::Failed { failure, code });
    }
    drop(folder);

    // The named files' objects, made durable before the transaction that records them.
    let mut blobs: Vec<(String, u64)> = Vec::with_capacity(named.len());
    for f in &named {
        let store_io = |e: io::Error| Error::io(&store.dir().join("tmp"), e);
        let mut w = store.objects.writer().map_err(store_io)?;
        w.write(&f.bytes).map_err(store_io)?;
        let (hash, n) = w.finish().map_err(store_io)?;
        blobs.push((hash.hex(), n));
    }
    drop(named);
    match record_outputs(store, opts, &inputs, &outputs, &code, &started_at, &blobs) {
        Ok((recorded, unchanged)) => Ok(ExecOutcome::Recorded {
            recorded,
            unchanged,
            code,
        }),
        Err(e) => {
            record_failure(
                store,
                opts,
                &code,
                &format!("the outputs could not be recorded: {e}"),
                &clock::now_rfc3339(),
            )?;
            Err(e)
        }
    }
}

/// A file an outside command's arguments name, as it was when the command ran.
struct NamedFile {
    /// The argument as typed.
    path: String,
    /// Its path in the git repository (or its absolute path when outside it).
    in_repository: String,
    /// How git saw it (see [`code::file_status`]); `no_repository` outside any.
    git: String,
    hash: String,
    n_bytes: u64,
    /// Whether it could be run as a program (Unix permission bits).
    executable: bool,
    /// Its bytes, read before the command ran; stored only when the run is recorded, so that a
    /// failing command leaves the store as it was.
    bytes: Vec<u8>,
}

#[cfg(unix)]
fn is_executable(m: &fs::Metadata) -> bool {
    std::os::unix::fs::PermissionsExt::mode(&m.permissions()) & 0o111 != 0
}

#[cfg(not(unix))]
fn is_executable(_: &fs::Metadata) -> bool {
    false
}

/// The most bytes a file named on the command line is stored with; larger files (data rather
/// than code) are left out. The files are held in memory while the command runs, at most
/// [`NAMED_FILES_TOTAL`] bytes in all.
const NAMED_FILE_LIMIT: u64 = 16 * 1024 * 1024;
const NAMED_FILES_TOTAL: u64 = 64 * 1024 * 1024;

/// Reads and hashes every file the command's arguments name (whole arguments naming an
/// existing regular file, relative to the working directory, placeholders excepted).
fn named_files(store: &Store, opts: &ExecOptions) -> Result<Vec<NamedFile>> {
    let mut out: Vec<NamedFile> = Vec::new();
    let mut total = 0u64;
    let store_dir = fs::canonicalize(store.dir()).ok();
    for arg in &opts.command {
        if arg.contains('{') || arg.starts_with('-') || out.iter().any(|f| f.path == *arg) {
            continue;
        }
        let path = opts.cwd.join(arg);
        let Ok(meta) = fs::metadata(&path) else {
            continue;
        };
        if !meta.is_file()
            || meta.len() > NAMED_FILE_LIMIT
            || total + meta.len() > NAMED_FILES_TOTAL
        {
            continue;
        }
        let full = fs::canonicalize(&path).unwrap_or_else(|_| path.clone());
        if store_dir.as_ref().is_some_and(|d| full.starts_with(d)) {
            continue;
        }
        let bytes = fs::read(&path).map_err(|e| Error::io(&path, e))?;
        total += bytes.len() as u64;
        let hash = blake3::hash(&bytes).to_hex().to_string();
        let n_bytes = bytes.len() as u64;
        let (in_repository, git) = match code::file_status(&opts.cwd, &path) {
            Some((p, s)) => (p, s.to_string()),
            None => (full.display().to_string(), "no_repository".to_string()),
        };
        out.push(NamedFile {
            path: arg.clone(),
            in_repository,
            git,
            hash,
            n_bytes,
            executable: is_executable(&meta),
            bytes,
        });
    }
    Ok(out)
}

#[cfg(unix)]
fn signal_of(st: &std::process::ExitStatus) -> i32 {
    std::os::unix::process::ExitStatusExt::signal(st).unwrap_or(0)
}

#[cfg(not(unix))]
fn signal_of(_: &std::process::ExitStatus) -> i32 {
    0
}

fn record_failure(
    store: &mut Store,
    opts: &ExecOptions,
    code: &serde_json::Value,
    what: &str,
    at: &str,
) -> Result<()> {
    store.write(|tx| {
        tx.audit(
            &opts.agent,
            "exec_failed",
            opts.command.first().map_or("", String::as_str),
            &json!({"code": code, "failure": what, "reason": opts.reason}),
            at,
        )
        .map(|_| ())
    })
}

type Recorded = (Vec<RecordedSuccessor>, Vec<Version>);

fn record_outputs(
    store: &mut Store,
    opts: &ExecOptions,
    inputs: &[(String, Version)],
    outputs: &[(String, PathBuf)],
    code: &serde_json::Value,
    started_at: &str,
    blobs: &[(String, u64)],
) -> Result<Recorded> {
    let mut successors = Vec::new();
    let mut unchanged = Vec::new();
    for (name, path) in outputs {
        let iopts = IngestOptions {
            dataset: name.clone(),
            key: None,
            reason: Some(opts.reason.clone()),
            delimiter: None,
            has_header: true,
            encoding: None,
            null_tokens: Vec::new(),
            agent: opts.agent.clone(),
        };
        let prepared = match intake::prepare(store, path, &iopts)? {
            Prepared::Unchanged(v) => {
                unchanged.push(*v);
                continue;
            }
            Prepared::Ready(p) => p,
        };
        let base = inputs
            .iter()
            .position(|(n, v)| v.dataset == *name || n == name)
            .or(if inputs.is_empty() { None } else { Some(0) });
        let Some(b) = base else {
            return Err(Error::usage(format!(
                "output {name} has no input to infer its lineage from; give the version it is made from with --input"
            )));
        };
        let from = inputs[b].1.clone();
        let others: Vec<Version> = inputs
            .iter()
            .enumerate()
            .filter(|(i, _)| *i != b)
            .map(|(_, (_, v))| v.clone())
            .collect();
        successors.push(inferred::infer_matching(
            store,
            prepared,
            from,
            others,
            "removed by the command (inferred by diff)",
            if opts.match_by_order {
                KeyChoice::Unkeyed
            } else {
                KeyChoice::Declared
            },
        )?);
    }
    let recorded = inferred::record(
        store,
        &mut successors,
        StepKind::Command,
        Some(code),
        started_at,
        blobs,
    )?;
    Ok((recorded, unchanged))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn environment_names_are_upper_case_letters_digits_and_underscores() {
        assert_eq!(
            env_name("SLUICE_INPUT_", "all_orders"),
            "SLUICE_INPUT_ALL_ORDERS"
        );
        assert_eq!(
            env_name("SLUICE_OUTPUT_", "q3.by-shop"),
            "SLUICE_OUTPUT_Q3_BY_SHOP"
        );
    }

    #[test]
    fn placeholders_are_replaced_inside_arguments() {
        let ins = vec![("orders".to_string(), PathBuf::from("/t/orders.csv"))];
        let outs = vec![("orders".to_string(), PathBuf::from("/w/out.csv"))];
        assert_eq!(
            substitute("--in={orders}", &ins, &outs),
            "--in=/t/orders.csv"
        );
        assert_eq!(substitute("{out:orders}", &ins, &outs), "/w/out.csv");
        // Braces that name nothing known are left as typed.
        assert_eq!(substitute("{other} {x:y}", &ins, &outs), "{other} {x:y}");
    }
}
