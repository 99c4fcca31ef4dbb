//! A batch of samples: features and targets, one sample per row.

use ndarray::{Array2, ArrayView2, CowArray, Ix2};

use crate::graph::{Graph, Shape};
use crate::{Activation, Rng, Scalar};

/// Inputs and targets, one sample per row, in f64 as read from a file. For the layer graph, x is
/// m × the input's size and y m × the output's size, each row in C order of its [`Shape`]
/// (token ids as whole numbers; an `output = "all"` sequence's targets step by step). `X` is
/// what holds x: f64 values, or [`Features`] for `plumb grad`, which keeps an f32 file's x in f32.
#[derive(Clone, Debug, PartialEq)]
pub struct Batch<X = Array2<f64>> {
    pub x: X,
    pub y: Array2<f64>,
}

impl Batch<Features> {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.x.inputs().nrows()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// A batch's x as a file stored it: f64, or f32 kept narrow. A batch of 8,192 images of 784
/// pixels is 26 MB in f32 and 51 MB widened to f64, all of it fresh pages; a first dense layer
/// reads the f32 values a block of samples at a time instead ([`Inputs::F32`]).
#[derive(Clone, Debug, PartialEq)]
pub enum Features {
    F64(Array2<f64>),
    F32(Array2<f32>),
}

impl Features {
    /// The values as the whole-batch gradient reads them.
    pub fn inputs(&self) -> Inputs<'_, f64> {
        match self {
            Features::F64(x) => Inputs::Own(x.view()),
            Features::F32(x) => Inputs::F32(x.view()),
        }
    }

    /// The values in f64 (each f32 widened exactly).
    pub fn into_f64(self) -> Array2<f64> {
        match self {
            Features::F64(x) => x,
            Features::F32(x) => x.mapv(f64::from),
        }
    }
}

/// x of a whole-batch gradient ([`Graph::gradient`]): in the pass's own scalar, or f32 values
/// that the first layer widens where it reads them (the pass's arithmetic is the same as on the
/// widened batch: every f32 is exactly an f64).
#[derive(Clone, Copy, Debug)]
pub enum Inputs<'a, S> {
    Own(ArrayView2<'a, S>),
    F32(ArrayView2<'a, f32>),
}

impl<'a, S> From<&'a Array2<S>> for Inputs<'a, S> {
    fn from(x: &'a Array2<S>) -> Self {
        Inputs::Own(x.view())
    }
}

impl<'a> From<&'a Features> for Inputs<'a, f64> {
    fn from(x: &'a Features) -> Self {
        x.inputs()
    }
}

impl<'a, S> From<ArrayView2<'a, S>> for Inputs<'a, S> {
    fn from(x: ArrayView2<'a, S>) -> Self {
        Inputs::Own(x)
    }
}

impl<S: Scalar> Inputs<'_, S> {
    /// The batch in the pass's scalar: a copy widened from f32 (an f32 value is exact in f64).
    pub fn widened(&self) -> Array2<S> {
        match self {
            Inputs::Own(x) => x.to_owned(),
            Inputs::F32(x) => x.mapv(|v| S::from_f64(f64::from(v))),
        }
    }

    pub fn nrows(&self) -> usize {
        match self {
            Inputs::Own(x) => x.nrows(),
            Inputs::F32(x) => x.nrows(),
        }
    }
}

impl Inputs<'_, f64> {
    /// The batch in f32: as a file stored it (no copy), or each f64 value rounded.
    pub fn in_f32(&self) -> CowArray<'_, f32, Ix2> {
        match *self {
            Inputs::F32(x) => x.into(),
            Inputs::Own(x) => x.mapv(|v| v as f32).into(),
        }
    }

    /// The batch in f64: as given (no copy), or each f32 value widened (exactly).
    pub fn in_f64(&self) -> CowArray<'_, f64, Ix2> {
        match *self {
            Inputs::Own(x) => x.into(),
            Inputs::F32(x) => x.mapv(f64::from).into(),
        }
    }
}

impl Batch {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.x.nrows()
    }

    pub fn is_empty(&self) -> bool {
        self.x.nrows() == 0
    }

    /// The batch in another scalar type (f32 for a single-precision run; complex or dual with no
    /// perturbation part).
    pub fn cast<S: Scalar>(&self) -> (Array2<S>, Array2<S>) {
        (self.x.mapv(S::from_f64), self.y.mapv(S::from_f64))
    }

    /// A seeded synthetic batch of `m` samples for a graph, used when no data file is given. x:
    /// standard-normal values, or token ids drawn uniformly from 0..vocabulary for a token input.
    /// y: what the loss accepts — one-hot classes for a softmax output (one per step for a
    /// per-step output), 0/1 for a sigmoid output, standard-normal values otherwise. On a graph of
    /// dense layers it is the batch plumb's dense engine drew for the same network, so seeded runs
    /// keep their numbers.
    pub fn graph_synthetic(graph: &Graph, m: usize, seed: u64) -> Batch {
        let mut rng = Rng::new(seed ^ 0x5eed_da7a);
        let x = match graph.input() {
            Shape::Tokens { steps, vocabulary } => {
                Array2::from_shape_fn((m, steps), |_| rng.below(vocabulary) as f64)
            }
            input => Array2::from_shape_fn((m, input.size()), |_| rng.normal()),
        };
        let output = graph.output();
        let activation = graph
            .nodes()
            .last()
            .map_or(Activation::Identity, |n| n.activation);
        let mut y = Array2::zeros((m, output.size()));
        match activation {
            Activation::Softmax => {
                // A softmax is over each step's vector ([steps, classes]) or the whole output.
                let rows = output.rows();
                let classes = output.size() / rows;
                for mut sample in y.rows_mut() {
                    for r in 0..rows {
                        sample[r * classes + rng.below(classes)] = 1.0;
                    }
                }
            }
            Activation::Sigmoid => y.mapv_inplace(|_| if rng.uniform() < 0.5 { 0.0 } else { 1.0 }),
            _ => y.mapv_inplace(|_| rng.normal()),
        }
        Batch { x, y }
    }
}
