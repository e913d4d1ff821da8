//! The lineage graph as a graph: versions (W3C PROV entities) and steps (activities) as nodes,
//! "read" edges from a version to the step that read it and "made" edges from a step to the
//! version it made. It is loaded from the database into petgraph for the questions that walk
//! it: what depends on a version (`impact`), and the drawing of it (Graphviz DOT text, or an SVG
//! laid out here in layers, so no outside program is needed).

use std::collections::{BTreeSet, HashMap};
use std::fmt::Write as _;

use petgraph::graph::{DiGraph, NodeIndex};
use petgraph::visit::{Bfs, Reversed};
use petgraph::Direction;
use serde::Serialize;

use crate::error::{ErrorKind, Result};
use crate::model::Version;
use crate::refs;
use crate::store::Store;

/// A node of the lineage graph.
#[derive(Debug, Clone, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Node {
    Version {
        label: String,
        hash: String,
        n_rows: u64,
        n_cols: u64,
        /// Whether it is its dataset's latest version.
        latest: bool,
    },
    Step {
        id: i64,
        /// "ingest", "operation", ...
        step_kind: String,
        operation: Option<String>,
        agent: String,
        at: String,
        why: Option<String>,
    },
}

impl Node {
    fn title(&self) -> String {
        match self {
            Node::Version { label, .. } => label.clone(),
            Node::Step {
                id,
                step_kind,
                operation,
                ..
            } => format!("step {id} · {}", operation.as_deref().unwrap_or(step_kind)),
        }
    }

    fn detail(&self) -> String {
        match self {
            Node::Version {
                hash,
                n_rows,
                n_cols,
                ..
            } => format!("{} · {n_rows} × {n_cols}", &hash[..12.min(hash.len())]),
            Node::Step { why, .. } => why.clone().unwrap_or_default(),
        }
    }
}

/// The whole lineage graph of a store.
pub struct Lineage {
    pub graph: DiGraph<Node, ()>,
    versions: HashMap<String, NodeIndex>,
}

/// Loads every version and step of the store into a graph.
pub fn load(store: &Store) -> Result<Lineage> {
    let mut graph = DiGraph::new();
    let mut versions = HashMap::new();
    let all = store.lineage.all_versions()?;
    let mut latest: HashMap<&str, u64> = HashMap::new();
    for v in &all {
        let e = latest.entry(v.dataset.as_str()).or_insert(0);
        *e = (*e).max(v.seq);
    }
    for v in &all {
        let n = graph.add_node(Node::Version {
            label: v.label(),
            hash: v.hash.clone(),
            n_rows: v.n_rows,
            n_cols: v.n_cols,
            latest: latest.get(v.dataset.as_str()) == Some(&v.seq),
        });
        versions.insert(v.label(), n);
    }
    let mut steps = store.lineage.steps(None)?;
    steps.sort_by_key(|s| s.id);
    for s in steps {
        let n = graph.add_node(Node::Step {
            id: s.id,
            step_kind: s.kind.as_str().to_string(),
            operation: s.operation.clone(),
            agent: s.agent.clone(),
            at: s.ended_at.clone(),
            why: s.reason.clone(),
        });
        for i in &s.inputs {
            if let Some(&v) = versions.get(i) {
                graph.add_edge(v, n, ());
            }
        }
        for o in &s.outputs {
            if let Some(&v) = versions.get(o) {
                graph.add_edge(n, v, ());
            }
        }
    }
    Ok(Lineage { graph, versions })
}

impl Lineage {
    fn node_of(&self, v: &Version) -> Result<NodeIndex> {
        self.versions.get(&v.label()).copied().ok_or_else(|| {
            ErrorKind::Inconsistent(format!(
                "{} is missing from the lineage graph; run `sluice verify`",
                v.label()
            ))
            .into()
        })
    }

    /// The nodes in an order where every step comes after what it read: steps by number (a
    /// step reads only versions recorded before it), each version right after its step.
    fn ordered(&self, keep: &BTreeSet<NodeIndex>) -> Vec<NodeIndex> {
        let key = |n: NodeIndex| -> (i64, usize) {
            match &self.graph[n] {
                Node::Step { id, .. } => (id * 2, n.index()),
                Node::Version { .. } => {
                    let made_by = self
                        .graph
                        .neighbors_directed(n, Direction::Incoming)
                        .find_map(|m| match &self.graph[m] {
                            Node::Step { id, .. } => Some(*id),
                            Node::Version { .. } => None,
                        })
                        .unwrap_or(0);
                    (made_by * 2 + 1, n.index())
                }
            }
        };
        let mut nodes: Vec<NodeIndex> = keep.iter().copied().collect();
        nodes.sort_by_key(|&n| key(n));
        nodes
    }
}

/// What depends on a version.
#[derive(Debug, Clone, Serialize)]
pub struct Impact {
    pub version: String,
    pub hash: String,
    /// Every step downstream, in an order where each comes after what it read, with the
    /// versions it made.
    pub steps: Vec<ImpactStep>,
    /// Every version downstream, in the same order.
    pub versions: Vec<Node>,
    /// Of those, the latest versions of their datasets: what people use now that depends on
    /// `version`.
    pub current: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ImpactStep {
    pub step: Node,
    /// Labels of the versions the step made.
    pub made: Vec<String>,
}

/// Every step and version downstream of `reference`.
pub fn impact(store: &Store, reference: &str) -> Result<Impact> {
    let v = refs::resolve(&store.lineage, reference)?;
    let g = load(store)?;
    let start = g.node_of(&v)?;
    let mut reached = BTreeSet::new();
    let mut bfs = Bfs::new(&g.graph, start);
    while let Some(n) = bfs.next(&g.graph) {
        if n != start {
            reached.insert(n);
        }
    }
    let mut steps = Vec::new();
    let mut versions = Vec::new();
    let mut current = Vec::new();
    for n in g.ordered(&reached) {
        let node = g.graph[n].clone();
        match &node {
            Node::Step { .. } => {
                let mut made: Vec<(usize, String)> = g
                    .graph
                    .neighbors_directed(n, Direction::Outgoing)
                    .map(|m| (m.index(), g.graph[m].title()))
                    .collect();
                made.sort();
                steps.push(ImpactStep {
                    step: node,
                    made: made.into_iter().map(|(_, t)| t).collect(),
                });
            }
            Node::Version { label, latest, .. } => {
                if *latest {
                    current.push(label.clone());
                }
                versions.push(node);
            }
        }
    }
    Ok(Impact {
        version: v.label(),
        hash: v.hash.clone(),
        steps,
        versions,
        current,
    })
}

/// The part of the graph to draw: all of it, or what `reference` comes from and what depends
/// on it.
fn selection(g: &Lineage, store: &Store, reference: Option<&str>) -> Result<BTreeSet<NodeIndex>> {
    let Some(r) = reference else {
        return Ok(g.graph.node_indices().collect());
    };
    let v = refs::resolve(&store.lineage, r)?;
    let start = g.node_of(&v)?;
    let mut keep = BTreeSet::new();
    let mut down = Bfs::new(&g.graph, start);
    while let Some(n) = down.next(&g.graph) {
        keep.insert(n);
    }
    let rev = Reversed(&g.graph);
    let mut up = Bfs::new(rev, start);
    while let Some(n) = up.next(rev) {
        keep.insert(n);
    }
    Ok(keep)
}

fn dot_text(s: &str) -> String {
    s.replace('\\', "\\\\").replace('"', "\\\"")
}

/// The graph (or the part around `reference`) as Graphviz DOT text.
pub fn dot(store: &Store, reference: Option<&str>) -> Result<String> {
    let g = load(store)?;
    let keep = selection(&g, store, reference)?;
    let mut out = String::from(
        "digraph lineage {\n  rankdir=TB;\n  node [fontname=\"sans-serif\", fontsize=10];\n",
    );
    for n in g.ordered(&keep) {
        let node = &g.graph[n];
        let shape = match node {
            Node::Version { .. } => "box",
            Node::Step { .. } => "ellipse",
        };
        let _ = writeln!(
            out,
            "  n{} [shape={shape}, label=\"{}\\n{}\"];",
            n.index(),
            dot_text(&node.title()),
            dot_text(&node.detail())
        );
    }
    for e in g.graph.edge_indices() {
        if let Some((a, b)) = g.graph.edge_endpoints(e) {
            if keep.contains(&a) && keep.contains(&b) {
                let _ = writeln!(out, "  n{} -> n{};", a.index(), b.index());
            }
        }
    }
    out.push_str("}\n");
    Ok(out)
}

fn xml(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Cuts `s` to at most `n` characters, marking the cut.
fn clip(s: &str, n: usize) -> String {
    if s.chars().count() <= n {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(n.saturating_sub(1)).collect();
        t.push('…');
        t
    }
}

const BOX_W: f64 = 200.0;
const BOX_H: f64 = 40.0;
const GAP_X: f64 = 24.0;
const GAP_Y: f64 = 36.0;
const MARGIN: f64 = 16.0;

/// The graph (or the part around `reference`) as a self-contained SVG: nodes in layers (each
/// node one layer below the lowest node it depends on), ordered within a layer by the mean
/// position of what they depend on, edges as curves from bottom to top.
pub fn svg(store: &Store, reference: Option<&str>) -> Result<String> {
    let g = load(store)?;
    let keep = selection(&g, store, reference)?;
    let order = g.ordered(&keep);
    let mut layer: HashMap<NodeIndex, usize> = HashMap::new();
    for &n in &order {
        let l = g
            .graph
            .neighbors_directed(n, Direction::Incoming)
            .filter(|p| keep.contains(p))
            .filter_map(|p| layer.get(&p))
            .map(|l| l + 1)
            .max()
            .unwrap_or(0);
        layer.insert(n, l);
    }
    let n_layers = layer.values().max().map_or(0, |m| m + 1);
    let mut rows: Vec<Vec<NodeIndex>> = vec![Vec::new(); n_layers];
    let mut x_of: HashMap<NodeIndex, f64> = HashMap::new();
    for &n in &order {
        rows[layer[&n]].push(n);
    }
    for row in rows.iter_mut() {
        // Order by the mean slot of the parents placed already (barycentre), then by the
        // order of recording, so the drawing is the same every time.
        let mut keyed: Vec<(f64, usize, NodeIndex)> = row
            .iter()
            .enumerate()
            .map(|(i, &n)| {
                let xs: Vec<f64> = g
                    .graph
                    .neighbors_directed(n, Direction::Incoming)
                    .filter_map(|p| x_of.get(&p).copied())
                    .collect();
                let key = if xs.is_empty() {
                    i as f64
                } else {
                    xs.iter().sum::<f64>() / xs.len() as f64
                };
                (key, i, n)
            })
            .collect();
        keyed.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        *row = keyed.into_iter().map(|(_, _, n)| n).collect();
        for (slot, &n) in row.iter().enumerate() {
            x_of.insert(n, slot as f64);
        }
    }
    let widest = rows.iter().map(Vec::len).max().unwrap_or(1).max(1);
    let width = MARGIN * 2.0 + widest as f64 * (BOX_W + GAP_X) - GAP_X;
    let height = MARGIN * 2.0 + n_layers as f64 * (BOX_H + GAP_Y) - GAP_Y;
    let pos = |n: NodeIndex| -> (f64, f64) {
        let l = layer[&n];
        let row = &rows[l];
        let slot = row.iter().position(|&m| m == n).unwrap_or(0);
        // Centre each layer.
        let offset = (widest - row.len()) as f64 * (BOX_W + GAP_X) / 2.0;
        (
            MARGIN + offset + slot as f64 * (BOX_W + GAP_X),
            MARGIN + l as f64 * (BOX_H + GAP_Y),
        )
    };
    let mut out = String::new();
    let _ = writeln!(
        out,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{width:.0}\" height=\"{height:.0}\" viewBox=\"0 0 {width:.0} {height:.0}\" font-family=\"sans-serif\" font-size=\"11\">"
    );
    out.push_str("<title>sluice lineage graph</title>\n");
    for e in g.graph.edge_indices() {
        let Some((a, b)) = g.graph.edge_endpoints(e) else {
            continue;
        };
        if !(keep.contains(&a) && keep.contains(&b)) {
            continue;
        }
        let (ax, ay) = pos(a);
        let (bx, by) = pos(b);
        let (x1, y1) = (ax + BOX_W / 2.0, ay + BOX_H);
        let (x2, y2) = (bx + BOX_W / 2.0, by);
        let my = (y1 + y2) / 2.0;
        let _ = writeln!(
            out,
            "<path d=\"M{x1:.1},{y1:.1} C{x1:.1},{my:.1} {x2:.1},{my:.1} {x2:.1},{y2:.1}\" fill=\"none\" stroke=\"#777\" stroke-width=\"1\"/>"
        );
    }
    for &n in &order {
        let (x, y) = pos(n);
        let node = &g.graph[n];
        let (rx, fill, stroke) = match node {
            Node::Version { latest: true, .. } => (2.0, "#eef4fb", "#2b5d8a"),
            Node::Version { .. } => (2.0, "#f7f7f7", "#666"),
            Node::Step { .. } => (18.0, "#fdf6e3", "#8a6d2b"),
        };
        let _ = writeln!(
            out,
            "<g><title>{}</title><rect x=\"{x:.1}\" y=\"{y:.1}\" width=\"{BOX_W}\" height=\"{BOX_H}\" rx=\"{rx}\" fill=\"{fill}\" stroke=\"{stroke}\"/>",
            xml(&format!("{} — {}", node.title(), node.detail()))
        );
        let cx = x + BOX_W / 2.0;
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"bold\">{}</text>",
            y + 16.0,
            xml(&clip(&node.title(), 30))
        );
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" fill=\"#444\">{}</text></g>",
            y + 31.0,
            xml(&clip(&node.detail(), 34))
        );
    }
    out.push_str("</svg>\n");
    Ok(out)
}
