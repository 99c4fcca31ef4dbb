//! Published values and closed forms the engine must reproduce.

use ndarray::{Array2, ArrayD, Ix1, Ix2, array};
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};

use crate::common::dense;

/// M. Mazur, "A Step by Step Backpropagation Example" (2015) [pub]: a 2-2-2 sigmoid network with
/// biases, squared error E = Σ ½(t − o)² on one sample. The engine's squared error is (1/2m)Σ‖h − y‖²,
/// the same function for m = 1. The source gives 9 significant digits (w6, w2 and w5 rounded at 8 or
/// 9); each value is asserted to the last digit the source prints.
#[test]
fn mazur_worked_example() {
    let net = dense(
        2,
        &[(2, Activation::Sigmoid), (2, Activation::Sigmoid)],
        Loss::SquaredError,
        0.0,
    );
    // Weights by unit (row) and input: w1, w2 into h1; w3, w4 into h2; w5, w6 into o1; w7, w8
    // into o2; biases 0.35 (hidden) and 0.60 (output).
    let w: Vec<ArrayD<f64>> = vec![
        array![[0.15, 0.20], [0.25, 0.30]].into_dyn(),
        array![0.35, 0.35].into_dyn(),
        array![[0.40, 0.45], [0.50, 0.55]].into_dyn(),
        array![0.60, 0.60].into_dyn(),
    ];
    let x = array![[0.05, 0.10]];
    let y = array![[0.01, 0.99]];
    let trace = net.forward(&w, x.view());
    let close = |got: f64, want: f64, digits: i32| {
        let unit = 10f64.powi(-digits);
        assert!(
            (got - want).abs() <= 0.5 * unit + 1e-15,
            "{got} vs {want} (to 1e-{digits})"
        );
    };
    close(trace.outputs[0][[0, 0]], 0.593269992, 9);
    close(trace.outputs[0][[0, 1]], 0.596884378, 9);
    close(trace.outputs[1][[0, 0]], 0.75136507, 8);
    close(trace.outputs[1][[0, 1]], 0.772928465, 9);
    let g = net.gradient(&w, x.view(), y.view(), None);
    close(g.loss, 0.298371109, 9);
    close(g.params[2][[0, 0]], 0.082167041, 9);

    // One step of gradient descent with rate 0.5, all weights updated from the original gradient
    // (tensor t: layer 1's weight 0, layer 2's weight 2).
    let step = |t: usize, r: usize, c: usize| w[t][[r, c]] - 0.5 * g.params[t][[r, c]];
    close(step(2, 0, 0), 0.35891648, 8); // w5
    close(step(2, 0, 1), 0.408666186, 9); // w6
    close(step(2, 1, 0), 0.511301270, 9); // w7
    close(step(2, 1, 1), 0.561370121, 9); // w8
    close(step(0, 0, 0), 0.149780716, 9); // w1
    close(step(0, 0, 1), 0.19956143, 8); // w2
    close(step(0, 1, 0), 0.24975114, 8); // w3
    close(step(0, 1, 1), 0.29950229, 8); // w4
}

fn one_layer(out: Activation, units: usize, l2: f64) -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let net = dense(3, &[(units, out)], Loss::CrossEntropy, l2);
    let mut rng = Rng::new(11);
    // Drawn as one units × (1 + 3) matrix, bias in column 0.
    let theta = Array2::from_shape_fn((units, 4), |_| rng.normal());
    let (w, b) = plumb_engine::graph::Dense::split(&theta);
    let batch = Batch::graph_synthetic(&net, 7, 11);
    (net, vec![w.into_dyn(), b.into_dyn()], batch)
}

/// Closed form [pub: any calculus text]: with softmax outputs and categorical cross-entropy, the
/// gradient with respect to the logits is p − y, so the bias gradient of a single-layer network is the
/// batch mean of p − y and the weight gradient is (p − y)ᵀx / m. p is computed here independently,
/// by the unshifted formula exp(z)/Σexp(z).
#[test]
fn softmax_cross_entropy_delta_is_p_minus_y() {
    let (net, w, batch) = one_layer(Activation::Softmax, 4, 0.0);
    let m = batch.len() as f64;
    let weight = w[0].view().into_dimensionality::<Ix2>().unwrap();
    let bias = w[1].view().into_dimensionality::<Ix1>().unwrap();
    let z = batch.x.dot(&weight.t()) + bias;
    let mut p = z.mapv(f64::exp);
    for mut row in p.rows_mut() {
        let total = row.sum();
        row /= total;
    }
    let delta = (&p - &batch.y) / m;
    let g = net
        .gradient(&w, batch.x.view(), batch.y.view(), None)
        .params;
    let bias = delta.sum_axis(ndarray::Axis(0));
    let weights = delta.t().dot(&batch.x);
    for r in 0..4 {
        assert!((g[1][[r]] - bias[r]).abs() < 1e-15);
        for c in 0..3 {
            assert!((g[0][[r, c]] - weights[[r, c]]).abs() < 1e-15);
        }
    }
}

/// Closed form [pub]: sigmoid outputs with binary cross-entropy give dJ/dz = a − y.
#[test]
fn sigmoid_binary_cross_entropy_delta_is_a_minus_y() {
    let (net, w, batch) = one_layer(Activation::Sigmoid, 2, 0.0);
    let m = batch.len() as f64;
    let weight = w[0].view().into_dimensionality::<Ix2>().unwrap();
    let bias = w[1].view().into_dimensionality::<Ix1>().unwrap();
    let z = batch.x.dot(&weight.t()) + bias;
    let a = z.mapv(|v| 1.0 / (1.0 + (-v).exp()));
    let delta = (&a - &batch.y) / m;
    let g = net
        .gradient(&w, batch.x.view(), batch.y.view(), None)
        .params;
    let bias = delta.sum_axis(ndarray::Axis(0));
    let weights = delta.t().dot(&batch.x);
    for r in 0..2 {
        assert!((g[1][[r]] - bias[r]).abs() < 1e-15);
        for c in 0..3 {
            assert!((g[0][[r, c]] - weights[[r, c]]).abs() < 1e-15);
        }
    }
}

/// Closed form [pub]: the L2 term (λ/2m)Σw² adds (λ/m)·w to each weight's gradient and nothing to
/// the biases'; its value is (λ/2m)Σw².
#[test]
fn l2_adds_lambda_over_m_times_w_to_non_bias_weights_only() {
    let lambda = 0.7;
    let layers = [
        (5, Activation::Tanh),
        (4, Activation::Relu),
        (3, Activation::Softmax),
    ];
    let with = dense(6, &layers, Loss::CrossEntropy, lambda);
    let without = dense(6, &layers, Loss::CrossEntropy, 0.0);
    let w = Init::HeNormal.graph_params(&with, &mut Rng::new(4));
    let batch = Batch::graph_synthetic(&with, 9, 4);
    let m = batch.len() as f64;
    let (x, y) = (batch.x.view(), batch.y.view());
    let (g1, g0) = (
        with.gradient(&w, x, y, None),
        without.gradient(&w, x, y, None),
    );
    // The weights are the even tensors, the biases the odd ones.
    let sum_sq: f64 = w.iter().step_by(2).map(|t| t.mapv(|v| v * v).sum()).sum();
    assert!((g1.loss - g0.loss - lambda / (2.0 * m) * sum_sq).abs() < 1e-14);
    for (t, (a, b)) in g1.params.iter().zip(&g0.params).enumerate() {
        let diff = a - b;
        for (k, (&d, &wv)) in diff.iter().zip(w[t].iter()).enumerate() {
            let want = if t % 2 == 1 { 0.0 } else { lambda / m * wv };
            assert!((d - want).abs() < 1e-15, "tensor {t} [{k}]: {d} vs {want}");
        }
    }
}

/// Evaluating from a layer upward with the layers below held fixed gives the same loss as the full
/// forward pass (it is the same function, cut in two).
#[test]
fn loss_from_a_layer_equals_the_full_loss() {
    let net = dense(
        4,
        &[
            (6, Activation::Elu { alpha: 1.0 }),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.2,
    );
    let w = Init::GlorotNormal.graph_params(&net, &mut Rng::new(8));
    let batch = Batch::graph_synthetic(&net, 5, 8);
    let (x, y) = (batch.x.view(), batch.y.view());
    let full = net.loss(&w, x, y);
    let trace = net.forward(&w, x);
    for start in 0..3 {
        let tail = net.forward_from(&w, x, &trace, start);
        let part = net.loss_from(&w, &tail, y);
        assert!(
            (part - full).abs() <= 1e-15 * full.abs(),
            "from layer {start}: {part} vs {full}"
        );
    }
}
