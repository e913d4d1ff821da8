//! Code capture: what sluice learns from git about the code at work. This is the only module
//! that uses git2. For an outside command it reads the state of the code it ran: HEAD commit,
//! branch, modified files (never any identity: who is acting comes from `agent`).
//! For `reproduce --allow-exec` it also writes out the tree of a recorded commit into a fresh
//! folder ([`checkout`]), blob by blob, so that the command runs on the code that was
//! recorded; the user's working tree, index and HEAD are never touched.

use std::path::Path;

/// The state of the code around a working directory when an outside command ran: the git
/// repository containing it, its HEAD commit and branch, and the tracked files that differ from
/// that commit (in the index or the working tree). Untracked files are not listed: they are not
/// part of any commit, so they cannot make the recorded commit id wrong.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct CodeState {
    /// The repository's working folder (absolute).
    pub repository: String,
    /// The HEAD commit id (40 hex digits); `None` in a repository with no commit yet.
    pub commit: Option<String>,
    /// The branch HEAD points at; `None` when HEAD is detached.
    pub branch: Option<String>,
    /// Whether tracked files differ from the commit.
    pub dirty: bool,
    /// Those files, relative to the repository's working folder, in git's order.
    pub modified: Vec<String>,
}

/// Reads the code state of the git repository containing `cwd`; `Ok(None)` when `cwd` is in
/// no repository. An error names what could not be read.
pub fn code_state(cwd: &Path) -> Result<Option<CodeState>, String> {
    let repo = match git2::Repository::discover(cwd) {
        Ok(r) => r,
        Err(e) if e.code() == git2::ErrorCode::NotFound => return Ok(None),
        Err(e) => {
            return Err(format!(
                "cannot open the git repository around {}: {}",
                cwd.display(),
                e.message()
            ))
        }
    };
    let Some(workdir) = repo.workdir() else {
        // A bare repository has no working tree whose files could have run.
        return Ok(None);
    };
    let repository = std::path::absolute(workdir)
        .unwrap_or_else(|_| workdir.to_path_buf())
        .display()
        .to_string();
    let (commit, branch) = match repo.head() {
        Ok(head) => (
            head.peel_to_commit().ok().map(|c| c.id().to_string()),
            if head.is_branch() {
                head.shorthand().map(str::to_string)
            } else {
                None
            },
        ),
        // A new repository: HEAD names a branch that has no commit yet.
        Err(e) if e.code() == git2::ErrorCode::UnbornBranch => {
            let branch = repo
                .find_reference("HEAD")
                .ok()
                .and_then(|r| r.symbolic_target().map(str::to_string))
                .map(|t| t.trim_start_matches("refs/heads/").to_string());
            (None, branch)
        }
        Err(e) => return Err(format!("cannot read HEAD of {repository}: {}", e.message())),
    };
    let mut opts = git2::StatusOptions::new();
    opts.include_untracked(false)
        .include_ignored(false)
        .include_unmodified(false);
    let statuses = repo
        .statuses(Some(&mut opts))
        .map_err(|e| format!("cannot read the status of {repository}: {}", e.message()))?;
    let modified: Vec<String> = statuses
        .iter()
        .filter(|s| !s.status().is_empty() && !s.status().contains(git2::Status::WT_NEW))
        .filter_map(|s| s.path().map(str::to_string))
        .collect();
    Ok(Some(CodeState {
        repository,
        commit,
        branch,
        dirty: !modified.is_empty(),
        modified,
    }))
}

/// Why a recorded commit could not be written out.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum CheckoutProblem {
    /// The recorded repository cannot be opened (moved, removed, or never on this machine).
    RepositoryMissing(String),
    /// The repository opens but does not hold the commit (history rewritten, commit id edited).
    CommitMissing(String),
    /// Anything else: a damaged object, a file that cannot be written.
    Other(String),
}

/// What a checkout wrote.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Checkout {
    pub files: u64,
    pub symlinks: u64,
    /// Submodule paths (relative to the checkout): written as empty folders, since the
    /// commit records only the submodule's commit id, not its files.
    pub submodules: Vec<String>,
}

/// Writes the tree of `commit` in the repository at `repository` into `dest` (an empty or new
/// folder): every blob as a file (executable when git records mode 100755), symbolic links as
/// links (on Unix), folders as folders. Reads objects only; nothing in the repository changes.
pub fn checkout(repository: &Path, commit: &str, dest: &Path) -> Result<Checkout, CheckoutProblem> {
    let repo = git2::Repository::open(repository).map_err(|e| {
        CheckoutProblem::RepositoryMissing(format!(
            "cannot open the git repository {}: {}",
            repository.display(),
            e.message()
        ))
    })?;
    let oid = git2::Oid::from_str(commit)
        .map_err(|_| CheckoutProblem::CommitMissing(format!("\"{commit}\" is not a commit id")))?;
    let found = repo.find_commit(oid).map_err(|e| {
        if e.code() == git2::ErrorCode::NotFound {
            CheckoutProblem::CommitMissing(format!(
                "commit {commit} is not in the repository {} (was its history rewritten?)",
                repository.display()
            ))
        } else {
            CheckoutProblem::Other(format!("cannot read commit {commit}: {}", e.message()))
        }
    })?;
    let tree = found.tree().map_err(|e| {
        CheckoutProblem::Other(format!(
            "cannot read the tree of commit {commit}: {}",
            e.message()
        ))
    })?;
    std::fs::create_dir_all(dest)
        .map_err(|e| CheckoutProblem::Other(format!("cannot create {}: {e}", dest.display())))?;
    let mut done = Checkout::default();
    write_tree(&repo, &tree, dest, Path::new(""), &mut done)?;
    Ok(done)
}

fn write_tree(
    repo: &git2::Repository,
    tree: &git2::Tree<'_>,
    dir: &Path,
    rel: &Path,
    done: &mut Checkout,
) -> Result<(), CheckoutProblem> {
    let other = |what: &str, p: &Path, e: &dyn std::fmt::Display| {
        CheckoutProblem::Other(format!("cannot {what} {}: {e}", p.display()))
    };
    for entry in tree.iter() {
        let name = entry_name(&entry)?;
        let path = dir.join(&name);
        let rel_path = rel.join(&name);
        match entry.kind() {
            Some(git2::ObjectType::Tree) => {
                let sub = repo
                    .find_tree(entry.id())
                    .map_err(|e| other("read the folder", &rel_path, &e.message()))?;
                std::fs::create_dir_all(&path).map_err(|e| other("create", &path, &e))?;
                write_tree(repo, &sub, &path, &rel_path, done)?;
            }
            Some(git2::ObjectType::Blob) => {
                let blob = repo
                    .find_blob(entry.id())
                    .map_err(|e| other("read the file", &rel_path, &e.message()))?;
                if entry.filemode() == 0o120000 {
                    write_link(blob.content(), &path)
                        .map_err(|e| other("create the link", &path, &e))?;
                    done.symlinks += 1;
                } else {
                    std::fs::write(&path, blob.content()).map_err(|e| other("write", &path, &e))?;
                    set_mode(&path, entry.filemode() == 0o100755)
                        .map_err(|e| other("set the mode of", &path, &e))?;
                    done.files += 1;
                }
            }
            Some(git2::ObjectType::Commit) => {
                std::fs::create_dir_all(&path).map_err(|e| other("create", &path, &e))?;
                done.submodules.push(rel_path.display().to_string());
            }
            _ => {}
        }
    }
    Ok(())
}

/// A tree entry's name as one plain path component (git itself refuses others; a damaged or
/// hostile tree must not write outside the checkout).
fn entry_name(entry: &git2::TreeEntry<'_>) -> Result<std::path::PathBuf, CheckoutProblem> {
    let bytes = entry.name_bytes();
    #[cfg(unix)]
    let name = std::path::PathBuf::from(
        <std::ffi::OsStr as std::os::unix::ffi::OsStrExt>::from_bytes(bytes),
    );
    #[cfg(not(unix))]
    let name = std::path::PathBuf::from(String::from_utf8_lossy(bytes).into_owned());
    let mut parts = name.components();
    match (parts.next(), parts.next()) {
        (Some(std::path::Component::Normal(_)), None) if !bytes.contains(&b'/') => Ok(name),
        _ => Err(CheckoutProblem::Other(format!(
            "the commit holds a file named \"{}\", which is not a plain file name",
            String::from_utf8_lossy(bytes)
        ))),
    }
}

#[cfg(unix)]
fn write_link(target: &[u8], path: &Path) -> std::io::Result<()> {
    let target = <std::ffi::OsStr as std::os::unix::ffi::OsStrExt>::from_bytes(target);
    std::os::unix::fs::symlink(target, path)
}

#[cfg(not(unix))]
fn write_link(target: &[u8], path: &Path) -> std::io::Result<()> {
    // Without symbolic links the link is written as git does then: a file holding its target.
    std::fs::write(path, target)
}

#[cfg(unix)]
fn set_mode(path: &Path, executable: bool) -> std::io::Result<()> {
    use std::os::unix::fs::PermissionsExt;
    let mode = if executable { 0o755 } else { 0o644 };
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(mode))
}

#[cfg(not(unix))]
fn set_mode(_: &Path, _: bool) -> std::io::Result<()> {
    Ok(())
}
