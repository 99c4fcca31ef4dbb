//! Every tensor of an outside gradient judged: compared with the reference where the shapes allow,
//! and diagnosed where it is wrong.

use crate::compare::{TensorComparison, compare_tensor};
use crate::diagnose::{Diagnosis, Hypotheses, diagnose};
use plumb_fd::relative_floor;
use plumb_formats::Tensor;

/// How strict to be, set from the outside gradient's precision.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Tolerances {
    /// The largest relative error (with the floor) that counts as agreement.
    pub agreement: f64,
    /// The largest residual at which a hypothesis counts as reproducing a tensor.
    pub residual: f64,
    /// The machine epsilon of the precision judged (for the floor of `plumb_fd::relative_floor`).
    pub epsilon: f64,
}

impl Tolerances {
    /// float64 outside gradients: agreement 1e-6, residual 1e-6; float32: 1e-3 and 1e-4 (a few
    /// hundred ε of each type, allowing for another order of summation).
    pub fn for_precision(single: bool) -> Tolerances {
        if single {
            Tolerances {
                agreement: 1e-3,
                residual: 1e-4,
                epsilon: f32::EPSILON as f64,
            }
        } else {
            Tolerances {
                agreement: 1e-6,
                residual: 1e-6,
                epsilon: f64::EPSILON,
            }
        }
    }

    /// From the machine epsilon of the type a tensor was stored in: float64 and float32 as above;
    /// float16 (ε ≈ 9.8e-4) 2e-2 and 1e-2; bfloat16 (ε ≈ 7.8e-3) 1e-1 and 5e-2.
    pub fn for_epsilon(eps: f64) -> Tolerances {
        if eps <= 1e-15 {
            Tolerances::for_precision(false)
        } else if eps <= 2e-7 {
            Tolerances::for_precision(true)
        } else if eps <= 1e-3 {
            Tolerances {
                agreement: 2e-2,
                residual: 1e-2,
                epsilon: eps,
            }
        } else {
            Tolerances {
                agreement: 1e-1,
                residual: 5e-2,
                epsilon: eps,
            }
        }
    }
}

/// Whether every value is exactly a float32 value (widened): a gradient computed in float32 and
/// saved as float64. Such a file is judged at float32's resolution, not float64's.
pub fn holds_only_f32(values: &[f64]) -> bool {
    values
        .iter()
        .all(|&v| !v.is_finite() || (v as f32) as f64 == v)
}

/// A tensor the layout expects.
#[derive(Clone, Debug, PartialEq)]
pub struct Expected {
    pub name: String,
    /// The 0-based layer it belongs to.
    pub layer: usize,
    pub shape: Vec<usize>,
    /// Whether it holds only bias weights (a split layout's bias vector).
    pub bias: bool,
}

/// The verdict on one tensor.
#[derive(Clone, Debug, PartialEq)]
pub struct TensorJudgement {
    pub name: String,
    pub expected_shape: Vec<usize>,
    /// The outside tensor's shape, if it is there.
    pub found_shape: Option<Vec<usize>>,
    /// The figures, when the shapes agree.
    pub comparison: Option<TensorComparison>,
    pub matches: bool,
    /// Why it is wrong, when it is.
    pub diagnosis: Option<Diagnosis>,
    /// Where the tensor is worst in its layer's terms (unit, channel, gate, head), when the
    /// layer graph says ([`crate::judge_graph`]).
    pub place: Option<String>,
}

/// Judges the outside gradient tensor by tensor, each with the tolerances `tol` gives its name.
pub fn judge(
    problem: &dyn Hypotheses,
    outside: &[Tensor],
    expected: &[Expected],
    tol: &dyn Fn(&str) -> Tolerances,
) -> Vec<TensorJudgement> {
    // The network's gradient scale, against which a zero or tiny tensor is judged.
    let network = problem
        .reference()
        .iter()
        .flat_map(|t| t.data.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let mut out: Vec<TensorJudgement> = expected
        .iter()
        .map(|e| {
            let u = outside.iter().find(|t| t.name == e.name);
            let r = problem
                .reference()
                .iter()
                .find(|t| t.name == e.name)
                .expect("reference has every tensor");
            let t = tol(&e.name);
            let own = r.data.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            let floor = relative_floor(own, network, t.epsilon, t.agreement);
            let comparison = u
                .filter(|u| u.shape == r.shape)
                .map(|u| compare_tensor(u, r, t.agreement, floor));
            TensorJudgement {
                name: e.name.clone(),
                expected_shape: e.shape.clone(),
                found_shape: u.map(|u| u.shape.clone()),
                matches: comparison.as_ref().is_some_and(|c| c.matches),
                comparison,
                diagnosis: None,
                place: None,
            }
        })
        .collect();
    let wrong: Vec<String> = out
        .iter()
        .filter(|j| !j.matches && j.found_shape.is_some())
        .map(|j| j.name.clone())
        .collect();
    let limits: Vec<f64> = wrong.iter().map(|n| tol(n).residual).collect();
    let found = diagnose(problem, outside, &wrong, &limits);
    // Backpropagation runs from the output down: the wrong tensor nearest the output is where the
    // error first enters.
    let first_wrong_layer = wrong
        .iter()
        .filter_map(|n| expected.iter().find(|e| &e.name == n))
        .map(|e| e.layer)
        .max();
    for (name, mut d) in wrong.iter().zip(found) {
        if d.code == "unexplained" {
            d.first_wrong_layer = first_wrong_layer;
            if let Some(l) = first_wrong_layer {
                d.label = format!(
                    "the error first appears in layer {}'s backward step (the wrong tensor nearest the output)",
                    l + 1
                );
            }
        }
        if let Some(j) = out.iter_mut().find(|j| &j.name == name) {
            j.diagnosis = Some(d);
        }
    }
    // An absent bias tensor is the bias gradient missing; any other absent tensor is unexplained.
    for (j, e) in out.iter_mut().zip(expected) {
        if j.found_shape.is_none() {
            j.diagnosis = Some(Diagnosis {
                code: if e.bias {
                    "bias-gradient-missing"
                } else {
                    "unexplained"
                },
                label: "tensor absent".into(),
                residual: if e.bias { 0.0 } else { f64::INFINITY },
                factor: None,
                runners_up: Vec::new(),
                alike: Vec::new(),
                layer: None,
                first_wrong_layer: None,
            });
        }
    }
    out
}
