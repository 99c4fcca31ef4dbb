//! The check of a right gradient at weights 1 to 1,000 times their usual scale, in f32 and
//! f64: no false alarm, and a planted mistake still caught.
//!
//! At such scales a smooth activation (softplus, tanh, the logistic) or the output's softmax
//! turns as sharply as a kink on the scale of f32's steps (h = ∛ε·|θ|: a weight of 300 moves
//! by 1.5, the units above it by tens), and the central ladder's truncation estimate, which
//! takes the loss to be near its Taylor polynomial across the stencil, fell short of the
//! error: the quotients flatten past the bend and agree with each other, far from the
//! derivative. Before the checker asked the engine whether a disagreement's stencil went past
//! half of some activation's Taylor radius (`Graph::bent`, `plumb_fd::BEND_SHARE`), the
//! softplus chains below failed right gradients at 100, 300 and 1,000 times (up to 8
//! coordinates and 3 directions per setting over ten seeds), and relu, leaky-relu and elu
//! chains under a softmax cross-entropy as well (up to 44 coordinates per setting here, 118 on
//! a wider chain); the f64 check of the same points never did. The truth each check is held to is the engine's f64 gradient at the parameters
//! f32 holds (checked against num-dual in crates/engine/tests/it/graph_dual), so a mismatch
//! here is a false alarm, and an estimate farther from it than its own bound is a bound that
//! undercounts.

use crate::graph_common;

use graph_common::*;
use ndarray::ArrayD;
use plumb_engine::graph::{Graph, LossConfig};
use plumb_engine::{Activation, Loss, Reduction};
use plumb_fd::{GraphCheck, Method, Precision, Sample, Status};

/// The weight scales: the usual initialisation (1/√fan-in) times these.
const SCALES: [f64; 5] = [1.0, 30.0, 100.0, 300.0, 1000.0];

/// A dense chain 12 → 10 → 8 → out with `act` in both hidden layers: a softmax of 4 under
/// cross-entropy, an identity of 3 under squared error.
fn chain(act: Activation, loss: Loss, reduction: Reduction, l2: f64) -> Graph {
    let config = LossConfig {
        loss,
        reduction,
        l2,
        ..LossConfig::cross_entropy()
    };
    let out = match loss {
        Loss::CrossEntropy => (4, Activation::Softmax),
        Loss::SquaredError => (3, Activation::Identity),
    };
    dense_with(12, &[(10, act), (8, act), out], config)
}

/// The central check of `given` at every coordinate, with the default directions.
fn check(c: &Case, given: &[ArrayD<f64>], precision: Precision, seed: u64) -> GraphCheck {
    let mut cfg = config(Method::Central, precision, seed);
    cfg.sample = Some(Sample::All);
    run_given(c, given, &cfg)
}

/// What went wrong in a check of the truth: each mismatch (coordinate or direction), and with
/// `strict` each coordinate judged (not unreliable) whose estimate lies farther from the truth
/// than its bound.
fn faults(r: &GraphCheck, strict: bool) -> Vec<String> {
    let mut out = Vec::new();
    for co in &r.coords {
        let beyond = co.status != Status::Unreliable && (co.numeric - co.analytic).abs() > co.bound;
        if co.status == Status::Mismatch || (strict && beyond) {
            out.push(format!(
                "t{} #{} {}: truth {:e}, estimate {:e} ± {:e} (step {:e})",
                co.coord.tensor,
                co.coord.index,
                co.status.name(),
                co.analytic,
                co.numeric,
                co.bound,
                co.step
            ));
        }
    }
    for (i, d) in r.directions.iter().enumerate() {
        if d.status == Status::Mismatch {
            out.push(format!(
                "direction {i}: truth {:e}, estimate {:e} ± {:e}",
                d.analytic, d.numeric, d.bound
            ));
        }
    }
    out
}

/// Every chain of `acts` under both losses and reductions, L2 off and on (`l2s`), at every
/// scale and seed: no fault in f32 or f64 (`strict`: see [`faults`]). Returns the share of
/// coordinates matched in f32 at each scale (so that no fault does not come from settling
/// nothing) and how many coordinates lay beyond their bound from the truth.
fn no_faults(acts: &[Activation], l2s: &[f64], seeds: u64, strict: bool) -> (Vec<f64>, usize) {
    let mut matched = vec![(0usize, 0usize); SCALES.len()];
    let mut beyond = 0;
    for &act in acts {
        for loss in [Loss::CrossEntropy, Loss::SquaredError] {
            for reduction in [Reduction::Mean, Reduction::Sum] {
                for &l2 in l2s {
                    for (s, &scale) in SCALES.iter().enumerate() {
                        for seed in 0..seeds {
                            let (c, truth) =
                                scaled(chain(act, loss, reduction, l2), 32, scale, seed);
                            let what = format!(
                                "{act}, {loss:?}, {reduction:?}, l2 {l2}, weights x{scale}, seed {seed}"
                            );
                            for precision in [Precision::F32, Precision::F64] {
                                let r = check(&c, &truth, precision, seed);
                                let found = faults(&r, strict);
                                assert_eq!(found, Vec::<String>::new(), "{what}, {precision:?}");
                                beyond += faults(&r, true).len();
                                if precision == Precision::F32 {
                                    matched[s].0 += count(&r, Status::Match).0;
                                    matched[s].1 += r.coords.len();
                                }
                            }
                        }
                    }
                }
            }
        }
    }
    let shares = matched.iter().map(|&(m, n)| m as f64 / n as f64).collect();
    (shares, beyond)
}

// Softplus chains, both losses and reductions, L2 on and off, six seeds: at every scale no
// coordinate or direction of a right gradient is a mismatch and no estimate lies beyond its
// bound from the truth, in f32 and f64. (Before the bend test: up to 8 coordinate mismatches
// and 3 direction mismatches per setting from 100x on, in f32, over ten seeds.)
#[test]
fn softplus_chains_at_large_weight_scales_raise_no_false_alarm() {
    let (shares, _) = no_faults(&[Activation::Softplus], &[0.0, 0.1], 6, true);
    eprintln!("softplus, f32, share matched by scale {SCALES:?}: {shares:.3?}");
    // At the usual scale nearly every coordinate settles; at the largest, where much cannot,
    // still most (measured: see the commit).
    assert!(shares[0] > 0.95, "{shares:?}");
    assert!(shares.iter().all(|&s| s > 0.5), "{shares:?}");
}

// The other activations at the same scales (L2 off, four seeds): tanh, the logistic, elu, relu
// and leaky relu: no mismatch in f32 or f64. (Before the bend test the piecewise-linear chains failed under softmax
// cross-entropy: the softmax of large logits is the bend there.)
#[test]
fn other_activations_at_large_weight_scales_raise_no_false_alarm() {
    let acts = [
        Activation::Tanh,
        Activation::Sigmoid,
        Activation::Elu { alpha: 1.0 },
        Activation::Relu,
        Activation::LeakyRelu { slope: 0.01 },
    ];
    let (shares, beyond) = no_faults(&acts, &[0.0], 4, false);
    eprintln!("other activations, f32, share matched by scale {SCALES:?}: {shares:.3?}");
    // Not asserted: tanh's estimates at 30x-100x under squared error, settled on one step by
    // losses as changes, can lie up to 3 times their bound from the truth while within the
    // tolerance: the third difference undercounts the truncation there (docs/engine.md,
    // "Bends"; open, not a false alarm).
    eprintln!("other activations: {beyond} coordinates beyond their bound from the truth");
    assert!(shares.iter().all(|&s| s > 0.5), "{shares:?}");
}

// The other direction: at large scales a gradient with one entry per tensor 10% off (a hundred
// times the f32 tolerance) is never called a match there (where the entry is above its
// tensor's floor), and is a mismatch in most cases; no other coordinate is a mismatch.
#[test]
fn a_planted_mistake_at_large_weight_scales_is_still_caught() {
    let (mut caught, mut planted) = (0, 0);
    for scale in [30.0, 300.0] {
        for loss in [Loss::CrossEntropy, Loss::SquaredError] {
            for seed in 0..3 {
                let graph = chain(Activation::Softplus, loss, Reduction::Mean, 0.0);
                let (c, truth) = scaled(graph, 32, scale, seed);
                let mut wrong = truth.clone();
                let mut at = Vec::new();
                for (t, g) in wrong.iter_mut().enumerate() {
                    let k = g
                        .iter()
                        .enumerate()
                        .max_by(|a, b| a.1.abs().total_cmp(&b.1.abs()))
                        .unwrap()
                        .0;
                    g.as_slice_mut().unwrap()[k] *= 1.1;
                    at.push((t, k));
                }
                let r = check(&c, &wrong, Precision::F32, seed);
                for co in &r.coords {
                    let here = at.contains(&(co.coord.tensor, co.coord.index));
                    let what = format!(
                        "{loss:?} x{scale} seed {seed}: t{} #{} {} (a={:e} n={:e} bound={:e})",
                        co.coord.tensor,
                        co.coord.index,
                        co.status.name(),
                        co.analytic,
                        co.numeric,
                        co.bound
                    );
                    // A tensor whose gradient is small against the network's is judged
                    // against the network's scale (its floor): 10% of its entry may be below it.
                    let floored = co.analytic.abs() < r.floors[co.coord.tensor];
                    if here && !floored {
                        assert_ne!(co.status, Status::Match, "{what}");
                        planted += 1;
                        caught += usize::from(co.status == Status::Mismatch);
                    } else if !here {
                        assert_ne!(co.status, Status::Mismatch, "{what}");
                    }
                }
            }
        }
    }
    eprintln!("planted 10% mistakes at 30x and 300x: {caught} of {planted} caught");
    assert!(2 * caught > planted, "{caught} of {planted} caught");
}
