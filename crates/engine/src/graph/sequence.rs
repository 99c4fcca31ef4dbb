//! How the recurrent and attention kinds read their input as steps × width.
//!
//! A `[steps, width]` sequence is read as it is. A `[channels, length]` signal (a conv1d's output)
//! is read transposed: steps = length, width = channels, so step t of a sample is the column
//! (x[0, t], …, x[channels − 1, t]) of its C-order [channels, length] values.

use ndarray::{Array2, Array3, ArrayView2};

use super::{Shape, ShapeError};
use crate::Scalar;

/// The steps and width of a sequence input, and whether it is a transposed signal.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) struct Steps {
    pub steps: usize,
    pub width: usize,
    pub transposed: bool,
}

impl Steps {
    pub fn of(kind: &'static str, input: &Shape) -> Result<Steps, ShapeError> {
        match *input {
            Shape::Sequence { steps, width } => Ok(Steps {
                steps,
                width,
                transposed: false,
            }),
            Shape::Signal { channels, length } => Ok(Steps {
                steps: length,
                width: channels,
                transposed: true,
            }),
            found => Err(ShapeError::Input {
                kind,
                needs: "[steps, width] (or a [channels, length] signal, read as steps = length)",
                found,
                fix: "give a sequence input, or put an embedding or conv1d layer before it",
            }),
        }
    }

    /// The flat index within a sample of step `t`, feature `w`.
    fn at(&self, t: usize, w: usize) -> usize {
        if self.transposed {
            w * self.steps + t
        } else {
            t * self.width + w
        }
    }

    /// The batch (m × size) as steps × m × width: step t's rows are `out[t]`.
    pub fn time_major<S: Copy>(&self, x: ArrayView2<S>) -> Array3<S> {
        Array3::from_shape_fn((self.steps, x.nrows(), self.width), |(t, i, w)| {
            x[[i, self.at(t, w)]]
        })
    }

    /// The inverse of [`Steps::time_major`]: steps × m × width back to m × size in the input's
    /// order (for the input gradient).
    pub fn batch_of_time_major<S: Scalar>(&self, d: &Array3<S>) -> Array2<S> {
        let m = d.shape()[1];
        let mut out = Array2::zeros((m, self.steps * self.width));
        for ((t, i, w), &v) in d.indexed_iter() {
            out[[i, self.at(t, w)]] = v;
        }
        out
    }

    /// The batch (m × size) as (m · steps) × width, one row per sample and step, sample-major.
    pub fn rows<S: Copy>(&self, x: ArrayView2<S>) -> Array2<S> {
        Array2::from_shape_fn((x.nrows() * self.steps, self.width), |(r, w)| {
            x[[r / self.steps, self.at(r % self.steps, w)]]
        })
    }

    /// The inverse of [`Steps::rows`].
    pub fn batch_of_rows<S: Scalar>(&self, d: &Array2<S>) -> Array2<S> {
        let m = d.nrows() / self.steps;
        let mut out = Array2::zeros((m, self.steps * self.width));
        for ((r, w), &v) in d.indexed_iter() {
            out[[r / self.steps, self.at(r % self.steps, w)]] = v;
        }
        out
    }
}
