//! Shared helpers for the integration tests: each test gets a fresh temporary folder and runs
//! the real `sluice` binary in it, with a fixed agent and no colour, and shows expected versus
//! actual between rules when an assertion fails.

#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

pub mod pg;

pub struct Sandbox {
    pub dir: tempfile::TempDir,
}

/// A xorshift64 generator (Marsaglia 2003, "Xorshift RNGs", shifts 13, 7, 17): deterministic
/// values that differ from row to row and do not compress, for generated test files.
pub struct Xorshift64(pub u64);

impl Xorshift64 {
    pub fn next(&mut self) -> u64 {
        let mut x = self.0;
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        self.0 = x;
        x
    }
}

/// Who the tests act as: `SLUICE_PERSON` and `SLUICE_EMAIL`, and how it is recorded.
pub const PERSON: &str = "Test Runner";
pub const EMAIL: &str = "runner@example.org";
pub const AGENT: &str = "Test Runner (runner@example.org)";

pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
    pub raw_stdout: Vec<u8>,
}

impl Sandbox {
    pub fn new() -> Sandbox {
        Sandbox {
            dir: tempfile::tempdir().expect("temporary folder"),
        }
    }

    /// A sandbox with an initialised store.
    pub fn with_store() -> Sandbox {
        let s = Sandbox::new();
        s.ok(&["setup"]);
        s
    }

    /// A sandbox holding the demo (`sluice demo .`): the exports under `exports/` and a store
    /// that has taken them in and cleaned the Quillby orders.
    pub fn with_demo() -> Sandbox {
        let s = Sandbox::new();
        s.ok(&["demo", "."]);
        s
    }

    /// A sandbox whose store holds the vendored palmerpenguins data as dataset `penguins`,
    /// taken in with `NA` as the null token.
    pub fn with_penguins() -> Sandbox {
        let s = Sandbox::with_store();
        s.file("penguins.csv", penguins_csv());
        s.ok(&[
            "receive",
            "penguins.csv",
            "--as",
            "penguins",
            "--null-token",
            "NA",
        ]);
        s
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }

    pub fn file(&self, name: &str, content: impl AsRef<[u8]>) -> PathBuf {
        let p = self.path().join(name);
        if let Some(parent) = p.parent() {
            std::fs::create_dir_all(parent).expect("create folder");
        }
        std::fs::write(&p, content).expect("write test file");
        p
    }

    pub fn command(&self, args: &[&str]) -> Command {
        let mut c = Command::new(env!("CARGO_BIN_EXE_sluice"));
        c.args(args)
            .current_dir(self.path())
            .env("SLUICE_PERSON", PERSON)
            .env("SLUICE_EMAIL", EMAIL)
            .env("NO_COLOR", "1")
            .env_remove("SLUICE_STORE")
            .env_remove("PGPASSWORD");
        if let Some(p) = pg::passfile() {
            c.env("PGPASSFILE", p);
        }
        c
    }

    pub fn run(&self, args: &[&str]) -> Run {
        let out: Output = self.command(args).output().expect("run sluice");
        Run {
            code: out.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
            raw_stdout: out.stdout,
        }
    }

    /// Runs and insists on exit code 0; returns stdout.
    pub fn ok(&self, args: &[&str]) -> String {
        let r = self.run(args);
        if r.code != 0 {
            panic!(
                "\nsluice {} failed with exit code {}\n{}\nstdout:\n{}\n{}\nstderr:\n{}\n{}\n",
                args.join(" "),
                r.code,
                rule(),
                r.stdout,
                rule(),
                r.stderr,
                rule()
            );
        }
        r.stdout
    }

    /// Runs and insists on a failure with `code`; returns stderr.
    pub fn fails(&self, code: i32, args: &[&str]) -> String {
        let r = self.run(args);
        if r.code != code {
            panic!(
                "\nsluice {}: expected exit code {code}, got {}\n{}\nstdout:\n{}\n{}\nstderr:\n{}\n{}\n",
                args.join(" "),
                r.code,
                rule(),
                r.stdout,
                rule(),
                r.stderr,
                rule()
            );
        }
        r.stderr
    }

    pub fn json(&self, args: &[&str]) -> serde_json::Value {
        let out = self.ok(args);
        serde_json::from_str(&out).unwrap_or_else(|e| panic!("not JSON ({e}):\n{out}"))
    }

    /// Everything observable about the store: object files with sizes, the steps and versions,
    /// the audit log length, and leftover temporary files. Equal snapshots mean "unchanged".
    pub fn snapshot(&self) -> String {
        let mut files = Vec::new();
        let root = self.path().join("sluice-store");
        collect(&root.join("objects"), &mut files);
        collect(&root.join("segments"), &mut files);
        collect(&root.join("tmp"), &mut files);
        files.sort();
        let log = self.ok(&["timeline", "--json"]);
        let verify = self.json(&["verify", "--json"]);
        format!(
            "{}\n--\n{log}\n--\naudit entries: {}\n",
            files.join("\n"),
            verify["audit_entries_checked"]
        )
    }
}

fn collect(dir: &Path, out: &mut Vec<String>) {
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_dir() {
                collect(&p, out);
            } else {
                let len = e.metadata().map(|m| m.len()).unwrap_or(0);
                out.push(format!("{} {len}", p.display()));
            }
        }
    }
}

/// The vendored palmerpenguins file (tests/data/palmerpenguins, CC0).
pub fn penguins_csv() -> Vec<u8> {
    std::fs::read(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/palmerpenguins/penguins.csv"
    ))
    .expect("vendored penguins.csv")
}

pub fn rule() -> String {
    "-".repeat(72)
}

/// Asserts `haystack` contains `needle`, showing both when it does not.
#[track_caller]
pub fn assert_contains(haystack: &str, needle: &str) {
    if !haystack.contains(needle) {
        panic!(
            "\nexpected to find:\n{}\n{needle}\n{}\nin:\n{}\n{haystack}\n{}\n",
            rule(),
            rule(),
            rule(),
            rule()
        );
    }
}

/// The subcommands a `--help` text lists under "Commands:", without clap's own `help`.
pub fn commands_listed(help: &str) -> Vec<String> {
    let mut names = Vec::new();
    let mut inside = false;
    for line in help.lines() {
        if line.starts_with("Commands:") {
            inside = true;
            continue;
        }
        if inside {
            if !line.starts_with("  ") {
                if line.trim().is_empty() {
                    continue;
                }
                break;
            }
            // A command line is "  name  description"; wrapped descriptions are indented more.
            let rest = &line[2..];
            if rest.starts_with(' ') {
                continue;
            }
            let name = rest.split_whitespace().next().unwrap_or_default();
            if !name.is_empty() && name != "help" {
                names.push(name.to_string());
            }
        }
    }
    names
}

/// Every command path (`["clean", "trim"]`), found by walking the real binary's help texts,
/// so that a new command is covered without touching this file.
pub fn every_command(s: &Sandbox) -> Vec<Vec<String>> {
    let mut out = Vec::new();
    let mut todo: Vec<Vec<String>> = commands_listed(&s.ok(&["--help"]))
        .into_iter()
        .map(|n| vec![n])
        .collect();
    while let Some(path) = todo.pop() {
        let mut args: Vec<&str> = path.iter().map(String::as_str).collect();
        // `apply` takes the version before its operation; the help does not need one.
        args.push("--help");
        let help = s.ok(&args);
        for sub in commands_listed(&help) {
            let mut p = path.clone();
            p.push(sub);
            todo.push(p);
        }
        out.push(path);
    }
    out.sort();
    out
}

/// The interpreter of the pinned reference environment (pandas, polars, prov, openpyxl, odfpy):
/// SLUICE_REFERENCE_PYTHON (tests/run sets it), or else the one tests/reference/pyenv.py makes
/// or finds under target/pyref, so that a plain `cargo test` runs the reference checks too
/// rather than skipping them.
pub fn reference_python() -> PathBuf {
    if let Some(p) = std::env::var_os("SLUICE_REFERENCE_PYTHON").filter(|p| !p.is_empty()) {
        return PathBuf::from(p);
    }
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/pyenv.py");
    let how = "create it with `python3 tests/reference/pyenv.py` (needs Python 3 and, the first \
               time, PyPI reachable), or run tests/run, which does it";
    let out = Command::new("python3")
        .arg(script)
        .output()
        .unwrap_or_else(|e| panic!("python3 could not be started ({e}); {how}"));
    assert!(
        out.status.success(),
        "the reference environment (target/pyref) could not be made:\n{}\n{how}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The interpreter's path is the last line pyenv.py prints.
    let stdout = String::from_utf8_lossy(&out.stdout);
    let path = stdout.lines().last().unwrap_or("").trim().to_string();
    assert!(
        Path::new(&path).exists(),
        "tests/reference/pyenv.py printed {path:?}, which does not exist; {how}"
    );
    PathBuf::from(path)
}

/// Changes the bytes of stored object `hash` behind sluice's back, keeping its name: `edit`
/// gets the object's bytes and changes them; its segment is rewritten in place with the
/// changed bytes compressed under the old name (as someone who knows the segment format would
/// do it), every other object of that segment copied as it was.
#[allow(dead_code)]
pub fn damage_object(store_dir: &Path, hash: &str, edit: impl FnOnce(&mut Vec<u8>)) {
    rewrite_segment_of(store_dir, hash, Some(edit));
}

/// Removes stored object `hash` behind sluice's back: its segment is rewritten without it (or
/// removed when it held nothing else).
#[allow(dead_code)]
pub fn remove_object(store_dir: &Path, hash: &str) {
    rewrite_segment_of(store_dir, hash, None::<fn(&mut Vec<u8>)>);
}

fn rewrite_segment_of(store_dir: &Path, hash: &str, edit: Option<impl FnOnce(&mut Vec<u8>)>) {
    use sluice::store::objects::FsBackend;
    use sluice::store::segments::{self, SegmentWriter};
    let h: sluice::hash::Hash = hash.parse().unwrap();
    let backend = FsBackend::new(store_dir);
    let (seg, _) = backend
        .locate(&h)
        .unwrap_or_else(|| panic!("object {hash} is in no segment"));
    let entries = segments::read_index(&seg).unwrap();
    let old = std::fs::File::open(&seg).unwrap();
    let temp = seg.with_extension("rewritten");
    let none = |_: &str| Ok(());
    let mut w = SegmentWriter::create(&temp, 1, segments::FRAME_SIZE, &none).unwrap();
    let mut edit = edit;
    let mut kept = 0;
    for e in &entries {
        if e.hash != h {
            w.copy_stored(&old, e, &none).unwrap();
            kept += 1;
            continue;
        }
        let Some(f) = edit.take() else { continue };
        let store = sluice::store::Store::open(store_dir).unwrap();
        let mut bytes = Vec::new();
        std::io::Read::read_to_end(&mut store.objects.open_raw(&h).unwrap().0, &mut bytes).unwrap();
        f(&mut bytes);
        w.write(&bytes, &none).unwrap();
        w.end_object(&h, &none).unwrap();
        kept += 1;
    }
    w.finish(&none).unwrap();
    drop(old);
    if kept == 0 {
        std::fs::remove_file(&temp).unwrap();
        std::fs::remove_file(&seg).unwrap();
    } else {
        std::fs::rename(&temp, &seg).unwrap();
    }
}

/// Copies the folder `from` (a fixture store, a prepared sandbox) to `to`, recursively; the
/// test's own folders hold no links and are a few levels deep.
pub fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        let dest = to.join(e.file_name());
        if e.file_type().unwrap().is_dir() {
            copy_dir(&e.path(), &dest);
        } else {
            std::fs::copy(e.path(), &dest).unwrap();
        }
    }
}

/// How `value` fails the output schema `schema/output/NAME.schema.json` (JSON Schema draft
/// 2020-12, checked by the `jsonschema` crate): empty when it matches. For the `--json`
/// outputs of commands that need a server (publish, borrow, transfer), checked in their own
/// tests; tests/json_output.rs checks the others on the demo.
pub fn schema_errors(name: &str, value: &serde_json::Value) -> Vec<String> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("schema/output")
        .join(format!("{name}.schema.json"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| {
        panic!(
            "{}: {e}; every --json output needs a schema",
            path.display()
        )
    });
    let schema: serde_json::Value = serde_json::from_str(&text).expect("the schema is JSON");
    let v = jsonschema::draft202012::new(&schema)
        .unwrap_or_else(|e| panic!("{} is not a valid schema: {e}", path.display()));
    v.iter_errors(value)
        .map(|e| format!("{e} at {}", e.instance_path()))
        .collect()
}
