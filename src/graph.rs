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

/// `s` in lines of at most `n` characters, broken after a space, `_`, `:`, `-` or `·` where
/// one is near, else in the middle of a word: nothing is cut off.
fn wrap(s: &str, n: usize) -> Vec<String> {
    let n = n.max(4);
    let mut lines = Vec::new();
    let mut rest: Vec<char> = s.chars().collect();
    while rest.len() > n {
        // A break after which the line still fits and keeps at least half the line: when the
        // rest then fits on one line, the one that balances the two lines best (so a version's
        // `:v1` stays with its name), else the last.
        let breaks: Vec<usize> = (n / 2..=n)
            .filter(|&i| matches!(rest[i - 1], ' ' | '_' | ':' | '-' | '·' | '/'))
            .collect();
        let last_line = breaks
            .iter()
            .copied()
            .filter(|&i| rest.len() - i <= n)
            .min_by_key(|&i| i.abs_diff(rest.len() - i));
        let cut = last_line.or(breaks.last().copied()).unwrap_or(n);
        let line: String = rest[..cut].iter().collect();
        lines.push(line.trim_end().to_string());
        rest.drain(..cut);
        while rest.first() == Some(&' ') {
            rest.remove(0);
        }
    }
    if !rest.is_empty() || lines.is_empty() {
        lines.push(rest.into_iter().collect());
    }
    lines
}

/// Step numbers as ranges: `1–5, 8, 10–11`.
fn ranges(ids: &[i64]) -> String {
    let mut parts: Vec<String> = Vec::new();
    let mut i = 0;
    while i < ids.len() {
        let mut j = i;
        while j + 1 < ids.len() && ids[j + 1] == ids[j] + 1 {
            j += 1;
        }
        parts.push(if j > i {
            format!("{}–{}", ids[i], ids[j])
        } else {
            ids[i].to_string()
        });
        i = j + 1;
    }
    parts.join(", ")
}

/// A node's box: narrow, so that a layer of five fits a printed page at a legible size; its
/// height follows the longest label.
const BOX_W: f64 = 132.0;
const GAP_X: f64 = 14.0;
const GAP_Y: f64 = 34.0;
const LINE_H: f64 = 13.0;
const PAD_Y: f64 = 9.0;
const MARGIN: f64 = 14.0;
/// Characters per line of a node's label (bold titles are wider).
const TITLE_CHARS: usize = 17;
const DETAIL_CHARS: usize = 20;
/// The gutter of an edge that skips layers: it runs down a lane of its own at the left, so
/// that no edge crosses a node.
const LANE: f64 = 9.0;
/// Agents (PROV agents) in a row under the legend.
const AGENT_W: f64 = 170.0;
/// The font size of every label, in the drawing's units (CSS pixels at full size).
pub const FONT_SIZE: f64 = 11.0;

/// The drawing's palette (ours): muted, and legible in black-and-white print by shape alone.
const INK: &str = "#23272b";
const MUTED_INK: &str = "#4a4f55";
const EDGE: &str = "#7d7b75";
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
fn shape(node: &Node, x: f64, y: f64, h: f64) -> String {
    match node {
        Node::Version { latest, .. } => {
            let (fill, line, width) = if *latest {
                (ENTITY_LATEST_FILL, ENTITY_LATEST_LINE, 1.8)
            } else {
                (ENTITY_FILL, ENTITY_LINE, 1.0)
            };
            format!(
                "<ellipse cx=\"{:.1}\" cy=\"{:.1}\" rx=\"{:.1}\" ry=\"{:.1}\" fill=\"{fill}\" stroke=\"{line}\" stroke-width=\"{width}\"/>",
                x + BOX_W / 2.0,
                y + h / 2.0,
                BOX_W / 2.0,
                h / 2.0
            )
        }
        Node::Step { .. } => format!(
            "<rect x=\"{x:.1}\" y=\"{y:.1}\" width=\"{BOX_W}\" height=\"{h:.1}\" fill=\"{ACTIVITY_FILL}\" stroke=\"{ACTIVITY_LINE}\"/>"
        ),
    }
}

/// A node's label: the title in bold, then (versions) its rows and columns, each wrapped.
fn label_lines(node: &Node) -> Vec<(bool, String)> {
    let mut lines: Vec<(bool, String)> = wrap(&node.title(), TITLE_CHARS)
        .into_iter()
        .map(|l| (true, l))
        .collect();
    if let Node::Version { n_rows, n_cols, .. } = node {
        lines.extend(
            wrap(&format!("{n_rows} rows × {n_cols}"), DETAIL_CHARS)
                .into_iter()
                .map(|l| (false, l)),
        );
    }
    lines
}

/// An agent as the drawing names it: the name without the e-mail address (written `Name
/// <address>` or `Name (address)`).
fn agent_name(agent: &str) -> &str {
    let name = agent.split(" <").next().unwrap_or(agent);
    match name.rfind(" (") {
        Some(i) if name.ends_with(')') && name[i..].contains('@') => name[..i].trim(),
        _ => name.trim(),
    }
}

/// An agent's label: its name in bold, then the steps it did, each wrapped.
fn agent_lines(agent: &str, steps: &[i64]) -> Vec<(bool, String)> {
    let done = format!(
        "step{} {}",
        if steps.len() == 1 { "" } else { "s" },
        ranges(steps)
    );
    wrap(agent_name(agent), 24)
        .into_iter()
        .map(|l| (true, l))
        .chain(wrap(&done, 28).into_iter().map(|l| (false, l)))
        .collect()
}

/// The legend's size: two rows of two samples.
const LEGEND_W: f64 = 560.0;
const LEGEND_H: f64 = 58.0;

/// The legend: one sample of each shape and line, with what it stands for.
fn legend(out: &mut String) {
    let h = 20.0;
    let label = |out: &mut String, x: f64, y: f64, text: &str| {
        let _ = writeln!(
            out,
            "<text x=\"{x:.1}\" y=\"{:.1}\" fill=\"{INK}\">{}</text>",
            y + h / 2.0 + 4.0,
            xml(text)
        );
    };
    out.push_str("<g class=\"legend\">\n");
    let (x0, x1) = (MARGIN, MARGIN + 280.0);
    let (y0, y1) = (MARGIN, MARGIN + h + 8.0);
    let _ = writeln!(
        out,
        "<ellipse cx=\"{:.1}\" cy=\"{:.1}\" rx=\"18\" ry=\"{:.1}\" fill=\"{ENTITY_FILL}\" stroke=\"{ENTITY_LINE}\"/>",
        x0 + 18.0,
        y0 + h / 2.0,
        h / 2.0
    );
    label(
        out,
        x0 + 42.0,
        y0,
        "version (entity); bold: its dataset's latest",
    );
    let _ = writeln!(
        out,
        "<rect x=\"{x1:.1}\" y=\"{y0:.1}\" width=\"36\" height=\"{h}\" fill=\"{ACTIVITY_FILL}\" stroke=\"{ACTIVITY_LINE}\"/>"
    );
    label(out, x1 + 42.0, y0, "step (activity), by its number");
    let _ = writeln!(
        out,
        "<polygon points=\"{}\" fill=\"{AGENT_FILL}\" stroke=\"{AGENT_LINE}\"/>",
        pentagon(x0, y1, 36.0, h)
    );
    label(out, x0 + 42.0, y1, "who acted (agent), with the steps done");
    let _ = writeln!(
        out,
        "<line x1=\"{x1:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"{EDGE}\"/><polyline points=\"{:.1},{:.1} {:.1},{:.1} {:.1},{:.1}\" fill=\"{EDGE}\" stroke=\"none\"/>",
        y1 + h / 2.0,
        x1 + 34.0,
        y1 + h / 2.0,
        x1 + 28.0,
        y1 + h / 2.0 - 4.0,
        x1 + 36.0,
        y1 + h / 2.0,
        x1 + 28.0,
        y1 + h / 2.0 + 4.0
    );
    label(out, x1 + 42.0, y1, "read by a step, or made by it");
    out.push_str("</g>\n");
}

/// The lineage drawing: the SVG's inner content and its size, with the heights between its
/// rows of nodes where it may be cut into bands (for print, a page at a time).
#[derive(Debug, Clone, Default)]
pub struct Drawing {
    pub width: f64,
    pub height: f64,
    /// Everything inside the `<svg>` element.
    pub body: String,
    /// Heights (in the drawing's units, top down) where a cut crosses no node: the middle of
    /// each gap between two rows.
    pub cuts: Vec<f64>,
}

impl Drawing {
    /// The drawing as a self-contained SVG file.
    pub fn svg(&self) -> String {
        let mut s = svg_open(self.width, 0.0, self.width, self.height, "");
        s.push_str(&self.body);
        s.push_str("</svg>\n");
        s
    }
}

/// The opening tag of an SVG showing the part of a drawing from `top`, `h` high.
pub fn svg_open(width: f64, top: f64, w: f64, h: f64, extra: &str) -> String {
    format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\"{extra} width=\"{w:.0}\" height=\"{h:.0}\" viewBox=\"0 {top:.0} {width:.0} {h:.0}\" font-family=\"'Gill Sans', 'Gill Sans MT', Optima, Candara, 'DejaVu Sans', sans-serif\" font-size=\"{FONT_SIZE}\">\n"
    )
}

/// The graph (or the part around `reference`) as a self-contained SVG.
pub fn svg(store: &Store, reference: Option<&str>) -> Result<String> {
    Ok(drawing(store, reference, false)?.svg())
}

/// The graph (or the part around `reference`: what it comes from and, unless `upstream_only`,
/// what depends on it) laid out in layers: each node one layer below the lowest node it
/// depends on, ordered within a layer by the mean position of what it depends on, edges from
/// the bottom of one node to the top of the next with an arrowhead, an edge that skips layers
/// down a lane of its own at the left; agents in a row under the legend, each with the steps
/// it did.
pub fn drawing(store: &Store, reference: Option<&str>, upstream_only: bool) -> Result<Drawing> {
    let g = load(store)?;
    let mut keep = selection(&g, store, reference)?;
    if let (true, Some(r)) = (upstream_only, reference) {
        let v = refs::resolve(&store.lineage, r)?;
        let start = g.node_of(&v)?;
        let rev = Reversed(&g.graph);
        let mut up = Bfs::new(rev, start);
        keep.clear();
        while let Some(n) = up.next(rev) {
            keep.insert(n);
        }
    }
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
    // Edges, and the lanes of those that skip a layer.
    let mut edges: Vec<(NodeIndex, NodeIndex, Option<usize>)> = Vec::new();
    let mut n_lanes = 0;
    for e in g.graph.edge_indices() {
        let Some((a, b)) = g.graph.edge_endpoints(e) else {
            continue;
        };
        if !(keep.contains(&a) && keep.contains(&b)) {
            continue;
        }
        let lane = if layer[&b] > layer[&a] + 1 {
            n_lanes += 1;
            Some(n_lanes - 1)
        } else {
            None
        };
        edges.push((a, b, lane));
    }
    // Agents (PROV agents: who a step is associated with), each once, in recording order.
    let mut agents: Vec<(String, Vec<i64>)> = Vec::new();
    for &n in &order {
        if let Node::Step { agent, id, .. } = &g.graph[n] {
            match agents.iter_mut().find(|(a, _)| a == agent) {
                Some((_, steps)) => steps.push(*id),
                None => agents.push((agent.clone(), vec![*id])),
            }
        }
    }
    let n_lines = order
        .iter()
        .map(|&n| label_lines(&g.graph[n]).len())
        .max()
        .unwrap_or(1);
    let box_h = PAD_Y * 2.0 + n_lines as f64 * LINE_H;
    let widest = rows.iter().map(Vec::len).max().unwrap_or(1).max(1);
    let lanes_w = if n_lanes == 0 {
        0.0
    } else {
        n_lanes as f64 * LANE + 6.0
    };
    let layers_w = widest as f64 * (BOX_W + GAP_X) - GAP_X;
    let inner_w = (lanes_w + layers_w).max(LEGEND_W);
    let per_row = ((inner_w + 12.0) / (AGENT_W + 12.0)).floor().max(1.0) as usize;
    let agent_rows = agents.len().div_ceil(per_row);
    // The pentagon's roof takes a third of its height; the label goes under it.
    let agent_text_lines = agents
        .iter()
        .map(|(a, st)| agent_lines(a, st).len())
        .max()
        .unwrap_or(2);
    let agent_h = (agent_text_lines as f64 * LINE_H + 6.0) / 0.68;
    let agents_h = agent_rows as f64 * (agent_h + 10.0);
    let top = MARGIN + LEGEND_H + agents_h + 10.0;
    let left = MARGIN + lanes_w + (inner_w - lanes_w - layers_w) / 2.0;
    // Each node's left edge: under the middle of what it depends on where there is room (so a
    // chain of steps runs straight down), else pushed aside; a layer with nothing placed above
    // it is centred. Layers are placed top down, so parents are placed first.
    let step = BOX_W + GAP_X;
    let right = left + layers_w - BOX_W;
    let mut x_at: HashMap<NodeIndex, f64> = HashMap::new();
    for row in &rows {
        let centred = left + (widest - row.len()) as f64 * step / 2.0;
        let mut xs: Vec<f64> = row
            .iter()
            .enumerate()
            .map(|(slot, &n)| {
                let parents: Vec<f64> = g
                    .graph
                    .neighbors_directed(n, Direction::Incoming)
                    .filter_map(|p| x_at.get(&p).copied())
                    .collect();
                if parents.is_empty() {
                    centred + slot as f64 * step
                } else {
                    parents.iter().sum::<f64>() / parents.len() as f64
                }
            })
            .collect();
        // No overlaps, left to right; then back within the right edge, right to left.
        for i in 0..xs.len() {
            let floor = if i == 0 { left } else { xs[i - 1] + step };
            xs[i] = xs[i].max(floor);
        }
        for i in (0..xs.len()).rev() {
            let ceiling = if i + 1 == xs.len() {
                right
            } else {
                xs[i + 1] - step
            };
            xs[i] = xs[i].min(ceiling);
        }
        for (&n, x) in row.iter().zip(xs) {
            x_at.insert(n, x);
        }
    }
    let pos = |n: NodeIndex| -> (f64, f64) {
        (
            x_at.get(&n).copied().unwrap_or(left),
            top + layer[&n] as f64 * (box_h + GAP_Y),
        )
    };
    let width = inner_w + MARGIN * 2.0;
    let layers_h = n_layers as f64 * (box_h + GAP_Y) - GAP_Y;
    let height = top + layers_h.max(0.0) + MARGIN;
    let mut cuts = vec![top - 5.0];
    for l in 1..n_layers {
        cuts.push(top + l as f64 * (box_h + GAP_Y) - GAP_Y / 2.0);
    }

    let mut out = String::new();
    out.push_str("<title>sluice lineage graph</title>\n");
    legend(&mut out);
    for (i, (agent, steps)) in agents.iter().enumerate() {
        let ax = MARGIN + (i % per_row) as f64 * (AGENT_W + 12.0);
        let ay = MARGIN + LEGEND_H + (i / per_row) as f64 * (agent_h + 10.0);
        let _ = writeln!(
            out,
            "<g class=\"agent\"><title>{}</title><polygon points=\"{}\" fill=\"{AGENT_FILL}\" stroke=\"{AGENT_LINE}\"/>",
            xml(&format!("{agent} — steps {}", ranges(steps))),
            pentagon(ax, ay, AGENT_W, agent_h)
        );
        let cx = ax + AGENT_W / 2.0;
        for (j, (bold, text)) in agent_lines(agent, steps).iter().enumerate() {
            let _ = writeln!(
                out,
                "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\"{} fill=\"{}\">{}</text>",
                ay + agent_h * 0.32 + LINE_H * (j as f64 + 1.0),
                if *bold { " font-weight=\"bold\"" } else { "" },
                if *bold { INK } else { MUTED_INK },
                xml(text)
            );
        }
        out.push_str("</g>\n");
    }
    // Lines first, under the shapes; each ends with an arrowhead at the top of what it leads
    // to.
    for (a, b, lane) in &edges {
        let (ax, ay) = pos(*a);
        let (bx, by) = pos(*b);
        let (x1, y1) = (ax + BOX_W / 2.0, ay + box_h);
        let (x2, y2) = (bx + BOX_W / 2.0, by);
        let d = match lane {
            None => {
                let my = (y1 + y2) / 2.0;
                format!("M{x1:.1},{y1:.1} C{x1:.1},{my:.1} {x2:.1},{my:.1} {x2:.1},{y2:.1}")
            }
            Some(k) => {
                // Down into the gap below, left to the lane, down to the gap above the target,
                // right to above it, down into it; the gaps hold no nodes.
                let lx = MARGIN + 3.0 + *k as f64 * LANE;
                let shift = (*k % 4) as f64 * 3.0;
                let ya = y1 + GAP_Y / 2.0 - 4.5 + shift;
                let yb = y2 - GAP_Y / 2.0 - 4.5 + shift;
                format!("M{x1:.1},{y1:.1} V{ya:.1} H{lx:.1} V{yb:.1} H{x2:.1} V{y2:.1}")
            }
        };
        // The arrowhead: every edge ends going straight down into the top of its target.
        let _ = writeln!(
            out,
            "<path d=\"{d}\" fill=\"none\" stroke=\"{EDGE}\" stroke-width=\"1\"/><polyline class=\"arrowhead\" points=\"{:.1},{:.1} {x2:.1},{y2:.1} {:.1},{:.1}\" fill=\"{EDGE}\" stroke=\"none\"/>",
            x2 - 4.0,
            y2 - 8.0,
            x2 + 4.0,
            y2 - 8.0
        );
    }
    for &n in &order {
        let (x, y) = pos(n);
        let node = &g.graph[n];
        let _ = writeln!(
            out,
            "<g><title>{}</title>{}",
            xml(&format!("{} — {}", node.title(), node.detail())),
            shape(node, x, y, box_h)
        );
        let cx = x + BOX_W / 2.0;
        let lines = label_lines(node);
        let first = y + box_h / 2.0 - (lines.len() as f64 - 1.0) * LINE_H / 2.0 + 4.0;
        for (i, (bold, text)) in lines.iter().enumerate() {
            let _ = writeln!(
                out,
                "<text x=\"{cx:.1}\" y=\"{:.1}\" text-anchor=\"middle\"{} fill=\"{}\">{}</text>",
                first + i as f64 * LINE_H,
                if *bold { " font-weight=\"bold\"" } else { "" },
                if *bold { INK } else { MUTED_INK },
                xml(text)
            );
        }
        out.push_str("</g>\n");
    }
    Ok(Drawing {
        width,
        height,
        body: out,
        cuts,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wrapping_keeps_every_character() {
        for s in [
            "fennmarsh_orders:v1",
            "step 16 · append",
            "a",
            "",
            "averyveryverylongname_without",
        ] {
            let lines = wrap(s, 10);
            assert!(lines.iter().all(|l| l.chars().count() <= 10), "{lines:?}");
            assert_eq!(lines.concat().replace(' ', ""), s.replace(' ', ""));
        }
        assert_eq!(wrap("fennmarsh_orders:v1", 17), ["fennmarsh_", "orders:v1"]);
    }

    #[test]
    fn step_numbers_are_shown_as_ranges() {
        assert_eq!(ranges(&[1, 2, 3, 5, 7, 8]), "1–3, 5, 7–8");
        assert_eq!(ranges(&[4]), "4");
    }
}
