//! The finite-difference check of a gradient, coordinate by coordinate and along random directions.
//!
//! Verdict per coordinate: `mismatch` only when |a − n| exceeds the error the method can explain
//! (its bound) *and* the relative error |a − n| / max(|a|, |n|, floor) exceeds the precision's
//! tolerance. The floor is 10% of the largest |a| in the same layer (of ‖g‖ over the direction's
//! span, for a direction): entries near zero are judged against their layer's scale rather than
//! their own, since round-off leaves every entry an absolute error of about the same size;
//! `unreliable` when a unit changes side of a kink, or of a break in a derivative the method's
//! bound relies on, inside the stencil even after retrying with steps 10, 100 and 1000 times
//! smaller; `unsettled` when it is no mismatch but the bound exceeds [`SETTLE`] of the value judged
//! (a wrong value could have passed); `match` otherwise. A check whose unsettled and unreliable
//! items exceed [`UNSETTLED_SHARE`] is inconclusive ([`Settlement`]).
//!
//! Central differences at the default step are told what they will be judged against
//! ([`Rule::target`]): a coordinate or direction whose quotient at ±h already lands within a tenth
//! of the tolerance of its value, with a bound (round-off at h, and the truncation a third loss at
//! 2h shows) within half of it, settles there on three losses ([`Target`] says why the third).
//!
//! Tolerances [practice, no formal source]: 1e-6 in f64 and 1e-3 in f32, well above the best
//! accuracy of a central difference in each (ε^(2/3): about 4e-11 and 2e-5, Numerical Recipes
//! §5.7) and well below the error a mistake in a backward pass makes. The tolerance alone never
//! makes a mismatch: the method's own error bound at that coordinate must be exceeded too.

use std::sync::atomic::{AtomicUsize, Ordering};

use ndarray::Array2;
use num_complex::Complex;
use plumb_engine::{Batch, Coord, Network, Rng, Scalar, Weights};
use rayon::prelude::*;
use thiserror::Error;

use crate::evaluate::Base;
use crate::gross::{gradient_magnitude, loss_magnitude};
use crate::method::{
    ComplexScalar, Estimate, ONE_STEP_BAND, ONE_STEP_BOUND, Target, complex_estimate, round_to,
};
use crate::{FLOOR, Method, Sample, coverage, relative_floor};

/// The arithmetic the check runs the engine in.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Precision {
    F64,
    F32,
}

impl Precision {
    pub fn name(&self) -> &'static str {
        match self {
            Precision::F64 => "f64",
            Precision::F32 => "f32",
        }
    }

    pub fn epsilon(&self) -> f64 {
        match self {
            Precision::F64 => f64::EPSILON,
            Precision::F32 => f32::EPSILON as f64,
        }
    }

    /// The relative error above which a coordinate can be called wrong (see the module doc).
    pub fn tolerance(&self) -> f64 {
        match self {
            Precision::F64 => 1e-6,
            Precision::F32 => 1e-3,
        }
    }
}

/// What to check and how.
#[derive(Clone, Debug)]
pub struct CheckConfig {
    pub method: Method,
    /// A fixed step for every coordinate instead of the scaled default.
    pub step: Option<f64>,
    pub precision: Precision,
    /// `None`: [`Sample::default_for`] the network.
    pub sample: Option<Sample>,
    /// Random directions per part (and globally); `None`: [`DEFAULT_DIRECTIONS`].
    pub directions: Option<usize>,
    pub seed: u64,
    /// Overrides the precision's relative tolerance.
    pub tolerance: Option<f64>,
    /// (k, n): check only the k-th (1-based) of n deterministic shares of the coordinates and
    /// directions, for a check split over several jobs.
    pub shard: Option<(usize, usize)>,
}

impl CheckConfig {
    pub fn new(method: Method, precision: Precision) -> CheckConfig {
        CheckConfig {
            method,
            step: None,
            precision,
            sample: None,
            directions: None,
            seed: 0,
            tolerance: None,
            shard: None,
        }
    }
}

/// One evaluation of the loss is taken to carry round-off of this many ε of |J|. The measured
/// difference between two step sizes carries the actual round-off as well; this term is the floor
/// under it for when the two happen to agree.
pub const NOISE: f64 = 4.0;

/// Directions checked per part and globally when not asked otherwise.
pub const DEFAULT_DIRECTIONS: usize = 4;

/// Why a check cannot run.
#[derive(Clone, Debug, Error, PartialEq)]
pub enum CheckError {
    #[error("the step {0} is not usable: give a finite step > 0")]
    BadStep(f64),
    #[error("{0}")]
    BadSample(String),
    #[error("the batch does not fit the network: {0}")]
    BadBatch(String),
    #[error("the gradient to check does not have the network's shapes")]
    BadGradient,
    #[error("the parameters do not fit the network: {0}")]
    BadParams(String),
}

/// The verdict on one coordinate or direction.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Status {
    Match,
    /// Not a mismatch, but the method's error bound exceeds [`SETTLE`] of the value judged: a
    /// wrong gradient could have passed here, so it is not called a match.
    Unsettled,
    Unreliable,
    Mismatch,
}

impl Status {
    pub fn name(&self) -> &'static str {
        match self {
            Status::Match => "match",
            Status::Unsettled => "unsettled",
            Status::Unreliable => "unreliable",
            Status::Mismatch => "mismatch",
        }
    }

    pub fn from_name(name: &str) -> Option<Status> {
        [
            Status::Match,
            Status::Unsettled,
            Status::Unreliable,
            Status::Mismatch,
        ]
        .into_iter()
        .find(|s| s.name() == name)
    }

    /// Whether the check said something definite here: a match or a mismatch.
    pub fn settled(&self) -> bool {
        matches!(self, Status::Match | Status::Mismatch)
    }
}

/// Written as its name (`"match"`, `"unsettled"`, …), as reports have always said it.
impl serde::Serialize for Status {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.name())
    }
}

impl<'de> serde::Deserialize<'de> for Status {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Status, D::Error> {
        let name = String::deserialize(d)?;
        Status::from_name(&name)
            .ok_or_else(|| serde::de::Error::custom(format!("an unknown status `{name}`")))
    }
}

/// A coordinate or direction is settled when its method's error bound is at most this fraction of
/// the value it judges, max(|a|, |n|, floor): an error of a tenth of the value would then show.
pub const SETTLE: f64 = 0.1;

/// The largest share of a tensor's checked coordinates (and, apart, of its directions, and of the
/// directions over the whole network) that may stay unsettled or unreliable for the check to
/// conclude. Above it the verdict is `inconclusive` unless something is a mismatch.
pub const UNSETTLED_SHARE: f64 = 0.25;

/// How much of a set of checked items (coordinates or directions) was settled.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Settlement {
    pub checked: usize,
    /// Unsettled or unreliable.
    pub unsettled: usize,
}

impl Settlement {
    pub fn of(statuses: impl IntoIterator<Item = Status>) -> Settlement {
        statuses
            .into_iter()
            .fold(Settlement::default(), |s, st| Settlement {
                checked: s.checked + 1,
                unsettled: s.unsettled + usize::from(!st.settled()),
            })
    }

    /// Whether at most [`UNSETTLED_SHARE`] of the items stayed unsettled.
    pub fn conclusive(&self) -> bool {
        self.unsettled as f64 <= UNSETTLED_SHARE * self.checked as f64
    }

    /// The settled share, 1 for nothing checked.
    pub fn share(&self) -> f64 {
        if self.checked == 0 {
            1.0
        } else {
            (self.checked - self.unsettled) as f64 / self.checked as f64
        }
    }
}

/// One coordinate's check; `K` names the coordinate: a dense network's [`Coord`], or an entry
/// of an outside program's or the layer graph's tensors ([`Entry`](crate::Entry)).
#[derive(Clone, Debug, PartialEq)]
pub struct CoordCheck<K = Coord> {
    pub coord: K,
    pub analytic: f64,
    pub numeric: f64,
    pub abs_error: f64,
    pub rel_error: f64,
    /// The error the method can explain here (absolute).
    pub bound: f64,
    pub step: f64,
    pub status: Status,
    /// Whether a smaller step was needed to step off a kink.
    pub retried: bool,
    /// Whether central differences settled it at ±h alone ([`Target`]).
    pub one_step: bool,
}

/// What a direction spans.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Scope {
    /// Every parameter of the network.
    Global,
    /// One layer's bias weights (`bias`) or its other weights.
    Part { layer: usize, bias: bool },
}

/// One random-direction check: J(θ ± h·v) against g·v.
#[derive(Clone, Debug, PartialEq)]
pub struct DirectionCheck {
    pub scope: Scope,
    pub analytic: f64,
    pub numeric: f64,
    pub abs_error: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub step: f64,
    pub status: Status,
    /// Whether central differences settled it at ±h alone ([`Target`]).
    pub one_step: bool,
}

/// What a check covered.
#[derive(Clone, Debug, PartialEq)]
pub struct Coverage {
    pub sample: Sample,
    /// Whether the sample was the default for the network's size.
    pub default_sample: bool,
    pub directions: usize,
    pub parameters: usize,
    pub checked: usize,
}

/// The result of a check.
#[derive(Clone, Debug)]
pub struct CheckResult {
    pub method: Method,
    pub precision: Precision,
    /// J(θ) in the precision checked.
    pub loss: f64,
    pub coverage: Coverage,
    /// The relative tolerance, and the floor of the relative error's denominator per layer.
    pub tolerance: f64,
    pub floors: Vec<f64>,
    pub coords: Vec<CoordCheck>,
    pub directions: Vec<DirectionCheck>,
    /// The gradient checked (the engine's own unless one was given).
    pub analytic: Weights<f64>,
}

/// Progress: called with (done, total) as coordinates finish, from any thread.
pub type Progress<'a> = &'a (dyn Fn(usize, usize) + Sync);

/// Checks the engine's own gradient of `net` at `weights` on `batch`.
pub fn check(
    net: &Network,
    weights: &Weights<f64>,
    batch: &Batch,
    config: &CheckConfig,
    progress: Progress<'_>,
) -> Result<CheckResult, CheckError> {
    net.check_batch(batch.x.view(), batch.y.view())
        .map_err(CheckError::BadBatch)?;
    let analytic = match config.precision {
        Precision::F64 => net.gradient(weights, batch.x.view(), batch.y.view()).1,
        Precision::F32 => {
            let (x, y) = batch.cast::<f32>();
            net.gradient(&weights.cast::<f32>(), x.view(), y.view())
                .1
                .map(|&v| v as f64)
        }
    };
    check_gradient(net, weights, batch, &analytic, config, progress)
}

/// Checks a given gradient (the engine's, a corrupted copy, or an outside one) against finite
/// differences of the reference loss.
pub fn check_gradient(
    net: &Network,
    weights: &Weights<f64>,
    batch: &Batch,
    analytic: &Weights<f64>,
    config: &CheckConfig,
    progress: Progress<'_>,
) -> Result<CheckResult, CheckError> {
    net.check_batch(batch.x.view(), batch.y.view())
        .map_err(CheckError::BadBatch)?;
    if !net.fits(analytic) || !net.fits(weights) {
        return Err(CheckError::BadGradient);
    }
    if let Some(h) = config.step.filter(|h| !(h.is_finite() && *h > 0.0)) {
        return Err(CheckError::BadStep(h));
    }
    let default_sample = config.sample.is_none();
    let sample = config.sample.unwrap_or_else(|| Sample::default_for(net));
    let mut coords = coverage::select(net, sample, config.seed).map_err(CheckError::BadSample)?;
    let k = config.directions.unwrap_or(DEFAULT_DIRECTIONS);
    let mut directions = directions(net, k, config.seed);
    if let Some((part, of)) = config.shard {
        // Every n-th item from the k-th: the shards are disjoint, cover everything, and do not
        // depend on anything but the sample.
        let mine = |i: usize| i % of == part - 1;
        coords = coords
            .into_iter()
            .enumerate()
            .filter(|(i, _)| mine(*i))
            .map(|(_, c)| c)
            .collect();
        directions = directions
            .into_iter()
            .enumerate()
            .filter(|(i, _)| mine(*i))
            .map(|(_, d)| d)
            .collect();
    }
    let eps = config.precision.epsilon();
    let tolerance = config.tolerance.unwrap_or(config.precision.tolerance());
    let scale = analytic
        .layers()
        .iter()
        .flat_map(|l| l.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let floors = analytic
        .layers()
        .iter()
        .map(|l| {
            relative_floor(
                l.iter().fold(0.0f64, |m, v| m.max(v.abs())),
                scale,
                eps,
                tolerance,
            )
        })
        .collect();
    let judge = Judge {
        eps,
        tolerance,
        floors,
        scale,
    };
    let trace = net.forward(weights, batch.x.view());
    let run = Run {
        gross: gradient_magnitude(net, weights, &trace, &batch.y),
        loss_gross: loss_magnitude(net, weights, &trace, &batch.y),
        net,
        weights,
        batch,
        analytic,
        config,
        judge: &judge,
        progress,
        done: AtomicUsize::new(0),
        total: coords.len() + directions.len(),
    };
    let (loss, coord_checks, direction_checks) = match (config.method, config.precision) {
        (Method::ComplexStep, Precision::F64) => run.complex::<Complex<f64>>(&coords, &directions),
        (Method::ComplexStep, Precision::F32) => run.complex::<Complex<f32>>(&coords, &directions),
        (_, Precision::F64) => run.real::<f64>(&coords, &directions),
        (_, Precision::F32) => run.real::<f32>(&coords, &directions),
    };
    Ok(CheckResult {
        method: config.method,
        precision: config.precision,
        loss,
        coverage: Coverage {
            sample,
            default_sample,
            directions: k,
            parameters: net.parameters(),
            checked: coord_checks.len(),
        },
        tolerance,
        floors: judge.floors.clone(),
        coords: coord_checks,
        directions: direction_checks,
        analytic: analytic.clone(),
    })
}

/// A random unit direction: what it spans and the generator state it is drawn from. Only the state
/// is kept (32 bytes) and the vector is drawn when it is checked, so memory does not grow with
/// directions × parameters: a network of 2,000 one-unit layers has 4,001 parts.
#[derive(Clone, Debug)]
struct Direction {
    scope: Scope,
    rng: Rng,
}

/// A direction's unit vector over the layers it moves: `layers[i]` is layer `first + i`, zero
/// outside the span. A direction within one layer holds that layer only.
struct Drawn {
    first: usize,
    layers: Vec<Array2<f64>>,
}

impl Drawn {
    /// Σ f(g, v) over the entries of the span (the layers outside it add nothing).
    fn sum_with(&self, g: &Weights<f64>, f: impl Fn(f64, f64) -> f64) -> f64 {
        self.layers
            .iter()
            .enumerate()
            .map(|(i, v)| {
                g.layer(self.first + i)
                    .iter()
                    .zip(v.iter())
                    .map(|(&x, &y)| f(x, y))
                    .sum::<f64>()
            })
            .sum()
    }
}

impl Direction {
    /// The unit vector, drawn as it always was: one normal per entry of the span, in layer and
    /// row-major order, zero elsewhere; held only over the layers it moves.
    fn vector(&self, net: &Network) -> Drawn {
        let mut rng = self.rng.clone();
        let scope = self.scope;
        let span = match scope {
            Scope::Global => 0..net.layers().len(),
            Scope::Part { layer, .. } => layer..layer + 1,
        };
        let first = span.start;
        let mut layers: Vec<Array2<f64>> = span
            .map(|l| {
                Array2::from_shape_fn(net.layers()[l].shape(), |(_, c)| {
                    if spans(scope, l, c) {
                        rng.normal()
                    } else {
                        0.0
                    }
                })
            })
            .collect();
        let norm = layers
            .iter()
            .flat_map(|l| l.iter())
            .map(|x| x * x)
            .sum::<f64>()
            .sqrt();
        for l in &mut layers {
            l.mapv_inplace(|x| x / norm);
        }
        Drawn { first, layers }
    }
}

/// Whether entry (·, c) of layer l is in the span (column 0 of a layer is its bias).
fn spans(scope: Scope, l: usize, c: usize) -> bool {
    match scope {
        Scope::Global => true,
        Scope::Part { layer, bias } => layer == l && bias == (c == 0),
    }
}

/// A random unit direction per part and K global ones, from the seed so that the result does not
/// depend on the thread count. Each keeps the generator's state at its start, and the generator
/// is moved past its draws, so direction i is the same vector it would be if all were drawn here.
fn directions(net: &Network, k: usize, seed: u64) -> Vec<Direction> {
    let mut rng = Rng::new(seed ^ 0xd1_7ec7);
    let mut out = Vec::new();
    let mut scopes = vec![Scope::Global];
    for l in 0..net.layers().len() {
        scopes.push(Scope::Part {
            layer: l,
            bias: false,
        });
        scopes.push(Scope::Part {
            layer: l,
            bias: true,
        });
    }
    for scope in scopes {
        let draws = match scope {
            Scope::Global => net.parameters(),
            Scope::Part { layer, bias } => {
                let (rows, cols) = net.layers()[layer].shape();
                if bias { rows } else { rows * (cols - 1) }
            }
        };
        for _ in 0..k {
            out.push(Direction {
                scope,
                rng: rng.clone(),
            });
            for _ in 0..draws {
                rng.normal();
            }
        }
    }
    out
}

/// The verdict rule (module doc) for values compared outside a [`check`]: machine epsilon of the
/// precision, the relative tolerance, and the largest |entry| of the gradient.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Rule {
    pub eps: f64,
    pub tolerance: f64,
    pub scale: f64,
}

impl Rule {
    /// (abs error, rel error, bound, status) of an analytic value `a` against an estimate `n` whose
    /// method can explain `method_error`, with the relative error's `floor`.
    /// `gross` bounds the pieces `a` was summed from (see `gradient_magnitude`), 0 if unknown.
    pub fn judge(
        &self,
        a: f64,
        n: f64,
        floor: f64,
        gross: f64,
        method_error: f64,
        crossed: bool,
    ) -> (f64, f64, f64, Status) {
        Judge {
            eps: self.eps,
            tolerance: self.tolerance,
            floors: Vec::new(),
            scale: self.scale,
        }
        .judge(a, n, floor, gross, method_error, crossed)
    }

    /// What an estimate of the analytic value `a`, judged with the relative error's `floor`, must
    /// land within to settle at ±h alone ([`Target`]).
    pub fn target(&self, a: f64, floor: f64) -> Target {
        target(self.tolerance, a, floor)
    }
}

/// The one rule for [`Target`]: the quotient at ±h within [`ONE_STEP_BAND`] of the tolerance of
/// the value judged, its bound within [`ONE_STEP_BOUND`] of it. The value judged is taken as
/// max(|a|, floor) — without the estimate's own |n|, which is not known yet, so the band is never
/// wider than the verdict's denominator allows.
fn target(tolerance: f64, a: f64, floor: f64) -> Target {
    let scale = tolerance * a.abs().max(floor);
    Target {
        analytic: a,
        within: ONE_STEP_BAND * scale,
        bound: ONE_STEP_BOUND * scale,
    }
}

/// The verdict rule (module doc).
struct Judge {
    eps: f64,
    tolerance: f64,
    /// The relative error's floor per layer.
    floors: Vec<f64>,
    /// The largest |entry| of the gradient checked.
    scale: f64,
}

impl Judge {
    /// (abs error, rel error, bound, status) for an analytic value against an estimate.
    fn judge(
        &self,
        a: f64,
        n: f64,
        floor: f64,
        gross: f64,
        method_error: f64,
        crossed: bool,
    ) -> (f64, f64, f64, Status) {
        let e = (a - n).abs();
        // Allowance for the analytic value's own rounding: a few dozen ε of the values compared and
        // of the gradient's scale, and of the pieces it was summed from (`gross`: a − y near 1
        // for a confident network keeps ε of 1 whatever its size).
        let bound = method_error
            + 64.0 * self.eps * (a.abs().max(n.abs()) + self.scale)
            + 16.0 * self.eps * gross;
        let den = a.abs().max(n.abs()).max(floor);
        let rel = if den > 0.0 { e / den } else { 0.0 };
        let status = if crossed {
            Status::Unreliable
        } else if (e > bound && rel > self.tolerance) || !n.is_finite() || !a.is_finite() {
            Status::Mismatch
        } else if den > 0.0 && bound > SETTLE * den {
            Status::Unsettled
        } else {
            Status::Match
        };
        (e, rel, bound, status)
    }
}

struct Run<'a> {
    net: &'a Network,
    /// The pieces of each gradient entry and of the loss, for the round-off allowances.
    gross: Weights<f64>,
    loss_gross: f64,
    weights: &'a Weights<f64>,
    batch: &'a Batch,
    analytic: &'a Weights<f64>,
    config: &'a CheckConfig,
    judge: &'a Judge,
    progress: Progress<'a>,
    done: AtomicUsize,
    total: usize,
}

/// Kink retries: steps 10, 100 and 1000 times smaller.
pub(crate) const RETRIES: [f64; 3] = [0.1, 0.01, 0.001];

impl Run<'_> {
    fn tick(&self) {
        let d = self.done.fetch_add(1, Ordering::Relaxed) + 1;
        (self.progress)(d, self.total);
    }

    /// Real methods in precision S.
    fn real<S: Scalar>(
        &self,
        coords: &[Coord],
        directions: &[Direction],
    ) -> (f64, Vec<CoordCheck>, Vec<DirectionCheck>) {
        let w: Weights<S> = self.weights.cast();
        let (x, y) = self.batch.cast::<S>();
        let base = Base::new(self.net, &w, x.view(), &y);
        let j0 = base.loss().re();
        let noise = NOISE * self.judge.eps * j0.abs().max(self.loss_gross);
        let method = self.config.method;
        let fixed = self.config.step;
        // A fixed step is taken as it is; the default one is retried smaller off a kink.
        let reach = method.reach(self.judge.eps);
        let estimate =
            |f: &dyn Fn(f64) -> (f64, bool), default_step: f64, target: Target| match fixed {
                Some(h) => (
                    method.estimate_with(f, j0, h, noise, round_to::<S>, 0),
                    false,
                ),
                None => {
                    let est = method.estimate_toward(
                        f,
                        j0,
                        default_step,
                        noise,
                        round_to::<S>,
                        reach,
                        Some(target),
                    );
                    if est.crossed {
                        for r in RETRIES {
                            let e = method.estimate_toward(
                                f,
                                j0,
                                default_step * r,
                                noise,
                                round_to::<S>,
                                reach,
                                Some(target),
                            );
                            if !e.crossed {
                                return (e, true);
                            }
                        }
                    }
                    (est, false)
                }
            };
        let coord_checks = self.each_coord(coords, |c, target| {
            let f = |d: f64| {
                let (j, crossed) = base.perturbed(c, S::from_f64(d));
                (j.re(), crossed)
            };
            estimate(
                &f,
                method.default_step(*self.weights.get(c), self.judge.eps),
                target,
            )
        });
        let direction_checks = self.each_direction(directions, |scope, v, target| {
            let vs: Vec<Array2<S>> = v.layers.iter().map(|m| m.mapv(S::from_f64)).collect();
            let f = |t: f64| {
                let (j, crossed) = base.along_from(v.first, &vs, S::from_f64(t));
                (j.re(), crossed)
            };
            estimate(
                &f,
                method.default_step(self.scope_scale(scope), self.judge.eps),
                target,
            )
            .0
        });
        (j0, coord_checks, direction_checks)
    }

    /// The complex step in the complex type C.
    fn complex<C: ComplexScalar>(
        &self,
        coords: &[Coord],
        directions: &[Direction],
    ) -> (f64, Vec<CoordCheck>, Vec<DirectionCheck>) {
        let w: Weights<C> = self.weights.cast();
        let (x, y) = self.batch.cast::<C>();
        let base = Base::new(self.net, &w, x.view(), &y);
        let j0 = base.loss().re();
        let eps = self.judge.eps;
        let fixed = self.config.step;
        let coord_checks = self.each_coord(coords, |c, _| {
            let g = |h: f64| {
                let (j, crossed) = base.perturbed(c, C::imaginary(h));
                (j.im(), crossed)
            };
            let h = fixed
                .unwrap_or_else(|| Method::ComplexStep.default_step(*self.weights.get(c), eps));
            (complex_estimate(&g, h, eps), false)
        });
        let direction_checks = self.each_direction(directions, |scope, v, _| {
            let vs: Vec<Array2<C>> = v.layers.iter().map(|m| m.mapv(C::from_f64)).collect();
            let g = |h: f64| {
                let (j, crossed) = base.along_from(v.first, &vs, C::imaginary(h));
                (j.im(), crossed)
            };
            let h = fixed
                .unwrap_or_else(|| Method::ComplexStep.default_step(self.scope_scale(scope), eps));
            complex_estimate(&g, h, eps)
        });
        (j0, coord_checks, direction_checks)
    }

    /// Estimates every coordinate in parallel (order kept, so the result does not depend on the
    /// number of threads) and judges it.
    fn each_coord(
        &self,
        coords: &[Coord],
        estimate: impl Fn(Coord, Target) -> (Estimate, bool) + Sync,
    ) -> Vec<CoordCheck> {
        coords
            .par_iter()
            .map(|&c| {
                let a = *self.analytic.get(c);
                let floor = self.judge.floors[c.layer];
                let (est, retried) = estimate(c, target(self.judge.tolerance, a, floor));
                let gross = *self.gross.get(c);
                let (abs_error, rel_error, bound, status) =
                    self.judge
                        .judge(a, est.value, floor, gross, est.error, est.crossed);
                self.tick();
                CoordCheck {
                    coord: c,
                    analytic: a,
                    numeric: est.value,
                    abs_error,
                    rel_error,
                    bound,
                    step: est.step,
                    status,
                    retried,
                    one_step: est.one_step,
                }
            })
            .collect()
    }

    fn each_direction(
        &self,
        directions: &[Direction],
        estimate: impl Fn(Scope, &Drawn, Target) -> Estimate + Sync,
    ) -> Vec<DirectionCheck> {
        directions
            .par_iter()
            .map(|d| {
                let (scope, v) = (&d.scope, &d.vector(self.net));
                let a = v.sum_with(self.analytic, |x, y| x * y);
                let floor = FLOOR * self.span_norm(*scope);
                let est = estimate(*scope, v, target(self.judge.tolerance, a, floor));
                let gross = v.sum_with(&self.gross, |x, y| (x * y).abs());
                let (abs_error, rel_error, bound, status) =
                    self.judge
                        .judge(a, est.value, floor, gross, est.error, est.crossed);
                self.tick();
                DirectionCheck {
                    scope: *scope,
                    analytic: a,
                    numeric: est.value,
                    abs_error,
                    rel_error,
                    bound,
                    step: est.step,
                    status,
                    one_step: est.one_step,
                }
            })
            .collect()
    }

    /// The largest |θ| a direction moves, for its step.
    fn scope_scale(&self, scope: Scope) -> f64 {
        fold_scope(self.weights, scope, |m, v| m.max(v.abs()))
    }

    /// ‖g‖ over a direction's span: the largest |g·v| a unit direction there can give.
    fn span_norm(&self, scope: Scope) -> f64 {
        fold_scope(self.analytic, scope, |m, v| m + v * v).sqrt()
    }
}

/// f folded over the entries of `w` a scope spans, in layer and row-major order (only the layers
/// it reaches are visited: a part's fold costs its layer, not the network).
fn fold_scope(w: &Weights<f64>, scope: Scope, f: impl Fn(f64, f64) -> f64) -> f64 {
    let span = match scope {
        Scope::Global => 0..w.layers().len(),
        Scope::Part { layer, .. } => layer..layer + 1,
    };
    let mut acc = 0.0f64;
    for l in span {
        for ((_, c), &v) in w.layer(l).indexed_iter() {
            if spans(scope, l, c) {
                acc = f(acc, v);
            }
        }
    }
    acc
}

#[cfg(test)]
mod tests {
    use super::*;
    use plumb_engine::{Activation, Loss};

    /// Directions drawn when checked are the vectors the eager drawing gave (every direction a
    /// whole weight set, drawn in order from one generator): the same seed, the same results.
    #[test]
    fn directions_drawn_on_demand_equal_the_eager_drawing() {
        let net = Network::new(
            3,
            &[
                (4, Activation::Tanh),
                (1, Activation::Tanh),
                (2, Activation::Softmax),
            ],
            Loss::CrossEntropy,
            0.0,
        )
        .unwrap();
        let k = 3;
        let lazy = directions(&net, k, 11);
        let mut rng = Rng::new(11 ^ 0xd1_7ec7);
        assert_eq!(lazy.len(), k * (1 + 2 * net.layers().len()));
        for d in &lazy {
            let mut eager = Weights::new(
                net.layers()
                    .iter()
                    .enumerate()
                    .map(|(l, spec)| {
                        Array2::from_shape_fn(spec.shape(), |(_, c)| {
                            if spans(d.scope, l, c) {
                                rng.normal()
                            } else {
                                0.0
                            }
                        })
                    })
                    .collect(),
            );
            let norm: f64 = eager
                .layers()
                .iter()
                .flat_map(|l| l.iter())
                .map(|x| x * x)
                .sum();
            for l in eager.layers_mut() {
                l.mapv_inplace(|x| x / norm.sqrt());
            }
            let v = d.vector(&net);
            for (l, e) in eager.layers().iter().enumerate() {
                match l.checked_sub(v.first).and_then(|i| v.layers.get(i)) {
                    Some(held) => assert_eq!(held, e, "{:?}", d.scope),
                    // Outside what the direction holds, the eager vector is zero.
                    None => assert!(e.iter().all(|&x| x == 0.0), "{:?}", d.scope),
                }
            }
            // A direction within one part holds that layer alone.
            let held = if d.scope == Scope::Global { 3 } else { 1 };
            assert_eq!(v.layers.len(), held, "{:?}", d.scope);
        }
        // What is kept per direction does not grow with the network.
        assert!(std::mem::size_of::<Direction>() <= 64);
    }
}
