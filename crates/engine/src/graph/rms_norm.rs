//! `rms-norm` (Zhang & Sennrich 2019): x / √(mean(x²) + ε) over the feature axis (as layer-norm),
//! times a scale; no mean subtracted, no shift.

use super::norm::{Norm, Over, norm_kind};
use super::{Shape, ShapeError};

/// An rms norm bound to its input shape.
#[derive(Clone, Debug)]
pub struct RmsNorm {
    norm: Norm,
}

impl RmsNorm {
    /// DESIGN §4.2's default ε is 1e-6.
    pub fn new(epsilon: f64, input: &Shape) -> Result<RmsNorm, ShapeError> {
        Ok(RmsNorm {
            norm: Norm::new(input, Over::Features, false, false, epsilon)?,
        })
    }
}

norm_kind!(RmsNorm, "rms-norm");
