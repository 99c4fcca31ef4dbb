//! A batch of samples: features and targets, one sample per row.

use ndarray::Array2;

use crate::{Activation, Network, Rng, Scalar};

/// Features (m × input features) and targets (m × outputs), in f64 as read from a file.
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

    /// A seeded synthetic batch for a network, used when no data file is given: standard-normal
    /// features, and targets the loss accepts — one-hot classes for softmax outputs, 0/1 for
    /// sigmoid outputs with cross-entropy, standard-normal values otherwise.
    pub fn synthetic(network: &Network, m: usize, seed: u64) -> Batch {
        let mut rng = Rng::new(seed ^ 0x5eed_da7a);
        let x = Array2::from_shape_fn((m, network.inputs()), |_| rng.normal());
        let k = network.outputs();
        let output = network.layers()[network.layers().len() - 1].activation;
        let mut y = Array2::zeros((m, k));
        match output {
            Activation::Softmax => {
                for mut row in y.rows_mut() {
                    row[rng.below(k)] = 1.0;
                }
            }
            Activation::Sigmoid => y.mapv_inplace(|_| if rng.uniform() < 0.5 { 0.0 } else { 1.0 }),
            _ => y.mapv_inplace(|_| rng.normal()),
        }
        Batch { x, y }
    }
}
