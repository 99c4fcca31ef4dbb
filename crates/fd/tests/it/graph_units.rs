//! The rank-one update of a dense layer above a moved entry (`Layer::forward_units`) is not bit
//! for bit a full pass; what the check needs is that the difference of two losses it takes stays
//! within what its bound charges for round-off: a central quotient's numerator f(θ + h) −
//! f(θ − h) is allowed 2 · noise, noise = NOISE · ε · max(|J|, loss magnitude) (crates/fd/src/
//! method.rs, external.rs). In f32 the numerator through the hints is compared with the same
//! numerator computed in f64 by whole forward passes at the same (f32-rounded) values — a
//! reference 2²⁹ times finer; in f64, with f64's whole forward passes.

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{Dense, Graph, GraphBuilder, LayerScalar, LossConfig, Moved, Shape};
use plumb_engine::{Activation, Rng};
use plumb_fd::{Method, NOISE, Precision, graph_loss_magnitude};

/// 48 → 40 tanh → 24 relu → 10 softmax, cross-entropy with L2: every hidden layer reads enough
/// units for the update.
fn stack() -> Graph {
    let config = LossConfig {
        l2: 1e-3,
        ..LossConfig::cross_entropy()
    };
    let mut b = GraphBuilder::new(Shape::Flat(48), config);
    for (units, act) in [
        (40, Activation::Tanh),
        (24, Activation::Relu),
        (10, Activation::Softmax),
    ] {
        b.push(None, act, |s| Dense::new(units, s)).unwrap();
    }
    b.finish().unwrap()
}

/// The largest |numerator error| / (2 · noise) over entries of the two hidden layers' tensors.
fn worst_share<S: LayerScalar>(g: &Graph, precision: Precision, seed: u64) -> f64 {
    let mut rng = Rng::new(seed);
    let m = 16;
    let round = |v: f64| S::from_f64(v).re();
    let params: Vec<ArrayD<f64>> = g
        .tensors()
        .iter()
        .map(|t| {
            let sd = 1.0 / (t.spec.fan_in as f64).sqrt();
            ArrayD::from_shape_fn(t.spec.shape.clone(), |_| round(sd * rng.normal()))
        })
        .collect();
    let x = Array2::from_shape_fn((m, 48), |_| round(rng.normal()));
    let mut y = Array2::zeros((m, 10));
    for i in 0..m {
        y[[i, rng.below(10)]] = 1.0;
    }
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let (xs, ys) = (x.mapv(S::from_f64), y.mapv(S::from_f64));
    let base = g.forward(&p, xs.view());
    let j0 = g.loss_of(&p, &base, ys.view()).re();
    let l2 = g.l2_sum(&p);
    let eps = precision.epsilon();
    let noise = NOISE * eps * j0.abs().max(graph_loss_magnitude(g, &p, &base, &ys));
    let mut worst = 0.0f64;
    for (t, spec) in g.tensors().iter().enumerate() {
        if spec.layer == 2 {
            continue;
        }
        let n = params[t].len();
        for k in (0..n).step_by(n / 12 + 1) {
            let theta = params[t].as_slice().unwrap()[k];
            // Steps S represents exactly as (θ ± h) − θ, as the check takes them.
            let h = Method::Central.default_step(theta, eps);
            let step = |d: f64| ((S::from_f64(theta) + S::from_f64(d)) - S::from_f64(theta)).re();
            let (up, down) = (step(h), step(-h));
            let hinted = |d: f64| {
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta: S::from_f64(d),
                };
                let (j, _) = g.moved_loss(&p, xs.view(), &base, ys.view(), l2, &moved);
                j.re()
            };
            // The reference: whole f64 passes at θ ± h (exact sums: both are S's values).
            let whole = |d: f64| {
                let mut q = params.clone();
                q[t].as_slice_mut().unwrap()[k] += d;
                g.loss(&q, x.view(), y.view())
            };
            let got = hinted(up) - hinted(down);
            let reference = whole(up) - whole(down);
            worst = worst.max((got - reference).abs() / (2.0 * noise));
        }
    }
    worst
}

#[test]
fn the_updated_layers_round_off_stays_within_the_checks_noise() {
    let g = stack();
    for seed in [1, 2, 3] {
        let f32_share = worst_share::<f32>(&g, Precision::F32, seed);
        let f64_share = worst_share::<f64>(&g, Precision::F64, seed);
        assert!(
            f32_share <= 1.0,
            "seed {seed}: f32 at {f32_share} of 2·noise"
        );
        assert!(
            f64_share <= 1.0,
            "seed {seed}: f64 at {f64_share} of 2·noise"
        );
    }
}
