//! Who is recorded as acting: --person, then SLUICE_PERSON, then git's configured user (the
//! repository's config, then the global one), then the operating system user.

mod common;

use std::process::Command;

use common::*;

fn git(dir: &std::path::Path, args: &[&str]) {
    let st = Command::new("git")
        .args(args)
        .current_dir(dir)
        .env("HOME", dir)
        .env("GIT_CONFIG_NOSYSTEM", "1")
        .status()
        .expect("git is needed for this test");
    assert!(st.success(), "git {args:?} failed");
}

fn recorded_agent(s: &Sandbox, home: &std::path::Path, envs: &[(&str, &str)]) -> String {
    // New bytes each time, so that every call records a step.
    let n = s
        .json(&["timeline", "--json"])
        .as_array()
        .map_or(0, |a| a.len());
    s.file("a.csv", format!("id\n{n}\n"));
    let mut c = s.command(&["receive", "a.csv", "--as", "things"]);
    c.env_remove("SLUICE_PERSON")
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
    let log = s.json(&["timeline", "--json"]);
    log[0]["step"]["agent"].as_str().unwrap().to_string()
}

#[test]
fn git_repository_identity_is_used_when_nothing_else_is_given() {
    let s = Sandbox::with_store();
    let home = tempfile::tempdir().unwrap();
    git(s.path(), &["init", "-q"]);
    git(s.path(), &["config", "user.name", "Pat Mechanic"]);
    git(s.path(), &["config", "user.email", "pat@example.org"]);
    assert_eq!(
        recorded_agent(&s, home.path(), &[]),
        "Pat Mechanic <pat@example.org>"
    );
    // SLUICE_PERSON wins over git.
    assert_eq!(
        recorded_agent(
            &s,
            home.path(),
            &[("SLUICE_PERSON", "Lee Auditor <lee@example.net>")]
        ),
        "Lee Auditor <lee@example.net>"
    );
}

#[test]
fn global_git_identity_then_os_user() {
    let s = Sandbox::with_store();
    let home = tempfile::tempdir().unwrap();
    // No repository here and no global config: the operating system user.
    assert_eq!(
        recorded_agent(&s, home.path(), &[("USER", "tillclerk")]),
        "tillclerk"
    );
    // A global config in HOME gives the git identity.
    std::fs::write(
        home.path().join(".gitconfig"),
        "[user]\n\tname = Sam Global\n\temail = sam@example.org\n",
    )
    .unwrap();
    assert_eq!(
        recorded_agent(&s, home.path(), &[("USER", "tillclerk")]),
        "Sam Global <sam@example.org>"
    );
}
