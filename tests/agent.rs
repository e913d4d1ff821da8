//! Who is recorded as acting: --person and --email, then SLUICE_PERSON and SLUICE_EMAIL, then
//! the store's setting (`sluice identity`, kept in the audit chain), then the operating system
//! user. git's configured user is never read, even when one is configured.

mod common;

use std::process::Command;

use common::*;

/// Runs `receive` of new bytes with exactly the identity sources given, and returns who the
/// step was recorded for.
fn recorded_agent(
    s: &Sandbox,
    home: &std::path::Path,
    args: &[&str],
    envs: &[(&str, &str)],
) -> String {
    // New bytes each time, so that every call records a step.
    let n = s
        .json(&["timeline", "--json"])
        .as_array()
        .map_or(0, |a| a.len());
    s.file("a.csv", format!("id\n{n}\n"));
    let mut all = vec!["receive", "a.csv", "--as", "things"];
    all.extend_from_slice(args);
    let mut c = s.command(&all);
    c.env_remove("SLUICE_PERSON")
        .env_remove("SLUICE_EMAIL")
        .env("HOME", home)
        .env("XDG_CONFIG_HOME", home.join(".config"))
        .env("GIT_CONFIG_NOSYSTEM", "1")
        .env_remove("USER")
        .env_remove("LOGNAME")
        .env_remove("USERNAME");
    for (k, v) in envs {
        c.env(k, v);
    }
    let out = c.output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The timeline is oldest first: the step just recorded is the last.
    let log = s.json(&["timeline", "--json"]);
    let last = log.as_array().unwrap().last().unwrap().clone();
    last["step"]["agent"].as_str().unwrap().to_string()
}

#[test]
fn identity_comes_from_options_environment_store_then_the_os_user() {
    let s = Sandbox::with_store();
    let home = tempfile::tempdir().unwrap();
    // A git identity in HOME and in a repository here: never read.
    std::fs::write(
        home.path().join(".gitconfig"),
        "[user]\n\tname = Sam Global\n\temail = sam@example.org\n",
    )
    .unwrap();
    // (Where git is installed; the test holds without it too.)
    let _ = Command::new("git")
        .args(["init", "-q"])
        .current_dir(s.path())
        .env("HOME", home.path())
        .status();
    // Nothing given: the operating system user.
    assert_eq!(
        recorded_agent(&s, home.path(), &[], &[("USER", "tillclerk")]),
        "tillclerk"
    );
    // The store's setting comes before the operating system user.
    s.ok(&[
        "identity",
        "--name",
        "Ada Moss",
        "--email",
        "ada@example.org",
    ]);
    assert_eq!(
        recorded_agent(&s, home.path(), &[], &[("USER", "tillclerk")]),
        "Ada Moss (ada@example.org)"
    );
    // The environment comes before the store's setting.
    assert_eq!(
        recorded_agent(
            &s,
            home.path(),
            &[],
            &[
                ("SLUICE_PERSON", "Lee Auditor"),
                ("SLUICE_EMAIL", "lee@example.net")
            ]
        ),
        "Lee Auditor (lee@example.net)"
    );
    // The options come before everything.
    assert_eq!(
        recorded_agent(
            &s,
            home.path(),
            &["--person", "Bo Reed"],
            &[("SLUICE_PERSON", "Lee Auditor")]
        ),
        "Bo Reed"
    );
    // Setting the store's default person is itself in the audit chain, and verifies.
    let chain = s.ok(&["verify"]);
    assert_contains(&chain, "intact");
    let id = s.json(&["identity", "--json"]);
    assert_eq!(id["store_setting"]["name"], "Ada Moss");
    assert_eq!(id["store_setting"]["email"], "ada@example.org");
}

#[test]
fn an_empty_person_is_refused_and_nothing_is_recorded() {
    let s = Sandbox::with_store();
    s.file("a.csv", "id\n1\n");
    let err = s.fails(2, &["receive", "a.csv", "--as", "things", "--person", " "]);
    assert_contains(&err, "--person is empty");
    assert_eq!(s.json(&["timeline", "--json"]), serde_json::json!([]));
    let err = s.fails(2, &["identity", "--name", ""]);
    assert_contains(&err, "--name is empty");
}

#[test]
fn identities_of_older_stores_read_back_into_name_and_address() {
    // The form older stores recorded, "Name <email>", and the current one mean the same.
    let old = sluice::model::Agent::parse_identity("Pat Mechanic <pat@example.org>", "store");
    assert_eq!(old.name, "Pat Mechanic");
    assert_eq!(old.email.as_deref(), Some("pat@example.org"));
    assert_eq!(old.identity(), "Pat Mechanic (pat@example.org)");
}

#[test]
fn with_no_user_in_the_environment_the_account_name_is_recorded() {
    // Services and `env -i` start processes without USER, LOGNAME or USERNAME: the account the
    // process runs as is still known to the system. Outside reference: coreutils' `id -un`
    // names the same account.
    let s = Sandbox::with_store();
    let home = tempfile::tempdir().unwrap();
    let expected = Command::new("id").arg("-un").output().unwrap();
    assert!(expected.status.success());
    let expected = String::from_utf8(expected.stdout)
        .unwrap()
        .trim()
        .to_string();
    assert!(!expected.is_empty());
    assert_eq!(recorded_agent(&s, home.path(), &[], &[]), expected);
}
