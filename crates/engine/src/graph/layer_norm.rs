//! `layer-norm` (Ba, Kiros & Hinton 2016): each sample's mean and biased variance over the feature
//! axis — the last axis of [features] and [steps, width], the channels at each position of
//! [channels, …] — with a scale and shift of that axis's length.

use super::norm::{Norm, Over, norm_kind};
use super::{Shape, ShapeError};

/// A layer norm bound to its input shape.
#[derive(Clone, Debug)]
pub struct LayerNorm {
    norm: Norm,
}

impl LayerNorm {
    /// DESIGN §4.2's default ε is 1e-5.
    pub fn new(epsilon: f64, input: &Shape) -> Result<LayerNorm, ShapeError> {
        Ok(LayerNorm {
            norm: Norm::new(input, Over::Features, true, true, epsilon)?,
        })
    }
}

norm_kind!(LayerNorm, "layer-norm");
