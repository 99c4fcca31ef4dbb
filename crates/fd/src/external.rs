//! The finite-difference check of a gradient against a loss that plumb can only ask for: an outside
//! program's. Perturbations go out in batches (one request for many coordinates), so a check of a
//! large network costs few round trips.

use std::collections::HashMap;

use plumb_engine::Rng;

use crate::check::{RETRIES, Rule, Status};
use crate::method::Method;
use crate::{FLOOR, NOISE, Sample, relative_floor};

/// One tensor of the outside program: its parameters and the gradient it returned for them.
#[derive(Clone, Debug)]
pub struct OutsideTensor {
    pub name: String,
    pub values: Vec<f64>,
    pub gradient: Vec<f64>,
    /// A bound on the pieces each gradient entry is summed from (`gradient_magnitude` of the
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
}

impl Inside<'static> {
    pub fn opaque() -> Inside<'static> {
        Inside {
            crossed: &|_, _, _| false,
            crossed_along: &|_, _| false,
            loss_gross: 0.0,
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

/// One coordinate's verdict.
#[derive(Clone, Debug, PartialEq)]
pub struct OutsideCoord {
    pub tensor: usize,
    pub index: usize,
    pub analytic: f64,
    pub numeric: f64,
    pub abs_error: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub step: f64,
    pub status: Status,
    pub retried: bool,
}

/// One random direction's verdict; `tensor` is None for a direction over every tensor.
#[derive(Clone, Debug, PartialEq)]
pub struct OutsideDirection {
    pub tensor: Option<usize>,
    pub analytic: f64,
    pub numeric: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub status: Status,
}

#[derive(Clone, Debug)]
pub struct ExternalResult {
    pub coords: Vec<OutsideCoord>,
    pub directions: Vec<OutsideDirection>,
}

/// The outside loss at `count` perturbations given as changes.
pub type Losses<'a, E> = dyn FnMut(usize, &[Change]) -> Result<Vec<f64>, E> + 'a;

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
    let crossed = inside.crossed;
    let method = config.method;
    let sizes: Vec<usize> = tensors.iter().map(|t| t.values.len()).collect();
    let picked = select_flat(&sizes, config.sample, config.seed);
    let noise = NOISE * config.eps * f0.abs().max(inside.loss_gross);
    let gross = |t: usize, k: usize| tensors[t].gross.get(k).copied().unwrap_or(0.0);
    let round = |h: f64| h;
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

    // Round one at the default steps, then the kink retries at smaller ones.
    let mut estimates: Vec<Option<(crate::Estimate, bool)>> = vec![None; picked.len()];
    let mut todo: Vec<usize> = (0..picked.len()).collect();
    for (round_no, factor) in std::iter::once(1.0).chain(RETRIES).enumerate() {
        if todo.is_empty() || (round_no > 0 && config.step.is_some()) {
            break;
        }
        let mut next = Vec::new();
        for chunk in todo.chunks((BATCH / method.evaluations().max(1)).max(1)) {
            let mut changes = Vec::new();
            let mut slots: Vec<Vec<f64>> = Vec::with_capacity(chunk.len());
            for &i in chunk {
                let (t, k) = picked[i];
                let deltas = method.stencil(step_of(t, k) * factor, round);
                for &d in &deltas {
                    changes.push(Change {
                        perturbation: changes.len() as u32,
                        tensor: t as u32,
                        index: k as u64,
                        delta: d,
                    });
                }
                slots.push(deltas);
            }
            let values = losses(changes.len(), &changes)?;
            let mut at = 0;
            for (&i, deltas) in chunk.iter().zip(&slots) {
                let (t, k) = picked[i];
                let table: HashMap<u64, f64> = deltas
                    .iter()
                    .zip(&values[at..at + deltas.len()])
                    .map(|(d, v)| (d.to_bits(), *v))
                    .collect();
                at += deltas.len();
                let f = |d: f64| {
                    (
                        table.get(&d.to_bits()).copied().unwrap_or(f64::NAN),
                        crossed(t, k, d),
                    )
                };
                let h = step_of(t, k) * factor;
                let est = method.estimate_with(&f, f0, h, noise, round, config.step.is_none());
                if est.crossed && round_no < RETRIES.len() && config.step.is_none() {
                    next.push(i);
                    if estimates[i].is_none() {
                        estimates[i] = Some((est, false));
                    }
                } else {
                    estimates[i] = Some((est, round_no > 0));
                }
            }
        }
        todo = next;
    }
    let coords = picked
        .iter()
        .zip(estimates)
        .map(|(&(t, k), e)| {
            let (est, retried) = e.expect("every coordinate estimated");
            let a = tensors[t].gradient[k];
            let (abs_error, rel_error, bound, status) =
                rule.judge(a, est.value, floors[t], gross(t, k), est.error, est.crossed);
            OutsideCoord {
                tensor: t,
                index: k,
                analytic: a,
                numeric: est.value,
                abs_error,
                rel_error,
                bound,
                step: est.step,
                status,
                retried,
            }
        })
        .collect();

    // Directions: per tensor and over all, unit vectors drawn from the seed.
    let mut rng = Rng::new(config.seed ^ 0xd1_7ec7);
    let mut directions = Vec::new();
    let scopes: Vec<Option<usize>> = std::iter::once(None)
        .chain((0..tensors.len()).map(Some))
        .collect();
    for scope in scopes {
        for _ in 0..config.directions {
            let mut v: Vec<Vec<f64>> = tensors
                .iter()
                .enumerate()
                .map(|(t, x)| {
                    if scope.is_none_or(|s| s == t) {
                        (0..x.values.len()).map(|_| rng.normal()).collect()
                    } else {
                        vec![0.0; x.values.len()]
                    }
                })
                .collect();
            let norm = v.iter().flatten().map(|x| x * x).sum::<f64>().sqrt();
            v.iter_mut().flatten().for_each(|x| *x /= norm);
            let theta = tensors
                .iter()
                .enumerate()
                .filter(|(t, _)| scope.is_none_or(|s| s == *t))
                .flat_map(|(_, x)| x.values.iter())
                .fold(0.0f64, |m, v| m.max(v.abs()));
            let h0 = config
                .step
                .unwrap_or_else(|| method.default_step(theta, config.eps));
            let mut est = None;
            for factor in std::iter::once(1.0).chain(RETRIES) {
                let h = h0 * factor;
                let deltas = method.stencil(h, round);
                let mut changes = Vec::new();
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
                let values = losses(deltas.len(), &changes)?;
                let table: HashMap<u64, f64> = deltas
                    .iter()
                    .zip(&values)
                    .map(|(d, v)| (d.to_bits(), *v))
                    .collect();
                let f = |d: f64| {
                    let value = table.get(&d.to_bits()).copied().unwrap_or(f64::NAN);
                    (value, (inside.crossed_along)(&v, d))
                };
                let e = method.estimate_with(&f, f0, h, noise, round, config.step.is_none());
                let done = !e.crossed || config.step.is_some();
                est = Some(e);
                if done {
                    break;
                }
            }
            let est = est.expect("estimated at least once");
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
            let (_, rel_error, bound, status) = rule.judge(
                a,
                est.value,
                FLOOR * span,
                gross_dir,
                est.error,
                est.crossed,
            );
            directions.push(OutsideDirection {
                tensor: scope,
                analytic: a,
                numeric: est.value,
                rel_error,
                bound,
                status,
            });
        }
    }
    Ok(ExternalResult { coords, directions })
}

/// (tensor, flat index) pairs to check: all, N spread over the tensors by size (each at least 10 or
/// all of it), or N per tensor; seeded, sorted.
pub fn select_flat(sizes: &[usize], sample: Sample, seed: u64) -> Vec<(usize, usize)> {
    let total: usize = sizes.iter().sum();
    let quotas: Vec<usize> = match sample {
        Sample::All => sizes.to_vec(),
        Sample::PerLayer(n) => sizes.iter().map(|&s| n.min(s)).collect(),
        Sample::Total(n) => sizes
            .iter()
            .map(|&s| {
                (n.min(total) * s)
                    .div_ceil(total.max(1))
                    .max(s.min(10))
                    .min(s)
            })
            .collect(),
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
