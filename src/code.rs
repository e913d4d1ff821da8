//! Code capture: what sluice learns from git about the people and code at work. This is the only
//! module that uses git2. It reads the configured identity (user.name, user.email) of the
//! repository around the working directory, falling back to the global configuration, and,
//! for an outside command, the state of the code it ran: HEAD commit, branch, modified files.

use std::path::Path;

/// The git identity as `Name <email>` (or just the name, or just the email), if configured.
pub fn git_identity(cwd: &Path) -> Option<String> {
    let config = match git2::Repository::discover(cwd) {
        // A repository's config includes the global and system levels beneath its own.
        Ok(repo) => repo.config().ok(),
        Err(_) => git2::Config::open_default().ok(),
    }?;
    let name = config
        .get_string("user.name")
        .ok()
        .filter(|s| !s.trim().is_empty());
    let email = config
        .get_string("user.email")
        .ok()
        .filter(|s| !s.trim().is_empty());
    match (name, email) {
        (Some(n), Some(e)) => Some(format!("{} <{}>", n.trim(), e.trim())),
        (Some(n), None) => Some(n.trim().to_string()),
        (None, Some(e)) => Some(format!("<{}>", e.trim())),
        (None, None) => None,
    }
}

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
