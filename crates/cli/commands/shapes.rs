//! `plumb shapes NET [--weights W]`: the dimension audit of a description of any kind.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use plumb_audit::{
    GraphShapeAudit, LayerShapes, STRAY_LISTED, Status, StrayTensor, TensorShape,
    audit_graph_shapes,
};
use plumb_formats::{GraphDescription, TensorFile};
use plumb_report::{Block, Case, Cell, Document, Finding, Table, Tone, Verdict};
use serde::Serialize;

use crate::args::ShapesArgs;
use crate::output::{SCHEMA_VERSION, Settings, network_id, shape};

/// The JSON report of `plumb shapes` (docs/json.md).
#[derive(Serialize)]
pub struct ShapesReport<'a, A: Serialize = GraphShapeAudit> {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: &'a Path,
    pub weights: Option<&'a Path>,
    #[serde(flatten)]
    pub audit: &'a A,
}

pub fn run(args: &ShapesArgs, settings: &Settings) -> Result<Verdict> {
    let desc = &GraphDescription::read(&args.net)?;
    // A tensor no layer can name is listed from its header: the audit needs its shape only.
    let file = args
        .weights
        .as_deref()
        .map(|w| desc.read_weights(w))
        .transpose()?;
    let audit = audit_graph_shapes(desc, file.as_ref());
    let report = ShapesReport {
        verdict: audit.verdict,
        schema_version: SCHEMA_VERSION,
        command: "shapes",
        description: &args.net,
        weights: args.weights.as_deref(),
        audit: &audit,
    };
    let weights = args.weights.as_ref().zip(file.as_ref());
    let mut doc = graph_document(desc, &args.net, weights, &audit);
    doc.command = "shapes".into();
    doc.network = Some(network_id(desc));
    if file.is_some() {
        let tensors = audit.layers.iter().flat_map(|l| &l.tensors);
        doc.cases = tensor_cases(tensors, &audit.unexpected, &audit.findings);
    }
    settings.emit(&report, doc)
}

/// One case per expected tensor and per stray tensor, failed by the tensor's error finding.
pub fn tensor_cases<'a>(
    tensors: impl Iterator<Item = &'a TensorShape>,
    unexpected: &[StrayTensor],
    findings: &[Finding],
) -> Vec<Case> {
    let failing = |name: &str| {
        findings
            .iter()
            .find(|f| {
                f.severity == plumb_report::Severity::Error && f.tensor.as_deref() == Some(name)
            })
            .or_else(|| findings.iter().find(|f| f.code == "other-layout"))
    };
    let mut out = Vec::new();
    for t in tensors {
        let mut c = Case::new(format!("shape {}", t.name), t.status == Status::Ok)
            .about(&t.name)
            .figure("parameters", t.expected.iter().product::<usize>() as f64);
        if t.status != Status::Ok {
            let (code, message) = failing(&t.name).map_or(
                ("wrong-shape".to_string(), format!("{:?}", t.status)),
                |f| (f.code.clone(), f.message.clone()),
            );
            c = c.failing(&code, message);
        }
        out.push(c);
    }
    for s in unexpected.iter().take(STRAY_LISTED) {
        out.push(
            Case::new(format!("shape {}", s.name), false)
                .about(&s.name)
                .failing("tensor-unexpected", "no layer uses this tensor"),
        );
    }
    out
}

/// The facts line naming the weight file, or that none was given.
fn weights_fact(weights: Option<(&PathBuf, &TensorFile)>) -> (String, String) {
    match weights {
        Some((p, f)) => (
            "weights".to_string(),
            format!(
                "{} ({}, {} tensor{})",
                p.display(),
                f.format.name(),
                f.count(),
                if f.count() == 1 { "" } else { "s" }
            ),
        ),
        None => (
            "weights".to_string(),
            "none given: expected shapes only".to_string(),
        ),
    }
}

/// The found-shape cell of a tensor and its tone.
fn found_cell(ts: &TensorShape) -> Cell {
    let (found, tone) = match ts.status {
        Status::Unchecked => ("—".to_string(), Tone::Dim),
        Status::Missing => ("missing".to_string(), Tone::Bad),
        Status::Ok => (shape(ts.found.as_deref().unwrap_or_default()), Tone::Good),
        Status::WrongShape | Status::NotFloat => {
            (shape(ts.found.as_deref().unwrap_or_default()), Tone::Bad)
        }
    };
    Cell::new(found, tone)
}

fn verdict_cell(verdict: &'static str) -> Cell {
    let tone = match verdict {
        "pass" => Tone::Good,
        "fail" => Tone::Bad,
        _ => Tone::Dim,
    };
    Cell::new(verdict, tone)
}

/// The findings, verdict line and caution every shapes document ends with.
fn closing(
    doc: &mut Document,
    weights: bool,
    findings: &[Finding],
    verdict: Verdict,
    total: usize,
) {
    if weights {
        doc.push(Block::Findings(findings.to_vec()));
    }
    let errors = findings
        .iter()
        .filter(|f| f.severity == plumb_report::Severity::Error)
        .count();
    let summary = match (weights, errors) {
        (false, _) => format!("{total} parameters expected; give --weights to audit a file"),
        (true, 0) => "every tensor has the shape the description implies".to_string(),
        (true, n) => format!("{n} shape error{}", if n == 1 { "" } else { "s" }),
    };
    doc.push(Block::Verdict(verdict, summary));
    if weights && verdict == Verdict::Pass {
        doc.push(Block::Caution(
            "A passing dimension audit says the file fits the description. It says nothing about \
             whether the model is accurate, robust or safe to deploy."
                .into(),
        ));
    }
}

/// The one table of a dimension audit, dense or of any kind: per layer what it is and one
/// sample's sizes in and out, per tensor its expected and found shapes; the storage column when
/// the description declares storage orders (`storage`: tensor name → order).
fn layers_table(
    layers: &[LayerShapes],
    unexpected: &[StrayTensor],
    total: usize,
    storage: Option<&HashMap<&str, &str>>,
) -> Table {
    let with_storage = storage.is_some();
    let row = |cells: [Cell; 10]| -> Vec<Cell> {
        cells
            .into_iter()
            .enumerate()
            .filter(|(i, _)| with_storage || *i != 4)
            .map(|(_, c)| c)
            .collect()
    };
    let headers = [
        "layer",
        "kind",
        "in → out",
        "tensor",
        "storage",
        "expected",
        "found",
        "dtype",
        "parameters",
        "verdict",
    ];
    let mut t = Table::new(
        headers
            .into_iter()
            .enumerate()
            .filter(|(i, _)| with_storage || *i != 4)
            .map(|(_, h)| h),
    );
    for layer in layers {
        let label = match layer.terms.name() {
            Some(name) => format!("{} {name}", layer.layer),
            None => layer.layer.to_string(),
        };
        let head = [
            Cell::from(label),
            Cell::from(layer.terms.kind()),
            Cell::from(layer.terms.in_out()),
        ];
        if layer.tensors.is_empty() {
            let [a, b, c] = head;
            t.push(row([
                a,
                b,
                c,
                Cell::from("—"),
                "".into(),
                "".into(),
                "".into(),
                "".into(),
                Cell::from("0"),
                verdict_cell(layer.verdict),
            ]));
            continue;
        }
        for (i, ts) in layer.tensors.iter().enumerate() {
            let first = i == 0;
            let [a, b, c] = if first {
                head.clone()
            } else {
                [Cell::from(""), Cell::from(""), Cell::from("")]
            };
            let dtype_tone = if ts.status == Status::NotFloat {
                Tone::Bad
            } else {
                Tone::Plain
            };
            let order = storage.and_then(|s| s.get(ts.name.as_str()).copied());
            t.push(row([
                a,
                b,
                c,
                Cell::from(ts.name.clone()),
                Cell::from(order.unwrap_or("")),
                Cell::from(shape(&ts.expected)),
                found_cell(ts),
                Cell::new(ts.dtype.unwrap_or("—"), dtype_tone),
                Cell::from(if first {
                    layer.parameters.to_string()
                } else {
                    String::new()
                }),
                if first {
                    verdict_cell(layer.verdict)
                } else {
                    Cell::from("")
                },
            ]));
        }
    }
    for s in unexpected.iter().take(STRAY_LISTED) {
        t.push(row([
            Cell::from("—"),
            Cell::from(""),
            Cell::from(""),
            Cell::new(s.name.clone(), Tone::Warn),
            Cell::from(""),
            Cell::from("—"),
            Cell::new(shape(&s.shape), Tone::Warn),
            Cell::from(s.dtype),
            Cell::from(""),
            Cell::new("unused", Tone::Warn),
        ]));
    }
    t.footer(row([
        Cell::from("total"),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        Cell::from(total.to_string()),
        "".into(),
    ]));
    t
}

/// The human form of the graph audit: per layer its kind and one sample's shapes in and out,
/// per file tensor its declared storage, expected and found shapes.
pub fn graph_document(
    desc: &GraphDescription,
    net: &Path,
    weights: Option<(&PathBuf, &TensorFile)>,
    audit: &GraphShapeAudit,
) -> Document {
    let mut doc = Document::new("plumb shapes — dimension audit");
    let dense = desc.is_dense();
    let mut facts = vec![("description".to_string(), net.display().to_string())];
    if dense {
        // A dense network reads as its sizes, and its weight file as a layout.
        let sizes: Vec<String> = std::iter::once(desc.graph.input().size())
            .chain(desc.graph.nodes().iter().map(|n| n.layer.output().size()))
            .map(|n| n.to_string())
            .collect();
        facts.push(("network".to_string(), sizes.join(" → ")));
        facts.push(("layout".to_string(), desc.layout.to_string()));
    } else {
        facts.push((
            "network".to_string(),
            format!(
                "{} → {} ({} layers)",
                desc.graph.input(),
                desc.graph.output(),
                audit.layers.len()
            ),
        ));
    }
    facts.push(weights_fact(weights));
    if let Some(l) = audit.detected_layout {
        facts.push(("file's layout".to_string(), l.to_string()));
    }
    doc.push(Block::Facts(facts));
    let storage: HashMap<&str, &str> = desc
        .files
        .iter()
        .map(|f| (f.name.as_str(), f.storage.letters()))
        .collect();
    let t = layers_table(
        &audit.layers,
        &audit.unexpected,
        audit.total_parameters,
        (!dense).then_some(&storage),
    );
    doc.push(Block::Table(t));
    closing(
        &mut doc,
        weights.is_some(),
        &audit.findings,
        audit.verdict,
        audit.total_parameters,
    );
    doc
}
