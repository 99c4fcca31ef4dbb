//! The engine's analytic gradient of networks of dense layers against num-dual's forward-mode
//! gradient (an independent exact derivative of the same loss), over random architectures, every
//! activation and both losses.

use crate::common;

use common::{HIDDEN, dense, dense_with, dual_gradient, max_relative, random_weights};
use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{Graph, LossConfig};
use plumb_engine::{Activation, Batch, Loss, Rng};

/// Agreement demanded: both are exact up to rounding, so 1e-12 relative, with entries below 1e-9 of
/// the gradient's largest entry judged against that floor.
const TOL: f64 = 1e-12;
const FLOOR: f64 = 1e-9;

fn targets(net: &Graph, m: usize, rng: &mut Rng, soft: bool) -> Array2<f64> {
    let k = net.output().size();
    let out = net.nodes().last().unwrap().activation;
    match (net.loss_config().loss, out) {
        (Loss::CrossEntropy, Activation::Softmax) if soft => {
            // Rows of positive weights that need not sum to one: the general form of the delta.
            Array2::from_shape_fn((m, k), |_| rng.uniform())
        }
        (Loss::CrossEntropy, Activation::Softmax) => {
            let mut y = Array2::zeros((m, k));
            for mut row in y.rows_mut() {
                row[rng.below(k)] = 1.0;
            }
            y
        }
        (Loss::CrossEntropy, _) if soft => Array2::from_shape_fn((m, k), |_| rng.uniform()),
        (Loss::CrossEntropy, _) => {
            Array2::from_shape_fn((m, k), |_| (rng.uniform() < 0.5) as u8 as f64)
        }
        _ => Array2::from_shape_fn((m, k), |_| rng.normal()),
    }
}

fn check(net: &Graph, seed: u64, m: usize, soft: bool) {
    let mut rng = Rng::new(seed);
    let w = random_weights(net, &mut rng);
    let x = Array2::from_shape_fn((m, net.input().size()), |_| rng.normal());
    let y = targets(net, m, &mut rng, soft);
    let g = net.gradient(&w, x.view(), y.view(), None);
    let (loss, grad) = (g.loss, g.params);
    let (dual_loss, dual_grad) = dual_gradient(net, &w, &x, &y);
    assert!(
        (loss - dual_loss).abs() <= TOL * dual_loss.abs().max(1e-300),
        "loss {loss} vs num-dual {dual_loss} for {net:?}"
    );
    let err = max_relative(&grad, &dual_grad, FLOOR);
    assert!(
        err <= TOL,
        "relative error {err:e} for {net:?} (seed {seed})"
    );
}

#[test]
fn every_hidden_activation_with_both_losses_and_l2() {
    for (i, &act) in HIDDEN.iter().enumerate() {
        for l2 in [0.0, 0.3] {
            let ce = dense(
                5,
                &[(4, act), (6, Activation::Tanh), (3, Activation::Softmax)],
                Loss::CrossEntropy,
                l2,
            );
            check(&ce, 10 + i as u64, 4, false);
            let se = dense(3, &[(7, act), (2, act)], Loss::SquaredError, l2);
            check(&se, 40 + i as u64, 5, false);
            let bce = dense(
                3,
                &[(6, act), (2, Activation::Sigmoid)],
                Loss::CrossEntropy,
                l2,
            );
            check(&bce, 70 + i as u64, 3, true);
        }
    }
}

#[test]
fn softmax_output_with_squared_error_and_soft_targets() {
    let net = dense(
        4,
        &[(5, Activation::Gelu), (3, Activation::Softmax)],
        Loss::SquaredError,
        0.1,
    );
    check(&net, 3, 6, false);
    let ce = dense(
        4,
        &[
            (5, Activation::Elu { alpha: 1.0 }),
            (4, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.0,
    );
    check(&ce, 4, 6, true);
}

/// Random architectures (1–3 hidden layers of 1–7 units, 1–5 inputs, batch 3–8) over many seeds.
#[test]
fn random_architectures() {
    let mut rng = Rng::new(2026);
    for seed in 0..60 {
        let depth = 1 + rng.below(3);
        let mut layers: Vec<(usize, Activation)> = (0..depth)
            .map(|_| (1 + rng.below(7), HIDDEN[rng.below(HIDDEN.len())]))
            .collect();
        let loss = if rng.uniform() < 0.5 {
            Loss::CrossEntropy
        } else {
            Loss::SquaredError
        };
        let out = match loss {
            Loss::CrossEntropy if rng.uniform() < 0.5 => (2 + rng.below(4), Activation::Softmax),
            Loss::CrossEntropy => (1 + rng.below(4), Activation::Sigmoid),
            Loss::SquaredError => (1 + rng.below(4), HIDDEN[rng.below(HIDDEN.len())]),
        };
        layers.push(out);
        let l2 = if rng.uniform() < 0.5 {
            0.0
        } else {
            rng.uniform()
        };
        let net = dense(1 + rng.below(5), &layers, loss, l2);
        check(&net, seed, 3 + rng.below(6), rng.uniform() < 0.3);
    }
}

/// The engine in f32 differentiates the same function: its gradient agrees with the f64 reference
/// to what single precision allows (common practice: a few hundred ε₃₂ relative on a small network).
#[test]
fn single_precision_tracks_double() {
    let net = dense(
        4,
        &[(6, Activation::Tanh), (3, Activation::Softmax)],
        Loss::CrossEntropy,
        0.1,
    );
    let mut rng = Rng::new(5);
    let w = random_weights(&net, &mut rng);
    let batch = Batch::graph_synthetic(&net, 16, 5);
    let g64 = net
        .gradient(&w, batch.x.view(), batch.y.view(), None)
        .params;
    let (x32, y32) = batch.cast::<f32>();
    let w32: Vec<ArrayD<f32>> = w.iter().map(|t| t.mapv(|v| v as f32)).collect();
    let g32 = net.gradient(&w32, x32.view(), y32.view(), None).params;
    let g32: Vec<ArrayD<f64>> = g32.iter().map(|t| t.mapv(|v| v as f64)).collect();
    let err = max_relative(&g32, &g64, 1e-3);
    assert!(err < 300.0 * f32::EPSILON as f64, "{err:e}");
}

/// Every declared convention (DESIGN §4.1: reduction, l2-divisor, l2-on-bias): the analytic gradient
/// is num-dual's derivative of the loss under that convention, and the loss is the formula the
/// description promises — the data term m times the mean one under "sum", the L2 term
/// (λ / divisor)·Σ w² with Σ over the non-bias weights, or all weights under l2-on-bias, summed
/// here by hand from the weights.
#[test]
fn every_convention() {
    use plumb_engine::{L2Divisor, Reduction};
    let (m, l2) = (5, 0.3);
    let layers = [(5, Activation::Tanh), (3, Activation::Softmax)];
    let base = dense(4, &layers, Loss::CrossEntropy, l2);
    let plain = dense(4, &layers, Loss::CrossEntropy, 0.0);
    let mut rng = Rng::new(77);
    let w = random_weights(&base, &mut rng);
    let x = Array2::from_shape_fn((m, 4), |_| rng.normal());
    let y = targets(&base, m, &mut rng, false);
    // The mean data term: the loss without L2.
    let mean_data = plain.loss(&w, x.view(), y.view());
    // Σ w² over the weights (even tensors), and the biases (odd ones) too.
    let squares = |biases: bool| -> f64 {
        w.iter()
            .enumerate()
            .filter(|(t, _)| biases || t % 2 == 0)
            .map(|(_, t)| t.iter().map(|v| v * v).sum::<f64>())
            .sum()
    };
    for reduction in Reduction::ALL {
        for divisor in L2Divisor::ALL {
            for on_bias in [false, true] {
                let c = LossConfig {
                    reduction,
                    l2_divisor: divisor,
                    l2_on_bias: on_bias,
                    ..base.loss_config()
                };
                let net = dense_with(4, &layers, c);
                check(&net, 90, m, false);
                let data = match reduction {
                    Reduction::Mean => mean_data,
                    Reduction::Sum => m as f64 * mean_data,
                };
                let d = match divisor {
                    L2Divisor::TwoM => 2.0 * m as f64,
                    L2Divisor::Two => 2.0,
                    L2Divisor::M => m as f64,
                    L2Divisor::One => 1.0,
                };
                let want = data + l2 / d * squares(on_bias);
                let got = net.loss(&w, x.view(), y.view());
                assert!(
                    (got - want).abs() <= 1e-13 * want.abs(),
                    "{c:?}: loss {got} against the formula's {want}"
                );
            }
        }
    }
}
