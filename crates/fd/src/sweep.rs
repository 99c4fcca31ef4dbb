//! The error of each method against step size for chosen coordinates: the V-shaped curve of
//! truncation error (falling with h) against round-off (growing as ε/h), NR §5.7.

use ndarray::Array2;
use num_complex::Complex;
use plumb_engine::{Batch, Coord, Network, Scalar, Weights};

use crate::check::Precision;
use crate::evaluate::Base;
use crate::method::{ComplexScalar, Method, complex_estimate, round_to};

/// Log-spaced steps from `from` down to `to`, `n` of them (n ≥ 2).
pub fn steps(from: f64, to: f64, n: usize) -> Vec<f64> {
    let (a, b) = (from.log10(), to.log10());
    (0..n)
        .map(|i| 10f64.powf(a + (b - a) * i as f64 / (n - 1) as f64))
        .collect()
}

/// One coordinate's curve: a dense [`Coord`], or (tensor, flat index) of a layer graph.
#[derive(Clone, Debug, PartialEq)]
pub struct Curve<K = Coord> {
    pub coord: K,
    pub analytic: f64,
    /// Per method (in the order asked), the estimate at every step.
    pub estimates: Vec<Vec<f64>>,
}

impl<K> Curve<K> {
    /// Relative error of method `m` at step `i`: |n − a| / max(|a|, |n|, floor).
    pub fn error(&self, m: usize, i: usize, floor: f64) -> f64 {
        let n = self.estimates[m][i];
        let a = self.analytic;
        let den = a.abs().max(n.abs()).max(floor);
        if den > 0.0 { (n - a).abs() / den } else { 0.0 }
    }

    /// The step index with the smallest error for method `m`.
    pub fn best(&self, m: usize, floor: f64) -> usize {
        (0..self.estimates[m].len())
            .min_by(|&i, &j| {
                // A NaN error (a step too large or too small to evaluate) is never the best.
                let key = |k: usize| {
                    let e = self.error(m, k, floor);
                    if e.is_nan() { f64::INFINITY } else { e }
                };
                key(i).total_cmp(&key(j))
            })
            .unwrap_or(0)
    }
}

/// What to sweep: coordinates, methods, absolute steps, and the precision to run the engine in.
#[derive(Clone, Debug)]
pub struct SweepPlan<K = Coord> {
    pub coords: Vec<K>,
    pub methods: Vec<Method>,
    pub steps: Vec<f64>,
    pub precision: Precision,
}

/// Estimates of every method at every step of the plan, against the analytic gradient `analytic`.
pub fn sweep(
    net: &Network,
    weights: &Weights<f64>,
    batch: &Batch,
    analytic: &Weights<f64>,
    plan: &SweepPlan,
) -> Vec<Curve> {
    match plan.precision {
        Precision::F64 => run::<f64, Complex<f64>>(net, weights, batch, analytic, plan),
        Precision::F32 => run::<f32, Complex<f32>>(net, weights, batch, analytic, plan),
    }
}

/// Weights and batch in a complex type, for the complex step.
type ComplexCopy<C> = (Weights<C>, (Array2<C>, Array2<C>));

fn run<S: Scalar, C: ComplexScalar>(
    net: &Network,
    weights: &Weights<f64>,
    batch: &Batch,
    analytic: &Weights<f64>,
    plan: &SweepPlan,
) -> Vec<Curve> {
    let (coords, methods, steps) = (&plan.coords, &plan.methods, &plan.steps);
    let w: Weights<S> = weights.cast();
    let (x, y) = batch.cast::<S>();
    let base = Base::new(net, &w, x.view(), &y);
    let j0 = base.loss().re();
    // The complex copy is only built when the complex step is asked for.
    let complex: Option<ComplexCopy<C>> = methods
        .contains(&Method::ComplexStep)
        .then(|| (weights.cast(), batch.cast::<C>()));
    let base_c = complex
        .as_ref()
        .map(|(w, (x, y))| Base::new(net, w, x.view(), y));
    coords
        .iter()
        .map(|&c| {
            let f = |d: f64| {
                let (j, crossed) = base.perturbed(c, S::from_f64(d));
                (j.re(), crossed)
            };
            let estimates = methods
                .iter()
                .map(|&m| {
                    steps
                        .iter()
                        .map(|&h| match (m, &base_c) {
                            (Method::ComplexStep, Some(bc)) => {
                                let g = |h: f64| {
                                    let (j, crossed) = bc.perturbed(c, C::imaginary(h));
                                    (j.im(), crossed)
                                };
                                complex_estimate(&g, h, S::epsilon()).value
                            }
                            _ => m.estimate(&f, j0, h, 0.0, round_to::<S>).value,
                        })
                        .collect()
                })
                .collect();
            Curve {
                coord: c,
                analytic: *analytic.get(c),
                estimates,
            }
        })
        .collect()
}
