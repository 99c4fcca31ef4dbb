//! Finite-difference checks of a gradient against the reference engine's loss.
//!
//! Methods: central, forward, five-point, Ridders' extrapolation and the complex step, each with an
//! error bound of its own, so that a coordinate is only called a mismatch when the disagreement is
//! more than the method can explain. Perturbing one weight recomputes only what it changes (the
//! layer graph's incremental hints, `Graph::forward_moved`), in parallel over coordinates, with
//! results independent of the thread count.
//!
//! Two entry points share one verdict rule ([`Rule`], [`relative_floor`], [`Status`]):
//! `check_external` for an outside program's loss, and `check_graph` for the layer graph — which
//! is the outside check's core run on a loss whose inside plumb knows (its branches at kinks,
//! complex arithmetic for the complex step), with coordinates (tensor, flat index) from
//! [`select_tensors`] and directions from [`directions`].
//!
//! ```
//! use plumb_engine::graph::{Dense, GraphBuilder, LossConfig, Shape};
//! use plumb_engine::{Activation, Batch, Init, Rng};
//! use plumb_fd::{CheckConfig, Method, Precision, Status, check_graph};
//!
//! let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig { l2: 0.1, ..LossConfig::cross_entropy() });
//! b.push(None, Activation::Tanh, |s| Dense::new(4, s))?;
//! b.push(None, Activation::Softmax, |s| Dense::new(2, s))?;
//! let net = b.finish()?;
//! let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(1));
//! let batch = Batch::graph_synthetic(&net, 5, 1);
//! let config = CheckConfig::new(Method::Central, Precision::F64);
//! let result = check_graph(&net, &w, batch.x.view(), batch.y.view(), &config, &|_, _| {})?;
//! assert!(result.coords.iter().all(|c| c.status == Status::Match));
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```

mod allocator;
mod check;
mod coverage;
mod direction;
mod external;
mod floor;
mod graph_check;
mod gross;
mod method;
mod order;
pub mod report;
mod sweep;

pub use allocator::keep_freed_memory;
pub use check::{
    BEND_SHARE, CheckConfig, CheckError, CoordCheck, Coverage, DEFAULT_DIRECTIONS, NOISE,
    Precision, Progress, Rule, SETTLE, Settlement, Status, UNSETTLED_SHARE, loss_noise,
};
pub use coverage::{DEFAULT_PER_LAYER, FULL_CHECK_LIMIT, Sample, select_tensors};
pub use direction::{Direction, directions};
pub use external::{
    AlongVerdict, Change, Entry, ExternalConfig, ExternalResult, Inside, Losses, OutsideCoord,
    OutsideDirection, OutsideTensor, check_external, select_flat,
};
pub use floor::{FLOOR, ROUND_OFF, relative_floor};
pub use graph_check::{
    GraphCheck, check_graph, check_graph_gradient, graph_sample,
    loss_magnitude as graph_loss_magnitude, sweep_graph,
};
pub use gross::graph_gradient_magnitude;
pub use method::{
    Estimate, Method, ONE_STEP_BAND, ONE_STEP_BOUND, Target, complex_estimate,
    second_difference_steps, smooth_across,
};
pub use order::{worse_error, worst_first};
pub use sweep::{Curve, SweepPlan, steps};
