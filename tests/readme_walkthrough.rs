//! The README tried as a newcomer would: every ```console block of README.md is run, command by
//! command, as plain shell commands in one fresh folder, in the order the README shows them, and
//! what each prints is compared with the lines the README shows under it. The README is the one
//! source of truth; this file only reads it.
//!
//! The format of a block (also in DEVELOPERS.md, "The README walkthrough"):
//! - a line starting with `$ ` is a command (a trailing `\` continues it on the next line);
//!   `cd DIR` changes the folder the next commands run in; every other command runs through
//!   `bash -c` with the built `sluice` first on PATH and the README's agent, Robin Example;
//! - the lines after it, up to the next command or the end of the block, are its output: what
//!   it writes to standard output, then, when it fails, what it writes to standard error; a
//!   command that fails must show an `error:` line;
//! - a line that is only `...` (indented or not) stands for any number of lines left out; the
//!   other lines must appear in order and, between two `...`, one right after another; without
//!   a `...` at the start (end), the first (last) lines must be the first (last) printed.
//!
//! Masking, applied to both sides before comparing: RFC 3339 times (`2026-12-02T00:35:29.265Z`)
//! read as `<time>`; a path under the folder the command runs in, or else under the folder the
//! walkthrough started in, reads relative to it, as a newcomer sees it in their own folder
//! (`/tmp/xyz/sluice-demo/exports/o.csv` as `exports/o.csv` after `cd sluice-demo`);
//! trailing white space is ignored. Hashes are compared as shown: the demo is deterministic.
//!
//! A console block right after the line `<!-- a fresh demo -->` runs on its own, in a fresh
//! folder where `sluice demo` has just run (after `cd sluice-demo`), so that an example of one
//! command shows what it does to the demo's store as the demo leaves it, whatever the blocks
//! before it did. Blocks that illustrate a command on other data (a plan you would write
//! yourself) are fenced ```text instead and not run.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

const README: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/README.md");
/// The person the README's outputs show: SLUICE_PERSON and SLUICE_EMAIL.
const README_PERSON: &str = "Robin Example";
const README_EMAIL: &str = "robin@example.org";

/// One `$ ` command of a console block and the output lines under it.
struct Example {
    /// 1-based README line of the `$ `.
    line: usize,
    command: String,
    /// (README line, text) of each expected output line.
    expected: Vec<(usize, String)>,
    /// For a block after `<!-- a fresh demo -->`: the README line of its fence.
    fresh: Option<usize>,
}

/// The line that makes the next console block run in a fresh demo.
const FRESH_DEMO: &str = "<!-- a fresh demo -->";

fn examples(readme: &str) -> Vec<Example> {
    let mut out: Vec<Example> = Vec::new();
    let mut in_console = false;
    let mut continuing = false;
    let mut fresh_next = false;
    let mut fresh: Option<usize> = None;
    for (i, line) in readme.lines().enumerate() {
        let n = i + 1;
        if let Some(fence) = line.strip_prefix("```") {
            if in_console {
                in_console = false;
                fresh = None;
            } else {
                in_console = fence.trim() == "console";
                fresh = (in_console && fresh_next).then_some(n);
            }
            fresh_next = false;
            continuing = false;
            continue;
        }
        if !in_console {
            fresh_next = line.trim() == FRESH_DEMO;
            continue;
        }
        if !in_console {
            continue;
        }
        if continuing {
            let e = out.last_mut().expect("a command before its continuation");
            e.command.push(' ');
            e.command
                .push_str(line.trim().trim_end_matches('\\').trim_end());
            continuing = line.trim_end().ends_with('\\');
            continue;
        }
        if let Some(cmd) = line.strip_prefix("$ ") {
            continuing = cmd.trim_end().ends_with('\\');
            out.push(Example {
                line: n,
                command: cmd.trim_end().trim_end_matches('\\').trim_end().to_string(),
                expected: Vec::new(),
                fresh,
            });
        } else if let Some(e) = out.last_mut() {
            e.expected.push((n, line.to_string()));
        }
    }
    out
}

/// The masking rule of the module comment: `cwd` (the folder the command ran in) and then
/// `root` (the walkthrough's folder) read as relative paths.
fn mask(line: &str, cwd: &str, root: &str) -> String {
    let mut text = line
        .trim_end()
        .replace(&format!("{cwd}/"), "")
        .replace(&format!("{root}/"), "");
    // RFC 3339 UTC times as sluice writes them: YYYY-MM-DDTHH:MM:SS[.fff]Z.
    let mut out = String::new();
    loop {
        let Some(t) = find_time(&text) else {
            out.push_str(&text);
            break;
        };
        out.push_str(&text[..t.0]);
        out.push_str("<time>");
        text = text[t.1..].to_string();
    }
    out
}

/// Start and end of the first RFC 3339 time in `s`.
fn find_time(s: &str) -> Option<(usize, usize)> {
    let b = s.as_bytes();
    let digits = |from: usize, n: usize| -> bool {
        from + n <= b.len() && b[from..from + n].iter().all(u8::is_ascii_digit)
    };
    for start in 0..b.len() {
        if !(digits(start, 4)
            && b.get(start + 4) == Some(&b'-')
            && digits(start + 5, 2)
            && b.get(start + 7) == Some(&b'-')
            && digits(start + 8, 2)
            && b.get(start + 10) == Some(&b'T')
            && digits(start + 11, 2)
            && b.get(start + 13) == Some(&b':')
            && digits(start + 14, 2)
            && b.get(start + 16) == Some(&b':')
            && digits(start + 17, 2))
        {
            continue;
        }
        let mut end = start + 19;
        if b.get(end) == Some(&b'.') {
            end += 1;
            while end < b.len() && b[end].is_ascii_digit() {
                end += 1;
            }
        }
        if b.get(end) == Some(&b'Z') {
            end += 1;
        }
        return Some((start, end));
    }
    None
}

/// Where an expected segment was not found: the README line, and the printed line it was
/// compared with (when there was one at a fixed place).
struct Mismatch {
    readme_line: usize,
    wanted: String,
    near: Option<(usize, String)>,
}

/// Matches the expected lines (already masked) against the printed ones: segments between
/// `...` lines, in order, each contiguous; the first anchored at the start and the last at the
/// end unless a `...` stands there.
fn compare(expected: &[(usize, String)], actual: &[String]) -> Result<(), Mismatch> {
    let is_gap = |s: &str| s.trim() == "...";
    let mut segments: Vec<Vec<(usize, String)>> = vec![Vec::new()];
    for (n, l) in expected {
        if is_gap(l) {
            segments.push(Vec::new());
        } else {
            segments
                .last_mut()
                .expect("a segment")
                .push((*n, l.clone()));
        }
    }
    // Trailing blank lines of a block are not output.
    while segments
        .last()
        .is_some_and(|s| s.last().is_some_and(|(_, l)| l.trim().is_empty()))
    {
        segments.last_mut().expect("a segment").pop();
    }
    let open_start = expected.first().is_some_and(|(_, l)| is_gap(l));
    let open_end = expected.last().is_some_and(|(_, l)| is_gap(l));
    let last = segments.len() - 1;
    let mut at = 0;
    for (i, seg) in segments.iter().enumerate() {
        if seg.is_empty() {
            continue;
        }
        let fits = |from: usize| {
            from + seg.len() <= actual.len()
                && seg
                    .iter()
                    .enumerate()
                    .all(|(k, (_, l))| actual[from + k] == *l)
        };
        let anchored_start = i == 0 && !open_start;
        let anchored_end = i == last && !open_end;
        let found = if anchored_start {
            fits(0).then_some(0)
        } else if anchored_end {
            let from = actual.len().checked_sub(seg.len());
            from.filter(|&f| f >= at && fits(f))
        } else {
            (at..=actual.len()).find(|&f| fits(f))
        };
        match found {
            Some(f) => {
                if anchored_start && anchored_end && f + seg.len() != actual.len() {
                    let (n, l) = (seg[0].0 + seg.len(), String::from("(end of the output)"));
                    return Err(Mismatch {
                        readme_line: n,
                        wanted: l,
                        near: actual.get(seg.len()).map(|a| (seg.len() + 1, a.clone())),
                    });
                }
                at = f + seg.len();
            }
            None => {
                // Say which line of the segment first fails where the segment is best placed.
                let from = if anchored_start {
                    0
                } else if anchored_end {
                    actual.len().saturating_sub(seg.len()).max(at)
                } else {
                    (at..actual.len())
                        .find(|&f| actual[f] == seg[0].1)
                        .unwrap_or(at)
                };
                let (k, (n, l)) = seg
                    .iter()
                    .enumerate()
                    .find(|(k, (_, l))| actual.get(from + k) != Some(l))
                    .unwrap_or((0, &seg[0]));
                return Err(Mismatch {
                    readme_line: *n,
                    wanted: l.clone(),
                    near: actual.get(from + k).map(|a| (from + k + 1, a.clone())),
                });
            }
        }
    }
    Ok(())
}

fn sluice_dir() -> PathBuf {
    Path::new(env!("CARGO_BIN_EXE_sluice"))
        .parent()
        .expect("the binary's folder")
        .to_path_buf()
}

#[test]
fn the_readme_walkthrough_works_as_shown() {
    let readme = std::fs::read_to_string(README).expect("README.md");
    let all = examples(&readme);
    assert!(
        all.len() >= 8 && all[0].command.starts_with("sluice demo"),
        "README.md: expected the walkthrough's console blocks to start with `$ sluice demo`; found {} commands",
        all.len()
    );
    let root = tempfile::tempdir().expect("a fresh folder");
    let root_path = root.path().canonicalize().expect("canonical folder");
    let root_text = root_path.display().to_string();
    let path = format!(
        "{}:{}",
        sluice_dir().display(),
        std::env::var("PATH").unwrap_or_default()
    );
    let mut cwd = root_path.clone();
    let mut failures = Vec::new();
    for e in all.iter().filter(|e| e.fresh.is_none()) {
        if let Some(f) = run_example(e, &mut cwd, &root_text, &path) {
            failures.push(f);
        }
    }
    // Blocks after `<!-- a fresh demo -->`, each in a folder of its own.
    let mut blocks: Vec<usize> = all.iter().filter_map(|e| e.fresh).collect();
    blocks.dedup();
    for block in blocks {
        let fresh = tempfile::tempdir().expect("a fresh folder");
        let fresh_path = fresh.path().canonicalize().expect("canonical folder");
        let demo = Command::new(env!("CARGO_BIN_EXE_sluice"))
            .arg("demo")
            .current_dir(&fresh_path)
            .env("SLUICE_PERSON", README_PERSON)
            .env("SLUICE_EMAIL", README_EMAIL)
            .env_remove("SLUICE_STORE")
            .output()
            .expect("run sluice demo");
        assert!(
            demo.status.success(),
            "sluice demo failed for README line {block}"
        );
        let mut cwd = fresh_path.join("sluice-demo");
        let fresh_text = fresh_path.display().to_string();
        for e in all.iter().filter(|e| e.fresh == Some(block)) {
            if let Some(f) = run_example(e, &mut cwd, &fresh_text, &path) {
                failures.push(f);
            }
        }
    }
    assert!(failures.is_empty(), "\n\n{}\n", failures.join("\n\n"));
}

/// Runs one example in `cwd` (a `cd` moves it); returns what differs, if anything.
fn run_example(e: &Example, cwd: &mut PathBuf, root_text: &str, path: &str) -> Option<String> {
    if let Some(dir) = e.command.strip_prefix("cd ") {
        *cwd = cwd.join(dir.trim());
        assert!(
            cwd.is_dir(),
            "README.md line {}: `$ {}`: no folder {}",
            e.line,
            e.command,
            cwd.display()
        );
        return None;
    }
    let cwd_text = cwd.display().to_string();
    let out = Command::new("bash")
        .arg("-c")
        .arg(&e.command)
        .current_dir(&*cwd)
        .env("PATH", path)
        .env("SLUICE_PERSON", README_PERSON)
        .env("SLUICE_EMAIL", README_EMAIL)
        .env("NO_COLOR", "1")
        .env_remove("SLUICE_STORE")
        .output()
        .expect("run bash");
    let mut printed: Vec<String> = String::from_utf8_lossy(&out.stdout)
        .lines()
        .map(|l| mask(l, &cwd_text, root_text))
        .collect();
    let failed = !out.status.success();
    if failed {
        printed.extend(
            String::from_utf8_lossy(&out.stderr)
                .lines()
                .map(|l| mask(l, &cwd_text, root_text)),
        );
    }
    let expected: Vec<(usize, String)> = e
        .expected
        .iter()
        .map(|(n, l)| (*n, mask(l, &cwd_text, root_text)))
        .collect();
    let shows_error = expected.iter().any(|(_, l)| l.starts_with("error:"));
    let numbered = || {
        printed
            .iter()
            .enumerate()
            .map(|(i, l)| format!("  {:>4} | {l}", i + 1))
            .collect::<Vec<_>>()
            .join("\n")
    };
    if failed && !shows_error {
        return Some(format!(
            "README.md line {}: `$ {}` failed with exit code {:?}; the README shows no error.\n{}\n\
             Fix the command or the README.",
            e.line,
            e.command,
            out.status.code(),
            numbered()
        ));
    }
    if let Err(m) = compare(&expected, &printed) {
        let near = match &m.near {
            Some((k, l)) => format!("printed line {k} is:\n    {l}"),
            None => "nothing was printed there".to_string(),
        };
        return Some(format!(
            "README.md line {}: the output of `$ {}` (README line {}) differs.\n  the README shows:\n    {}\n  {near}\n\
             everything it printed (masked):\n{}\n\
             To refresh: if the new output is right, copy the lines you want to show into README.md under line {}, \
             keeping `...` for lines left out (times and the folder are masked, see tests/readme_walkthrough.rs); \
             the command runs after the README's earlier console blocks, in a folder where `sluice demo` ran.",
            m.readme_line,
            e.command,
            e.line,
            m.wanted,
            numbered(),
            e.line
        ));
    }
    None
}

#[test]
fn the_comparison_rule_itself() {
    // The rule the walkthrough relies on, on small cases.
    let lines = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
    let exp = |v: &[&str]| {
        v.iter()
            .enumerate()
            .map(|(i, s)| (i + 1, s.to_string()))
            .collect::<Vec<_>>()
    };
    let printed = lines(&["a", "b", "c", "d", "e"]);
    assert!(compare(&exp(&["a", "...", "c", "d", "..."]), &printed).is_ok());
    assert!(compare(&exp(&["a", "b", "c", "d", "e"]), &printed).is_ok());
    assert!(compare(&exp(&["...", "e"]), &printed).is_ok());
    assert!(
        compare(&exp(&["...", "d"]), &printed).is_err(),
        "the end is anchored"
    );
    assert!(
        compare(&exp(&["b", "..."]), &printed).is_err(),
        "the start is anchored"
    );
    assert!(
        compare(&exp(&["a", "...", "d", "c", "..."]), &printed).is_err(),
        "order"
    );
    assert!(
        compare(&exp(&["a", "...", "b", "d", "..."]), &printed).is_err(),
        "contiguous"
    );
    assert!(
        compare(&exp(&["a", "b"]), &printed).is_err(),
        "nothing more is printed"
    );
    let m = compare(&exp(&["a", "...", "c", "x", "..."]), &printed).unwrap_err();
    assert_eq!((m.readme_line, m.wanted.as_str()), (4, "x"));
    assert_eq!(m.near, Some((4, "d".to_string())));
    // Masking.
    assert_eq!(
        mask(
            "  step 16 · append · 2026-12-02T00:35:28.994Z · Robin  ",
            "/tmp/q",
            "/tmp/q"
        ),
        "  step 16 · append · <time> · Robin"
    );
    assert_eq!(
        mask("cd /tmp/q/sluice-demo", "/tmp/q", "/tmp/q"),
        "cd sluice-demo"
    );
    assert_eq!(
        mask(
            "raw /tmp/q/d/exports/o.csv and /tmp/q/d",
            "/tmp/q/d",
            "/tmp/q"
        ),
        "raw exports/o.csv and d"
    );
}

// Before: the quick start ran `cargo run --release -- demo`, after which `sluice` was not on
// the PATH and every example below failed with "command not found". The quick start's shell
// block is now run as written (its build stood in for by the built binary at the place the
// build puts it) in a shell whose PATH holds no sluice, and must leave a runnable `sluice`.
#[test]
fn the_quick_start_leaves_sluice_runnable_by_name() {
    let readme = std::fs::read_to_string(README).expect("README.md");
    let start = readme
        .find("## Quick start")
        .expect("README.md has a Quick start");
    let block = readme[start..]
        .split("```sh\n")
        .nth(1)
        .and_then(|b| b.split("```").next())
        .expect("the Quick start has a ```sh block");
    let commands: Vec<&str> = block
        .lines()
        .map(|l| l.split(" #").next().unwrap_or("").trim())
        .filter(|l| !l.is_empty())
        .collect();
    assert!(
        commands.first() == Some(&"cargo build --release"),
        "the quick start builds first: {commands:?}"
    );
    // A repository folder whose build has run: the binary where `cargo build --release` puts it.
    let repo = tempfile::tempdir().expect("a fresh folder");
    let release = repo.path().join("target/release");
    std::fs::create_dir_all(&release).unwrap();
    std::os::unix::fs::symlink(env!("CARGO_BIN_EXE_sluice"), release.join("sluice")).unwrap();
    let script: Vec<&str> = commands
        .iter()
        .copied()
        .filter(|c| !c.starts_with("cargo build") && *c != "tests/run")
        .collect();
    assert!(
        script.iter().any(|c| c.starts_with("sluice ")),
        "the quick start calls sluice by name: {commands:?}"
    );
    let out = Command::new("bash")
        .arg("-c")
        .arg(format!("set -e\n{}\nsluice --version", script.join("\n")))
        .current_dir(repo.path())
        .env("PATH", "/usr/bin:/bin")
        .env("SLUICE_PERSON", README_PERSON)
        .env("SLUICE_EMAIL", README_EMAIL)
        .env_remove("SLUICE_STORE")
        .output()
        .expect("run bash");
    assert!(
        out.status.success(),
        "the quick start {script:?} failed:\n{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(repo.path().join("sluice-demo/sluice-store").is_dir());
}
