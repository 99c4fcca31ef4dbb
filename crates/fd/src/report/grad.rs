//! The report of `plumb grad` (docs/json.md): the reference loss and gradient of a loaded network,
//! summarised per tensor, with the gradient tensors the command writes.

use std::path::PathBuf;

use plumb_engine::Inputs;
use plumb_engine::graph::GraphError;
use plumb_formats::Tensor;
use plumb_report::{DataSource, Finding, SCHEMA_VERSION, Severity, Verdict, WeightsSource, figure};
use serde::{Deserialize, Serialize};

use super::GraphLoaded;

/// Per-tensor summary of the gradient.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct TensorGradient {
    pub name: String,
    /// 1-based layer; 0 for the input gradient.
    pub layer: usize,
    pub shape: Vec<usize>,
    /// Euclidean norm of the tensor's gradient.
    #[serde(deserialize_with = "figure")]
    pub norm: f64,
    /// Largest |∂J/∂θ| in the tensor, and where (its index in the tensor's own shape).
    #[serde(deserialize_with = "figure")]
    pub max_abs: f64,
    pub max_at: Vec<usize>,
}

impl TensorGradient {
    /// The summary of gradient tensor `t` of 1-based layer `layer`.
    pub fn of(t: &Tensor, layer: usize) -> TensorGradient {
        let norm = t.data.iter().map(|v| v * v).sum::<f64>().sqrt();
        // A NaN wins, so that the entry shown is the one that broke the gradient.
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
}

/// The JSON report of `plumb grad` (docs/json.md).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct GradReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: String,
    pub description: PathBuf,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub samples: usize,
    /// J = data term + L2 term.
    #[serde(deserialize_with = "figure")]
    pub loss: f64,
    #[serde(deserialize_with = "figure")]
    pub data_loss: f64,
    #[serde(deserialize_with = "figure")]
    pub l2_term: f64,
    pub tensors: Vec<TensorGradient>,
    /// The gradient file written, if any (the command sets it once written).
    pub output: Option<PathBuf>,
    pub findings: Vec<Finding>,
}

/// A gradient's report and its tensors, in the file's names, shapes and storage.
pub struct Gradient {
    pub report: GradReport,
    pub tensors: Vec<Tensor>,
}

impl Gradient {
    /// Adds the input gradient (layer 0: summarised, written, not part of the parameters' norm).
    pub fn push_input(&mut self, t: Tensor) {
        self.report.tensors.push(TensorGradient::of(&t, 0));
        self.tensors.push(t);
    }
}

/// The loss and gradient of a network of any kind on the layer graph, with the input gradient
/// when asked; gradients are summarised and given per file tensor, in the declared storage.
/// An f32 batch kept in f32 ([`GraphLoaded::load_kept`]) gives the widened batch's values.
pub fn graph_gradient_report<X>(
    loaded: &GraphLoaded<X>,
    input_gradient: bool,
) -> Result<Gradient, GraphError>
where
    for<'a> &'a X: Into<Inputs<'a, f64>>,
{
    let desc = &loaded.desc;
    let graph = &desc.graph;
    let b = &loaded.batch;
    let x: Inputs<'_, f64> = (&b.x).into();
    // The input gradient is formed only when it is written.
    let (loss, grads, input) = if input_gradient {
        let g = graph.gradient(&loaded.params, x, b.y.view(), None);
        (g.loss, g.params, Some(g.input))
    } else {
        let (loss, grads) = graph.parameter_gradient(&loaded.params, x, b.y.view(), None);
        (loss, grads, None)
    };
    let l2_term = graph.loss_config().l2_factor(x.nrows())
        * loaded
            .params
            .iter()
            .enumerate()
            .filter(|(t, _)| graph.decays(*t))
            .map(|(_, p)| p.iter().map(|w| w * w).sum::<f64>())
            .sum::<f64>();
    let mut tensors = desc.to_file(&grads)?;
    let mut layers: Vec<usize> = desc.files.iter().map(|f| f.layer + 1).collect();
    if let Some(input) = input {
        tensors.push(desc.input_tensor_in(input.view(), loaded.order));
        layers.push(0);
    }
    Ok(summarised(
        Run {
            description: desc.path.clone(),
            weights: &loaded.weights_source,
            data: &loaded.data_source,
            samples: x.nrows(),
        },
        (loss, loss - l2_term, l2_term),
        tensors,
        &layers,
    ))
}

/// What a gradient was computed on.
struct Run<'a> {
    description: PathBuf,
    weights: &'a WeightsSource,
    data: &'a DataSource,
    samples: usize,
}

/// The report of a loss (J, data term, L2 term) and gradient tensors (`layers[i]` is tensor i's
/// 1-based layer, 0 for the input), with a finding for what is not finite.
fn summarised(
    run: Run<'_>,
    (loss, data_loss, l2_term): (f64, f64, f64),
    tensors: Vec<Tensor>,
    layers: &[usize],
) -> Gradient {
    let summaries: Vec<TensorGradient> = tensors
        .iter()
        .zip(layers)
        .map(|(t, &layer)| TensorGradient::of(t, layer))
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
    Gradient {
        report: GradReport {
            verdict: Verdict::of(&findings),
            schema_version: SCHEMA_VERSION,
            command: "grad".into(),
            description: run.description,
            weights: run.weights.clone(),
            data: run.data.clone(),
            samples: run.samples,
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
