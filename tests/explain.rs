//! `sluice explain`: the rows a summary cell aggregates, its arithmetic done again, and the rows
//! earlier steps dropped from its group, with their reasons.

mod common;

use common::{assert_contains, Sandbox};
use serde_json::Value;

fn explain(s: &Sandbox, args: &[&str]) -> Value {
    let mut all = vec!["explain"];
    all.extend_from_slice(args);
    all.push("--json");
    s.json(&all)
}

// palmerpenguins (CC0; Horst, Hill & Gorman 2020): 152 Adelie penguins, of which 146 have
// every measurement and their sex recorded, as documented with the data set. Explaining the
// Adelie count after dropping incomplete rows gives 146 contributing rows and the 6 other
// Adelie rows as dropped by that step, with its predicate.
#[test]
fn the_adelie_count_is_explained_by_its_rows_and_the_six_dropped_upstream() {
    let s = Sandbox::with_penguins();
    let any_na = "bill_length_mm is blank or bill_depth_mm is blank or flipper_length_mm is blank \
                  or body_mass_g is blank or sex is blank";
    s.ok(&[
        "clean",
        "penguins",
        "drop",
        any_na,
        "--why",
        "complete records only",
    ]);
    s.ok(&[
        "clean",
        "penguins",
        "summarize",
        "--by",
        "species",
        "--mean",
        "body_mass_g",
        "--as",
        "by_species",
        "--why",
        "counts",
    ]);
    let e = explain(
        &s,
        &["by_species", "--key", "species=Adelie", "--column", "count"],
    );
    assert_eq!(e["value"], "146");
    assert_eq!(e["recomputed"], "146");
    assert_eq!(e["agrees"], true);
    assert_eq!(e["contributing"]["rows"], 146);
    let upstream = e["upstream"].as_array().unwrap();
    assert_eq!(upstream.len(), 1);
    assert_eq!(upstream[0]["operation"], "drop");
    let dropped = upstream[0]["dropped"].as_array().unwrap();
    assert_eq!(dropped.len(), 1);
    assert_eq!(dropped[0]["rows"], 6, "152 - 146 Adelie rows dropped");
    assert_eq!(
        dropped[0]["reason"],
        format!(
            "matched the drop predicate: {}",
            any_na.split_whitespace().collect::<Vec<_>>().join(" ")
        )
    );
    assert_eq!(upstream[0]["undecided"], 0);

    // The mean is done again exactly (half to even, 6 places) and agrees.
    let e = explain(
        &s,
        &[
            "by_species",
            "--key",
            "species=Adelie",
            "--column",
            "mean_body_mass_g",
        ],
    );
    assert_eq!(e["agrees"], true);
    assert_contains(
        e["arithmetic"].as_str().unwrap(),
        "mean of 146 values of body_mass_g",
    );

    let text = s.ok(&[
        "explain",
        "by_species",
        "--row",
        "1",
        "--column",
        "count",
        "--limit",
        "2",
    ]);
    assert_contains(
        &text,
        "count of by_species:v1, data row 1 (species \"Adelie\"): \"146\"",
    );
    assert_contains(&text, "computed again from penguins:v2: \"146\" (agrees)");
    assert_contains(
        &text,
        "dropped 6 rows of this group: matched the drop predicate",
    );
}

// Why-provenance of a union (Buneman, Khanna & Tan, "Why and Where: A Characterization of Data
// Provenance", ICDT 2001): two equal one-row tables stacked; after a dedupe the summary's one
// row has one contributing row, and the explanation names the other as a dropped duplicate.
#[test]
fn a_union_then_dedupe_names_the_dropped_duplicate() {
    let s = Sandbox::with_store();
    s.file("a.csv", "shop,city\nQuillby Cycle Mend,Quillby\n");
    s.file("b.csv", "shop,city\nQuillby Cycle Mend,Quillby\n");
    s.ok(&["receive", "a.csv", "--as", "first"]);
    s.ok(&["receive", "b.csv", "--as", "second"]);
    s.ok(&[
        "clean", "first", "append", "--other", "second", "--why", "merge",
    ]);
    s.ok(&["clean", "first", "dedupe", "--why", "same shop twice"]);
    s.ok(&[
        "clean",
        "first",
        "summarize",
        "--by",
        "shop",
        "--as",
        "shops",
        "--why",
        "count",
    ]);
    let e = explain(&s, &["shops", "--row", "1", "--column", "count"]);
    assert_eq!(e["value"], "1");
    assert_eq!(e["contributing"]["rows"], 1);
    let up = e["upstream"].as_array().unwrap();
    assert_eq!(up.len(), 1);
    assert_eq!(up[0]["operation"], "dedupe");
    assert_eq!(
        up[0]["dropped"][0]["reason"],
        "duplicate of data row 1 (the whole row)"
    );
    assert_eq!(up[0]["dropped"][0]["first"], serde_json::json!([2]));
    // The surviving row traces to its own source.
    let t = s.json(&["trace", "first", "--row", "1", "--column", "shop", "--json"]);
    assert_eq!(t["end"]["path"], "a.csv");
}

// Where-provenance (Buneman, Khanna & Tan, ICDT 2001), in the shape of the paper's example:
// employees joined to departments on the department number, one department kept, name and
// phone selected. (Table contents are our own.) The phone cell of the result comes from exactly
// one source cell: the employee table's phone of that employee.
#[test]
fn the_phone_of_a_joined_selected_row_comes_from_the_employee_cell() {
    let s = Sandbox::with_store();
    s.file(
        "employees.csv",
        "name,phone,dept\nIvo Ashford,555-0101,1\nNell Corby,555-0102,2\nKit Fenwell,555-0103,1\n",
    );
    s.file("departments.csv", "dept_no,dept_name\n1,CS\n2,Physics\n");
    s.ok(&["receive", "employees.csv", "--as", "employees"]);
    s.ok(&["receive", "departments.csv", "--as", "departments"]);
    s.ok(&[
        "clean",
        "employees",
        "lookup",
        "--table",
        "departments",
        "--on",
        "dept",
        "--table-on",
        "dept_no",
        "--take",
        "dept_name",
        "--why",
        "department names",
    ]);
    s.ok(&[
        "clean",
        "employees",
        "keep",
        "dept_name = 'CS'",
        "--why",
        "CS only",
    ]);
    let out = s.ok(&[
        "clean",
        "employees",
        "select",
        "name,phone",
        "--why",
        "the phone list",
    ]);
    assert_contains(&out, "2 rows");
    let t = s.json(&[
        "trace",
        "employees",
        "--row",
        "2",
        "--column",
        "phone",
        "--json",
    ]);
    assert_eq!(t["value"], "555-0103");
    assert_eq!(t["end"]["kind"], "raw");
    assert_eq!(t["end"]["version"], "employees:v1");
    assert_eq!(t["end"]["column"], "phone");
    assert_eq!(t["end"]["line"], 4);
    assert_eq!(t["end"]["raw_value"], "555-0103");
    // The department the keep decided on is its own cell of the departments table.
    let t = s.json(&[
        "trace",
        "employees:v3",
        "--row",
        "2",
        "--column",
        "dept_name",
        "--json",
    ]);
    let sub = &t["end"]["sources"][0]["trail"];
    assert_eq!(sub["version"], "departments:v1");
    assert_eq!(sub["end"]["raw_line"], "1,CS");
}

#[test]
fn explain_refuses_what_is_not_a_summary_cell() {
    let s = Sandbox::with_store();
    s.file("o.csv", "shop,amount\nQuillby,1\nOxwater,2\n");
    s.ok(&["receive", "o.csv", "--as", "orders"]);
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
        "sums",
    ]);
    assert_contains(
        &s.fails(
            2,
            &["explain", "orders", "--row", "1", "--column", "amount"],
        ),
        "orders:v1 was not made by summarize",
    );
    assert_contains(
        &s.fails(2, &["explain", "totals", "--row", "1", "--column", "shop"]),
        "column \"shop\" of totals:v1 is not an aggregate; its aggregates are: count, sum_amount",
    );
    assert_contains(
        &s.fails(2, &["explain", "totals", "--row", "3", "--column", "count"]),
        "totals:v1 has data rows 1 to 2; there is no row 3",
    );
    let e = explain(
        &s,
        &["totals", "--key", "shop=Oxwater", "--column", "sum_amount"],
    );
    assert_eq!(e["arithmetic"], "sum of 1 value of amount = 2");
    assert_eq!(e["agrees"], true);
}
