//! The loss under the description's conventions (DESIGN §4.1): the data term (cross-entropy or
//! squared error, `reduction` mean or sum) and the L2 term (λ / divisor) · Σ w² over the tensors
//! that decay.
//!
//! The data term treats each sample's last axis as one output vector: a sequence output is steps
//! vectors per sample, and `mean` averages over samples and steps. The L2 divisor's m stays the
//! number of samples.

use ndarray::{Array2, ArrayView2};

use crate::{Activation, L2Divisor, Loss, Reduction, Scalar};

/// The loss and its conventions: everything of the description's top level the engine needs.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct LossConfig {
    pub loss: Loss,
    pub reduction: Reduction,
    /// λ ≥ 0.
    pub l2: f64,
    pub l2_divisor: L2Divisor,
    /// Whether biases decay too (never scales, shifts or tables).
    pub l2_on_bias: bool,
}

impl LossConfig {
    /// Cross-entropy, mean, no L2: the description's defaults with that loss.
    pub fn cross_entropy() -> Self {
        LossConfig {
            loss: Loss::CrossEntropy,
            reduction: Reduction::Mean,
            l2: 0.0,
            l2_divisor: L2Divisor::TwoM,
            l2_on_bias: false,
        }
    }

    /// Squared error, mean, no L2.
    pub fn squared_error() -> Self {
        LossConfig {
            loss: Loss::SquaredError,
            ..LossConfig::cross_entropy()
        }
    }

    /// λ / divisor for a batch of m samples: the L2 term is this times Σ w².
    pub fn l2_factor(&self, m: usize) -> f64 {
        self.l2 / self.l2_divisor.value(m)
    }

    /// The data term from the output layer's pre-activation z and activation a (m × size, `rows`
    /// output vectors per sample).
    pub(crate) fn data<S: Scalar>(
        &self,
        output: Activation,
        rows: usize,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let n = z.nrows() * rows;
        let (z, a, y) = (by_rows(z, n), by_rows(a, n), by_rows(y, n));
        let mean = self.loss.value(output, z, a, y);
        match self.reduction {
            Reduction::Mean => mean,
            Reduction::Sum => mean * S::from_f64(n as f64),
        }
    }

    /// dJ/dz of the data term for the output layer.
    pub(crate) fn delta<S: Scalar>(
        &self,
        output: Activation,
        rows: usize,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> Array2<S> {
        let (m, size) = z.dim();
        let n = m * rows;
        let mut d = self
            .loss
            .output_delta(output, by_rows(z, n), by_rows(a, n), by_rows(y, n));
        if self.reduction == Reduction::Sum {
            d.mapv_inplace(|v| v * S::from_f64(n as f64));
        }
        super::reshape(d, (m, size))
    }
}

/// An m × size batch seen as n rows of one output vector each.
pub(crate) fn by_rows<S>(x: ArrayView2<S>, n: usize) -> ArrayView2<S> {
    let total = x.len();
    x.into_shape_with_order((n, total / n.max(1)))
        .expect("batches are standard layout")
}
