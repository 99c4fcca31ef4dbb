//! The reports of `plumb check`, `plumb merge`, `plumb sweep` and `plumb grad`: typed (serialised as docs/json.md says, and read
//! back by merge), built from the checker's results by the rules here, so that the command line
//! only parses, calls, renders and exits.

mod check;
mod grad;
mod graph_check;
mod graph_loaded;
mod place;
mod shards;
mod sweep;

pub use check::{
    CheckReport, Code, CoordReport, CoverageReport, DirectionReport, Location, MAX_DIRECTIONS,
    RunFacts, TensorReport, remedies,
};
pub use grad::{GradError, GradReport, Gradient, TensorGradient, graph_gradient_report};
pub use graph_check::{GraphCheckReport, GraphCoordReport, build_graph, graph_check_report};
pub use graph_loaded::{
    GraphInputs, GraphLoadError, GraphLoaded, LoadedX, MAX_ACTIVATION_VALUES, MAX_SYNTHETIC_VALUES,
    Vet, description_hash, widest_float,
};
pub use place::{GraphPlace, Places, location as graph_location};
pub use shards::{MAX_SHARDS, ShardError, Shards, fuzz_shard, shard_description};
pub use sweep::{CoordSweep, MethodCurve, SweepAsk, SweepReport, sweep_report};
