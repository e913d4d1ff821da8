//! Who is acting: the agent recorded with every step and audit entry. The order is `--person`
//! and `--email`, then `SLUICE_PERSON` and `SLUICE_EMAIL`, then the store's setting (made with
//! `sluice identity`, kept in the audit chain), then the operating system's user name. The
//! caller passes in the option and environment values, so the engine reads no environment
//! variable; nothing is read from any version-control configuration.

use crate::error::{ErrorKind, Result};
use crate::model::{Agent, AuditEntry};
use crate::store::Store;

/// The audit action that sets a store's default person.
pub const SET_ACTION: &str = "identity_set";

/// The sources of an identity, as the caller found them.
#[derive(Debug, Clone, Default)]
pub struct Sources<'a> {
    pub option_name: Option<&'a str>,
    pub option_email: Option<&'a str>,
    pub env_name: Option<&'a str>,
    pub env_email: Option<&'a str>,
    /// The store's setting, if a store is open ([`store_setting`]).
    pub store: Option<Agent>,
    pub os_user: Option<&'a str>,
}

/// Resolves the agent from the sources in order of precedence. A `--person` given but blank is
/// refused: a step must not be recorded with no one's name on it.
pub fn resolve(s: &Sources<'_>) -> Result<Agent> {
    let clean = |v: Option<&str>| {
        v.map(str::trim)
            .filter(|v| !v.is_empty())
            .map(str::to_string)
    };
    if let Some(given) = s.option_name {
        let name = clean(Some(given)).ok_or_else(|| {
            crate::Error::from(ErrorKind::Usage(
                "--person is empty; give the name of the person acting, e.g. --person \"Ada Moss\""
                    .into(),
            ))
        })?;
        let email = clean(s.option_email).or_else(|| clean(s.env_email));
        return Ok(Agent::new(&name, email.as_deref(), "option"));
    }
    if let Some(name) = clean(s.env_name) {
        let email = clean(s.option_email).or_else(|| clean(s.env_email));
        return Ok(Agent::new(&name, email.as_deref(), "environment"));
    }
    if let Some(mut a) = s.store.clone() {
        if let Some(e) = clean(s.option_email).or_else(|| clean(s.env_email)) {
            a.email = Some(e);
        }
        return Ok(a);
    }
    let email = clean(s.option_email).or_else(|| clean(s.env_email));
    Ok(match clean(s.os_user) {
        Some(u) => Agent::new(&u, email.as_deref(), "os"),
        None => Agent::new("unknown user", email.as_deref(), "os"),
    })
}

/// The store's default person: the latest `identity_set` entry of its audit chain.
pub fn store_setting(store: &Store) -> Result<Option<Agent>> {
    Ok(store
        .lineage
        .audit_entries()?
        .iter()
        .rev()
        .find(|e| e.action == SET_ACTION)
        .map(setting_of))
}

fn setting_of(e: &AuditEntry) -> Agent {
    let d: serde_json::Value = serde_json::from_str(&e.details).unwrap_or_default();
    Agent::new(
        d["name"].as_str().unwrap_or(""),
        d["email"].as_str(),
        "store",
    )
}

/// Sets the store's default person, recorded in the audit chain by `by`.
pub fn set_store_setting(store: &mut Store, person: &Agent, by: &Agent) -> Result<AuditEntry> {
    if person.name.is_empty() {
        return Err(ErrorKind::Usage(
            "--name is empty; give the name of the person acting, e.g. --name \"Ada Moss\"".into(),
        )
        .into());
    }
    let at = crate::clock::now_rfc3339();
    let details = serde_json::json!({ "name": person.name, "email": person.email });
    let subject = person.identity();
    store.write(|tx| tx.audit(by, SET_ACTION, &subject, &details, &at))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn order_of_precedence() {
        let mut s = Sources {
            option_name: Some("Ada Moss"),
            env_name: Some("Lee Auditor"),
            env_email: Some("lee@example.net"),
            os_user: Some("ada"),
            ..Sources::default()
        };
        let a = resolve(&s).unwrap();
        assert_eq!((a.name.as_str(), a.source.as_str()), ("Ada Moss", "option"));
        s.option_name = None;
        let a = resolve(&s).unwrap();
        assert_eq!(a.identity(), "Lee Auditor (lee@example.net)");
        s.env_name = None;
        s.store = Some(Agent::new("Bo Reed", None, "store"));
        assert_eq!(resolve(&s).unwrap().identity(), "Bo Reed (lee@example.net)");
        s.store = None;
        assert_eq!(resolve(&s).unwrap().source, "os");
    }

    #[test]
    fn an_empty_person_is_refused() {
        let s = Sources {
            option_name: Some("  "),
            ..Sources::default()
        };
        assert!(resolve(&s).is_err());
    }

    #[test]
    fn old_and_new_identities_read_back() {
        let a = Agent::parse_identity("Ada Moss <ada@example.org>", "store");
        assert_eq!(
            (a.name.as_str(), a.email.as_deref()),
            ("Ada Moss", Some("ada@example.org"))
        );
        let b = Agent::parse_identity("Ada Moss (ada@example.org)", "store");
        assert_eq!(a.name, b.name);
        assert_eq!(a.email, b.email);
        let c = Agent::parse_identity("Ada Moss (night shift)", "store");
        assert_eq!(c.name, "Ada Moss (night shift)");
    }
}
