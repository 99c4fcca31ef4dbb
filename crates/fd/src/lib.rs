//! Finite-difference checks of a gradient against the reference engine's loss.
//!
//! Methods: central, forward, five-point, Ridders' extrapolation and the complex step, each with an
//! error bound of its own, so that a coordinate is only called a mismatch when the disagreement is
//! more than the method can explain. Perturbing one weight recomputes only what it changes (see
//! `evaluate`), in parallel over coordinates, with results independent of the thread count.
//!
//! Three entry points share one verdict rule ([`Rule`], [`relative_floor`], [`Status`]): `check`
//! for the dense engine, `check_external` for an outside program's loss, and `check_graph` for
//! the layer graph — which is the outside check's core run on a loss whose inside plumb knows
//! (its branches at kinks, complex arithmetic for the complex step), with coordinates
//! (tensor, flat index) from [`select_tensors`] and directions from [`directions`].
//!
//! ```
//! use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng};
//! use plumb_fd::{CheckConfig, Method, Precision, Status, check};
//!
//! let net = Network::new(3, &[(4, Activation::Tanh), (2, Activation::Softmax)], Loss::CrossEntropy, 0.1)?;
//! let w = Init::GlorotUniform.weights(&net, &mut Rng::new(1));
//! let batch = Batch::synthetic(&net, 5, 1);
//! let result = check(&net, &w, &batch, &CheckConfig::new(Method::Central, Precision::F64), &|_, _| {})?;
//! assert!(result.coords.iter().all(|c| c.status == Status::Match));
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```

mod allocator;
mod check;
mod coverage;
mod direction;
mod evaluate;
mod external;
mod floor;
mod graph_check;
mod gross;
mod method;
mod order;
mod part;
pub mod report;
mod sweep;

pub use allocator::keep_freed_memory;
pub use check::{
    CheckConfig, CheckError, CheckResult, CoordCheck, Coverage, DEFAULT_DIRECTIONS, DirectionCheck,
    NOISE, Precision, Progress, Rule, SETTLE, Scope, Settlement, Status, UNSETTLED_SHARE, check,
    check_gradient,
};
pub use coverage::{DEFAULT_PER_LAYER, FULL_CHECK_LIMIT, Sample, select, select_tensors};
pub use direction::{Direction, directions};
pub use evaluate::{Base, full_loss};
pub use external::{
    Change, Entry, ExternalConfig, ExternalResult, Inside, Losses, OutsideCoord, OutsideDirection,
    OutsideTensor, check_external, select_flat,
};
pub use floor::{FLOOR, ROUND_OFF, relative_floor};
pub use graph_check::{
    GraphCheck, check_graph, check_graph_gradient, graph_sample,
    loss_magnitude as graph_loss_magnitude, sweep_graph,
};
pub use gross::{gradient_magnitude, graph_gradient_magnitude, loss_magnitude};
pub use method::{
    Estimate, Method, ONE_STEP_BAND, ONE_STEP_BOUND, Target, complex_estimate,
    second_difference_steps, smooth_across,
};
pub use order::{worse_error, worst_first};
pub use part::Part;
pub use sweep::{Curve, SweepPlan, steps, sweep};
