//! The demo: an invented scenario, generated deterministically, taken in to a fresh store.
//!
//! The Three Rivers Cycle Cooperative has three bicycle repair shops — Quillby Cycle Mend,
//! Oxwater Wheelworks and Fennmarsh Bike Clinic — that each export their quarterly work orders
//! from a different till system, with the usual dirt: stray spaces, mixed case, rows exported
//! twice, amounts written as text in three styles, dates in mixed formats, inconsistent service
//! labels, blanks, cancelled and test orders. Every name, address and number is made up; e-mail
//! addresses use the reserved `example.org`/`example.net` domains (RFC 2606).
//!
//! After the plan, the demo does two pieces of work outside sluice and records them with lineage
//! inferred by a diff: a short Python script it writes (run with `python3` through
//! [`crate::exec`]) restores a technician's accent the Quillby till cannot type, and a hand edit
//! (made here, as a person would in a spreadsheet) adds a note the Oxwater till has no field for.
//!
//! The same generator makes the benchmark's large files (`work_orders`), so the benchmark
//! measures the kind of file the demo shows.

use std::io::{self, Write};
use std::path::{Path, PathBuf};

use crate::error::{Error, ErrorKind, Result};
use crate::exec::{ExecFailure, ExecOptions, ExecOutcome};
use crate::inferred::{HandEditOutcome, RecordedSuccessor};
use crate::intake::IngestOptions;
use crate::model::Agent;
use crate::plan;
use crate::store::Store;

/// A small deterministic generator (SplitMix64), so the demo and benchmark data are the same
/// on every machine.
pub struct Rng(u64);

impl Rng {
    pub fn new(seed: u64) -> Self {
        Rng(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in 0..n (n > 0).
    pub fn below(&mut self, n: u64) -> u64 {
        self.next_u64() % n
    }

    /// True with probability `percent`/100.
    pub fn chance(&mut self, percent: u64) -> bool {
        self.below(100) < percent
    }

    pub fn pick<'a, T>(&mut self, items: &'a [T]) -> &'a T {
        &items[self.below(items.len() as u64) as usize]
    }
}

/// How one shop's till writes its export.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Till {
    /// Quillby: comma, LF, amounts like `1,204.50` or `€12.50`, ISO and US-style dates.
    Quillby,
    /// Oxwater: semicolon, CRLF, UTF-8 BOM, decimal comma (`12,50 €`), dates `03.07.2026`.
    Oxwater,
    /// Fennmarsh: comma, CRLF, `EUR 12.50`, refunds in parentheses, dates `3/7/2026` (d/m/y).
    Fennmarsh,
}

impl Till {
    pub fn shop(self) -> &'static str {
        match self {
            Till::Quillby => "Quillby Cycle Mend",
            Till::Oxwater => "Oxwater Wheelworks",
            Till::Fennmarsh => "Fennmarsh Bike Clinic",
        }
    }

    fn seed(self) -> u64 {
        match self {
            Till::Quillby => 0x51_0001,
            Till::Oxwater => 0x0a_0002,
            Till::Fennmarsh => 0xfe_0003,
        }
    }

    fn delimiter(self) -> u8 {
        if self == Till::Oxwater {
            b';'
        } else {
            b','
        }
    }

    fn newline(self) -> &'static [u8] {
        if self == Till::Quillby {
            b"\n"
        } else {
            b"\r\n"
        }
    }

    fn header(self) -> &'static [&'static str] {
        match self {
            Till::Oxwater => &[
                "order no", "date", "client", "e-mail", "job", "parts", "labour h", "status",
                "mechanic", "note",
            ],
            _ => &[
                "order_id",
                "opened",
                "customer",
                "email",
                "service",
                "parts_cost",
                "labour_hours",
                "status",
                "technician",
                "notes",
            ],
        }
    }

    fn technicians(self) -> &'static [&'static str] {
        match self {
            Till::Quillby => &["Ines", "Tobiah", "Marguerite"],
            Till::Oxwater => &["Caspar", "Yolande"],
            Till::Fennmarsh => &["Ravi", "Oona", "Bertil", "Suki"],
        }
    }
}

const GIVEN: &[&str] = &[
    "Ada", "Bram", "Cora", "Dev", "Elska", "Farid", "Greta", "Hollis", "Ivo", "Juno", "Kit",
    "Lorna", "Mads", "Nell", "Otto", "Perpetua", "Quinn", "Rosalind", "Soren", "Tamsin", "Ulla",
    "Vikram", "Wren", "Xanthe", "Yusuf", "Zelda",
];
const SURNAME_HEAD: &[&str] = &[
    "Ash", "Bram", "Cor", "Dun", "Fen", "Gil", "Hal", "Kest", "Lor", "Mor", "Pel", "Quen", "Rud",
    "Tarr", "Wick", "Yarl",
];
const SURNAME_TAIL: &[&str] = &[
    "by", "ford", "wick", "more", "ley", "ton", "well", "stow", "marsh", "croft",
];

/// Service labels as three tills and many hands type them.
const SERVICES: &[&str] = &[
    "Flat repair",
    "flat fix",
    "Puncture",
    "FLAT REPAIR",
    "Brake tune",
    "brakes - adjust",
    "Brake Tune ",
    "Full service",
    "full-service",
    "Full Service",
    "Gear index",
    "gears",
    "Wheel true",
    "wheel truing",
    "Chain replace",
    "chain replacement",
];
const STATUSES: &[&str] = &[
    "done",
    "Done",
    "DONE",
    "open",
    "Open",
    "cancelled",
    "Cancelled",
];
const NOTES: &[&str] = &[
    "",
    "",
    "",
    "",
    "customer waited",
    "parts on order",
    "rush, same day",
    "warranty \"B\" claim",
    "returned, second visit",
    "  ",
];

fn money(rng: &mut Rng, till: Till) -> String {
    // Cents as an integer, so the text is exact.
    let cents = if rng.chance(2) {
        100_000 + rng.below(400_000)
    } else {
        rng.below(9_000) + 250
    };
    let (euros, c) = (cents / 100, cents % 100);
    let grouped = |sep: char| {
        let s = euros.to_string();
        let mut out = String::new();
        for (i, ch) in s.chars().enumerate() {
            if i > 0 && (s.len() - i) % 3 == 0 {
                out.push(sep);
            }
            out.push(ch);
        }
        out
    };
    match till {
        Till::Quillby => match rng.below(4) {
            0 => format!("{}.{c:02}", grouped(',')),
            1 => format!("€{euros}.{c:02}"),
            2 => format!("{euros}.{}", c / 10),
            _ => format!(" {euros}.{c:02}"),
        },
        Till::Oxwater => match rng.below(3) {
            0 => format!("{},{c:02} €", grouped('.')),
            1 => format!("{euros},{c:02}"),
            _ => format!("€ {euros},{c:02}"),
        },
        Till::Fennmarsh => match rng.below(5) {
            0 => format!("({euros}.{c:02})"),
            1 => format!("EUR {euros}.{c:02}"),
            _ => format!("{euros}.{c:02}"),
        },
    }
}

fn date(rng: &mut Rng, till: Till, quarter_start_month: u32) -> String {
    let m = quarter_start_month + rng.below(3) as u32;
    let d = 1 + rng.below(if m == 9 || m == 6 || m == 4 || m == 11 {
        30
    } else {
        31
    }) as u32;
    match till {
        Till::Quillby => match rng.below(3) {
            0 => format!("{m:02}/{d:02}/2026"),
            1 => format!("2026-{m:02}-{d:02}"),
            _ => format!(
                "{d} {} 2026",
                [
                    "Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov",
                    "Dec"
                ][(m - 1) as usize]
            ),
        },
        Till::Oxwater => format!("{d:02}.{m:02}.2026"),
        Till::Fennmarsh => format!("{d}/{m}/2026"),
    }
}

fn quote_if_needed(field: &str, delimiter: u8) -> String {
    let needs = field
        .bytes()
        .any(|b| b == delimiter || b == b'"' || b == b'\n' || b == b'\r');
    if needs {
        format!("\"{}\"", field.replace('"', "\"\""))
    } else {
        field.to_string()
    }
}

/// Writes `n_rows` work orders of one shop's export (header first), as its till would.
pub fn work_orders(
    out: &mut impl Write,
    till: Till,
    n_rows: u64,
    first_order: u64,
) -> io::Result<()> {
    let mut rng = Rng::new(till.seed() ^ n_rows.rotate_left(17));
    let delim = till.delimiter();
    let nl = till.newline();
    if till == Till::Oxwater {
        out.write_all(crate::table::stream::UTF8_BOM)?;
    }
    let header: Vec<String> = till
        .header()
        .iter()
        .map(|h| quote_if_needed(h, delim))
        .collect();
    out.write_all(header.join(&(delim as char).to_string()).as_bytes())?;
    out.write_all(nl)?;
    let mut previous: Option<Vec<String>> = None;
    let mut written = 0u64;
    let mut order = first_order;
    while written < n_rows {
        // About 1 row in 40 is the previous row exported a second time.
        if let (true, Some(prev)) = (rng.chance(2) && written > 0, previous.as_ref()) {
            write_row(out, prev, delim, nl)?;
            written += 1;
            continue;
        }
        order += 1;
        let given = *rng.pick(GIVEN);
        let surname = format!("{}{}", rng.pick(SURNAME_HEAD), rng.pick(SURNAME_TAIL));
        let customer = match rng.below(10) {
            0 => format!(" {given} {surname}"),
            1 => format!("{given}  {surname}"),
            2 => format!("{} {}", given.to_uppercase(), surname.to_uppercase()),
            _ => format!("{given} {surname}"),
        };
        let email = match rng.below(12) {
            0 => String::new(),
            1 => format!("{}.{}@Example.org", given, surname),
            2 => format!(
                " {}.{}@example.net ",
                given.to_lowercase(),
                surname.to_lowercase()
            ),
            _ => format!(
                "{}.{}@example.org",
                given.to_lowercase(),
                surname.to_lowercase()
            ),
        };
        let status = if rng.chance(1) {
            "test".to_string()
        } else {
            rng.pick(STATUSES).to_string()
        };
        let hours = match rng.below(8) {
            0 => String::new(),
            1 => format!("{},{}", rng.below(4), 5),
            _ => format!("{}.{}", rng.below(4), [0, 25, 5, 75][rng.below(4) as usize]),
        };
        let row = vec![
            match till {
                Till::Oxwater => format!("OX-{order}"),
                Till::Fennmarsh => format!("F{order:06}"),
                Till::Quillby => order.to_string(),
            },
            date(&mut rng, till, 7),
            customer,
            email,
            rng.pick(SERVICES).to_string(),
            money(&mut rng, till),
            hours,
            status,
            rng.pick(till.technicians()).to_string(),
            rng.pick(NOTES).to_string(),
        ];
        write_row(out, &row, delim, nl)?;
        previous = Some(row);
        written += 1;
    }
    Ok(())
}

fn write_row(out: &mut impl Write, row: &[String], delim: u8, nl: &[u8]) -> io::Result<()> {
    for (i, f) in row.iter().enumerate() {
        if i > 0 {
            out.write_all(&[delim])?;
        }
        out.write_all(quote_if_needed(f, delim).as_bytes())?;
    }
    out.write_all(nl)
}

/// The cooperative's mapping from the labels the tills use to its own service names.
pub fn service_labels() -> String {
    let mut s = String::from("label,service\n");
    let mut seen = Vec::new();
    for l in SERVICES {
        // The table lists each label once, as it reads after trimming.
        let l = l.trim();
        if seen.contains(&l) {
            continue;
        }
        seen.push(l);
        let canon = match l.trim().to_lowercase().as_str() {
            "flat repair" | "flat fix" | "puncture" => "puncture repair",
            "brake tune" | "brakes - adjust" => "brake adjustment",
            "full service" | "full-service" => "full service",
            "gear index" | "gears" => "gear indexing",
            "wheel true" | "wheel truing" => "wheel truing",
            _ => "chain replacement",
        };
        s.push_str(&format!("{},{canon}\n", quote_if_needed(l, b',')));
    }
    s
}

/// What the demo did.
#[derive(Debug)]
pub struct DemoReport {
    pub dir: PathBuf,
    pub scenario: String,
    /// The plan file, relative to `dir`.
    pub plan: PathBuf,
    /// What the run of the plan did: the intakes, then each step.
    pub done: Vec<plan::Done>,
    /// The outside work after the plan: (what was done, as a command line, and the version it
    /// recorded), the script's run first, then the hand edit.
    pub outside: Vec<(String, RecordedSuccessor)>,
    /// Where one cleaned amount came from: the command that asks, and its answer.
    pub traced: (String, crate::trace::Trail),
    /// Why one shop's quarterly total is what it is: the command, and its answer.
    pub explained: (String, crate::explain::Explanation),
    /// The quarter's summary computed again from the raw exports: the command, and its answer.
    pub replayed: (String, crate::replay::ReplayReport),
    /// The quarter's figures documented for an audit, written beside the store.
    pub documented: Documented,
    pub next_commands: Vec<String>,
}

/// What the demo writes for an audit: the lineage report of `q3_by_shop` (with a replay),
/// written and recorded by [`crate::report::write`] as `sluice report` does, and its lineage in
/// W3C PROV-JSON.
#[derive(Debug)]
pub struct Documented {
    pub report_file: PathBuf,
    pub report: crate::report::Written,
    pub prov_file: PathBuf,
    /// Entities, activities and agents in the PROV document.
    pub prov_counts: (usize, usize, usize),
}

/// The report's name beside the demo's store.
pub const REPORT_FILE: &str = "q3_by_shop-report.html";
pub const PROV_FILE: &str = "q3_by_shop.prov.json";

/// Writes the report and the PROV export of `q3_by_shop` in `dir`.
fn document(store: &mut Store, dir: &Path, agent: &Agent) -> Result<Documented> {
    let reference = "q3_by_shop";
    let report_file = dir.join(REPORT_FILE);
    let opts = crate::report::ReportOptions {
        sample: 5,
        replay: true,
        excluded: 10,
        agent: agent.identity(),
    };
    let report = crate::report::write(
        store,
        agent,
        reference,
        crate::report::Format::Html,
        &report_file,
        &opts,
    )?;
    let prov = crate::prov::document(store, reference)?;
    let prov_file = dir.join(PROV_FILE);
    let text = crate::prov::to_json(&prov);
    let tmp = dir.join(format!(".{PROV_FILE}.sluice-part"));
    std::fs::File::create(&tmp)
        .and_then(|mut f| f.write_all(text.as_bytes()).and_then(|_| f.sync_all()))
        .and_then(|_| std::fs::rename(&tmp, &prov_file))
        .map_err(|e| {
            let _ = std::fs::remove_file(&tmp);
            Error::io(&prov_file, e)
        })?;
    use crate::prov::ElementKind as K;
    Ok(Documented {
        report_file,
        report,
        prov_file,
        prov_counts: (
            prov.count(K::Entity),
            prov.count(K::Activity),
            prov.count(K::Agent),
        ),
    })
}

/// A folder name under `cwd` that does not exist yet: `sluice-demo`, `sluice-demo-2`, ...
pub fn fresh_folder(cwd: &Path) -> PathBuf {
    let mut n = 1;
    loop {
        let name = if n == 1 {
            "sluice-demo".to_string()
        } else {
            format!("sluice-demo-{n}")
        };
        let p = cwd.join(name);
        if !p.exists() {
            return p;
        }
        n += 1;
    }
}

/// The cooperative's staff list: who works at which shop.
pub fn technicians() -> String {
    let mut s = String::from("name,shop\n");
    for till in [Till::Quillby, Till::Oxwater, Till::Fennmarsh] {
        for t in till.technicians() {
            s.push_str(&format!("{t},{}\n", till.shop()));
        }
    }
    s
}

/// The demo's plan: every till's export cleaned its own way, stacked, checked and summed.
pub const PLAN: &str = include_str!("../examples/plans/three_rivers_q3.json");

/// Where the demo writes its plan, inside the demo folder.
pub const PLAN_FILE: &str = "q3_cleaning.json";

/// Creates the demo in `dir`: the exports and the plan, a store, and a run of the plan (which
/// takes the exports in and records every step).
pub fn run(dir: &Path, agent: &Agent) -> Result<DemoReport> {
    run_at(dir, agent, &crate::store::location::Location::default())
}

/// [`run`] with the store's lineage or objects where `at` says (`demo --object-bucket`).
pub fn run_at(
    dir: &Path,
    agent: &Agent,
    at: &crate::store::location::Location,
) -> Result<DemoReport> {
    let exports = dir.join("exports");
    std::fs::create_dir_all(&exports).map_err(|e| Error::io(&exports, e))?;
    for (till, name, rows, first) in [
        (Till::Quillby, "quillby_2026q3.csv", 240u64, 41_000u64),
        (Till::Oxwater, "oxwater_2026q3.csv", 180, 7_200),
        (Till::Fennmarsh, "fennmarsh_2026q3.csv", 210, 3_100),
    ] {
        let path = exports.join(name);
        let mut buf = Vec::new();
        work_orders(&mut buf, till, rows, first).map_err(|e| Error::io(&path, e))?;
        std::fs::write(&path, &buf).map_err(|e| Error::io(&path, e))?;
    }
    for (name, text) in [
        ("service_labels.csv", service_labels()),
        ("technicians.csv", technicians()),
    ] {
        let path = exports.join(name);
        std::fs::write(&path, text).map_err(|e| Error::io(&path, e))?;
    }
    let plan_path = dir.join(PLAN_FILE);
    std::fs::write(&plan_path, PLAN).map_err(|e| Error::io(&plan_path, e))?;
    let plan = plan::parse(PLAN, PLAN_FILE)?;

    let mut store = Store::init_recorded_at(dir, agent, at)?;
    let opts = plan::RunOptions {
        plan_dir: dir.to_path_buf(),
        bindings: Vec::new(),
        agent: agent.clone(),
    };
    let report = plan::run(&mut store, &plan, &opts).map_err(|f| {
        Error::from(crate::error::ErrorKind::Data(format!(
            "the demo plan stopped at {}: {}",
            f.at, f.error
        )))
    })?;

    let outside = outside_work(&mut store, dir, agent)?;

    // The questions sluice is for: where did this amount come from, and why is this total what
    // it is. An Oxwater amount (written with a decimal comma and a euro sign at the till) and
    // the Oxwater total.
    let order = "OX-7201";
    let traced = (
        format!("sluice trace all_orders --key order_id={order} --column parts_cost"),
        crate::trace::trace(
            &store,
            "all_orders",
            &crate::trace::RowPick::Key(vec![("order_id".into(), order.into())]),
            "parts_cost",
        )?,
    );
    let shop = Till::Oxwater.shop();
    let explained = (
        format!("sluice explain q3_shop_totals --key \"shop={shop}\" --column sum_parts_cost"),
        crate::explain::explain(
            &store,
            "q3_shop_totals",
            &crate::trace::RowPick::Key(vec![("shop".into(), shop.into())]),
            "sum_parts_cost",
            3,
        )?,
    );

    // Can last quarter's figures be reproduced exactly? Every step again from the raw exports.
    let replayed = (
        "sluice reproduce q3_by_shop".to_string(),
        crate::replay::replay(
            &mut store,
            "q3_by_shop",
            &crate::replay::ReplayOptions::default(),
        )?,
    );

    // Documented for an audit: the report of the cooperative's Q3 figures (reproduced from the
    // raw exports) and their lineage in W3C PROV, written beside the demo's store.
    let documented = document(&mut store, dir, agent)?;

    Ok(DemoReport {
        outside,
        traced,
        explained,
        replayed,
        documented,
        dir: dir.to_path_buf(),
        scenario: "The Three Rivers Cycle Cooperative: three bicycle repair shops, each exporting its Q3 work orders \
                   from a different till (comma / semicolon with decimal commas and a BOM / CRLF), plus the \
                   cooperative's table of service names and its staff list. All of it is invented."
            .to_string(),
        plan: PathBuf::from(PLAN_FILE),
        done: report.done,
        // No `cd .` when the demo was made where the user stands.
        next_commands: (dir != Path::new("."))
            .then(|| format!("cd {}", dir.display()))
            .into_iter()
            .chain([
            "sluice timeline --dataset all_orders".to_string(),
            "sluice about all_orders".to_string(),
            "sluice retrieve q3_by_shop".to_string(),
            "sluice timeline --dataset reviewed_orders".to_string(),
            "sluice compare all_orders reviewed_orders:v1".to_string(),
            "sluice retrieve quillby_orders:v1 | head -5".to_string(),
            "sluice export q3_by_shop --format plan".to_string(),
            "sluice verify".to_string(),
            ])
            .collect(),
    })
}

/// The demo's outside script: it reads the cooperative's orders and writes them back with one
/// technician's name as she spells it.
pub const FIX_SCRIPT: &str = r#""""The Quillby till cannot type accents: Inès's work orders say "Ines".
Reads the work orders (argument 1) and writes them (argument 2) with her name as she spells it."""
import csv
import sys

with open(sys.argv[1], newline="", encoding="utf-8") as src, \
        open(sys.argv[2], "w", newline="", encoding="utf-8") as dst:
    rows = csv.reader(src)
    out = csv.writer(dst, lineterminator="\n")
    header = next(rows)
    out.writerow(header)
    col = header.index("technician")
    fixed = 0
    for row in rows:
        if row[col] == "Ines":
            row[col] = "Inès"
            fixed += 1
        out.writerow(row)
print(f"restore_accents.py: Inès written in {fixed} orders", file=sys.stderr)
"#;

/// The script run and the hand edit, each recorded with its reason.
fn outside_work(
    store: &mut Store,
    dir: &Path,
    agent: &Agent,
) -> Result<Vec<(String, RecordedSuccessor)>> {
    let review = dir.join("review");
    std::fs::create_dir_all(&review).map_err(|e| Error::io(&review, e))?;
    let script = review.join("restore_accents.py");
    std::fs::write(&script, FIX_SCRIPT).map_err(|e| Error::io(&script, e))?;
    let command: Vec<String> = [
        "python3",
        "review/restore_accents.py",
        "{all_orders}",
        "{out:reviewed_orders}",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    let why = "the Quillby till cannot type accents; Inès asked for her name as she spells it";
    let opts = ExecOptions {
        inputs: vec![("all_orders".into(), "all_orders".into())],
        outputs: vec![(
            "reviewed_orders".into(),
            PathBuf::from("review/reviewed_orders.csv"),
        )],
        command: command.clone(),
        cwd: dir.to_path_buf(),
        reason: why.into(),
        agent: agent.clone(),
        match_by_order: false,
    };
    let shown = format!(
        "sluice capture --input all_orders --output reviewed_orders=review/reviewed_orders.csv --why \"{why}\" -- {}",
        command.join(" ")
    );
    let ran = match crate::exec::exec(store, &opts)? {
        ExecOutcome::Recorded { mut recorded, .. } => recorded.pop().ok_or_else(|| {
            Error::from(ErrorKind::Data(
                "the demo's script wrote nothing new; run the demo in a fresh folder".into(),
            ))
        })?,
        ExecOutcome::Failed {
            failure: ExecFailure::NotStarted { found: false, .. },
            ..
        } => {
            return Err(ErrorKind::Data(
                "the demo runs a short Python script with `python3`, which was not found; install Python 3 (or put it on PATH) and run the demo again".into(),
            )
            .into())
        }
        ExecOutcome::Failed { failure, .. } => {
            return Err(ErrorKind::Data(format!(
                "the demo's script failed: {}; the demo needs Python 3 as `python3`",
                failure.describe()
            ))
            .into())
        }
    };

    // The hand edit: the Oxwater manager adds a note to the shop's first order, as one would
    // in a spreadsheet, and saves the file under a new name.
    let edited = review.join("reviewed_orders_with_note.csv");
    let source = review.join("reviewed_orders.csv");
    let bytes = std::fs::read(&source).map_err(|e| Error::io(&source, e))?;
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .from_reader(&bytes[..]);
    let mut rows: Vec<csv::StringRecord> = Vec::new();
    for r in reader.records() {
        rows.push(r.map_err(|e| {
            Error::from(ErrorKind::Data(format!(
                "the demo's script wrote {} that cannot be read back: {e}",
                source.display()
            )))
        })?);
    }
    let col = |name: &str| rows.first().and_then(|h| h.iter().position(|c| c == name));
    let (Some(shop), Some(notes)) = (col("shop"), col("notes")) else {
        return Err(ErrorKind::Data(format!(
            "{} lacks the shop or notes column the demo edits",
            source.display()
        ))
        .into());
    };
    let mut writer = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let mut noted = false;
    for (i, r) in rows.iter().enumerate() {
        let mut fields: Vec<String> = r.iter().map(str::to_string).collect();
        if i > 0 && !noted && fields.get(shop).is_some_and(|s| s.starts_with("Oxwater")) {
            fields[notes] = "chain replaced under warranty; no charge".into();
            noted = true;
        }
        writer
            .write_record(&fields)
            .map_err(|e| Error::io(&edited, std::io::Error::other(e)))?;
    }
    let out = writer
        .into_inner()
        .map_err(|e| Error::io(&edited, std::io::Error::other(e.to_string())))?;
    std::fs::write(&edited, out).map_err(|e| Error::io(&edited, e))?;
    let why_edit = "the Oxwater till has no field for warranty work; the manager noted it by hand";
    let edit = crate::inferred::ingest_hand_edit(
        store,
        &edited,
        &IngestOptions {
            dataset: "reviewed_orders".into(),
            key: None,
            reason: Some(why_edit.into()),
            delimiter: None,
            has_header: true,
            encoding: None,
            null_tokens: Vec::new(),
            agent: agent.clone(),
        },
        "reviewed_orders",
    )?;
    let HandEditOutcome::Recorded { recorded: edit, .. } = edit else {
        return Err(ErrorKind::Data("the demo's hand edit changed nothing".into()).into());
    };
    Ok(vec![
        (shown, ran),
        (
            format!(
                "sluice receive review/reviewed_orders_with_note.csv --as reviewed_orders --hand-edit-of reviewed_orders --why \"{why_edit}\""
            ),
            *edit,
        ),
    ])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn generator_is_deterministic() {
        let mut a = Vec::new();
        let mut b = Vec::new();
        work_orders(&mut a, Till::Fennmarsh, 500, 1).unwrap();
        work_orders(&mut b, Till::Fennmarsh, 500, 1).unwrap();
        assert_eq!(a, b);
        assert_eq!(a.iter().filter(|&&c| c == b'\n').count(), 501);
    }
}

// ---- two versions with known edits (diff benchmarks and the diff's reference check) ----------

/// What [`revision_pair`] changed between the two versions it wrote.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Revision {
    pub n_rows_first: u64,
    pub n_rows_second: u64,
    pub changed_rows: u64,
    pub removed_rows: u64,
    pub added_rows: u64,
    /// Changed cells per column, in header order (zero counts included).
    pub changed_cells: Vec<(String, u64)>,
}

/// The Quillby header used by [`revision_pair`]; `order_id` is unique in both versions.
pub fn revision_header() -> Vec<String> {
    Till::Quillby
        .header()
        .iter()
        .map(|h| h.to_string())
        .collect()
}

/// Writes two versions of a cleaned-looking Quillby work-order table (comma, LF, unique
/// `order_id`): `first` with `n_rows` rows, and `second`, the same table in the same order in
/// which about 1% of the rows have one or two cells changed (a trailing space removed where
/// there is one, otherwise a revision mark appended), 0.5% are removed and 0.5% new rows are
/// inserted after existing ones. Deterministic; returns exactly what it changed.
pub fn revision_pair(
    first: &mut impl Write,
    second: &mut impl Write,
    n_rows: u64,
) -> io::Result<Revision> {
    let till = Till::Quillby;
    let header = revision_header();
    let mut rng = Rng::new(0x5e_0d1f ^ n_rows.rotate_left(23));
    let mut rev = Revision {
        n_rows_first: n_rows,
        changed_cells: header.iter().map(|h| (h.clone(), 0)).collect(),
        ..Revision::default()
    };
    write_row(first, &header, b',', b"\n")?;
    write_row(second, &header, b',', b"\n")?;
    let mut new_order = 9_000_000u64;
    let make = |rng: &mut Rng, order: u64| -> Vec<String> {
        let given = *rng.pick(GIVEN);
        let surname = format!("{}{}", rng.pick(SURNAME_HEAD), rng.pick(SURNAME_TAIL));
        let trailing = if rng.chance(20) { " " } else { "" };
        vec![
            order.to_string(),
            date(rng, till, 7),
            format!("{given} {surname}{trailing}"),
            format!(
                "{}.{}@example.org",
                given.to_lowercase(),
                surname.to_lowercase()
            ),
            rng.pick(SERVICES).to_string(),
            money(rng, till),
            format!("{}.{}", rng.below(4), [0, 25, 5, 75][rng.below(4) as usize]),
            rng.pick(STATUSES).to_string(),
            rng.pick(till.technicians()).to_string(),
            rng.pick(NOTES).to_string(),
        ]
    };
    for i in 0..n_rows {
        let row = make(&mut rng, 100_001 + i);
        write_row(first, &row, b',', b"\n")?;
        let roll = rng.below(1000);
        if roll < 10 {
            let mut edited = row.clone();
            let n_cells = 1 + rng.below(2) as usize;
            let mut touched = Vec::new();
            while touched.len() < n_cells {
                // Any column but the key.
                let c = 1 + rng.below(header.len() as u64 - 1) as usize;
                if !touched.contains(&c) {
                    touched.push(c);
                }
            }
            for &c in &touched {
                edited[c] = match edited[c].strip_suffix(' ') {
                    Some(trimmed) => trimmed.to_string(),
                    None => format!("{} (rev)", edited[c]),
                };
                rev.changed_cells[c].1 += 1;
            }
            rev.changed_rows += 1;
            write_row(second, &edited, b',', b"\n")?;
        } else if roll < 15 {
            rev.removed_rows += 1;
        } else {
            write_row(second, &row, b',', b"\n")?;
        }
        if (15..20).contains(&roll) {
            new_order += 1;
            let inserted = make(&mut rng, new_order);
            write_row(second, &inserted, b',', b"\n")?;
            rev.added_rows += 1;
        }
    }
    rev.n_rows_second = n_rows - rev.removed_rows + rev.added_rows;
    Ok(rev)
}
