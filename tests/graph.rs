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
    // The plan's last seven steps, then the demo's outside script and hand edit.
    assert_eq!(
        ops,
        vec![
            "lookup",
            "extract",
            "case",
            "drop",
            "sort",
            "summarize",
            "summarize",
            "command",
            "hand_edit"
        ]
    );
    assert_eq!(
        i["current"],
        serde_json::json!([
            "all_orders:v12",
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
        4 + 12 + 2 + 2,
        "four Oxwater versions, all_orders:v1-12, the two summaries, the two reviewed versions"
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
    // One edge per version a step read or made, and a dashed one from each step to its agent
    // (W3C PROV's wasAssociatedWith), drawn as a pentagon ("house").
    assert_eq!(dot.matches(" -> ").count(), edges + steps.len());
    assert_eq!(dot.matches("[style=dashed]").count(), steps.len());
    assert_eq!(
        dot.matches("[shape=house").count(),
        1,
        "the demo has one agent"
    );
    assert_eq!(
        dot.matches("[shape=ellipse").count(),
        steps
            .iter()
            .map(|e| e["produced"].as_array().unwrap().len())
            .sum::<usize>(),
        "versions (entities) are ovals"
    );
    assert_contains(&dot, "label=\"q3_by_shop:v1\\n");
    // Around one version: what it comes from and what depends on it, nothing else.
    let part = d.ok(&["lineage", "technicians"]);
    assert_contains(&part, "technicians:v1");
    assert_contains(&part, "q3_by_shop:v1");
    assert!(!part.contains("oxwater_orders:v1"));

    d.ok(&["lineage", "--format", "svg", "-o", "lineage.svg"]);
    // Well-formed XML, checked with Python's xml.etree (a general-purpose parser), with one
    // shape per node in the W3C PROV diagram convention (versions ovals, steps rectangles, the
    // one agent a pentagon), one curve per edge, and nothing fetched from outside.
    let script = r#"
import sys, xml.etree.ElementTree as ET
root = ET.parse(sys.argv[1]).getroot()
ns = "{http://www.w3.org/2000/svg}"
assert root.tag == ns + "svg", root.tag
def count(tag):
    return len(root.findall(".//" + ns + tag))
# Shapes (the legend holds one of each): steps rectangles, versions ovals, agents pentagons.
print(count("rect") - 1, count("ellipse") - 1, count("polygon") - 1, count("path"))
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
        format!("{} {} 1 {}", steps.len(), n_versions, edges)
    );
    let svg = std::fs::read_to_string(d.path().join("lineage.svg")).unwrap();
    for outside in ["href", "<script", "@import", "url("] {
        assert!(!svg.contains(outside), "the SVG refers outside: {outside}");
    }
}
