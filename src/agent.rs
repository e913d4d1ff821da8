//! Who is acting: the agent identity recorded with every step and audit entry. The order is
//! `--agent`, then `SLUICE_AGENT`, then git's configured user (repository, then global), then the
//! operating system's user name. The caller passes in the option and environment values, so the
//! engine itself reads no environment variable.

use std::path::Path;

use crate::model::Agent;

/// Resolves the agent from the sources in order of precedence.
pub fn resolve(
    option: Option<&str>,
    env_agent: Option<&str>,
    os_user: Option<&str>,
    cwd: &Path,
) -> Agent {
    let clean = |s: Option<&str>| {
        s.map(str::trim)
            .filter(|s| !s.is_empty())
            .map(str::to_string)
    };
    if let Some(a) = clean(option) {
        return Agent {
            identity: a,
            source: "option".into(),
        };
    }
    if let Some(a) = clean(env_agent) {
        return Agent {
            identity: a,
            source: "environment".into(),
        };
    }
    if let Some(a) = crate::code::git_identity(cwd) {
        return Agent {
            identity: a,
            source: "git".into(),
        };
    }
    match clean(os_user) {
        Some(u) => Agent {
            identity: u,
            source: "os".into(),
        },
        None => Agent {
            identity: "unknown user".into(),
            source: "os".into(),
        },
    }
}
