//! Departures from the reference backward pass that any graph can make, whatever its kinds: the
//! data term's factor, which samples it sums, the output delta of the other loss, an activation's
//! derivative left out or taken at the output, and the form of the L2 term. The diagnosis hands
//! them to [`Graph::backward_hooked`](super::Graph::backward_hooked) as hypotheses
//! (docs/mistakes.md); each kind's own mistakes go through [`Graph::plant`](super::Graph::plant).

use crate::L2Divisor;

/// How the regularisation term's gradient is formed, relative to the declared conventions.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Regularization {
    /// (2λ / divisor)·w on the weights that decay, as declared: the reference.
    Declared,
    /// Left out.
    Missing,
    /// Formed with another divisor than the declared one (e.g. λ·w instead of (λ/m)·w).
    Divisor(L2Divisor),
    /// Applied to the biases when the description says they do not decay, or left off them when
    /// it says they do.
    BiasToggled,
}

/// Which samples the data term sums over.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Samples {
    All,
    /// Only the first sample (still reduced as declared: divided by m under the mean).
    First,
    /// Only the last sample (reduced as declared): a loop that assigns instead of adding.
    Last,
}

/// How one hidden layer's activation derivative departs from g′(z).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Slope {
    /// The factor g′(z) left out: the gradient of the output passes through unchanged.
    Missing,
    /// g′ evaluated at the layer's output g(z) instead of its pre-activation z.
    AtOutput,
}

/// One set of departures; [`Hooks::REFERENCE`] is the reference backward pass.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Hooks {
    /// Factor on the data term (the output delta), relative to the declared reduction.
    pub data_scale: f64,
    /// Which samples' output delta the backward pass starts from (the others' is zero; the
    /// declared reduction is kept).
    pub samples: Samples,
    /// The output delta of the other loss (cross-entropy ↔ squared error).
    pub other_loss_delta: bool,
    /// A layer (0-based, not the last) whose activation derivative departs, and how.
    pub slope: Option<(usize, Slope)>,
    /// The L2 term's form relative to the declared one.
    pub regularization: Regularization,
}

impl Hooks {
    pub const REFERENCE: Hooks = Hooks {
        data_scale: 1.0,
        samples: Samples::All,
        other_loss_delta: false,
        slope: None,
        regularization: Regularization::Declared,
    };
}

impl Default for Hooks {
    fn default() -> Self {
        Hooks::REFERENCE
    }
}
