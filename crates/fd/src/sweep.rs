//! The error of each method against step size for chosen coordinates: the V-shaped curve of
//! truncation error (falling with h) against round-off (growing as ε/h), NR §5.7.

use crate::check::Precision;
use crate::method::Method;

/// Log-spaced steps from `from` down to `to`, `n` of them (n ≥ 2).
pub fn steps(from: f64, to: f64, n: usize) -> Vec<f64> {
    let (a, b) = (from.log10(), to.log10());
    (0..n)
        .map(|i| 10f64.powf(a + (b - a) * i as f64 / (n - 1) as f64))
        .collect()
}

/// One coordinate's curve, at (tensor, flat index) of a layer graph ([`crate::sweep_graph`]).
#[derive(Clone, Debug, PartialEq)]
pub struct Curve<K = (usize, usize)> {
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
pub struct SweepPlan<K = (usize, usize)> {
    pub coords: Vec<K>,
    pub methods: Vec<Method>,
    pub steps: Vec<f64>,
    pub precision: Precision,
}
