//! Signal and gradient flow on the probe batch: how spread each layer's activations are, how large
//! its gradient is, and the largest singular value of its weight matrix (by power iteration), so
//! that a gradient that shrinks or grows by orders of magnitude across the layers is seen.

use ndarray::{ArrayView2, s};
use plumb_engine::{Network, Rng, Scalar, Trace, Weights};

use crate::robust::{largest, moments_of, norm};
use serde::Serialize;

#[derive(Clone, Debug, Serialize)]
pub struct LayerFlow {
    pub layer: usize,
    /// Standard deviation of the layer's activations over the batch and its units.
    pub activation_std: f64,
    /// ‖∂J/∂(W, b)‖₂ over the layer, and that divided by √(parameters).
    pub gradient_norm: f64,
    pub gradient_rms: f64,
    /// Largest singular value of the weight matrix (bias column left out).
    pub sigma_max: f64,
}

/// Per layer: the spread of its activations, its gradient's norm and RMS, and its weight
/// matrix's largest singular value, from a forward pass in f64 or f32 (the figures themselves are
/// taken in f64 on the exactly widened values).
pub fn layer_flow<S: Scalar>(
    net: &Network,
    weights: &Weights<S>,
    trace: &Trace<S>,
    y: ArrayView2<S>,
    seed: u64,
) -> Vec<LayerFlow> {
    let grad = net.backward(weights, trace, y);
    let mut rng = Rng::new(seed ^ 0x5_1697);
    (0..net.layers().len())
        .map(|l| {
            let a = &trace.a[l + 1];
            let g: Vec<f64> = grad.layer(l).iter().map(|v| v.re()).collect();
            let norm = norm(&g);
            let w = weights.layer(l).slice(s![.., 1..]).mapv(|v| v.re());
            LayerFlow {
                layer: l + 1,
                activation_std: moments_of(|| a.iter().map(|v| v.re())).std,
                gradient_norm: norm,
                gradient_rms: norm / (g.len().max(1) as f64).sqrt(),
                sigma_max: sigma_max(w.view(), &mut rng),
            }
        })
        .collect()
}

/// The relative change of the estimate between two iterations at which power iteration stops.
/// The figure is shown to four significant digits; the estimate ‖Wv‖ only grows towards σ₁, by a
/// step that shrinks geometrically, so stopping at a step of 10⁻⁸ of it leaves it short of its
/// limit by 10⁻⁸ divided by the ratio's distance from 1 (below 10⁻⁵ unless the two largest
/// singular values are within 0.1% of each other).
const POWER_TOLERANCE: f64 = 1e-8;

/// The largest singular value of W by power iteration on WᵀW from a seeded start, on W divided by
/// its largest |entry| so that no product overflows; it stops when an iteration changes the
/// estimate by less than [`POWER_TOLERANCE`] of it, or after 500.
pub fn sigma_max(w: ArrayView2<f64>, rng: &mut Rng) -> f64 {
    let scale = largest(w.iter().copied());
    if scale == 0.0 {
        return 0.0;
    }
    let w = w.mapv(|x| x / scale);
    let mut v: Vec<f64> = (0..w.ncols()).map(|_| rng.normal()).collect();
    let mut u = vec![0.0; w.nrows()];
    let mut sigma = 0.0;
    for _ in 0..500 {
        let nv = v.iter().map(|x| x * x).sum::<f64>().sqrt();
        if nv == 0.0 {
            return 0.0;
        }
        v.iter_mut().for_each(|x| *x /= nv);
        // u = W v row by row, then v = Wᵀ u as a sum of rows: both read W in its own order.
        for (ui, row) in u.iter_mut().zip(w.rows()) {
            *ui = row.iter().zip(&v).map(|(a, b)| a * b).sum();
        }
        let next = u.iter().map(|x| x * x).sum::<f64>().sqrt();
        v.iter_mut().for_each(|x| *x = 0.0);
        for (&ui, row) in u.iter().zip(w.rows()) {
            v.iter_mut().zip(row.iter()).for_each(|(x, a)| *x += ui * a);
        }
        if (next - sigma).abs() <= POWER_TOLERANCE * next {
            return next * scale;
        }
        sigma = next;
    }
    sigma * scale
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    // By hand: diag(3, 1) has singular values 3 and 1; [[1, 1], [1, 1]] has 2 and 0.
    #[test]
    fn power_iteration_finds_the_largest_singular_value() {
        let mut rng = Rng::new(1);
        assert!((sigma_max(array![[3.0, 0.0], [0.0, 1.0]].view(), &mut rng) - 3.0).abs() < 1e-9);
        assert!((sigma_max(array![[1.0, 1.0], [1.0, 1.0]].view(), &mut rng) - 2.0).abs() < 1e-9);
        assert_eq!(sigma_max(array![[0.0, 0.0]].view(), &mut rng), 0.0);
        // Entries whose squares overflow: diag(3e300, 1e300) has singular value 3e300.
        let s = sigma_max(array![[3e300, 0.0], [0.0, 1e300]].view(), &mut rng);
        assert!((s / 3e300 - 1.0).abs() < 1e-9, "{s}");
    }
}
