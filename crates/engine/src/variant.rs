//! Backward passes that depart from the reference in one catalogued way: the gradient a particular
//! mistake in hand-written backpropagation would produce (docs/mistakes.md). The diagnosis tests
//! these hypotheses against an outside gradient; they live here because each needs the inside of
//! the backward pass.

pub use crate::graph::{Regularization, Samples};

/// One departure from the reference backward pass; `Variant::REFERENCE` is the reference itself.
/// Hidden layers are numbered by the engine's 0-based layer index (hidden layer k of the docs is
/// index k − 1).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Variant {
    /// Factor on the data term, relative to the declared reduction (m: summed where averaged;
    /// 1/m: divided by m once more).
    pub data_scale: f64,
    pub regularization: Regularization,
    /// The output delta of the other loss (cross-entropy ↔ squared error).
    pub other_loss_delta: bool,
    /// The hidden layer whose backward step omits g′(z).
    pub slope_missing: Option<usize>,
    /// The hidden layer whose backward step evaluates g′ at the activation instead of z.
    pub slope_at_activation: Option<usize>,
    /// The hidden layer whose delta keeps the bias unit's entry and drops the last one.
    pub bias_unit_kept: Option<usize>,
    pub samples: Samples,
}

impl Variant {
    pub const REFERENCE: Variant = Variant {
        data_scale: 1.0,
        regularization: Regularization::Declared,
        other_loss_delta: false,
        slope_missing: None,
        slope_at_activation: None,
        bias_unit_kept: None,
        samples: Samples::All,
    };
}

impl Default for Variant {
    fn default() -> Self {
        Variant::REFERENCE
    }
}
