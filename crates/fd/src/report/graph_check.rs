//! The report of `plumb check` on a layer graph (a dense description's too): one tensor per
//! tensor of the weight file, each coordinate named by (file tensor, flat index there) and the
//! layer's own words for it ([`Places`]), built by the one report builder of `check.rs`.

use super::GraphLoaded;
use super::check::{CheckReport, Checked, CoordReport, DirectionReport, Location, build_report};
use super::graph_loaded::value_place;
use super::place::{GraphPlace, Places};
use crate::check::{DATA_HINT, SCALE_HINT, past_f32, token_past_f32};
use crate::{CheckConfig, CheckError, Entry, GraphCheck, OutsideCoord, Progress, check_graph};

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

/// The report row of a graph check's coordinate `c` (shared with `plumb merge`).
pub(super) fn coord_report(places: &Places, r: &GraphCheck, c: &OutsideCoord) -> GraphCoordReport {
    let Entry { tensor, index } = c.coord;
    let floor = r.floors.get(tensor).copied().unwrap_or(0.0);
    CoordReport::new(places.place(tensor, index), c, floor)
}

/// Runs the check of the graph's own gradient on loaded inputs and builds its report.
/// A check error said where the user can find it: a parameter at its place in the weight file,
/// a sample at its file and line, the weights (and the data, for a loss that overflows).
pub(crate) fn said_where<X>(loaded: &GraphLoaded<X>, e: CheckError) -> CheckError {
    match e {
        CheckError::ParamBeyondF32 {
            tensor,
            index,
            value,
            ..
        } => {
            let at = Places::new(&loaded.desc).place(tensor, index);
            CheckError::Unusable(format!(
                "{}: tensor `{}` index {} (layer {}, {}) {}",
                loaded.weights_source.describe(),
                at.tensor,
                at.index,
                at.layer,
                at.location,
                past_f32(value, SCALE_HINT)
            ))
        }
        CheckError::DataBeyondF32 {
            sample,
            column,
            of,
            value,
        } => CheckError::Unusable(format!(
            "{} {}",
            value_place(loaded, of, sample, column),
            past_f32(value, DATA_HINT)
        )),
        CheckError::TokenBeyondF32 { sample, step, id } => CheckError::Unusable(format!(
            "{} {}",
            value_place(loaded, "x", sample, step),
            token_past_f32(id)
        )),
        e @ CheckError::LossNotFinite { .. } => CheckError::Unusable(format!(
            "weights {}, data {}: {e}",
            loaded.weights_source.describe(),
            loaded.data_source.describe()
        )),
        CheckError::Unusable(why) => {
            CheckError::Unusable(format!("{}: {why}", loaded.weights_source.describe()))
        }
        other => other,
    }
}

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
    )
    .map_err(|e| said_where(loaded, e))?;
    let facts = super::RunFacts {
        description: loaded.desc.path.clone(),
        description_hash: loaded.description_hash.clone(),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        seed: config.seed,
        samples: b.len(),
        step: config.step,
        shard: config.shard,
        gradient_norms: loaded
            .desc
            .files
            .iter()
            .map(|f| {
                let sum: f64 = f
                    .tensors
                    .iter()
                    .flat_map(|&t| result.analytic[t].iter())
                    .map(|v| v * v)
                    .sum();
                sum.sqrt()
            })
            .collect(),
    };
    Ok(build_graph(
        &facts,
        &Places::new(&loaded.desc),
        &result,
        worst_n,
    ))
}

/// The report of a graph check's results, by the one builder of check reports.
pub fn build_graph(
    facts: &super::RunFacts,
    places: &Places,
    result: &GraphCheck,
    worst_n: usize,
) -> GraphCheckReport {
    let graph = places.graph();
    let checked = Checked {
        method: result.method,
        precision: result.precision,
        loss: result.loss,
        tolerance: result.tolerance,
        coverage: &result.coverage,
        floors: &result.floors,
        tensors: places
            .files()
            .iter()
            .enumerate()
            .map(|(f, file)| (file.name.clone(), file.layer + 1, places.file_size(f)))
            .collect(),
        coords: result
            .coords
            .iter()
            .map(|c| {
                (
                    places.file_of(c.coord.tensor),
                    coord_report(places, result, c),
                )
            })
            .collect(),
        directions: result
            .directions
            .iter()
            .map(|d| {
                let report = DirectionReport {
                    scope: d.tensor.map_or("all".to_string(), |t| places.span(t)),
                    layer: d.tensor.map(|t| graph.tensors()[t].layer + 1),
                    bias: d.tensor.and_then(|t| places.span_bias(t)),
                    analytic: d.analytic,
                    numeric: d.numeric,
                    rel_error: d.rel_error,
                    bound: d.bound,
                    status: d.status,
                    one_step: d.one_step,
                    wide: d.wide,
                };
                (d.tensor.map(|t| places.file_of(t)), report)
            })
            .collect(),
    };
    build_report(facts, checked, worst_n)
}
