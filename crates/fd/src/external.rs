//! The finite-difference check of a gradient against a loss that plumb can only ask for: an outside
//! program's. Perturbations go out in batches (one request for many coordinates), so a check of a
//! large network costs few round trips.

use std::collections::HashMap;

use plumb_engine::Rng;

use crate::check::{CoordCheck, RETRIES, Rule, Status};
use crate::direction::{Direction, directions};
use crate::method::{Method, complex_estimate, second_difference_steps, smooth_across};
use crate::{Progress, Sample, loss_noise, relative_floor};

/// One tensor of the outside program: its parameters and the gradient it returned for them.
#[derive(Clone, Debug)]
pub struct OutsideTensor {
    pub name: String,
    pub values: Vec<f64>,
    pub gradient: Vec<f64>,
    /// A bound on the pieces each gradient entry is summed from (`graph_gradient_magnitude` of the
    /// reference), for the round-off allowance; empty when nothing is known of the inside.
    pub gross: Vec<f64>,
}

/// What plumb knows of the program's inside, from the reference engine running the same network:
/// whether a step crosses a ReLU-like kink, along one coordinate or a direction (one vector per
/// tensor), and the pieces the loss is summed from. `Inside::opaque()` for a black box.
pub struct Inside<'a> {
    pub crossed: &'a dyn Fn(usize, usize, f64) -> bool,
    pub crossed_along: &'a dyn Fn(&[Vec<f64>], f64) -> bool,
    pub loss_gross: f64,
    /// Whether `crossed` sees the kinks. When it does not, a coordinate that would be a mismatch
    /// is first asked whether the loss is smooth across its stencil ([`smooth_across`]).
    pub sees_kinks: bool,
    /// Where the loss can also be asked for as a change ([`Request::Differences`]), the bound
    /// on the error of each such loss of the last request, by coordinate and step: `None` for a
    /// loss that came whole. Central differences then first try to settle each coordinate on
    /// losses as changes, judged by their own bounds rather than the scalar round-off of a
    /// whole loss; a coordinate that does not settle so takes the ladder of whole losses, as
    /// without them. `None` for an outside program (the scalar model).
    pub differences: Option<&'a dyn Fn(usize, usize, f64) -> Option<f64>>,
    /// Whether the loss can also be taken in f64 at the parameters it holds, as the base's
    /// loss plus the difference of two f64 losses (`Request::Differences` and `Request::Along`
    /// with `wide`, their bounds then from `differences` and `differences_along`): a
    /// coordinate or direction its own losses do not settle at one step is asked again so, at
    /// an f64 check's step, before it takes the ladder.
    pub widens: bool,
    /// As `differences`, for the steps along a direction ([`Request::AlongDifferences`]): the
    /// bound of the last request's loss at step d, `None` where it came whole.
    pub differences_along: Option<&'a dyn Fn(f64) -> Option<f64>>,
    /// Whether a step along one coordinate (`bent`) or a direction (`bent_along`) moves some
    /// activation past [`BEND_SHARE`](crate::BEND_SHARE) of its Taylor radius: a disagreement
    /// whose stencil does is estimated again with such steps counted as crossings. `None`
    /// where nothing is known of the inside.
    pub bent: Option<&'a dyn Fn(usize, usize, f64) -> bool>,
    pub bent_along: Option<&'a AlongVerdict<'a, bool>>,
    /// The round-off a loss at a step along one coordinate (`round_off`) or a direction
    /// (`round_off_along`) actually carries, measured against the same loss in f64: a
    /// disagreement is judged again with it where it exceeds the round-off assumed per loss.
    /// `None` where the loss is f64's own or nothing is known of the inside.
    pub round_off: Option<&'a dyn Fn(usize, usize, f64) -> f64>,
    pub round_off_along: Option<&'a AlongVerdict<'a, f64>>,
}

/// A figure of the step d along a direction v (one vector per tensor), for [`Inside`].
pub type AlongVerdict<'a, T> = dyn Fn(&[Vec<f64>], f64) -> T + 'a;

impl Inside<'static> {
    pub fn opaque() -> Inside<'static> {
        Inside {
            crossed: &|_, _, _| false,
            crossed_along: &|_, _| false,
            loss_gross: 0.0,
            sees_kinks: false,
            differences: None,
            widens: false,
            differences_along: None,
            bent: None,
            bent_along: None,
            round_off: None,
            round_off_along: None,
        }
    }
}

/// One change of a perturbation: add `delta` to entry `index` of tensor `tensor`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Change {
    pub perturbation: u32,
    pub tensor: u32,
    pub index: u64,
    pub delta: f64,
}

/// What to check and how; `eps` is the machine epsilon of the program's arithmetic.
#[derive(Clone, Debug)]
pub struct ExternalConfig {
    pub method: Method,
    pub step: Option<f64>,
    pub sample: Sample,
    pub directions: usize,
    pub seed: u64,
    pub eps: f64,
    pub tolerance: f64,
}

/// Entry `index` (flat, in the tensor's canonical order) of tensor `tensor`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Entry {
    pub tensor: usize,
    pub index: usize,
}

/// One coordinate's verdict, at an entry of the tensors.
pub type OutsideCoord = CoordCheck<Entry>;

/// One random direction's verdict; `tensor` is None for a direction over every tensor.
#[derive(Clone, Debug, PartialEq)]
pub struct OutsideDirection {
    pub tensor: Option<usize>,
    pub analytic: f64,
    pub numeric: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub status: Status,
    /// Whether central differences settled it at ±h alone ([`Target`](crate::Target)).
    pub one_step: bool,
    /// Whether its losses were computed in f64 at the parameters a coarser precision holds
    /// ([`Inside::widens`]), as a coordinate's.
    pub wide: bool,
}

#[derive(Clone, Debug)]
pub struct ExternalResult {
    pub coords: Vec<OutsideCoord>,
    pub directions: Vec<OutsideDirection>,
    /// The floor of the relative error's denominator per tensor ([`relative_floor`]).
    pub floors: Vec<f64>,
}

/// The outside loss at `count` perturbations given as changes.
pub type Losses<'a, E> = dyn FnMut(usize, &[Change]) -> Result<Vec<f64>, E> + 'a;

/// What the checker asks a loss for: perturbations listed as changes (coordinates), or steps
/// along one direction `v` (one vector per tensor, empty outside its span), which a loss that
/// holds the parameters itself takes as the vector it is rather than one change per parameter.
pub(crate) enum Request<'r> {
    Changes {
        count: usize,
        changes: &'r [Change],
    },
    /// With `wide`, each loss as the base's loss plus its change in f64 at the parameters the
    /// loss holds, whole losses in f64 subtracted ([`Inside::widens`]; its bound then comes
    /// from [`Inside::differences_along`], `None` where a step crossed a kink).
    Along {
        v: &'r [Vec<f64>],
        deltas: &'r [f64],
        wide: bool,
    },
    /// As `Changes`, each loss computed as the base's loss plus its change where the loss can
    /// ([`Inside::differences`] then bounds each one's error); whole where it cannot. With
    /// `wide`, the changes in f64 at the parameters the loss holds ([`Inside::widens`]).
    Differences {
        count: usize,
        changes: &'r [Change],
        wide: bool,
    },
    /// As `Along`, each loss computed as the base's loss plus its change where the loss can
    /// ([`Inside::differences_along`] then bounds each one's error); whole where it cannot.
    AlongDifferences {
        v: &'r [Vec<f64>],
        deltas: &'r [f64],
    },
}

/// A loss the checker asks: one value per perturbation of the request.
pub(crate) type Ask<'a, E> = dyn FnMut(Request<'_>) -> Result<Vec<f64>, E> + 'a;

/// Most perturbations in one request.
const BATCH: usize = 2048;

/// Checks each tensor's gradient against differences of the outside loss. `losses(count, changes)`
/// returns the loss at `count` perturbations; `inside` says what is known of kinks and round-off;
/// `f0` is the loss at the parameters. Steps that cross a kink are retried 10, 100, 1000× smaller.
pub fn check_external<E>(
    tensors: &[OutsideTensor],
    f0: f64,
    losses: &mut Losses<'_, E>,
    inside: &Inside<'_>,
    config: &ExternalConfig,
) -> Result<ExternalResult, E> {
    let sizes: Vec<usize> = tensors.iter().map(|t| t.values.len()).collect();
    let plan = Plan {
        picked: select_flat(&sizes, config.sample, config.seed),
        directions: directions(&sizes, config.directions, config.seed),
        round: |h| h,
        progress: &|_, _| {},
    };
    // An outside program takes every perturbation as changes.
    let mut ask = |request: Request<'_>| match request {
        Request::Changes { count, changes } | Request::Differences { count, changes, .. } => {
            losses(count, changes)
        }
        Request::Along { v, deltas, .. } | Request::AlongDifferences { v, deltas } => {
            losses(deltas.len(), &changes_along(v, deltas))
        }
    };
    check_tensors(tensors, f0, &mut ask, None, inside, config, &plan)
}

/// What [`check_tensors`] checks besides the configuration: the coordinates and directions chosen
/// (and sharded) by the caller, how a step is rounded to the precision the loss is computed in,
/// and where progress goes.
pub(crate) struct Plan<'a> {
    pub picked: Vec<(usize, usize)>,
    pub directions: Vec<Direction>,
    pub round: fn(f64) -> f64,
    pub progress: Progress<'a>,
}

/// The check itself, for any loss plumb can ask for at perturbations: an outside program's, or the
/// layer graph's. `imaginary`, when the loss can be evaluated at complex
/// parameters, returns Im J at perturbations by i·delta; it is what the complex step needs. There
/// `inside.crossed(t, k, ±h)` at a forward difference's step h says whether the point sits on a
/// non-smooth point of the coordinate (the complex step itself never leaves the branch it starts
/// on).
pub(crate) fn check_tensors<E>(
    tensors: &[OutsideTensor],
    f0: f64,
    losses: &mut Ask<'_, E>,
    mut imaginary: Option<&mut Ask<'_, E>>,
    inside: &Inside<'_>,
    config: &ExternalConfig,
    plan: &Plan<'_>,
) -> Result<ExternalResult, E> {
    let total = plan.picked.len() + plan.directions.len();
    let done = std::cell::Cell::new(0usize);
    let tick = || {
        done.set(done.get() + 1);
        (plan.progress)(done.get(), total);
    };
    let crossed = inside.crossed;
    let method = config.method;
    let sizes: Vec<usize> = tensors.iter().map(|t| t.values.len()).collect();
    let picked = &plan.picked;
    let noise = loss_noise(config.eps, f0, inside.loss_gross);
    let gross = |t: usize, k: usize| tensors[t].gross.get(k).copied().unwrap_or(0.0);
    let round = plan.round;
    let reach = if config.step.is_some() {
        0
    } else {
        method.reach(config.eps)
    };
    let scale = tensors
        .iter()
        .flat_map(|t| t.gradient.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let floors: Vec<f64> = tensors
        .iter()
        .map(|t| {
            let own = t.gradient.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            relative_floor(own, scale, config.eps, config.tolerance)
        })
        .collect();
    let rule = Rule {
        eps: config.eps,
        tolerance: config.tolerance,
        scale,
    };
    let step_of = |t: usize, k: usize| {
        config
            .step
            .unwrap_or_else(|| method.default_step(tensors[t].values[k], config.eps))
    };

    // The complex step: one evaluation per coordinate, and a look at the branches a real step
    // would take (a forward difference's, √ε·max(|θ|, 1): small, so that it breaks a tie without
    // reaching kinks the complex step does not see).
    let probe_step = |theta: f64| Method::Forward.default_step(theta, config.eps);
    let mut estimates: Vec<Option<(crate::Estimate, bool)>> = vec![None; picked.len()];
    // Which coordinates settled on losses in f64 ([`Inside::widens`]).
    let mut widened = vec![false; picked.len()];
    let complex = method == Method::ComplexStep;
    if complex {
        let imaginary = imaginary
            .as_deref_mut()
            .expect("the complex step needs a loss that takes complex parameters");
        let all: Vec<usize> = (0..picked.len()).collect();
        for chunk in all.chunks(BATCH) {
            let changes: Vec<Change> = chunk
                .iter()
                .enumerate()
                .map(|(p, &i)| {
                    let (t, k) = picked[i];
                    Change {
                        perturbation: p as u32,
                        tensor: t as u32,
                        index: k as u64,
                        delta: step_of(t, k),
                    }
                })
                .collect();
            let values = imaginary(Request::Changes {
                count: changes.len(),
                changes: &changes,
            })?;
            for (&i, im) in chunk.iter().zip(values) {
                let (t, k) = picked[i];
                let hp = probe_step(tensors[t].values[k]);
                let g = |_: f64| (im, crossed(t, k, hp) || crossed(t, k, -hp));
                estimates[i] = Some((complex_estimate(&g, step_of(t, k), config.eps), false));
                tick();
            }
        }
    }
    // Round one at the default steps, then the kink retries at smaller ones. Central differences
    // first ask for ±h and 2h alone: a coordinate that settles there ([`Method::settle_one_step`])
    // costs three losses; the others are asked for the rest of their stencil in a second request.
    let settle = method == Method::Central && config.step.is_none();
    let differences = inside.differences.filter(|_| settle);
    let target_of = |i: usize| {
        let (t, k) = picked[i];
        rule.target(tensors[t].gradient[k], floors[t])
    };
    let mut todo: Vec<usize> = if complex {
        Vec::new()
    } else {
        (0..picked.len()).collect()
    };
    for (round_no, factor) in std::iter::once(1.0).chain(RETRIES).enumerate() {
        if todo.is_empty() || (round_no > 0 && config.step.is_some()) {
            break;
        }
        let h_of = |i: usize| {
            let (t, k) = picked[i];
            step_of(t, k) * factor
        };
        let first: Vec<((usize, usize), Vec<f64>)> = todo
            .iter()
            .map(|&i| {
                let steps = if settle {
                    method.one_step_stencil(h_of(i), round)
                } else {
                    method.stencil(h_of(i), reach, round)
                };
                (picked[i], steps)
            })
            .collect();
        let per = first.first().map_or(1, |(_, s)| s.len());
        let (mut tables, mut bounds) =
            ask_marked(losses, crossed, &first, per, differences, false)?;
        // Settles coordinate i on its one-step stencil (j its place in this round), or `None`.
        // With losses as changes, each coordinate's own round-off: the largest bound of its
        // three losses, plus the f64 rounding of adding each change to the base's loss (none
        // of the three came whole, or the coordinate is asked again in f64 where the loss can,
        // then takes the whole ladder below).
        let settled = |tables: &[Table], bounds: &[Bounds], j: usize, i: usize, h: f64| {
            if !settle {
                return None;
            }
            let f = |d: f64| look_up(&tables[j], d);
            let target = target_of(i);
            if differences.is_none() {
                return method.settle_one_step(&f, f0, h, noise, round, target);
            }
            let steps = method.one_step_stencil(h, round);
            let noise = own_noise(&steps, |d| look_up_bound(&bounds[j], d), f0)?;
            method
                .one_step_estimate(&f, f0, h, noise, round)
                .filter(|e| e.error <= target.bound)
        };
        let mut open = Vec::new();
        for (j, &i) in todo.iter().enumerate() {
            match settled(&tables, &bounds, j, i, h_of(i)) {
                Some(est) => {
                    estimates[i] = Some((est, round_no > 0));
                    tick();
                }
                None => open.push(j),
            }
        }
        // Where the loss computes changes in f64 too, the coordinates its changes did not
        // settle are asked so before the ladder, at the step an f64 check takes (scaled as
        // this round's): in f32 a change's bound sums every sample's round-off, which the
        // samples' cancelling changes leave above a small gradient's tolerance at a large
        // batch, and f32's own step is long enough to bend a large weight's activations.
        let wide_h = |i: usize| {
            let (t, k) = picked[i];
            method.default_step(tensors[t].values[k], f64::EPSILON) * factor
        };
        if differences.is_some() && inside.widens && !open.is_empty() {
            let again: Vec<((usize, usize), Vec<f64>)> = open
                .iter()
                .map(|&j| {
                    let i = todo[j];
                    (picked[i], method.one_step_stencil(wide_h(i), round))
                })
                .collect();
            let (wide, wide_bounds) = ask_marked(losses, crossed, &again, per, differences, true)?;
            for ((&j, t), b) in open.iter().zip(wide).zip(wide_bounds) {
                tables[j] = t;
                bounds[j] = b;
            }
            open.retain(|&j| {
                let i = todo[j];
                let Some(est) = settled(&tables, &bounds, j, i, wide_h(i)) else {
                    return true;
                };
                widened[i] = true;
                estimates[i] = Some((est, round_no > 0));
                tick();
                false
            });
        }
        if settle && !open.is_empty() {
            let rest: Vec<((usize, usize), Vec<f64>)> = open
                .iter()
                .map(|&j| {
                    let i = todo[j];
                    let asked = &tables[j];
                    // Losses as changes are not mixed with whole ones: the ladder asks for
                    // its whole stencil again.
                    let steps = method
                        .stencil(h_of(i), reach, round)
                        .into_iter()
                        .filter(|d| {
                            differences.is_some() || !asked.iter().any(|(b, _)| *b == d.to_bits())
                        })
                        .collect();
                    (picked[i], steps)
                })
                .collect();
            let (more, _) = ask_marked(losses, crossed, &rest, method.evaluations(), None, false)?;
            for (&j, m) in open.iter().zip(more) {
                if differences.is_some() {
                    tables[j] = m;
                } else {
                    tables[j].extend(m);
                }
            }
        }
        let mut next = Vec::new();
        for j in open {
            let i = todo[j];
            let f = |d: f64| look_up(&tables[j], d);
            let est = method.estimate_with(&f, f0, h_of(i), noise, round, reach);
            if est.crossed && round_no < RETRIES.len() && config.step.is_none() {
                next.push(i);
                if estimates[i].is_none() {
                    estimates[i] = Some((est, false));
                }
            } else {
                estimates[i] = Some((est, round_no > 0));
                tick();
            }
        }
        todo = next;
    }
    let mut estimates: Vec<(crate::Estimate, bool)> = estimates
        .into_iter()
        .map(|e| e.expect("every coordinate estimated"))
        .collect();
    let judge = |i: usize, est: &crate::Estimate| {
        let (t, k) = picked[i];
        rule.judge(
            tensors[t].gradient[k],
            est.value,
            floors[t],
            gross(t, k),
            est.error,
            est.crossed,
        )
    };
    // Where the kinks are seen, a disagreement must still hold at half the step: past the
    // quadratic regime (weights so large that the softmax acts as a maximum) the two steps'
    // truncation estimate can fall short, and a right gradient would be failed. The estimate at
    // half the step stands when it is a match whose bound is below half the first disagreement
    // (a mistake of that size would have shown beyond its bound): a noisier estimate that merely
    // fails to disagree proves nothing.
    // Past the quadratic regime: an estimate farther from the analytic value than its bound
    // (a mismatch, or a match by the tolerance alone) whose stencil, at twice its step (the
    // rung its truncation estimate read), took some activation past its share of the Taylor
    // radius is estimated again on the ladder with every such step counted as a crossing,
    // from the default step and then 10, 100 and 1000 times smaller, as for a kink. Softplus or a
    // softmax at weights hundreds of times their usual scale is a kink at f32's steps: the
    // ladder's quotients flatten past it and agree with each other, far from the derivative.
    if let (Some(bent), None, false) = (inside.bent, config.step, complex) {
        let mut open: Vec<usize> = (0..picked.len())
            .filter(|&i| {
                let ((t, k), s) = (picked[i], estimates[i].0.step);
                let (off, _, bound, status) = judge(i, &estimates[i].0);
                status != Status::Unreliable
                    && off > bound
                    && [2.0 * s, -2.0 * s].into_iter().any(|d| bent(t, k, d))
            })
            .collect();
        for factor in std::iter::once(1.0).chain(RETRIES) {
            if open.is_empty() {
                break;
            }
            let h_at = |i: usize| {
                let (t, k) = picked[i];
                step_of(t, k) * factor
            };
            let wanted: Vec<((usize, usize), Vec<f64>)> = open
                .iter()
                .map(|&i| (picked[i], method.stencil(h_at(i), reach, round)))
                .collect();
            let (tables, _) =
                ask_marked(losses, crossed, &wanted, method.evaluations(), None, false)?;
            let mut next = Vec::new();
            for (&i, table) in open.iter().zip(&tables) {
                let (t, k) = picked[i];
                let f = |d: f64| {
                    let (value, kinked) = look_up(table, d);
                    (value, kinked || bent(t, k, d))
                };
                let est = method.estimate_with(&f, f0, h_at(i), noise, round, reach);
                if est.crossed {
                    next.push(i);
                }
                estimates[i] = (est, true);
            }
            open = next;
        }
    }
    if inside.sees_kinks && config.step.is_none() && !complex {
        let suspects: Vec<usize> = (0..picked.len())
            .filter(|&i| judge(i, &estimates[i].0).3 == Status::Mismatch)
            .collect();
        // A coordinate estimated on losses in f64 is looked at again on them too, with their
        // bounds: at f64's step f32's whole losses are all round-off.
        let looks = [(false, None), (true, differences)];
        for (in_f64, bounds_of) in looks {
            let suspects: Vec<usize> = suspects
                .iter()
                .copied()
                .filter(|&i| widened[i] == in_f64)
                .collect();
            if suspects.is_empty() {
                continue;
            }
            // The round-off of the n-th look's losses at `steps`: their own where they came
            // with bounds (in f64; unbounded where one came whole), else the scalar model's.
            let noise_of = |bounds: &[Bounds], n: usize, steps: &[f64]| match bounds.get(n) {
                Some(b) => own_noise(steps, |d| look_up_bound(b, d), f0).unwrap_or(f64::INFINITY),
                None => noise,
            };
            let wanted: Vec<((usize, usize), Vec<f64>)> = suspects
                .iter()
                .map(|&i| {
                    let s = estimates[i].0.step * 0.5;
                    (picked[i], method.stencil(s, 1, round))
                })
                .collect();
            let (again, again_bounds) = ask_marked(
                losses,
                crossed,
                &wanted,
                method.evaluations(),
                bounds_of,
                in_f64,
            )?;
            for (n, (&i, table)) in suspects.iter().zip(&again).enumerate() {
                let s = estimates[i].0.step * 0.5;
                let f = |d: f64| look_up(table, d);
                let noise = noise_of(&again_bounds, n, &wanted[n].1);
                let est = method.estimate_with(&f, f0, s, noise, round, 1);
                let (_, _, bound, status) = judge(i, &est);
                if status == Status::Match && 2.0 * bound < judge(i, &estimates[i].0).0 {
                    estimates[i] = (est, true);
                }
            }
            // A kink the engine does not model (softmax's ties at weights of 1e30, whose loss
            // is a maximum at any step the weights can take) leaves the two steps agreeing and
            // the bound tiny: a disagreement that held on a loss whose second differences do
            // not look smooth across the stencil is `unreliable`, as for a black box.
            let held: Vec<usize> = suspects
                .into_iter()
                .filter(|&i| judge(i, &estimates[i].0).3 == Status::Mismatch)
                .collect();
            let wanted: Vec<((usize, usize), Vec<f64>)> = held
                .iter()
                .map(|&i| {
                    let s = 2.0 * estimates[i].0.step;
                    (picked[i], second_difference_steps(s).to_vec())
                })
                .collect();
            let (ratio, ratio_bounds) = ask_marked(losses, crossed, &wanted, 6, bounds_of, in_f64)?;
            for (n, (&i, table)) in held.iter().zip(&ratio).enumerate() {
                let s = 2.0 * estimates[i].0.step;
                // A kink the engine sees inside the wider stencil explains the shape: not
                // this case.
                let seen = table.iter().any(|(_, (_, kinked))| *kinked);
                let r = |d: f64| look_up(table, d).0;
                let noise = noise_of(&ratio_bounds, n, &wanted[n].1);
                if !seen && !smooth_across(&r, f0, s, noise) {
                    estimates[i].0.crossed = true;
                    estimates[i].1 = true;
                }
            }
        }
    }
    // The round-off assumed per loss (`noise`, a few ε of its pieces) is what a loss carries
    // at the usual scale; at weights hundreds of times it, each layer's rounding is carried up
    // by the weights above and a whole f32 loss erred by 500 times that (tanh at 300x). A
    // disagreement that still holds is judged again with the round-off its stencil's losses
    // (±s and ±2s) actually carried, where that is more: its value's share (2/s per unit) and
    // the truncation estimate's (read from the neighbouring rung), 4/s per unit in all.
    if let (Some(measure), None, false) = (inside.round_off, config.step, complex) {
        for i in 0..picked.len() {
            // Losses as changes carry their own bounds: the whole losses' round-off is not theirs.
            let own = estimates[i].0.one_step && differences.is_some();
            if own || judge(i, &estimates[i].0).3 != Status::Mismatch {
                continue;
            }
            let ((t, k), s) = (picked[i], estimates[i].0.step);
            let carried = [s, -s, 2.0 * s, -2.0 * s]
                .into_iter()
                .fold(0.0f64, |m, d| m.max(measure(t, k, d)));
            if carried > noise {
                estimates[i].0.error += 4.0 * (carried - noise) / s;
            }
        }
    }
    // A black box's kinks are not seen, so a disagreement must hold at smaller steps, on a loss
    // that looks smooth across the stencil, to be a mismatch. Each suspect is estimated again at
    // half its step, then 1/10, 1/100, 1/1000: a step that settles it as a match, with a bound
    // below the first disagreement, wins (a kink had moved the larger ones); a match whose bound
    // cannot rule the disagreement out but whose value lies nearer the analytic value than the
    // first estimate ([`nearer`]) says the disagreement did not hold: `unreliable`. Where every step still disagrees, or the steps grow too short
    // to settle anything, the second differences decide ([`smooth_across`]): smooth, a mismatch;
    // not, `unreliable`.
    if !inside.sees_kinks && config.step.is_none() && !complex {
        // The typical round-off of one evaluation, not the worst case the bounds use (4ε): the
        // test only chooses between mismatch and unreliable, and must see a kink large enough to
        // move an estimate beyond its bound.
        let typical = 2.0 * config.eps * f0.abs();
        let mut suspects: Vec<(usize, f64)> = (0..picked.len())
            .filter(|&i| judge(i, &estimates[i].0).3 == Status::Mismatch)
            .map(|i| (i, estimates[i].0.step))
            .collect();
        let ratio = ask(
            losses,
            &suspects
                .iter()
                .map(|&(i, s0)| (picked[i], second_difference_steps(2.0 * s0).to_vec()))
                .collect::<Vec<_>>(),
            6,
        )?;
        let smooth: Vec<bool> = suspects
            .iter()
            .zip(&ratio)
            .map(|(&(_, s0), table)| {
                let r = |d: f64| table.get(&d.to_bits()).copied().unwrap_or(f64::NAN);
                smooth_across(&r, f0, 2.0 * s0, typical)
            })
            .collect();
        let mut open: Vec<usize> = (0..suspects.len()).collect();
        for factor in std::iter::once(0.5).chain(RETRIES) {
            if open.is_empty() {
                break;
            }
            let again = ask(
                losses,
                &open
                    .iter()
                    .map(|&j| {
                        let (i, s0) = suspects[j];
                        (picked[i], method.stencil(s0 * factor, 1, round))
                    })
                    .collect::<Vec<_>>(),
                method.evaluations(),
            )?;
            let mut next = Vec::new();
            for (&j, table) in open.iter().zip(&again) {
                let (i, s0) = suspects[j];
                let (t, k) = picked[i];
                let f = |d: f64| {
                    (
                        table.get(&d.to_bits()).copied().unwrap_or(f64::NAN),
                        crossed(t, k, d),
                    )
                };
                let est = method.estimate_with(&f, f0, s0 * factor, noise, round, 1);
                let (_, _, bound, status) = judge(i, &est);
                // A match counts only if its bound could have seen the first disagreement.
                let first = judge(i, &estimates[i].0).0;
                match status {
                    Status::Match if bound < first => {
                        estimates[i] = (est, true);
                        suspects[j].1 = 0.0;
                    }
                    Status::Match if nearer(&est, &estimates[i].0, tensors[t].gradient[k]) => {
                        estimates[i].0.crossed = true;
                        estimates[i].1 = true;
                    }
                    Status::Mismatch => next.push(j),
                    _ => {}
                }
            }
            open = next;
        }
        for (j, &(i, s0)) in suspects.iter().enumerate() {
            if s0 > 0.0 && !smooth[j] {
                estimates[i].0.crossed = true;
                estimates[i].1 = true;
            }
        }
    }
    let coords = picked
        .iter()
        .zip(&estimates)
        .enumerate()
        .map(|(i, (&(t, k), (est, retried)))| {
            let (abs_error, rel_error, bound, status) = judge(i, est);
            OutsideCoord {
                coord: Entry {
                    tensor: t,
                    index: k,
                },
                analytic: tensors[t].gradient[k],
                numeric: est.value,
                abs_error,
                rel_error,
                bound,
                step: est.step,
                status,
                retried: *retried,
                one_step: est.one_step,
                wide: widened[i] && est.one_step,
            }
        })
        .collect();

    // Directions: over all tensors and per tensor, unit vectors drawn from the seed.
    let mut directions = Vec::with_capacity(plan.directions.len());
    for direction in &plan.directions {
        {
            let scope = direction.tensor;
            let v = direction.vector(&sizes);
            let theta = tensors
                .iter()
                .enumerate()
                .filter(|(t, _)| scope.is_none_or(|s| s == *t))
                .flat_map(|(_, x)| x.values.iter())
                .fold(0.0f64, |m, v| m.max(v.abs()));
            let h0 = config
                .step
                .unwrap_or_else(|| method.default_step(theta, config.eps));
            // A step d along v puts each entry at θᵢ + d·vᵢ as the loss's precision holds it
            // (d·vᵢ rounded, then the sum): within u·(|θᵢ| + 2|d·vᵢ|) of it, u = ε/2 (Higham
            // §2.2), so the loss is taken up to Σ|gᵢ|·u·(|θᵢ| + 2|d·vᵢ|) away from its value at
            // θ + d·v, a round-off of each evaluation that does not shrink with the step (one
            // coordinate's own entry moves by the step itself). At weights hundreds of times their
            // usual scale an f32 direction's smaller steps erred by ten times the loss's own
            // round-off so. Counted with it, at the ladder's largest step.
            // The same in `u` at steps up to `top`.
            let placed = |u: f64, top: f64| -> f64 {
                let placed: f64 = tensors
                    .iter()
                    .zip(&v)
                    .flat_map(|(x, vt)| x.values.iter().zip(&x.gradient).zip(vt))
                    .filter(|(_, w)| **w != 0.0)
                    .map(|((theta, g), w)| g.abs() * (theta.abs() + 2.0 * top * w.abs()))
                    .sum();
                u * placed
            };
            let noise = noise + placed(config.eps / 2.0, h0 * f64::from(1u32 << reach.min(16)));
            // For losses in f64 at steps up to 2h (a one-step stencil's).
            let placed_wide = |h: f64| placed(f64::EPSILON / 2.0, 2.0 * h);
            // The loss along v at the given steps, and whether each step crossed a kink (asked
            // right after the request: the graph keeps the last request's verdicts).
            // As changes ([`Request::AlongDifferences`]), or in f64 ([`Request::Along`]'s `wide`)
            // by `form`.
            let mut along = |deltas: &[f64], form: Form| -> Result<Table, E> {
                let values = losses(match form {
                    Form::Changes => Request::AlongDifferences { v: &v, deltas },
                    Form::Whole | Form::WideChanges => Request::Along {
                        v: &v,
                        deltas,
                        wide: form == Form::WideChanges,
                    },
                })?;
                Ok(deltas
                    .iter()
                    .zip(&values)
                    .map(|(d, value)| (d.to_bits(), (*value, (inside.crossed_along)(&v, *d))))
                    .collect())
            };
            let estimate_at = |table: &Table, h: f64, reach: u32| {
                let f = |d: f64| look_up(table, d);
                method.estimate_with(&f, f0, h, noise, round, reach)
            };
            let a: f64 = tensors
                .iter()
                .zip(&v)
                .map(|(x, vt)| x.gradient.iter().zip(vt).map(|(g, w)| g * w).sum::<f64>())
                .sum();
            let span: f64 = tensors
                .iter()
                .enumerate()
                .filter(|(t, _)| scope.is_none_or(|s| s == *t))
                .flat_map(|(_, x)| x.gradient.iter())
                .map(|g| g * g)
                .sum::<f64>()
                .sqrt();
            // The floor of a coordinate of its span, with ‖g‖ over the span for its largest
            // entry: a direction over a tensor whose gradient is zero by construction (an
            // attention key bias) is judged against the network's scale, as its coordinates are.
            let floor = relative_floor(span, scale, config.eps, config.tolerance);
            let mut est = None;
            // Whether it settled on losses with their own bounds (as changes, or in f64), and
            // whether in f64 ([`Inside::widens`]).
            let (mut own, mut wide) = (false, false);
            if complex {
                let imaginary = imaginary
                    .as_deref_mut()
                    .expect("the complex step needs a loss that takes complex parameters");
                let im = imaginary(Request::Along {
                    v: &v,
                    deltas: &[h0],
                    wide: false,
                })?[0];
                let hp = probe_step(theta);
                let crossed = (inside.crossed_along)(&v, hp) || (inside.crossed_along)(&v, -hp);
                est = Some(complex_estimate(&|_| (im, crossed), h0, config.eps));
            }
            for factor in std::iter::once(1.0).chain(RETRIES) {
                if complex {
                    break;
                }
                let h = h0 * factor;
                // As for coordinates: ±h and 2h first, the rest of the stencil if they do not
                // settle it.
                let mut table = Table::new();
                if let (true, Some(bound_at)) = (settle, inside.differences_along) {
                    // As for coordinates: losses as changes first, judged by their own bounds,
                    // then (where the loss can) in f64 at the parameters it holds, at an f64
                    // check's step (a direction over a relu layer crosses some kink at f32's
                    // step, so its changes come whole); a step that came whole, or an estimate
                    // that does not settle, leaves the direction to the whole losses below (not
                    // mixed with these).
                    let mut forms = vec![(Form::Changes, h, 0.0)];
                    if inside.widens {
                        let hw = method.default_step(theta, f64::EPSILON) * factor;
                        forms.push((Form::WideChanges, hw, placed_wide(hw)));
                    }
                    let mut settled = None;
                    for (form, h, placed) in forms {
                        let steps = method.one_step_stencil(h, round);
                        let changed = along(&steps, form)?;
                        let f = |d: f64| look_up(&changed, d);
                        let target = rule.target(a, floor);
                        settled = own_noise(&steps, bound_at, f0).and_then(|own| {
                            let noise = own + placed;
                            method
                                .one_step_estimate(&f, f0, h, noise, round)
                                .filter(|e| e.error <= target.bound)
                                .map(|e| (e, form == Form::WideChanges))
                        });
                        if settled.is_some() {
                            break;
                        }
                    }
                    if let Some((e, in_f64)) = settled {
                        est = Some(e);
                        (own, wide) = (true, in_f64);
                        break;
                    }
                }
                if settle {
                    table = along(&method.one_step_stencil(h, round), Form::Whole)?;
                    let f = |d: f64| look_up(&table, d);
                    let target = rule.target(a, floor);
                    if let Some(e) = method.settle_one_step(&f, f0, h, noise, round, target) {
                        est = Some(e);
                        break;
                    }
                }
                let rest: Vec<f64> = method
                    .stencil(h, reach, round)
                    .into_iter()
                    .filter(|d| !table.iter().any(|(b, _)| *b == d.to_bits()))
                    .collect();
                table.extend(along(&rest, Form::Whole)?);
                let e = estimate_at(&table, h, reach);
                let done = !e.crossed || config.step.is_some();
                est = Some(e);
                if done {
                    break;
                }
            }
            let mut est = est.expect("estimated at least once");
            let gross_dir: f64 = tensors
                .iter()
                .zip(&v)
                .map(|(x, vt)| {
                    x.gross
                        .iter()
                        .zip(vt)
                        .map(|(g, w)| (g * w).abs())
                        .sum::<f64>()
                })
                .sum();
            let judge =
                |e: &crate::Estimate| rule.judge(a, e.value, floor, gross_dir, e.error, e.crossed);
            // As for coordinates: an estimate beyond its bound across a step past an
            // activation's share of its Taylor radius is estimated again with such steps
            // counted as crossings.
            if let (Some(bent), None, false) = (inside.bent_along, config.step, complex) {
                let (s, (off, _, bound, status)) = (est.step, judge(&est));
                if status != Status::Unreliable
                    && off > bound
                    && [2.0 * s, -2.0 * s].into_iter().any(|d| bent(&v, d))
                {
                    for factor in std::iter::once(1.0).chain(RETRIES) {
                        let h = h0 * factor;
                        let table = along(&method.stencil(h, reach, round), Form::Whole)?;
                        let f = |d: f64| {
                            let (value, kinked) = look_up(&table, d);
                            (value, kinked || bent(&v, d))
                        };
                        est = method.estimate_with(&f, f0, h, noise, round, reach);
                        if !est.crossed {
                            break;
                        }
                    }
                }
            }
            // As for coordinates: a disagreement must hold at half the step where the kinks
            // are seen; a black box's at a smaller step on a loss that looks smooth along v.
            if inside.sees_kinks
                && config.step.is_none()
                && !complex
                && judge(&est).3 == Status::Mismatch
            {
                // One estimated on losses in f64 is looked at again on them, with their bounds
                // (at f64's step f32's whole losses are all round-off).
                let in_f64 = wide && est.one_step;
                let form = if in_f64 {
                    Form::WideChanges
                } else {
                    Form::Whole
                };
                let noise_at = |steps: &[f64], top: f64| -> f64 {
                    match (in_f64, inside.differences_along) {
                        (true, Some(bound_at)) => {
                            let own = own_noise(steps, bound_at, f0).unwrap_or(f64::INFINITY);
                            own + placed_wide(top)
                        }
                        _ => noise,
                    }
                };
                let h = est.step * 0.5;
                let steps = method.stencil(h, 1, round);
                let table = along(&steps, form)?;
                let f = |d: f64| look_up(&table, d);
                let again = method.estimate_with(&f, f0, h, noise_at(&steps, 2.0 * h), round, 1);
                let (_, _, bound, status) = judge(&again);
                if status == Status::Match && 2.0 * bound < judge(&est).0 {
                    est = again;
                } else {
                    let s0 = 2.0 * est.step;
                    let steps = second_difference_steps(s0);
                    let rtable = along(&steps, form)?;
                    let r = |d: f64| look_up(&rtable, d).0;
                    let seen = rtable.iter().any(|(_, (_, kinked))| *kinked);
                    let noise = noise_at(&steps, 2.0 * s0);
                    est.crossed |= !seen && !smooth_across(&r, f0, s0, noise);
                }
            }
            if !inside.sees_kinks
                && config.step.is_none()
                && !complex
                && judge(&est).3 == Status::Mismatch
            {
                let s0 = est.step;
                let first = judge(&est).0;
                let rtable = along(&second_difference_steps(2.0 * s0), Form::Whole)?;
                let r = |d: f64| look_up(&rtable, d).0;
                let smooth = smooth_across(&r, f0, 2.0 * s0, 2.0 * config.eps * f0.abs());
                let mut resolved = false;
                let mut kinked = false;
                for factor in std::iter::once(0.5).chain(RETRIES) {
                    let table = along(&method.stencil(s0 * factor, 1, round), Form::Whole)?;
                    let again = estimate_at(&table, s0 * factor, 1);
                    let (_, _, bound, status) = judge(&again);
                    if status == Status::Match && bound < first {
                        est = again;
                        resolved = true;
                        break;
                    }
                    if status == Status::Match && nearer(&again, &est, a) {
                        kinked = true;
                        break;
                    }
                    if status != Status::Mismatch {
                        break;
                    }
                }
                est.crossed |= !resolved && (kinked || !smooth);
            }
            // As for coordinates: losses with their own bounds carry no whole loss's round-off
            // (and one in f64 at f64's step would be judged by f32's at a step 400 times
            // shorter, hiding a real mismatch as unsettled or even a match).
            if let (Some(measure), None, false) = (inside.round_off_along, config.step, complex)
                && !(own && est.one_step)
                && judge(&est).3 == Status::Mismatch
            {
                let s = est.step;
                let carried = [s, -s, 2.0 * s, -2.0 * s]
                    .into_iter()
                    .fold(0.0f64, |m, d| m.max(measure(&v, d)));
                if carried > noise {
                    est.error += 4.0 * (carried - noise) / s;
                }
            }
            let (_, rel_error, bound, status) = judge(&est);
            directions.push(OutsideDirection {
                tensor: scope,
                analytic: a,
                numeric: est.value,
                rel_error,
                bound,
                status,
                one_step: est.one_step,
                wide: wide && est.one_step,
            });
            tick();
        }
    }
    Ok(ExternalResult {
        coords,
        directions,
        floors,
    })
}

/// The changes that move every parameter by `delta`·v, one perturbation per delta.
fn changes_along(v: &[Vec<f64>], deltas: &[f64]) -> Vec<Change> {
    // A direction moves (nearly) every parameter: room for all at once, not by doubling.
    let mut changes = Vec::with_capacity(deltas.len() * v.iter().map(Vec::len).sum::<usize>());
    for (p, &d) in deltas.iter().enumerate() {
        for (t, vt) in v.iter().enumerate() {
            for (k, &vk) in vt.iter().enumerate() {
                if vk != 0.0 {
                    changes.push(Change {
                        perturbation: p as u32,
                        tensor: t as u32,
                        index: k as u64,
                        delta: d * vk,
                    });
                }
            }
        }
    }
    changes
}

/// The losses at some steps of one coordinate or direction, with whether each step crossed a kink:
/// (step bits, (loss, crossed)). A few entries, searched in order.
type Table = Vec<(u64, (f64, bool))>;

/// The loss and kink verdict at step `d` of a table; NaN for a step never asked for.
fn look_up(table: &Table, d: f64) -> (f64, bool) {
    let key = d.to_bits();
    table
        .iter()
        .find(|(b, _)| *b == key)
        .map_or((f64::NAN, false), |(_, v)| *v)
}

/// As [`ask`], with each step's kink verdict `crossed(t, k, d)` taken right after its request
/// (the graph keeps the verdicts of the last request only).
///
/// With `differences`, the losses are asked for as changes ([`Request::Differences`], in f64
/// where `wide`), and each coordinate's bounds (`differences(t, k, d)` per step: `None` for a
/// loss that came whole) are returned beside its table.
fn ask_marked<E>(
    losses: &mut Ask<'_, E>,
    crossed: &dyn Fn(usize, usize, f64) -> bool,
    wanted: &[((usize, usize), Vec<f64>)],
    per: usize,
    differences: Option<&dyn Fn(usize, usize, f64) -> Option<f64>>,
    wide: bool,
) -> Result<(Vec<Table>, Vec<Bounds>), E> {
    let mut out = Vec::with_capacity(wanted.len());
    let mut bounds = Vec::new();
    let form = match differences {
        None => Form::Whole,
        Some(_) if wide => Form::WideChanges,
        Some(_) => Form::Changes,
    };
    for chunk in wanted.chunks((BATCH / per.max(1)).max(1)) {
        let tables = ask_as(losses, chunk, per, form)?;
        for (((t, k), deltas), table) in chunk.iter().zip(tables) {
            out.push(
                deltas
                    .iter()
                    .map(|d| {
                        let value = table.get(&d.to_bits()).copied().unwrap_or(f64::NAN);
                        (d.to_bits(), (value, crossed(*t, *k, *d)))
                    })
                    .collect(),
            );
            if let Some(bound) = differences {
                bounds.push(
                    deltas
                        .iter()
                        .map(|d| (d.to_bits(), bound(*t, *k, *d)))
                        .collect(),
                );
            }
        }
    }
    Ok((out, bounds))
}

/// The bounds of a coordinate's losses as changes, by step bits ([`ask_marked`]).
type Bounds = Vec<(u64, Option<f64>)>;

/// The round-off of losses that came with their own bounds (`bound(d)` at each of `steps`):
/// the largest of them, plus the f64 rounding of adding each change to the base's loss `f0`;
/// `None` where one came whole.
fn own_noise(steps: &[f64], bound: impl Fn(f64) -> Option<f64>, f0: f64) -> Option<f64> {
    let most = steps
        .iter()
        .try_fold(0.0f64, |m, &d| bound(d).map(|b| m.max(b)))?;
    Some(most + 2.0 * f64::EPSILON * f0.abs())
}

/// The bound of the loss at step `d`; `None` where it came whole or was not asked for.
fn look_up_bound(bounds: &Bounds, d: f64) -> Option<f64> {
    let key = d.to_bits();
    bounds.iter().find(|(b, _)| *b == key).and_then(|(_, v)| *v)
}

/// The loss at each coordinate's steps, one table (step bits → loss) per coordinate, asked in
/// requests of at most [`BATCH`] perturbations.
fn ask<E>(
    losses: &mut Ask<'_, E>,
    wanted: &[((usize, usize), Vec<f64>)],
    per: usize,
) -> Result<Vec<HashMap<u64, f64>>, E> {
    ask_as(losses, wanted, per, Form::Whole)
}

/// How [`ask_as`] asks for losses: whole, as changes, or as changes in f64
/// ([`Request::Differences`]).
#[derive(Clone, Copy, PartialEq)]
enum Form {
    Whole,
    Changes,
    WideChanges,
}

/// [`ask`], in the given form.
fn ask_as<E>(
    losses: &mut Ask<'_, E>,
    wanted: &[((usize, usize), Vec<f64>)],
    per: usize,
    form: Form,
) -> Result<Vec<HashMap<u64, f64>>, E> {
    let mut out = Vec::with_capacity(wanted.len());
    for chunk in wanted.chunks((BATCH / per.max(1)).max(1)) {
        let mut changes = Vec::new();
        for ((t, k), deltas) in chunk {
            for &d in deltas {
                changes.push(Change {
                    perturbation: changes.len() as u32,
                    tensor: *t as u32,
                    index: *k as u64,
                    delta: d,
                });
            }
        }
        let (count, changes) = (changes.len(), &changes[..]);
        let values = losses(match form {
            Form::Whole => Request::Changes { count, changes },
            Form::Changes | Form::WideChanges => Request::Differences {
                count,
                changes,
                wide: form == Form::WideChanges,
            },
        })?;
        let mut at = 0;
        for (_, deltas) in chunk {
            out.push(
                deltas
                    .iter()
                    .zip(&values[at..at + deltas.len()])
                    .map(|(d, v)| (d.to_bits(), *v))
                    .collect(),
            );
            at += deltas.len();
        }
    }
    Ok(out)
}

/// (tensor, flat index) pairs to check: all, N in total spread over the tensors as `check` spreads
/// them over layers (`coverage::share`: each tensor at least 10 or all of it, while N allows), or N
/// per tensor; seeded, sorted.
pub fn select_flat(sizes: &[usize], sample: Sample, seed: u64) -> Vec<(usize, usize)> {
    let quotas: Vec<usize> = match sample {
        Sample::All => sizes.to_vec(),
        Sample::PerLayer(n) => sizes.iter().map(|&s| n.min(s)).collect(),
        Sample::Total(n) => crate::coverage::share(sizes, crate::coverage::STRATUM_MINIMUM, 1, n),
    };
    let mut rng = Rng::new(seed ^ 0x0f1a7);
    let mut out = Vec::new();
    for (t, (&size, &q)) in sizes.iter().zip(&quotas).enumerate() {
        let mut idx: Vec<usize> = if q >= size {
            (0..size).collect()
        } else {
            crate::coverage::pick(size, &mut rng, q)
        };
        idx.sort_unstable();
        out.extend(idx.into_iter().map(|k| (t, k)));
    }
    out
}

/// Whether `again`, a match at a smaller step whose bound could not rule out the disagreement
/// of `first` with the analytic value `a`, still shows that the disagreement did not hold: it
/// lies nearer `a` than `first`, and its bound is within twice the disagreement (its typical
/// round-off, a quarter of the worst case the bound counts, within half of it). On a loss smooth
/// across both stencils the two estimate one derivative, so `again` stays nearer `first` unless
/// its error exceeds half the disagreement; a kink inside the first stencil only (which a black
/// box does not show) moves `first` alone, and `again` back toward the derivative. Such a
/// coordinate or direction is `unreliable`, not a mismatch, however smooth the second
/// differences over the wider stencil of [`smooth_across`] look. A planted error well above the
/// round-off keeps the estimates together, far from `a`; a retry at a step so short that its
/// round-off swamps the disagreement says nothing either way.
fn nearer(again: &crate::Estimate, first: &crate::Estimate, a: f64) -> bool {
    let disagreement = (first.value - a).abs();
    again.error <= 2.0 * disagreement && (again.value - a).abs() < (again.value - first.value).abs()
}
