//! `plumb shapes NET [--weights W]`: the dimension audit.

use std::path::{Path, PathBuf};

use anyhow::Result;
use plumb_audit::{ShapeAudit, Status, audit_shapes};
use plumb_formats::{Description, TensorFile, read_tensors};
use plumb_report::{Block, Case, Cell, Document, Table, Tone, Verdict};
use serde::Serialize;

use crate::args::ShapesArgs;
use crate::output::{SCHEMA_VERSION, Settings, network_id, shape};

/// The JSON report of `plumb shapes` (docs/json.md).
#[derive(Serialize)]
pub struct ShapesReport<'a> {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: &'a Path,
    pub weights: Option<&'a Path>,
    #[serde(flatten)]
    pub audit: &'a ShapeAudit,
}

pub fn run(args: &ShapesArgs, settings: &Settings) -> Result<Verdict> {
    let desc = Description::read(&args.net)?;
    let file = args.weights.as_deref().map(read_tensors).transpose()?;
    let audit = audit_shapes(&desc, file.as_ref());
    let report = ShapesReport {
        verdict: audit.verdict,
        schema_version: SCHEMA_VERSION,
        command: "shapes",
        description: &args.net,
        weights: args.weights.as_deref(),
        audit: &audit,
    };
    let doc = document(
        &desc,
        &args.net,
        args.weights.as_ref().zip(file.as_ref()),
        &audit,
    );
    let mut doc = doc;
    doc.command = "shapes".into();
    doc.network = Some(network_id(&desc));
    if file.is_some() {
        doc.cases = cases(&audit);
    }
    settings.emit(&report, doc)
}

/// One case per tensor the layout expects, and per stray tensor.
pub fn cases(audit: &ShapeAudit) -> Vec<Case> {
    let failing = |name: &str| {
        audit
            .findings
            .iter()
            .find(|f| {
                f.severity == plumb_report::Severity::Error && f.tensor.as_deref() == Some(name)
            })
            .or_else(|| audit.findings.iter().find(|f| f.code == "other-layout"))
    };
    let mut out = Vec::new();
    for l in &audit.layers {
        for t in &l.tensors {
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
    }
    for s in &audit.unexpected {
        out.push(
            Case::new(format!("shape {}", s.name), false)
                .about(&s.name)
                .failing("tensor-unexpected", "no layer uses this tensor"),
        );
    }
    out
}

/// The human form of the audit.
pub fn document(
    desc: &Description,
    net: &Path,
    weights: Option<(&PathBuf, &TensorFile)>,
    audit: &ShapeAudit,
) -> Document {
    let mut doc = Document::new("plumb shapes — dimension audit");
    let sizes: Vec<String> = std::iter::once(desc.inputs())
        .chain(desc.network.layers().iter().map(|l| l.units))
        .map(|n| n.to_string())
        .collect();
    let mut facts = vec![
        ("description".to_string(), net.display().to_string()),
        ("network".to_string(), sizes.join(" → ")),
        ("layout".to_string(), desc.layout.to_string()),
    ];
    match weights {
        Some((p, f)) => facts.push((
            "weights".to_string(),
            format!(
                "{} ({}, {} tensor{})",
                p.display(),
                f.format.name(),
                f.tensors.len(),
                if f.tensors.len() == 1 { "" } else { "s" }
            ),
        )),
        None => facts.push((
            "weights".to_string(),
            "none given: expected shapes only".to_string(),
        )),
    }
    if let Some(l) = audit.detected_layout {
        facts.push(("file's layout".to_string(), l.to_string()));
    }
    doc.push(Block::Facts(facts));

    let mut t = Table::new([
        "layer",
        "in → out",
        "activation",
        "tensor",
        "expected",
        "found",
        "dtype",
        "parameters",
        "verdict",
    ]);
    for layer in &audit.layers {
        for (i, ts) in layer.tensors.iter().enumerate() {
            let first = i == 0;
            let (found, tone) = match ts.status {
                Status::Unchecked => ("—".to_string(), Tone::Dim),
                Status::Missing => ("missing".to_string(), Tone::Bad),
                Status::Ok => (shape(ts.found.as_deref().unwrap_or_default()), Tone::Good),
                Status::WrongShape | Status::NotFloat => {
                    (shape(ts.found.as_deref().unwrap_or_default()), Tone::Bad)
                }
            };
            let dtype_tone = if ts.status == Status::NotFloat {
                Tone::Bad
            } else {
                Tone::Plain
            };
            let verdict_tone = match layer.verdict {
                "pass" => Tone::Good,
                "fail" => Tone::Bad,
                _ => Tone::Dim,
            };
            t.push([
                Cell::from(if first {
                    layer.layer.to_string()
                } else {
                    String::new()
                }),
                Cell::from(if first {
                    format!("{} → {}", layer.inputs, layer.units)
                } else {
                    String::new()
                }),
                Cell::from(if first {
                    layer.activation.clone()
                } else {
                    String::new()
                }),
                Cell::from(ts.name.clone()),
                Cell::from(shape(&ts.expected)),
                Cell::new(found, tone),
                Cell::new(ts.dtype.unwrap_or("—"), dtype_tone),
                Cell::from(if first {
                    layer.parameters.to_string()
                } else {
                    String::new()
                }),
                if first {
                    Cell::new(layer.verdict, verdict_tone)
                } else {
                    Cell::from("")
                },
            ]);
        }
    }
    for s in &audit.unexpected {
        t.push([
            Cell::from("—"),
            Cell::from(""),
            Cell::from(""),
            Cell::new(s.name.clone(), Tone::Warn),
            Cell::from("—"),
            Cell::new(shape(&s.shape), Tone::Warn),
            Cell::from(s.dtype),
            Cell::from(""),
            Cell::new("unused", Tone::Warn),
        ]);
    }
    t.footer([
        Cell::from("total"),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        "".into(),
        Cell::from(audit.total_parameters.to_string()),
        "".into(),
    ]);
    doc.push(Block::Table(t));
    if weights.is_some() {
        doc.push(Block::Findings(audit.findings.clone()));
    }
    let errors = audit
        .findings
        .iter()
        .filter(|f| f.severity == plumb_report::Severity::Error)
        .count();
    let summary = match (weights.is_some(), errors) {
        (false, _) => format!(
            "{} parameters expected; give --weights to audit a file",
            audit.total_parameters
        ),
        (true, 0) => "every tensor has the shape the description implies".to_string(),
        (true, n) => format!("{n} shape error{}", if n == 1 { "" } else { "s" }),
    };
    doc.push(Block::Verdict(audit.verdict, summary));
    if weights.is_some() && audit.verdict == Verdict::Pass {
        doc.push(Block::Caution(
            "A passing dimension audit says the file fits the description. It says nothing about \
             whether the model is accurate, robust or safe to deploy."
                .into(),
        ));
    }
    doc
}
