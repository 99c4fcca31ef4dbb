//! Published values and closed forms the engine must reproduce.

use ndarray::{Array2, array, s};
use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng, Weights};

/// M. Mazur, "A Step by Step Backpropagation Example" (2015) [pub]: a 2-2-2 sigmoid network with
/// biases, squared error E = Σ ½(t − o)² on one sample. The engine's squared error is (1/2m)Σ‖h − y‖²,
/// the same function for m = 1. The source gives 9 significant digits (w6, w2 and w5 rounded at 8 or
/// 9); each value is asserted to the last digit the source prints.
#[test]
fn mazur_worked_example() {
    let net = Network::new(
        2,
        &[(2, Activation::Sigmoid), (2, Activation::Sigmoid)],
        Loss::SquaredError,
        0.0,
    )
    .unwrap();
    // Augmented rows: [bias, w from i1, w from i2]; w1, w2 into h1; w3, w4 into h2; w5, w6 into o1;
    // w7, w8 into o2; biases 0.35 (hidden) and 0.60 (output).
    let w = Weights::new(vec![
        array![[0.35, 0.15, 0.20], [0.35, 0.25, 0.30]],
        array![[0.60, 0.40, 0.45], [0.60, 0.50, 0.55]],
    ]);
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
    close(trace.a[1][[0, 0]], 0.593269992, 9);
    close(trace.a[1][[0, 1]], 0.596884378, 9);
    close(trace.a[2][[0, 0]], 0.75136507, 8);
    close(trace.a[2][[0, 1]], 0.772928465, 9);
    let (loss, grad) = net.gradient(&w, x.view(), y.view());
    close(loss, 0.298371109, 9);
    close(grad.layer(1)[[0, 1]], 0.082167041, 9);

    // One step of gradient descent with rate 0.5, all weights updated from the original gradient.
    let step = |l: usize, r: usize, c: usize| w.layer(l)[[r, c]] - 0.5 * grad.layer(l)[[r, c]];
    close(step(1, 0, 1), 0.35891648, 8); // w5
    close(step(1, 0, 2), 0.408666186, 9); // w6
    close(step(1, 1, 1), 0.511301270, 9); // w7
    close(step(1, 1, 2), 0.561370121, 9); // w8
    close(step(0, 0, 1), 0.149780716, 9); // w1
    close(step(0, 0, 2), 0.19956143, 8); // w2
    close(step(0, 1, 1), 0.24975114, 8); // w3
    close(step(0, 1, 2), 0.29950229, 8); // w4
}

fn one_layer(out: Activation, units: usize, l2: f64) -> (Network, Weights<f64>, Batch) {
    let net = Network::new(3, &[(units, out)], Loss::CrossEntropy, l2).unwrap();
    let mut rng = Rng::new(11);
    let w = Weights::new(vec![Array2::from_shape_fn((units, 4), |_| rng.normal())]);
    let batch = Batch::synthetic(&net, 7, 11);
    (net, w, batch)
}

/// Closed form [pub: any calculus text]: with softmax outputs and categorical cross-entropy, the
/// gradient with respect to the logits is p − y, so the bias gradient of a single-layer network is the
/// batch mean of p − y and the weight gradient is (p − y)ᵀx / m. p is computed here independently,
/// by the unshifted formula exp(z)/Σexp(z).
#[test]
fn softmax_cross_entropy_delta_is_p_minus_y() {
    let (net, w, batch) = one_layer(Activation::Softmax, 4, 0.0);
    let m = batch.len() as f64;
    let theta = w.layer(0);
    let z = batch.x.dot(&theta.slice(s![.., 1..]).t()) + theta.column(0);
    let mut p = z.mapv(f64::exp);
    for mut row in p.rows_mut() {
        let total = row.sum();
        row /= total;
    }
    let delta = (&p - &batch.y) / m;
    let (_, grad) = net.gradient(&w, batch.x.view(), batch.y.view());
    let g = grad.layer(0);
    let bias = delta.sum_axis(ndarray::Axis(0));
    let weights = delta.t().dot(&batch.x);
    for r in 0..4 {
        assert!((g[[r, 0]] - bias[r]).abs() < 1e-15);
        for c in 0..3 {
            assert!((g[[r, c + 1]] - weights[[r, c]]).abs() < 1e-15);
        }
    }
}

/// Closed form [pub]: sigmoid outputs with binary cross-entropy give dJ/dz = a − y.
#[test]
fn sigmoid_binary_cross_entropy_delta_is_a_minus_y() {
    let (net, w, batch) = one_layer(Activation::Sigmoid, 2, 0.0);
    let m = batch.len() as f64;
    let theta = w.layer(0);
    let z = batch.x.dot(&theta.slice(s![.., 1..]).t()) + theta.column(0);
    let a = z.mapv(|v| 1.0 / (1.0 + (-v).exp()));
    let delta = (&a - &batch.y) / m;
    let (_, grad) = net.gradient(&w, batch.x.view(), batch.y.view());
    let bias = delta.sum_axis(ndarray::Axis(0));
    let weights = delta.t().dot(&batch.x);
    for r in 0..2 {
        assert!((grad.layer(0)[[r, 0]] - bias[r]).abs() < 1e-15);
        for c in 0..3 {
            assert!((grad.layer(0)[[r, c + 1]] - weights[[r, c]]).abs() < 1e-15);
        }
    }
}

/// Closed form [pub]: the L2 term (λ/2m)Σw² adds (λ/m)·w to each non-bias weight's gradient and
/// nothing to the bias weights'; its value is (λ/2m)Σw².
#[test]
fn l2_adds_lambda_over_m_times_w_to_non_bias_weights_only() {
    let lambda = 0.7;
    let layers = [
        (5, Activation::Tanh),
        (4, Activation::Relu),
        (3, Activation::Softmax),
    ];
    let with = Network::new(6, &layers, Loss::CrossEntropy, lambda).unwrap();
    let without = Network::new(6, &layers, Loss::CrossEntropy, 0.0).unwrap();
    let w = Init::HeNormal.weights(&with, &mut Rng::new(4));
    let batch = Batch::synthetic(&with, 9, 4);
    let m = batch.len() as f64;
    let (j1, g1) = with.gradient(&w, batch.x.view(), batch.y.view());
    let (j0, g0) = without.gradient(&w, batch.x.view(), batch.y.view());
    let sum_sq: f64 = w
        .layers()
        .iter()
        .map(|t| t.slice(s![.., 1..]).mapv(|v| v * v).sum())
        .sum();
    assert!((j1 - j0 - lambda / (2.0 * m) * sum_sq).abs() < 1e-14);
    for l in 0..3 {
        let diff = g1.layer(l) - g0.layer(l);
        for ((r, c), &d) in diff.indexed_iter() {
            let want = if c == 0 {
                0.0
            } else {
                lambda / m * w.layer(l)[[r, c]]
            };
            assert!(
                (d - want).abs() < 1e-15,
                "layer {l} ({r}, {c}): {d} vs {want}"
            );
        }
    }
}

/// Evaluating from a layer upward with the layers below held fixed gives the same loss as the full
/// forward pass (it is the same function, cut in two).
#[test]
fn loss_from_a_layer_equals_the_full_loss() {
    let net = Network::new(
        4,
        &[
            (6, Activation::Elu { alpha: 1.0 }),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.2,
    )
    .unwrap();
    let w = Init::GlorotNormal.weights(&net, &mut Rng::new(8));
    let batch = Batch::synthetic(&net, 5, 8);
    let full = net.loss_value(&w, batch.x.view(), batch.y.view());
    let trace = net.forward(&w, batch.x.view());
    for start in 0..3 {
        let part = net.loss_from(&w, start, trace.a[start].view(), batch.y.view());
        assert!(
            (part - full).abs() <= 1e-15 * full.abs(),
            "from layer {start}: {part} vs {full}"
        );
    }
}
