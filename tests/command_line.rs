//! The command line as people expect it: every command's help has a worked example, exit codes
//! follow the documented classes (README, "Exit codes"), common mistakes get messages that name
//! the thing and the next command, colour follows `--color` and `NO_COLOR`, and the completion
//! scripts and manual pages are accepted by the programs that read them (bash, zsh and fish
//! themselves; groff for the roff of the pages). `tests/run` installs zsh, fish and groff when
//! they are missing.

mod common;

use std::process::Command;

use common::{assert_contains, every_command, Sandbox};

#[test]
fn every_command_has_help_with_a_worked_example() {
    let s = Sandbox::new();
    let all = every_command(&s);
    // The walk must have found the commands and the operations under `apply`.
    for expected in [
        vec!["receive"],
        vec!["clean"],
        vec!["clean", "trim"],
        vec!["clean", "summarize"],
        vec!["completions"],
        vec!["manual"],
    ] {
        let expected: Vec<String> = expected.into_iter().map(String::from).collect();
        assert!(all.contains(&expected), "{expected:?} not found in {all:?}");
    }
    let mut missing = Vec::new();
    for path in &all {
        let mut args: Vec<&str> = path.iter().map(String::as_str).collect();
        args.push("--help");
        let help = s.ok(&args);
        let Some(at) = help.find("Example") else {
            missing.push(path.join(" "));
            continue;
        };
        // The example is a command line someone can type: `sluice` and the command's own words.
        let example = &help[at..];
        let line = example
            .lines()
            .skip(1)
            .find(|l| !l.trim().is_empty())
            .unwrap_or_default();
        if !line
            .trim_start()
            .starts_with(&format!("sluice {}", path[0]))
        {
            missing.push(format!("{} (example line: {line:?})", path.join(" ")));
        }
    }
    assert!(
        missing.is_empty(),
        "these commands' --help has no \"Example\" followed by a `sluice ...` line: {missing:?}"
    );
}

#[test]
fn every_query_with_json_output_says_so_in_its_help() {
    // The documented `--json` commands; a command gaining --json must get a schema
    // (tests/json_output.rs checks that every such command has one).
    let s = Sandbox::new();
    for cmd in [
        "timeline",
        "about",
        "verify",
        "inspect",
        "run",
        "compare",
        "trace",
        "explain",
        "impact",
        "reproduce",
        "receive",
        "clean",
        "capture",
        "rerun",
        "withdraw",
        "identify",
        "identity",
        "endorse",
        "signatories",
        "meanings",
        "erase",
    ] {
        assert_contains(&s.ok(&[cmd, "--help"]), "--json");
    }
}

/// One row of the exit-code table: what runs, and the code the README promises.
struct Case {
    class: &'static str,
    args: &'static [&'static str],
    code: i32,
}

#[test]
fn exit_codes_follow_the_documented_classes() {
    let s = Sandbox::with_demo();
    s.file(
        "rules_fail.json",
        r#"{"sluice_rules": 2, "rules": [{"dimension": "validity", "column": "status", "one_of": ["done"]}]}"#,
    );
    s.file(
        "rules_pass.json",
        r#"{"sluice_rules": 2, "rules": [{"dimension": "uniqueness", "columns": ["order_id"]}]}"#,
    );
    s.file("bad.csv", "a,b\n1,2,3\n");
    let cases = [
        Case {
            class: "success: a query",
            args: &["timeline"],
            code: 0,
        },
        Case {
            class: "success: help",
            args: &["--help"],
            code: 0,
        },
        Case {
            class: "success: version",
            args: &["--version"],
            code: 0,
        },
        Case {
            class: "success: a diff that finds differences",
            args: &["compare", "quillby_orders:v1", "quillby_orders:v2"],
            code: 0,
        },
        Case {
            class: "success: checks that pass",
            args: &["inspect", "all_orders", "--rules", "rules_pass.json"],
            code: 0,
        },
        Case {
            class: "usage: reverting the first version of a dataset",
            args: &["withdraw", "all_orders:v1", "--why", "x"],
            code: 2,
        },
        Case {
            class: "usage: reverting an intake",
            args: &["withdraw", "quillby_orders:v1", "--why", "x"],
            code: 2,
        },
        Case {
            class: "usage: revert without a reason",
            args: &["withdraw", "all_orders:v5"],
            code: 2,
        },
        Case {
            class: "success: verify of an intact store",
            args: &["verify"],
            code: 0,
        },
        Case {
            class: "success: replay reproduced",
            args: &["reproduce", "q3_by_shop"],
            code: 0,
        },
        Case {
            class: "data failure: a check fails",
            args: &["inspect", "all_orders", "--rules", "rules_fail.json"],
            code: 1,
        },
        Case {
            class: "data failure: replay of outside work is not shown to reproduce",
            args: &["reproduce", "reviewed_orders"],
            code: 1,
        },
        Case {
            class: "data failure: amounts that cannot be read",
            args: &[
                "clean",
                "quillby_orders:v1",
                "number",
                "--columns",
                "customer",
                "--why",
                "x",
            ],
            code: 1,
        },
        Case {
            class: "usage (clap): unknown command",
            args: &["frobnicate"],
            code: 2,
        },
        Case {
            class: "usage (clap): unknown option",
            args: &["timeline", "--frobnicate"],
            code: 2,
        },
        Case {
            class: "usage (clap): missing argument",
            args: &["about"],
            code: 2,
        },
        Case {
            class: "usage (clap): bad option value",
            args: &["lineage", "--format", "png"],
            code: 2,
        },
        Case {
            class: "usage (clap): not a number",
            args: &["compare", "a", "b", "--limit", "many"],
            code: 2,
        },
        Case {
            class: "usage (clap): bad --color",
            args: &["--color", "sometimes", "timeline"],
            code: 2,
        },
        Case {
            class: "usage: unknown dataset",
            args: &["about", "nosuch"],
            code: 2,
        },
        Case {
            class: "usage: unknown version number",
            args: &["about", "all_orders:v99"],
            code: 2,
        },
        Case {
            class: "usage: unknown hash prefix",
            args: &["retrieve", "blake3:abcdef12"],
            code: 2,
        },
        Case {
            class: "usage: unknown column",
            args: &["trace", "all_orders", "--row", "1", "--column", "nosuch"],
            code: 2,
        },
        Case {
            class: "input: missing file",
            args: &["receive", "missing.csv", "--as", "x"],
            code: 2,
        },
        Case {
            class: "input: refused file",
            args: &["receive", "bad.csv", "--as", "x"],
            code: 2,
        },
        Case {
            class: "input: missing rules file",
            args: &["inspect", "all_orders", "--rules", "nope.json"],
            code: 2,
        },
        Case {
            class: "input: missing plan",
            args: &["run", "nope.json"],
            code: 2,
        },
    ];
    // Checks record their results, so they run first; every other case, failing or not,
    // must leave the store as it was.
    let (checks, others): (Vec<&Case>, Vec<&Case>) =
        cases.iter().partition(|c| c.args[0] == "inspect");
    let mut wrong = Vec::new();
    let mut before = String::new();
    for c in checks.into_iter().chain(others.iter().copied()) {
        if c.args[0] != "inspect" && before.is_empty() {
            before = s.snapshot();
        }
        let r = s.run(c.args);
        if r.code != c.code {
            wrong.push(format!(
                "{} (sluice {}): expected {}, got {}; stderr: {}",
                c.class,
                c.args.join(" "),
                c.code,
                r.code,
                r.stderr.trim()
            ));
        }
        if c.code == 2 && !r.stderr.starts_with("error: ") {
            wrong.push(format!(
                "{}: a usage error starts with \"error: \"; got {:?}",
                c.class, r.stderr
            ));
        }
    }
    assert!(wrong.is_empty(), "\n{}\n", wrong.join("\n"));
    assert_eq!(before, s.snapshot(), "a command changed the store");

    // No store at all is a usage error too, with the command that makes one.
    let empty = Sandbox::new();
    let err = empty.fails(2, &["timeline"]);
    assert_contains(&err, "create one with `sluice setup`");
}

#[test]
fn common_mistakes_name_the_thing_and_the_next_command() {
    let s = Sandbox::with_demo();
    let cases: &[(&[&str], &[&str])] = &[
        (
            &["about", "nosuch"],
            &["unknown version \"nosuch\"", "the datasets are: all_orders"],
        ),
        (
            &["about", "all_orders:v99"],
            &["has 12 versions", "`sluice timeline --dataset all_orders`"],
        ),
        (
            &["retrieve", "blake3:abcdef12"],
            &["no version's hash starts with", "`sluice timeline`"],
        ),
        (
            &["retrieve", "abcdef12"],
            &["write blake3: before the digits", "blake3:abcdef12"],
        ),
        (
            &["about", "all_orders:vx"],
            &["after the ':' comes a version number", "all_orders:v2"],
        ),
        (
            // The old `@` form, spelt in two pieces so that no rewriting of the sources changes it.
            &["about", concat!("all_orders", "@", "2")],
            &["a version is written NAME:vN", "all_orders:v2"],
        ),
        (
            &[
                "trace",
                "all_orders",
                "--row",
                "9999",
                "--column",
                "parts_cost",
            ],
            &[
                "data rows 1 to 440",
                "no row 9999",
                "`sluice retrieve all_orders:v12`",
            ],
        ),
        (
            &["trace", "all_orders", "--row", "1", "--column", "nosuch"],
            &["column \"nosuch\"", "its columns are: order_id"],
        ),
        (
            &[
                "trace",
                "all_orders",
                "--key",
                "order_id=ZZ",
                "--column",
                "parts_cost",
            ],
            &["order_id=ZZ", "`sluice retrieve all_orders:v12`"],
        ),
        (
            &[
                "explain",
                "all_orders",
                "--row",
                "1",
                "--column",
                "parts_cost",
            ],
            &["not made by summarize", "`sluice trace all_orders:v12"],
        ),
        (
            &["receive", "missing.csv", "--as", "x"],
            &["missing.csv: no such file", "check the path"],
        ),
        (
            &["receive", "exports", "--as", "x"],
            &["is a directory", "name a file"],
        ),
        (
            &["inspect", "all_orders", "--rules", "nope.json"],
            &["nope.json: no such file", "`sluice inspect --help`"],
        ),
        (
            &["run", "nope.json"],
            &["nope.json: no such file", "`sluice run --help`"],
        ),
        (
            &[
                "compare",
                "all_orders:v1",
                "all_orders:v2",
                "--key",
                "nosuch",
            ],
            &["key column \"nosuch\"", "pass --key"],
        ),
        (
            &["lineage", "--format", "png"],
            &["'png'", "possible values: dot, svg"],
        ),
        (&["clean", "all_orders", "trim"], &["--why <TEXT>"]),
        (
            &["rerun", "all_orders", "--with", "nothing"],
            &["expected NAME=FILE"],
        ),
    ];
    let mut wrong = Vec::new();
    for (args, needles) in cases {
        let r = s.run(args);
        for n in *needles {
            if !r.stderr.contains(n) {
                wrong.push(format!(
                    "sluice {}: {n:?} not in {:?}",
                    args.join(" "),
                    r.stderr
                ));
            }
        }
        // Messages are lowercase (clap's own "error:" prefix included).
        if let Some(first) = r
            .stderr
            .strip_prefix("error: ")
            .and_then(|t| t.chars().next())
        {
            if first.is_uppercase() {
                wrong.push(format!(
                    "sluice {}: message starts in upper case: {:?}",
                    args.join(" "),
                    r.stderr
                ));
            }
        }
        if r.stderr.contains("caused by: No such") {
            wrong.push(format!(
                "sluice {}: cause not lowercase: {:?}",
                args.join(" "),
                r.stderr
            ));
        }
    }
    let empty = Sandbox::new();
    let r = empty.run(&["--store", "nowhere", "timeline"]);
    for n in ["no store at", "`sluice setup", "--store"] {
        if !r.stderr.contains(n) {
            wrong.push(format!("--store nowhere log: {n:?} not in {:?}", r.stderr));
        }
    }
    assert!(wrong.is_empty(), "\n{}\n", wrong.join("\n"));
}

fn has_escape(text: &str) -> bool {
    text.contains('\u{1b}')
}

#[test]
fn colour_only_when_asked_or_on_a_terminal() {
    let s = Sandbox::with_demo();
    let diff = [
        "compare",
        "quillby_orders:v1",
        "quillby_orders:v2",
        "--limit",
        "2",
    ];
    // The sandbox sets NO_COLOR=1, and the output is a pipe: plain.
    assert!(!has_escape(&s.ok(&diff)));
    // Piped without NO_COLOR: still plain (auto colours only a terminal).
    let plain = s
        .command(&diff)
        .env_remove("NO_COLOR")
        .output()
        .expect("run");
    assert!(!has_escape(&String::from_utf8_lossy(&plain.stdout)));
    // --color always wins over the pipe and over NO_COLOR.
    let mut always = vec!["--color", "always"];
    always.extend(diff);
    let coloured = s.ok(&always);
    assert!(
        has_escape(&coloured),
        "no colour with --color always:\n{coloured}"
    );
    // The colours are ANSI SGR red for removed and green for added characters (ECMA-48).
    assert!(coloured.contains("\u{1b}[31m") || coloured.contains("\u{1b}[32m"));
    let mut never = vec!["--color=never"];
    never.extend(diff);
    assert!(!has_escape(&s.ok(&never)));
    // An error with --color always has a coloured prefix; without, none.
    let r = s.run(&["--color", "always", "about", "nosuch"]);
    assert!(has_escape(&r.stderr));
    let r = s.run(&["about", "nosuch"]);
    assert!(r.stderr.starts_with("error: unknown version"));
    // clap's own help follows --color too.
    let help = s
        .command(&["--color", "never", "--help"])
        .env_remove("NO_COLOR")
        .output()
        .expect("run");
    assert!(!has_escape(&String::from_utf8_lossy(&help.stdout)));
}

/// A program the checks need; they fail (not skip) without it, saying how to install it.
fn program(name: &str) -> String {
    let found = Command::new("sh")
        .args(["-c", &format!("command -v {name}")])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    assert!(
        found,
        "{name} is needed to check what sluice writes for it; install it (Debian: apt-get install \
         zsh fish groff-base man-db) or run tests/run, which does"
    );
    name.to_string()
}

#[test]
fn completion_scripts_are_accepted_by_their_shells() {
    let s = Sandbox::new();
    for (shell, check) in [
        ("bash", vec!["-n"]),
        ("zsh", vec!["-n"]),
        ("fish", vec!["--no-execute"]),
    ] {
        let script = s.ok(&["completions", shell]);
        assert_contains(&script, "sluice");
        // The script knows the commands and a nested operation.
        assert_contains(&script, "receive");
        assert_contains(&script, "summarize");
        let file = s.file(&format!("completion.{shell}"), &script);
        let exe = program(shell);
        let out = Command::new(&exe)
            .args(&check)
            .arg(&file)
            .output()
            .expect("run the shell");
        assert!(
            out.status.success() && out.stderr.is_empty(),
            "{shell} refuses the script: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    // bash: sourcing the script registers a completion for `sluice` (bash's own `complete -p`).
    let file = s.path().join("completion.bash");
    let out = Command::new(program("bash"))
        .args([
            "-c",
            &format!("source '{}' && complete -p sluice", file.display()),
        ])
        .output()
        .expect("run bash");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_contains(&String::from_utf8_lossy(&out.stdout), "sluice");
    // An unknown shell is a usage error.
    s.fails(2, &["completions", "tcsh"]);
}

/// groff's own check of a page: no warnings at all (`-ww`), output discarded (`-z`).
fn groff_warnings(page: &std::path::Path) -> String {
    let out = Command::new(program("groff"))
        .args(["-man", "-Tutf8", "-ww", "-z"])
        .arg(page)
        .output()
        .expect("run groff");
    assert!(out.status.success(), "groff failed on {}", page.display());
    String::from_utf8_lossy(&out.stderr).into_owned()
}

#[test]
fn manual_pages_are_valid_roff_with_every_command() {
    let s = Sandbox::new();
    let page = s.ok(&["manual"]);
    assert!(
        page.starts_with(".ie") || page.contains(".TH sluice 1"),
        "{page}"
    );
    for section in [
        ".SH NAME",
        ".SH SYNOPSIS",
        ".SH \"EXIT STATUS\"",
        ".SH ENVIRONMENT",
        "NO_COLOR",
        "not legal advice",
    ] {
        assert_contains(&page, section);
    }
    let top = s.file("sluice.1", &page);
    let warnings = groff_warnings(&top);
    assert!(
        warnings.is_empty(),
        "groff warns about sluice.1:\n{warnings}"
    );
    // Rendered, the page reads as text with the commands in it.
    let text = Command::new("groff")
        .args(["-man", "-Tutf8", "-P", "-cbou"])
        .arg(&top)
        .output()
        .expect("run groff");
    let text = String::from_utf8_lossy(&text.stdout);
    assert!(
        text.contains("receive") && text.contains("EXIT STATUS"),
        "{text}"
    );

    // One page per command and operation, each valid.
    let out = s.ok(&["manual", "--dir", "man1"]);
    assert_contains(&out, "manual pages");
    let commands = every_command(&s);
    let mut missing = Vec::new();
    for path in &commands {
        let name = format!("sluice-{}.1", path.join("-"));
        let file = s.path().join("man1").join(&name);
        if !file.is_file() {
            missing.push(name);
            continue;
        }
        let warnings = groff_warnings(&file);
        assert!(warnings.is_empty(), "groff warns about {name}:\n{warnings}");
    }
    assert!(missing.is_empty(), "no page for {missing:?}");
    // man itself reads the page (man-db's `man -l`), when it is installed.
    let man = Command::new(program("man"))
        .arg("-l")
        .arg(s.path().join("man1/sluice-trace.1"))
        .env("MANPAGER", "cat")
        .env("PAGER", "cat")
        .output()
        .expect("run man");
    assert!(
        man.status.success(),
        "{}",
        String::from_utf8_lossy(&man.stderr)
    );
    assert_contains(&String::from_utf8_lossy(&man.stdout), "--column");
}

/// Runs sluice with standard error (and output) on a pseudo-terminal, through util-linux's
/// `script`, with the bar's delay at 0 so that even short work draws it.
fn on_a_terminal(s: &Sandbox, args: &str) -> String {
    let line = format!("{} {args}", env!("CARGO_BIN_EXE_sluice"));
    let out = Command::new(program("script"))
        .args(["-qec", &line, "/dev/null"])
        .current_dir(s.path())
        .env("SLUICE_PERSON", common::PERSON)
        .env("SLUICE_EMAIL", common::EMAIL)
        .env("SLUICE_PROGRESS_DELAY_MS", "0")
        .env("TERM", "xterm")
        .env_remove("SLUICE_STORE")
        .output()
        .expect("run script");
    assert!(out.status.success(), "sluice {args} failed on a terminal");
    String::from_utf8_lossy(&out.stdout).into_owned()
}

#[test]
fn progress_is_drawn_only_on_a_terminal_and_never_with_json() {
    let s = Sandbox::with_store();
    let mut rows = String::from("id,name\n");
    for i in 0..50_000 {
        rows.push_str(&format!("{i}, name {i}\n"));
    }
    s.file("orders.csv", &rows);
    // Piped: nothing on standard error, even with no delay.
    let r = s
        .command(&["receive", "orders.csv", "--as", "orders", "--why", "w"])
        .env("SLUICE_PROGRESS_DELAY_MS", "0")
        .output()
        .expect("run");
    assert!(r.status.success());
    assert!(
        r.stderr.is_empty(),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
    // On a terminal: the bar names the work, and is cleared before the report.
    let screen = on_a_terminal(&s, "clean orders trim --why pads");
    assert_contains(&screen, "reading orders:v1");
    assert_contains(&screen, "\r\u{1b}[Krecorded orders:v2");
    // With --json: no bar, only the JSON.
    let screen = on_a_terminal(&s, "reproduce orders --json");
    assert!(!screen.contains("reproducing"), "{screen}");
    assert!(screen.trim_start().starts_with('{'), "{screen}");
}
