//! An outside gradient against the reference gradient, tensor by tensor, and the diagnosis of a
//! wrong one by hypothesis: for each mistake of the catalogue (docs/mistakes.md) the reference
//! engine computes the gradient that mistake would produce, and the one that reproduces a tensor to
//! a tight residual is named for it.
//!
//! The reference and the hypotheses are the layer graph's (`plumb_engine::graph`, every kind):
//! [`judge_graph`] judges the graph's canonical tensors, [`judge_files`] the weight file's own
//! tensors (a dense layout's augmented matrices, transposed weights, its names); both go through
//! one verdict rule ([`judge`] over a [`Hypotheses`] source).
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
mod file_view;
mod graph;
mod judge;
mod names;
pub mod report;

pub use catalogue::{CONSTANT_FACTOR, Hypothesis};
pub use compare::{TensorComparison, compare_tensor};
pub use diagnose::{Diagnosis, Hypotheses, diagnose};
pub use file_view::{file_places, judge_files};
pub use graph::{GraphProblem, INPUT, judge_graph};
pub use judge::{Expected, TensorJudgement, Tolerances, holds_only_f32, judge};
pub use names::{
    Binding, HABITS, Matched, NameError, bind_gradient, match_names, may_bind, parse_map,
};
