//! The lineage graph as a graph: versions (W3C PROV entities) and steps (activities) as nodes,
//! "read" edges from a version to the step that read it and "made" edges from a step to the
//! version it made. It is loaded from the database into petgraph for the questions that walk
//! it: what depends on a version (`impact`), and the drawing of it (Graphviz DOT text, or an SVG
//! laid out here in layers, so no outside program is needed). The drawing follows the W3C PROV
//! diagram convention for shapes (entities as ovals, activities as rectangles, agents as
//! pentagons, each agent linked to the steps it did) in a palette of our own, with a legend.

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
        // The W3C PROV diagram shapes: entities ovals, activities rectangles.
        let shape = match node {
            Node::Version { .. } => "ellipse",
            Node::Step { .. } => "box",
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
    // Agents (pentagons, Graphviz's "house"), each linked to the steps it did by a dashed edge.
    let mut agents: Vec<&str> = Vec::new();
    for n in g.ordered(&keep) {
        if let Node::Step { agent, .. } = &g.graph[n] {
            let k = match agents.iter().position(|a| a == agent) {
                Some(k) => k,
                None => {
                    agents.push(agent);
                    let _ = writeln!(
                        out,
                        "  a{} [shape=house, label=\"{}\"];",
                        agents.len() - 1,
                        dot_text(agent)
                    );
                    agents.len() - 1
                }
            };
            let _ = writeln!(out, "  n{} -> a{k} [style=dashed];", n.index());
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
/// The legend's band above the drawing.
const LEGEND_H: f64 = 44.0;
/// The column of agents to the right of the layers.
const AGENT_W: f64 = 170.0;
const AGENT_H: f64 = 46.0;
const AGENT_GAP: f64 = 60.0;

/// The drawing's palette (ours): muted, and legible in black-and-white print by shape alone.
const INK: &str = "#23272b";
const MUTED_INK: &str = "#4a4f55";
const EDGE: &str = "#8c8a84";
const ENTITY_FILL: &str = "#e6ede4";
const ENTITY_LINE: &str = "#4f6b4a";
const ENTITY_LATEST_FILL: &str = "#d3e2cf";
const ENTITY_LATEST_LINE: &str = "#2f4f2b";
const ACTIVITY_FILL: &str = "#ebe7f0";
const ACTIVITY_LINE: &str = "#5e4b6e";
const AGENT_FILL: &str = "#f2e6da";
const AGENT_LINE: &str = "#8a5a3c";

/// The points of a pentagon (a house shape, the PROV diagrams' agent) in a box.
fn pentagon(x: f64, y: f64, w: f64, h: f64) -> String {
    format!(
        "{:.1},{:.1} {:.1},{:.1} {:.1},{:.1} {:.1},{:.1} {:.1},{:.1}",
        x,
        y + h * 0.32,
        x + w / 2.0,
        y,
        x + w,
        y + h * 0.32,
        x + w,
        y + h,
        x,
        y + h
    )
}

/// A node's shape: versions (entities) as ovals, steps (activities) as rectangles, in the
/// W3C PROV diagram convention.
fn shape(node: &Node, x: f64, y: f64) -> String {
    match node {
        Node::Version { latest, .. } => {
            let (fill, line, width) = if *latest {
                (ENTITY_LATEST_FILL, ENTITY_LATEST_LINE, 1.6)
            } else {
                (ENTITY_FILL, ENTITY_LINE, 1.0)
            };
            format!(
                "<ellipse cx=\"{:.1}\" cy=\"{:.1}\" rx=\"{:.1}\" ry=\"{:.1}\" fill=\"{fill}\" stroke=\"{line}\" stroke-width=\"{width}\"/>",
                x + BOX_W / 2.0,
                y + BOX_H / 2.0,
                BOX_W / 2.0,
                BOX_H / 2.0
            )
        }
        Node::Step { .. } => format!(
            "<rect x=\"{x:.1}\" y=\"{y:.1}\" width=\"{BOX_W}\" height=\"{BOX_H}\" fill=\"{ACTIVITY_FILL}\" stroke=\"{ACTIVITY_LINE}\"/>"
        ),
    }
}

/// An agent as the drawing names it: the name without the e-mail address.
fn agent_name(agent: &str) -> &str {
    agent.split(" <").next().unwrap_or(agent).trim()
}

/// The legend: one sample of each shape and line, with what it stands for.
fn legend(out: &mut String) {
    let y = MARGIN;
    let h = 22.0;
    let mut x = MARGIN;
    let label = |out: &mut String, x: f64, text: &str| {
        let _ = writeln!(
            out,
            "<text x=\"{x:.1}\" y=\"{:.1}\" fill=\"{INK}\">{}</text>",
            y + h / 2.0 + 4.0,
            xml(text)
        );
    };
    out.push_str("<g class=\"legend\">\n");
    let _ = writeln!(
        out,
        "<ellipse cx=\"{:.1}\" cy=\"{:.1}\" rx=\"18\" ry=\"{:.1}\" fill=\"{ENTITY_FILL}\" stroke=\"{ENTITY_LINE}\"/>",
        x + 18.0,
        y + h / 2.0,
        h / 2.0
    );
    label(out, x + 42.0, "version (entity); bold: a dataset's latest");
    x += 290.0;
    let _ = writeln!(
        out,
        "<rect x=\"{x:.1}\" y=\"{y:.1}\" width=\"36\" height=\"{h}\" fill=\"{ACTIVITY_FILL}\" stroke=\"{ACTIVITY_LINE}\"/>"
    );
    label(out, x + 42.0, "step (activity)");
    x += 150.0;
    let _ = writeln!(
        out,
        "<polygon points=\"{}\" fill=\"{AGENT_FILL}\" stroke=\"{AGENT_LINE}\"/>",
        pentagon(x, y, 36.0, h)
    );
    label(out, x + 42.0, "who acted (agent)");
    x += 160.0;
    let _ = writeln!(
        out,
        "<line x1=\"{x:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"{EDGE}\"/>",
        y + h / 2.0,
        x + 30.0,
        y + h / 2.0
    );
    label(out, x + 36.0, "read by / made by (downward)");
    x += 220.0;
    let _ = writeln!(
        out,
        "<line x1=\"{x:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"{AGENT_LINE}\" stroke-dasharray=\"4 3\"/>",
        y + h / 2.0,
        x + 30.0,
        y + h / 2.0
    );
    label(out, x + 36.0, "done by");
    out.push_str("</g>\n");
}

/// The legend's width.
const LEGEND_W: f64 = 290.0 + 150.0 + 160.0 + 220.0 + 90.0;

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
    let layers_w = widest as f64 * (BOX_W + GAP_X) - GAP_X;
    let top = MARGIN + LEGEND_H;
    let pos = |n: NodeIndex| -> (f64, f64) {
        let l = layer[&n];
        let row = &rows[l];
        let slot = row.iter().position(|&m| m == n).unwrap_or(0);
        // Centre each layer.
        let offset = (widest - row.len()) as f64 * (BOX_W + GAP_X) / 2.0;
        (
            MARGIN + offset + slot as f64 * (BOX_W + GAP_X),
            top + l as f64 * (BOX_H + GAP_Y),
        )
    };
    // The agents (PROV agents: who a step is associated with), each once, in a column to the
    // right, near the middle of the steps they did, without overlapping.
    let mut agents: Vec<(String, Vec<NodeIndex>)> = Vec::new();
    for &n in &order {
        if let Node::Step { agent, .. } = &g.graph[n] {
            match agents.iter_mut().find(|(a, _)| a == agent) {
                Some((_, steps)) => steps.push(n),
                None => agents.push((agent.clone(), vec![n])),
            }
        }
    }
    let agent_x = MARGIN + layers_w + AGENT_GAP;
    let mut agent_y: Vec<f64> = Vec::new();
    let mut next_free = top;
    for (_, steps) in &agents {
        let mean = steps.iter().map(|&n| pos(n).1).sum::<f64>() / steps.len().max(1) as f64;
        let y = mean.max(next_free);
        agent_y.push(y);
        next_free = y + AGENT_H + 12.0;
    }
    let layers_h = n_layers as f64 * (BOX_H + GAP_Y) - GAP_Y;
    let agents_bottom = agent_y.last().map_or(top, |y| y + AGENT_H);
    let width = (if agents.is_empty() {
        MARGIN * 2.0 + layers_w
    } else {
        agent_x + AGENT_W + MARGIN
    })
    .max(MARGIN * 2.0 + LEGEND_W);
    let height = (top + layers_h).max(agents_bottom) + MARGIN;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{width:.0}\" height=\"{height:.0}\" viewBox=\"0 0 {width:.0} {height:.0}\" font-family=\"'Gill Sans', 'Gill Sans MT', Optima, Candara, sans-serif\" font-size=\"11\">"
    );
    out.push_str("<title>sluice lineage graph</title>\n");
    legend(&mut out);
    // Lines first, under the shapes: each agent to the steps it did (dashed), then read and
    // made.
    for ((_, steps), &ay) in agents.iter().zip(&agent_y) {
        for &n in steps {
            let (x, y) = pos(n);
            let _ = writeln!(
                out,
                "<line x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{agent_x:.1}\" y2=\"{:.1}\" stroke=\"{AGENT_LINE}\" stroke-opacity=\"0.45\" stroke-dasharray=\"4 3\"/>",
                x + BOX_W,
                y + BOX_H / 2.0,
                ay + AGENT_H * 0.66
            );
        }
    }
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
            "<path d=\"M{x1:.1},{y1:.1} C{x1:.1},{my:.1} {x2:.1},{my:.1} {x2:.1},{y2:.1}\" fill=\"none\" stroke=\"{EDGE}\" stroke-width=\"1\"/>"
        );
    }
    for &n in &order {
        let (x, y) = pos(n);
        let node = &g.graph[n];
        let _ = writeln!(
            out,
            "<g><title>{}</title>{}",
            xml(&format!("{} — {}", node.title(), node.detail())),
            shape(node, x, y)
        );
        let cx = x + BOX_W / 2.0;
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"bold\" fill=\"{INK}\">{}</text>",
            y + 17.0,
            xml(&clip(&node.title(), 28))
        );
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" fill=\"{MUTED_INK}\">{}</text></g>",
            y + 30.0,
            xml(&clip(&node.detail(), 30))
        );
    }
    for ((agent, steps), &ay) in agents.iter().zip(&agent_y) {
        let _ = writeln!(
            out,
            "<g class=\"agent\"><title>{}</title><polygon points=\"{}\" fill=\"{AGENT_FILL}\" stroke=\"{AGENT_LINE}\"/>",
            xml(&format!("{agent} — {} steps", steps.len())),
            pentagon(agent_x, ay, AGENT_W, AGENT_H)
        );
        let cx = agent_x + AGENT_W / 2.0;
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-weight=\"bold\" fill=\"{INK}\">{}</text>",
            ay + AGENT_H * 0.56,
            xml(&clip(agent_name(agent), 24))
        );
        let _ = writeln!(
            out,
            "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" fill=\"{MUTED_INK}\">{}</text></g>",
            ay + AGENT_H * 0.85,
            xml(&format!(
                "{} step{}",
                steps.len(),
                if steps.len() == 1 { "" } else { "s" }
            ))
        );
    }
    out.push_str("</svg>\n");
    Ok(out)
}
