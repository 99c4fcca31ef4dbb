//! A part of a dense network — one tensor of a weight file under its layout — as the checker's
//! coordinates and directions see it.

use crate::check::{CoordCheck, Scope};

/// A part of the network a report tensor covers: a layer's bias weights, its other weights, or both
/// (one tensor of a weight file, under its layout).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Part {
    pub layer: usize,
    pub bias: bool,
    pub weights: bool,
}

impl Part {
    /// Whether a checked coordinate lies in this part.
    pub fn contains(&self, c: &CoordCheck) -> bool {
        c.coord.layer == self.layer
            && if c.coord.col == 0 {
                self.bias
            } else {
                self.weights
            }
    }

    /// Whether a direction of `scope` lies in this part.
    pub fn covers(&self, scope: Scope) -> bool {
        match scope {
            Scope::Global => false,
            Scope::Part { layer, bias } => {
                layer == self.layer && if bias { self.bias } else { self.weights }
            }
        }
    }
}
