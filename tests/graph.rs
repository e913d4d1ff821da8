//! The lineage graph: what depends on a version (`impact`), and its drawing (`graph`, DOT text or
//! a self-contained SVG).

mod common;

use common::{assert_contains, Sandbox};

#[test]
fn impact_lists_everything_downstream_and_what_is_in_use_now() {
    let d = Sandbox::with_demo();
    let i = d.json(&["impact", "technicians:v1", "--json"]);
    let ops: Vec<&str> = i["steps"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| {
            s["step"]["operation"]
                .as_str()
                .or(s["step"]["step_kind"].as_str())
                .unwrap()
        })
        .collect();
    // The plan's last four steps, then the demo's outside script and hand edit.
    assert_eq!(
        ops,
        vec![
            "lookup",
            "extract",
            "summarize",
            "summarize",
            "command",
            "hand_edit"
        ]
    );
    assert_eq!(
        i["current"],
        serde_json::json!([
            "all_orders:v9",
            "q3_by_shop:v1",
            "q3_shop_totals:v1",
            "reviewed_orders:v2"
        ])
    );
    // A raw export reaches every version made from it, in recording order.
    let i = d.json(&["impact", "oxwater_orders:v1", "--json"]);
    let made: Vec<&str> = i["versions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v["label"].as_str().unwrap())
        .collect();
    assert_eq!(made.first(), Some(&"oxwater_orders:v2"));
    assert_eq!(made.last(), Some(&"reviewed_orders:v2"));
    assert!(!made.contains(&"quillby_orders:v2"));
    assert_eq!(
        made.len(),
        4 + 9 + 2 + 2,
        "four Oxwater versions, all_orders:v1-9, the two summaries, the two reviewed versions"
    );
    assert_contains(
        &d.ok(&["impact", "q3_by_shop"]),
        "nothing depends on q3_by_shop:v1",
    );
}

#[test]
fn the_graph_is_drawn_as_dot_and_as_well_formed_self_contained_svg() {
    let d = Sandbox::with_demo();
    let dot = d.ok(&["lineage"]);
    assert!(dot.starts_with("digraph lineage {"));
    let log = d.json(&["timeline", "--json"]);
    let steps = log.as_array().unwrap();
    // One edge per version a step read or made.
    let edges: usize = steps
        .iter()
        .map(|e| {
            e["step"]["inputs"].as_array().unwrap().len()
                + e["step"]["outputs"].as_array().unwrap().len()
        })
        .sum();
    assert_eq!(dot.matches(" -> ").count(), edges);
    assert_contains(&dot, "label=\"q3_by_shop:v1\\n");
    // Around one version: what it comes from and what depends on it, nothing else.
    let part = d.ok(&["lineage", "technicians"]);
    assert_contains(&part, "technicians:v1");
    assert_contains(&part, "q3_by_shop:v1");
    assert!(!part.contains("oxwater_orders:v1"));

    d.ok(&["lineage", "--format", "svg", "-o", "lineage.svg"]);
    // Well-formed XML, checked with Python's xml.etree (a general-purpose parser), with one
    // box per node, one curve per edge, and nothing fetched from outside.
    let script = r#"
import sys, xml.etree.ElementTree as ET
root = ET.parse(sys.argv[1]).getroot()
ns = "{http://www.w3.org/2000/svg}"
assert root.tag == ns + "svg", root.tag
print(len(root.findall(".//" + ns + "rect")), len(root.findall(".//" + ns + "path")))
"#;
    let out = std::process::Command::new("python3")
        .args(["-c", script])
        .arg(d.path().join("lineage.svg"))
        .output()
        .expect("python3 is needed for the reference checks");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let counts = String::from_utf8(out.stdout).unwrap();
    let n_versions: usize = steps
        .iter()
        .map(|e| e["produced"].as_array().unwrap().len())
        .sum();
    assert_eq!(
        counts.trim(),
        format!("{} {}", n_versions + steps.len(), edges)
    );
    let svg = std::fs::read_to_string(d.path().join("lineage.svg")).unwrap();
    for outside in ["href", "<script", "@import", "url("] {
        assert!(!svg.contains(outside), "the SVG refers outside: {outside}");
    }
}
