//! Untrusted names, values and stores: text that looks like SQL reaches the database only as
//! bound parameters; a store never follows a symbolic link out of `sluice-store/`; a store received
//! from someone else can be inspected, traced and verified without running any program.

mod common;

use std::path::Path;

use common::*;

// ---- SQL ---------------------------------------------------------------------------------

/// Column names, values, reasons and an agent full of quotes, semicolons and SQL keywords go
/// through intake, a step, a filter, a rename, trace and verify, and come back exactly.
#[test]
fn quotes_semicolons_and_sql_keywords_are_data_everywhere() {
    let s = Sandbox::with_store();
    let evil_col = "na'me\"; DROP TABLE steps; --";
    let evil_val = "'); DELETE FROM audit_log; --";
    let csv = format!(
        "order_id,\"{}\",SELECT\nWO-1,\"  {} \",FROM\nWO-2,\"x' OR '1'='1\",WHERE\n",
        evil_col.replace('"', "\"\""),
        evil_val,
    );
    s.file("evil.csv", &csv);
    let agent = "Robin O'Example; DROP TABLE agents; -- <robin@example.org>";
    let why = "reason'); UPDATE steps SET reason = 'pwned'; --";
    s.ok(&["receive", "evil.csv", "--as", "orders", "--person", agent]);
    s.ok(&["clean", "orders", "trim", "--why", why, "--person", agent]);
    s.ok(&[
        "clean",
        "orders",
        "drop",
        "`na'me\"; DROP TABLE steps; --` = 'x'' OR ''1''=''1'",
        "--why",
        why,
    ]);
    s.ok(&[
        "clean",
        "orders",
        "rename",
        "SELECT=DELETE FROM versions; --",
        "--why",
        "keyword names",
    ]);
    let cat = s.ok(&["retrieve", "orders"]);
    let mut rows = csv::Reader::from_reader(cat.as_bytes());
    let header: Vec<String> = rows.headers().unwrap().iter().map(String::from).collect();
    assert_eq!(header, ["order_id", evil_col, "DELETE FROM versions; --"]);
    let body: Vec<Vec<String>> = rows
        .records()
        .map(|r| r.unwrap().iter().map(String::from).collect())
        .collect();
    // Trimmed, and the row the quoted literal named dropped.
    assert_eq!(body, [["WO-1", evil_val, "FROM"]]);
    let log = s.json(&["timeline", "--dataset", "orders", "--json"]);
    let text = log.to_string();
    assert!(
        text.contains(&serde_json::to_string(why).unwrap()),
        "{text}"
    );
    assert!(
        text.contains(&serde_json::to_string(agent).unwrap()),
        "{text}"
    );
    let trail = s.json(&[
        "trace", "orders", "--row", "1", "--column", evil_col, "--json",
    ]);
    let trail_text = trail.to_string();
    assert!(
        trail_text.contains(&serde_json::to_string(&format!("  {evil_val} ")).unwrap()),
        "the raw value is not in the trail: {trail_text}"
    );
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["audit_entries_checked"], 5);
    // Every table is still there and nothing was rewritten.
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let n: i64 = db
        .query_row("SELECT count(*) FROM steps", [], |r| r.get(0))
        .unwrap();
    assert_eq!(n, 4);
    let reasons: i64 = db
        .query_row("SELECT count(*) FROM steps WHERE reason = ?1", [why], |r| {
            r.get(0)
        })
        .unwrap();
    assert_eq!(reasons, 2);
}

/// SQL text lives only in the store module, and the SQL it builds with `format!` takes only
/// constant pieces: every value is a bound parameter. (A scan of the sources, so that a new
/// query built from a value fails here before review.)
#[test]
fn sql_is_only_in_the_store_and_built_from_constants() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let keywords = regex::Regex::new(
        r#""\s*(SELECT\s|INSERT\s+INTO|UPDATE\s+\w+\s+SET|DELETE\s+FROM|CREATE\s+TABLE|ALTER\s+TABLE|PRAGMA\s)"#,
    )
    .unwrap();
    let format_sql = regex::Regex::new(
        r#"format!\(\s*"((?:[^"\\]|\\.)*(?:SELECT|INSERT|UPDATE|DELETE|PRAGMA|WHERE)(?:[^"\\]|\\.)*)""#,
    )
    .unwrap();
    let caller = regex::Regex::new(r"\.query_(versions|steps)\(\s*(\S)").unwrap();
    let hole = regex::Regex::new(r"\{([a-z_]*)[^}]*\}").unwrap();
    let mut files = Vec::new();
    fn walk(d: &Path, out: &mut Vec<std::path::PathBuf>) {
        for e in std::fs::read_dir(d).unwrap().flatten() {
            let p = e.path();
            if p.is_dir() {
                walk(&p, out);
            } else if p.extension().is_some_and(|x| x == "rs") {
                out.push(p);
            }
        }
    }
    walk(&root, &mut files);
    let store_files = [
        "store/lineage.rs",
        "store/audit.rs",
        "store/backend.rs",
        "store/sqlite.rs",
        "store/pg.rs",
        "store/roles.rs",
        "store/erasure_records.rs",
    ];
    let mut checked = 0;
    for f in files {
        let rel = f
            .strip_prefix(&root)
            .unwrap()
            .to_string_lossy()
            .into_owned();
        let text = std::fs::read_to_string(&f).unwrap();
        if !store_files.contains(&rel.as_str()) {
            assert!(
                !keywords.is_match(&text),
                "src/{rel} holds SQL; all SQL belongs in the store's lineage, audit, backend, roles and erasure records modules"
            );
            continue;
        }
        for m in format_sql.captures_iter(&text) {
            for h in hole.captures_iter(&m[1]) {
                // `tail`: a constant clause the callers pass as a literal; `v`: a migration's
                // integer version number.
                assert!(
                    ["tail", "v"].contains(&&h[1]),
                    "src/{rel}: SQL built with {{{}}}; bind values as parameters instead",
                    &h[1]
                );
                checked += 1;
            }
        }
        // Callers of the two functions that take a query pass literals or named constants.
        for c in caller.captures_iter(&text) {
            if &c[2] != "t" && !c[2].starts_with(|ch: char| ch.is_ascii_uppercase()) {
                assert_eq!(
                    &c[2], "\"",
                    "src/{rel}: query_{} called with a built clause",
                    &c[1]
                );
            }
        }
    }
    assert!(
        checked > 0,
        "the scan found no built SQL at all; is the pattern stale?"
    );
    eprintln!("sql: {checked} interpolations in built SQL, all constant");
}

// ---- symbolic links ----------------------------------------------------------------------

fn seeded() -> Sandbox {
    let s = Sandbox::with_store();
    s.file("a.csv", "order_id,shop\nWO-1,Quillby Cycle Mend\n");
    s.ok(&["receive", "a.csv", "--as", "orders"]);
    s
}

fn files_in(d: &Path) -> usize {
    std::fs::read_dir(d).map(|r| r.count()).unwrap_or(0)
}

#[test]
fn a_store_whose_folders_are_links_out_of_it_is_refused_and_nothing_is_written_there() {
    for part in ["tmp", sluice::store::segments::SEGMENTS_DIR] {
        let s = seeded();
        let outside = tempfile::tempdir().unwrap();
        let p = s.path().join("sluice-store").join(part);
        // Move the real folder outside and leave a link in its place.
        let moved = outside.path().join(part);
        std::fs::rename(&p, &moved).unwrap();
        std::os::unix::fs::symlink(&moved, &p).unwrap();
        let before = files_in(&moved);
        s.file("b.csv", "order_id,shop\nWO-2,Oxwater Wheelworks\n");
        let err = s.fails(2, &["receive", "b.csv", "--as", "orders"]);
        assert_contains(&err, &format!("sluice-store/{part} is a symbolic link"));
        assert_contains(&err, "never links out of it");
        assert_eq!(
            files_in(&moved),
            before,
            "{part}: something was written through the link"
        );
        // Reading commands refuse too, verify included.
        let err = s.fails(2, &["verify"]);
        assert_contains(&err, "is a symbolic link");
        eprintln!("links: sluice-store/{part} as a link out of the store is refused");
    }
}

#[test]
fn a_segment_linked_out_of_the_store_is_never_read_or_written() {
    let s = seeded();
    let segments = s
        .path()
        .join("sluice-store")
        .join(sluice::store::segments::SEGMENTS_DIR);
    let outside = tempfile::tempdir().unwrap();
    // Every segment file becomes a link to a copy outside.
    let mut linked = 0;
    for e in std::fs::read_dir(&segments).unwrap().flatten() {
        let copy = outside.path().join(e.file_name());
        std::fs::copy(e.path(), &copy).unwrap();
        std::fs::remove_file(e.path()).unwrap();
        std::os::unix::fs::symlink(&copy, e.path()).unwrap();
        linked += 1;
    }
    let r = s.run(&["verify", "--json"]);
    assert_eq!(r.code, 1, "{}", r.stdout);
    let v: serde_json::Value = serde_json::from_str(&r.stdout).unwrap();
    let problems = v["problems"].as_array().unwrap();
    assert!(
        problems.iter().any(|p| p["kind"] == "object_missing"),
        "{v}"
    );
    // The links are not taken for segments: they are named as stray files.
    assert_eq!(
        problems
            .iter()
            .filter(|p| p["kind"] == "stray_file")
            .count(),
        linked,
        "{v}"
    );
    // retrieve does not read the object through the link.
    let err = s.fails(1, &["retrieve", "orders"]);
    assert_contains(&err, "missing");
    eprintln!("links: {linked} segments linked out of the store: reported, never read");
}

// ---- a received store --------------------------------------------------------------------

/// The demo's store (with an outside command and a hand edit in its history) is copied as if
/// received, and looked at with every reading command while PATH holds only decoys that
/// leave a mark when run: nothing is run.
#[test]
fn a_received_store_is_inspected_traced_and_verified_without_running_anything() {
    let made = Sandbox::new();
    made.ok(&["demo", "."]);
    let received = tempfile::tempdir().unwrap();
    let project = received.path().join("received");
    let copy = |from: &Path, to: &Path| {
        fn go(from: &Path, to: &Path) {
            std::fs::create_dir_all(to).unwrap();
            for e in std::fs::read_dir(from).unwrap().flatten() {
                let dest = to.join(e.file_name());
                if e.file_type().unwrap().is_dir() {
                    go(&e.path(), &dest);
                } else {
                    std::fs::copy(e.path(), &dest).unwrap();
                }
            }
        }
        go(from, to)
    };
    copy(
        &made.path().join("sluice-store"),
        &project.join("sluice-store"),
    );
    let decoys = received.path().join("decoys");
    std::fs::create_dir_all(&decoys).unwrap();
    let mark = received.path().join("ran");
    for prog in ["python3", "python", "sh", "bash", "git", "env", "cp", "cat"] {
        let p = decoys.join(prog);
        std::fs::write(
            &p,
            format!("#!/bin/sh\necho {prog} >> '{}'\n", mark.display()),
        )
        .unwrap();
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    let run = |args: &[&str]| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_sluice"))
            .args(args)
            .current_dir(&project)
            .env("PATH", &decoys)
            .env("SLUICE_PERSON", PERSON)
            .env("SLUICE_EMAIL", EMAIL)
            .env("NO_COLOR", "1")
            .env_remove("SLUICE_STORE")
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "sluice {} failed on the received store: {}",
            args.join(" "),
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    };
    assert_contains(&run(&["verify"]), "intact");
    run(&["timeline"]);
    run(&["timeline", "--dataset", "reviewed_orders", "--json"]);
    run(&["about", "reviewed_orders"]);
    run(&["about", "reviewed_orders:v1", "--json"]);
    run(&["compare", "all_orders", "reviewed_orders:v1"]);
    run(&["retrieve", "reviewed_orders"]);
    run(&[
        "trace",
        "reviewed_orders",
        "--row",
        "3",
        "--column",
        "technician",
    ]);
    run(&[
        "explain",
        "q3_by_shop",
        "--row",
        "1",
        "--column",
        "sum_parts_cost",
    ]);
    run(&["lineage", "reviewed_orders"]);
    run(&["export", "q3_by_shop", "--format", "plan"]);
    assert!(
        !mark.exists(),
        "a reading command ran a program: {}",
        std::fs::read_to_string(&mark).unwrap_or_default()
    );
    eprintln!("received store: 11 reading commands, no program run");
}

// ---- paths an outside command is given ---------------------------------------------------

/// An output an outside command leaves as a link (here to a file outside the project) is not
/// followed: the run fails, only its failure is audited, and nothing of the linked file is
/// recorded. A placeholder name that would lead the input copy out of its temporary folder is
/// refused before anything runs.
#[test]
fn exec_never_follows_an_output_link_or_a_traversing_input_name() {
    let s = seeded();
    let outside = tempfile::tempdir().unwrap();
    let secret = outside.path().join("secret.csv");
    std::fs::write(&secret, "order_id,shop\nWO-9,not for the store\n").unwrap();
    let before_versions = s.json(&["timeline", "--dataset", "orders", "--json"]);
    let r = s.run(&[
        "capture",
        "--input",
        "orders",
        "--output",
        "orders=out.csv",
        "--why",
        "a link",
        "--",
        "ln",
        "-s",
        secret.to_str().unwrap(),
        "out.csv",
    ]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert_contains(&r.stderr, "out.csv (a symbolic link to");
    assert_contains(
        &r.stderr,
        "not a file; have the command write the file itself",
    );
    assert_eq!(
        s.json(&["timeline", "--dataset", "orders", "--json"]),
        before_versions
    );
    assert!(!s.ok(&["retrieve", "orders"]).contains("not for the store"));
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");

    let r = s.run(&[
        "capture",
        "--input",
        "../../escape=orders",
        "--output",
        "orders=out2.csv",
        "--why",
        "traversal",
        "--",
        "true",
    ]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert_contains(&r.stderr, "invalid dataset name \"../../escape\"");
    assert!(!s.path().join("escape.csv").exists());
    assert!(!s.path().join("sluice-store/escape.csv").exists());
    eprintln!("exec: an output link and a traversing input name refused, nothing recorded");
}
