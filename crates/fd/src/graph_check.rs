//! The finite-difference check of the layer graph (`plumb_engine::graph`): the same checker and
//! verdict rule as an outside program's ([`check_external`](crate::check_external)), on a loss
//! whose inside plumb fully knows.
//!
//! Coordinates are (tensor, flat index) over [`Graph::tensors`]; the sample and the random
//! directions come from the one sampler ([`select_tensors`]) and generator ([`directions`]).
//! Perturbing a tensor of layer L recomputes the graph from layer L over the base pass
//! ([`Graph::forward_from`]): the layers below are read from it. A perturbation of one entry
//! goes through its kind's incremental hint ([`Graph::moved_loss`]: dense and conv update the
//! one unit or channel the entry feeds, a dense or conv layer above it only by that unit's or
//! channel's change) and the L2 term's change of that entry alone. A random direction comes as
//! the vector it is ([`Request::Along`]): the parameters moved along it, recomputed from the
//! lowest layer it moves (each moved layer copied for its own pass alone, the L2 term's change
//! summed over the moved entries), with no list of one change per parameter; the steps of one
//! request share that layer's change of z where its kind's z is linear in its tensors
//! ([`Graph::forward_along`]). Perturbations are
//! evaluated in parallel, each on its own in a workspace its thread reuses (whose buffers carry
//! no values from one loss to the next), so the result does not depend on the number of threads.
//! A step is called across a non-smooth point when the perturbed pass takes another branch than
//! the base pass ([`Graph::branches`]: a ReLU-like side, a max-pool window's argmax) in any layer, or moves a
//! value across a break in a derivative the methods' bounds assume (elu with α = 1); such a step
//! is retried 10, 100 and 1000 times smaller, and a coordinate that still crosses is `unreliable`.
//! The complex step never leaves the branch it starts on; where the base pass itself sits on a
//! tie or exactly on a kink at or above the coordinate's layer, it looks at the branches real
//! steps ±√ε·max(|θ|, 1) take instead, and calls the coordinate `unreliable` when they change.

use std::borrow::Cow;
use std::cell::{Cell, RefCell};
use std::collections::HashMap;
use std::convert::Infallible;
use std::ops::{Deref, DerefMut};
use std::sync::{Mutex, OnceLock};

use ndarray::{Array2, ArrayD, ArrayView2};
use num_complex::Complex;
use plumb_engine::graph::{
    Along, Difference, Graph, LayerScalar, Moved, Response, Shape, Tail, Trace, Workspace,
};
use plumb_engine::{Activation, Loss};
use rayon::prelude::*;

use crate::check::{
    BEND_SHARE, CheckConfig, CheckError, Coverage, DEFAULT_DIRECTIONS, Precision, Progress,
    RESPONSE_SHARE, loss_noise,
};
use crate::coverage::cover_blocks;
use crate::direction::directions;
use crate::external::{AlongVerdict, Plan, Request, check_tensors};
use crate::gross::graph_gradient_magnitude;
use crate::method::{ComplexScalar, complex_estimate, round_to};
use crate::sweep::{Curve, SweepPlan};
use crate::{
    Change, ExternalConfig, Inside, Method, OutsideCoord, OutsideDirection, OutsideTensor, Sample,
    select_tensors,
};

/// The result of a check of the graph.
#[derive(Clone, Debug)]
pub struct GraphCheck {
    pub method: Method,
    pub precision: Precision,
    /// J(θ) in the precision checked.
    pub loss: f64,
    pub coverage: Coverage,
    /// The relative tolerance, and the floor of the relative error's denominator per tensor.
    pub tolerance: f64,
    pub floors: Vec<f64>,
    /// Per checked coordinate, (tensor, flat index) in tensor and flat order.
    pub coords: Vec<OutsideCoord>,
    /// K directions over every tensor, then K per tensor (fewer in a shard).
    pub directions: Vec<OutsideDirection>,
    /// The gradient checked (the engine's own unless one was given), one per tensor.
    pub analytic: Vec<ArrayD<f64>>,
}

/// Checks the graph's own gradient at `params` (one per [`Graph::tensors`], canonical shapes) on
/// the batch `x`, `y`, computed in the configured precision.
pub fn check_graph(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    config: &CheckConfig,
    progress: Progress<'_>,
) -> Result<GraphCheck, CheckError> {
    fits(graph, params, x, y)?;
    if config.precision == Precision::F32 {
        beyond_f32(graph, params, Some(x), y)?;
    }
    let (loss, analytic) = match config.precision {
        Precision::F64 => graph.parameter_gradient(params, x, y, None),
        Precision::F32 => {
            let p: Vec<ArrayD<f32>> = params.iter().map(|t| t.mapv(|v| v as f32)).collect();
            let (xs, ys) = (x.mapv(|v| v as f32), y.mapv(|v| v as f32));
            let (loss, g) = graph.parameter_gradient(&p, xs.view(), ys.view(), None);
            (
                f64::from(loss),
                g.iter().map(|g| g.mapv(f64::from)).collect(),
            )
        }
    };
    if !loss.is_finite() {
        return Err(CheckError::LossNotFinite {
            loss,
            precision: config.precision.name(),
        });
    }
    // NaN or ±inf in the gradient (weights so large that the loss overflows): every difference
    // would be NaN, and NaN against NaN is no verdict on anybody's backward pass.
    let tensors = graph.tensors();
    if let Some(t) = analytic
        .iter()
        .position(|g| g.iter().any(|v| !v.is_finite()))
    {
        return Err(CheckError::Unusable(format!(
            "the reference gradient at these weights is not finite in {} (tensor `{}` holds NaN or an infinity): a check needs a finite loss and gradient; look at the weights' and the data's scale (plumb audit)",
            config.precision.name(),
            tensors[t].name
        )));
    }
    check_graph_gradient(graph, params, x, y, &analytic, config, progress)
}

/// Refuses a weight or batch value past f32's largest finite value (about 3.4e38, IEEE 754
/// binary32): it would be infinite in an f32 pass. `x` is `None` for a batch held in f32.
pub(crate) fn beyond_f32(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: Option<ArrayView2<f64>>,
    y: ArrayView2<f64>,
) -> Result<(), CheckError> {
    let past = |v: &f64| v.abs() > f64::from(f32::MAX);
    for (t, p) in params.iter().enumerate() {
        if let Some((index, &value)) = p.iter().enumerate().find(|(_, v)| past(v)) {
            return Err(CheckError::ParamBeyondF32 {
                tensor: t,
                name: graph.tensors()[t].name.clone(),
                index,
                value,
            });
        }
    }
    if let (Shape::Tokens { .. }, Some(x)) = (graph.input(), x) {
        let exact = f64::from(1u32 << f32::MANTISSA_DIGITS);
        if let Some(((sample, step), &id)) = x.indexed_iter().find(|(_, v)| v.abs() > exact) {
            return Err(CheckError::TokenBeyondF32 { sample, step, id });
        }
    }
    for (what, a) in [("x", x), ("y", Some(y))] {
        let Some(a) = a else { continue };
        if let Some(((sample, column), &value)) = a.indexed_iter().find(|(_, v)| past(v)) {
            return Err(CheckError::DataBeyondF32 {
                sample,
                column,
                of: what,
                value,
            });
        }
    }
    Ok(())
}

/// Checks a given gradient (the engine's, a planted mistake's, a corrupted copy, an outside one)
/// against finite differences of the graph's loss.
pub fn check_graph_gradient(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    analytic: &[ArrayD<f64>],
    config: &CheckConfig,
    progress: Progress<'_>,
) -> Result<GraphCheck, CheckError> {
    fits(graph, params, x, y)?;
    if graph.check_params(analytic).is_err() {
        return Err(CheckError::BadGradient);
    }
    if let Some(h) = config.step.filter(|h| !(h.is_finite() && *h > 0.0)) {
        return Err(CheckError::BadStep(h));
    }
    let sizes: Vec<usize> = graph
        .tensors()
        .iter()
        .map(|t| t.spec.shape.iter().product())
        .collect();
    let default_sample = config.sample.is_none();
    let sample = config
        .sample
        .unwrap_or_else(|| Sample::default_for_parameters(graph.parameters()));
    let mut picked = graph_sample(graph, sample, config.seed).map_err(CheckError::BadSample)?;
    // Which units take a response is decided on the whole sample, so a shard computes each
    // loss as the whole check does (merged shards equal it bit for bit).
    let sampled = picked.clone();
    let k = config.directions.unwrap_or(DEFAULT_DIRECTIONS);
    let mut chosen = directions(&sizes, k, config.seed);
    if let Some((part, of)) = config.shard {
        // Every n-th item from the k-th, as for the dense check.
        let mine = |i: &usize| i % of == part - 1;
        picked = keep(picked, mine);
        chosen = keep(chosen, mine);
    }
    let eps = config.precision.epsilon();
    let tolerance = config.tolerance.unwrap_or(config.precision.tolerance());
    // A dense description's entries carry the bound on their pieces the dense check gave them
    // (`graph_gradient_magnitude`); other kinds have none yet.
    let mut gross = graph_gradient_magnitude(graph, params, x, y).unwrap_or_default();
    let tensors: Vec<OutsideTensor> = graph
        .tensors()
        .iter()
        .zip(params.iter().zip(analytic))
        .enumerate()
        .map(|(t, (spec, (p, g)))| OutsideTensor {
            name: spec.name.clone(),
            values: p.iter().copied().collect(),
            gradient: g.iter().copied().collect(),
            gross: gross.get_mut(t).map(std::mem::take).unwrap_or_default(),
        })
        .collect();
    let external = ExternalConfig {
        method: config.method,
        step: config.step,
        sample,
        directions: k,
        seed: config.seed,
        eps,
        tolerance,
    };
    let checked = picked.len();
    let plan = Plan {
        picked,
        directions: chosen,
        round: match config.precision {
            Precision::F64 => round_to::<f64>,
            Precision::F32 => round_to::<f32>,
        },
        progress,
    };
    let run = Run {
        graph,
        params,
        x,
        y,
        tensors: &tensors,
        config: &external,
        plan: &plan,
        sampled: &sampled,
    };
    // The whole check on one of rayon's threads: a request's parallel losses are then spawned
    // from inside the pool, not handed to it from outside and waited for (a caller outside
    // the pool sleeps and is woken once per request: the demo CNN's check, whose directions are
    // small requests of three losses each, took 1.07x its time so; benches/README.md).
    let (loss, result, responded, shared) = rayon::scope(|_| match config.precision {
        Precision::F64 => run.run::<f64, Complex<f64>>(),
        Precision::F32 => run.run::<f32, Complex<f32>>(),
    });
    Ok(GraphCheck {
        method: config.method,
        precision: config.precision,
        loss,
        coverage: Coverage {
            sample,
            default_sample,
            directions: k,
            parameters: graph.parameters(),
            checked,
            responded,
            shared,
        },
        tolerance,
        floors: result.floors,
        coords: result.coords,
        directions: result.directions,
        analytic: analytic.to_vec(),
    })
}

fn fits(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
) -> Result<(), CheckError> {
    graph
        .check_params(params)
        .map_err(|e| CheckError::BadParams(e.to_string()))?;
    graph
        .check_batch(x, y)
        .map_err(|e| CheckError::BadBatch(e.to_string()))
}

fn keep<T>(items: Vec<T>, mine: impl Fn(&usize) -> bool) -> Vec<T> {
    items
        .into_iter()
        .enumerate()
        .filter(|(i, _)| mine(i))
        .map(|(_, t)| t)
        .collect()
}

struct Run<'a> {
    graph: &'a Graph,
    params: &'a [ArrayD<f64>],
    x: ArrayView2<'a, f64>,
    y: ArrayView2<'a, f64>,
    tensors: &'a [OutsideTensor],
    config: &'a ExternalConfig,
    plan: &'a Plan<'a>,
    /// The check's whole sample, before any shard took its share.
    sampled: &'a [(usize, usize)],
}

/// The key of a perturbation's kink verdict: its first change (tensor, index, delta bits) and how
/// many changes it has — what both a coordinate and a direction can name it by.
type Key = (u32, u64, u64, usize);

impl Run<'_> {
    /// The check in real precision S (and its complex type C for the complex step): (J(θ),
    /// result, the one-entry losses it took through a response, the direction losses that
    /// started from a shared change of z).
    fn run<S: LayerScalar, C: LayerScalar + ComplexScalar>(
        &self,
    ) -> (f64, crate::ExternalResult, usize, usize) {
        let graph = self.graph;
        let mut real = Eval::<S>::new(graph, self.params, self.x, self.y);
        let f0 = real.loss.re();
        let loss_gross = loss_magnitude(graph, &real.params, &real.trace, &real.y);
        // A loss through a response errs by at most a tenth of the round-off the checker
        // assumes for it, or the plain path computes it.
        let noise = loss_noise(self.config.eps, f0, loss_gross);
        real.respond(RESPONSE_SHARE * noise, self.sampled);
        // In f32, losses of one entry are also asked for as changes (module doc).
        if S::epsilon() > f64::EPSILON && self.config.method == Method::Central {
            real.differ(self.sampled);
        }
        // Built when a coordinate is first asked for again in f64 ([`Eval::widened`]).
        let widened_once = OnceLock::new();
        let widened = || widened_once.get_or_init(|| real.widened(self.sampled));
        let complex = (self.config.method == Method::ComplexStep)
            .then(|| Eval::<C>::new(graph, self.params, self.x, self.y));
        // Kink verdicts of the last request, looked up by the checker right after it: of
        // coordinates by their change, of steps along a direction by the step.
        // With each coordinate's verdict, the bound of its loss where it came as a change
        // (`Request::Differences`; None where it came whole).
        let seen: RefCell<Seen> = RefCell::default();
        // Of steps along a direction, with the bound of a loss that came as a change.
        let seen_along: RefCell<HashMap<u64, (bool, Option<f64>)>> = RefCell::new(HashMap::new());
        let complex_mode = complex.is_some();
        let eps = self.config.eps;
        // The losses the checker asked for that came through a response (not the look-ups of
        // kink verdicts below, whose number depends on how requests were grouped).
        let responded = Cell::new(0usize);
        // The direction losses that started from a shared change of z (Graph::forward_along).
        let shared = Cell::new(0usize);
        let mut losses = |request: Request<'_>| -> Result<Vec<f64>, Infallible> {
            seen.borrow_mut().clear();
            seen_along.borrow_mut().clear();
            match request {
                Request::Changes { count, changes } => {
                    let buckets = buckets(count, changes);
                    let out: Vec<(f64, bool, bool)> = buckets
                        .par_iter()
                        .map_init(|| real.lend(), |ws, b| real.at_in(ws, b))
                        .collect();
                    real.release();
                    responded.set(responded.get() + out.iter().filter(|o| o.2).count());
                    let mut seen = seen.borrow_mut();
                    for (b, &(_, crossed, _)) in buckets.iter().zip(&out) {
                        if let Some(key) = key_of(b) {
                            seen.insert(key, (crossed, None));
                        }
                    }
                    Ok(out.into_iter().map(|(v, _, _)| v).collect())
                }
                Request::Differences {
                    count,
                    changes,
                    wide,
                } => {
                    let buckets = buckets(count, changes);
                    let out: Vec<(f64, bool, bool, Option<f64>)> = buckets
                        .par_iter()
                        .map_init(
                            || (real.lend(), Workspace::default()),
                            |(ws, ws64), b| match wide && real.sides_agree(real.lowest_changed(b)) {
                                true => real.wide_change_in(widened(), ws64, b),
                                false => real.change_in(ws, b),
                            },
                        )
                        .collect();
                    real.release();
                    responded.set(responded.get() + out.iter().filter(|o| o.2).count());
                    let mut seen = seen.borrow_mut();
                    for (b, &(_, crossed, _, bound)) in buckets.iter().zip(&out) {
                        if let Some(key) = key_of(b) {
                            seen.insert(key, (crossed, bound));
                        }
                    }
                    Ok(out.into_iter().map(|(v, _, _, _)| v).collect())
                }
                Request::Along {
                    v,
                    deltas,
                    wide: true,
                } if real.sides_agree(real.lowest_moved(v)) => {
                    // The base's loss in S plus the change of the loss in f64 at the
                    // parameters S holds, as for one entry ([`Eval::wide_change_in`]).
                    let (wide, noise) = widened();
                    let (out, _) = wide.losses_along(v, deltas);
                    let mut seen = seen_along.borrow_mut();
                    for (d, &(_, crossed)) in deltas.iter().zip(&out) {
                        seen.insert(d.to_bits(), (crossed, (!crossed).then_some(2.0 * noise)));
                    }
                    let base = real.loss.re();
                    Ok(out
                        .into_iter()
                        .map(|(l, _)| base + (l - wide.loss))
                        .collect())
                }
                Request::Along { v, deltas, .. } => {
                    let (out, from_shared) = real.losses_along(v, deltas);
                    if from_shared {
                        shared.set(shared.get() + deltas.len());
                    }
                    let mut seen = seen_along.borrow_mut();
                    for (d, &(_, crossed)) in deltas.iter().zip(&out) {
                        seen.insert(d.to_bits(), (crossed, None));
                    }
                    Ok(out.into_iter().map(|(v, _)| v).collect())
                }
                Request::AlongDifferences { v, deltas } => {
                    let along = real
                        .sides_agree(real.lowest_moved(v))
                        .then(|| real.along_differ(v))
                        .flatten();
                    let out: Vec<(f64, bool, Option<f64>)> = deltas
                        .par_iter()
                        .map(|&d| {
                            if let Some((loss, bound)) =
                                along.as_ref().and_then(|a| real.change_along(a, d))
                            {
                                return (loss, false, Some(bound));
                            }
                            let (loss, crossed) = real.at_along(v, d, None);
                            (loss, crossed, None)
                        })
                        .collect();
                    let mut seen = seen_along.borrow_mut();
                    for (d, &(_, crossed, bound)) in deltas.iter().zip(&out) {
                        seen.insert(d.to_bits(), (crossed, bound));
                    }
                    Ok(out.into_iter().map(|(v, _, _)| v).collect())
                }
            }
        };
        let mut imaginary = |request: Request<'_>| -> Result<Vec<f64>, Infallible> {
            let eval = complex.as_ref().expect("built for the complex step");
            seen.borrow_mut().clear();
            seen_along.borrow_mut().clear();
            let (count, changes) = match request {
                Request::Changes { count, changes }
                | Request::Differences { count, changes, .. } => (count, changes),
                // The kink verdicts at the real probe steps are computed when the checker asks.
                Request::Along { v, deltas, .. } | Request::AlongDifferences { v, deltas } => {
                    return Ok(deltas
                        .par_iter()
                        .map(|&d| eval.imaginary_along(v, d))
                        .collect());
                }
            };
            let buckets = buckets(count, changes);
            // Im J at each perturbation, and for a coordinate on a tie the kink verdicts at the
            // real probe steps ±h the checker asks for next.
            let out: Vec<(f64, Vec<(Key, bool)>)> = buckets
                .par_iter()
                .map_init(
                    || eval.lend(),
                    |ws, b| {
                        let im = eval.imaginary_in(ws, b);
                        let mut probes = Vec::new();
                        if let [c] = b.as_ref() {
                            let theta = self.tensors[c.tensor as usize].values[c.index as usize];
                            let hp = Method::Forward.default_step(theta, eps);
                            for d in [hp, -hp] {
                                let probe = [Change { delta: d, ..*c }];
                                probes.push((
                                    key_of(&probe).expect("one change"),
                                    real.on_tie(&probe),
                                ));
                            }
                        }
                        (im, probes)
                    },
                )
                .collect();
            eval.release();
            real.release();
            let mut seen = seen.borrow_mut();
            Ok(out
                .into_iter()
                .map(|(im, probes)| {
                    seen.extend(probes.into_iter().map(|(k, c)| (k, (c, None))));
                    im
                })
                .collect())
        };
        // A verdict the last request did not leave is computed here (one evaluation).
        let lookup = |changes: &[Change]| -> bool {
            if let Some(c) = key_of(changes).and_then(|k| seen.borrow().get(&k).map(|v| v.0)) {
                return c;
            }
            if complex_mode {
                real.on_tie(changes)
            } else {
                real.at(changes).1
            }
        };
        let crossed = |t: usize, k: usize, d: f64| {
            lookup(&[Change {
                perturbation: 0,
                tensor: t as u32,
                index: k as u64,
                delta: d,
            }])
        };
        let crossed_along = |v: &[Vec<f64>], d: f64| {
            if let Some(&(c, _)) = seen_along.borrow().get(&d.to_bits()) {
                return c;
            }
            if complex_mode {
                real.on_tie_along(v, d)
            } else {
                real.at_along(v, d, None).1
            }
        };
        let bound_of = |t: usize, k: usize, d: f64| -> Option<f64> {
            let key = (t as u32, k as u64, d.to_bits(), 1);
            seen.borrow().get(&key).and_then(|v| v.1)
        };
        let bound_along =
            |d: f64| -> Option<f64> { seen_along.borrow().get(&d.to_bits()).and_then(|v| v.1) };
        let bent = |t: usize, k: usize, d: f64| {
            real.bent(&[Change {
                perturbation: 0,
                tensor: t as u32,
                index: k as u64,
                delta: d,
            }])
        };
        let bent_along = |v: &[Vec<f64>], d: f64| real.bent_along(v, d);
        // Below f64, the round-off a loss carries, against the same loss in f64.
        let wide = S::epsilon() > f64::EPSILON;
        let round_off = |t: usize, k: usize, d: f64| {
            let change = [Change {
                perturbation: 0,
                tensor: t as u32,
                index: k as u64,
                delta: d,
            }];
            let (loss, _) = real.at(&change);
            let (mut moved, _) = real.moved(&[], S::one());
            let mut wide: Vec<ArrayD<f64>> = moved.iter_mut().map(|p| p.mapv(|v| v.re())).collect();
            // The entry moved by the step as S holds it, exactly (the one-entry hints add δ
            // itself, not θ + δ rounded).
            wide[t].as_slice_mut().expect("standard layout")[k] += S::from_f64(d).re();
            (loss - real.wide_loss(&wide)).abs()
        };
        let round_off_along = |v: &[Vec<f64>], d: f64| {
            let (loss, _) = real.at_along(v, d, None);
            let moved = real.moved_along(v, d);
            let wide: Vec<ArrayD<f64>> = moved.iter().map(|p| p.mapv(|v| v.re())).collect();
            (loss - real.wide_loss(&wide)).abs()
        };
        let inside = Inside {
            crossed: &crossed,
            crossed_along: &crossed_along,
            loss_gross,
            sees_kinks: true,
            differences: real
                .difference
                .is_some()
                .then_some(&bound_of as &dyn Fn(usize, usize, f64) -> Option<f64>),
            widens: real.difference.is_some(),
            differences_along: real
                .along
                .is_some()
                .then_some(&bound_along as &dyn Fn(f64) -> Option<f64>),
            bent: Some(&bent),
            bent_along: Some(&bent_along),
            round_off: wide.then_some(&round_off as &dyn Fn(usize, usize, f64) -> f64),
            round_off_along: wide.then_some(&round_off_along as &AlongVerdict<'_, f64>),
        };
        let result = match check_tensors(
            self.tensors,
            f0,
            &mut losses,
            Some(&mut imaginary),
            &inside,
            self.config,
            self.plan,
        ) {
            Ok(r) => r,
            Err(never) => match never {},
        };
        (f0, result, responded.get(), shared.get())
    }
}

/// The changes of each of `count` perturbations: slices of `changes` where they come grouped by
/// perturbation in order (as the checker sends them), copies otherwise.
fn buckets(count: usize, changes: &[Change]) -> Vec<Cow<'_, [Change]>> {
    let mut out = vec![Cow::Borrowed(&changes[..0]); count];
    let mut next = 0;
    for run in changes.chunk_by(|a, b| a.perturbation == b.perturbation) {
        let p = run[0].perturbation as usize;
        if p < next {
            // Out of order: gathered by copying.
            let mut owned = vec![Vec::new(); count];
            for c in changes {
                owned[c.perturbation as usize].push(*c);
            }
            return owned.into_iter().map(Cow::Owned).collect();
        }
        out[p] = Cow::Borrowed(run);
        next = p + 1;
    }
    out
}

/// The last request's kink verdicts and bounds by key, hashed by [`KeyHasher`].
type Seen = HashMap<Key, (bool, Option<f64>), std::hash::BuildHasherDefault<KeyHasher>>;

/// A multiply-rotate hash of a [`Key`]'s four words: the checker looks a verdict up several
/// times per loss, where the default hasher (SipHash, built against hostile keys, which these
/// are not) took 2–3% of a check.
#[derive(Default)]
struct KeyHasher(u64);

impl std::hash::Hasher for KeyHasher {
    fn finish(&self) -> u64 {
        // High bits folded into the low ones the table indexes by (a step's sign and exponent
        // sit at the top of its bits).
        let x = (self.0 ^ (self.0 >> 33)).wrapping_mul(0xff51_afd7_ed55_8ccd);
        x ^ (x >> 33)
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.write_u64(u64::from(b));
        }
    }
    fn write_u64(&mut self, v: u64) {
        self.0 = (self.0.rotate_left(5) ^ v).wrapping_mul(0x9e37_79b9_7f4a_7c15);
    }
    fn write_u32(&mut self, v: u32) {
        self.write_u64(u64::from(v));
    }
    fn write_usize(&mut self, v: usize) {
        self.write_u64(v as u64);
    }
}

fn key_of(changes: &[Change]) -> Option<Key> {
    changes
        .first()
        .map(|c| (c.tensor, c.index, c.delta.to_bits(), changes.len()))
}

/// A unit's entries checked (three losses each, or more) for its response's coefficients,
/// about three plain losses, to be worth forming: a sampled check of a wide layer, with one or
/// two entries a unit, keeps the plain path.
const RESPONSE_ENTRIES: usize = 8;

/// [`RESPONSE_ENTRIES`] for losses as changes ([`Eval::differ`]): there a unit without a
/// response takes products of whole layers summed in f64 with their bounds, about twice a plain
/// loss, so that a unit's coefficients pay for themselves sooner. At batch 256 on a
/// 128-128-64-10 tanh chain, 1,000 sampled entries of its first layer (about 8 a unit): with
/// 8, the f32 check took 0.42 s; with 4, 0.28 s; with 2 or 1, 0.27 s (f64: 0.17 s).
const CHANGE_RESPONSE_ENTRIES: usize = 2;

/// The graph at its base point in scalar S, and perturbed evaluations over it.
struct Eval<'a, S> {
    graph: &'a Graph,
    params: Vec<ArrayD<S>>,
    x: Array2<S>,
    y: Array2<S>,
    trace: Trace<S>,
    loss: S,
    /// Σ w² of the decaying tensors at the base point.
    l2_sum: S,
    /// Per layer, the ties and values on a kink of the base pass at or above it.
    ties_from: Vec<usize>,
    /// Per layer, whether it or a layer above can take another branch (a kind that records
    /// its choices, an activation with a kink or a break in its derivative).
    kinks_from: Vec<bool>,
    /// The workspaces of the threads evaluating a request's losses: as many as ran at once,
    /// each reused by one thread at a time ([`Eval::lend`]), dropped after the request.
    pool: Mutex<Vec<Workspace<S>>>,
    /// Per layer, the response of the two layers above it ([`Response`]), when it has one and
    /// the check asked for them ([`Eval::respond`]): one-entry losses of that layer through it.
    responses: Vec<Option<Response<S>>>,
    /// The losses of one entry as changes ([`Difference`]), where the check asked for them
    /// ([`Eval::differ`]).
    difference: Option<Difference<S>>,
    /// The steps along a direction as changes in f64 at the parameters S holds
    /// ([`Eval::along_differ`]), built with `difference`.
    along: Option<AlongBase>,
    /// The highest layer whose branches differ between the base pass in S and the f64 pass
    /// at the same parameters (a relu unit S's rounding puts on the other side of 0), found
    /// with `difference`: a loss taken on the f64 pass for a change at or below it could find
    /// another side's derivative than S's gradient takes ([`Eval::sides_agree`]).
    split_to: Option<usize>,
}

/// What the steps along a direction read as changes: the difference form over the f64 pass at
/// the parameters the check holds in S, with those parameters and the batch widened (exactly).
struct AlongBase {
    difference: Difference<f64>,
    params: Vec<ArrayD<f64>>,
    x: Array2<f64>,
    y: Array2<f64>,
}

/// A workspace lent from an [`Eval`]'s pool for one thread's share of a request, given back
/// when dropped.
struct Lent<'p, S: Copy> {
    pool: &'p Mutex<Vec<Workspace<S>>>,
    ws: Option<Workspace<S>>,
}

impl<S: Copy> Deref for Lent<'_, S> {
    type Target = Workspace<S>;
    fn deref(&self) -> &Workspace<S> {
        self.ws.as_ref().expect("lent until dropped")
    }
}

impl<S: Copy> DerefMut for Lent<'_, S> {
    fn deref_mut(&mut self) -> &mut Workspace<S> {
        self.ws.as_mut().expect("lent until dropped")
    }
}

impl<S: Copy> Drop for Lent<'_, S> {
    fn drop(&mut self) {
        if let (Some(ws), Ok(mut pool)) = (self.ws.take(), self.pool.lock()) {
            pool.push(ws);
        }
    }
}

impl<'a, S: LayerScalar> Eval<'a, S> {
    fn new(
        graph: &'a Graph,
        params: &[ArrayD<f64>],
        x: ArrayView2<f64>,
        y: ArrayView2<f64>,
    ) -> Self {
        let params: Vec<ArrayD<S>> = params
            .iter()
            .map(|p| p.as_standard_layout().mapv(S::from_f64))
            .collect();
        let x = x.mapv(S::from_f64);
        let y = y.mapv(S::from_f64);
        let trace = graph.forward(&params, x.view());
        let loss = graph.loss_of(&params, &trace, y.view());
        let l2_sum = graph.l2_sum(&params);
        let branches = graph.branches(&trace);
        let mut ties_from = vec![0; trace.steps.len() + 1];
        for j in (0..trace.steps.len()).rev() {
            ties_from[j] = ties_from[j + 1] + branches.layers[j].ties;
        }
        let mut kinks_from = vec![false; trace.steps.len() + 1];
        for (j, node) in graph.nodes().iter().enumerate().rev() {
            let kinked = node.layer.branches() || node.activation.break_point().is_some();
            kinks_from[j] = kinks_from[j + 1] || kinked;
        }
        Eval {
            graph,
            params,
            x,
            y,
            trace,
            loss,
            l2_sum,
            ties_from,
            kinks_from,
            pool: Mutex::new(Vec::new()),
            responses: Vec::new(),
            difference: None,
            along: None,
            split_to: None,
        }
    }

    /// Takes one-entry losses as changes where the graph has a difference form, from the
    /// base pass in f64 at the same (rounded) parameters, its values rounded once to S
    /// ([`Difference::new`]), through the responses of the units with at least
    /// [`CHANGE_RESPONSE_ENTRIES`] of the `picked` entries.
    fn differ(&mut self, picked: &[(usize, usize)]) {
        let wide = |a: &ArrayD<S>| a.mapv(|v| v.re());
        let params: Vec<ArrayD<f64>> = self.params.iter().map(wide).collect();
        let (x, y) = (self.x.mapv(|v| v.re()), self.y.mapv(|v| v.re()));
        let exact = self.graph.forward(&params, x.view());
        let own = self.graph.branches(&self.trace);
        self.split_to = self.graph.branches(&exact).changed(&own).last().copied();
        self.difference =
            Difference::new(self.graph, &exact, self.x.view(), y.view()).map(|mut d| {
                d.respond(self.graph, self.y.view(), picked, CHANGE_RESPONSE_ENTRIES);
                d
            });
        self.along =
            Difference::new(self.graph, &exact, x.view(), y.view()).map(|difference| AlongBase {
                difference,
                params,
                x,
                y,
            });
    }

    /// Whether losses taken on the f64 pass (changes over it, losses in f64) see the branches
    /// S's own pass takes above layer `from`, the lowest a perturbation moves. Where they do
    /// not, such a loss could sit on another side of a kink than S's gradient, with no step
    /// crossing it: the perturbation takes S's own whole losses, with no bound of their own.
    fn sides_agree(&self, from: usize) -> bool {
        self.split_to.is_none_or(|top| from > top)
    }

    /// The lowest layer a perturbation by `changes` moves.
    fn lowest_changed(&self, changes: &[Change]) -> usize {
        let tensors = self.graph.tensors();
        changes
            .iter()
            .map(|c| tensors[c.tensor as usize].layer)
            .min()
            .unwrap_or(0)
    }

    /// The loss at one entry's change as the base's loss plus its change, with the change's
    /// bound, where there is a difference form (and its f64 base takes S's branches above the
    /// entry); otherwise as [`Eval::at_in`] with no bound. (loss, crossed, through a response,
    /// bound).
    fn change_in(
        &self,
        ws: &mut Workspace<S>,
        changes: &[Change],
    ) -> (f64, bool, bool, Option<f64>) {
        if let (Some(diff), [c]) = (&self.difference, changes)
            && self.sides_agree(self.lowest_changed(changes))
        {
            let moved = Moved {
                tensor: c.tensor as usize,
                index: c.index as usize,
                delta: S::from_f64(c.delta),
            };
            let (x, y) = (self.x.view(), self.y.view());
            let changed = diff.loss_change(ws, self.graph, &self.params, x, y, &moved);
            if let Some(ch) =
                changed.filter(|ch| ch.change.re().is_finite() && ch.bound.is_finite())
            {
                return (
                    self.loss.re() + ch.change.re(),
                    false,
                    false,
                    Some(ch.bound),
                );
            }
        }
        let (loss, crossed, responded) = self.at_in(ws, changes);
        (loss, crossed, responded, None)
    }

    /// The same check's losses in f64 at the parameters S holds (widened exactly), with
    /// their responses for the `picked` entries, and the round-off assumed for each of its
    /// losses (the f64 check's): what the coordinates whose changes in S did not settle them
    /// are asked again with ([`Eval::wide_change_in`]).
    fn widened(&self, picked: &[(usize, usize)]) -> (Eval<'a, f64>, f64) {
        let params: Vec<ArrayD<f64>> = self.params.iter().map(|a| a.mapv(|v| v.re())).collect();
        let (x, y) = (self.x.mapv(|v| v.re()), self.y.mapv(|v| v.re()));
        let mut wide = Eval::<f64>::new(self.graph, &params, x.view(), y.view());
        let gross = loss_magnitude(self.graph, &wide.params, &wide.trace, &wide.y);
        let noise = loss_noise(f64::EPSILON, wide.loss, gross);
        wide.respond(RESPONSE_SHARE * noise, picked);
        (wide, noise)
    }

    /// The loss at one entry's change as the base's loss in S plus the change of the loss in
    /// f64 at the parameters S holds (`Request::Differences` with `wide`): the difference of
    /// two f64 losses of `wide` ([`Eval::widened`]), bounded by twice the round-off assumed
    /// for each (`noise`). The step is the one S takes, widened exactly. A step that crosses
    /// a kink comes with no bound, as a whole loss does. (loss, crossed, through a response,
    /// bound).
    fn wide_change_in(
        &self,
        (wide, noise): &(Eval<'_, f64>, f64),
        ws: &mut Workspace<f64>,
        changes: &[Change],
    ) -> (f64, bool, bool, Option<f64>) {
        let changes: Vec<Change> = changes
            .iter()
            .map(|c| Change {
                delta: S::from_f64(c.delta).re(),
                ..*c
            })
            .collect();
        let (loss, crossed, responded) = wide.at_in(ws, &changes);
        let bound = (!crossed).then_some(2.0 * noise);
        (
            self.loss.re() + (loss - wide.loss),
            crossed,
            responded,
            bound,
        )
    }

    /// What the steps along v share as changes ([`Difference::along`]), where the graph has a
    /// difference form that covers every layer v moves. In f64 at the parameters S holds, not
    /// in S: a direction moves every unit of a layer at once, and in f32 the running bound of
    /// such a change (γ(fan-in) of each product's terms, u of each sample's change, summed
    /// over cancelling terms) stood 10³–10⁴ times above its actual error, so that 5 of the
    /// benchmark's 28 directions settled on one step (docs/engine.md, "Losses as changes").
    /// A check has a few dozen directions against a hundred thousand coordinates: their
    /// losses are not the check's time.
    fn along_differ(&self, v: &[Vec<f64>]) -> Option<Along<f64>> {
        let wide = self.along.as_ref()?;
        wide.difference
            .along(self.graph, &wide.params, wide.x.view(), v)
    }

    /// The loss at the step d along a direction as the base's loss plus its change, with the
    /// change's bound ([`Difference::along_change`]); `None` where it has no difference form.
    fn change_along(&self, along: &Along<f64>, d: f64) -> Option<(f64, f64)> {
        let wide = self.along.as_ref()?;
        let ch = wide
            .difference
            .along_change(self.graph, &wide.params, wide.y.view(), along, d)?;
        (ch.change.is_finite() && ch.bound.is_finite())
            .then(|| (self.loss.re() + ch.change, ch.bound))
    }

    /// Takes one-entry losses through each layer's response where it has one, for losses whose
    /// bound is at most `limit` (the plain path otherwise), of the units with at least
    /// [`RESPONSE_ENTRIES`] of the `picked` entries; none when the limit is not finite (a base
    /// loss of ±inf or NaN leaves no round-off to stay under).
    fn respond(&mut self, limit: f64, picked: &[(usize, usize)]) {
        if !limit.is_finite() {
            return;
        }
        let (graph, y) = (self.graph, self.y.view());
        self.responses = (0..graph.nodes().len())
            .map(|j| {
                Response::new(graph, &self.trace, y, j, limit)
                    .map(|r| r.for_entries(graph, picked, RESPONSE_ENTRIES))
            })
            .collect();
    }

    /// Drops the pool's workspaces: after a request, so that their buffers are not held
    /// through the directions (whose passes copy layers) or the rest of the check.
    fn release(&self) {
        if let Ok(mut pool) = self.pool.lock() {
            pool.clear();
        }
    }

    /// A workspace for one thread's losses, from the pool (or new).
    fn lend(&self) -> Lent<'_, S> {
        let ws = self.pool.lock().ok().and_then(|mut p| p.pop());
        Lent {
            pool: &self.pool,
            ws: Some(ws.unwrap_or_default()),
        }
    }

    /// The parameters moved by `changes` (each delta times `unit`), and the first layer moved.
    fn moved(&self, changes: &[Change], unit: S) -> (Vec<ArrayD<S>>, usize) {
        let mut moved = self.params.clone();
        let mut from = usize::MAX;
        // A direction moves every parameter: each tensor's slice is looked up once.
        let mut slices: Vec<&mut [S]> = moved
            .iter_mut()
            .map(|p| p.as_slice_mut().expect("standard layout"))
            .collect();
        for c in changes {
            let t = c.tensor as usize;
            from = from.min(self.graph.tensors()[t].layer);
            slices[t][c.index as usize] += unit * S::from_f64(c.delta);
        }
        (moved, from.min(self.trace.steps.len() - 1))
    }

    /// The loss (and the recomputed layers) at the step d·v along a direction, times `unit`.
    /// Only the layers v moves are copied, one at a time while their pass runs (entries where v
    /// is 0 are left alone, as a list of changes would leave them), and the L2 term is the
    /// base's Σ w² plus Σ (w′ − w)(w′ + w) over the moved entries of the decaying tensors, in
    /// tensor and flat order. That sum rounds each term within 3u of its value and adds k of
    /// them within γ(k) (u = ε/2, Higham §3.1), so the L2 term is within
    /// γ(k + 3)·Σ|w′² − w²| + u·(Σ w² + Σ w′²) of exact, where a fresh sum over all n decaying
    /// entries is within γ(n)·Σ w′²: for a step, whose Σ|w′² − w²| is about 2|d|·Σ|w·v|, the
    /// difference f(θ + d·v) − f(θ) keeps the base's Σ w² exactly and rounds the change alone.
    ///
    /// With `hint` ([`Eval::along_change`]), the lowest moved layer's z is the base's plus
    /// the step times it rather than recomputed.
    fn perturbed_along(
        &self,
        v: &[Vec<f64>],
        d: f64,
        unit: S,
        hint: Option<&Array2<S>>,
    ) -> (S, Tail<S>) {
        let graph = self.graph;
        let moves = |t: usize| v[t].iter().any(|w| *w != 0.0);
        let from = self.lowest_moved(v);
        let mut change = S::zero();
        let mut moving = |j: usize, own: &[ArrayD<S>]| -> Option<Vec<ArrayD<S>>> {
            let tensors = graph.nodes()[j].tensors();
            if !tensors.clone().any(moves) {
                return None;
            }
            let mut copy = own.to_vec();
            for (t, p) in tensors.zip(copy.iter_mut()) {
                let decays = graph.decays(t);
                let values = p.as_slice_mut().expect("standard layout");
                for (x, &w) in values.iter_mut().zip(&v[t]) {
                    if w != 0.0 {
                        let was = *x;
                        *x += unit * S::from_f64(d * w);
                        if decays {
                            change += (*x - was) * (*x + was);
                        }
                    }
                }
            }
            Some(copy)
        };
        let (params, x, base) = (&self.params, self.x.view(), &self.trace);
        let tail = match hint {
            Some(c) => {
                let t = unit * S::from_f64(d);
                graph.forward_along(params, x, base, from, c, t, &mut moving)
            }
            None => graph.forward_from_moving(params, x, base, from, &mut moving),
        };
        let loss = graph.loss_from_sum(&tail, self.y.view(), self.l2_sum + change);
        (loss, tail)
    }

    /// The loss at the real step d·v and whether it took another branch than the base pass.
    fn at_along(&self, v: &[Vec<f64>], d: f64, change: Option<&Array2<S>>) -> (f64, bool) {
        let (loss, tail) = self.perturbed_along(v, d, S::one(), change);
        (loss.re(), self.crossed(&tail))
    }

    /// [`Eval::at_along`] at each of `deltas`, several steps sharing the lowest moved layer's
    /// change of z where it has one ([`Eval::along_change`]; the second value says whether).
    fn losses_along(&self, v: &[Vec<f64>], deltas: &[f64]) -> (Vec<(f64, bool)>, bool) {
        let change = (deltas.len() > 1).then(|| self.along_change(v)).flatten();
        let out = deltas
            .par_iter()
            .map(|&d| self.at_along(v, d, change.as_ref()))
            .collect();
        (out, change.is_some())
    }

    /// The change of the lowest layer v moves in its z per unit step along v, where that layer's
    /// z is linear in its tensors ([`Graph::along_change`]); `None` otherwise.
    fn along_change(&self, v: &[Vec<f64>]) -> Option<Array2<S>> {
        // In f64 only: in f32 the shared change moved verdicts at the tolerance's edge
        // (docs/engine.md, "A request of several steps"); f32 takes a pass per step.
        if S::epsilon() > f64::EPSILON {
            return None;
        }
        let from = self.lowest_moved(v);
        let node = &self.graph.nodes()[from];
        let tensors: Vec<ArrayD<S>> = node
            .tensors()
            .map(|t| {
                // A tensor the direction does not span has no values in v: zeros.
                let mut a = self.params[t].mapv(|_| S::zero());
                for (s, &w) in a.iter_mut().zip(&v[t]) {
                    *s = S::from_f64(w);
                }
                a
            })
            .collect();
        self.graph
            .along_change(self.x.view(), &self.trace, from, &tensors)
    }

    /// [`Eval::on_tie`] for the step d·v.
    fn on_tie_along(&self, v: &[Vec<f64>], d: f64) -> bool {
        self.ties_from[self.lowest_moved(v)] > 0 && self.at_along(v, d, None).1
    }

    /// The lowest layer the direction v moves (tensors are numbered in layer order), 0 if none.
    fn lowest_moved(&self, v: &[Vec<f64>]) -> usize {
        v.iter()
            .position(|vt| vt.iter().any(|w| *w != 0.0))
            .map_or(0, |t| self.graph.tensors()[t].layer)
    }

    fn tail(&self, moved: &[ArrayD<S>], from: usize) -> Tail<S> {
        self.graph
            .forward_from(moved, self.x.view(), &self.trace, from)
    }

    /// The loss at the perturbation by `changes`, each delta times `unit`, whether it took
    /// another branch than the base pass, and whether it came through a response: one entry
    /// through its layer's response or the kinds' hints in the buffers of `ws` (its tail left
    /// there), several by recomputing from the lowest layer.
    fn perturbed_in(
        &self,
        ws: &mut Workspace<S>,
        changes: &[Change],
        unit: S,
        branches: bool,
    ) -> (S, bool, bool) {
        if let [c] = changes {
            let moved = Moved {
                tensor: c.tensor as usize,
                index: c.index as usize,
                delta: unit * S::from_f64(c.delta),
            };
            let (x, y) = (self.x.view(), self.y.view());
            let layer = self.graph.tensors()[moved.tensor].layer;
            if let Some(r) = self.responses.get(layer).and_then(Option::as_ref) {
                let (params, trace, l2) = (&self.params, &self.trace, self.l2_sum);
                if let Some(a) = r.loss_in(ws, self.graph, params, x, trace, y, l2, &moved) {
                    return (a.loss, branches && a.crossed, true);
                }
            }
            let loss =
                self.graph
                    .moved_loss_in(ws, &self.params, x, &self.trace, y, self.l2_sum, &moved);
            let tail = ws.tail().expect("left by the loss");
            return (loss, branches && self.crossed(tail), false);
        }
        let (moved, from) = self.moved(changes, unit);
        let tail = self.tail(&moved, from);
        let loss = self.graph.loss_from(&moved, &tail, self.y.view());
        (loss, branches && self.crossed(&tail), false)
    }

    /// The loss at a real perturbation and whether it took another branch than the base pass.
    fn at(&self, changes: &[Change]) -> (f64, bool) {
        let (loss, crossed, _) = self.at_in(&mut self.lend(), changes);
        (loss, crossed)
    }

    /// [`Eval::at`] in the buffers of `ws`, and whether the loss came through a response.
    fn at_in(&self, ws: &mut Workspace<S>, changes: &[Change]) -> (f64, bool, bool) {
        let (loss, crossed, responded) = self.perturbed_in(ws, changes, S::one(), true);
        (loss.re(), crossed, responded)
    }

    /// Whether the base pass sits on a tie or a kink at or above the first layer `changes` move,
    /// and a real step by them takes another branch.
    fn on_tie(&self, changes: &[Change]) -> bool {
        let from = changes
            .iter()
            .map(|c| self.graph.tensors()[c.tensor as usize].layer)
            .min()
            .unwrap_or(0);
        self.ties_from[from] > 0 && self.at(changes).1
    }

    /// Whether the step by `changes` takes some activation past [`BEND_SHARE`] of its Taylor
    /// radius around the base pass ([`Graph::bent`]), by a whole pass at the moved parameters:
    /// asked for a disagreement only, so its cost is not the check's.
    fn bent(&self, changes: &[Change]) -> bool {
        let (moved, _) = self.moved(changes, S::one());
        let trace = self.graph.forward(&moved, self.x.view());
        self.graph.bent(&self.trace, &trace, BEND_SHARE)
    }

    /// [`Eval::bent`] for the step d·v along a direction.
    fn bent_along(&self, v: &[Vec<f64>], d: f64) -> bool {
        let trace = self.graph.forward(&self.moved_along(v, d), self.x.view());
        self.graph.bent(&self.trace, &trace, BEND_SHARE)
    }

    /// The parameters at the step d·v, each moved entry rounded as [`Eval::perturbed_along`]
    /// rounds it.
    fn moved_along(&self, v: &[Vec<f64>], d: f64) -> Vec<ArrayD<S>> {
        let mut moved = self.params.clone();
        for (p, vt) in moved.iter_mut().zip(v) {
            let values = p.as_slice_mut().expect("standard layout");
            for (x, &w) in values.iter_mut().zip(vt) {
                if w != 0.0 {
                    *x += S::from_f64(d * w);
                }
            }
        }
        moved
    }

    /// The loss at `params` (S's values widened) computed in f64 on the batch as S holds it.
    fn wide_loss(&self, params: &[ArrayD<f64>]) -> f64 {
        let (x, y) = (self.x.mapv(|v| v.re()), self.y.mapv(|v| v.re()));
        self.graph.loss(params, x.view(), y.view())
    }

    /// Whether a layer the tail recomputed took another branch than the base pass: a kind's
    /// choice ([`Graph::branches`]), or a value on the other side of its activation's kink or of
    /// a break in a derivative (elu with α = 1), compared value by value with nothing collected.
    fn crossed(&self, tail: &Tail<S>) -> bool {
        self.kinks_from[tail.from] && self.graph.tail_crossed(&self.trace, tail)
    }
}

impl<S: LayerScalar + ComplexScalar> Eval<'_, S> {
    /// Im J at the perturbation by i·delta.
    fn imaginary(&self, changes: &[Change]) -> f64 {
        self.imaginary_in(&mut self.lend(), changes)
    }

    /// [`Eval::imaginary`] in the buffers of `ws`.
    fn imaginary_in(&self, ws: &mut Workspace<S>, changes: &[Change]) -> f64 {
        self.perturbed_in(ws, changes, S::imaginary(1.0), false)
            .0
            .im()
    }

    /// Im J at the step i·d·v.
    fn imaginary_along(&self, v: &[Vec<f64>], d: f64) -> f64 {
        self.perturbed_along(v, d, S::imaginary(1.0), None).0.im()
    }
}

/// The error of each method against step size (the V-curve) for chosen (tensor, flat index)
/// coordinates of the graph, against `analytic`: every method of the plan at every step, each
/// perturbation recomputed from its layer up.
pub fn sweep_graph(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    analytic: &[ArrayD<f64>],
    plan: &SweepPlan<(usize, usize)>,
) -> Result<Vec<Curve<(usize, usize)>>, CheckError> {
    fits(graph, params, x, y)?;
    if graph.check_params(analytic).is_err() {
        return Err(CheckError::BadGradient);
    }
    let sizes: Vec<usize> = analytic.iter().map(|a| a.len()).collect();
    if let Some(&(t, k)) = plan
        .coords
        .iter()
        .find(|&&(t, k)| t >= sizes.len() || k >= sizes[t])
    {
        return Err(CheckError::BadSample(format!(
            "coordinate ({t}, {k}) is not in the network's tensors"
        )));
    }
    Ok(match plan.precision {
        Precision::F64 => sweep_in::<f64, Complex<f64>>(graph, params, x, y, analytic, plan),
        Precision::F32 => sweep_in::<f32, Complex<f32>>(graph, params, x, y, analytic, plan),
    })
}

fn sweep_in<S: LayerScalar, C: LayerScalar + ComplexScalar>(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    analytic: &[ArrayD<f64>],
    plan: &SweepPlan<(usize, usize)>,
) -> Vec<Curve<(usize, usize)>> {
    let real = Eval::<S>::new(graph, params, x, y);
    let j0 = real.loss.re();
    let complex = plan
        .methods
        .contains(&Method::ComplexStep)
        .then(|| Eval::<C>::new(graph, params, x, y));
    plan.coords
        .par_iter()
        .map(|&(t, k)| {
            let change = |delta: f64| Change {
                perturbation: 0,
                tensor: t as u32,
                index: k as u64,
                delta,
            };
            let f = |d: f64| real.at(&[change(d)]);
            let estimates = plan
                .methods
                .iter()
                .map(|&m| {
                    plan.steps
                        .iter()
                        .map(|&h| match (m, &complex) {
                            (Method::ComplexStep, Some(c)) => {
                                let g = |h: f64| (c.imaginary(&[change(h)]), false);
                                complex_estimate(&g, h, S::epsilon()).value
                            }
                            _ => m.estimate(&f, j0, h, 0.0, round_to::<S>).value,
                        })
                        .collect()
                })
                .collect();
            Curve {
                coord: (t, k),
                analytic: analytic[t].iter().nth(k).copied().unwrap_or(f64::NAN),
                estimates,
            }
        })
        .collect()
}

/// Σ of the absolute values of the terms the graph's loss sums (under its reduction), plus the L2
/// term: round-off in J follows these pieces, not |J| (a confident network's loss is a small
/// difference of large terms).
pub fn loss_magnitude<S: LayerScalar>(
    graph: &Graph,
    params: &[ArrayD<S>],
    trace: &Trace<S>,
    y: &Array2<S>,
) -> f64 {
    let last = graph.nodes().last().expect("a graph has layers");
    let rows = match graph.output() {
        Shape::Sequence { steps, .. } => steps,
        _ => 1,
    };
    let z = &trace.steps.last().expect("a graph has layers").out;
    let a = trace.output();
    let n = z.nrows() * rows;
    let width = z.ncols() / rows.max(1);
    let re = |v: &S| v.re();
    let zs: Vec<f64> = z.iter().map(re).collect();
    let ys: Vec<f64> = y.iter().map(re).collect();
    let data: f64 = match (graph.loss_config().loss, last.activation) {
        (Loss::CrossEntropy, Activation::Softmax) => zs
            .chunks(width.max(1))
            .zip(ys.chunks(width.max(1)))
            .map(|(zr, yr)| {
                let shift = zr.iter().fold(f64::NEG_INFINITY, |m, v| m.max(*v));
                let lse = shift + zr.iter().map(|v| (v - shift).exp()).sum::<f64>().ln();
                zr.iter()
                    .zip(yr)
                    .map(|(zv, yv)| yv.abs() * (lse.abs() + zv.abs()))
                    .sum::<f64>()
            })
            .sum(),
        (Loss::CrossEntropy, _) => zs
            .iter()
            .zip(&ys)
            .map(|(&zv, &yv)| Activation::Softplus.value(zv).abs() + (yv * zv).abs())
            .sum(),
        (Loss::SquaredError, _) => {
            0.5 * a
                .iter()
                .zip(&ys)
                .map(|(av, yv)| (av.re().abs() + yv.abs()).powi(2))
                .sum::<f64>()
        }
    };
    let reduce = graph.loss_config().reduction.factor(n);
    let l2: f64 = params
        .iter()
        .enumerate()
        .filter(|(t, _)| graph.decays(*t))
        .flat_map(|(_, p)| p.iter())
        .map(|w| w.re() * w.re())
        .sum::<f64>()
        * graph.loss_config().l2_factor(z.nrows());
    data * reduce + l2
}

/// The (tensor, flat index) pairs a graph check of this sample and seed takes, sorted: the one
/// sampler ([`select_tensors`]) with every gate block and head of a sampled tensor reached. The
/// check and the merge of its shards both take it from here.
pub fn graph_sample(
    graph: &Graph,
    sample: Sample,
    seed: u64,
) -> Result<Vec<(usize, usize)>, String> {
    let sizes: Vec<usize> = graph
        .tensors()
        .iter()
        .map(|t| t.spec.shape.iter().product())
        .collect();
    let layers: Vec<usize> = graph.tensors().iter().map(|t| t.layer).collect();
    let mut picked = select_tensors(&sizes, &layers, sample, seed)?;
    cover_graph_blocks(graph, &sizes, &mut picked, seed);
    Ok(picked)
}

/// Every gate block and head of a sampled tensor reached ([`cover_blocks`]).
fn cover_graph_blocks(graph: &Graph, sizes: &[usize], picked: &mut [(usize, usize)], seed: u64) {
    let at = |t: usize| {
        let layer = graph.tensors()[t].layer;
        let node = &graph.nodes()[layer];
        (node, t - node.tensors().start)
    };
    cover_blocks(
        picked,
        sizes,
        |t| {
            let (node, own) = at(t);
            node.layer.sample_blocks(own)
        },
        |t, k| {
            let (node, own) = at(t);
            node.layer.sample_block(own, k)
        },
        seed,
    );
}
