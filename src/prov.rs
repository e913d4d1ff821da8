//! The lineage of a version in the W3C PROV data model (PROV-DM, W3C Recommendation, 30 April
//! 2013), written as PROV-JSON (W3C Member Submission, 24 April 2013) or PROV-N (W3C
//! Recommendation, 30 April 2013). It owns the mapping from sluice's records to PROV and both
//! serialisations, built from one list of records so the two always say the same thing.
//!
//! The mapping: every version on the way to the version asked for is an entity (its BLAKE3
//! hash, rows, columns, bytes); an outside file a version was taken in from is an entity too;
//! every step is an activity (start and end time, kind, operation, parameters as canonical JSON,
//! reason, rows in and out, how its row lineage is known, the command and code state for outside
//! work). The person who ran a step and the sluice build that recorded it are agents. Each step
//! `used` its inputs (at its start) and each output `wasGeneratedBy` it (at its end); each output
//! `wasDerivedFrom` each input through the step, naming that generation and usage; the step
//! `wasAssociatedWith` both agents, and each output `wasAttributedTo` the person.
//!
//! Identifiers are qualified names in sluice's own namespace ([`PREFIX`], [`NAMESPACE`]),
//! declared in the document. Every relation has an identifier, so a document read back and
//! written again keeps each statement recognisable. The output is deterministic: records in
//! step order, attributes in a fixed order, no clock read.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use serde_json::{json, Map, Value as Json};

use crate::error::Result;
use crate::history::{self, StepBehind};
use crate::model::{canonical_json, StepKind, Version};
use crate::refs;
use crate::store::Store;

/// The prefix of sluice's identifiers and attribute names.
pub const PREFIX: &str = "sluice";
/// The namespace the prefix stands for. The `.invalid` top-level name (RFC 2606) is reserved
/// never to resolve, so the IRI names terms without pretending to be a web page.
pub const NAMESPACE: &str = "https://sluice.invalid/prov#";

/// A value of an attribute.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Value {
    Text(String),
    /// A count, typed `xsd:long` (rows and bytes can pass `xsd:int`'s range).
    Long(u64),
    /// A qualified name such as `sluice:Version` or `prov:Person`.
    Name(String),
}

/// The three kinds of PROV element sluice writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum ElementKind {
    Entity,
    Activity,
    Agent,
}

impl ElementKind {
    pub fn keyword(self) -> &'static str {
        match self {
            ElementKind::Entity => "entity",
            ElementKind::Activity => "activity",
            ElementKind::Agent => "agent",
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Element {
    pub kind: ElementKind,
    pub id: String,
    /// Activities only.
    pub start: Option<String>,
    pub end: Option<String>,
    pub attributes: Vec<(String, Value)>,
}

/// The five relations sluice writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum RelationKind {
    Used,
    WasGeneratedBy,
    WasDerivedFrom,
    WasAssociatedWith,
    WasAttributedTo,
}

impl RelationKind {
    pub const ALL: [RelationKind; 5] = [
        RelationKind::Used,
        RelationKind::WasGeneratedBy,
        RelationKind::WasDerivedFrom,
        RelationKind::WasAssociatedWith,
        RelationKind::WasAttributedTo,
    ];

    pub fn keyword(self) -> &'static str {
        match self {
            RelationKind::Used => "used",
            RelationKind::WasGeneratedBy => "wasGeneratedBy",
            RelationKind::WasDerivedFrom => "wasDerivedFrom",
            RelationKind::WasAssociatedWith => "wasAssociatedWith",
            RelationKind::WasAttributedTo => "wasAttributedTo",
        }
    }

    /// The PROV-JSON names of the positional arguments, in PROV-N order.
    fn arguments(self) -> &'static [&'static str] {
        match self {
            RelationKind::Used => &["prov:activity", "prov:entity", "prov:time"],
            RelationKind::WasGeneratedBy => &["prov:entity", "prov:activity", "prov:time"],
            RelationKind::WasDerivedFrom => &[
                "prov:generatedEntity",
                "prov:usedEntity",
                "prov:activity",
                "prov:generation",
                "prov:usage",
            ],
            RelationKind::WasAssociatedWith => &["prov:activity", "prov:agent", "prov:plan"],
            RelationKind::WasAttributedTo => &["prov:entity", "prov:agent"],
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Relation {
    pub kind: RelationKind,
    pub id: String,
    /// The positional arguments (see `RelationKind::arguments`); `None` is PROV-N's `-`.
    pub arguments: Vec<Option<String>>,
    pub attributes: Vec<(String, Value)>,
}

/// A PROV document: elements, then relations, in a deterministic order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Document {
    /// The version whose lineage this is.
    pub subject: String,
    pub elements: Vec<Element>,
    pub relations: Vec<Relation>,
}

impl Document {
    /// How many elements of a kind the document holds.
    pub fn count(&self, kind: ElementKind) -> usize {
        self.elements.iter().filter(|e| e.kind == kind).count()
    }

    /// How many relations of a kind the document holds.
    pub fn count_relations(&self, kind: RelationKind) -> usize {
        self.relations.iter().filter(|r| r.kind == kind).count()
    }
}

fn q(local: &str) -> String {
    format!("{PREFIX}:{local}")
}

/// The entity name of a version. Dataset names are letters, digits, `_`, `-` and `.` starting
/// with a letter, so they are valid local names in both serialisations as they are.
pub fn version_id(v: &Version) -> String {
    q(&format!("version_{}_{}", v.dataset, v.seq))
}

fn step_id(id: i64) -> String {
    q(&format!("step_{id}"))
}

/// A person's agent name: derived from the identity text, so the same person has the same name
/// in every export of the store.
fn person_id(identity: &str) -> String {
    let h = blake3::hash(identity.as_bytes()).to_hex();
    q(&format!("person_{}", &h.as_str()[..16]))
}

/// `text` as a local name: characters other than ASCII letters, digits, `.` and `-` become `_`.
fn local_name(text: &str) -> String {
    let slug: String = text
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '.' || c == '-' {
                c
            } else {
                '_'
            }
        })
        .collect();
    slug.trim_end_matches('.').to_string()
}

fn software_id(tool_version: &str) -> String {
    q(&format!("software_{}", local_name(tool_version)))
}

fn kind_type(kind: StepKind) -> &'static str {
    match kind {
        StepKind::Ingest => "Intake",
        StepKind::Operation => "Operation",
        StepKind::Command => "OutsideCommand",
        StepKind::HandEdit => "HandEdit",
        StepKind::Revert => "Revert",
        StepKind::Replay => "Replay",
    }
}

fn text(name: &str, v: impl Into<String>) -> (String, Value) {
    (name.to_string(), Value::Text(v.into()))
}

fn long(name: &str, v: u64) -> (String, Value) {
    (name.to_string(), Value::Long(v))
}

fn qname(name: &str, v: impl Into<String>) -> (String, Value) {
    (name.to_string(), Value::Name(v.into()))
}

fn version_element(v: &Version) -> Element {
    let mut attributes = vec![
        qname("prov:type", q("Version")),
        text("prov:label", v.label()),
        text(&q("dataset"), v.dataset.clone()),
        long(&q("seq"), v.seq),
        text(&q("blake3"), v.hash.clone()),
        long(&q("rows"), v.n_rows),
        long(&q("columns"), v.n_cols),
        long(&q("bytes"), v.n_bytes),
        text(&q("header"), canonical_json(&Json::from(v.header.to_vec()))),
    ];
    attributes.push(text(&q("recorded"), v.created_at.clone()));
    Element {
        kind: ElementKind::Entity,
        id: version_id(v),
        start: None,
        end: None,
        attributes,
    }
}

/// Builds the PROV document of `reference`'s lineage.
pub fn document(store: &Store, reference: &str) -> Result<Document> {
    let target = refs::resolve(&store.lineage, reference)?;
    let steps = history::behind(store, &target)?;
    Ok(build(&target, &steps))
}

/// The document of the given steps (as `history::behind` returns them).
pub fn build(target: &Version, steps: &[StepBehind]) -> Document {
    let mut entities: BTreeMap<i64, Element> = BTreeMap::new();
    let mut order: Vec<i64> = Vec::new();
    let mut files: Vec<Element> = Vec::new();
    let mut activities = Vec::new();
    let mut people: Vec<(String, Element)> = Vec::new();
    let mut software: Vec<(String, Element)> = Vec::new();
    let mut relations = Vec::new();

    let mut add_version = |v: &Version, entities: &mut BTreeMap<i64, Element>| {
        if let std::collections::btree_map::Entry::Vacant(slot) = entities.entry(v.id) {
            slot.insert(version_element(v));
            order.push(v.id);
        }
    };

    // When each version behind the target was generated (its step's end), so that a usage of a
    // version still being made is not given a time before that (see below).
    let generated_at: std::collections::HashMap<i64, &str> = steps
        .iter()
        .flat_map(|sb| sb.outputs.iter().map(|v| (v.id, sb.step.ended_at.as_str())))
        .collect();

    for sb in steps {
        let s = &sb.step;
        let act = step_id(s.id);
        for (_, v) in &sb.inputs {
            add_version(v, &mut entities);
        }
        for v in &sb.outputs {
            add_version(v, &mut entities);
        }

        let mut attrs = vec![
            qname("prov:type", q(kind_type(s.kind))),
            text(
                "prov:label",
                format!(
                    "step {} {}",
                    s.id,
                    s.operation.as_deref().unwrap_or(s.kind.as_str())
                ),
            ),
        ];
        if let Some(op) = &s.operation {
            attrs.push(text(&q("operation"), op.clone()));
        }
        if !s.params.is_null() {
            attrs.push(text(&q("parameters"), canonical_json(&s.params)));
        }
        if let Some(r) = &s.reason {
            attrs.push(text(&q("reason"), r.clone()));
        }
        if let Some(n) = s.rows_in {
            attrs.push(long(&q("rowsIn"), n));
        }
        if let Some(n) = s.rows_out {
            attrs.push(long(&q("rowsOut"), n));
        }
        attrs.push(text(&q("lineage"), s.lineage.as_str()));
        if let Some(code) = &s.code {
            attrs.push(text(&q("code"), canonical_json(code)));
        }
        if let Some(r) = s.repeats_step {
            attrs.push(qname(&q("repeats"), step_id(r)));
        }
        activities.push(Element {
            kind: ElementKind::Activity,
            id: act.clone(),
            start: Some(s.started_at.clone()),
            end: Some(s.ended_at.clone()),
            attributes: attrs,
        });

        let person = person_id(&s.agent);
        if !people.iter().any(|(id, _)| *id == person) {
            people.push((
                person.clone(),
                Element {
                    kind: ElementKind::Agent,
                    id: person.clone(),
                    start: None,
                    end: None,
                    attributes: vec![
                        qname("prov:type", "prov:Person"),
                        text("prov:label", s.agent.clone()),
                    ],
                },
            ));
        }
        let tool = software_id(&s.tool_version);
        if !software.iter().any(|(id, _)| *id == tool) {
            software.push((
                tool.clone(),
                Element {
                    kind: ElementKind::Agent,
                    id: tool.clone(),
                    start: None,
                    end: None,
                    attributes: vec![
                        qname("prov:type", "prov:SoftwareAgent"),
                        text("prov:label", s.tool_version.clone()),
                    ],
                },
            ));
        }

        // What the step read: its input versions and, for an intake or a hand edit, the outside
        // file the version was read from.
        let mut usages: Vec<(String, String)> = Vec::new();
        for (i, (role, v)) in sb.inputs.iter().enumerate() {
            let id = q(&format!("use_{}_{}", s.id, i + 1));
            // A step run in one pass with the step before it reads that step's rows as they are
            // made, so it starts before its input is whole. PROV dates a usage at its beginning
            // and requires it to follow the generation; rather than give a time that is not
            // true, such a usage has no time and says that the rows were streamed.
            let streamed = generated_at
                .get(&v.id)
                .is_some_and(|made| s.started_at.as_str() < *made);
            let mut attributes = vec![qname("prov:role", q(&local_name(role)))];
            if streamed {
                attributes.push(text(
                    &q("usage"),
                    "rows read as the input was made, in one pass",
                ));
            }
            relations.push(Relation {
                kind: RelationKind::Used,
                id: id.clone(),
                arguments: vec![
                    Some(act.clone()),
                    Some(version_id(v)),
                    (!streamed).then(|| s.started_at.clone()),
                ],
                attributes,
            });
            usages.push((id, version_id(v)));
        }
        if let (StepKind::Ingest | StepKind::HandEdit, Some(src)) = (s.kind, &s.source) {
            let file = q(&format!("file_{}", s.id));
            let mut fa = vec![
                qname("prov:type", q("OutsideFile")),
                text("prov:label", src.path.clone()),
                text(&q("path"), src.absolute_path.clone()),
                long(&q("bytes"), src.n_bytes),
            ];
            if let Some(m) = &src.modified {
                fa.push(text(&q("modified"), m.clone()));
            }
            files.push(Element {
                kind: ElementKind::Entity,
                id: file.clone(),
                start: None,
                end: None,
                attributes: fa,
            });
            let id = q(&format!("use_{}_file", s.id));
            relations.push(Relation {
                kind: RelationKind::Used,
                id: id.clone(),
                arguments: vec![
                    Some(act.clone()),
                    Some(file.clone()),
                    Some(s.started_at.clone()),
                ],
                attributes: vec![qname("prov:role", q("outside_file"))],
            });
            usages.push((id, file));
        }

        for (j, v) in sb.outputs.iter().enumerate() {
            let gen = q(&format!("gen_{}_{}", s.id, j + 1));
            relations.push(Relation {
                kind: RelationKind::WasGeneratedBy,
                id: gen.clone(),
                arguments: vec![
                    Some(version_id(v)),
                    Some(act.clone()),
                    Some(s.ended_at.clone()),
                ],
                attributes: Vec::new(),
            });
            for (i, (usage, used)) in usages.iter().enumerate() {
                relations.push(Relation {
                    kind: RelationKind::WasDerivedFrom,
                    id: q(&format!("derived_{}_{}_{}", s.id, j + 1, i + 1)),
                    arguments: vec![
                        Some(version_id(v)),
                        Some(used.clone()),
                        Some(act.clone()),
                        Some(gen.clone()),
                        Some(usage.clone()),
                    ],
                    attributes: Vec::new(),
                });
            }
            relations.push(Relation {
                kind: RelationKind::WasAttributedTo,
                id: q(&format!("attributed_{}_{}", s.id, j + 1)),
                arguments: vec![Some(version_id(v)), Some(person.clone())],
                attributes: Vec::new(),
            });
        }
        relations.push(Relation {
            kind: RelationKind::WasAssociatedWith,
            id: q(&format!("assoc_{}_person", s.id)),
            arguments: vec![Some(act.clone()), Some(person.clone()), None],
            attributes: vec![qname("prov:role", q("operator"))],
        });
        relations.push(Relation {
            kind: RelationKind::WasAssociatedWith,
            id: q(&format!("assoc_{}_software", s.id)),
            arguments: vec![Some(act.clone()), Some(tool), None],
            attributes: vec![qname("prov:role", q("recorder"))],
        });
    }
    if entities.is_empty() {
        entities.insert(target.id, version_element(target));
        order.push(target.id);
    }

    let mut elements: Vec<Element> = order.iter().filter_map(|id| entities.remove(id)).collect();
    elements.extend(files);
    elements.extend(activities);
    elements.extend(people.into_iter().map(|(_, e)| e));
    elements.extend(software.into_iter().map(|(_, e)| e));
    Document {
        subject: target.label(),
        elements,
        relations,
    }
}

fn json_value(v: &Value) -> Json {
    match v {
        Value::Text(s) => Json::String(s.clone()),
        Value::Long(n) => json!({ "$": n.to_string(), "type": "xsd:long" }),
        Value::Name(n) => json!({ "$": n, "type": "prov:QUALIFIED_NAME" }),
    }
}

fn json_attributes(into: &mut Map<String, Json>, attrs: &[(String, Value)]) {
    // PROV-JSON gives an attribute with several values as a list; sluice writes one each.
    for (k, v) in attrs {
        into.insert(k.clone(), json_value(v));
    }
}

/// The document as PROV-JSON text (pretty, keys sorted, ending in a newline).
pub fn to_json(doc: &Document) -> String {
    let mut root = Map::new();
    let mut prefix = Map::new();
    prefix.insert(PREFIX.to_string(), Json::String(NAMESPACE.to_string()));
    prefix.insert(
        "xsd".to_string(),
        Json::String("http://www.w3.org/2001/XMLSchema#".to_string()),
    );
    root.insert("prefix".to_string(), Json::Object(prefix));
    for e in &doc.elements {
        let mut m = Map::new();
        if let Some(t) = &e.start {
            m.insert("prov:startTime".to_string(), Json::String(t.clone()));
        }
        if let Some(t) = &e.end {
            m.insert("prov:endTime".to_string(), Json::String(t.clone()));
        }
        json_attributes(&mut m, &e.attributes);
        let group = root
            .entry(e.kind.keyword().to_string())
            .or_insert_with(|| Json::Object(Map::new()));
        if let Json::Object(g) = group {
            g.insert(e.id.clone(), Json::Object(m));
        }
    }
    for r in &doc.relations {
        let mut m = Map::new();
        for (name, arg) in r.kind.arguments().iter().zip(&r.arguments) {
            if let Some(a) = arg {
                m.insert((*name).to_string(), Json::String(a.clone()));
            }
        }
        json_attributes(&mut m, &r.attributes);
        let group = root
            .entry(r.kind.keyword().to_string())
            .or_insert_with(|| Json::Object(Map::new()));
        if let Json::Object(g) = group {
            g.insert(r.id.clone(), Json::Object(m));
        }
    }
    let mut out = serde_json::to_string_pretty(&Json::Object(root)).unwrap_or_default();
    out.push('\n');
    out
}

/// A PROV-N string literal: `"` and `\` escaped, and the line breaks and tabs the grammar's
/// STRING_LITERAL does not allow written as escapes (ECHAR).
fn provn_string(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

fn provn_value(v: &Value) -> String {
    match v {
        Value::Text(s) => provn_string(s),
        Value::Long(n) => format!("\"{n}\" %% xsd:long"),
        Value::Name(n) => format!("'{n}'"),
    }
}

fn provn_attributes(attrs: &[(String, Value)]) -> String {
    let parts: Vec<String> = attrs
        .iter()
        .map(|(k, v)| format!("{k}={}", provn_value(v)))
        .collect();
    format!("[{}]", parts.join(", "))
}

/// The document as PROV-N text.
pub fn to_provn(doc: &Document) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "document");
    let _ = writeln!(out, "  prefix {PREFIX} <{NAMESPACE}>");
    let _ = writeln!(out);
    let _ = writeln!(out, "  // the lineage of {}", doc.subject);
    for e in &doc.elements {
        let mut args = vec![e.id.clone()];
        if e.kind == ElementKind::Activity {
            args.push(e.start.clone().unwrap_or_else(|| "-".to_string()));
            args.push(e.end.clone().unwrap_or_else(|| "-".to_string()));
        }
        let attrs = if e.attributes.is_empty() {
            String::new()
        } else {
            format!(", {}", provn_attributes(&e.attributes))
        };
        let _ = writeln!(out, "  {}({}{attrs})", e.kind.keyword(), args.join(", "));
    }
    if !doc.relations.is_empty() {
        let _ = writeln!(out);
    }
    for r in &doc.relations {
        let args: Vec<String> = r
            .arguments
            .iter()
            .map(|a| a.clone().unwrap_or_else(|| "-".to_string()))
            .collect();
        let attrs = if r.attributes.is_empty() {
            String::new()
        } else {
            format!(", {}", provn_attributes(&r.attributes))
        };
        let _ = writeln!(
            out,
            "  {}({}; {}{attrs})",
            r.kind.keyword(),
            r.id,
            args.join(", ")
        );
    }
    let _ = writeln!(out, "endDocument");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn provn_strings_escape_what_the_grammar_forbids() {
        assert_eq!(provn_string("a\"b\\c\nd"), "\"a\\\"b\\\\c\\nd\"");
    }

    #[test]
    fn software_names_are_local_names() {
        assert_eq!(software_id("sluice 0.1.0"), "sluice:software_sluice_0.1.0");
    }
}
