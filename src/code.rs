//! Code capture: what sluice learns from git about the people and code at work. This is the only
//! module that uses git2. For now it reads the configured identity (user.name, user.email) of
//! the repository around the working directory, falling back to the global configuration.

use std::path::Path;

/// The git identity as "Name <email>" (or just the name, or just the email), if configured.
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
