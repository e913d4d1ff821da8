//! The HTML report opened in a real browser: Debian's chromium (headless; installed by
//! tests/reference/chromium.sh, which tests/run calls and this test calls too when
//! /usr/bin/chromium is missing) loads the demo's report from a file, with the network and
//! every background service off and a fresh profile. Checked: no console messages (the
//! report has no scripts, so any would be an error or a refused load; a page that logs one
//! shows the check can fail), the lineage SVG present and non-empty in the DOM Chromium built,
//! a screenshot that is not blank (far larger than the same window's screenshot of an empty
//! page), and a printed PDF of more than one page, read back with poppler's pdftotext (Debian's
//! poppler-utils, a PDF reader independent of Chromium): every page carries its number and the
//! report's own hash in the footer, no page holds a heading and nothing else, and the lineage
//! drawing is printed at 7 pt or more. A report of a history whose database was changed behind
//! sluice's back shows a failed verification, in its own look and words. The screenshots, the
//! PDFs and their pages as PNG (pdftoppm) stay under target/browser/ as artefacts, to be
//! looked at.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;

fn chromium() -> PathBuf {
    if let Some(p) = std::env::var_os("SLUICE_CHROMIUM").filter(|p| !p.is_empty()) {
        return PathBuf::from(p);
    }
    let path = PathBuf::from("/usr/bin/chromium");
    if !path.exists() {
        let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/chromium.sh");
        let out = Command::new("bash")
            .arg(script)
            .output()
            .unwrap_or_else(|e| panic!("could not run {script} ({e}) to install chromium"));
        assert!(
            out.status.success(),
            "chromium is needed for the browser check of the HTML report and could not be installed:\n{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    assert!(
        path.exists(),
        "chromium is needed at /usr/bin/chromium (or SLUICE_CHROMIUM) for the browser check"
    );
    path
}

struct Ran {
    stdout: String,
    stderr: String,
}

/// Runs headless chromium on `url` with `extra` arguments and a fresh profile in `profile`.
/// Stops it if it has not finished after three minutes (a hung browser fails the test; this
/// is a guard, not a timed assertion).
fn headless(browser: &Path, profile: &Path, extra: &[String], url: &str) -> Ran {
    let mut child = Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--disable-extensions",
            "--no-first-run",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(extra)
        .arg(url)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start chromium");
    let out_pipe = child.stdout.take().unwrap();
    let err_pipe = child.stderr.take().unwrap();
    let out_reader =
        std::thread::spawn(move || std::io::read_to_string(out_pipe).unwrap_or_default());
    let err_reader =
        std::thread::spawn(move || std::io::read_to_string(err_pipe).unwrap_or_default());
    let started = Instant::now();
    loop {
        if child.try_wait().expect("wait for chromium").is_some() {
            break;
        }
        if started.elapsed() > Duration::from_secs(180) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish with {url} within three minutes");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    Ran {
        stdout: out_reader.join().unwrap(),
        stderr: err_reader.join().unwrap(),
    }
}

/// Console messages Chromium logged for the page (`... CONSOLE(line)] "text", source: ...`).
fn console_lines(stderr: &str) -> Vec<&str> {
    stderr.lines().filter(|l| l.contains("CONSOLE")).collect()
}

fn file_url(p: &Path) -> String {
    format!("file://{}", p.canonicalize().unwrap().display())
}

/// A poppler-utils program (installed with chromium by tests/reference/chromium.sh).
fn poppler(name: &str) -> PathBuf {
    let path = PathBuf::from(format!("/usr/bin/{name}"));
    if !path.exists() {
        chromium_installed_again();
    }
    assert!(
        path.exists(),
        "{name} (poppler-utils) is needed to read the printed report back"
    );
    path
}

fn chromium_installed_again() {
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/chromium.sh");
    let _ = Command::new("bash").arg(script).output();
}

/// The text of each page of a PDF, as pdftotext reads it (pages end with a form feed).
fn pdf_pages(pdf: &Path) -> Vec<String> {
    let out = Command::new(poppler("pdftotext"))
        .args(["-layout"])
        .arg(pdf)
        .arg("-")
        .output()
        .expect("run pdftotext");
    assert!(
        out.status.success(),
        "pdftotext failed on {}",
        pdf.display()
    );
    let text = String::from_utf8_lossy(&out.stdout).into_owned();
    let mut pages: Vec<String> = text.split('\u{c}').map(str::to_string).collect();
    if pages.last().is_some_and(|p| p.trim().is_empty()) {
        pages.pop();
    }
    pages
}

/// The PDF's pages as PNG images beside it, for a person to look at.
fn pdf_to_png(pdf: &Path) {
    let stem = pdf.with_extension("");
    let out = Command::new(poppler("pdftoppm"))
        .args(["-r", "70", "-png"])
        .arg(pdf)
        .arg(&stem)
        .output()
        .expect("run pdftoppm");
    assert!(out.status.success(), "pdftoppm failed on {}", pdf.display());
}

/// The report's own hash, as the command printed it.
fn own_hash(out: &str) -> String {
    out.lines()
        .find_map(|l| l.trim().strip_prefix("own hash blake3:"))
        .unwrap_or_else(|| panic!("no own hash in:\n{out}"))
        .to_string()
}

#[test]
fn the_demo_report_renders_in_chromium_without_errors() {
    let browser = chromium();
    let s = Sandbox::with_demo();
    let written = s.ok(&[
        "report",
        "q3_by_shop",
        "-o",
        "q3_by_shop.html",
        "--reproduce",
    ]);
    let own = own_hash(&written);
    let report = s.path().join("q3_by_shop.html");
    let artefacts = PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/target/browser"));
    std::fs::create_dir_all(&artefacts).unwrap();
    let profile = tempfile::tempdir().unwrap();

    // The DOM as Chromium built it, and what it logged on the way.
    let dom = headless(
        &browser,
        profile.path(),
        &["--dump-dom".to_string()],
        &file_url(&report),
    );
    let console = console_lines(&dom.stderr);
    assert!(
        console.is_empty(),
        "the report logged console messages:\n{}",
        console.join("\n")
    );
    let lineage = dom
        .stdout
        .split("<div class=\"lineage\">")
        .nth(1)
        .unwrap_or_else(|| panic!("no lineage section in the DOM:\n{}", dom.stdout));
    let svg = lineage.split("</svg>").next().unwrap();
    assert!(svg.contains("<svg"), "the lineage SVG is missing");
    assert!(
        svg.matches("<rect").count() >= 10 && svg.matches("<text").count() >= 10,
        "the lineage SVG is empty or nearly so"
    );
    assert!(svg.contains("q3_by_shop:v1"));
    assert!(dom.stdout.contains("not legal or regulatory advice"));
    // Every edge has its arrowhead, and no label is cut short.
    assert_eq!(
        svg.matches("<path ").count(),
        svg.matches("class=\"arrowhead\"").count()
    );
    assert!(!svg.contains('…'), "a label in the drawing was cut");
    // The published figures themselves, and the verification in its own words: the demo's
    // report is made with --reproduce, so it passed.
    assert!(dom.stdout.contains("The published figures: q3_by_shop:v1"));
    assert!(dom.stdout.contains("<td>Quillby Cycle Mend</td>"));
    assert!(dom
        .stdout
        .contains("<div class=\"stamp passed\"><span class=\"stamp-label\">Verified</span>"));
    // The drawing's width in its units: printed on A4 (210 mm less 24 mm of margins = 703 CSS
    // px; CSS 2.1: 1 in = 96 px = 72 pt) it is scaled to fit, never enlarged, and its 11-unit
    // labels must come out at 7 pt or more.
    let width: f64 = svg
        .split("width=\"")
        .nth(1)
        .and_then(|w| w.split('"').next())
        .and_then(|w| w.parse().ok())
        .expect("the drawing's width");
    let printed_pt = 11.0 * (703.0 / width).min(1.0) * 0.75;
    assert!(
        printed_pt >= 7.0,
        "the drawing ({width} units wide) prints its labels at {printed_pt:.1} pt on A4"
    );

    // A screenshot of the report, and of an empty page in the same window for comparison.
    let size = "--window-size=1280,2400".to_string();
    let shot = artefacts.join("q3_by_shop_report.png");
    let _ = std::fs::remove_file(&shot);
    headless(
        &browser,
        profile.path(),
        &[format!("--screenshot={}", shot.display()), size.clone()],
        &file_url(&report),
    );
    let blank_page = s.file("blank.html", "<!DOCTYPE html><html><body></body></html>");
    let blank_shot = artefacts.join("blank_page.png");
    headless(
        &browser,
        profile.path(),
        &[format!("--screenshot={}", blank_shot.display()), size],
        &file_url(&blank_page),
    );
    let png = std::fs::read(&shot).expect("chromium wrote the screenshot");
    let blank = std::fs::read(&blank_shot).expect("chromium wrote the blank screenshot");
    assert!(png.starts_with(b"\x89PNG\r\n\x1a\n"), "not a PNG");
    assert!(
        png.len() > 5 * blank.len(),
        "the screenshot ({} bytes) is hardly larger than an empty page's ({} bytes): the page looks blank",
        png.len(),
        blank.len()
    );

    // Printed to PDF (the print style sheet applies) on US Letter, Chromium's default, and on
    // ISO A4 (a copy of the report that asks for it); page sizes in PostScript points, within
    // one point: Letter 8.5 × 11 in = 612 × 792, A4 (ISO 216) 210 × 297 mm = 595.3 × 841.9.
    let html = std::fs::read_to_string(&report).unwrap();
    let a4 = s.file(
        "q3_by_shop_a4.html",
        html.replacen("<head>", "<head><style>@page { size: A4; }</style>", 1),
    );
    for (page, paper, media_box) in [
        (&report, "letter", (612.0, 792.0)),
        (&a4, "a4", (595.3, 841.9)),
    ] {
        let pdf_path = artefacts.join(format!("q3_by_shop_report_{paper}.pdf"));
        let _ = std::fs::remove_file(&pdf_path);
        headless(
            &browser,
            profile.path(),
            &[
                format!("--print-to-pdf={}", pdf_path.display()),
                "--no-pdf-header-footer".to_string(),
            ],
            &file_url(page),
        );
        let pdf = std::fs::read(&pdf_path).expect("chromium wrote the PDF");
        assert!(pdf.starts_with(b"%PDF-"), "not a PDF");
        let text = String::from_utf8_lossy(&pdf);
        let pages = text.matches("/Type /Page").count() - text.matches("/Type /Pages").count();
        assert!(
            pages >= 2,
            "the report printed on {paper} has {pages} pages"
        );
        // Read back by poppler: each page's footer, and no page that holds a heading alone.
        let texts = pdf_pages(&pdf_path);
        assert_eq!(
            texts.len(),
            pages,
            "pdftotext and the PDF disagree on pages"
        );
        for (i, page) in texts.iter().enumerate() {
            let footer = format!("page {} of {}", i + 1, pages);
            assert!(
                page.contains(&footer) && page.contains(&format!("own hash blake3:{own}")),
                "page {} of the {paper} print lacks its footer ({footer}, own hash):\n{page}",
                i + 1
            );
            let body: Vec<&str> = page
                .lines()
                .map(str::trim)
                .filter(|l| !l.is_empty() && !l.contains(&footer))
                .collect();
            assert!(
                body.len() > 1,
                "page {} of the {paper} print holds only {body:?}",
                i + 1
            );
        }
        let lineage = texts
            .iter()
            .find(|p| p.lines().any(|l| l.trim() == "Lineage"))
            .expect("a page with the lineage heading");
        assert!(
            lineage.contains("version (entity)") && lineage.contains("step 1 · ingest"),
            "the lineage heading is printed without the drawing under it:\n{lineage}"
        );
        pdf_to_png(&pdf_path);
        let first = text
            .split("/MediaBox [")
            .nth(1)
            .and_then(|t| t.split(']').next())
            .unwrap_or_else(|| panic!("the {paper} PDF has no /MediaBox"));
        let n: Vec<f64> = first
            .split_whitespace()
            .filter_map(|x| x.parse().ok())
            .collect();
        assert!(
            n.len() == 4
                && (n[2] - n[0] - media_box.0).abs() < 1.0
                && (n[3] - n[1] - media_box.1).abs() < 1.0,
            "the report printed on {paper} has pages of [{first}], not {media_box:?} points"
        );
    }
}

#[test]
fn a_report_of_a_tampered_history_shows_a_failed_verification() {
    let browser = chromium();
    let s = Sandbox::with_demo();
    // A recorded reason changed in the database behind sluice's back: the audit chain's row
    // commitment for that step no longer matches.
    let db = rusqlite::Connection::open(s.path().join("sluice-store/lineage.db")).unwrap();
    let changed = db
        .execute(
            "UPDATE steps SET reason = 'nothing to see here' WHERE id = 20",
            [],
        )
        .unwrap();
    assert_eq!(changed, 1);
    drop(db);
    // The report is still written, and the command says the data failed (exit code 1).
    s.fails(
        1,
        &["report", "q3_by_shop", "-o", "tampered.html", "--reproduce"],
    );
    let report = s.path().join("tampered.html");
    let profile = tempfile::tempdir().unwrap();
    let dom = headless(
        &browser,
        profile.path(),
        &["--dump-dom".to_string()],
        &file_url(&report),
    );
    let page = &dom.stdout;
    assert!(
        page.contains("<div class=\"stamp failed\"><span class=\"stamp-label\">Failed</span>"),
        "the tampered history's report does not show a failed verification:\n{page}"
    );
    assert!(page.contains("FAILED: problems found"));
    assert!(page.contains("<ul class=\"problems\">"));
    assert!(!page.contains("stamp passed") && !page.contains("stamp-label\">Verified"));
    let artefacts = PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/target/browser"));
    std::fs::create_dir_all(&artefacts).unwrap();
    let shot = artefacts.join("tampered_report.png");
    let _ = std::fs::remove_file(&shot);
    headless(
        &browser,
        profile.path(),
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1280,2000".to_string(),
        ],
        &file_url(&report),
    );
    assert!(std::fs::read(&shot)
        .expect("chromium wrote the screenshot")
        .starts_with(b"\x89PNG"));
}

#[test]
fn the_console_check_sees_an_error_a_page_logs() {
    // The check above can fail: a page with a script that logs an error is caught.
    let browser = chromium();
    let s = Sandbox::new();
    let page = s.file(
        "noisy.html",
        "<!DOCTYPE html><html><body><script>console.error('sluice inspect')</script></body></html>",
    );
    let profile = tempfile::tempdir().unwrap();
    let ran = headless(
        &browser,
        profile.path(),
        &["--dump-dom".to_string()],
        &file_url(&page),
    );
    let console = console_lines(&ran.stderr);
    assert!(
        console.iter().any(|l| l.contains("sluice inspect")),
        "chromium's log did not show the page's console error:\n{}",
        ran.stderr
    );
}
