//! One sample's shape as it flows between layers.

use std::fmt;

/// One sample's shape. A batch is m rows of [`Shape::size`] values in C order of these axes.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shape {
    /// [features]
    Flat(usize),
    /// [channels, length]
    Signal { channels: usize, length: usize },
    /// [channels, height, width]
    Image {
        channels: usize,
        height: usize,
        width: usize,
    },
    /// [steps, width]: one vector per step (recurrent and attention kinds).
    Sequence { steps: usize, width: usize },
    /// [steps] integer token ids, each in 0..vocabulary, carried as the scalar's real part (an
    /// `embedding` reads them). One value per step: a batch is m × steps.
    Tokens { steps: usize, vocabulary: usize },
}

impl Shape {
    /// Values per sample.
    pub fn size(&self) -> usize {
        let (outer, axis, inner) = self.feature_axis();
        outer * axis * inner
    }

    /// The axes' lengths in C order.
    pub fn dims(&self) -> Vec<usize> {
        match *self {
            Shape::Flat(n) => vec![n],
            Shape::Signal { channels, length } => vec![channels, length],
            Shape::Image {
                channels,
                height,
                width,
            } => vec![channels, height, width],
            Shape::Sequence { steps, width } => vec![steps, width],
            Shape::Tokens { steps, .. } => vec![steps],
        }
    }

    /// Channels and [height, width] of a spatial shape (a signal has height 1).
    pub(crate) fn spatial(&self) -> Option<(usize, [usize; 2])> {
        match *self {
            Shape::Signal { channels, length } => Some((channels, [1, length])),
            Shape::Image {
                channels,
                height,
                width,
            } => Some((channels, [height, width])),
            _ => None,
        }
    }

    /// The spatial shape with these channels and positions, of the same dimensionality as `self`.
    pub(crate) fn with_spatial(&self, channels: usize, hw: [usize; 2]) -> Shape {
        match self {
            Shape::Signal { .. } => Shape::Signal {
                channels,
                length: hw[1],
            },
            _ => Shape::Image {
                channels,
                height: hw[0],
                width: hw[1],
            },
        }
    }

    /// The feature axis as (outer, axis, inner): the sample's values are indexed
    /// (o · axis + a) · inner + j. The feature axis is the last axis of [features] and [steps,
    /// width], and the channels of [channels, …] (inner = positions).
    pub(crate) fn feature_axis(&self) -> (usize, usize, usize) {
        match *self {
            Shape::Flat(n) => (1, n, 1),
            Shape::Tokens { steps, .. } => (1, steps, 1),
            Shape::Sequence { steps, width } => (steps, width, 1),
            Shape::Signal { channels, length } => (1, channels, length),
            Shape::Image {
                channels,
                height,
                width,
            } => (1, channels, height * width),
        }
    }

    /// Where channel `c` of the feature axis sits in a standard-layout batch of `m` samples:
    /// one run of `inner` consecutive values per sample and outer position, in flat order.
    pub(crate) fn channel_runs(
        &self,
        m: usize,
        c: usize,
    ) -> impl Iterator<Item = std::ops::Range<usize>> + use<> {
        let (outer, axis, inner) = self.feature_axis();
        (0..m * outer).map(move |r| {
            let start = (r * axis + c) * inner;
            start..start + inner
        })
    }

    /// Rows per sample when the last axis is what a softmax and the loss see as one output
    /// vector: the steps of a sequence, 1 otherwise.
    pub(crate) fn rows(&self) -> usize {
        match *self {
            Shape::Sequence { steps, .. } => steps,
            _ => 1,
        }
    }
}

impl fmt::Display for Shape {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            Shape::Flat(n) => write!(f, "[{n}] (features)"),
            Shape::Signal { channels, length } => {
                write!(f, "[{channels}, {length}] (channels, length)")
            }
            Shape::Image {
                channels,
                height,
                width,
            } => write!(
                f,
                "[{channels}, {height}, {width}] (channels, height, width)"
            ),
            Shape::Sequence { steps, width } => write!(f, "[{steps}, {width}] (steps, width)"),
            Shape::Tokens { steps, vocabulary } => {
                write!(f, "[{steps}] (token ids below {vocabulary})")
            }
        }
    }
}
