//! Golden files for what people read: `sluice about` of the vendored palmerpenguins data, with
//! the parts that change from run to run (times, folders) masked. Set SLUICE_BLESS=1 to rewrite
//! the golden file after an intended change, and review the diff.

mod common;

use common::*;

fn mask(text: &str, root: &str) -> String {
    let mut out = String::new();
    for line in text.replace(root, "<dir>").lines() {
        // RFC 3339 times: 2026-12-01T22:20:52.949Z
        let mut l = String::new();
        let mut rest = line;
        while let Some(i) = rest.find("Z") {
            let (head, tail) = rest.split_at(i + 1);
            if head.len() >= 24 && head.as_bytes()[head.len() - 14] == b'T' {
                l.push_str(&head[..head.len() - 24]);
                l.push_str("<time>");
            } else {
                l.push_str(head);
            }
            rest = tail;
        }
        l.push_str(rest);
        out.push_str(&l);
        out.push('\n');
    }
    out
}

#[test]
fn show_of_palmerpenguins_matches_the_golden_file() {
    let s = Sandbox::with_store();
    s.file("penguins.csv", penguins_csv());
    s.ok(&[
        "receive",
        "penguins.csv",
        "--as",
        "penguins",
        "--null-token",
        "NA",
        "--why",
        "reference data",
    ]);
    let root = s.path().canonicalize().unwrap().display().to_string();
    let actual = mask(&s.ok(&["about", "penguins"]), &root);
    let actual = mask(&actual, &s.path().display().to_string());
    let golden = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/golden/show_penguins.txt"
    );
    if std::env::var_os("SLUICE_BLESS").is_some() {
        std::fs::write(golden, &actual).unwrap();
    }
    let expected =
        std::fs::read_to_string(golden).expect("golden file (run with SLUICE_BLESS=1 once)");
    if expected != actual {
        panic!(
            "\nexpected:\n{}\n{expected}{}\nactual:\n{}\n{actual}{}\n",
            rule(),
            rule(),
            rule(),
            rule()
        );
    }
}
