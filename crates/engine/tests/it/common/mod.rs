//! Helpers for the tests of networks of dense layers: the graph of a layer list, random weights,
//! num-dual's gradient of the parameters and the relative comparison over every tensor.

#![allow(dead_code)]

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{Dense, Graph, GraphBuilder, LossConfig, Shape};
use plumb_engine::{Activation, Loss, Rng};

use crate::graph_common;

/// A network of dense layers on `inputs` features: `layers` as (units, activation), the loss and
/// L2 strength λ with the default conventions. Layer l's weight (units × fan-in) is tensor 2l, its
/// bias tensor 2l + 1.
pub fn dense(inputs: usize, layers: &[(usize, Activation)], loss: Loss, l2: f64) -> Graph {
    let config = LossConfig {
        loss,
        l2,
        ..LossConfig::cross_entropy()
    };
    dense_with(inputs, layers, config)
}

/// [`dense`] under a loss configuration of its own (reduction, L2 divisor, bias decay).
pub fn dense_with(inputs: usize, layers: &[(usize, Activation)], loss: LossConfig) -> Graph {
    let mut b = GraphBuilder::new(Shape::Flat(inputs), loss);
    for &(units, activation) in layers {
        b.push(None, activation, |s| Dense::new(units, s)).unwrap();
    }
    b.finish().unwrap()
}

/// Random weights with non-zero biases, scaled by 1/√fan-in so no unit saturates outright: each
/// layer drawn as one units × (fan-in + 1) matrix, bias in column 0, then split.
pub fn random_weights(g: &Graph, rng: &mut Rng) -> Vec<ArrayD<f64>> {
    let mut out = Vec::new();
    for t in g.tensors().chunks(2) {
        let (units, fan_in) = (t[0].spec.shape[0], t[0].spec.shape[1]);
        let sd = 1.0 / (fan_in as f64).sqrt();
        let matrix = Array2::from_shape_fn((units, fan_in + 1), |_| sd * rng.normal());
        let (w, b) = Dense::split(&matrix);
        out.push(w.into_dyn());
        out.push(b.into_dyn());
    }
    out
}

/// (J, dJ/dθ) by num-dual's forward mode through the graph's forward pass
/// ([`graph_common::dual_gradient`]).
pub fn dual_gradient(
    g: &Graph,
    w: &[ArrayD<f64>],
    x: &Array2<f64>,
    y: &Array2<f64>,
) -> (f64, Vec<ArrayD<f64>>) {
    let d = graph_common::dual_gradient(g, w, x, y);
    (d.loss, d.params)
}

/// The largest coordinate-wise relative difference between two gradients, with a floor of
/// `floor · max|reference|` (over every tensor) in the denominator so that entries that are zero
/// up to rounding in both do not dominate.
pub fn max_relative(got: &[ArrayD<f64>], reference: &[ArrayD<f64>], floor: f64) -> f64 {
    let scale = reference
        .iter()
        .flat_map(|t| t.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let mut worst = 0.0f64;
    for (a, d) in got.iter().zip(reference) {
        for (&av, &dv) in a.iter().zip(d.iter()) {
            let den = av.abs().max(dv.abs()).max(floor * scale);
            if den > 0.0 {
                worst = worst.max((av - dv).abs() / den);
            }
        }
    }
    worst
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
