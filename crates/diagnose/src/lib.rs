//! An outside gradient against the reference gradient, tensor by tensor, and the diagnosis of a
//! wrong one by hypothesis: for each mistake of the catalogue (docs/mistakes.md) the reference
//! engine computes the gradient that mistake would produce, and the one that reproduces a tensor to
//! a tight residual is named for it.
//!
//! The crate works on named tensors in the weight file's own layout; the caller says how the
//! engine's augmented matrices map to them. [`judge_graph`] does the same on the layer graph
//! (`plumb_engine::graph`, every kind) with the graph's canonical tensors; both go through one
//! verdict rule ([`judge`] over a [`Hypotheses`] source).
//!
//! ```
//! use plumb_diagnose::compare_tensor;
//! use plumb_formats::Tensor;
//!
//! let reference = Tensor::new("layer1", vec![2, 2], vec![1.0, -2.0, 0.5, 4.0]);
//! let outside = Tensor::new("layer1", vec![2, 2], vec![-1.0, 2.0, -0.5, -4.0]);
//! let c = compare_tensor(&outside, &reference, 1e-6, 0.4);
//! assert!(!c.matches);
//! assert!((c.scale + 1.0).abs() < 1e-15 && (c.cosine + 1.0).abs() < 1e-15);
//! ```

mod catalogue;
mod compare;
mod diagnose;
mod graph;
mod judge;
mod names;
pub mod report;

pub use catalogue::{CATALOGUE, CONSTANT_FACTOR, Hypothesis, Mistake, Problem};
pub use compare::{TensorComparison, compare_tensor};
pub use diagnose::{Diagnosis, Hypotheses, diagnose};
pub use graph::{GraphProblem, INPUT, judge_graph};
pub use judge::{Expected, TensorJudgement, Tolerances, holds_only_f32, judge};
pub use names::{Binding, HABITS, Matched, NameError, bind_gradient, match_names, parse_map};
