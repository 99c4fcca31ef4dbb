//! Trained networks in f32: how much of a check settles, and that an unsettled check never passes.
//! The networks are trained here by plain gradient descent with the engine's own gradient (the
//! issue's case: a 10-32-16-3 network, tanh → relu → softmax, cross-entropy with L2, a few hundred
//! steps), on classes a fixed random linear teacher assigns — invented data, for the shape of a
//! trained network only.

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::{
    CheckConfig, GraphCheck, Method, Precision, SETTLE, Sample, Settlement, Status,
    UNSETTLED_SHARE, check_graph,
};

use crate::graph_common::dense;

/// Gradient descent for `steps` steps at rate `rate`, from Glorot-uniform weights of `seed`.
fn train(net: &Graph, batch: &Batch, seed: u64, steps: usize, rate: f64) -> Vec<ArrayD<f64>> {
    let mut w = Init::GlorotUniform.graph_params(net, &mut Rng::new(seed));
    for _ in 0..steps {
        let g = net.gradient(&w, batch.x.view(), batch.y.view(), None);
        for (t, gt) in w.iter_mut().zip(&g.params) {
            t.scaled_add(-rate, gt);
        }
    }
    w
}

/// A batch whose classes a random linear map of x decides (softmax outputs), or whose targets it
/// gives (other outputs).
fn taught(net: &Graph, m: usize, seed: u64) -> Batch {
    let mut rng = Rng::new(seed ^ 0x7eac);
    let (n, k) = (net.input().size(), net.output().size());
    let x = Array2::from_shape_fn((m, n), |_| rng.normal());
    let t = Array2::from_shape_fn((n, k), |_| rng.normal());
    let z = x.dot(&t);
    let softmax = net.nodes().last().unwrap().activation == Activation::Softmax;
    let y = if softmax {
        Array2::from_shape_fn((m, k), |(i, j)| {
            let row = z.row(i);
            let best = (0..k).max_by(|&a, &b| row[a].total_cmp(&row[b])).unwrap();
            if j == best { 1.0 } else { 0.0 }
        })
    } else {
        z.mapv(|v| v.tanh())
    };
    Batch { x, y }
}

/// The three networks of the measurement: the 10-32-16-3 (tanh, relu, softmax with L2), an
/// all-tanh one, and a sigmoid one with squared error.
fn networks() -> Vec<(&'static str, Graph, Vec<ArrayD<f64>>, Batch)> {
    let specs: Vec<(&str, Graph)> = vec![
        (
            "10-32-16-3 tanh-relu-softmax",
            dense(
                10,
                &[
                    (32, Activation::Tanh),
                    (16, Activation::Relu),
                    (3, Activation::Softmax),
                ],
                Loss::CrossEntropy,
                0.01,
            ),
        ),
        (
            "10-32-16-3 tanh-tanh-softmax",
            dense(
                10,
                &[
                    (32, Activation::Tanh),
                    (16, Activation::Tanh),
                    (3, Activation::Softmax),
                ],
                Loss::CrossEntropy,
                0.01,
            ),
        ),
        (
            "8-24-4 sigmoid-identity squared",
            dense(
                8,
                &[(24, Activation::Sigmoid), (4, Activation::Identity)],
                Loss::SquaredError,
                0.001,
            ),
        ),
    ];
    specs
        .into_iter()
        .map(|(name, net)| {
            let batch = taught(&net, 64, 3);
            let w = train(&net, &batch, 5, 300, 0.1);
            eprintln!(
                "{name}: max |w| {:.3}",
                w.iter()
                    .flat_map(|t| t.iter())
                    .fold(0.0f64, |m, v| m.max(v.abs()))
            );
            (name, net, w, batch)
        })
        .collect()
}

/// The share of checked coordinates settled: a match or a mismatch whose method bound is within
/// a tenth of the value judged, max(|a|, |n|, floor). Computed from the figures, not the status, so
/// that the same measure applies to a check that knew no `unsettled` status.
fn settled_share(r: &GraphCheck) -> f64 {
    let settled = r
        .coords
        .iter()
        .filter(|c| {
            let den = c
                .analytic
                .abs()
                .max(c.numeric.abs())
                .max(r.floors[c.coord.tensor]);
            c.status != Status::Unreliable && c.bound <= SETTLE * den
        })
        .count();
    settled as f64 / r.coords.len() as f64
}

/// The case, both ways. In f32, on trained networks: no mismatch (the gradients are the
/// engine's own); no coordinate called a `match` whose bound exceeds a tenth of its value (the
/// issue saw analytic −1.48e-4 against numeric +1.42e-4 shown as a match); a check that leaves
/// more than a quarter unsettled is inconclusive, one that settles nearly all is conclusive.
/// Settled shares (central, f32) measured when this was written: 0.1%, 0%, 3.5% with h = ∛ε and
/// its double only; 5.4%, 39%, 94% with the ladder; 100%, 100%, 100% once a coordinate f32's
/// losses leave open is asked again on losses in f64 at the same parameters (its `wide` flag);
/// Richardson, which has no such retry, 3.3%, 19.1%, 76.3% (`cargo test -p plumb-fd --test it
/// settle:: -- --nocapture` prints them).
#[test]
fn trained_networks_in_f32_settle_what_they_can_and_never_pass_unsettled() {
    let (mut shares, mut wide) = (Vec::new(), Vec::new());
    for (name, net, w, batch) in networks() {
        for method in [Method::Central, Method::Richardson, Method::FivePoint] {
            let mut c = CheckConfig::new(method, Precision::F32);
            c.sample = Some(Sample::All);
            let (x, y) = (batch.x.view(), batch.y.view());
            let r = check_graph(&net, &w, x, y, &c, &|_, _| {}).unwrap();
            let bad: Vec<_> = r
                .coords
                .iter()
                .filter(|c| c.status == Status::Mismatch)
                .collect();
            assert!(bad.is_empty(), "{name} {method}: {:?}", bad.first());
            for c in &r.coords {
                let den = c
                    .analytic
                    .abs()
                    .max(c.numeric.abs())
                    .max(r.floors[c.coord.tensor]);
                if c.status == Status::Match {
                    assert!(c.bound <= SETTLE * den, "{name} {method}: {c:?}");
                }
            }
            let share = settled_share(&r);
            let settlement = Settlement::of(r.coords.iter().map(|c| c.status));
            assert!(
                (settlement.share() - share).abs() < 1e-12,
                "{name} {method}"
            );
            assert_eq!(
                settlement.conclusive(),
                share >= 1.0 - UNSETTLED_SHARE,
                "{name} {method}"
            );
            eprintln!(
                "{name} {method}: settled {:.1}% of {}",
                100.0 * share,
                r.coords.len()
            );
            match method {
                Method::Central => {
                    let widened = r.coords.iter().filter(|c| c.wide).count();
                    wide.push((share, widened as f64 / r.coords.len() as f64));
                }
                Method::Richardson => shares.push(share),
                _ => {}
            }
        }
    }
    // Central settles all three, the network only through losses in f64: f32's own
    // leave most of it open.
    for &(share, widened) in &wide {
        assert!(share > 1.0 - UNSETTLED_SHARE, "{wide:?}");
        assert!(widened == 0.0 || share == 1.0, "{wide:?}");
    }
    assert!(wide[0].1 > 0.5, "{wide:?}");
    // Without that retry, the network stays open in f32 (it needs f64 or the complex
    // step), the sigmoid one settles: both sides of the threshold.
    assert!(shares[0] < 0.5, "{shares:?}");
    assert!(shares[2] > 1.0 - UNSETTLED_SHARE, "{shares:?}");
}
