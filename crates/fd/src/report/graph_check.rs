//! The report of `plumb check` on a layer graph: the dense report's shape ([`CheckReport`]) with
//! each coordinate named by (tensor, flat index) and the layer's own words for it
//! (`Kind::locate`), built by the one report builder of `check.rs`.

use plumb_engine::graph::Graph;
use serde::{Deserialize, Serialize};

use super::check::{CheckReport, Checked, CoordReport, DirectionReport, Location, build_report};
use super::{GraphLoaded, graph_description_hash};
use crate::{CheckConfig, CheckError, Entry, GraphCheck, OutsideCoord, Progress, check_graph};

/// A parameter of the graph located for people and for JSON (the graph's [`Place`](super::Place)).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct GraphPlace {
    /// The graph tensor (`layer.suffix`), its flat index in the canonical shape, and its 1-based
    /// layer.
    pub tensor: String,
    pub index: usize,
    pub layer: usize,
    /// The index in the layer's own terms (unit, channel, kernel position, gate, head).
    pub location: String,
}

impl GraphPlace {
    /// Flat index `index` of graph tensor `t`.
    pub fn new(graph: &Graph, t: usize, index: usize) -> GraphPlace {
        let spec = &graph.tensors()[t];
        GraphPlace {
            tensor: spec.name.clone(),
            index,
            layer: spec.layer + 1,
            location: locate(graph, t, index),
        }
    }

    /// `conv1.weight[17]`.
    pub fn label(&self) -> String {
        format!("{}[{}]", self.tensor, self.index)
    }
}

/// One coordinate of a graph check.
pub type GraphCoordReport = CoordReport<GraphPlace>;

/// The report of a graph check.
pub type GraphCheckReport = CheckReport<GraphCoordReport>;

impl Location for GraphPlace {
    const NON_SMOOTH: &'static str =
        "a non-smooth point (a ReLU-like kink, a max-pool window's maximum)";

    fn described(&self) -> String {
        format!("{} ({})", self.label(), self.location)
    }
}

/// The layer's words for flat index `index` of graph tensor `t`.
pub fn locate(graph: &Graph, t: usize, index: usize) -> String {
    let spec = &graph.tensors()[t];
    let node = &graph.nodes()[spec.layer];
    node.layer.locate(t - node.tensors().start, index)
}

/// The report row of a graph check's coordinate `c` (shared with `plumb merge`).
pub(super) fn coord_report(graph: &Graph, r: &GraphCheck, c: &OutsideCoord) -> GraphCoordReport {
    let Entry { tensor, index } = c.coord;
    let floor = r.floors.get(tensor).copied().unwrap_or(0.0);
    CoordReport::new(GraphPlace::new(graph, tensor, index), c, floor)
}

/// Runs the check of the graph's own gradient on loaded inputs and builds its report.
pub fn graph_check_report(
    loaded: &GraphLoaded,
    config: &CheckConfig,
    worst_n: usize,
    progress: Progress<'_>,
) -> Result<GraphCheckReport, CheckError> {
    let graph = &loaded.desc.graph;
    let b = &loaded.batch;
    let result = check_graph(
        graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        config,
        progress,
    )?;
    let facts = super::RunFacts {
        description: loaded.desc.path.clone(),
        description_hash: graph_description_hash(&loaded.desc),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        seed: config.seed,
        samples: b.len(),
        step: config.step,
        shard: config.shard,
        gradient_norms: result
            .analytic
            .iter()
            .map(|g| g.iter().map(|v| v * v).sum::<f64>().sqrt())
            .collect(),
    };
    Ok(build_graph(&facts, graph, &result, worst_n))
}

/// The report of a graph check's results, by the one builder of check reports.
pub fn build_graph(
    facts: &super::RunFacts,
    graph: &Graph,
    result: &GraphCheck,
    worst_n: usize,
) -> GraphCheckReport {
    let checked = Checked {
        method: result.method,
        precision: result.precision,
        loss: result.loss,
        tolerance: result.tolerance,
        coverage: &result.coverage,
        floors: &result.floors,
        tensors: graph
            .tensors()
            .iter()
            .map(|t| (t.name.clone(), t.layer + 1, t.spec.shape.iter().product()))
            .collect(),
        coords: result
            .coords
            .iter()
            .map(|c| (c.coord.tensor, coord_report(graph, result, c)))
            .collect(),
        directions: result
            .directions
            .iter()
            .map(|d| {
                let report = DirectionReport {
                    scope: d
                        .tensor
                        .map_or("all".to_string(), |t| graph.tensors()[t].name.clone()),
                    layer: d.tensor.map(|t| graph.tensors()[t].layer + 1),
                    bias: None,
                    analytic: d.analytic,
                    numeric: d.numeric,
                    rel_error: d.rel_error,
                    bound: d.bound,
                    status: d.status,
                    one_step: d.one_step,
                };
                (d.tensor, report)
            })
            .collect(),
    };
    build_report(facts, checked, worst_n)
}
