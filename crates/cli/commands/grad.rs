//! `plumb grad NET [-w W] [-d D] [-o G] [--input-gradient]`: the reference loss and gradient, on
//! the dense engine for dense descriptions and on the layer graph for any other kind.

use std::path::{Path, PathBuf};

use anyhow::{Result, bail};
use plumb_engine::graph::Dense;
use plumb_fd::report::GraphLoaded;
use plumb_formats::{DType, FileFormat, GraphDescription, Tensor, disassemble, write_tensor_file};
use plumb_report::{Block, Case, Cell, Document, Finding, Severity, Table, Tone, Verdict};
use serde::Serialize;

use crate::args::{DTypeArg, GradArgs};
use crate::inputs::{
    AnyLoaded, DataSource, Loaded, WeightsSource, check_output, load_any, output_format,
};
use crate::output::{SCHEMA_VERSION, Settings, graph_network_id, network_id, num, shape};

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
    let layers: Vec<usize> = plumb_formats::expected_tensors(&loaded.desc, loaded.desc.layout)
        .iter()
        .map(|e| e.layer + 1)
        .collect();
    summarised(
        loaded.desc.path.clone(),
        &loaded.weights_source,
        &loaded.data_source,
        b.len(),
        (loss, data_loss, l2_term),
        tensors,
        &layers,
    )
}

/// The report of a loss (J, data term, L2 term) and gradient tensors (`layers[i]` is tensor i's
/// 1-based layer, 0 for the input), with a finding for what is not finite.
fn summarised(
    description: PathBuf,
    weights: &WeightsSource,
    data: &DataSource,
    samples: usize,
    (loss, data_loss, l2_term): (f64, f64, f64),
    tensors: Vec<Tensor>,
    layers: &[usize],
) -> Computed {
    let summaries: Vec<TensorGradient> = tensors
        .iter()
        .zip(layers)
        .map(|(t, &layer)| summarise(t, layer))
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
            description,
            weights: weights.clone(),
            data: data.clone(),
            samples,
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

/// The loss and gradient of a network of any kind on the layer graph, with the input gradient
/// when asked; gradients are summarised and written per file tensor, in the declared storage.
pub fn compute_graph(loaded: &GraphLoaded, input_gradient: bool) -> Result<Computed> {
    let desc = &loaded.desc;
    let graph = &desc.graph;
    let b = &loaded.batch;
    let g = graph.gradient(&loaded.params, b.x.view(), b.y.view(), None);
    let l2_term = graph.loss_config().l2_factor(b.len())
        * loaded
            .params
            .iter()
            .enumerate()
            .filter(|(t, _)| graph.decays(*t))
            .map(|(_, p)| p.iter().map(|w| w * w).sum::<f64>())
            .sum::<f64>();
    let mut tensors = desc.to_file(&g.params)?;
    let mut layers: Vec<usize> = desc.files.iter().map(|f| f.layer + 1).collect();
    if input_gradient {
        tensors.push(desc.input_tensor_in(g.input.view(), loaded.order));
        layers.push(0);
    }
    Ok(summarised(
        loaded.desc.path.clone(),
        &loaded.weights_source,
        &loaded.data_source,
        b.len(),
        (g.loss, g.loss - l2_term, l2_term),
        tensors,
        &layers,
    ))
}

/// The input gradient of a dense network, from the same network as a graph (the dense engine
/// gives parameter gradients only).
fn dense_input_gradient(loaded: &Loaded, graph: &GraphDescription) -> Tensor {
    let params: Vec<_> = loaded
        .weights
        .layers()
        .iter()
        .flat_map(|m| {
            let (w, b) = Dense::split(m);
            [w.into_dyn(), b.into_dyn()]
        })
        .collect();
    let b = &loaded.batch;
    let g = graph.graph.gradient(&params, b.x.view(), b.y.view(), None);
    graph.input_tensor(g.input.view())
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
    let (mut computed, network, weights_source) = match load_any(inputs, settings.seed)? {
        AnyLoaded::Dense(loaded, graph) => {
            let mut computed = compute(&loaded);
            if args.input_gradient {
                let t = dense_input_gradient(&loaded, &graph);
                computed.report.tensors.push(summarise(&t, 0));
                computed.tensors.push(t);
            }
            let id = network_id(&loaded.desc);
            (computed, id, loaded.weights_source)
        }
        AnyLoaded::Graph(loaded) => {
            let computed = compute_graph(&loaded, args.input_gradient)?;
            let id = graph_network_id(&loaded.desc);
            (computed, id, loaded.weights_source)
        }
    };
    if let (Some(path), Some(format)) = (&args.output, out_format) {
        if format == FileFormat::Npy && computed.tensors.len() != 1 {
            bail!(
                "{}: a .npy file holds one tensor, but this gradient has {}; use .npz or .safetensors",
                path.display(),
                computed.tensors.len()
            );
        }
        let dtype = match args.dtype {
            Some(DTypeArg::F32) => DType::F32,
            Some(DTypeArg::F64) => DType::F64,
            None => crate::inputs::gradient_dtype(&weights_source),
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
    doc.network = Some(network);
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
    // The parameters' gradient: the input's (layer 0), when given, is not part of it.
    let total = r
        .tensors
        .iter()
        .filter(|s| s.layer > 0)
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
