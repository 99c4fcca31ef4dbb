//! The reference engine: plumb's own forward pass and analytic backpropagation, on a graph of
//! layer kinds ([`graph`]: dense, convolution, pooling, normalisation, residual additions,
//! recurrent cells, attention, embeddings; docs/engine.md).
//!
//! The engine knows nothing of files. It is generic over its [`Scalar`], so the same code computes in
//! f64 (the reference), f32, complex numbers (for the complex-step derivative) and, with the `dual`
//! feature, num-dual's dual numbers. Every pass works on a whole batch at once (one sample per row).
//!
//! ```
//! use plumb_engine::graph::{Dense, GraphBuilder, LossConfig, Shape};
//! use plumb_engine::{Activation, Batch, Init, Rng};
//!
//! let mut b = GraphBuilder::new(Shape::Flat(4), LossConfig { l2: 0.01, ..LossConfig::cross_entropy() });
//! b.push(None, Activation::Tanh, |s| Dense::new(5, s))?;
//! b.push(None, Activation::Softmax, |s| Dense::new(3, s))?;
//! let net = b.finish()?;
//! let params = Init::GlorotUniform.graph_params(&net, &mut Rng::new(1));
//! let batch = Batch::graph_synthetic(&net, 8, 1);
//! let g = net.gradient(&params, batch.x.view(), batch.y.view(), None);
//! assert!(g.loss > 0.0);
//! assert_eq!(g.params[0].shape(), &[5, 4]); // layer 1's weight: 5 units × 4 inputs
//! assert_eq!(g.params[1].shape(), &[5]); // and its bias
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```

mod activation;
mod batch;
mod convention;
mod elementary;
pub mod graph;
mod init;
mod loss;
mod product;
mod rng;
mod scalar;

pub use activation::Activation;
pub use batch::{Batch, Features, Inputs};
pub use convention::{Conventions, L2Divisor, Reduction};
pub use init::Init;
pub use loss::Loss;
pub use rng::Rng;
pub use scalar::Scalar;
