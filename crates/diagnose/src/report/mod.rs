//! The report of `plumb compare` (docs/json.md), and the parts `probe` shares: an outside gradient
//! judged tensor by tensor against the reference, each wrong tensor's diagnosis, the outside loss
//! against the reference loss, and the findings with their verdict rules.

use std::path::PathBuf;

use plumb_engine::Reduction;
use plumb_fd::CheckError;
use plumb_formats::{DType, Tensor, TensorFile};
use plumb_report::{DataSource, Finding, Severity, Verdict, WeightsSource, figure, number as num};
use serde::{Deserialize, Serialize};

mod graph;

pub use graph::{
    certify_graph, compare_graph_report, graph_input_shape, judge_graph_gradient, judge_graph_loss,
    read_gradient,
};

use crate::{Binding, Expected, NameError, TensorJudgement, holds_only_f32};

/// Why a comparison could not be made.
#[derive(Debug, thiserror::Error)]
pub enum CompareError {
    /// The complex-step certification of the reference could not run.
    #[error(transparent)]
    Check(#[from] CheckError),
    /// The gradient file's names cannot be bound to the parameters (the file is named).
    #[error("{}: {error}", path.display())]
    Names { path: PathBuf, error: NameError },
    /// The gradient file does not fit the network (the file is named).
    #[error("{}: {message}", path.display())]
    Input { path: PathBuf, message: String },
    /// The gradient file cannot be read (its error names it).
    #[error(transparent)]
    File(#[from] plumb_formats::TensorFileError),
}

fn shape(s: &[usize]) -> String {
    plumb_formats::shape_text(s)
}

/// The diagnosis of one tensor, for JSON.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct DiagnosisReport {
    pub code: String,
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub detail: String,
    pub residual: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub factor: Option<f64>,
    /// For `unexplained`: the 1-based layer whose backward step first goes wrong.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub first_wrong_layer: Option<usize>,
    /// Other codes that reproduce the tensor as well: the gradient cannot tell them from `code`
    /// (e.g. `state-gradient-dropped` beside `time-truncated` when only the last state is read).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub alike: Vec<String>,
}

/// Which tensor of the gradient file went to which parameter, and how the names were matched.
#[derive(Clone, Debug, Serialize)]
pub struct NameReport {
    pub file: String,
    pub parameter: String,
    /// "exact", "habit" or "map".
    pub matched: &'static str,
    /// For a habit: the prefix and suffix around the parameter's name, as `d…` or `….grad`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub habit: Option<String>,
}

impl NameReport {
    fn of(b: &Binding) -> NameReport {
        use crate::Matched;
        let (matched, habit) = match b.matched {
            Matched::Exact => ("exact", None),
            Matched::Habit(p, s) => ("habit", Some(format!("{p}…{s}"))),
            Matched::Map => ("map", None),
        };
        NameReport {
            file: b.file.clone(),
            parameter: b.parameter.clone(),
            matched,
            habit,
        }
    }
}

/// Where a tensor is worst: its index in the tensor as reported, and the place in the layer's
/// own terms.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Worst {
    /// The place in the layer's own terms (`Kind::locate`: unit and input, channel and kernel
    /// position, gate, head; the graph tensor's name first when the file tensor holds two).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub at: Option<String>,
    pub index: Vec<usize>,
    #[serde(deserialize_with = "figure")]
    pub outside: f64,
    #[serde(deserialize_with = "figure")]
    pub reference: f64,
    #[serde(deserialize_with = "figure")]
    pub rel_error: f64,
}

impl Worst {
    /// `W1[2, 0] (layer1.bias: unit 2)`: the entry of `tensor`, and the layer's words for it.
    pub fn label(&self, tensor: &str) -> String {
        let idx: Vec<String> = self.index.iter().map(usize::to_string).collect();
        match &self.at {
            Some(at) => format!("{tensor}[{}] ({at})", idx.join(", ")),
            None => format!("{tensor}[{}]", idx.join(", ")),
        }
    }
}

/// One tensor of the report.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct TensorReport {
    pub name: String,
    /// The 1-based layer the tensor belongs to (none for the input gradient).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub layer: Option<usize>,
    pub verdict: Verdict,
    pub expected_shape: Vec<usize>,
    pub found_shape: Option<Vec<usize>>,
    pub max_rel_error: Option<f64>,
    pub median_rel_error: Option<f64>,
    pub cosine: Option<f64>,
    pub scale: Option<f64>,
    pub worst: Option<Worst>,
    pub diagnosis: Option<DiagnosisReport>,
    /// Every entry's relative error (for the HTML plot; not in JSON).
    #[serde(skip)]
    pub rel_errors: Vec<f64>,
}

/// The complex-step certification of the reference.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Certification {
    pub method: String,
    pub checked: usize,
    pub parameters: usize,
    #[serde(deserialize_with = "figure")]
    pub max_rel_error: f64,
    pub certified: bool,
}

/// The user's loss against the reference loss.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LossReport {
    #[serde(deserialize_with = "figure")]
    pub outside: f64,
    #[serde(deserialize_with = "figure")]
    pub reference: f64,
    #[serde(deserialize_with = "figure")]
    pub rel_error: f64,
    pub matches: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub explanation: Option<String>,
}

/// The JSON report of `plumb compare` (docs/json.md).
#[derive(Serialize)]
pub struct CompareReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: PathBuf,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub gradient: PathBuf,
    pub precision: &'static str,
    /// "dtype": the precision is the file's dtype; "values": a float64 file whose values are all
    /// float32 values, judged as float32.
    pub precision_from: &'static str,
    /// The conventions the reference follows (from the description).
    pub conventions: ConventionsReport,
    /// Which file tensor went to which parameter.
    pub names: Vec<NameReport>,
    pub tolerance: f64,
    pub residual_tolerance: f64,
    pub reference: Certification,
    pub loss: Option<LossReport>,
    pub tensors: Vec<TensorReport>,
    pub findings: Vec<Finding>,
}

/// The declared conventions, for reports.
#[derive(Clone, Debug, Serialize)]
pub struct ConventionsReport {
    pub reduction: &'static str,
    pub l2: f64,
    pub l2_divisor: &'static str,
    pub l2_on_bias: bool,
}

impl ConventionsReport {
    /// The conventions of a layer graph's loss.
    pub fn of_config(c: &plumb_engine::graph::LossConfig) -> ConventionsReport {
        ConventionsReport {
            reduction: c.reduction.name(),
            l2: c.l2,
            l2_divisor: c.l2_divisor.name(),
            l2_on_bias: c.l2_on_bias,
        }
    }

    /// "mean; L2 (0.1/2m)·Σw² on the weights" and the like.
    pub fn describe(&self) -> String {
        let l2 = if self.l2 == 0.0 {
            "no L2 term".to_string()
        } else {
            format!(
                "L2 term ({}/{})·Σw² over the weights{}",
                self.l2,
                self.l2_divisor,
                if self.l2_on_bias { " and biases" } else { "" }
            )
        };
        format!("data term {} over the batch; {l2}", self.reduction)
    }
}

/// A gradient file's tensor under a name no expected tensor has.
struct Stray<'a> {
    name: &'a str,
    shape: &'a [usize],
}

/// Findings on the names of an outside gradient: tensors under other names with the missing ones'
/// shapes, in order (say which name goes where), and tensors no expected one is named like.
/// `listed` holds the file's tensors as bound (under their parameters' names) and those listed
/// from their headers alone, which no parameter can be bound to.
fn name_findings(expected: &[Expected], listed: &TensorFile) -> Vec<Finding> {
    let mut findings = Vec::new();
    let absent: Vec<&Expected> = expected
        .iter()
        .filter(|e| !listed.tensors.iter().any(|u| u.name == e.name))
        .collect();
    let strays: Vec<Stray> = listed
        .listing()
        .filter(|(name, ..)| !expected.iter().any(|e| e.name == *name))
        .map(|(name, shape, _)| Stray { name, shape })
        .collect();
    if !absent.is_empty()
        && absent.len() == strays.len()
        && absent.iter().zip(&strays).all(|(a, u)| a.shape == u.shape)
    {
        let pairs: Vec<String> = absent
            .iter()
            .zip(&strays)
            .map(|(a, u)| format!("{}={}", u.name, a.name))
            .collect();
        findings.push(Finding::new(
            "gradient-names",
            Severity::Error,
            format!(
                "the gradient's tensors have the layout's shapes under names plumb cannot match ({}): if they are in that order, run again with --map {}; or write them under the parameters' names",
                pairs.join(", "),
                pairs.join(",")
            ),
        ));
    }
    for u in strays {
        findings.push(
            Finding::new(
                "gradient-tensor-unexpected",
                Severity::Warning,
                format!(
                    "{} is in the gradient, but no tensor of the layout has that name",
                    shape(u.shape)
                ),
            )
            .tensor(u.name),
        );
    }
    findings
}

/// One tensor's report: `outside` holds the tensors as judged (for the worst entry's index),
/// `layer` is the tensor's 1-based layer.
fn tensor_report(j: &TensorJudgement, outside: &[Tensor], layer: Option<usize>) -> TensorReport {
    let worst = j.comparison.as_ref().map(|c| {
        let u = outside.iter().find(|t| t.name == j.name).expect("compared");
        let index = u.index_of(c.worst);
        Worst {
            at: j.place.clone(),
            index,
            outside: c.worst_outside,
            reference: c.worst_reference,
            rel_error: c.max_rel_error,
        }
    });
    TensorReport {
        name: j.name.clone(),
        layer,
        verdict: if j.matches {
            Verdict::Pass
        } else {
            Verdict::Fail
        },
        expected_shape: j.expected_shape.clone(),
        found_shape: j.found_shape.clone(),
        max_rel_error: j.comparison.as_ref().map(|c| c.max_rel_error),
        median_rel_error: j.comparison.as_ref().map(|c| c.median_rel_error),
        cosine: j.comparison.as_ref().map(|c| c.cosine),
        scale: j.comparison.as_ref().map(|c| c.scale),
        worst,
        diagnosis: j.diagnosis.as_ref().map(|d| DiagnosisReport {
            code: d.code.to_string(),
            detail: d.label.clone(),
            residual: d.residual.is_finite().then_some(d.residual),
            factor: d.factor,
            first_wrong_layer: d.first_wrong_layer.map(|l| l + 1),
            alike: d.alike.iter().map(|(c, _)| c.to_string()).collect(),
        }),
        rel_errors: j
            .comparison
            .as_ref()
            .map_or_else(Vec::new, |c| c.rel_errors.clone()),
    }
}

fn mismatch_finding(t: &TensorReport, layer: Option<usize>) -> Finding {
    let d = t.diagnosis.as_ref();
    let code = d.map_or("unexplained", |d| d.code.as_str());
    let what = match code {
        "unexplained" => "wrong, and no catalogued mistake reproduces it".to_string(),
        c => {
            let mut s = format!("wrong: {c}");
            if let Some(d) = d {
                if !d.detail.is_empty() {
                    s.push_str(&format!(" ({})", d.detail));
                }
                if let Some(f) = d.factor {
                    s.push_str(&format!(", factor {}", num(f)));
                }
                if let Some(r) = d.residual {
                    s.push_str(&format!(" reproduces it to a residual of {}", num(r)));
                }
                if !d.alike.is_empty() {
                    s.push_str(&format!(
                        " (so does {}: the gradient cannot tell them apart)",
                        d.alike.join(", ")
                    ));
                }
            }
            s
        }
    };
    let figures = match (&t.max_rel_error, &t.worst, &t.found_shape) {
        (Some(m), Some(w), _) => format!(
            "; max relative error {}, worst at {} (outside {:.6e}, reference {:.6e}), cosine {}, scale {}",
            num(*m),
            w.label(&t.name),
            w.outside,
            w.reference,
            t.cosine.map_or("—".into(), |c| format!("{c:.6}")),
            t.scale.map_or("—".into(), num),
        ),
        (_, _, Some(found)) => format!(
            "; its shape is {}, expected {}",
            shape(found),
            shape(&t.expected_shape)
        ),
        (_, _, None) => "; the tensor is absent from the gradient".to_string(),
    };
    let mut f = Finding::new(
        "gradient-mismatch",
        Severity::Error,
        format!("{what}{figures}"),
    )
    .tensor(&t.name);
    if let Some(l) = layer {
        f = f.layer(l);
    }
    f = f.figure("diagnosis", code);
    if let Some(fa) = d.and_then(|d| d.factor) {
        f = f.figure("factor", fa);
    }
    f
}

/// The outside loss against the reference's data term and L2 term (`terms`) on a batch of `m`,
/// with the likely reason when they differ: the L2 term left out, a mean for a sum or the
/// reverse, another L2 divisor.
fn loss_verdict(
    outside: f64,
    (data, l2): (f64, f64),
    samples: usize,
    reduction: Reduction,
    divisor: plumb_engine::L2Divisor,
    single: bool,
) -> (LossReport, Option<Finding>) {
    let reference = data + l2;
    let tol = if single { 1e-4 } else { 1e-8 };
    let rel = |v: f64, r: f64| (v - r).abs() / r.abs().max(f64::MIN_POSITIVE);
    let err = rel(outside, reference);
    let matches = err <= tol;
    let m = samples as f64;
    // The L2 term under each divisor, from the declared one.
    let declared = divisor.value(samples);
    let other_divisor = plumb_engine::L2Divisor::ALL
        .into_iter()
        .filter(|d| *d != divisor)
        .find(|d| l2 > 0.0 && rel(outside, data + l2 * declared / d.value(samples)) <= tol);
    let explanation = if matches {
        None
    } else if l2 > 0.0 && rel(outside, data) <= tol {
        Some("the L2 term is left out of the loss".to_string())
    } else if reduction == Reduction::Mean
        && (rel(outside, m * data + l2) <= tol || rel(outside, m * data + m * l2) <= tol)
    {
        Some("the loss is summed over the batch, not averaged as reduction = \"mean\" says".into())
    } else if reduction == Reduction::Sum
        && (rel(outside, data / m + l2) <= tol || rel(outside, (data + l2) / m) <= tol)
    {
        Some("the loss is averaged over the batch, not summed as reduction = \"sum\" says".into())
    } else {
        other_divisor.map(|d| {
            format!(
                "the L2 term is (λ/{d})·Σw², not (λ/{})·Σw² as l2-divisor = \"{}\" says",
                divisor, divisor
            )
        })
    };
    let finding = (!matches).then(|| {
        Finding::new(
            "loss-mismatch",
            Severity::Error,
            format!(
                "the outside loss is {outside:.12e}, the reference {reference:.12e} (relative error {}){}",
                num(err),
                explanation
                    .as_deref()
                    .map_or(String::new(), |e| format!(": {e}"))
            ),
        )
        .figure("outside", outside)
        .figure("reference", reference)
    });
    (
        LossReport {
            outside,
            reference,
            rel_error: err,
            matches,
            explanation,
        },
        finding,
    )
}

/// The element type each tensor of a gradient file was computed in, in file order, and whether a
/// float64 file was found to hold only float32 values (then computed in float32, judged so). A
/// float64 tensor listed from its header alone is not known to hold float32 values.
fn stored_dtypes(file: &TensorFile) -> (bool, Vec<DType>) {
    let f64_values = || {
        file.tensors
            .iter()
            .filter(|t| t.dtype == DType::F64)
            .flat_map(|t| t.data.iter().copied())
    };
    let widened = f64_values().next().is_some()
        && f64_values().any(|v| v != 0.0)
        && !file.unread.iter().any(|u| u.dtype == DType::F64)
        && file
            .tensors
            .iter()
            .filter(|t| t.dtype == DType::F64)
            .all(|t| holds_only_f32(&t.data));
    let dtypes = file
        .tensors
        .iter()
        .map(|t| {
            if widened && t.dtype == DType::F64 {
                DType::F32
            } else {
                t.dtype
            }
        })
        .collect();
    (widened, dtypes)
}

/// The resolution a tensor stored in `d` was computed at.
fn epsilon(d: DType) -> f64 {
    match d {
        DType::F64 => f64::EPSILON,
        DType::F32 => f32::EPSILON as f64,
        DType::F16 => 9.765625e-4,
        _ => 7.8125e-3,
    }
}

/// The finding that a float64 gradient was computed in float32.
fn widened_finding() -> Finding {
    Finding::new(
        "gradient-precision",
        Severity::Note,
        "the gradient is stored as float64, but every value is exactly a float32 value: it was computed in float32, and is judged at float32's resolution",
    )
}

/// The finding that the complex step does not certify the reference.
pub fn uncertified_finding() -> Finding {
    Finding::new(
        "reference-uncertified",
        Severity::Warning,
        "the complex step disagrees with the reference gradient somewhere on this network; run `plumb check --method complex-step` before trusting the diagnosis",
    )
}
