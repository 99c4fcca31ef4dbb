//! The catalogue of mistakes (docs/mistakes.md): each entry computes, from the reference engine,
//! the gradient its mistake would produce. Adding a mistake is adding an entry here.
//!
//! Every entry is a departure from the conventions the description declares (reduction, L2
//! divisor, bias decay), never from plumb's defaults: code that follows its declared convention is
//! right, and the reference already follows it.

use ndarray::s;
use plumb_engine::{
    Batch, Conventions, L2Divisor, Network, Reduction, Regularization, Samples, Trace, Variant,
    Weights,
};

use crate::diagnose::Hypotheses;
use plumb_formats::Tensor;

/// What a hypothesis needs: the network, where it is evaluated, the reference gradient, and how the
/// engine's augmented matrices map to the tensors of the weight file's layout.
pub struct Problem<'a> {
    pub net: &'a Network,
    pub weights: &'a Weights<f64>,
    pub batch: &'a Batch,
    pub to_tensors: &'a dyn Fn(&Weights<f64>) -> Vec<Tensor>,
    trace: Trace<f64>,
    pub reference: Weights<f64>,
    pub reference_tensors: Vec<Tensor>,
}

impl<'a> Problem<'a> {
    pub fn new(
        net: &'a Network,
        weights: &'a Weights<f64>,
        batch: &'a Batch,
        to_tensors: &'a dyn Fn(&Weights<f64>) -> Vec<Tensor>,
    ) -> Problem<'a> {
        let trace = net.forward(weights, batch.x.view());
        let reference = net.backward(weights, &trace, batch.y.view());
        let reference_tensors = to_tensors(&reference);
        Problem {
            net,
            weights,
            batch,
            to_tensors,
            trace,
            reference,
            reference_tensors,
        }
    }

    /// The gradient of a departure from the reference backward pass, as layout tensors.
    pub fn variant(&self, v: &Variant) -> Vec<Tensor> {
        let g = self
            .net
            .backward_with(self.weights, &self.trace, self.batch.y.view(), v);
        (self.to_tensors)(&g)
    }

    /// The engine indices of the hidden layers (every layer but the output layer).
    fn hidden(&self) -> std::ops::Range<usize> {
        0..self.net.layers().len() - 1
    }

    fn m(&self) -> f64 {
        self.batch.len() as f64
    }

    fn conventions(&self) -> Conventions {
        self.net.conventions()
    }
}

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

/// A catalogued mistake.
pub struct Mistake {
    pub code: &'static str,
    pub summary: &'static str,
    /// The hypotheses for a problem; `outside` is the gradient under diagnosis (used only by
    /// mistakes that fit a parameter to it, such as a constant factor).
    pub hypotheses: fn(&Problem<'_>, &[Tensor]) -> Vec<Hypothesis>,
}

fn with(v: impl FnOnce(&mut Variant)) -> Variant {
    let mut out = Variant::REFERENCE;
    v(&mut out);
    out
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

/// The catalogue, in the order ties are broken.
pub const CATALOGUE: &[Mistake] = &[
    Mistake {
        code: "sign-flipped",
        summary: "the gradient of −J (ascent instead of descent)",
        hypotheses: |p, _| vec![Hypothesis::plain(scaled(&p.reference_tensors, -1.0))],
    },
    Mistake {
        code: "missing-batch-mean",
        summary: "the data term summed over the batch where the declared reduction averages it (a factor m)",
        hypotheses: |p, _| match p.conventions().reduction {
            Reduction::Mean => vec![
                Hypothesis::plain(p.variant(&with(|v| v.data_scale = p.m()))),
                // The whole loss summed, its L2 term included: m·G.
                Hypothesis::at(
                    "the L2 term summed too".into(),
                    scaled(&p.reference_tensors, p.m()),
                ),
            ],
            // A sum has no mean to miss.
            Reduction::Sum => Vec::new(),
        },
    },
    Mistake {
        code: "double-batch-mean",
        summary: "the data term divided by m once more than the declared reduction does: averaged twice, or averaged where the reduction is a sum",
        hypotheses: |p, _| {
            let (plain, whole) = match p.conventions().reduction {
                Reduction::Mean => ("", "the L2 term divided by m too"),
                Reduction::Sum => (
                    "averaged over the batch, though reduction = \"sum\"",
                    "the whole loss averaged, L2 term included, though reduction = \"sum\"",
                ),
            };
            vec![
                Hypothesis::at(
                    plain.into(),
                    p.variant(&with(|v| v.data_scale = 1.0 / p.m())),
                ),
                Hypothesis::at(whole.into(), scaled(&p.reference_tensors, 1.0 / p.m())),
            ]
        },
    },
    Mistake {
        code: "bias-regularized",
        summary: "the L2 term's reach over the biases other than declared: biases decayed under l2-on-bias = false, or not decayed under true",
        hypotheses: |p, _| {
            let label = if p.conventions().l2_on_bias {
                "the biases not decayed, though l2-on-bias = true"
            } else {
                ""
            };
            vec![Hypothesis::at(
                label.into(),
                p.variant(&with(|v| v.regularization = Regularization::BiasToggled)),
            )]
        },
    },
    Mistake {
        code: "regularization-missing",
        summary: "the L2 gradient left out",
        hypotheses: |p, _| {
            vec![Hypothesis::plain(p.variant(&with(|v| {
                v.regularization = Regularization::Missing
            })))]
        },
    },
    Mistake {
        code: "regularization-unscaled",
        summary: "the L2 gradient formed with another divisor than the declared l2-divisor (e.g. λ·w instead of (λ/m)·w)",
        hypotheses: |p, _| {
            let declared = p.conventions().l2_divisor;
            L2Divisor::ALL
                .into_iter()
                .filter(|&d| d != declared)
                .map(|d| {
                    Hypothesis::at(
                        format!(
                            "{} instead of {}: as if l2-divisor = \"{d}\", not \"{declared}\"",
                            slope_text(d),
                            slope_text(declared)
                        ),
                        p.variant(&with(|v| v.regularization = Regularization::Divisor(d))),
                    )
                })
                .collect()
        },
    },
    Mistake {
        code: "activation-derivative-missing",
        summary: "the g′(z) factor left out of a backward step",
        hypotheses: |p, _| {
            p.hidden()
                .map(|k| {
                    Hypothesis::at(
                        format!("hidden layer {}", k + 1),
                        p.variant(&with(|v| v.slope_missing = Some(k))),
                    )
                })
                .collect()
        },
    },
    Mistake {
        code: "derivative-at-output",
        summary: "g′ evaluated at the activation a instead of the pre-activation z",
        hypotheses: |p, _| {
            p.hidden()
                .map(|k| {
                    Hypothesis::at(
                        format!("hidden layer {}", k + 1),
                        p.variant(&with(|v| v.slope_at_activation = Some(k))),
                    )
                })
                .collect()
        },
    },
    Mistake {
        code: "output-delta-mismatch",
        summary: "the output error term of the other loss",
        hypotheses: |p, _| {
            vec![Hypothesis::plain(
                p.variant(&with(|v| v.other_loss_delta = true)),
            )]
        },
    },
    Mistake {
        code: "transposed",
        summary: "the gradient's rows and columns swapped",
        hypotheses: |p, _| {
            vec![Hypothesis::plain(
                p.reference_tensors.iter().map(Tensor::transposed).collect(),
            )]
        },
    },
    Mistake {
        code: "bias-gradient-missing",
        summary: "the bias part zero or absent",
        hypotheses: |p, _| {
            let mut g = p.reference.clone();
            for l in g.layers_mut() {
                l.slice_mut(s![.., 0]).fill(0.0);
            }
            vec![Hypothesis::plain((p.to_tensors)(&g))]
        },
    },
    Mistake {
        code: "bias-rows-shifted",
        summary: "the bias unit's delta not dropped: a hidden layer's rows shifted by one",
        hypotheses: |p, _| {
            p.hidden()
                .map(|k| {
                    Hypothesis::at(
                        format!("hidden layer {}", k + 1),
                        p.variant(&with(|v| v.bias_unit_kept = Some(k))),
                    )
                })
                .collect()
        },
    },
    Mistake {
        code: "partial-batch",
        summary: "the gradient of one sample only (= instead of +=)",
        hypotheses: |p, _| {
            vec![
                Hypothesis::at(
                    "last sample".into(),
                    p.variant(&with(|v| v.samples = Samples::Last)),
                ),
                Hypothesis::at(
                    "first sample".into(),
                    p.variant(&with(|v| v.samples = Samples::First)),
                ),
            ]
        },
    },
    Mistake {
        code: "layers-swapped",
        summary: "gradients assigned to the wrong layers",
        hypotheses: |p, _| swaps(&p.reference_tensors),
    },
    Mistake {
        code: CONSTANT_FACTOR,
        summary: "off by a constant factor",
        hypotheses: |p, outside| vec![fitted_factor(&p.reference_tensors, outside)],
    },
];

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

impl Hypotheses for Problem<'_> {
    fn reference(&self) -> &[Tensor] {
        &self.reference_tensors
    }

    fn hypotheses(&self, outside: &[Tensor]) -> Vec<(&'static str, Hypothesis)> {
        CATALOGUE
            .iter()
            .flat_map(|m| {
                (m.hypotheses)(self, outside)
                    .into_iter()
                    .map(move |h| (m.code, h))
            })
            .collect()
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
