//! `plumb grad NET [-w W] [-d D] [-o G]`: the reference loss and gradient.

use std::path::{Path, PathBuf};

use anyhow::{Result, bail};
use plumb_formats::{DType, FileFormat, Tensor, disassemble, write_tensor_file};
use plumb_report::{Block, Case, Cell, Document, Finding, Severity, Table, Tone, Verdict};
use serde::Serialize;

use crate::args::{DTypeArg, GradArgs};
use crate::inputs::{DataSource, Loaded, WeightsSource, check_output, load, output_format};
use crate::output::{SCHEMA_VERSION, Settings, network_id, num, shape};

/// Per-tensor summary of the gradient.
#[derive(Clone, Debug, Serialize)]
pub struct TensorGradient {
    pub name: String,
    /// 1-based layer.
    pub layer: usize,
    pub shape: Vec<usize>,
    /// Euclidean norm of the tensor's gradient.
    pub norm: f64,
    /// Largest |∂J/∂θ| in the tensor, and where (its index in the tensor's own shape).
    pub max_abs: f64,
    pub max_at: Vec<usize>,
}

/// The JSON report of `plumb grad` (docs/json.md).
#[derive(Serialize)]
pub struct GradReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: PathBuf,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub samples: usize,
    /// J = data term + L2 term.
    pub loss: f64,
    pub data_loss: f64,
    pub l2_term: f64,
    pub tensors: Vec<TensorGradient>,
    pub output: Option<PathBuf>,
    pub findings: Vec<Finding>,
}

pub struct Computed {
    pub report: GradReport,
    pub tensors: Vec<Tensor>,
}

/// Computes the loss and gradient and summarises them (shared with the demo).
pub fn compute(loaded: &Loaded) -> Computed {
    let net = &loaded.desc.network;
    let b = &loaded.batch;
    let trace = net.forward(&loaded.weights, b.x.view());
    let data_loss = net.data_loss(&trace, b.y.view());
    let l2_term = net.l2_penalty(&loaded.weights, b.len());
    let grad = net.backward(&loaded.weights, &trace, b.y.view());
    let loss = data_loss + l2_term;
    let tensors = disassemble(&loaded.desc, &grad);
    let layers = plumb_formats::expected_tensors(&loaded.desc, loaded.desc.layout);
    let summaries: Vec<TensorGradient> = tensors
        .iter()
        .zip(&layers)
        .map(|(t, e)| summarise(t, e.layer + 1))
        .collect();
    let mut findings = Vec::new();
    if !loss.is_finite() {
        findings.push(
            Finding::new(
                "non-finite-loss",
                Severity::Error,
                format!(
                    "the loss is {loss}: the weights or data hold non-finite or huge values, or the network overflows; run `plumb shapes` and inspect the weight file"
                ),
            )
            .figure("loss", loss.to_string()),
        );
    }
    for s in &summaries {
        if !s.norm.is_finite() {
            findings.push(
                Finding::new(
                    "non-finite-gradient",
                    Severity::Error,
                    "the gradient holds NaN or infinite entries".to_string(),
                )
                .tensor(&s.name)
                .layer(s.layer),
            );
        }
    }
    let verdict = Verdict::of(&findings);
    Computed {
        report: GradReport {
            verdict,
            schema_version: SCHEMA_VERSION,
            command: "grad",
            description: loaded.desc.path.clone(),
            weights: loaded.weights_source.clone(),
            data: loaded.data_source.clone(),
            samples: b.len(),
            loss,
            data_loss,
            l2_term,
            tensors: summaries,
            output: None,
            findings,
        },
        tensors,
    }
}

fn summarise(t: &Tensor, layer: usize) -> TensorGradient {
    let norm = t.data.iter().map(|v| v * v).sum::<f64>().sqrt();
    let (k, max_abs) = t
        .data
        .iter()
        .enumerate()
        .fold((0, 0.0f64), |(bk, bv), (k, v)| {
            if v.abs() > bv || v.is_nan() {
                (k, v.abs())
            } else {
                (bk, bv)
            }
        });
    let mut max_at = vec![0; t.shape.len()];
    let mut rest = k;
    for (i, &d) in t.shape.iter().enumerate().rev() {
        max_at[i] = rest % d.max(1);
        rest /= d.max(1);
    }
    TensorGradient {
        name: t.name.clone(),
        layer,
        shape: t.shape.clone(),
        norm,
        max_abs,
        max_at,
    }
}

pub fn run(args: &GradArgs, settings: &Settings) -> Result<Verdict> {
    let inputs = &args.inputs;
    // Check the output before the work, so a refused path costs nothing.
    let out_format = match &args.output {
        Some(path) => {
            let mut ins: Vec<&Path> = vec![&inputs.net];
            ins.extend(inputs.weights.as_deref());
            ins.extend(inputs.data.as_deref());
            check_output(path, settings.force, &ins)?;
            Some(output_format(path)?)
        }
        None => None,
    };
    let loaded = load(inputs, settings.seed)?;
    let mut computed = compute(&loaded);
    if let (Some(path), Some(format)) = (&args.output, out_format) {
        if format == FileFormat::Npy && computed.tensors.len() != 1 {
            bail!(
                "{}: a .npy file holds one tensor, but layout `{}` has {}; use .npz or .safetensors",
                path.display(),
                loaded.desc.layout,
                computed.tensors.len()
            );
        }
        let dtype = match args.dtype {
            Some(DTypeArg::F32) => DType::F32,
            Some(DTypeArg::F64) => DType::F64,
            None => crate::inputs::gradient_dtype(&loaded.weights_source),
        };
        write_tensor_file(path, format, &computed.tensors, dtype, settings.existing())?;
        computed.report.output = Some(path.clone());
        settings.note(&format!(
            "wrote the gradient ({} tensors, {}) to {}",
            computed.tensors.len(),
            dtype.name(),
            path.display()
        ));
    }
    let mut doc = document(&computed.report);
    doc.command = "grad".into();
    doc.network = Some(network_id(&loaded.desc));
    doc.cases = computed
        .report
        .tensors
        .iter()
        .map(|t| {
            let c = Case::new(format!("gradient {}", t.name), t.norm.is_finite())
                .about(&t.name)
                .figure("norm", t.norm);
            if t.norm.is_finite() {
                c
            } else {
                c.failing(
                    "non-finite-gradient",
                    "the gradient holds NaN or infinite entries",
                )
            }
        })
        .collect();
    settings.emit(&computed.report, doc)
}

/// The human form of the report.
pub fn document(r: &GradReport) -> Document {
    let mut doc = Document::new("plumb grad — reference loss and gradient");
    let weights = match &r.weights {
        WeightsSource::File {
            path,
            format,
            dtype,
        } => format!("{} ({format}, {dtype})", path.display()),
        w => w.describe(),
    };
    let mut facts = vec![
        (
            "description".to_string(),
            r.description.display().to_string(),
        ),
        ("weights".to_string(), weights),
        ("data".to_string(), r.data.describe()),
        ("loss J".to_string(), format!("{:.12}", r.loss)),
        ("  data term".to_string(), format!("{:.12}", r.data_loss)),
        ("  L2 term".to_string(), format!("{:.12}", r.l2_term)),
    ];
    if let Some(o) = &r.output {
        facts.push(("written to".to_string(), o.display().to_string()));
    }
    doc.push(Block::Facts(facts));
    let mut t = Table::new(["layer", "tensor", "shape", "‖g‖₂", "max |g|", "at"]);
    for s in &r.tensors {
        let tone = if s.norm.is_finite() {
            Tone::Plain
        } else {
            Tone::Bad
        };
        t.push([
            Cell::from(s.layer.to_string()),
            Cell::from(s.name.clone()),
            Cell::from(shape(&s.shape)),
            Cell::new(num(s.norm), tone),
            Cell::new(num(s.max_abs), tone),
            Cell::from(format!(
                "({})",
                s.max_at
                    .iter()
                    .map(usize::to_string)
                    .collect::<Vec<_>>()
                    .join(", ")
            )),
        ]);
    }
    let total = r
        .tensors
        .iter()
        .map(|s| s.norm * s.norm)
        .sum::<f64>()
        .sqrt();
    t.footer([
        Cell::from("all"),
        "".into(),
        "".into(),
        Cell::from(num(total)),
        "".into(),
        "".into(),
    ]);
    doc.push(Block::Table(t));
    if !r.findings.is_empty() {
        doc.push(Block::Findings(r.findings.clone()));
    }
    let summary = if r.verdict == Verdict::Pass {
        "loss and gradient are finite".to_string()
    } else {
        "the loss or gradient is not finite".to_string()
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}
