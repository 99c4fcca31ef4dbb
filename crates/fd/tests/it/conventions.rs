//! The check under every declared convention (DESIGN §4.1): the incremental perturbed loss is the
//! whole forward pass's, the engine's gradient passes, and the gradient of another convention is
//! found wrong — a correct gradient under a declared convention passes, and only it.

use plumb_engine::graph::{Graph, LossConfig, Moved};
use plumb_engine::{Activation, Batch, Init, L2Divisor, Reduction, Rng};
use plumb_fd::{CheckConfig, Method, Precision, Status, check_graph, check_graph_gradient};

use crate::graph_common::dense_with;

fn net(c: LossConfig) -> Graph {
    dense_with(
        4,
        &[
            (6, Activation::Tanh),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        c,
    )
}

fn default() -> LossConfig {
    LossConfig {
        l2: 0.3,
        ..LossConfig::cross_entropy()
    }
}

fn every() -> Vec<LossConfig> {
    let mut out = Vec::new();
    for reduction in Reduction::ALL {
        for l2_divisor in L2Divisor::ALL {
            for l2_on_bias in [false, true] {
                out.push(LossConfig {
                    reduction,
                    l2_divisor,
                    l2_on_bias,
                    ..default()
                });
            }
        }
    }
    out
}

#[test]
fn incremental_loss_equals_the_full_forward_pass_under_every_convention() {
    for c in every() {
        let net = net(c);
        let mut w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(5));
        for b in w.iter_mut().skip(1).step_by(2) {
            b.fill(-0.1);
        }
        let batch = Batch::graph_synthetic(&net, 7, 5);
        let (x, y) = (batch.x.view(), batch.y.view());
        let base = net.forward(&w, x);
        let l2 = net.l2_sum(&w);
        for (tensor, t) in w.iter().enumerate() {
            for index in 0..t.len() {
                let moved = Moved {
                    tensor,
                    index,
                    delta: 0.3,
                };
                let tail = net.forward_moved(&w, x, &base, &moved);
                let inc = net.loss_moved(&w, &tail, y, l2, &moved);
                let mut q = w.clone();
                q[tensor].as_slice_mut().unwrap()[index] += 0.3;
                let full = net.loss(&q, x, y);
                assert!(
                    (inc - full).abs() <= 1e-13 * full.abs(),
                    "{c:?} ({tensor}, {index}): {inc} vs {full}"
                );
            }
        }
    }
}

#[test]
fn the_declared_convention_passes_and_the_default_gradient_fails_under_another() {
    let cfg = CheckConfig::new(Method::Central, Precision::F64);
    let plain = net(default());
    for c in every() {
        let net = net(c);
        let mut w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(6));
        // Non-zero biases, so that their decay shows.
        for b in w.iter_mut().skip(1).step_by(2) {
            b.fill(0.2);
        }
        let batch = Batch::graph_synthetic(&net, 8, 6);
        let (x, y) = (batch.x.view(), batch.y.view());
        let own = check_graph(&net, &w, x, y, &cfg, &|_, _| {}).unwrap();
        assert!(
            own.coords.iter().all(|k| k.status == Status::Match),
            "{c:?}: the declared convention's own gradient"
        );
        if c == default() {
            continue;
        }
        // The default convention's gradient, checked against this convention's loss.
        let other = plain.gradient(&w, x, y, None).params;
        let r = check_graph_gradient(&net, &w, x, y, &other, &cfg, &|_, _| {}).unwrap();
        let wrong = r
            .coords
            .iter()
            .filter(|k| k.status == Status::Mismatch)
            .count();
        assert!(wrong > 0, "{c:?}: the default gradient passed");
        // Bias decay alone changes only the biases (odd tensors).
        if c.reduction == Reduction::Mean && c.l2_divisor == L2Divisor::TwoM {
            assert!(
                r.coords
                    .iter()
                    .all(|k| k.status == Status::Match || k.coord.tensor % 2 == 1)
            );
        }
    }
}
