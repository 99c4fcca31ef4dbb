//! Signal and gradient flow on the probe batch: how spread each layer's activations are, how large
//! its gradient is, and the largest singular value of its weight matrix (by power iteration), so
//! that a gradient that shrinks or grows by orders of magnitude across the layers is seen.

use ndarray::{Array1, ArrayView2, s};
use plumb_engine::{Network, Rng, Trace, Weights};
use serde::Serialize;

#[derive(Clone, Debug, Serialize)]
pub struct LayerFlow {
    pub layer: usize,
    /// Standard deviation of the layer's activations over the batch and its units.
    pub activation_std: f64,
    /// ‖∂J/∂Θ‖₂ over the layer, and that divided by √(parameters).
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
            let a = &trace.a[l + 1];
            let n = a.len().max(1) as f64;
            let mean = a.iter().sum::<f64>() / n;
            let std = (a.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n).sqrt();
            let g = grad.layer(l);
            let norm = g.iter().map(|v| v * v).sum::<f64>().sqrt();
            LayerFlow {
                layer: l + 1,
                activation_std: std,
                gradient_norm: norm,
                gradient_rms: norm / (g.len() as f64).sqrt(),
                sigma_max: sigma_max(weights.layer(l).slice(s![.., 1..]), &mut rng),
            }
        })
        .collect()
}

/// The largest singular value of W by power iteration on WᵀW from a seeded start.
pub fn sigma_max(w: ArrayView2<f64>, rng: &mut Rng) -> f64 {
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
            return next;
        }
        sigma = next;
    }
    sigma
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
    }
}
