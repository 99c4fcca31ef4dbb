//! The report of `plumb check` on a layer graph: the dense report's shape ([`CheckReport`]) with
//! each coordinate named by (tensor, flat index) and the layer's own words for it
//! (`Kind::locate`), built by the dense report's verdict rules.

use plumb_engine::graph::Graph;
use plumb_report::{
    Finding, SCHEMA_VERSION, Severity, StripSeries, Verdict, figure, number as num,
};
use serde::{Deserialize, Serialize};

use super::check::{CheckReport, Code, CoverageReport, DirectionReport, TensorReport, remedies};
use super::{GraphLoaded, graph_description_hash};
use crate::{
    CheckConfig, CheckError, FLOOR, GraphCheck, OutsideCoord, Progress, SETTLE, Settlement, Status,
    UNSETTLED_SHARE, check_graph, worst_first,
};

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
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct GraphCoordReport {
    #[serde(flatten)]
    pub place: GraphPlace,
    #[serde(deserialize_with = "figure")]
    pub analytic: f64,
    #[serde(deserialize_with = "figure")]
    pub numeric: f64,
    #[serde(deserialize_with = "figure")]
    pub abs_error: f64,
    #[serde(deserialize_with = "figure")]
    pub rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub bound: f64,
    /// The bound over max(|a|, |n|, floor), comparable with `rel_error`.
    #[serde(deserialize_with = "figure")]
    pub rel_bound: f64,
    #[serde(deserialize_with = "figure")]
    pub step: f64,
    pub status: Status,
    pub retried: bool,
}

/// The report of a graph check.
pub type GraphCheckReport = CheckReport<GraphCoordReport>;

/// The layer's words for flat index `index` of graph tensor `t`.
pub fn locate(graph: &Graph, t: usize, index: usize) -> String {
    let spec = &graph.tensors()[t];
    let node = &graph.nodes()[spec.layer];
    node.layer.locate(t - node.tensors().start, index)
}

fn coord_report(graph: &Graph, r: &GraphCheck, c: &OutsideCoord) -> GraphCoordReport {
    let den = c
        .analytic
        .abs()
        .max(c.numeric.abs())
        .max(r.floors.get(c.tensor).copied().unwrap_or(0.0));
    GraphCoordReport {
        place: GraphPlace::new(graph, c.tensor, c.index),
        analytic: c.analytic,
        numeric: c.numeric,
        abs_error: c.abs_error,
        rel_error: c.rel_error,
        bound: c.bound,
        rel_bound: if den > 0.0 { c.bound / den } else { 0.0 },
        step: c.step,
        status: c.status,
        retried: c.retried,
    }
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

fn median(v: &[f64]) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let n = s.len();
    if n % 2 == 1 {
        s[n / 2]
    } else {
        0.5 * (s[n / 2 - 1] + s[n / 2])
    }
}

/// The report of a graph check's results, by the dense report's rules: a tensor fails on a
/// mismatch of a coordinate or a direction over it, and is inconclusive when more than the share a
/// check may leave open is unsettled.
pub fn build_graph(
    facts: &super::RunFacts,
    graph: &Graph,
    result: &GraphCheck,
    worst_n: usize,
) -> GraphCheckReport {
    let mut findings = Vec::new();
    let mut tensors = Vec::new();
    let mut all_conclusive = true;
    let mut series = Vec::new();
    for (t, spec) in graph.tensors().iter().enumerate() {
        let parameters: usize = spec.spec.shape.iter().product();
        let mut coords: Vec<&OutsideCoord> =
            result.coords.iter().filter(|c| c.tensor == t).collect();
        let dirs: Vec<_> = result
            .directions
            .iter()
            .filter(|d| d.tensor == Some(t))
            .collect();
        let reports: Vec<GraphCoordReport> = coords
            .iter()
            .map(|c| coord_report(graph, result, c))
            .collect();
        let rel: Vec<f64> = reports.iter().map(|c| c.rel_error).collect();
        let bounds: Vec<f64> = reports.iter().map(|c| c.rel_bound).collect();
        let (d2, a2) = coords.iter().fold((0.0, 0.0), |(d, a), c| {
            (d + (c.analytic - c.numeric).powi(2), a + c.analytic.powi(2))
        });
        let count = |s: Status| coords.iter().filter(|c| c.status == s).count();
        let (mismatches, unreliable, unsettled) = (
            count(Status::Mismatch),
            count(Status::Unreliable),
            count(Status::Unsettled),
        );
        let direction_mismatches = dirs.iter().filter(|d| d.status == Status::Mismatch).count();
        let settled = Settlement::of(coords.iter().map(|c| c.status));
        let settled_dirs = Settlement::of(dirs.iter().map(|d| d.status));
        let checked = coords.len();
        let conclusive =
            settled.conclusive() && (checked >= parameters || settled_dirs.conclusive());
        all_conclusive &= conclusive;
        coords.sort_by(|a, b| worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
        let worst: Vec<GraphCoordReport> = coords
            .iter()
            .take(3)
            .map(|c| coord_report(graph, result, c))
            .collect();
        let layer = spec.layer + 1;
        if mismatches > 0 {
            let w = &worst[0];
            findings.push(
                Finding::new(
                    Code::GradientMismatch,
                    Severity::Error,
                    format!(
                        "{mismatches} of {checked} checked coordinates disagree beyond what {} differences can explain; worst at {} ({}): analytic {:.9e}, numeric {:.9e}, relative error {}, relative bound {}",
                        result.method,
                        w.place.label(),
                        w.place.location,
                        w.analytic,
                        w.numeric,
                        num(w.rel_error),
                        num(w.rel_bound),
                    ),
                )
                .tensor(&spec.name)
                .layer(layer)
                .figure("mismatches", mismatches)
                .figure("checked", checked)
                .figure("max_rel_error", rel.iter().copied().fold(0.0, f64::max)),
            );
        }
        if direction_mismatches > 0 {
            findings.push(
                Finding::new(
                    Code::DirectionMismatch,
                    Severity::Error,
                    format!(
                        "{direction_mismatches} of {} random directions over this tensor disagree: its gradient is wrong somewhere, checked coordinate or not",
                        dirs.len()
                    ),
                )
                .tensor(&spec.name)
                .layer(layer)
                .figure("direction_mismatches", direction_mismatches),
            );
        }
        if settled.unsettled > 0 || settled_dirs.unsettled > 0 {
            findings.push(
                Finding::new(
                    Code::Unsettled,
                    if conclusive { Severity::Note } else { Severity::Warning },
                    format!(
                        "{} of {checked} checked coordinates ({unreliable} unreliable at kinks) and {} of {} directions are unsettled: {} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        settled.unsettled,
                        settled_dirs.unsettled,
                        dirs.len(),
                        result.method,
                        result.precision.name(),
                        SETTLE * 100.0,
                        if conclusive {
                            format!("; within the {}% a check may leave open", UNSETTLED_SHARE * 100.0)
                        } else {
                            format!("; more than the {}% a check may leave open, so this tensor is inconclusive", UNSETTLED_SHARE * 100.0)
                        }
                    ),
                )
                .tensor(&spec.name)
                .layer(layer)
                .figure("unsettled", unsettled)
                .figure("unreliable", unreliable)
                .figure("checked", checked)
                .figure("settled_share", settled.share())
                .figure("unsettled_directions", settled_dirs.unsettled),
            );
        }
        if unreliable > 0 {
            findings.push(
                Finding::new(
                    Code::KinkUnreliable,
                    Severity::Note,
                    format!(
                        "{unreliable} coordinate(s) cross a non-smooth point (a ReLU-like kink, a max-pool window's maximum) at every step tried (down to 1/1000 of the default), so finite differences cannot judge them; not counted as mismatches"
                    ),
                )
                .tensor(&spec.name)
                .layer(layer)
                .figure("unreliable", unreliable),
            );
        }
        series.push(StripSeries {
            label: spec.name.clone(),
            values: rel.clone(),
            bounds: bounds.clone(),
        });
        tensors.push(TensorReport {
            name: spec.name.clone(),
            layer,
            parameters,
            checked,
            max_rel_error: rel.iter().copied().fold(0.0, f64::max),
            median_rel_error: median(&rel),
            norm_rel_error: if a2 > 0.0 {
                (d2 / a2).sqrt()
            } else {
                d2.sqrt()
            },
            gradient_norm: facts.gradient_norms.get(t).copied().unwrap_or(f64::NAN),
            max_bound: bounds.iter().copied().fold(0.0, f64::max),
            median_bound: median(&bounds),
            mismatches,
            unreliable,
            unsettled,
            settled_share: settled.share(),
            directions: dirs.len(),
            direction_mismatches,
            verdict: if mismatches > 0 || direction_mismatches > 0 {
                Verdict::Fail
            } else if !conclusive {
                Verdict::Inconclusive
            } else {
                Verdict::Pass
            },
            worst,
        });
    }
    let global: Vec<_> = result
        .directions
        .iter()
        .filter(|d| d.tensor.is_none())
        .collect();
    let global_bad = global
        .iter()
        .filter(|d| d.status == Status::Mismatch)
        .count();
    if global_bad > 0 {
        findings.push(
            Finding::new(
                Code::DirectionMismatch,
                Severity::Error,
                format!("{global_bad} random directions over the whole network disagree with the gradient"),
            )
            .figure("direction_mismatches", global_bad),
        );
    }
    let global_settled = Settlement::of(global.iter().map(|d| d.status));
    let all_checked = result.coverage.checked >= result.coverage.parameters;
    let conclusive = (global_settled.conclusive() || all_checked) && all_conclusive;
    if !conclusive {
        let all = Settlement::of(result.coords.iter().map(|c| c.status));
        let unreliable = result
            .coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        findings.push(
            Finding::new(
                Code::Inconclusive,
                Severity::Warning,
                format!(
                    "{} of {} checked coordinates and {} of {} directions over the whole network are unsettled: more than the {}% a check may leave open, so it can neither pass nor fail. What would settle them: {}",
                    all.unsettled,
                    all.checked,
                    global_settled.unsettled,
                    global_settled.checked,
                    UNSETTLED_SHARE * 100.0,
                    remedies(result.method, result.precision, unreliable, all.unsettled)
                ),
            )
            .figure("unsettled", all.unsettled)
            .figure("checked", all.checked)
            .figure("settled_share", all.share()),
        );
    }
    let retried = result.coords.iter().filter(|c| c.retried).count();
    if retried > 0 {
        findings.push(
            Finding::new(
                Code::KinkRetried,
                Severity::Note,
                format!("{retried} coordinates crossed a non-smooth point at the default step and were checked with a smaller one"),
            )
            .figure("retried", retried),
        );
    }
    let mut order: Vec<&OutsideCoord> = result.coords.iter().collect();
    order.sort_by(|a, b| worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
    let worst = order
        .iter()
        .take(worst_n)
        .map(|c| coord_report(graph, result, c))
        .collect();
    let directions = result
        .directions
        .iter()
        .map(|d| DirectionReport {
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
        })
        .collect();
    let step_rule = match facts.step {
        Some(h) => format!("fixed h = {h:e} (--step)"),
        None => result
            .method
            .step_rule(result.precision.epsilon())
            .to_string(),
    };
    CheckReport {
        verdict: Verdict::of_check(&findings, conclusive),
        schema_version: SCHEMA_VERSION,
        command: "check".into(),
        description: facts.description.clone(),
        description_hash: facts.description_hash.clone(),
        weights: facts.weights.clone(),
        data: facts.data.clone(),
        seed: facts.seed,
        samples: facts.samples,
        method: result.method.name().into(),
        step_rule,
        precision: result.precision.name().into(),
        tolerance: result.tolerance,
        floor_fraction: FLOOR,
        loss: result.loss,
        coverage: CoverageReport {
            sample: result.coverage.sample.to_string(),
            default_sample: result.coverage.default_sample,
            parameters: result.coverage.parameters,
            checked: result.coverage.checked,
            directions_per_part: result.coverage.directions,
        },
        shard: facts.shard.map(|(k, n)| [k, n]),
        floors: result.floors.clone(),
        tensors,
        worst,
        coordinates: None,
        directions,
        findings,
        rel_errors: series,
    }
}
