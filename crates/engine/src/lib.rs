//! The reference engine: plumb's own forward pass and analytic backpropagation for a dense network.
//!
//! The engine knows nothing of files. It is generic over its [`Scalar`], so the same code computes in
//! f64 (the reference), f32, complex numbers (for the complex-step derivative) and, with the `dual`
//! feature, num-dual's dual numbers. Every pass works on a whole batch at once (one sample per row)
//! with matrix products.
//!
//! [`graph`] is the layer graph (convolution, pooling, normalisation, residual additions) that
//! replaces the dense network step by step (docs/engine.md); nothing outside the engine uses it yet.
//!
//! ```
//! use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng};
//!
//! let net = Network::new(4, &[(5, Activation::Tanh), (3, Activation::Softmax)], Loss::CrossEntropy, 0.01)?;
//! let weights = Init::GlorotUniform.weights(&net, &mut Rng::new(1));
//! let batch = Batch::synthetic(&net, 8, 1);
//! let (loss, grad) = net.gradient(&weights, batch.x.view(), batch.y.view());
//! assert!(loss > 0.0);
//! assert_eq!(grad.layer(0).dim(), (5, 5)); // 5 units × (4 inputs + bias)
//! # Ok::<(), plumb_engine::NetworkError>(())
//! ```

mod activation;
mod batch;
mod convention;
mod elementary;
pub mod graph;
mod init;
mod loss;
mod network;
mod product;
mod rng;
mod scalar;
mod variant;
mod weights;

pub use activation::Activation;
pub use batch::Batch;
pub use convention::{Conventions, L2Divisor, Reduction};
pub use init::Init;
pub use loss::Loss;
pub use network::{LayerSpec, Network, NetworkError, Trace};
pub use rng::Rng;
pub use scalar::Scalar;
pub use variant::{Regularization, Samples, Variant};
pub use weights::{Coord, Weights};
