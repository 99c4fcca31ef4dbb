//! The report of `plumb check` (docs/json.md): its types, which `plumb merge` reads back, and the
//! rules that turn a check's results into tensors' verdicts and findings.

use std::path::PathBuf;

use plumb_report::{
    DataSource, Finding, SCHEMA_VERSION, Severity, StripSeries, Verdict, WeightsSource, figure,
    number as num,
};
use serde::{Deserialize, Serialize};

use super::GraphPlace;
use crate::{
    CoordCheck, Coverage, FLOOR, Method, ONE_STEP_BAND, ONE_STEP_BOUND, Precision, SETTLE,
    Settlement, Status, UNSETTLED_SHARE, worst_first,
};

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
    /// How many coordinates and directions central differences settled at ±h alone (a note).
    OneStep,
    /// How many coordinates an f32 check settled on losses computed in f64 (a note).
    WideLosses,
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
            Code::OneStep => "one-step",
            Code::WideLosses => "wide-losses",
        }
    }
}

impl From<Code> for String {
    fn from(c: Code) -> String {
        c.name().to_string()
    }
}

/// One coordinate of the report; `P` is how it is located (a graph parameter's [`GraphPlace`]).
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(bound(deserialize = "P: Deserialize<'de>"))]
pub struct CoordReport<P = GraphPlace> {
    #[serde(flatten)]
    pub place: P,
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
    /// `rel_error`. The report's one relative bound: the tensors' `max_bound` and `median_bound`,
    /// the tables and the plots all show it.
    #[serde(deserialize_with = "figure")]
    pub rel_bound: f64,
    #[serde(deserialize_with = "figure")]
    pub step: f64,
    pub status: Status,
    /// Whether a smaller step was needed to step off a kink.
    pub retried: bool,
    /// Whether central differences settled it at ±h alone (`plumb_fd::Target`): `step` is h,
    /// the estimate's error the round-off at h plus the truncation a third loss at 2h showed
    /// (`bound`, the verdict's, adds the analytic value's round-off allowance). Absent in
    /// reports written before the field existed: false.
    #[serde(default)]
    pub one_step: bool,
    /// Whether its estimate came from losses computed in f64 at the parameters an f32 check
    /// holds, because f32's own did not settle it at one step (its status says whether these
    /// did). Written only when true (a report without it reads as false, as do reports written
    /// before the field existed).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub wide: bool,
}

impl<P> CoordReport<P> {
    /// The row of a checked coordinate at `place`, whose relative error's floor is `floor`.
    /// The row of `c`, at `place`; `floor` is the relative error's floor where `c` lies.
    pub(super) fn new<K>(place: P, c: &CoordCheck<K>, floor: f64) -> CoordReport<P> {
        let den = c.analytic.abs().max(c.numeric.abs()).max(floor);
        CoordReport {
            place,
            analytic: c.analytic,
            numeric: c.numeric,
            abs_error: c.abs_error,
            rel_error: c.rel_error,
            bound: c.bound,
            rel_bound: if den > 0.0 { c.bound / den } else { 0.0 },
            step: c.step,
            status: c.status,
            retried: c.retried,
            one_step: c.one_step,
            wide: c.wide,
        }
    }

    /// The checker's record of this row, at `coord` (what `plumb merge` judges again).
    pub(super) fn check_at<K>(&self, coord: K) -> CoordCheck<K> {
        CoordCheck {
            coord,
            analytic: self.analytic,
            numeric: self.numeric,
            abs_error: self.abs_error,
            rel_error: self.rel_error,
            bound: self.bound,
            step: self.step,
            status: self.status,
            retried: self.retried,
            one_step: self.one_step,
            wide: self.wide,
        }
    }
}

/// How a report names a coordinate's place in its findings, and what a non-smooth point is in
/// the networks it checks.
pub trait Location {
    /// Where a finite difference cannot judge a coordinate.
    const NON_SMOOTH: &'static str;
    /// `layer2.weight[3, 1] (layer 2, row 3, column 2, unit 3)`: the label and the layer's words.
    fn described(&self) -> String;
}

/// One tensor of the report; `C` is its coordinates' type ([`GraphCoordReport`](super::GraphCoordReport)).
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
    /// The coordinates' `rel_bound`, largest and median.
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
    /// Checked coordinates central differences settled at ±h alone (three losses, not the
    /// ladder's); 0 in reports written before the field existed.
    #[serde(default)]
    pub one_step: usize,
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
    /// Whether central differences settled it at ±h alone, as a coordinate's `one_step`.
    #[serde(default)]
    pub one_step: bool,
    /// Whether an f32 check settled it on losses in f64, as a coordinate's `wide` (written
    /// only when true).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub wide: bool,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CoverageReport {
    pub sample: String,
    pub default_sample: bool,
    pub parameters: usize,
    pub checked: usize,
    pub directions_per_part: usize,
    /// [`Coverage::responded`]; absent (0) in reports written before it.
    #[serde(default)]
    pub responded: usize,
    /// [`Coverage::shared`]; absent (0) in reports written before it.
    #[serde(default)]
    pub shared: usize,
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

/// A check's results in the report's terms, dense or graph: what [`build_report`] judges.
pub(super) struct Checked<'a, P> {
    pub method: Method,
    pub precision: Precision,
    pub loss: f64,
    pub tolerance: f64,
    pub coverage: &'a Coverage,
    pub floors: &'a [f64],
    /// Each tensor of the report: name, 1-based layer, parameter count.
    pub tensors: Vec<(String, usize, usize)>,
    /// Each checked coordinate, in check order: its tensor and its row.
    pub coords: Vec<(usize, CoordReport<P>)>,
    /// Each direction: its tensor (None over the whole network) and its row.
    pub directions: Vec<(Option<usize>, DirectionReport)>,
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

fn worst_order<P>(coords: &mut [&CoordReport<P>]) {
    coords.sort_by(|a, b| worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
}

/// The one report builder of `plumb check`, dense or graph: a tensor fails on a mismatch of a
/// coordinate or a direction over it, and is inconclusive when more of its checked coordinates
/// (or, when they were sampled, of its directions) are unsettled than a check may leave open; the
/// whole check likewise, with the directions over the whole network.
pub(super) fn build_report<P: Location + Clone>(
    facts: &RunFacts,
    checked: Checked<'_, P>,
    worst_n: usize,
) -> CheckReport<CoordReport<P>> {
    let (method, precision) = (checked.method, checked.precision);
    let mut findings = Vec::new();
    let mut tensors = Vec::new();
    let mut series = Vec::new();
    let mut all_conclusive = true;
    // Coordinates and directions grouped by tensor in one pass each (not one scan per tensor: that
    // would be quadratic in a deep network's layers).
    let mut coords_of: Vec<Vec<&CoordReport<P>>> = vec![Vec::new(); checked.tensors.len()];
    for (t, c) in &checked.coords {
        coords_of[*t].push(c);
    }
    let mut dirs_of: Vec<Vec<&DirectionReport>> = vec![Vec::new(); checked.tensors.len()];
    for (t, d) in &checked.directions {
        if let Some(t) = t {
            dirs_of[*t].push(d);
        }
    }
    for (t, ((name, layer, parameters), (mut coords, dirs))) in checked
        .tensors
        .iter()
        .zip(coords_of.into_iter().zip(dirs_of))
        .enumerate()
    {
        let (name, layer, parameters) = (name.as_str(), *layer, *parameters);
        let rel: Vec<f64> = coords.iter().map(|c| c.rel_error).collect();
        let bounds: Vec<f64> = coords.iter().map(|c| c.rel_bound).collect();
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
        let n_checked = coords.len();
        // Directions stand in for the coordinates a sample leaves out: with every coordinate
        // checked, theirs do not decide.
        let conclusive =
            settled.conclusive() && (n_checked >= parameters || settled_dirs.conclusive());
        all_conclusive &= conclusive;
        let max_rel_error = rel.iter().copied().fold(0.0, f64::max);
        worst_order(&mut coords);
        let worst: Vec<CoordReport<P>> = coords.iter().take(3).map(|&c| c.clone()).collect();
        if mismatches > 0 {
            let w = &worst[0];
            findings.push(
                Finding::new(
                    Code::GradientMismatch,
                    Severity::Error,
                    format!(
                        "{mismatches} of {n_checked} checked coordinates disagree beyond what {method} differences can explain; worst at {}: analytic {:.9e}, numeric {:.9e}, relative error {}, relative bound {}",
                        w.place.described(),
                        w.analytic,
                        w.numeric,
                        num(w.rel_error),
                        num(w.rel_bound),
                    ),
                )
                .tensor(name)
                .layer(layer)
                .figure("mismatches", mismatches)
                .figure("checked", n_checked)
                .figure("max_rel_error", max_rel_error),
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
                .tensor(name)
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
                        "{} of {n_checked} checked coordinates ({unreliable} unreliable at kinks) and {} of {} directions are unsettled: {method} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        settled.unsettled,
                        settled_dirs.unsettled,
                        dirs.len(),
                        precision.name(),
                        SETTLE * 100.0,
                        if conclusive {
                            format!("; within the {}% a check may leave open", UNSETTLED_SHARE * 100.0)
                        } else {
                            format!("; more than the {}% a check may leave open, so this tensor is inconclusive", UNSETTLED_SHARE * 100.0)
                        }
                    ),
                )
                .tensor(name)
                .layer(layer)
                .figure("unsettled", unsettled)
                .figure("unreliable", unreliable)
                .figure("checked", n_checked)
                .figure("settled_share", settled.share())
                .figure("unsettled_directions", settled_dirs.unsettled),
            );
        }
        if unreliable > 0 {
            let one = unreliable == 1;
            findings.push(
                Finding::new(
                    Code::KinkUnreliable,
                    Severity::Note,
                    format!(
                        "{unreliable} coordinate{} {} at every step tried (down to 1/1000 of the default), so finite differences cannot judge {}; not counted as mismatches",
                        if one { " straddles" } else { "s straddle" },
                        P::NON_SMOOTH,
                        if one { "it" } else { "them" }
                    ),
                )
                .tensor(name)
                .layer(layer)
                .figure("unreliable", unreliable),
            );
        }
        series.push(StripSeries {
            label: name.to_string(),
            values: rel.clone(),
            bounds: bounds.clone(),
        });
        tensors.push(TensorReport {
            name: name.to_string(),
            layer,
            parameters,
            checked: n_checked,
            max_rel_error,
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
            one_step: coords.iter().filter(|c| c.one_step).count(),
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
    let global: Vec<Status> = checked
        .directions
        .iter()
        .filter(|(t, _)| t.is_none())
        .map(|(_, d)| d.status)
        .collect();
    let global_bad = global.iter().filter(|&&s| s == Status::Mismatch).count();
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
    let global = Settlement::of(global);
    let coverage = checked.coverage;
    let all_checked = coverage.checked >= coverage.parameters;
    let conclusive = (global.conclusive() || all_checked) && all_conclusive;
    if !conclusive {
        let all = Settlement::of(checked.coords.iter().map(|(_, c)| c.status));
        let unreliable = checked
            .coords
            .iter()
            .filter(|(_, c)| c.status == Status::Unreliable)
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
                    remedies(method, precision, unreliable, all.unsettled)
                ),
            )
            .figure("unsettled", all.unsettled)
            .figure("checked", all.checked)
            .figure("settled_share", all.share()),
        );
    }
    let retried = checked.coords.iter().filter(|(_, c)| c.retried).count();
    if retried > 0 {
        findings.push(
            Finding::new(
                Code::KinkRetried,
                Severity::Note,
                format!(
                    "{retried} coordinates straddled {} at the default step and were checked with a smaller one",
                    P::NON_SMOOTH
                ),
            )
            .figure("retried", retried),
        );
    }
    let one_step = checked.coords.iter().filter(|(_, c)| c.one_step).count();
    let one_step_dirs = checked
        .directions
        .iter()
        .filter(|(_, d)| d.one_step)
        .count();
    if one_step + one_step_dirs > 0 {
        findings.push(
            Finding::new(
                Code::OneStep,
                Severity::Note,
                format!(
                    "{one_step} of {} checked coordinates and {one_step_dirs} of {} directions settled at ±h alone: the quotient there agreed with the analytic value within {}% of the tolerance, and its bound — the round-off at h plus twice the truncation a third loss at 2h shows — stayed within {}% of it, so a larger step was not needed",
                    checked.coords.len(),
                    checked.directions.len(),
                    ONE_STEP_BAND * 100.0,
                    ONE_STEP_BOUND * 100.0,
                ),
            )
            .figure("one_step", one_step)
            .figure("one_step_directions", one_step_dirs)
            .figure("checked", checked.coords.len()),
        );
    }
    let wide = checked.coords.iter().filter(|(_, c)| c.wide).count();
    let wide_dirs = checked.directions.iter().filter(|(_, d)| d.wide).count();
    if wide + wide_dirs > 0 {
        findings.push(
            Finding::new(
                Code::WideLosses,
                Severity::Note,
                format!(
                    "{wide} of {} checked coordinates and {wide_dirs} of {} directions were estimated on losses computed in f64 at the parameters f32 holds, at an f64 check's step, because f32's own losses did not settle them at one step (their round-off above the tolerance's share, or f32's step across a kink); they are judged against f32's tolerance like the rest",
                    checked.coords.len(),
                    checked.directions.len(),
                ),
            )
            .figure("wide", wide)
            .figure("wide_directions", wide_dirs)
            .figure("checked", checked.coords.len()),
        );
    }
    let mut order: Vec<&CoordReport<P>> = checked.coords.iter().map(|(_, c)| c).collect();
    worst_order(&mut order);
    let worst = order.iter().take(worst_n).map(|&c| c.clone()).collect();
    let step_rule = match facts.step {
        Some(h) => format!("fixed h = {h:e} (--step)"),
        None => method.step_rule(precision.epsilon()).to_string(),
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
        method: method.name().into(),
        step_rule,
        precision: precision.name().into(),
        tolerance: checked.tolerance,
        floor_fraction: FLOOR,
        loss: checked.loss,
        coverage: CoverageReport {
            sample: coverage.sample.to_string(),
            default_sample: coverage.default_sample,
            parameters: coverage.parameters,
            checked: coverage.checked,
            directions_per_part: coverage.directions,
            responded: coverage.responded,
            shared: coverage.shared,
        },
        shard: facts.shard.map(|(k, n)| [k, n]),
        floors: checked.floors.to_vec(),
        tensors,
        worst,
        coordinates: facts
            .shard
            .map(|_| checked.coords.into_iter().map(|(_, c)| c).collect()),
        directions: checked.directions.into_iter().map(|(_, d)| d).collect(),
        findings,
        rel_errors: series,
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
