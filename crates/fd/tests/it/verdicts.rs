//! Verdicts in both directions on networks of dense layers: no false alarm on correct gradients
//! (ReLU networks with kinks, f32), and every planted error found where it was planted.

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::{
    CheckConfig, Entry, GraphCheck, Method, Precision, Sample, Status, check_graph,
    check_graph_gradient,
};

use crate::graph_common::dense;

/// A cross-entropy classifier: `inputs`, then `layers` as (units, activation), L2 `l2`.
fn classifier(inputs: usize, layers: &[(usize, Activation)], l2: f64) -> Graph {
    dense(inputs, layers, Loss::CrossEntropy, l2)
}

fn relu_net() -> Graph {
    classifier(
        6,
        &[
            (10, Activation::Relu),
            (8, Activation::Relu),
            (7, Activation::LeakyRelu { slope: 0.1 }),
            (3, Activation::Softmax),
        ],
        0.01,
    )
}

fn config(method: Method, precision: Precision) -> CheckConfig {
    let mut c = CheckConfig::new(method, precision);
    c.sample = Some(Sample::All);
    c
}

fn none(_: usize, _: usize) {}

/// Every coordinate of the engine's own gradient checked.
fn run(g: &Graph, w: &[ArrayD<f64>], batch: &Batch, m: Method, p: Precision) -> GraphCheck {
    check_graph(g, w, batch.x.view(), batch.y.view(), &config(m, p), &none).unwrap()
}

/// Every coordinate of `grad` checked.
fn run_given(
    g: &Graph,
    w: &[ArrayD<f64>],
    batch: &Batch,
    grad: &[ArrayD<f64>],
    m: Method,
    p: Precision,
) -> GraphCheck {
    let (x, y) = (batch.x.view(), batch.y.view());
    check_graph_gradient(g, w, x, y, grad, &config(m, p), &none).unwrap()
}

/// The coordinates called a mismatch, in check order.
fn mismatches(r: &GraphCheck) -> Vec<Entry> {
    r.coords
        .iter()
        .filter(|c| c.status == Status::Mismatch)
        .map(|c| c.coord)
        .collect()
}

/// Whether any random direction was called a mismatch.
fn any_direction_mismatch(r: &GraphCheck) -> bool {
    r.directions.iter().any(|d| d.status == Status::Mismatch)
}

/// `g` with its largest entry made 1% larger, and where that entry is.
fn largest_one_percent_off(g: &[ArrayD<f64>]) -> (Vec<ArrayD<f64>>, Entry) {
    let mut best = (
        Entry {
            tensor: 0,
            index: 0,
        },
        0.0f64,
    );
    for (tensor, t) in g.iter().enumerate() {
        for (index, &v) in t.iter().enumerate() {
            if v.abs() > best.1 {
                best = (Entry { tensor, index }, v.abs());
            }
        }
    }
    let mut wrong = g.to_vec();
    wrong[best.0.tensor].as_slice_mut().unwrap()[best.0.index] *= 1.01;
    (wrong, best.0)
}

/// Every bias (tensor 2l + 1 of dense layer l) drawn as `scale` times a standard normal.
fn random_biases(w: &mut [ArrayD<f64>], scale: f64, rng: &mut Rng) {
    for b in w.iter_mut().skip(1).step_by(2) {
        b.mapv_inplace(|_| scale * rng.normal());
    }
}

/// He-initialised ReLU networks (He et al. 2015 [pub] for the scale), 20 seeds: no coordinate and no
/// direction is a mismatch, with central differences and with the complex step.
#[test]
fn relu_networks_raise_no_false_alarm_over_20_seeds() {
    let net = relu_net();
    for seed in 0..20 {
        let mut w = Init::HeNormal.graph_params(&net, &mut Rng::new(seed));
        // Non-zero biases, so that pre-activations sit on both sides of the kink.
        random_biases(&mut w, 0.1, &mut Rng::new(seed + 100));
        let batch = Batch::graph_synthetic(&net, 16, seed);
        for method in [Method::Central, Method::ComplexStep] {
            let r = run(&net, &w, &batch, method, Precision::F64);
            assert_eq!(mismatches(&r), vec![], "seed {seed} {method}");
            assert!(!any_direction_mismatch(&r), "seed {seed} {method}");
        }
    }
}

/// A sample of zeros with zero biases puts every first-layer unit exactly on its kink: perturbing a
/// first-layer bias moves it across for any step, so those coordinates are `unreliable`, not
/// mismatches. A unit 3e-7 from its kink is crossed by the default step (1.2e-5, reaching out to
/// 2.4e-5) but not by one a hundred times smaller, whose stencil reaches 2.4e-7: the retry
/// resolves it.
#[test]
fn kinks_are_unreliable_and_retried() {
    let net = classifier(3, &[(4, Activation::Relu), (2, Activation::Softmax)], 0.0);
    let mut w = Init::HeNormal.graph_params(&net, &mut Rng::new(1));
    let mut x = Array2::from_shape_fn((5, 3), |(i, j)| ((i * 3 + j) as f64 * 0.37).sin());
    x.row_mut(0).fill(0.0);
    let mut y = Array2::zeros((5, 2));
    for i in 0..5 {
        y[[i, i % 2]] = 1.0;
    }
    let batch = Batch { x, y };
    let r = run(&net, &w, &batch, Method::Central, Precision::F64);
    for c in &r.coords {
        if c.coord.tensor == 1 {
            assert_eq!(c.status, Status::Unreliable, "{:?}", c.coord);
        }
        assert_ne!(c.status, Status::Mismatch, "{:?}", c.coord);
    }
    // Unit 0 of layer 1 at 3e-7 on the zero sample; all other units far from 0 there.
    w[1] = ndarray::array![3e-7, 0.5, 0.5, 0.5].into_dyn();
    let r = run(&net, &w, &batch, Method::Central, Precision::F64);
    let first_bias = Entry {
        tensor: 1,
        index: 0,
    };
    let bias0 = r.coords.iter().find(|c| c.coord == first_bias).unwrap();
    assert!(bias0.retried, "{bias0:?}");
    assert_eq!(bias0.status, Status::Match);
    // The retried step stays on the unit's side of 0.
    assert!(bias0.step < 3e-7, "{}", bias0.step);
}

/// The engine's gradient, one entry of one layer's weight or bias made 1% larger: found at that
/// entry and nowhere else. Entries are drawn among those at least 10% of their layer's largest,
/// since 1% of a near-zero entry is below any method's resolution.
#[test]
fn a_one_percent_error_in_one_entry_is_found_where_it_is() {
    let net = classifier(
        5,
        &[
            (7, Activation::Tanh),
            (6, Activation::Relu),
            (3, Activation::Softmax),
        ],
        0.05,
    );
    let mut rng = Rng::new(77);
    for seed in 0..12 {
        let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(seed));
        let batch = Batch::graph_synthetic(&net, 10, seed);
        let g = net
            .gradient(&w, batch.x.view(), batch.y.view(), None)
            .params;
        let layer = seed as usize % 3;
        let big: Vec<Entry> = {
            let top = g[2 * layer..2 * layer + 2]
                .iter()
                .flat_map(|t| t.iter())
                .fold(0.0f64, |a, v| a.max(v.abs()));
            (2 * layer..2 * layer + 2)
                .flat_map(|tensor| {
                    g[tensor]
                        .iter()
                        .enumerate()
                        .filter(|(_, v)| v.abs() >= 0.1 * top)
                        .map(move |(index, _)| Entry { tensor, index })
                })
                .collect()
        };
        let target = big[rng.below(big.len())];
        let mut bad = g.clone();
        bad[target.tensor].as_slice_mut().unwrap()[target.index] *= 1.01;
        for method in [Method::Central, Method::ComplexStep] {
            let r = run_given(&net, &w, &batch, &bad, method, Precision::F64);
            assert_eq!(mismatches(&r), vec![target], "seed {seed} {method}");
        }
    }
}

/// Random directions: the gradient of one tensor (a layer's weight or its bias) made wrong by 1%
/// of its norm in a random direction. `--directions 4` flags that tensor in all of 20 seeds, and
/// no other tensor.
#[test]
fn four_directions_catch_a_one_percent_error_in_any_single_tensor() {
    let net = classifier(
        6,
        &[
            (9, Activation::Tanh),
            (7, Activation::Sigmoid),
            (4, Activation::Softmax),
        ],
        0.05,
    );
    for seed in 0..20u64 {
        let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(seed));
        let batch = Batch::graph_synthetic(&net, 12, seed);
        let g = net
            .gradient(&w, batch.x.view(), batch.y.view(), None)
            .params;
        let layer = (seed % 3) as usize;
        let bias = seed % 2 == 0;
        let tensor = 2 * layer + bias as usize;
        let mut bad = g.clone();
        let mut rng = Rng::new(seed + 500);
        {
            let part = &mut bad[tensor];
            let norm = part.iter().map(|v| v * v).sum::<f64>().sqrt();
            let noise: Vec<f64> = (0..part.len()).map(|_| rng.normal()).collect();
            let nn = noise.iter().map(|v| v * v).sum::<f64>().sqrt();
            for (v, e) in part.iter_mut().zip(&noise) {
                *v += 0.01 * norm * e / nn;
            }
        }
        let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
        cfg.sample = Some(Sample::Total(20));
        cfg.directions = Some(4);
        cfg.seed = seed;
        let (x, y) = (batch.x.view(), batch.y.view());
        let r = check_graph_gradient(&net, &w, x, y, &bad, &cfg, &none).unwrap();
        let flagged: Vec<Option<usize>> = r
            .directions
            .iter()
            .filter(|d| d.status == Status::Mismatch)
            .map(|d| d.tensor)
            .collect();
        assert!(flagged.contains(&Some(tensor)), "seed {seed}: {flagged:?}");
        for s in &flagged {
            assert!(
                s.is_none() || *s == Some(tensor),
                "seed {seed}: {s:?} flagged"
            );
        }
    }
}

/// f32: the engine in single precision, bands from f32's ε. A correct network passes; the same
/// gradient with one large entry 1% off fails there.
#[test]
fn single_precision_passes_right_and_fails_wrong() {
    let nets = [
        classifier(5, &[(8, Activation::Tanh), (3, Activation::Softmax)], 0.05),
        relu_net(),
    ];
    for net in &nets {
        for seed in 0..5 {
            let w = Init::GlorotUniform.graph_params(net, &mut Rng::new(seed));
            let batch = Batch::graph_synthetic(net, 16, seed);
            let r = run(net, &w, &batch, Method::Central, Precision::F32);
            assert_eq!(mismatches(&r), vec![], "seed {seed}");

            let (wrong, target) = largest_one_percent_off(&r.analytic);
            let r = run_given(net, &w, &batch, &wrong, Method::Central, Precision::F32);
            assert_eq!(mismatches(&r), vec![target], "seed {seed}");
        }
    }
}

/// A confident network: the loss is a small difference of large terms (softplus(z) − y·z with
/// z ≈ 10 or 30) and the gradient a small difference a − y of numbers near 1. Round-off follows
/// those pieces, not the small results; a correct gradient must still pass, in f64 and f32, by
/// central differences and the complex step (regression: review found 20 of 37 false mismatches).
#[test]
fn confident_networks_raise_no_false_alarm() {
    let net = classifier(4, &[(5, Activation::Tanh), (2, Activation::Sigmoid)], 0.0);
    for bias in [10.0, 30.0] {
        for seed in 0..5 {
            let mut w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(seed));
            w[3].fill(bias);
            let mut batch = Batch::graph_synthetic(&net, 12, seed);
            batch.y.fill(1.0);
            for (method, precision) in [
                (Method::Central, Precision::F64),
                (Method::ComplexStep, Precision::F64),
                (Method::Central, Precision::F32),
                (Method::Richardson, Precision::F64),
            ] {
                let r = run(&net, &w, &batch, method, precision);
                let what = format!("bias {bias} seed {seed} {method} {precision:?}");
                assert_eq!(mismatches(&r), vec![], "{what}");
                assert!(!any_direction_mismatch(&r), "{what}");
            }
        }
    }
}

/// ReLU networks in f32 with directions: a direction that crosses a kink is retried with smaller
/// steps, not judged (regression: review found 23 of 28 directions left unreliable).
#[test]
fn relu_directions_in_f32_are_retried_off_their_kinks() {
    let net = classifier(
        6,
        &[
            (20, Activation::Relu),
            (15, Activation::Relu),
            (12, Activation::Relu),
            (4, Activation::Softmax),
        ],
        0.0,
    );
    let mut judged = 0;
    let mut total = 0;
    for seed in 0..5 {
        let w = Init::HeNormal.graph_params(&net, &mut Rng::new(seed));
        let batch = Batch::graph_synthetic(&net, 16, seed);
        let r = run(&net, &w, &batch, Method::Central, Precision::F32);
        assert_eq!(mismatches(&r), vec![], "seed {seed}");
        assert!(!any_direction_mismatch(&r), "seed {seed}");
        judged += r
            .directions
            .iter()
            .filter(|d| d.status == Status::Match)
            .count();
        total += r.directions.len();
    }
    assert!(
        judged * 2 > total,
        "only {judged} of {total} directions judged"
    );
}

/// A deep tanh network whose weights are 4× their He scale, checked in f32: the loss is far from
/// quadratic over f32's steps (∛ε ≈ 5e-3), and a step twice as long once made correct gradients
/// fail here (found in review). No false alarm over 20 seeds.
#[test]
fn single_precision_with_large_weights_raises_no_false_alarm() {
    let net = classifier(
        10,
        &[
            (16, Activation::Tanh),
            (16, Activation::Tanh),
            (8, Activation::Tanh),
            (4, Activation::Softmax),
        ],
        0.0,
    );
    for seed in 0..20 {
        let mut w = Init::HeNormal.graph_params(&net, &mut Rng::new(seed));
        for t in &mut w {
            t.mapv_inplace(|v| 4.0 * v);
        }
        let batch = Batch::graph_synthetic(&net, 32, seed);
        let r = run(&net, &w, &batch, Method::Central, Precision::F32);
        assert_eq!(mismatches(&r), vec![], "seed {seed}");
    }
}

/// elu with α = 1 is once differentiable at 0 but its second derivative jumps there (eᶻ → 1 on one
/// side, 0 on the other: elu″ = α·eᶻ for z < 0, 0 for z > 0 [pub: the definition]). Five-point
/// (f32) and Ridders (f64) bound their error by derivatives elu lacks across 0, so a stencil
/// across it is retried smaller or `unreliable`, never a mismatch (it was, in review, on the
/// networks below); and a 1% error in one entry is still found there.
#[test]
fn elu_networks_raise_no_false_alarm_with_any_method() {
    let net = classifier(
        6,
        &[
            (12, Activation::Elu { alpha: 1.0 }),
            (8, Activation::Elu { alpha: 1.0 }),
            (3, Activation::Softmax),
        ],
        0.01,
    );
    for seed in 0..10 {
        let mut w = Init::HeNormal.graph_params(&net, &mut Rng::new(seed));
        random_biases(&mut w, 0.1, &mut Rng::new(seed + 50));
        let batch = Batch::graph_synthetic(&net, 32, seed);
        for (method, precision) in [
            (Method::FivePoint, Precision::F32),
            (Method::Richardson, Precision::F64),
            (Method::Central, Precision::F32),
            (Method::Central, Precision::F64),
        ] {
            let r = run(&net, &w, &batch, method, precision);
            let what = format!("seed {seed} {method} {precision:?}");
            assert_eq!(mismatches(&r), vec![], "{what}");
            assert!(!any_direction_mismatch(&r), "{what}");
            if seed < 3 {
                // The other direction: the largest entry 1% off is found, and only there.
                let (wrong, target) = largest_one_percent_off(&r.analytic);
                let r = run_given(&net, &w, &batch, &wrong, method, precision);
                let found = mismatches(&r);
                let at = r.coords.iter().find(|c| c.coord == target).unwrap();
                // Found, unless the method's bound there (after a retry off the break) is too
                // wide to see 1%: then it must say it is not a match it can vouch for beyond that.
                if at.bound < at.abs_error {
                    assert_eq!(found, vec![target], "{what}: {at:?}");
                } else {
                    assert!(
                        found.is_empty() && at.retried,
                        "seed {seed} {method}: {at:?}"
                    );
                }
            }
        }
    }
}
