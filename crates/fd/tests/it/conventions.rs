//! The check under every declared convention (DESIGN §4.1): the incremental perturbed loss is the
//! whole forward pass's, the engine's gradient passes, and the gradient of another convention is
//! found wrong — a correct gradient under a declared convention passes, and only it.

use plumb_engine::{
    Activation, Batch, Conventions, Init, L2Divisor, Loss, Network, Reduction, Rng,
};
use plumb_fd::{Base, CheckConfig, Method, Precision, Sample, Status, check, check_gradient};
use plumb_fd::{full_loss, select};

fn net(c: Conventions) -> Network {
    Network::new(
        4,
        &[
            (6, Activation::Tanh),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.3,
    )
    .unwrap()
    .with_conventions(c)
}

fn every() -> Vec<Conventions> {
    let mut out = Vec::new();
    for reduction in Reduction::ALL {
        for l2_divisor in L2Divisor::ALL {
            for l2_on_bias in [false, true] {
                out.push(Conventions {
                    reduction,
                    l2_divisor,
                    l2_on_bias,
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
        let mut w = Init::GlorotUniform.weights(&net, &mut Rng::new(5));
        for l in w.layers_mut() {
            l.column_mut(0).fill(-0.1);
        }
        let batch = Batch::synthetic(&net, 7, 5);
        let base = Base::new(&net, &w, batch.x.view(), &batch.y);
        for coord in select(&net, Sample::All, 0).unwrap() {
            let (inc, _) = base.perturbed(coord, 0.3);
            let full = full_loss(&net, &w, batch.x.view(), batch.y.view(), coord, 0.3);
            assert!(
                (inc - full).abs() <= 1e-13 * full.abs(),
                "{c:?} {coord:?}: {inc} vs {full}"
            );
        }
    }
}

#[test]
fn the_declared_convention_passes_and_the_default_gradient_fails_under_another() {
    let cfg = CheckConfig::new(Method::Central, Precision::F64);
    let plain = net(Conventions::default());
    for c in every() {
        let net = net(c);
        let mut w = Init::GlorotUniform.weights(&net, &mut Rng::new(6));
        // Non-zero biases, so that their decay shows.
        for l in w.layers_mut() {
            l.column_mut(0).fill(0.2);
        }
        let batch = Batch::synthetic(&net, 8, 6);
        let own = check(&net, &w, &batch, &cfg, &|_, _| {}).unwrap();
        assert!(
            own.coords.iter().all(|k| k.status == Status::Match),
            "{c:?}: the declared convention's own gradient"
        );
        if c == Conventions::default() {
            continue;
        }
        // The default convention's gradient, checked against this convention's loss.
        let other = plain.gradient(&w, batch.x.view(), batch.y.view()).1;
        let r = check_gradient(&net, &w, &batch, &other, &cfg, &|_, _| {}).unwrap();
        let wrong = r
            .coords
            .iter()
            .filter(|k| k.status == Status::Mismatch)
            .count();
        assert!(wrong > 0, "{c:?}: the default gradient passed");
        // Bias decay alone changes only the bias weights.
        if c.reduction == Reduction::Mean && c.l2_divisor == L2Divisor::TwoM {
            assert!(
                r.coords
                    .iter()
                    .all(|k| k.status == Status::Match || k.coord.is_bias())
            );
        }
    }
}
