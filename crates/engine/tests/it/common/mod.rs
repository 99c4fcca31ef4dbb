//! Helpers shared by the engine's tests: random networks and an independent gradient by num-dual.

#![allow(dead_code)]

use ndarray::Array2;
use num_dual::Dual64;
use plumb_engine::{Activation, Batch, Network, Rng, Weights};

/// dJ/dθ for every parameter by forward-mode automatic differentiation (num-dual): one pass per
/// parameter with that parameter's derivative part set to 1. Independent of the engine's backward
/// pass: it differentiates the forward pass and the loss as written, operation by operation.
pub fn dual_gradient(net: &Network, w: &Weights<f64>, batch: &Batch) -> (f64, Weights<f64>) {
    let (x, y) = batch.cast::<Dual64>();
    let base: Weights<Dual64> = w.cast();
    let mut grad = w.map(|_| 0.0);
    let mut loss = f64::NAN;
    for k in 0..w.parameters() {
        let c = w.coord(k).unwrap();
        let mut wd = base.clone();
        wd.get_mut(c).eps = 1.0;
        let j = net.loss_value(&wd, x.view(), y.view());
        loss = j.re;
        *grad.get_mut(c) = j.eps;
    }
    (loss, grad)
}

/// The largest coordinate-wise relative difference between two gradients, with a floor of
/// `floor · max|reference|` in the denominator so that entries that are zero up to rounding in both
/// do not dominate.
pub fn max_relative(got: &Weights<f64>, reference: &Weights<f64>, floor: f64) -> f64 {
    let scale = reference
        .layers()
        .iter()
        .flat_map(|l| l.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let mut worst = 0.0f64;
    for (a, d) in got.layers().iter().zip(reference.layers()) {
        for (&av, &dv) in a.iter().zip(d.iter()) {
            let den = av.abs().max(dv.abs()).max(floor * scale);
            if den > 0.0 {
                worst = worst.max((av - dv).abs() / den);
            }
        }
    }
    worst
}

/// Random weights with non-zero biases, scaled by 1/√fan_in so no unit saturates outright.
pub fn random_weights(net: &Network, rng: &mut Rng) -> Weights<f64> {
    Weights::new(
        net.layers()
            .iter()
            .map(|spec| {
                let sd = 1.0 / (spec.inputs as f64).sqrt();
                Array2::from_shape_fn(spec.shape(), |_| sd * rng.normal())
            })
            .collect(),
    )
}

/// Every element-wise activation, with non-default parameters for those that take one.
pub const HIDDEN: [Activation; 8] = [
    Activation::Identity,
    Activation::Sigmoid,
    Activation::Tanh,
    Activation::Relu,
    Activation::LeakyRelu { slope: 0.05 },
    Activation::Elu { alpha: 0.8 },
    Activation::Softplus,
    Activation::Gelu,
];
