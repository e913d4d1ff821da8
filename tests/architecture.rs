//! The shape of the code, checked by reading the sources (beside the SQL scan in
//! `tests/untrusted.rs`): git2 only in the code-capture module, no printing or environment
//! reads in the engine, and no import from a later layer into an earlier one. The layers are
//! those of DEVELOPERS.md, "Bird's-eye view"; the exceptions are listed below, each with its
//! reason, so that a new one is a decision and not an accident.

use std::path::{Path, PathBuf};

/// Every engine source file (everything under src/ but the binary: src/main.rs, src/cli/, and
/// the Python package's native module, src/python/, an edge like the binary that calls the
/// engine as a library), as (path relative to src/, text with comments removed).
fn engine_sources() -> Vec<(String, String)> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    fn walk(d: &Path, out: &mut Vec<PathBuf>) {
        for e in std::fs::read_dir(d).expect("read src").flatten() {
            let p = e.path();
            if p.is_dir() {
                walk(&p, out);
            } else if p.extension().is_some_and(|x| x == "rs") {
                out.push(p);
            }
        }
    }
    walk(&root, &mut files);
    files.sort();
    files
        .into_iter()
        .map(|f| {
            let rel = f
                .strip_prefix(&root)
                .unwrap()
                .to_string_lossy()
                .replace('\\', "/");
            let text = std::fs::read_to_string(&f).expect("read source");
            (rel, without_comments(&text))
        })
        .filter(|(rel, _)| {
            rel != "main.rs" && !rel.starts_with("cli/") && !rel.starts_with("python/")
        })
        .collect()
}

/// The text with `//` comments (and doc comments) removed, line by line. A `//` inside a
/// string literal ends the line early too, which only ever hides text, never invents it.
fn without_comments(text: &str) -> String {
    text.lines()
        .map(|l| match l.find("//") {
            Some(i) if !l[..i].contains('"') => &l[..i],
            _ => l,
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// `ops/apply.rs` -> `ops::apply`, `store/mod.rs` -> `store`.
fn module_of(rel: &str) -> String {
    rel.trim_end_matches(".rs")
        .trim_end_matches("/mod")
        .replace('/', "::")
}

#[test]
fn git2_is_used_only_in_the_code_capture_module() {
    let users: Vec<String> = engine_sources()
        .into_iter()
        .filter(|(_, t)| t.contains("git2::") || t.contains("use git2"))
        .map(|(rel, _)| rel)
        .collect();
    assert_eq!(users, ["code.rs"], "git2 belongs in src/code.rs alone");
    // The binary does not use it either.
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    for f in ["main.rs", "cli/mod.rs", "cli/record.rs", "cli/query.rs"] {
        let t = std::fs::read_to_string(root.join(f)).unwrap();
        assert!(!t.contains("git2"), "src/{f} uses git2");
    }
}

/// Only the store touches a database: the SQLite crate in its SQLite backend (and the store's
/// module that opens it), the PostgreSQL client in its server backend and nowhere else; the
/// binary uses neither.
#[test]
fn only_the_store_touches_the_databases() {
    let uses = |krate: &str| -> Vec<String> {
        engine_sources()
            .into_iter()
            .filter(|(_, t)| {
                t.contains(&format!("{krate}::")) || t.contains(&format!("use {krate}"))
            })
            .map(|(rel, _)| rel)
            .collect()
    };
    assert_eq!(
        uses("rusqlite"),
        ["store/sqlite.rs"],
        "SQLite belongs in src/store/sqlite.rs alone"
    );
    assert_eq!(
        uses("postgres"),
        ["store/pg.rs"],
        "the PostgreSQL client belongs in src/store/pg.rs alone"
    );
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut edge = vec![root.join("main.rs")];
    for e in std::fs::read_dir(root.join("cli")).unwrap().flatten() {
        edge.push(e.path());
    }
    for f in edge {
        let t = without_comments(&std::fs::read_to_string(&f).unwrap());
        for krate in ["rusqlite", "postgres::"] {
            assert!(!t.contains(krate), "{} uses {krate}", f.display());
        }
    }
}

#[test]
fn the_engine_never_prints_or_reads_the_environment() {
    let forbidden = regex::Regex::new(
        r"\b(println!|eprintln!|print!|eprint!|dbg!)|std::env::var|env::var(_os)?\(|env::vars\(|std::io::stdout\(|std::io::stderr\(",
    )
    .unwrap();
    let mut found = Vec::new();
    let mut scanned = 0;
    for (rel, text) in engine_sources() {
        scanned += 1;
        // Unit tests inside a module may print what they compare.
        let code = text.split("#[cfg(test)]").next().unwrap_or("");
        for (i, line) in code.lines().enumerate() {
            if let Some(m) = forbidden.find(line) {
                found.push(format!("src/{rel}:{}: {}", i + 1, m.as_str()));
            }
        }
    }
    assert!(
        scanned > 40,
        "the scan found only {scanned} files; is the walk stale?"
    );
    assert!(
        found.is_empty(),
        "the engine prints or reads the environment (the binary, src/cli/, does both):\n{}",
        found.join("\n")
    );
}

/// The layers, earliest first. A module may import from its own layer and earlier ones only.
/// The flow of DEVELOPERS.md is read -> operate -> record -> query -> document; below it are
/// the shared records and tools every stage uses (errors, the model, hashes, time, progress,
/// the code capture), and the store with the references into it and the
/// identity of who acts, which every stage reads.
const LAYERS: &[(&str, &[&str])] = &[
    (
        "foundation",
        &[
            "error",
            "model",
            "hash",
            "commitment",
            "clock",
            "progress",
            "code",
            "lib",
        ],
    ),
    ("read", &["table", "sheets", "jsonl", "columnar"]),
    ("store", &["store", "refs", "agent"]),
    ("operate", &["ops", "diff", "checks", "provenance"]),
    (
        "record",
        &[
            "ops::apply",
            "recording",
            "intake",
            "convert",
            "inferred",
            "labelled",
            "exec",
            "plan",
            "endorse",
            "erasure",
            "recompute",
            "delivery",
        ],
    ),
    (
        "query",
        &[
            "history",
            "trace",
            "explain",
            "graph",
            "replay",
            "verify",
            "sharing",
            "export",
            "revert",
            "columnar::write",
            "outcome",
        ],
    ),
    ("document", &["report", "prov", "demo"]),
];

/// Imports that go against the layers, each with its reason.
const EXCEPTIONS: &[(&str, &str, &str)] = &[
    (
        "store",
        "recompute",
        "a store opened anywhere reads recomputable versions like stored ones: when it opens, it hands its objects the engine's computing of a missing object (one call), so that no caller can forget it",
    ),
    (
        "ops::append",
        "intake",
        "the rule for dataset names lives with intake, where names are first given; append checks the name of the dataset it makes by the same rule",
    ),
    (
        "ops::summarize",
        "intake",
        "the rule for dataset names lives with intake, where names are first given; summarize checks the name of the dataset it makes by the same rule",
    ),
];

fn layer_of(module: &str) -> Option<(usize, &'static str)> {
    // The longest entry that is the module itself or a parent of it.
    let mut best: Option<(usize, &str, usize)> = None;
    for (i, (_, members)) in LAYERS.iter().enumerate() {
        for m in *members {
            let fits = module == *m || module.starts_with(&format!("{m}::"));
            if fits && best.is_none_or(|b| m.len() > b.2) {
                best = Some((i, m, m.len()));
            }
        }
    }
    best.map(|(i, m, _)| (i, m))
}

/// The modules a file imports through `crate::`, as paths (`ops::apply`, `store`), including
/// those inside `crate::{...}` groups.
fn imports(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let ident = |s: &str| -> String {
        s.chars()
            .take_while(|c| c.is_ascii_alphanumeric() || *c == '_' || *c == ':')
            .collect::<String>()
            .trim_end_matches(':')
            .to_string()
    };
    let mut rest = text;
    while let Some(i) = rest.find("crate::") {
        rest = &rest[i + "crate::".len()..];
        if let Some(group) = rest.strip_prefix('{') {
            // Top-level items of the group.
            let mut depth = 0;
            let mut item = String::new();
            for c in group.chars() {
                match c {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => {
                        out.push(ident(item.trim()));
                        item.clear();
                        continue;
                    }
                    _ => {}
                }
                item.push(c);
            }
            if !item.trim().is_empty() {
                out.push(ident(item.trim()));
            }
        } else {
            out.push(ident(rest));
        }
    }
    out.retain(|p| !p.is_empty() && p.chars().next().is_some_and(|c| c.is_ascii_lowercase()));
    out
}

#[test]
fn no_module_imports_from_a_later_layer() {
    let mut wrong = Vec::new();
    let mut used_exceptions = Vec::new();
    let mut unplaced = Vec::new();
    for (rel, text) in engine_sources() {
        let module = module_of(&rel);
        let Some((layer, _)) = layer_of(&module) else {
            unplaced.push(format!("src/{rel} ({module})"));
            continue;
        };
        // Unit tests inside a module may set up what they check with any part of the engine
        // (a store with versions taken in, say); the layers bind the module's own code.
        let code = text.split("#[cfg(test)]").next().unwrap_or("");
        for dep in imports(code) {
            let Some((dep_layer, dep_entry)) = layer_of(&dep) else {
                // An item of the crate root (`crate::Error`, `crate::TOOL_VERSION`).
                continue;
            };
            if dep_layer <= layer {
                continue;
            }
            match EXCEPTIONS
                .iter()
                .find(|(from, to, _)| *from == module && *to == dep_entry)
            {
                Some(e) => used_exceptions.push(e.0),
                None => wrong.push(format!(
                    "src/{rel} ({}) imports {dep} ({})",
                    LAYERS[layer].0, LAYERS[dep_layer].0
                )),
            }
        }
    }
    assert!(
        unplaced.is_empty(),
        "modules in no layer (add them to LAYERS here and to DEVELOPERS.md):\n{}",
        unplaced.join("\n")
    );
    assert!(
        wrong.is_empty(),
        "imports from a later layer into an earlier one:\n{}",
        wrong.join("\n")
    );
    for (from, to, _) in EXCEPTIONS {
        assert!(
            used_exceptions.contains(from),
            "the exception {from} -> {to} is no longer needed; remove it"
        );
    }
}

#[test]
fn the_import_reader_sees_groups_and_paths() {
    let found = imports(
        "use crate::error::{ErrorKind, Result};\nuse crate::{intake::{self, X}, model, store::Store};\nlet x = crate::ops::apply::compute(a);",
    );
    assert_eq!(
        found,
        [
            "error::",
            "intake::",
            "model",
            "store::Store",
            "ops::apply::compute"
        ]
        .map(|s| s.trim_end_matches(':').to_string())
    );
    assert_eq!(
        layer_of("ops::apply::compute").map(|l| l.1),
        Some("ops::apply")
    );
    assert_eq!(layer_of("ops::text").map(|l| l.1), Some("ops"));
    assert_eq!(layer_of("store::Store").map(|l| l.1), Some("store"));
}
