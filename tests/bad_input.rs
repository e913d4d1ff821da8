//! Bad input at intake and at the store: every case gets one clear paragraph on stderr, the
//! right exit code (2 for usage and input errors, 1 for a damaged store; see
//! `Error::exit_code`), and leaves the store exactly as it was.
//!
//! Expected byte offsets and lines in the comments are counted by hand from the test input:
//! offsets are 0-based and count every byte (a CRLF is two, a BOM three), lines are 1-based.

mod common;

use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::process::Command;

use common::{assert_contains, Run, Sandbox};

/// The orders every seeded store starts with (one version of `orders`).
const SEED: &str = "order_id,shop,amount\n\
                    WO-1001,Quillby Cycle Mend,12.50\n\
                    WO-1002,Oxwater Wheelworks,8.00\n\
                    WO-1003,Fennmarsh Bike Clinic,21.75\n";

/// A store holding one version of `orders`, so that "unchanged" has something to compare.
fn seeded() -> Sandbox {
    let s = Sandbox::with_store();
    s.file("exports/seed.csv", SEED);
    s.ok(&[
        "receive",
        "exports/seed.csv",
        "--as",
        "orders",
        "--why",
        "seed",
    ]);
    s
}

/// Runs `args`, insists on a failure with `code`, and checks that the store snapshot did not
/// move; returns stderr.
#[track_caller]
fn fails_unchanged(s: &Sandbox, code: i32, args: &[&str]) -> String {
    let before = s.snapshot();
    let err = s.fails(code, args);
    let after = s.snapshot();
    assert_eq!(
        before,
        after,
        "sluice {} changed the store although it failed with:\n{err}",
        args.join(" ")
    );
    err
}

/// One paragraph: a single `error:` line (an OS `caused by:` line may follow), nothing else.
#[track_caller]
fn one_paragraph(err: &str) {
    let lines: Vec<&str> = err.lines().filter(|l| !l.trim().is_empty()).collect();
    assert!(
        !lines.is_empty() && lines[0].starts_with("error: "),
        "expected an `error:` line, got:\n{err}"
    );
    assert_eq!(
        lines.iter().filter(|l| l.starts_with("error: ")).count(),
        1,
        "expected exactly one error line:\n{err}"
    );
    assert!(
        lines[1..].iter().all(|l| l.starts_with("  caused by: ")),
        "unexpected extra lines:\n{err}"
    );
    assert!(
        !err.contains("panicked"),
        "the binary panicked instead of reporting:\n{err}"
    );
}

/// Every file under the store folder with its bytes, for cases where sluice itself cannot read
/// the store (so `Sandbox::snapshot` cannot be taken).
fn raw_store(project: &Path) -> Vec<(PathBuf, Vec<u8>)> {
    fn walk(dir: &Path, out: &mut Vec<(PathBuf, Vec<u8>)>) {
        if let Ok(rd) = std::fs::read_dir(dir) {
            for e in rd.flatten() {
                let p = e.path();
                if p.is_dir() {
                    walk(&p, out);
                } else {
                    let bytes = std::fs::read(&p).expect("read store file");
                    out.push((p, bytes));
                }
            }
        }
    }
    let mut out = Vec::new();
    walk(&project.join("sluice-store"), &mut out);
    out.sort();
    out
}

#[track_caller]
fn assert_raw_unchanged(before: &[(PathBuf, Vec<u8>)], after: &[(PathBuf, Vec<u8>)]) {
    let names = |v: &[(PathBuf, Vec<u8>)]| -> Vec<String> {
        v.iter()
            .map(|(p, b)| format!("{} {}", p.display(), b.len()))
            .collect()
    };
    assert_eq!(names(before), names(after), "the store's files changed");
    assert!(before == after, "a store file's bytes changed");
}

fn user_version(db: &Path) -> i64 {
    rusqlite::Connection::open(db)
        .expect("open lineage.db")
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .expect("read user_version")
}

// ---- the input file itself ---------------------------------------------------------------

#[test]
fn missing_file_is_named_with_a_hint_to_check_the_path() {
    let s = seeded();
    let err = fails_unchanged(&s, 2, &["receive", "exports/nowhere.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/nowhere.csv: no such file or folder; check the path",
    );
}

#[test]
fn directory_instead_of_a_file_is_refused() {
    let s = seeded();
    std::fs::create_dir_all(s.path().join("exports/q3")).unwrap();
    let err = fails_unchanged(&s, 2, &["receive", "exports/q3", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/q3: is a directory, not a file; name a file to take in",
    );
}

#[test]
fn empty_file_is_refused_with_its_size() {
    let s = seeded();
    s.file("exports/empty.csv", "");
    let err = fails_unchanged(&s, 2, &["receive", "exports/empty.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/empty.csv: the file is empty (0 bytes); expected at least a header line",
    );
}

#[test]
fn header_only_file_is_a_valid_version_with_zero_rows() {
    let s = Sandbox::with_store();
    s.file("exports/fennmarsh.csv", "order_id,shop,amount\n");
    // The same header without a final line break is just as valid.
    s.file("exports/oxwater.csv", "order_id;shop;amount");
    let out = s.ok(&[
        "receive",
        "exports/fennmarsh.csv",
        "--as",
        "fennmarsh_orders",
    ]);
    assert_contains(&out, "recorded fennmarsh_orders:v1");
    assert_contains(&out, "0 rows × 3 columns");
    s.ok(&["receive", "exports/oxwater.csv", "--as", "oxwater_orders"]);
    for (name, delim) in [("fennmarsh_orders", ","), ("oxwater_orders", ";")] {
        let v = s.json(&["about", name, "--json"]);
        assert_eq!(v["version"]["n_rows"], 0, "{name}");
        assert_eq!(
            v["version"]["header"],
            serde_json::json!(["order_id", "shop", "amount"]),
            "{name}"
        );
        assert_eq!(v["version"]["dialect"]["delimiter"], delim, "{name}");
    }
    assert!(s.json(&["verify", "--json"])["intact"] == true);
}

#[test]
fn row_with_fewer_fields_reports_record_line_byte_and_counts() {
    let s = seeded();
    // Header 21 bytes (0..=20), WO-1001 row 33 bytes (21..=53), WO-1002 row 32 bytes
    // (54..=85): the short row is record 3 (the header is record 0), on line 4, at byte 86.
    s.file(
        "exports/ragged.csv",
        "order_id,shop,amount\n\
         WO-1001,Quillby Cycle Mend,12.50\n\
         WO-1002,Oxwater Wheelworks,8.00\n\
         WO-1003,Fennmarsh Bike Clinic\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/ragged.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/ragged.csv: record 3 (line 4, byte 86): expected 3 fields, found 2",
    );
    assert_contains(&err, "check for an unquoted delimiter inside a value");
}

#[test]
fn row_with_more_fields_counts_crlf_and_blank_lines_in_its_position() {
    let s = seeded();
    // Header 22 bytes with its CRLF (0..=21), WO-1001 row 34 bytes (22..=55), a blank line of
    // 2 bytes (56..=57, line 3): WO-1002 is record 2, on line 4, at byte 58.
    s.file(
        "exports/extra.csv",
        "order_id,shop,amount\r\n\
         WO-1001,Quillby Cycle Mend,12.50\r\n\
         \r\n\
         WO-1002,Oxwater Wheelworks,8.00,extra\r\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/extra.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "exports/extra.csv: record 2 (line 4, byte 58): expected 3 fields, found 4",
    );
}

#[test]
fn ragged_row_after_a_quoted_line_break_counts_the_line_inside_the_quotes() {
    let s = seeded();
    // Header 19 bytes (0..=18); record 1 is 39 bytes (19..=57) and spans lines 2 and 3 because
    // its quoted note holds a line break; WO-1002 is record 2, on line 4, at byte 58.
    s.file(
        "exports/notes.csv",
        "order_id,shop,note\n\
         WO-1001,Quillby Cycle Mend,\"two\nlines\"\n\
         WO-1002,Oxwater Wheelworks\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/notes.csv", "--as", "orders"]);
    assert_contains(
        &err,
        "exports/notes.csv: record 2 (line 4, byte 58): expected 3 fields, found 2",
    );
}

#[test]
fn ragged_row_after_a_bom_counts_the_bom_bytes() {
    let s = seeded();
    // BOM 3 bytes (0..=2), "shop;city\r\n" 11 bytes (3..=13), "A;B\r\n" 5 bytes (14..=18):
    // the one-field row is record 2, on line 3, at byte 19.
    s.file("exports/bom.csv", b"\xEF\xBB\xBFshop;city\r\nA;B\r\nC\r\n");
    let err = fails_unchanged(&s, 2, &["receive", "exports/bom.csv", "--as", "orders"]);
    assert_contains(
        &err,
        "exports/bom.csv: record 2 (line 3, byte 19): expected 2 fields, found 1",
    );
}

#[test]
fn ragged_row_in_a_windows_1252_file_reports_the_byte_offset_in_the_file() {
    let s = seeded();
    // "shop,repair\n" 12 bytes (0..=11); the Quillby row is 30 bytes in the file (12..=41), its
    // é being the single byte 0xE9 in windows-1252: the short row is record 2, line 3, byte 42.
    // (The same row decoded to UTF-8 would be 31 bytes; the position must be the file's.)
    s.file(
        "exports/legacy.csv",
        b"shop,repair\nQuillby Cycle Mend,d\xe9railleur\nOxwater Wheelworks\n",
    );
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/legacy.csv",
            "--as",
            "orders",
            "--encoding",
            "windows-1252",
        ],
    );
    assert_contains(
        &err,
        "exports/legacy.csv: record 2 (line 3, byte 42): expected 2 fields, found 1",
    );
}

#[test]
fn ragged_row_in_a_utf16_file_reports_the_byte_offset_in_the_file() {
    let s = seeded();
    // UTF-16LE with a BOM: 2 bytes of BOM, then 2 bytes per character. "shop,city\n" is 10
    // characters (bytes 2..=21), "Quillby Cycle Mend,Quillby\n" 27 (bytes 22..=75): the
    // Oxwater row is record 2, on line 3, at byte 2 + 2 × 37 = 76.
    let mut data = vec![0xFF, 0xFE];
    for u in "shop,city\nQuillby Cycle Mend,Quillby\nOxwater Wheelworks\n".encode_utf16() {
        data.extend_from_slice(&u.to_le_bytes());
    }
    s.file("exports/wide.csv", &data);
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/wide.csv",
            "--as",
            "orders",
            "--encoding",
            "utf-16le",
        ],
    );
    assert_contains(
        &err,
        "exports/wide.csv: record 2 (line 3, byte 76): expected 2 fields, found 1",
    );
}

// ---- encodings and bytes -----------------------------------------------------------------

/// "shop,repair\n" is 12 bytes (0..=11), "Quillby Cycle Mend," 19 (12..=30), "d" byte 31: the
/// windows-1252 é (0xE9, not valid UTF-8 here) is byte 32, on line 2.
const LEGACY: &[u8] = b"shop,repair\nQuillby Cycle Mend,d\xe9railleur tune\n";

#[test]
fn invalid_utf8_reports_the_byte_and_suggests_an_encoding() {
    let s = seeded();
    s.file("exports/legacy.csv", LEGACY);
    let err = fails_unchanged(&s, 2, &["receive", "exports/legacy.csv", "--as", "repairs"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/legacy.csv: line 2 (byte 32): invalid UTF-8",
    );
    assert_contains(&err, "pass it, e.g. --encoding windows-1252");
}

#[test]
fn invalid_utf8_file_ingests_with_its_encoding_and_cat_returns_the_original_bytes() {
    let s = Sandbox::with_store();
    s.file("exports/legacy.csv", LEGACY);
    s.ok(&[
        "receive",
        "exports/legacy.csv",
        "--as",
        "repairs",
        "--encoding",
        "windows-1252",
    ]);
    let r = s.run(&["retrieve", "repairs"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.raw_stdout == LEGACY,
        "cat must return the bytes as received, not decoded ones; got {:?}",
        String::from_utf8_lossy(&r.raw_stdout)
    );
    let v = s.json(&["about", "repairs", "--json"]);
    assert_eq!(v["version"]["dialect"]["encoding"], "windows-1252");
    assert_eq!(v["version"]["n_rows"], 1);
    assert_eq!(v["version"]["n_bytes"], LEGACY.len());
}

#[test]
fn invalid_utf8_split_across_read_pieces_reports_the_first_bad_byte() {
    // Intake reads 1 MiB (1 048 576 bytes) at a time. The lead byte 0xC3 of a two-byte
    // sequence sits at offset 1 048 575, the last byte of the first piece; the next byte, 0x28
    // '(', is not a continuation byte, so the ill-formed sequence starts at 1 048 575 (the
    // offset of its first byte is what decoders report; common practice, Unicode chapter 3,
    // from memory).
    let s = seeded();
    let row = "WO-1001,Quillby Cycle Mend,12.50\n"; // 33 bytes
    let header = "order_id,shop,amount\n"; // 21 bytes
    let mut data = header.as_bytes().to_vec();
    while data.len() + row.len() < (1 << 20) - 1 {
        data.extend_from_slice(row.as_bytes());
    }
    data.resize((1 << 20) - 1, b'x'); // the padding joins the last line's text
    data.extend_from_slice(b"\xC3(,Fennmarsh Bike Clinic,1.00\n");
    let bad = (1u64 << 20) - 1;
    let line = 1 + data[..bad as usize].iter().filter(|&&b| b == b'\n').count();
    s.file("exports/big.csv", &data);
    let err = fails_unchanged(&s, 2, &["receive", "exports/big.csv", "--as", "orders"]);
    assert_contains(
        &err,
        &format!("exports/big.csv: line {line} (byte {bad}): invalid UTF-8"),
    );
}

#[test]
fn invalid_bytes_for_a_declared_encoding_report_their_position() {
    let s = seeded();
    // In Shift_JIS, ASCII bytes stand for themselves and 0xFF is no valid byte (WHATWG
    // Encoding Standard, "Shift_JIS decoder", from memory). "shop,city\n" 10 bytes (0..=9),
    // the Quillby row 27 bytes (10..=36), "Oxwater" bytes 37..=43: 0xFF is byte 44, on line 3.
    s.file(
        "exports/sjis.csv",
        b"shop,city\nQuillby Cycle Mend,Quillby\nOxwater\xff Wheelworks,Oxwater\n",
    );
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/sjis.csv",
            "--as",
            "orders",
            "--encoding",
            "shift_jis",
        ],
    );
    assert_contains(&err, "a byte sequence that is not valid shift_jis");
    assert_contains(&err, "exports/sjis.csv: line 3 (byte 44)");
}

#[test]
fn nul_byte_is_refused_with_its_position_and_the_utf16_hint() {
    let s = seeded();
    // "shop,city\n" 10 bytes (0..=9), "Quillby Cycle Mend," 19 (10..=28), "Quill" 29..=33:
    // the NUL is byte 34, on line 2.
    s.file(
        "exports/nul.csv",
        b"shop,city\nQuillby Cycle Mend,Quill\x00by\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/nul.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/nul.csv: line 2 (byte 34): a NUL byte (0x00)",
    );
    assert_contains(&err, "pass --encoding utf-16le or utf-16be");
}

#[test]
fn utf16_file_without_encoding_points_to_the_utf16_option() {
    let s = seeded();
    // UTF-16LE: BOM FF FE (bytes 0, 1), then 's' 0x73 0x00: the first NUL is byte 3, line 1.
    let mut data = vec![0xFF, 0xFE];
    for u in "shop,city\nQuillby Cycle Mend,Quillby\n".encode_utf16() {
        data.extend_from_slice(&u.to_le_bytes());
    }
    s.file("exports/wide.csv", &data);
    let err = fails_unchanged(&s, 2, &["receive", "exports/wide.csv", "--as", "shops"]);
    assert_contains(&err, "exports/wide.csv: line 1 (byte 3): a NUL byte (0x00)");
    assert_contains(&err, "--encoding utf-16le");
    // Following the hint works, and the stored bytes are the file's.
    s.ok(&[
        "receive",
        "exports/wide.csv",
        "--as",
        "shops",
        "--encoding",
        "utf-16le",
    ]);
    assert!(s.run(&["retrieve", "shops"]).raw_stdout == data);
}

#[test]
fn unterminated_quote_at_end_of_file_reports_where_the_record_starts() {
    let s = seeded();
    // Header 19 bytes (0..=18), WO-1001 row 32 bytes (19..=50): the record whose quote never
    // closes is record 2, on line 3, at byte 51; the open quote swallows the rest of the file.
    s.file(
        "exports/quote.csv",
        "order_id,shop,note\n\
         WO-1001,Quillby Cycle Mend,fine\n\
         WO-1002,Oxwater Wheelworks,\"wheel true, spokes\n\
         WO-1003,Fennmarsh Bike Clinic,ok\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/quote.csv", "--as", "orders"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/quote.csv: record 2 (line 3, byte 51): a quoted field is never closed before the end of the file",
    );
    assert_contains(&err, "add the closing \"");
}

// ---- header and key ----------------------------------------------------------------------

#[test]
fn blank_header_names_are_listed_by_column() {
    let s = seeded();
    // Two blank lines (bytes 0 and 1) come first: the header is record 0, on line 3, at byte
    // 2. Column 2 is empty and column 4 is a single space.
    s.file(
        "exports/blank.csv",
        "\n\nshop,,city, \nQuillby Cycle Mend,x,Quillby,y\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/blank.csv", "--as", "shops"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/blank.csv: record 0 (line 3, byte 2): blank header name in columns 2, 4",
    );
    assert_contains(&err, "pass --no-header");
}

#[test]
fn duplicate_header_names_are_listed_once_each() {
    let s = seeded();
    s.file(
        "exports/dups.csv",
        "shop,city,shop,amount,city,shop\nA,B,C,1,D,E\n",
    );
    let err = fails_unchanged(&s, 2, &["receive", "exports/dups.csv", "--as", "shops"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/dups.csv: record 0 (line 1, byte 0): duplicate header names \"shop\", \"city\"; column names must be unique",
    );
}

#[test]
fn key_column_not_in_the_header_lists_the_columns() {
    let s = seeded();
    s.file("exports/orders.csv", SEED);
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/orders.csv",
            "--as",
            "orders",
            "--key",
            "order_no",
        ],
    );
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/orders.csv: key column \"order_no\" not in the header; the columns are: order_id, shop, amount",
    );
    // Of a composite key, only the missing part is named.
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/orders.csv",
            "--as",
            "orders",
            "--key",
            "shop,till",
        ],
    );
    assert_contains(&err, "key column \"till\" not in the header");
}

#[test]
fn duplicate_key_values_are_listed_with_their_lines() {
    let s = seeded();
    // The header is line 1: WO-1 is on lines 2 and 4, WO-2 on lines 3 and 6.
    s.file(
        "exports/dupkeys.csv",
        "order_id,shop\n\
         WO-1,Quillby Cycle Mend\n\
         WO-2,Oxwater Wheelworks\n\
         WO-1,Fennmarsh Bike Clinic\n\
         WO-3,Quillby Cycle Mend\n\
         WO-2,Fennmarsh Bike Clinic\n",
    );
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/dupkeys.csv",
            "--as",
            "orders",
            "--key",
            "order_id",
        ],
    );
    one_paragraph(&err);
    assert_contains(&err, "error: exports/dupkeys.csv: 2 key values");
    assert_contains(&err, "\"WO-1\" (lines 2, 4); \"WO-2\" (lines 3, 6)");
    assert_contains(&err, "choose a key that is unique, or ingest without --key");
}

#[test]
fn blank_key_value_reports_its_record_and_field() {
    let s = seeded();
    // "order_id,shop\n" 14 bytes (0..=13), the WO-1 row 24 bytes (14..=37): the row with the
    // empty order_id is record 2, on line 3, at byte 38, in field 1.
    s.file(
        "exports/blankkey.csv",
        "order_id,shop\nWO-1,Quillby Cycle Mend\n,Oxwater Wheelworks\n",
    );
    let err = fails_unchanged(
        &s,
        2,
        &[
            "receive",
            "exports/blankkey.csv",
            "--as",
            "orders",
            "--key",
            "order_id",
        ],
    );
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: exports/blankkey.csv: record 2 (line 3, byte 38, field 1): blank value in key column \"order_id\"",
    );
}

#[test]
fn empty_key_option_is_a_usage_error() {
    let s = seeded();
    s.file("exports/orders.csv", SEED);
    for key in ["", ","] {
        let err = fails_unchanged(
            &s,
            2,
            &[
                "receive",
                "exports/orders.csv",
                "--as",
                "orders",
                "--key",
                key,
            ],
        );
        assert_contains(&err, "--key needs one or more column names");
    }
}

#[test]
fn missing_required_option_is_a_usage_error_with_exit_code_2() {
    let s = seeded();
    s.file("exports/orders.csv", SEED);
    let err = fails_unchanged(&s, 2, &["receive", "exports/orders.csv"]);
    assert_contains(&err, "--as");
}

// ---- the store ---------------------------------------------------------------------------

#[test]
fn no_store_suggests_sluice_init() {
    let s = Sandbox::new();
    for args in [
        &["timeline"][..],
        &["receive", "exports/seed.csv", "--as", "orders"],
    ] {
        let err = s.fails(2, args);
        one_paragraph(&err);
        assert_contains(&err, "no store here or in any parent folder of");
        assert_contains(&err, "create one with `sluice setup`");
    }
    assert!(
        !s.path().join("sluice-store").exists(),
        "a failed command must not create a store"
    );
}

#[test]
fn store_option_pointing_at_no_store_suggests_init_on_that_folder() {
    let s = Sandbox::new();
    std::fs::create_dir_all(s.path().join("q3")).unwrap();
    let err = s.fails(2, &["timeline", "--store", "q3"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: no store at q3; create one with `sluice setup q3`",
    );
    assert!(!s.path().join("q3/sluice-store").exists());
}

#[test]
fn store_option_naming_an_empty_store_folder_suggests_init_on_its_project() {
    // `sluice setup DIR` creates DIR/sluice-store, so for --store q3/sluice-store the command to suggest
    // is `sluice setup q3`; `sluice setup q3/sluice-store` would make q3/sluice-store/sluice-store.
    let s = Sandbox::new();
    std::fs::create_dir_all(s.path().join("q3/sluice-store")).unwrap();
    let err = s.fails(2, &["timeline", "--store", "q3/sluice-store"]);
    one_paragraph(&err);
    assert_contains(&err, "no store at q3/sluice-store");
    assert_contains(&err, "create one with `sluice setup q3`,");
}

#[test]
fn store_from_a_newer_schema_is_refused_with_both_versions() {
    let s = seeded();
    let db = s.path().join("sluice-store/lineage.db");
    rusqlite::Connection::open(&db)
        .unwrap()
        .execute_batch("PRAGMA user_version = 99")
        .unwrap();
    let before = raw_store(s.path());
    s.file("exports/orders.csv", SEED);
    for args in [
        &["timeline"][..],
        &["receive", "exports/orders.csv", "--as", "returns"],
    ] {
        let err = s.fails(2, args);
        one_paragraph(&err);
        assert_contains(&err, "lineage.db: this store was written by a newer sluice");
        assert_contains(
            &err,
            &format!(
                "schema version 99; this build knows up to {}",
                sluice::store::lineage::SCHEMA_VERSION
            ),
        );
        assert_contains(&err, "upgrade sluice to use it");
    }
    assert_raw_unchanged(&before, &raw_store(s.path()));
    assert_eq!(user_version(&db), 99);
}

#[test]
fn store_from_an_older_schema_is_migrated_on_open() {
    let s = Sandbox::new();
    let store = s.path().join("sluice-store");
    for sub in ["objects", "tmp"] {
        std::fs::create_dir_all(store.join(sub)).unwrap();
    }
    let db = store.join("lineage.db");
    {
        // A real, empty SQLite database: the table written and dropped gives the file its
        // header page; user_version stays 0 and no table is left.
        let c = rusqlite::Connection::open(&db).unwrap();
        c.execute_batch("CREATE TABLE scratch (x); DROP TABLE scratch;")
            .unwrap();
        let n: i64 = c
            .query_row("SELECT count(*) FROM sqlite_master", [], |r| r.get(0))
            .unwrap();
        assert_eq!(n, 0);
    }
    assert_eq!(user_version(&db), 0);
    let out = s.ok(&["timeline"]);
    assert_contains(&out, "no steps to show");
    assert_eq!(user_version(&db), sluice::store::lineage::SCHEMA_VERSION);
    s.file("exports/seed.csv", SEED);
    s.ok(&["receive", "exports/seed.csv", "--as", "orders"]);
    let v = s.json(&["verify", "--json"]);
    assert_eq!(v["intact"], true, "{v}");
    assert_eq!(v["schema_version"], sluice::store::lineage::SCHEMA_VERSION);
}

#[test]
fn corrupted_database_is_named_with_a_restore_hint() {
    let s = seeded();
    let dir = s.path().join("sluice-store");
    for side in ["lineage.db-wal", "lineage.db-shm"] {
        let _ = std::fs::remove_file(dir.join(side));
    }
    let garbage: Vec<u8> = (0..16_384u32)
        .map(|i| (i.wrapping_mul(2_654_435_761) >> 13) as u8)
        .collect();
    std::fs::write(dir.join("lineage.db"), &garbage).unwrap();
    let before = raw_store(s.path());
    s.file("exports/orders.csv", SEED);
    for args in [
        &["timeline"][..],
        &["about", "orders"],
        &["verify"],
        &["receive", "exports/orders.csv", "--as", "returns"],
    ] {
        // CorruptDatabase maps to exit code 1 (src/error.rs, Error::exit_code).
        let err = s.fails(1, args);
        one_paragraph(&err);
        assert_contains(
            &err,
            "sluice-store/lineage.db: the lineage database cannot be read",
        );
        // Not "run verify": verify cannot read the database either.
        assert!(!err.contains("sluice verify"), "{err}");
        assert_contains(&err, "restore it from a backup");
    }
    assert_raw_unchanged(&before, &raw_store(s.path()));
}

// ---- version references ------------------------------------------------------------------

#[test]
fn unknown_dataset_lists_the_datasets() {
    let s = seeded();
    for cmd in ["retrieve", "about"] {
        let r = s.run(&[cmd, "nosuch"]);
        assert_eq!(r.code, 2, "{}", r.stderr);
        assert!(r.stdout.is_empty(), "nothing on stdout: {}", r.stdout);
        one_paragraph(&r.stderr);
        assert_contains(
            &r.stderr,
            "error: unknown version \"nosuch\"; no dataset \"nosuch\"; the datasets are: orders",
        );
    }
}

#[test]
fn version_number_beyond_the_last_says_how_many_there_are() {
    let s = seeded();
    let err = fails_unchanged(&s, 2, &["about", "orders:v9"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: unknown version \"orders:v9\"; dataset orders has 1 version; see them with `sluice timeline --dataset orders`",
    );
}

#[test]
fn version_zero_is_refused_because_numbers_start_at_one() {
    let s = seeded();
    let err = fails_unchanged(&s, 2, &["retrieve", "orders:v0"]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "error: invalid version reference \"orders:v0\": after the ':' comes a version number starting at 1",
    );
}

#[test]
fn a_hash_needs_its_label_and_eight_digits() {
    let s = seeded();
    let hash = s.json(&["about", "orders", "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string();
    let short = format!("blake3:{}", &hash[..7]);
    let err = fails_unchanged(&s, 2, &["retrieve", &short]);
    one_paragraph(&err);
    assert_contains(
        &err,
        &format!(
            "error: invalid version reference \"{short}\": after blake3: come 8 to 64 hex digits"
        ),
    );
    // Bare digits are refused with the advice that works.
    let bare = &hash[..8];
    let err = fails_unchanged(&s, 2, &["retrieve", bare]);
    assert_contains(
        &err,
        &format!("write blake3: before the digits (blake3:{bare})"),
    );
    // Eight digits of the same hash, with the label, do name the version.
    let out = s.run(&["retrieve", &format!("blake3:{bare}")]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert_eq!(out.raw_stdout, SEED.as_bytes());
}

#[test]
fn hash_prefix_matching_nothing_points_to_the_timeline() {
    let s = seeded();
    let hash = s.json(&["about", "orders", "--json"])["version"]["hash"]
        .as_str()
        .unwrap()
        .to_string();
    // The real hash with its first digit changed cannot name the (only) version.
    let first = if hash.starts_with('0') { '1' } else { '0' };
    let other = format!("blake3:{first}{}", &hash[1..8]);
    let err = fails_unchanged(&s, 2, &["about", &other]);
    assert_contains(
        &err,
        &format!(
            "error: unknown version \"{other}\"; no version's hash starts with these digits; list versions with `sluice timeline`"
        ),
    );
}

#[test]
fn ambiguous_hash_prefix_lists_the_candidates() {
    // Versions are named by the BLAKE3 hash of their bytes, so two small files whose hashes
    // share the first 8 hex digits (32 bits) make an ambiguous prefix; by the birthday bound a
    // pair turns up after some 80,000 candidates.
    let content = |i: u32| format!("order_id,shop\nWO-{i},Quillby Cycle Mend\n");
    let mut seen = std::collections::HashMap::new();
    let (a, b) = (0u32..10_000_000)
        .find_map(|i| {
            let h = sluice::hash::Hash::of(content(i).as_bytes()).hex();
            seen.insert(h[..8].to_string(), i).map(|j| (j, i))
        })
        .expect("two hashes sharing 8 hex digits");
    let s = Sandbox::with_store();
    s.file("exports/a.csv", content(a));
    s.file("exports/b.csv", content(b));
    s.ok(&["receive", "exports/a.csv", "--as", "orders"]);
    s.ok(&["receive", "exports/b.csv", "--as", "returns"]);
    let ha = sluice::hash::Hash::of(content(a).as_bytes()).hex();
    let hb = sluice::hash::Hash::of(content(b).as_bytes()).hex();
    let prefix = format!("blake3:{}", &ha[..8]);
    let err = fails_unchanged(&s, 2, &["about", &prefix]);
    one_paragraph(&err);
    assert_contains(
        &err,
        &format!(
            "error: {prefix} matches 2 versions: orders:v1 (blake3:{}), returns:v1 (blake3:{}); give more digits or name one as NAME:vN",
            &ha[..16],
            &hb[..16]
        ),
    );
    // Digits up to the first that differs tell them apart.
    let differ = ha
        .bytes()
        .zip(hb.bytes())
        .position(|(x, y)| x != y)
        .unwrap();
    let longer = format!("blake3:{}", &hb[..(differ + 1).max(8)]);
    let r = s.run(&["retrieve", &longer]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.raw_stdout, content(b).as_bytes());
}

#[test]
fn a_full_hash_shared_by_identical_versions_asks_for_a_name() {
    // The same bytes received as two datasets: one hash, two versions. More digits cannot
    // tell them apart, so the advice is to name one.
    let s = Sandbox::with_store();
    s.file("exports/a.csv", SEED);
    s.ok(&["receive", "exports/a.csv", "--as", "orders"]);
    s.ok(&["receive", "exports/a.csv", "--as", "returns"]);
    let hash = sluice::hash::Hash::of(SEED.as_bytes()).hex();
    let err = fails_unchanged(&s, 2, &["about", &format!("blake3:{hash}")]);
    one_paragraph(&err);
    assert_contains(
        &err,
        "the versions orders:v1 and returns:v1 hold identical bytes",
    );
    assert_contains(&err, "name one as NAME:vN");
    // The advice works.
    assert_eq!(
        s.json(&["about", "returns:v1", "--json"])["version"]["hash"],
        hash.as_str()
    );
}

// ---- permissions -------------------------------------------------------------------------

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions and cannot fail.
    unsafe { libc::geteuid() == 0 }
}

const SETPRIV: &str = "/usr/bin/setpriv";

/// Runs sluice as an unprivileged user: as root, through setpriv as uid/gid 65534 (root reads
/// any file whatever its mode, so the denied path would never be reached); otherwise directly.
fn run_unprivileged(s: &Sandbox, args: &[&str]) -> Run {
    let inner = s.command(args);
    let mut cmd = if is_root() {
        assert!(
            Path::new(SETPRIV).exists(),
            "running as root, the permission test needs {SETPRIV} (util-linux) to drop to an unprivileged user; it is missing"
        );
        let mut c = Command::new(SETPRIV);
        c.args(["--reuid=65534", "--regid=65534", "--clear-groups"])
            .arg(inner.get_program())
            .args(inner.get_args());
        for (k, v) in inner.get_envs() {
            match v {
                Some(v) => c.env(k, v),
                None => c.env_remove(k),
            };
        }
        c.current_dir(s.path());
        c
    } else {
        inner
    };
    let out = cmd.output().expect("run sluice");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
        raw_stdout: out.stdout,
    }
}

fn chmod_all(dir: &Path, mode: u32) {
    std::fs::set_permissions(dir, std::fs::Permissions::from_mode(mode)).unwrap();
    for e in std::fs::read_dir(dir).unwrap().flatten() {
        let p = e.path();
        if p.is_dir() {
            chmod_all(&p, mode);
        } else {
            std::fs::set_permissions(&p, std::fs::Permissions::from_mode(mode)).unwrap();
        }
    }
}

#[test]
fn unreadable_input_file_reports_permission_denied() {
    let s = seeded();
    s.file(
        "exports/oxwater.csv",
        "order_id,shop\nWO-2001,Oxwater Wheelworks\n",
    );
    if is_root() {
        // The unprivileged user must be able to use the store and read the folder.
        chmod_all(s.path(), 0o777);
    }
    // The same user can take in a readable file: what fails below is the file's mode alone.
    let r = run_unprivileged(&s, &["receive", "exports/oxwater.csv", "--as", "oxwater"]);
    assert_eq!(r.code, 0, "control ingest failed:\n{}", r.stderr);

    let locked = s.file("exports/locked.csv", SEED);
    std::fs::set_permissions(&locked, std::fs::Permissions::from_mode(0o000)).unwrap();
    let before = s.snapshot();
    let r = run_unprivileged(&s, &["receive", "exports/locked.csv", "--as", "orders"]);
    let after = s.snapshot();
    assert_eq!(r.code, 2, "expected exit code 2:\n{}", r.stderr);
    one_paragraph(&r.stderr);
    assert_contains(
        &r.stderr,
        "error: exports/locked.csv: permission denied; check the file's owner and mode (ls -l)",
    );
    assert_eq!(before, after, "a denied read changed the store");
}

// ---- regressions -------------------------------------------------------------------------

/// Every file of the object folder with its bytes.
fn object_bytes(s: &Sandbox) -> Vec<(PathBuf, Vec<u8>)> {
    raw_store(s.path())
        .into_iter()
        .filter(|(p, _)| p.starts_with(s.path().join("sluice-store/objects")))
        .collect()
}

#[test]
fn failed_ingest_into_existing_dataset_leaves_log_and_objects_byte_identical() {
    let s = seeded();
    // Failures found at different stages: by the reading side (bytes), by the parsing side
    // (fields, quotes), and after the whole file was read and written out (duplicate keys).
    s.file("exports/bytes.csv", LEGACY);
    s.file(
        "exports/fields.csv",
        "order_id,shop,amount\nWO-1004,Quillby Cycle Mend\n",
    );
    s.file(
        "exports/quote.csv",
        "order_id,shop,amount\nWO-1004,\"Quillby Cycle Mend,1.00\n",
    );
    let mut dups = String::from("order_id,shop,amount\n");
    for i in 0..20_000 {
        dups.push_str(&format!("WO-{},Oxwater Wheelworks,{i}.00\n", i % 19_999));
    }
    s.file("exports/dupkeys.csv", &dups);
    let log_text = s.ok(&["timeline"]);
    let log_json = s.ok(&["timeline", "--json"]);
    let objects = object_bytes(&s);
    let db = std::fs::read(s.path().join("sluice-store/lineage.db")).unwrap();
    for (file, key) in [
        ("exports/bytes.csv", None),
        ("exports/fields.csv", None),
        ("exports/quote.csv", None),
        ("exports/dupkeys.csv", Some("order_id")),
    ] {
        let mut args = vec!["receive", file, "--as", "orders"];
        if let Some(k) = key {
            args.extend(["--key", k]);
        }
        s.fails(2, &args);
        assert_eq!(s.ok(&["timeline"]), log_text, "after {file}");
        assert_eq!(s.ok(&["timeline", "--json"]), log_json, "after {file}");
        let now = object_bytes(&s);
        assert_raw_unchanged(&objects, &now);
        let tmp: Vec<_> = std::fs::read_dir(s.path().join("sluice-store/tmp"))
            .unwrap()
            .collect();
        assert!(tmp.is_empty(), "temporary files left after {file}: {tmp:?}");
        assert!(
            std::fs::read(s.path().join("sluice-store/lineage.db")).unwrap() == db,
            "lineage.db bytes changed after {file}"
        );
    }
}
