//! Signal and gradient flow on the probe batch: how spread each layer's activations are, how large
//! its gradient is, and the largest singular value of its weight matrix (by power iteration), so
//! that a gradient that shrinks or grows by orders of magnitude across the layers is seen.

use ndarray::{Array1, ArrayView2, s};
use plumb_engine::{Network, Rng, Trace, Weights};

use crate::robust::{largest, moments, norm};
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

pub fn layer_flow(
    net: &Network,
    weights: &Weights<f64>,
    trace: &Trace<f64>,
    y: ArrayView2<f64>,
    seed: u64,
) -> Vec<LayerFlow> {
    let grad = net.backward(weights, trace, y);
    let mut rng = Rng::new(seed ^ 0x5_1697);
    (0..net.layers().len())
        .map(|l| {
            let a: Vec<f64> = trace.a[l + 1].iter().copied().collect();
            let g: Vec<f64> = grad.layer(l).iter().copied().collect();
            let norm = norm(&g);
            LayerFlow {
                layer: l + 1,
                activation_std: moments(&a).std,
                gradient_norm: norm,
                gradient_rms: norm / (g.len().max(1) as f64).sqrt(),
                sigma_max: sigma_max(weights.layer(l).slice(s![.., 1..]), &mut rng),
            }
        })
        .collect()
}

/// The largest singular value of W by power iteration on WᵀW from a seeded start, on W divided by
/// its largest |entry| so that no product overflows.
pub fn sigma_max(w: ArrayView2<f64>, rng: &mut Rng) -> f64 {
    let scale = largest(w.iter().copied());
    if scale == 0.0 {
        return 0.0;
    }
    let w = w.mapv(|x| x / scale);
    let mut v = Array1::from_shape_fn(w.ncols(), |_| rng.normal());
    let mut sigma = 0.0;
    for _ in 0..500 {
        let nv = v.iter().map(|x| x * x).sum::<f64>().sqrt();
        if nv == 0.0 {
            return 0.0;
        }
        v /= nv;
        let u = w.dot(&v);
        let next = u.iter().map(|x| x * x).sum::<f64>().sqrt();
        v = w.t().dot(&u);
        if (next - sigma).abs() <= 1e-12 * next {
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
