//! The interface speaks its own vocabulary: every command's help (and every clean operation's),
//! the manual pages and the completion scripts are read, and none may use a name sluice had
//! before it chose its own (the list is below). Matching is by whole word, and the command
//! words that are also ordinary English ("show", "apply", "log", ...) are looked for only
//! where they would be commands: after `sluice `, or as an entry of a command list.

mod common;

use common::*;

/// Old command names, looked for as commands (`sluice NAME`, or a command-list entry).
const OLD_COMMANDS: &[&str] = &[
    "init", "ingest", "apply", "check", "exec", "graph", "replay", "revert", "cat", "diff", "log",
    "show",
];

/// Old words looked for anywhere, as whole words: options, the environment variable, the name
/// of a stopping check, and old command names that are not ordinary English.
const OLD_WORDS: &[&str] = &[
    "--onto",
    "--force",
    "--stat",
    "--find",
    "--agent",
    "SLUICE_AGENT",
    "gate",
    "gates",
    "replay",
    "replayed",
    "ingest",
    "ingested",
    "revert",
];

/// Where an old word is the right word after all, with the reason.
const ALLOWED: &[(&str, &str, &str)] = &[(
    "clean replace",
    "--find",
    "replace's own option: the text to find inside values, not the lookup of a file",
)];

struct Patterns {
    words: Vec<(&'static str, regex::Regex)>,
    commands: Vec<(&'static str, regex::Regex, regex::Regex)>,
    version_at: regex::Regex,
}

fn patterns() -> &'static Patterns {
    static P: std::sync::OnceLock<Patterns> = std::sync::OnceLock::new();
    P.get_or_init(|| Patterns {
        words: OLD_WORDS
            .iter()
            .map(|w| {
                let re = format!(r"(^|[^\w-]){}($|[^\w-])", regex::escape(w));
                (*w, regex::Regex::new(&re).unwrap())
            })
            .collect(),
        commands: OLD_COMMANDS
            .iter()
            .map(|c| {
                (
                    *c,
                    regex::Regex::new(&format!(r"\bsluice[ -]{c}\b")).unwrap(),
                    regex::Regex::new(&format!(r"^\s{{2}}{c}\s")).unwrap(),
                )
            })
            .collect(),
        version_at: regex::Regex::new(r"[A-Za-z_][A-Za-z0-9_.-]*@[0-9]+\b").unwrap(),
    })
}

/// Every old name in `text`, with the line it is on.
fn old_names(text: &str, context: &str) -> Vec<String> {
    let p = patterns();
    let mut found = Vec::new();
    for line in text.lines() {
        for (w, re) in &p.words {
            if ALLOWED.iter().any(|(c, a, _)| *c == context && a == w) {
                continue;
            }
            if re.is_match(line) {
                found.push(format!("{context}: \"{w}\" in: {}", line.trim()));
            }
        }
        for (c, as_command, as_entry) in &p.commands {
            if as_command.is_match(line) || as_entry.is_match(line) {
                found.push(format!("{context}: command \"{c}\" in: {}", line.trim()));
            }
        }
        if let Some(m) = p.version_at.find(line) {
            found.push(format!(
                "{context}: reference \"{}\" (write NAME:vN) in: {}",
                m.as_str(),
                line.trim()
            ));
        }
    }
    found
}

/// The command names listed under "Commands:" in a help text.
fn commands_in(help: &str) -> Vec<String> {
    help.lines()
        .skip_while(|l| !l.starts_with("Commands:"))
        .skip(1)
        .take_while(|l| l.starts_with("  "))
        .filter(|l| !l.starts_with("   "))
        .filter_map(|l| l.split_whitespace().next().map(str::to_string))
        .filter(|c| c != "help")
        .collect()
}

#[test]
fn the_word_lists_find_what_they_are_for_and_pass_plain_english() {
    // Each kind of old name is found...
    for (text, what) in [
        (
            "Example:\n  sluice ingest x.csv --as x",
            "command \"ingest\"",
        ),
        ("  show     Show one version", "command \"show\""),
        ("use --onto NAME=FILE", "\"--onto\""),
        ("set SLUICE_AGENT first", "\"SLUICE_AGENT\""),
        ("a failing gate stops the run", "\"gate\""),
        ("e.g. orders@2", "reference \"orders@2\""),
    ] {
        let found = old_names(text, "t");
        assert!(found.iter().any(|f| f.contains(what)), "{text}: {found:?}");
    }
    // ... and ordinary English is not.
    for text in [
        "Show the differences between two versions",
        "apply the rules shown; check the log of the audit chain",
        "the status column (--status)",
        "e-mail ada@example.org",
        "the navigation bar",
    ] {
        assert_eq!(old_names(text, "t"), Vec::<String>::new(), "{text}");
    }
}

#[test]
fn no_help_text_uses_an_old_name() {
    let s = Sandbox::new();
    let top = s.ok(&["--help"]);
    let mut found = old_names(&top, "sluice");
    let commands = commands_in(&top);
    assert!(
        commands.len() >= 20,
        "the command list was not read: {commands:?}"
    );
    let mut walked = 0;
    for c in &commands {
        let help = s.ok(&[c, "--help"]);
        found.extend(old_names(&help, c));
        walked += 1;
        for sub in commands_in(&help) {
            let context = format!("{c} {sub}");
            found.extend(old_names(&s.ok(&[c, &sub, "--help"]), &context));
            walked += 1;
        }
    }
    assert!(walked > 35, "only {walked} help texts were read");
    assert!(found.is_empty(), "\n{}\n", found.join("\n"));
}

#[test]
fn manual_pages_and_completions_use_no_old_name() {
    let s = Sandbox::new();
    s.ok(&["manual", "--dir", "man"]);
    let mut found = Vec::new();
    let mut pages = 0;
    for e in std::fs::read_dir(s.path().join("man")).unwrap().flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let text = std::fs::read_to_string(e.path()).unwrap();
        // roff escapes hyphens in options (\-\-onto) and marks fonts (\fBname\fR); read
        // the words as typed.
        let text = text
            .replace("\\-", "-")
            .replace("\\fB", " ")
            .replace("\\fI", " ")
            .replace("\\fR", " ")
            .replace("\\fP", " ");
        // The page for `clean replace` may name its own --find.
        let context = if name == "sluice-clean-replace.1" {
            "clean replace"
        } else {
            name.as_str()
        };
        found.extend(old_names(&text, context));
        pages += 1;
        for old in OLD_COMMANDS {
            assert!(
                !name.starts_with(&format!("sluice-{old}."))
                    && !name.starts_with(&format!("sluice-{old}-")),
                "a manual page for an old command: {name}"
            );
        }
    }
    assert!(pages > 25, "only {pages} manual pages");
    for shell in ["bash", "zsh", "fish"] {
        let script = s.ok(&["completions", shell]);
        for c in OLD_COMMANDS {
            // A completion script names commands as quoted words ('show:...' in zsh, "show" in
            // fish) or in case labels (sluice,show) in bash; descriptions are English.
            let re = regex::Regex::new(&format!(r"['\x22]{c}[:'\x22]|,{c}\)|__{c}\b")).unwrap();
            if script.lines().any(|l| re.is_match(l)) {
                found.push(format!("{shell} completions: command \"{c}\""));
            }
        }
        for w in ["--onto", "--force", "--stat", "--agent"] {
            if script.contains(w) {
                found.push(format!("{shell} completions: \"{w}\""));
            }
        }
    }
    assert!(found.is_empty(), "\n{}\n", found.join("\n"));
}

/// The commands that say which versions' bytes are kept use words of our own, chosen as
/// DEVELOPERS.md's "Names of our own" says: none is a command word of version control or of
/// data-versioning and build tools (from memory of those tools' command lists, common
/// knowledge in the trade), whose storage verbs (check in and out, fetch, pin, prune, collect
/// garbage, cache, materialize) would suggest their behaviour; and each has a manual page and
/// a help text of its own.
#[test]
fn the_storage_commands_use_words_of_our_own() {
    const BORROWED: &[&str] = &[
        "add",
        "commit",
        "checkout",
        "fetch",
        "pull",
        "push",
        "pin",
        "unpin",
        "prune",
        "gc",
        "cache",
        "materialize",
        "materialise",
        "stash",
        "lfs",
        "lock",
        "unlock",
        "archive",
    ];
    let s = Sandbox::new();
    let commands = commands_in(&s.ok(&["--help"]));
    for ours in ["retain", "recompute", "evict"] {
        assert!(commands.iter().any(|c| c == ours), "{ours} in {commands:?}");
        let help = s.ok(&[ours, "--help"]);
        assert!(old_names(&help, ours).is_empty(), "{help}");
        let words = help.split_whitespace().collect::<Vec<_>>().join(" ");
        assert_contains(&words, "recorded in the audit log");
    }
    for c in &commands {
        assert!(
            !BORROWED.contains(&c.as_str()),
            "`sluice {c}` borrows another tool's storage verb"
        );
    }
    s.ok(&["manual", "--dir", "man"]);
    for ours in ["retain", "recompute", "evict"] {
        assert!(
            s.path().join(format!("man/sluice-{ours}.1")).is_file(),
            "a manual page for {ours}"
        );
    }
}
