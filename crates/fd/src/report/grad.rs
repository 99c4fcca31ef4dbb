//! The report of `plumb grad` (docs/json.md): the reference loss and gradient of a loaded network,
//! summarised per tensor, with the gradient tensors the command writes.

use std::path::PathBuf;

use ndarray::{Array2, ArrayD, ArrayView2};
use plumb_engine::Inputs;
use plumb_engine::graph::{Graph, GraphError, LayerScalar};
use plumb_formats::Tensor;
use plumb_report::{DataSource, Finding, SCHEMA_VERSION, Severity, Verdict, WeightsSource, figure};
use serde::{Deserialize, Serialize};
use thiserror::Error;

use super::GraphLoaded;
use crate::check::{CheckError, Precision};
use crate::graph_check::beyond_f32;

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
    /// The arithmetic the loss and gradient were computed in: "f64" (the reference), or "f32"
    /// (as an f32 implementation computes them; reports before it existed were all f64).
    #[serde(default = "f64_name")]
    pub precision: String,
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
/// An f32 batch kept in f32 ([`GraphLoaded::load_kept`]) gives the widened batch's values in
/// f64. In f32 the parameters and batch are rounded to f32 (refused past its range) and the
/// whole pass runs in f32; its results are widened exactly for the report and the files.
pub fn graph_gradient_report<X>(
    loaded: &GraphLoaded<X>,
    input_gradient: bool,
    precision: Precision,
) -> Result<Gradient, GradError>
where
    for<'a> &'a X: Into<Inputs<'a, f64>>,
{
    let desc = &loaded.desc;
    let graph = &desc.graph;
    let b = &loaded.batch;
    let x: Inputs<'_, f64> = (&b.x).into();
    let factor = graph.loss_config().l2_factor(x.nrows());
    let (loss, grads, input, l2_term) = match precision {
        Precision::F64 => {
            let (loss, grads, input) = pass(graph, &loaded.params, x, b.y.view(), input_gradient);
            (loss, grads, input, factor * squares(graph, &loaded.params))
        }
        Precision::F32 => {
            let held = match x {
                Inputs::Own(x) => Some(x),
                Inputs::F32(_) => None,
            };
            beyond_f32(graph, &loaded.params, held, b.y.view())
                .map_err(|e| super::graph_check::said_where(loaded, e))?;
            let p: Vec<ArrayD<f32>> = loaded.params.iter().map(|t| t.mapv(|v| v as f32)).collect();
            let (xs, ys) = (x.in_f32(), b.y.mapv(|v| v as f32));
            let (loss, grads, input) = pass(graph, &p, xs.view().into(), ys.view(), input_gradient);
            let wide: Vec<ArrayD<f64>> = grads.iter().map(|g| g.mapv(f64::from)).collect();
            // The L2 term as the f32 pass added it to the loss.
            let l2 = if factor != 0.0 {
                factor as f32 * graph.l2_sum(&p)
            } else {
                0.0
            };
            let input = input.map(|i| i.mapv(f64::from));
            (f64::from(loss), wide, input, f64::from(l2))
        }
    };
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
            precision,
        },
        (loss, loss - l2_term, l2_term),
        tensors,
        &layers,
    ))
}

/// Why a gradient cannot be computed: the layout's files do not fit, or a value is past the
/// range of the asked precision.
#[derive(Debug, Error)]
pub enum GradError {
    #[error(transparent)]
    Graph(#[from] GraphError),
    #[error(transparent)]
    Precision(#[from] CheckError),
}

/// The loss, parameter gradients and (when asked) input gradient of one pass in `S`; the input
/// gradient is formed only when it is written.
#[allow(clippy::type_complexity)]
fn pass<S: LayerScalar>(
    graph: &Graph,
    params: &[ArrayD<S>],
    x: Inputs<'_, S>,
    y: ArrayView2<S>,
    input_gradient: bool,
) -> (S, Vec<ArrayD<S>>, Option<Array2<S>>) {
    if input_gradient {
        let g = graph.gradient(params, x, y, None);
        (g.loss, g.params, Some(g.input))
    } else {
        let (loss, grads) = graph.parameter_gradient(params, x, y, None);
        (loss, grads, None)
    }
}

/// Σ w² over the tensors the L2 term decays, in f64.
fn squares(graph: &Graph, params: &[ArrayD<f64>]) -> f64 {
    params
        .iter()
        .enumerate()
        .filter(|(t, _)| graph.decays(*t))
        .map(|(_, p)| p.iter().map(|w| w * w).sum::<f64>())
        .sum()
}

fn f64_name() -> String {
    Precision::F64.name().into()
}

/// What a gradient was computed on.
struct Run<'a> {
    description: PathBuf,
    weights: &'a WeightsSource,
    data: &'a DataSource,
    samples: usize,
    precision: Precision,
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
        let overflow = match run.precision {
            Precision::F64 => "the network overflows",
            Precision::F32 => {
                "the network overflows f32 (largest value 3.4e38; leave out --precision f32 to compute in f64)"
            }
        };
        findings.push(
            Finding::new(
                "non-finite-loss",
                Severity::Error,
                format!(
                    "the loss is {loss}: the weights or data hold non-finite or huge values, or {overflow}; run `plumb shapes` and inspect the weight file"
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
            precision: run.precision.name().into(),
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
