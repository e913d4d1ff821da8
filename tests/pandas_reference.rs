//! A differential test of the cleaning steps against an outside reference: a dirty export of
//! at least 60,000 rows, generated here deterministically, is cleaned by the real `sluice`
//! binary (trim, case, dedupe, drop, summarize) and by pandas (tests/reference/clean_pandas.py,
//! run in the pinned environment of tests/reference/pyenv.py), and the two results must agree
//! row for row and sum for sum. The generator also counts, by construction, the rows each step
//! must leave, which checks both programs independently of each other.

mod common;

use std::collections::HashSet;
use std::process::Command;

use common::*;

/// Raw rows the generated export has at least.
const MIN_RAW_ROWS: usize = 60_000;

/// xorshift64* (Vigna, "An experimental exploration of Marsaglia's xorshift generators,
/// scrambled", 2016; constants from memory): small, seeded, the same on every machine.
struct Prng(u64);

impl Prng {
    fn new(seed: u64) -> Prng {
        Prng(seed.max(1))
    }

    fn next(&mut self) -> u64 {
        let mut x = self.0;
        x ^= x >> 12;
        x ^= x << 25;
        x ^= x >> 27;
        self.0 = x;
        x.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }

    /// Uniform enough in 0..n for test data (n > 0).
    fn below(&mut self, n: usize) -> usize {
        ((self.next() >> 11) % n as u64) as usize
    }

    fn percent(&mut self, p: usize) -> bool {
        self.below(100) < p
    }

    fn pick<'a>(&mut self, items: &[&'a str]) -> &'a str {
        items[self.below(items.len())]
    }
}

const HEADER: [&str; 8] = [
    "order_id", "shop", "customer", "email", "service", "status", "amount", "note",
];

/// The shops of the invented cooperative; the pop-up stall's till writes no amounts, so its
/// sum is over no values at all.
const SHOPS: [(&str, &str); 3] = [("Quillby", "Q"), ("Oxwater", "OX"), ("Fennmarsh", "F")];
const POP_UP: (&str, &str) = ("Quillby Pop-up", "QP");

const GIVEN: [&str; 12] = [
    "Ada",
    "Maya",
    "Tobiah",
    "Ines",
    "Marguerite",
    "Zoë",
    "Søren",
    "Halvard",
    "Renée",
    "Odile",
    "Brannoc",
    "Ysolde",
];
const FAMILY: [&str; 10] = [
    "Quenwick",
    "Thornely",
    "Dunmoor",
    "Calloway",
    "Fennick",
    "Ashgrove",
    "Marrowby",
    "Pellow",
    "Ruskin-Vale",
    "Oakhurst",
];
const SERVICES: [&str; 6] = [
    "puncture repair",
    "brake adjustment",
    "gear indexing",
    "wheel truing",
    "chain replacement",
    "full service",
];
/// Notes include commas, double quotes and line breaks (quoted in the file, RFC 4180), inner
/// double spaces (which `trim` without `--inner` keeps) and letters outside ASCII.
const NOTES: [&str; 9] = [
    "",
    "",
    "call before noon",
    "left at the café, back door",
    "customer says \"urgent\"",
    "parts on order\nring when in",
    "bring  own tube",
    "frame cracked; advised not to ride",
    "paid by card",
];

/// Status values as the tills write them once trimmed. Only exactly `cancelled` is dropped:
/// `Cancelled`, `CANCELLED` and `canceled` are other text and stay (equality is exact).
const STATUSES: [(&str, usize); 7] = [
    ("done", 58),
    ("open", 14),
    ("cancelled", 12),
    ("Cancelled", 6),
    ("CANCELLED", 3),
    ("canceled", 3),
    ("test", 4),
];

/// One order as it must read after cleaning (trimmed, e-mail in lower case).
#[derive(Clone)]
struct Order {
    order_id: String,
    shop: &'static str,
    customer: String,
    email: String,
    service: &'static str,
    status: &'static str,
    /// The amount in cents, or `None` when the till left it blank.
    cents: Option<i64>,
    amount: String,
    note: &'static str,
}

/// What the generator wrote and, by construction, what cleaning must leave.
struct Export {
    csv: String,
    n_raw: usize,
    /// Distinct orders after cleaning (every other raw row repeats one of them).
    n_distinct: usize,
    /// Raw rows that repeat an earlier one byte for byte, and those that only repeat one
    /// after trimming or lower-casing.
    n_exact_repeats: usize,
    n_cleaning_repeats: usize,
    /// Distinct orders whose status is exactly `cancelled` once trimmed.
    n_cancelled: usize,
    /// Kept orders whose status is `Cancelled` (which an equality test must not drop).
    n_capital_cancelled: usize,
    /// Per shop in order of first appearance: kept rows, and the sum of non-blank amounts in
    /// cents (`None` when the shop has no amount).
    shops: Vec<(String, u64, Option<i64>)>,
}

/// An amount in cents written as plain decimal text, in one of the forms a till writes for it
/// (`12`, `12.`, `12.00`, `12.5`, `12.50`, `.75`, `-3.20`): at most two fraction digits.
fn amount_text(cents: i64, style: usize) -> String {
    let sign = if cents < 0 { "-" } else { "" };
    let (units, frac) = (cents.abs() / 100, cents.abs() % 100);
    let int = if units == 0 && style % 4 == 3 {
        String::new()
    } else {
        units.to_string()
    };
    if frac == 0 {
        match style % 3 {
            0 => format!("{sign}{units}"),
            1 => format!("{sign}{units}."),
            _ => format!("{sign}{int}.00"),
        }
    } else if frac % 10 == 0 && style.is_multiple_of(2) {
        format!("{sign}{int}.{}", frac / 10)
    } else {
        format!("{sign}{int}.{frac:02}")
    }
}

/// The other way of writing the same amount: `12.5` and `12.50` are equal numbers but
/// different text, so dedupe (which compares text) keeps both rows.
fn other_amount_text(cents: i64, written: &str) -> Option<String> {
    (0..12)
        .map(|style| amount_text(cents, style))
        .find(|t| t != written)
}

/// Stray white space the tills leave around a value: ASCII spaces and tabs only. These are
/// white space for both sides (Rust's `char::is_whitespace`, which sluice's trim uses per
/// src/ops/text.rs, and Python's `str.strip`); the two sets differ elsewhere (Python also strips
/// U+001C..U+001F, for instance), so the generator stays inside the common set.
fn pad(rng: &mut Prng, v: &str) -> String {
    const PADS: [&str; 6] = [" ", "  ", "   ", "\t", " \t", "\t "];
    let mut out = String::new();
    if rng.percent(12) {
        out.push_str(rng.pick(&PADS));
    }
    out.push_str(v);
    if rng.percent(12) {
        out.push_str(rng.pick(&PADS));
    }
    out
}

/// E-mail addresses are ASCII here, where lower-casing is the same in every implementation.
fn mixed_case(rng: &mut Prng, email: &str) -> String {
    match rng.below(5) {
        0 => email.to_ascii_uppercase(),
        1 => email
            .chars()
            .map(|c| {
                if rng.percent(30) {
                    c.to_ascii_uppercase()
                } else {
                    c
                }
            })
            .collect(),
        _ => email.to_string(),
    }
}

fn csv_field(out: &mut String, v: &str) {
    if v.contains([',', '"', '\n', '\r']) {
        out.push('"');
        out.push_str(&v.replace('"', "\"\""));
        out.push('"');
    } else {
        out.push_str(v);
    }
}

/// One raw line for `o`, with fresh dirt (padding everywhere, e-mail case).
fn dirty_line(rng: &mut Prng, o: &Order) -> String {
    let email = mixed_case(rng, &o.email);
    let values = [
        o.order_id.as_str(),
        o.shop,
        o.customer.as_str(),
        email.as_str(),
        o.service,
        o.status,
        o.amount.as_str(),
        o.note,
    ];
    let mut line = String::new();
    for (i, v) in values.iter().enumerate() {
        if i > 0 {
            line.push(',');
        }
        csv_field(&mut line, &pad(rng, v));
    }
    line.push('\n');
    line
}

fn new_order(rng: &mut Prng, n: usize) -> Order {
    let (shop, prefix) = if rng.percent(1) {
        POP_UP
    } else {
        SHOPS[rng.below(SHOPS.len())]
    };
    let given = rng.pick(&GIVEN);
    let family = rng.pick(&FAMILY);
    let ascii: String = format!("{}.{}", &given[..1], family)
        .to_ascii_lowercase()
        .chars()
        .filter(|c| c.is_ascii_alphanumeric() || *c == '.' || *c == '-')
        .collect();
    let domain = if rng.percent(50) {
        "example.org"
    } else {
        "example.net"
    };
    let mut roll = rng.below(100);
    let mut status = STATUSES[0].0;
    for (s, weight) in STATUSES {
        if roll < weight {
            status = s;
            break;
        }
        roll -= weight;
    }
    let cents = if shop == POP_UP.0 || rng.percent(4) {
        None
    } else {
        let c = rng.below(50_001) as i64;
        Some(if rng.percent(2) { -c } else { c })
    };
    let amount = match cents {
        // A blank amount is sometimes written as spaces, which trim turns into blank.
        None => String::new(),
        Some(c) => amount_text(c, rng.below(12)),
    };
    Order {
        order_id: format!("{prefix}-{}", 10_000 + n),
        shop,
        customer: format!("{given} {family}"),
        email: format!("{ascii}{}@{domain}", rng.below(90)),
        service: rng.pick(&SERVICES),
        status,
        cents,
        amount,
        note: rng.pick(&NOTES),
    }
}

/// The raw file being written, and which of its rows repeat an earlier one.
struct Lines {
    csv: String,
    seen: HashSet<String>,
    n_raw: usize,
    n_exact_repeats: usize,
    n_cleaning_repeats: usize,
}

impl Lines {
    /// Appends one raw row; `repeat` says whether it repeats an earlier order once cleaned.
    fn write(&mut self, line: String, repeat: bool) {
        let fresh = self.seen.insert(line.clone());
        assert!(fresh || repeat, "the generator wrote a new order twice");
        if repeat && !fresh {
            self.n_exact_repeats += 1;
        } else if repeat {
            self.n_cleaning_repeats += 1;
        }
        self.n_raw += 1;
        self.csv.push_str(&line);
    }
}

/// Generates the export: new orders, some followed by a near twin that differs after
/// cleaning (another spelling of the amount, or a double space inside the name), and repeats
/// of earlier orders, written with fresh dirt (so some repeat byte for byte and some only once
/// cleaned).
fn generate(seed: u64) -> Export {
    let mut rng = Prng::new(seed);
    let mut out = Lines {
        csv: HEADER.join(",") + "\n",
        seen: HashSet::new(),
        n_raw: 0,
        n_exact_repeats: 0,
        n_cleaning_repeats: 0,
    };
    // Each order with the raw line it was first written as.
    let mut orders: Vec<(Order, String)> = Vec::new();
    while out.n_raw < MIN_RAW_ROWS {
        let o = new_order(&mut rng, orders.len());
        let line = dirty_line(&mut rng, &o);
        out.write(line.clone(), false);
        orders.push((o.clone(), line));
        if rng.percent(3) {
            let mut twin = o;
            match twin.cents.and_then(|c| other_amount_text(c, &twin.amount)) {
                Some(t) if rng.percent(50) => twin.amount = t,
                _ => twin.customer = twin.customer.replacen(' ', "  ", 1),
            }
            let line = dirty_line(&mut rng, &twin);
            out.write(line.clone(), false);
            orders.push((twin, line));
        }
        if rng.percent(15) {
            // A repeat of a recent order (tills export the same order again later): the same
            // line again, or the same order with fresh dirt.
            let back = rng.below(orders.len().min(500));
            let (earlier, first_line) = &orders[orders.len() - 1 - back];
            let line = if rng.percent(40) {
                first_line.clone()
            } else {
                dirty_line(&mut rng, earlier)
            };
            out.write(line, true);
        }
    }
    let orders: Vec<Order> = orders.into_iter().map(|(o, _)| o).collect();
    // Records, not lines: notes hold line breaks.
    let n_records = csv::ReaderBuilder::new()
        .from_reader(out.csv.as_bytes())
        .records()
        .count();
    assert_eq!(n_records, out.n_raw, "records in the generated file");
    let kept: Vec<&Order> = orders.iter().filter(|o| o.status != "cancelled").collect();
    let mut shops: Vec<(String, u64, Option<i64>)> = Vec::new();
    for o in &kept {
        let i = match shops.iter().position(|(s, _, _)| s == o.shop) {
            Some(i) => i,
            None => {
                shops.push((o.shop.to_string(), 0, None));
                shops.len() - 1
            }
        };
        shops[i].1 += 1;
        if let Some(c) = o.cents {
            shops[i].2 = Some(shops[i].2.unwrap_or(0) + c);
        }
    }
    Export {
        n_raw: out.n_raw,
        n_distinct: orders.len(),
        n_exact_repeats: out.n_exact_repeats,
        n_cleaning_repeats: out.n_cleaning_repeats,
        n_cancelled: orders.len() - kept.len(),
        n_capital_cancelled: kept.iter().filter(|o| o.status == "Cancelled").count(),
        shops,
        csv: out.csv,
    }
}

/// Cents as plain decimal text (`-1234` is `-12.34`).
fn cents_text(c: i64) -> String {
    format!(
        "{}{}.{:02}",
        if c < 0 { "-" } else { "" },
        c.abs() / 100,
        c.abs() % 100
    )
}

/// The canonical text of a plain decimal number (`[-+]digits[.digits]`, digits on at least
/// one side), so that equal values compare equal however they were written: no sign on zero
/// or on positive numbers, no leading zeros before the point (but `0`), no trailing zeros
/// after it and no point when nothing follows. `12.50`, `12.5` and `+012.500` all give `12.5`;
/// `-0.00` gives `0`. Anything else (an exponent, for instance) is refused, so a formatting
/// surprise on either side fails the test rather than being read as a number.
fn canonical_decimal(text: &str) -> String {
    let (neg, body) = match text.as_bytes().first() {
        Some(b'-') => (true, &text[1..]),
        Some(b'+') => (false, &text[1..]),
        _ => (false, text),
    };
    let (int, frac) = body.split_once('.').unwrap_or((body, ""));
    assert!(
        !(int.is_empty() && frac.is_empty())
            && int.bytes().all(|b| b.is_ascii_digit())
            && frac.bytes().all(|b| b.is_ascii_digit()),
        "{text:?} is not a plain decimal number"
    );
    let int = int.trim_start_matches('0');
    let frac = frac.trim_end_matches('0');
    let int = if int.is_empty() { "0" } else { int };
    let zero = int == "0" && frac.is_empty();
    let mut out = String::new();
    if neg && !zero {
        out.push('-');
    }
    out.push_str(int);
    if !frac.is_empty() {
        out.push('.');
        out.push_str(frac);
    }
    out
}

fn parse_csv(text: &str) -> Vec<Vec<String>> {
    csv::ReaderBuilder::new()
        .has_headers(false)
        .from_reader(text.as_bytes())
        .records()
        .map(|r| {
            r.expect("well-formed CSV")
                .iter()
                .map(str::to_string)
                .collect()
        })
        .collect()
}

/// The pandas version pinned in tests/reference/requirements.txt.
fn pinned_pandas() -> String {
    let reqs = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/requirements.txt"
    ))
    .expect("tests/reference/requirements.txt");
    reqs.lines()
        .find_map(|l| l.trim().strip_prefix("pandas=="))
        .expect("requirements.txt pins pandas")
        .to_string()
}

/// Asserts two tables are equal, naming the first row that differs rather than printing
/// tens of thousands of rows.
#[track_caller]
fn assert_same_rows(ours: &[Vec<String>], theirs: &[Vec<String>], what: &str) {
    if let Some(i) = (0..ours.len().min(theirs.len())).find(|&i| ours[i] != theirs[i]) {
        panic!(
            "\n{what}: record {i} (0-based, the header is 0) differs\n{}\nsluice: {:?}\npandas: {:?}\n{}\n",
            rule(),
            ours[i],
            theirs[i],
            rule()
        );
    }
    assert_eq!(
        ours.len(),
        theirs.len(),
        "{what}: sluice has {} records, pandas {}",
        ours.len(),
        theirs.len()
    );
}

#[test]
fn trim_case_dedupe_drop_and_summarize_agree_with_pandas() {
    let export = generate(0x5EED_2026_0003);
    // The generator's own bookkeeping, so that the checks below exercise what they claim: the
    // order of the steps matters (some repeats only show once trimmed or lower-cased), and
    // there are both `cancelled` rows to drop and `Cancelled` rows to keep.
    assert!(export.n_raw >= 50_000, "{} raw rows", export.n_raw);
    assert!(
        export.n_exact_repeats > 100 && export.n_cleaning_repeats > 100,
        "repeats: {} byte for byte, {} only once cleaned",
        export.n_exact_repeats,
        export.n_cleaning_repeats
    );
    assert_eq!(
        export.n_raw,
        export.n_distinct + export.n_exact_repeats + export.n_cleaning_repeats
    );
    assert!(export.n_cancelled > 100 && export.n_capital_cancelled > 100);
    assert_eq!(export.shops.len(), SHOPS.len() + 1, "every shop keeps rows");

    let s = Sandbox::with_store();
    let raw = s.file("orders.csv", &export.csv);
    s.ok(&[
        "receive",
        "orders.csv",
        "--as",
        "orders",
        "--why",
        "quarterly export of the three tills",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "trim",
        "--why",
        "the tills pad values with spaces and tabs",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "case",
        "--to",
        "lower",
        "--columns",
        "email",
        "--why",
        "e-mail addresses are case-blind",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "dedupe",
        "--why",
        "the tills export some orders twice",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "drop",
        "status = 'cancelled'",
        "--why",
        "cancelled orders earn nothing",
    ]);
    s.ok(&[
        "clean",
        "orders",
        "summarize",
        "--by",
        "shop",
        "--sum",
        "amount",
        "--as",
        "totals",
        "--why",
        "takings per shop",
    ]);
    let n_rows = |r: &str| s.json(&["about", r, "--json"])["version"]["n_rows"].clone();
    // Row counts after each step, against the generator's (independent of both programs).
    assert_eq!(n_rows("orders:v1"), export.n_raw, "rows taken in");
    assert_eq!(n_rows("orders:v2"), export.n_raw, "rows after trim");
    assert_eq!(n_rows("orders:v3"), export.n_raw, "rows after case");
    assert_eq!(n_rows("orders:v4"), export.n_distinct, "rows after dedupe");
    assert_eq!(
        n_rows("orders:v5"),
        export.n_distinct - export.n_cancelled,
        "rows after drop"
    );
    let ours_rows = parse_csv(&s.ok(&["retrieve", "orders"]));
    let ours_totals = parse_csv(&s.ok(&["retrieve", "totals"]));

    // The same steps in pandas 3.1.1 (PyPI), the outside reference, with sums in Python's
    // decimal module (tests/reference/clean_pandas.py); the version is checked against the pin.
    let rows_out = s.path().join("pandas_rows.csv");
    let totals_out = s.path().join("pandas_totals.csv");
    let python = reference_python();
    let out = Command::new(&python)
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/clean_pandas.py"
        ))
        .arg(&raw)
        .arg(&rows_out)
        .arg(&totals_out)
        .output()
        .unwrap_or_else(|e| {
            panic!(
                "the reference interpreter {} could not be started ({e}); unset \
                 SLUICE_REFERENCE_PYTHON or point it at target/pyref/bin/python",
                python.display()
            )
        });
    assert!(
        out.status.success(),
        "tests/reference/clean_pandas.py failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        String::from_utf8_lossy(&out.stdout).trim(),
        pinned_pandas(),
        "the reference interpreter's pandas is not the pinned one; rerun tests/reference/pyenv.py"
    );
    let theirs_rows = parse_csv(&std::fs::read_to_string(&rows_out).expect("pandas rows"));
    let theirs_totals = parse_csv(&std::fs::read_to_string(&totals_out).expect("pandas totals"));

    // Cleaned rows: pandas 3.1.1 (PyPI), the outside reference. The same records in the same
    // order with the same values, both read as CSV (sluice writes canonical CSV, pandas its
    // own quoting; the values are what must agree).
    assert_same_rows(&ours_rows, &theirs_rows, "cleaned orders");
    assert_eq!(ours_rows[0], HEADER, "header of the cleaned orders");
    assert_eq!(
        ours_rows.len() - 1,
        export.n_distinct - export.n_cancelled,
        "cleaned rows against the generator"
    );
    let status = HEADER.iter().position(|h| *h == "status").unwrap();
    let kept_capital = ours_rows[1..]
        .iter()
        .filter(|r| r[status] == "Cancelled")
        .count();
    assert_eq!(
        kept_capital, export.n_capital_cancelled,
        "`Cancelled` rows kept"
    );
    assert!(ours_rows[1..].iter().all(|r| r[status] != "cancelled"));

    // Totals per shop: pandas 3.1.1 (PyPI), the outside reference, groups in order of first
    // appearance (groupby sort=False), sums in Python's decimal module, exact. Sums are
    // compared as values (canonical decimal text on both sides), not as formatting. Blank
    // amounts are left out of the sum on both sides and still counted in `count` (sluice's
    // summarize rules, README.md and src/ops/summarize.rs); a shop with no amount at all has
    // a blank sum.
    let header = ["shop", "count", "sum_amount"];
    assert_eq!(ours_totals[0], header, "header of sluice's totals");
    assert_eq!(theirs_totals[0], header, "header of pandas' totals");
    assert_eq!(
        ours_totals.len(),
        theirs_totals.len(),
        "shops: sluice {:?}, pandas {:?}",
        ours_totals,
        theirs_totals
    );
    let as_value = |v: &str| {
        if v.is_empty() {
            String::new()
        } else {
            canonical_decimal(v)
        }
    };
    for (ours, theirs) in ours_totals[1..].iter().zip(&theirs_totals[1..]) {
        assert_eq!(ours[..2], theirs[..2], "shop and count");
        assert_eq!(
            as_value(&ours[2]),
            as_value(&theirs[2]),
            "sum for {}: sluice {:?}, pandas with Python's decimal module {:?}",
            ours[0],
            ours[2],
            theirs[2]
        );
    }
    // And against the generator, which summed whole cents as integers.
    for (ours, (shop, count, cents)) in ours_totals[1..].iter().zip(&export.shops) {
        assert_eq!(
            (&ours[0], ours[1].parse::<u64>().ok()),
            (shop, Some(*count))
        );
        let expected = cents.map(|c| canonical_decimal(&cents_text(c)));
        assert_eq!(
            as_value(&ours[2]),
            expected.unwrap_or_default(),
            "sum for {shop} against the generator"
        );
    }
}

#[test]
fn canonical_decimal_text_compares_values() {
    for (written, canonical) in [
        ("12.50", "12.5"),
        ("12.5", "12.5"),
        ("+012.500", "12.5"),
        ("12.", "12"),
        ("12", "12"),
        (".75", "0.75"),
        ("-.5", "-0.5"),
        ("-0.00", "0"),
        ("0", "0"),
        ("-3.20", "-3.2"),
        ("1000", "1000"),
    ] {
        assert_eq!(canonical_decimal(written), canonical, "{written}");
    }
    let refused = std::panic::catch_unwind(|| canonical_decimal("1.2E+3"));
    assert!(
        refused.is_err(),
        "exponent notation is not plain decimal text"
    );
}

#[test]
fn amount_texts_read_back_as_their_cents() {
    // Every form the generator writes is plain decimal text of the same value.
    for cents in [0, 5, 50, 75, 100, 1250, 1234, -320, -5, 50_000] {
        for style in 0..12 {
            let t = amount_text(cents, style);
            assert_eq!(
                canonical_decimal(&t),
                canonical_decimal(&cents_text(cents)),
                "{cents} cents written {t:?}"
            );
        }
    }
}
