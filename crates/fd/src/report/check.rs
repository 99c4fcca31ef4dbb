//! The report of `plumb check` (docs/json.md): its types, which `plumb merge` reads back, and the
//! rules that turn a check's results into tensors' verdicts and findings.

use std::path::PathBuf;

use plumb_engine::Weights;
use plumb_report::{
    DataSource, Finding, SCHEMA_VERSION, Severity, StripSeries, Verdict, WeightsSource, figure,
    number as num,
};
use serde::{Deserialize, Serialize};

use super::Loaded;
use super::locate::{Place, Tensors};
use crate::{
    CheckConfig, CheckError, CheckResult, FLOOR, Method, Part, Precision, Progress, SETTLE, Scope,
    Settlement, Status, UNSETTLED_SHARE, check, summarise, summary::coords_by_part,
};

/// A number in scientific notation with nine decimals (enough to see two close values differ).
struct Sci(f64);

impl std::fmt::Display for Sci {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{:.9e}", self.0)
    }
}

/// The most random directions per part a run takes (each costs four whole forward passes).
pub const MAX_DIRECTIONS: usize = 1000;

/// The codes of the check's findings (docs/json.md), written as their names.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Code {
    GradientMismatch,
    DirectionMismatch,
    /// Coordinates or directions neither a match nor a mismatch (a note or, past the share a check
    /// may leave open, a warning).
    Unsettled,
    KinkUnreliable,
    /// The whole check can neither pass nor fail.
    Inconclusive,
    KinkRetried,
}

impl Code {
    pub const fn name(self) -> &'static str {
        match self {
            Code::GradientMismatch => "gradient-mismatch",
            Code::DirectionMismatch => "direction-mismatch",
            Code::Unsettled => "unsettled",
            Code::KinkUnreliable => "kink-unreliable",
            Code::Inconclusive => "inconclusive",
            Code::KinkRetried => "kink-retried",
        }
    }
}

impl From<Code> for String {
    fn from(c: Code) -> String {
        c.name().to_string()
    }
}

/// One coordinate of the report.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CoordReport {
    #[serde(flatten)]
    pub place: Place,
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
    /// The bound over the relative error's denominator, max(|a|, |n|, floor): comparable with
    /// `rel_error`.
    #[serde(deserialize_with = "figure")]
    pub rel_bound: f64,
    #[serde(deserialize_with = "figure")]
    pub step: f64,
    pub status: Status,
    /// Whether a smaller step was needed to step off a kink.
    pub retried: bool,
}

/// One tensor of the report; `C` is how a coordinate is located (a dense [`CoordReport`], or a
/// graph's [`GraphCoordReport`](super::GraphCoordReport)).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct TensorReport<C = CoordReport> {
    pub name: String,
    pub layer: usize,
    pub parameters: usize,
    pub checked: usize,
    #[serde(deserialize_with = "figure")]
    pub max_rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub median_rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub norm_rel_error: f64,
    /// ‖∂J/∂(W, b)‖₂ over the whole tensor (the reference gradient).
    #[serde(deserialize_with = "figure")]
    pub gradient_norm: f64,
    #[serde(deserialize_with = "figure")]
    pub max_bound: f64,
    #[serde(deserialize_with = "figure")]
    pub median_bound: f64,
    pub mismatches: usize,
    pub unreliable: usize,
    /// Coordinates neither a match nor a mismatch: the method's bound exceeds a tenth of the value.
    pub unsettled: usize,
    /// The share of checked coordinates settled (a match or a mismatch).
    #[serde(deserialize_with = "figure")]
    pub settled_share: f64,
    pub directions: usize,
    pub direction_mismatches: usize,
    pub verdict: Verdict,
    pub worst: Vec<C>,
}

/// One direction of the report.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct DirectionReport {
    /// The tensor it spans, or "all" for a global direction.
    pub scope: String,
    /// The 1-based layer and part (bias weights or the others) it spans; null for a global one.
    pub layer: Option<usize>,
    pub bias: Option<bool>,
    #[serde(deserialize_with = "figure")]
    pub analytic: f64,
    #[serde(deserialize_with = "figure")]
    pub numeric: f64,
    #[serde(deserialize_with = "figure")]
    pub rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub bound: f64,
    pub status: Status,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CoverageReport {
    pub sample: String,
    pub default_sample: bool,
    pub parameters: usize,
    pub checked: usize,
    pub directions_per_part: usize,
}

/// The JSON report of `plumb check` (docs/json.md); `C` as for [`TensorReport`].
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(bound(deserialize = "C: Deserialize<'de>"))]
pub struct CheckReport<C = CoordReport> {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: String,
    pub description: PathBuf,
    /// The network's identity (docs/json.md, baselines): `plumb merge` checks the description
    /// it reads is the one the shards ran on.
    pub description_hash: String,
    pub weights: WeightsSource,
    pub data: DataSource,
    /// The seed of the sample, the directions and any initialised weights or synthetic data.
    pub seed: u64,
    pub samples: usize,
    pub method: String,
    pub step_rule: String,
    pub precision: String,
    #[serde(deserialize_with = "figure")]
    pub tolerance: f64,
    #[serde(deserialize_with = "figure")]
    pub floor_fraction: f64,
    #[serde(deserialize_with = "figure")]
    pub loss: f64,
    pub coverage: CoverageReport,
    /// (k, n) when this run checked the k-th of n shares (--shard k/n).
    pub shard: Option<[usize; 2]>,
    /// The relative error's floor per layer.
    pub floors: Vec<f64>,
    pub tensors: Vec<TensorReport<C>>,
    pub worst: Vec<C>,
    /// Every checked coordinate, in a sharded run (what `plumb merge` joins).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub coordinates: Option<Vec<C>>,
    pub directions: Vec<DirectionReport>,
    pub findings: Vec<Finding>,
    /// Every checked coordinate's relative error and relative bound, per tensor (for the HTML
    /// plot; not in JSON).
    #[serde(skip)]
    pub rel_errors: Vec<StripSeries>,
}

pub fn coord_report(tensors: &Tensors, result: &CheckResult, i: usize) -> CoordReport {
    let c = &result.coords[i];
    let den = c
        .analytic
        .abs()
        .max(c.numeric.abs())
        .max(result.floors[c.coord.layer]);
    CoordReport {
        rel_bound: if den > 0.0 { c.bound / den } else { 0.0 },
        place: tensors.place(c.coord),
        analytic: c.analytic,
        numeric: c.numeric,
        abs_error: c.abs_error,
        rel_error: c.rel_error,
        bound: c.bound,
        step: c.step,
        status: c.status,
        retried: c.retried,
    }
}

/// Runs the check of the reference gradient and builds its report (the command and the demo).
pub fn check_report(
    loaded: &Loaded,
    config: &CheckConfig,
    worst_n: usize,
    progress: Progress<'_>,
) -> Result<CheckReport, CheckError> {
    let Loaded {
        desc,
        weights,
        batch,
        ..
    } = loaded;
    let result = check(&desc.network, weights, batch, config, progress)?;
    let tensors = Tensors::new(desc);
    let facts = RunFacts {
        description: desc.path.clone(),
        description_hash: super::description_hash(desc),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        seed: config.seed,
        samples: batch.len(),
        step: config.step,
        shard: config.shard,
        gradient_norms: tensors
            .parts()
            .iter()
            .map(|(p, _)| part_norm(&result.analytic, p))
            .collect(),
    };
    Ok(build(&facts, &tensors, &result, worst_n))
}

/// What a report says of the run besides its results.
pub struct RunFacts {
    pub description: PathBuf,
    pub description_hash: String,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub seed: u64,
    pub samples: usize,
    pub step: Option<f64>,
    pub shard: Option<(usize, usize)>,
    /// ‖∂J/∂(W, b)‖₂ of each tensor, over all its entries (checked or not).
    pub gradient_norms: Vec<f64>,
}

/// The 2-norm of a gradient over a part (a tensor under the layout).
fn part_norm(gradient: &Weights<f64>, part: &Part) -> f64 {
    let layer = gradient.layer(part.layer);
    let sum: f64 = layer
        .indexed_iter()
        .filter(|((_, col), _)| if *col == 0 { part.bias } else { part.weights })
        .map(|(_, v)| v * v)
        .sum();
    sum.sqrt()
}

/// The report of a check's results (shared with `plumb merge`).
pub fn build(
    facts: &RunFacts,
    tensors: &Tensors,
    result: &CheckResult,
    worst_n: usize,
) -> CheckReport {
    let summaries = &summarise(result, &tensors.parts());
    let mut findings = Vec::new();
    let mut tensor_reports = Vec::new();
    for (s, e) in summaries.iter().zip(&tensors.expected) {
        let worst: Vec<CoordReport> = s
            .worst
            .iter()
            .map(|&i| coord_report(tensors, result, i))
            .collect();
        if s.mismatches > 0 {
            let w = &worst[0];
            findings.push(
                Finding::new(
                    Code::GradientMismatch,
                    Severity::Error,
                    format!(
                        "{} of {} checked coordinates disagree beyond what {} differences can explain; worst at {} (layer {}, row {}, column {}{}, unit {}): analytic {}, numeric {}, relative error {}, relative bound {}",
                        s.mismatches,
                        s.checked,
                        result.method,
                        w.place.label(),
                        w.place.layer,
                        w.place.row,
                        w.place.column,
                        if w.place.bias { " = bias" } else { "" },
                        w.place.unit,
                        Sci(w.analytic),
                        Sci(w.numeric),
                        num(w.rel_error),
                        num(w.rel_bound),
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("mismatches", s.mismatches)
                .figure("checked", s.checked)
                .figure("max_rel_error", s.max_rel_error),
            );
        }
        if s.direction_mismatches > 0 {
            findings.push(
                Finding::new(
                    Code::DirectionMismatch,
                    Severity::Error,
                    format!(
                        "{} of {} random directions over this tensor disagree: its gradient is wrong somewhere, checked coordinate or not",
                        s.direction_mismatches, s.directions
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("direction_mismatches", s.direction_mismatches),
            );
        }
        let conclusive = s.conclusive();
        let open = s.settled_coords.unsettled;
        if open > 0 || s.settled_directions.unsettled > 0 {
            findings.push(
                Finding::new(
                    Code::Unsettled,
                    if conclusive {
                        Severity::Note
                    } else {
                        Severity::Warning
                    },
                    format!(
                        "{open} of {} checked coordinates ({} unreliable at kinks) and {} of {} directions are unsettled: {} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        s.checked,
                        s.unreliable,
                        s.settled_directions.unsettled,
                        s.directions,
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
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("unsettled", s.unsettled)
                .figure("unreliable", s.unreliable)
                .figure("checked", s.checked)
                .figure("settled_share", s.settled_coords.share())
                .figure("unsettled_directions", s.settled_directions.unsettled),
            );
        }
        if s.unreliable > 0 {
            findings.push(
                Finding::new(
                    Code::KinkUnreliable,
                    Severity::Note,
                    format!(
                        "{} coordinate{} straddle a ReLU-like kink at every step tried (down to 1/1000 of the default), so finite differences cannot judge {}; not counted as mismatches",
                        s.unreliable,
                        if s.unreliable == 1 { "" } else { "s" },
                        if s.unreliable == 1 { "it" } else { "them" }
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("unreliable", s.unreliable),
            );
        }
        tensor_reports.push(TensorReport {
            name: e.name.clone(),
            layer: e.layer + 1,
            parameters: s.parameters,
            checked: s.checked,
            max_rel_error: s.max_rel_error,
            median_rel_error: s.median_rel_error,
            norm_rel_error: s.norm_rel_error,
            gradient_norm: facts
                .gradient_norms
                .get(tensor_reports.len())
                .copied()
                .unwrap_or(f64::NAN),
            max_bound: s.max_bound,
            median_bound: s.median_bound,
            mismatches: s.mismatches,
            unreliable: s.unreliable,
            unsettled: s.unsettled,
            settled_share: s.settled_coords.share(),
            directions: s.directions,
            direction_mismatches: s.direction_mismatches,
            verdict: if !s.passed() {
                Verdict::Fail
            } else if !conclusive {
                Verdict::Inconclusive
            } else {
                Verdict::Pass
            },
            worst,
        });
    }
    let global_bad = result
        .directions
        .iter()
        .filter(|d| d.scope == Scope::Global && d.status == Status::Mismatch)
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
    let global = Settlement::of(
        result
            .directions
            .iter()
            .filter(|d| d.scope == Scope::Global)
            .map(|d| d.status),
    );
    // Directions stand in for unchecked coordinates: with every coordinate checked, theirs do not
    // decide (see PartSummary::conclusive).
    let all_checked = result.coverage.checked >= result.coverage.parameters;
    let conclusive =
        (global.conclusive() || all_checked) && summaries.iter().all(|s| s.conclusive());
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
                    global.unsettled,
                    global.checked,
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
                format!("{retried} coordinates straddled a kink at the default step and were checked with a smaller one"),
            )
            .figure("retried", retried),
        );
    }
    let mut order: Vec<usize> = (0..result.coords.len()).collect();
    order.sort_by(|&i, &j| {
        let (a, b) = (&result.coords[i], &result.coords[j]);
        crate::worst_first((a.status, a.rel_error), (b.status, b.rel_error))
    });
    let worst = order
        .iter()
        .take(worst_n)
        .map(|&i| coord_report(tensors, result, i))
        .collect();
    let directions = result
        .directions
        .iter()
        .map(|d| DirectionReport {
            scope: match d.scope {
                Scope::Global => "all".to_string(),
                Scope::Part { layer, bias } => tensors.name_of(layer, bias),
            },
            layer: match d.scope {
                Scope::Global => None,
                Scope::Part { layer, .. } => Some(layer + 1),
            },
            bias: match d.scope {
                Scope::Global => None,
                Scope::Part { bias, .. } => Some(bias),
            },
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
        tensors: tensor_reports,
        worst,
        coordinates: facts.shard.map(|_| {
            (0..result.coords.len())
                .map(|i| coord_report(tensors, result, i))
                .collect()
        }),
        directions,
        findings,
        rel_errors: summaries
            .iter()
            .zip(&tensors.expected)
            .zip(coords_by_part(
                result,
                &summaries.iter().map(|s| s.part).collect::<Vec<_>>(),
            ))
            .map(|((_, e), idx)| {
                let (values, bounds) = idx
                    .into_iter()
                    .map(|i| {
                        let c = coord_report(tensors, result, i);
                        (c.rel_error, c.rel_bound)
                    })
                    .unzip();
                StripSeries {
                    label: e.name.clone(),
                    values,
                    bounds,
                }
            })
            .collect(),
    }
}

/// What would settle a check that stayed open, in plumb's flags, most effective first.
pub fn remedies(
    method: Method,
    precision: Precision,
    unreliable: usize,
    unsettled: usize,
) -> String {
    let mut out = Vec::new();
    if method != Method::ComplexStep {
        out.push(
            "the complex step (--method complex-step), which has no round-off from subtraction",
        );
    }
    if precision == Precision::F32 {
        out.push("f64 (--precision f64): f32's round-off is most of the error bound");
    }
    if method != Method::ComplexStep && unsettled > unreliable {
        out.push("a larger step (--step H) where round-off dominates");
    }
    if unreliable > 0 {
        out.push("fewer coordinates at kinks (data or weights with fewer pre-activations at a kink, or --sample to leave them out)");
    }
    out.join("; ")
}
