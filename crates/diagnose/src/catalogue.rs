//! A hypothesis of the catalogue (docs/mistakes.md) — one way a mistake could have been made and
//! the gradient it gives — and the hypotheses read off the reference gradient alone: a sign or
//! factor, two tensors exchanged, a factor fitted to the outside gradient. The hypotheses the
//! backward pass makes are the layer graph's ([`crate::GraphProblem`]).
//!
//! Every hypothesis is a departure from the conventions the description declares (reduction, L2
//! divisor, bias decay), never from plumb's defaults: code that follows its declared convention is
//! right, and the reference already follows it.

use plumb_engine::L2Divisor;
use plumb_formats::Tensor;

/// One way the mistake could have been made, and the gradient it gives.
#[derive(Clone, Debug)]
pub struct Hypothesis {
    /// Where or how, for the report ("hidden layer 2", "last sample", …); empty when there is one way.
    pub label: String,
    pub tensors: Vec<Tensor>,
    /// Per tensor, the factor of a `constant-factor` hypothesis.
    pub factors: Option<Vec<f64>>,
    /// The 0-based layer the mistake sits in, when it sits in one.
    pub layer: Option<usize>,
}

/// The code whose hypothesis is a fitted factor: named only when no other code reproduces a tensor
/// (a factor −1 or m fits whenever `sign-flipped` or a batch-mean code does).
pub const CONSTANT_FACTOR: &str = "constant-factor";

impl Hypothesis {
    pub(crate) fn plain(tensors: Vec<Tensor>) -> Hypothesis {
        Hypothesis::at(String::new(), tensors)
    }

    pub(crate) fn at(label: String, tensors: Vec<Tensor>) -> Hypothesis {
        Hypothesis {
            label,
            tensors,
            factors: None,
            layer: None,
        }
    }
}

pub(crate) fn scaled(tensors: &[Tensor], f: f64) -> Vec<Tensor> {
    tensors
        .iter()
        .map(|t| {
            Tensor::new(
                t.name.clone(),
                t.shape.clone(),
                t.data.iter().map(|v| v * f).collect(),
            )
        })
        .collect()
}

/// Every pair of tensors exchanged (only the two tensors in each hypothesis: the others are
/// left as the reference has them).
pub(crate) fn swaps(r: &[Tensor]) -> Vec<Hypothesis> {
    let mut out = Vec::new();
    for i in 0..r.len() {
        for j in i + 1..r.len() {
            let t = vec![
                Tensor::new(r[i].name.clone(), r[j].shape.clone(), r[j].data.clone()),
                Tensor::new(r[j].name.clone(), r[i].shape.clone(), r[i].data.clone()),
            ];
            out.push(Hypothesis::at(format!("{} ↔ {}", r[i].name, r[j].name), t));
        }
    }
    out
}

/// Per tensor the least-squares factor c = ⟨U, G⟩ / ⟨G, G⟩ of the outside gradient U and c·G.
pub(crate) fn fitted_factor(reference: &[Tensor], outside: &[Tensor]) -> Hypothesis {
    let mut factors = Vec::new();
    let tensors = reference
        .iter()
        .map(|r| {
            let c = outside
                .iter()
                .find(|u| u.name == r.name && u.shape == r.shape)
                .map(|u| {
                    let rr: f64 = r.data.iter().map(|v| v * v).sum();
                    let ur: f64 = u.data.iter().zip(&r.data).map(|(a, b)| a * b).sum();
                    if rr > 0.0 { ur / rr } else { 0.0 }
                })
                .unwrap_or(0.0);
            // A factor within the precision of 1 leaves the tensor unchanged, and factors other
            // entries explain rank after them: the diagnosis sees to both.
            let c = if c == 0.0 { f64::NAN } else { c };
            factors.push(c);
            Tensor::new(
                r.name.clone(),
                r.shape.clone(),
                r.data.iter().map(|v| v * c).collect(),
            )
        })
        .collect();
    Hypothesis {
        label: String::new(),
        tensors,
        factors: Some(factors),
        layer: None,
    }
}

/// The L2 gradient's factor on w under a divisor, as the report writes it.
pub(crate) fn slope_text(d: L2Divisor) -> &'static str {
    match d {
        L2Divisor::TwoM => "(λ/m)·w",
        L2Divisor::Two => "λ·w",
        L2Divisor::M => "(2λ/m)·w",
        L2Divisor::One => "2λ·w",
    }
}
