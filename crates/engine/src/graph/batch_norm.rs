//! `batch-norm` in training mode (Ioffe & Szegedy 2015): the batch's own mean and biased variance,
//! per channel over samples and positions for [channels, …] inputs, per feature otherwise; the
//! backward pass runs through the mean and the variance (norm.rs).

use super::norm::{Norm, Over, norm_kind};
use super::{Shape, ShapeError};

/// A batch norm bound to its input shape.
#[derive(Clone, Debug)]
pub struct BatchNorm {
    norm: Norm,
}

impl BatchNorm {
    /// DESIGN §4.2's default ε is 1e-5.
    pub fn new(epsilon: f64, input: &Shape) -> Result<BatchNorm, ShapeError> {
        Ok(BatchNorm {
            norm: Norm::new(input, Over::Batch, true, true, epsilon)?,
        })
    }
}

norm_kind!(BatchNorm, "batch-norm");
