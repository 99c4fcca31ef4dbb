//! The reports of `plumb check`, `plumb merge`, `plumb sweep` and `plumb grad`: typed (serialised as docs/json.md says, and read
//! back by merge), built from the checker's results by the rules here, so that the command line
//! only parses, calls, renders and exits.

mod check;
mod grad;
mod graph_check;
mod graph_loaded;
mod locate;
mod place;
mod shards;
mod sweep;

pub use check::{
    CheckReport, Code, CoordReport, CoverageReport, DirectionReport, Location, MAX_DIRECTIONS,
    RunFacts, TensorReport, remedies,
};
pub use grad::{
    GradReport, Gradient, TensorGradient, dense_input_gradient, gradient_report,
    graph_gradient_report,
};
pub use graph_check::{GraphCheckReport, GraphCoordReport, build_graph, graph_check_report};
pub use graph_loaded::{
    GraphInputs, GraphLoadError, GraphLoaded, MAX_ACTIVATION_VALUES, MAX_SYNTHETIC_VALUES,
    graph_description_hash, widest_float,
};
pub use locate::{Place, Tensors};
pub use place::{GraphPlace, Places, location as graph_location};
pub use shards::{MAX_SHARDS, ShardError, Shards, fuzz_shard, shard_description};
pub use sweep::{CoordSweep, MethodCurve, SweepAsk, SweepReport, sweep_report};

use plumb_engine::{Batch, Weights};
use plumb_formats::Description;
use plumb_report::{DataSource, WeightsSource};

/// What a run of the reference engine is on — the description, the weights and the batch — and
/// where the weights and the data came from, as reports name them.
pub struct Loaded {
    pub desc: Description,
    pub weights: Weights<f64>,
    pub weights_source: WeightsSource,
    pub batch: Batch,
    pub data_source: DataSource,
}

/// The network's identity: an FNV-1a hash (64 bits) of the canonical description, stable across
/// versions and machines; a shard and a baseline carry it so that a changed description is seen.
pub fn description_hash(desc: &Description) -> String {
    let text = desc.to_toml("");
    let hash = text.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    });
    format!("{hash:016x}")
}
