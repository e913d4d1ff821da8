//! Running a recorded outside command again (`replay --allow-exec`). The command runs in a
//! temporary checkout of the commit it was recorded at ([`crate::code::checkout`]), written
//! into a fresh folder under the store's `tmp/`, in the place the recorded working directory
//! has inside that checkout. Its inputs are the recorded versions, copied from the store as
//! `exec` copies them; its outputs go to the temporary folder: `{out:NAME}` placeholders and
//! `SLUICE_OUTPUT_*` variables point there, and an output recorded relative to the working
//! directory is written in the checkout. A command line that names an absolute output path
//! literally (not through a placeholder) is refused, since running it would overwrite that
//! file. The bytes produced are hashed and compared with the recorded versions; nothing is
//! recorded, and the folder is removed whatever happens.
//!
//! What cannot be re-run is said, not guessed: a step recorded outside any git repository (or
//! before the repository's first commit) never recorded its code; a commit the repository no
//! longer holds is named. A step recorded from a working tree with uncommitted changes runs
//! with a warning: the commit may not be the code that ran.

use std::fs;
use std::io;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use serde::Deserialize;

use crate::code::{self, CheckoutProblem, CodeState};
use crate::error::{Error, ErrorKind, Result};
use crate::exec::{env_name, substitute};
use crate::hash::{hash_reader, Hash};
use crate::model::{Step, Version};
use crate::store::Store;

use super::difference::{self, Difference};

/// The parts of `steps.code` a re-run needs.
#[derive(Debug, Clone, Deserialize)]
pub(super) struct RecordedCode {
    pub command: Vec<String>,
    pub cwd: String,
    #[serde(default)]
    pub git: Option<CodeState>,
    #[serde(default)]
    pub inputs: Vec<RecordedInput>,
    #[serde(default)]
    pub outputs: Vec<RecordedOutput>,
    /// The files the command line named, with the bytes they had when it ran.
    #[serde(default)]
    pub files: Vec<RecordedFile>,
}

#[derive(Debug, Clone, Deserialize)]
pub(super) struct RecordedFile {
    /// The argument as typed (relative to the working directory, or absolute).
    pub path: String,
    pub hash: String,
    #[serde(default)]
    pub executable: bool,
}

#[derive(Debug, Clone, Deserialize)]
pub(super) struct RecordedInput {
    pub name: String,
    pub hash: String,
}

#[derive(Debug, Clone, Deserialize)]
pub(super) struct RecordedOutput {
    pub name: String,
    pub file: String,
}

impl RecordedCode {
    pub fn of(step: &Step) -> Result<RecordedCode> {
        let code = step.code.clone().ok_or_else(|| {
            Error::from(ErrorKind::Inconsistent(format!(
                "command step {} records no command line",
                step.id
            )))
        })?;
        serde_json::from_value(code).map_err(|e| {
            ErrorKind::Inconsistent(format!(
                "step {} holds a command record this build cannot read ({e})",
                step.id
            ))
            .into()
        })
    }

    /// The command line as recorded, placeholders included, quoted for a POSIX shell where
    /// an argument needs it (common practice).
    pub fn line(&self) -> String {
        self.command
            .iter()
            .map(|a| shell_quote(a))
            .collect::<Vec<_>>()
            .join(" ")
    }
}

fn shell_quote(a: &str) -> String {
    let plain = !a.is_empty()
        && a.bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"-_./=:,+@%{}".contains(&b));
    if plain {
        a.to_string()
    } else {
        format!("'{}'", a.replace('\'', "'\\''"))
    }
}

/// What a re-run found (the `result` and `detail` of the step's entry, with any warnings).
pub(super) struct Rerun {
    pub result: &'static str,
    pub detail: Option<String>,
    pub warnings: Vec<String>,
    pub computed_hash: Option<String>,
    pub difference: Option<Box<Difference>>,
}

impl Rerun {
    fn stop(result: &'static str, detail: String, warnings: Vec<String>) -> Rerun {
        Rerun {
            result,
            detail: Some(detail),
            warnings,
            computed_hash: None,
            difference: None,
        }
    }
}

/// A folder removed when dropped.
struct TempFolder(PathBuf);

impl Drop for TempFolder {
    fn drop(&mut self) {
        let _ = fs::remove_dir_all(&self.0);
    }
}

/// Why the recorded code of a command cannot be run again, when it cannot (checked before
/// anything runs).
pub(super) fn cannot_run(rec: &RecordedCode) -> Option<(&'static str, String)> {
    let Some(git) = &rec.git else {
        return Some((
            "code_unknown",
            format!(
                "the command ran in {}, outside any git repository, so the code that ran was never recorded and cannot be run again",
                rec.cwd
            ),
        ));
    };
    if git.commit.is_none() {
        return Some((
            "code_unknown",
            format!(
                "the command ran in {} before its first commit, so the code that ran was never recorded and cannot be run again",
                git.repository
            ),
        ));
    }
    for o in &rec.outputs {
        let named_literally = rec
            .command
            .iter()
            .any(|a| !o.file.is_empty() && a.contains(o.file.as_str()));
        if Path::new(&o.file).is_absolute() && named_literally {
            return Some((
                "refused",
                format!(
                    "the recorded command line names the absolute output path {} itself rather than through {{out:{}}}; running it again would overwrite that file, so reproduce does not run it",
                    o.file, o.name
                ),
            ));
        }
    }
    None
}

/// Runs the command step `step` again and compares what it writes with `outputs`.
pub(super) fn rerun(store: &mut Store, step: &Step, outputs: &[Version]) -> Result<Rerun> {
    let rec = RecordedCode::of(step)?;
    if let Some((result, why)) = cannot_run(&rec) {
        return Ok(Rerun::stop(result, why, Vec::new()));
    }
    let (Some(git), Some(commit)) = (&rec.git, rec.git.as_ref().and_then(|g| g.commit.clone()))
    else {
        return Err(ErrorKind::Inconsistent("checked above".into()).into());
    };
    let mut warnings = Vec::new();
    if git.dirty {
        warnings.push(format!(
            "when step {} ran, the working tree had changes not in commit {} ({}); the commit is run now, which may not be the code that ran",
            step.id,
            &commit[..commit.len().min(12)],
            git.modified.join(", ")
        ));
    }

    let base = std::path::absolute(store.dir().join("tmp"))
        .unwrap_or_else(|_| store.dir().join("tmp"))
        .join(format!(
            "replay-{}-{}",
            std::process::id(),
            std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |d| d.as_nanos())
        ));
    fs::create_dir_all(&base).map_err(|e| Error::io(&base, e))?;
    let folder = TempFolder(base);
    let checkout = folder.0.join("checkout");
    match code::checkout(Path::new(&git.repository), &commit, &checkout) {
        Ok(_) => {}
        Err(CheckoutProblem::RepositoryMissing(why)) | Err(CheckoutProblem::CommitMissing(why)) => {
            return Ok(Rerun::stop(
                "code_missing",
                format!("the code step {} ran cannot be checked out: {why}", step.id),
                warnings,
            ))
        }
        Err(CheckoutProblem::Other(why)) => {
            return Ok(Rerun::stop(
                "code_missing",
                format!("the checkout of commit {commit} failed: {why}"),
                warnings,
            ))
        }
    }
    let inside = Path::new(&rec.cwd)
        .strip_prefix(&git.repository)
        .map(Path::to_path_buf)
        .ok()
        .or_else(|| {
            // The same folders reached through a symbolic link.
            let cwd = fs::canonicalize(&rec.cwd).ok()?;
            let repo = fs::canonicalize(&git.repository).ok()?;
            cwd.strip_prefix(repo).ok().map(Path::to_path_buf)
        });
    let Some(inside) = inside else {
        return Ok(Rerun::stop(
            "code_missing",
            format!(
                "the recorded working directory {} is not inside the recorded repository {}",
                rec.cwd, git.repository
            ),
            warnings,
        ));
    };
    let cwd = checkout.join(inside);
    fs::create_dir_all(&cwd).map_err(|e| Error::io(&cwd, e))?;

    // The files the command line named, as they were when it ran (an untracked script, a
    // modified settings file), written over the commit's.
    let mut restored = Vec::new();
    for f in &rec.files {
        let rel = Path::new(&f.path);
        if rel.is_absolute()
            || rel
                .components()
                .any(|c| c == std::path::Component::ParentDir)
        {
            warnings.push(format!(
                "{} lies outside the working directory; the command reads it where it is now, not as recorded",
                f.path
            ));
            continue;
        }
        let target = cwd.join(rel);
        if let Some(parent) = target.parent() {
            fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
        }
        let hash: Hash = f
            .hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        let _ = fs::remove_file(&target);
        let mut out = fs::File::create(&target).map_err(|e| Error::io(&target, e))?;
        if let Err(e) = store.objects.copy_to(&hash, &mut out, &target) {
            return Ok(Rerun::stop(
                "code_missing",
                format!("the recorded bytes of {} cannot be read: {e}", f.path),
                warnings,
            ));
        }
        drop(out);
        #[cfg(unix)]
        if f.executable {
            use std::os::unix::fs::PermissionsExt;
            fs::set_permissions(&target, fs::Permissions::from_mode(0o755))
                .map_err(|e| Error::io(&target, e))?;
        }
        restored.push(f.path.clone());
    }
    if !restored.is_empty() {
        warnings.push(format!(
            "run with the recorded bytes of {}",
            restored.join(", ")
        ));
    }

    // The inputs, copied from the store.
    let recorded_inputs = store.lineage.step_input_versions(step.id)?;
    let inputs_dir = folder.0.join("inputs");
    fs::create_dir_all(&inputs_dir).map_err(|e| Error::io(&inputs_dir, e))?;
    let mut files: Vec<(String, PathBuf)> = Vec::new();
    for i in &rec.inputs {
        let tsv = recorded_inputs
            .iter()
            .find(|(_, v)| v.hash == i.hash)
            .is_some_and(|(_, v)| v.dialect.delimiter == "\t");
        let path = inputs_dir.join(format!("{}.{}", i.name, if tsv { "tsv" } else { "csv" }));
        let hash: Hash = i
            .hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        let mut f = fs::File::create(&path).map_err(|e| Error::io(&path, e))?;
        if let Err(e) = store.objects.copy_to(&hash, &mut f, &path) {
            return Ok(Rerun::stop(
                "failed",
                format!(
                    "input {} ({}) cannot be given to the command: {e}",
                    i.name,
                    &i.hash[..12.min(i.hash.len())]
                ),
                warnings,
            ));
        }
        files.push((i.name.clone(), path));
    }
    // The outputs, redirected into the temporary folder.
    let outputs_dir = folder.0.join("outputs");
    let mut targets: Vec<(String, PathBuf)> = Vec::new();
    for o in &rec.outputs {
        let path = if Path::new(&o.file).is_absolute() {
            let name = Path::new(&o.file)
                .file_name()
                .map_or_else(|| PathBuf::from("output"), PathBuf::from);
            outputs_dir.join(&o.name).join(name)
        } else {
            cwd.join(&o.file)
        };
        if let Some(parent) = path.parent() {
            fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
        }
        // A file of that name in the commit is not the output: the command must write it.
        let _ = fs::remove_file(&path);
        targets.push((o.name.clone(), path));
    }
    let ran: Vec<String> = rec
        .command
        .iter()
        .map(|a| substitute(a, &files, &targets))
        .collect();
    let Some(program) = ran.first() else {
        return Ok(Rerun::stop(
            "failed",
            "the recorded command line is empty".into(),
            warnings,
        ));
    };
    // A program named by a relative path is found in the checkout, where it was found then.
    let program = if program.contains('/') && Path::new(program).is_relative() {
        cwd.join(program).display().to_string()
    } else {
        program.clone()
    };
    let mut child = Command::new(&program);
    child
        .args(&ran[1..])
        .current_dir(&cwd)
        .stdin(Stdio::null())
        .stdout(Stdio::from(io::stderr()));
    for (name, path) in &files {
        child.env(env_name("SLUICE_INPUT_", name), path);
    }
    for (name, path) in &targets {
        child.env(env_name("SLUICE_OUTPUT_", name), path);
    }
    let status = match child.status() {
        Ok(s) => s,
        Err(e) => {
            return Ok(Rerun::stop(
                "failed",
                format!("the command could not be started again ({program}: {e})"),
                warnings,
            ))
        }
    };
    if !status.success() {
        return Ok(Rerun::stop(
            "failed",
            match status.code() {
                Some(n) => format!("run again, the command exited with status {n}"),
                None => "run again, the command was ended by a signal".to_string(),
            },
            warnings,
        ));
    }

    let mut computed_hash = None;
    let mut restored = false;
    for v in outputs {
        let Some((_, path)) = targets.iter().find(|(n, _)| *n == v.dataset) else {
            return Ok(Rerun::stop(
                "failed",
                format!("the command record names no file for output {}", v.label()),
                warnings,
            ));
        };
        let Ok(file) = fs::File::open(path) else {
            return Ok(Rerun::stop(
                "failed",
                format!(
                    "run again, the command exited with status 0 but did not write output {} ({})",
                    v.dataset,
                    rec.outputs
                        .iter()
                        .find(|o| o.name == v.dataset)
                        .map_or("", |o| o.file.as_str())
                ),
                warnings,
            ));
        };
        let (hash, _) = hash_reader(file).map_err(|e| Error::io(path, e))?;
        if computed_hash.is_none() {
            computed_hash = Some(hash.hex());
        }
        if hash.hex() != v.hash {
            let difference = match difference::against_file(store, v, path) {
                Ok(d) => Some(Box::new(d)),
                Err(e) => {
                    warnings.push(format!("the outputs could not be compared: {e}"));
                    None
                }
            };
            return Ok(Rerun {
                result: "differs",
                detail: Some(format!(
                    "run again from commit {}, the command wrote other bytes for {} ({}) than it recorded",
                    &commit[..commit.len().min(12)],
                    v.label(),
                    crate::model::short_hash(&hash.hex())
                )),
                warnings,
                computed_hash: Some(hash.hex()),
                difference,
            });
        }
        if !store.objects.exists(&hash) {
            restore(store, path)?;
            restored = true;
        }
    }
    Ok(Rerun {
        result: if restored { "restored" } else { "same" },
        detail: None,
        warnings,
        computed_hash,
        difference: None,
    })
}

/// Writes the file's bytes as an object (they have the recorded version's hash).
fn restore(store: &Store, path: &Path) -> Result<()> {
    let tmp = store.dir().join("tmp");
    let mut w = store.objects.writer().map_err(|e| Error::io(&tmp, e))?;
    let mut f = fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let n = io::Read::read(&mut f, &mut buf).map_err(|e| Error::io(path, e))?;
        if n == 0 {
            break;
        }
        w.write(&buf[..n]).map_err(|e| Error::io(&tmp, e))?;
    }
    w.finish().map_err(|e| Error::io(&tmp, e))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn arguments_are_quoted_only_when_a_shell_would_need_it() {
        assert_eq!(shell_quote("{out:orders}"), "{out:orders}");
        assert_eq!(shell_quote("a b"), "'a b'");
        assert_eq!(shell_quote("it's"), "'it'\\''s'");
        assert_eq!(shell_quote(""), "''");
    }
}
