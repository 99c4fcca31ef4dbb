//! A batch of samples: features and targets, one sample per row.

use ndarray::Array2;

use crate::graph::{Graph, Shape};
use crate::{Activation, Rng, Scalar};

/// Inputs and targets, one sample per row, in f64 as read from a file. For the layer graph, x is
/// m × the input's size and y m × the output's size, each row in C order of its [`Shape`]
/// (token ids as whole numbers; an `output = "all"` sequence's targets step by step).
#[derive(Clone, Debug, PartialEq)]
pub struct Batch {
    pub x: Array2<f64>,
    pub y: Array2<f64>,
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
