//! The graph check's fast paths against the plain path: the same checker asked as an outside
//! program is ([`check_external`]), every perturbation a list of changes and each loss a whole
//! forward pass of the engine at the moved parameters (`Graph::loss`): no hint, no tail, no
//! update by moved units, no direction taken as a vector. Kinks are seen on both sides (the
//! plain side compares a whole pass's branches with the base's), and the loss's round-off
//! magnitude is the same, so the two differ only in how each loss is computed.
//!
//! - Directions go to the graph as the vectors they are: the same data term bit for bit, and
//!   the L2 term as the base's Σ w² plus the change of the moved entries, where the plain path
//!   sums Σ w² afresh. The two L2 sums differ by rounding (crates/fd/src/graph_check.rs states
//!   the incremental one's bound), which may reach the loss's last place: the same verdict for
//!   every direction, the estimates within their bounds of each other.
//! - A convolution or dense layer above a moved entry updates by the channels that changed
//!   (`Layer::forward_units`), equal to a whole pass up to rounding: the same verdict at every
//!   coordinate, the estimates within their bounds of each other.
//!
//! - A direction's lowest moved layer, where its kind's z is linear in its tensors (conv,
//!   dense, norms), gives z(θ) + t·z_v for each step t instead of a pass at θ + t·v
//!   (`Graph::forward_along`): equal up to rounding, the same verdict for every direction.
//!
//! Both ways: the engine's own gradient, and a gradient with a catalogued mistake planted
//! (`Graph::plant`), which must be a mismatch at the same coordinates on both paths. The
//! networks' gradients are the engine's, which crates/engine/tests checks against num-dual
//! (every kind, random settings) and autograd (fixtures/graph/cases.json; the demo CNN in
//! tests/it/clients.rs).

use ndarray::ArrayD;
use plumb_engine::Rng;
use plumb_engine::graph::Graph;
use plumb_fd::{
    Change, ExternalConfig, ExternalResult, GraphCheck, Inside, Method, OutsideTensor, Precision,
    Sample, Status, check_external, check_graph_gradient, graph_loss_magnitude,
};

use crate::graph_common::{self, Case, config};

/// The plain path's result for `analytic` (every coordinate, `k` directions, seed 1).
fn plain(c: &Case, analytic: &[ArrayD<f64>], k: usize) -> ExternalResult {
    let g = &c.graph;
    let (x, y) = (c.x.view(), c.y.view());
    let base = g.forward(&c.params, x);
    let f0 = g.loss_of(&c.params, &base, y);
    let branches = g.branches(&base);
    let moved = |changes: &[Change]| {
        let mut q = c.params.clone();
        for ch in changes {
            q[ch.tensor as usize].as_slice_mut().unwrap()[ch.index as usize] += ch.delta;
        }
        q
    };
    let crossed_at =
        |q: &[ArrayD<f64>]| !g.branches(&g.forward(q, x)).changed(&branches).is_empty();
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        Ok((0..count as u32)
            .map(|p| {
                let mine: Vec<Change> = changes
                    .iter()
                    .filter(|c| c.perturbation == p)
                    .copied()
                    .collect();
                g.loss(&moved(&mine), x, y)
            })
            .collect())
    };
    let crossed = |t: usize, k: usize, d: f64| {
        crossed_at(&moved(&[Change {
            perturbation: 0,
            tensor: t as u32,
            index: k as u64,
            delta: d,
        }]))
    };
    let crossed_along = |v: &[Vec<f64>], d: f64| {
        let mut q = c.params.clone();
        for (p, vt) in q.iter_mut().zip(v) {
            for (w, &e) in p.as_slice_mut().unwrap().iter_mut().zip(vt) {
                if e != 0.0 {
                    *w += d * e;
                }
            }
        }
        crossed_at(&q)
    };
    let inside = Inside {
        crossed: &crossed,
        crossed_along: &crossed_along,
        loss_gross: graph_loss_magnitude(g, &c.params, &base, &c.y),
        sees_kinks: true,
        differences: None,
        widens: false,
        differences_along: None,
        bent: None,
        bent_along: None,
        round_off: None,
        round_off_along: None,
    };
    let tensors: Vec<OutsideTensor> = g
        .tensors()
        .iter()
        .zip(c.params.iter().zip(analytic))
        .map(|(t, (p, a))| OutsideTensor {
            name: t.name.clone(),
            values: p.iter().copied().collect(),
            gradient: a.iter().copied().collect(),
            gross: Vec::new(),
        })
        .collect();
    let cfg = ExternalConfig {
        method: Method::Central,
        step: None,
        sample: Sample::All,
        directions: k,
        seed: 1,
        eps: f64::EPSILON,
        tolerance: Precision::F64.tolerance(),
    };
    check_external(&tensors, f0, &mut losses, &inside, &cfg).unwrap()
}

/// The graph check and the plain path agree in verdict, coordinates and directions, their
/// estimates within their bounds of each other.
fn agree(what: &str, c: &Case, analytic: &[ArrayD<f64>]) -> GraphCheck {
    agree_with(what, c, analytic, 2)
}

/// [`agree`] with `k` directions.
fn agree_with(what: &str, c: &Case, analytic: &[ArrayD<f64>], k: usize) -> GraphCheck {
    let cfg = plumb_fd::CheckConfig {
        sample: Some(Sample::All),
        directions: Some(k),
        ..config(Method::Central, Precision::F64, 1)
    };
    let (x, y) = (c.x.view(), c.y.view());
    let fast = check_graph_gradient(&c.graph, &c.params, x, y, analytic, &cfg, &|_, _| {}).unwrap();
    let slow = plain(c, analytic, k);
    assert_eq!(fast.directions.len(), slow.directions.len(), "{what}");
    for (i, (a, b)) in fast.directions.iter().zip(&slow.directions).enumerate() {
        let at = format!("{what}: direction {i}");
        assert_eq!((a.tensor, a.analytic), (b.tensor, b.analytic), "{at}");
        assert_eq!(a.status, b.status, "{at}: {a:?} against {b:?}");
        let apart = (a.numeric - b.numeric).abs();
        assert!(
            apart <= a.bound.max(b.bound),
            "{at}: estimates {} and {} further apart than their bounds",
            a.numeric,
            b.numeric
        );
    }
    assert_eq!(fast.coords.len(), slow.coords.len(), "{what}");
    for (a, b) in fast.coords.iter().zip(&slow.coords) {
        assert_eq!(a.coord, b.coord, "{what}");
        let at = format!("{what}: tensor {} #{}", a.coord.tensor, a.coord.index);
        assert_eq!(a.status, b.status, "{at}: {a:?} against {b:?}");
        let apart = (a.numeric - b.numeric).abs();
        assert!(
            apart <= a.bound.max(b.bound),
            "{at}: estimates {} and {} further apart than their bounds",
            a.numeric,
            b.numeric
        );
    }
    fast
}

/// [`agree`] on a pool of one thread and on a pool of three, for tests that the reports match.
fn on_one_and_three_threads(
    what: &str,
    c: &Case,
    analytic: &[ArrayD<f64>],
) -> (GraphCheck, GraphCheck) {
    let on = |threads: usize| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| agree(what, c, analytic))
    };
    (on(1), on(3))
}

/// The engine's gradient, and one with `code` planted in layer `layer`: the same verdicts on
/// both paths, all matches for the first, mismatches (the same ones) for the second.
fn both_ways(what: &str, c: &Case, layer: &str, code: &str) {
    let g = &c.graph;
    let (x, y) = (c.x.view(), c.y.view());
    let right = g.gradient(&c.params, x, y, None).params;
    let r = agree(what, c, &right);
    let bad = |s: Status| r.coords.iter().filter(|c| c.status == s).count();
    assert_eq!(
        bad(Status::Mismatch),
        0,
        "{what}: {}",
        graph_common::worst(&r)
    );
    let planted = g.plant(layer, code).unwrap();
    let wrong = g.gradient(&c.params, x, y, Some(&planted)).params;
    assert_ne!(wrong, right, "{what}: {code} changes the gradient");
    let r = agree(&format!("{what}, {code}"), c, &wrong);
    let mismatches = r
        .coords
        .iter()
        .filter(|c| c.status == Status::Mismatch)
        .count();
    assert!(mismatches > 0, "{what}: {code} is found");
}

fn named(g: &Graph, j: usize) -> String {
    g.nodes()[j].name.clone()
}

#[test]
fn a_conv_above_a_moved_channel_gives_the_plain_paths_verdicts() {
    // conv1d (2 → 3 channels) tanh, a conv1d reading its 3 channels (one changes per moved
    // entry of the first: updated by that channel), flatten, dense softmax.
    let c = graph_common::case(graph_common::conv1d(), 6, 3);
    let first = named(&c.graph, 0);
    both_ways("conv1d", &c, &first, "kernel-flipped");
    // A residual block: relu conv, conv "same" (updated by the changed channel), batch norm,
    // add, max-pool, dense.
    let c = graph_common::case(graph_common::residual(), 6, 5);
    let second = named(&c.graph, 1);
    both_ways("residual", &c, &second, "channels-swapped");
}

#[test]
fn the_demo_cnn_gives_the_plain_paths_verdicts() {
    both_ways(
        "pump-cnn",
        &graph_common::demo_cnn(),
        "conv2",
        "kernel-flipped",
    );
}

#[test]
fn a_directions_shared_change_of_z_is_a_pass_at_each_step() {
    // Linearity (z of a product plus a bias, or γ·x̂ + β, at a fixed input): for every layer
    // whose kind says so, z at θ + t·v from a whole forward pass equals the base's z plus t
    // times the pass with tensors v, up to a few roundings of the values summed.
    for (what, c) in [
        (
            "residual",
            graph_common::case(graph_common::residual(), 6, 5),
        ),
        ("pump-cnn", graph_common::demo_cnn()),
    ] {
        let g = &c.graph;
        let x = c.x.view();
        let base = g.forward(&c.params, x);
        let mut rng = Rng::new(7);
        let mut hinted = 0;
        for (j, node) in g.nodes().iter().enumerate() {
            let v: Vec<ArrayD<f64>> = c.params[node.tensors()]
                .iter()
                .map(|p| p.mapv(|_| 2.0 * rng.uniform() - 1.0))
                .collect();
            let Some(change) = g.along_change(x, &base, j, &v) else {
                continue;
            };
            hinted += 1;
            for t in [1e-6, -1e-6, 2e-6, 0.5] {
                let mut q = c.params.clone();
                for (p, w) in q[node.tensors()].iter_mut().zip(&v) {
                    p.zip_mut_with(w, |p, &w| *p += t * w);
                }
                let pass = g.forward(&q, x);
                let scale = 1.0 + base.steps[j].out.iter().fold(0.0f64, |m, z| m.max(z.abs()));
                for ((&z, &z0), &dz) in pass.steps[j]
                    .out
                    .iter()
                    .zip(&base.steps[j].out)
                    .zip(&change)
                {
                    let hint = z0 + t * dz;
                    assert!(
                        (z - hint).abs() <= 1e-13 * scale,
                        "{what}: layer {j}, step {t}: pass {z}, z + t·change {hint}"
                    );
                }
            }
        }
        assert!(hinted >= 3, "{what}: {hinted} layers give a change");
    }
}

#[test]
fn the_demo_cnns_directions_find_a_planted_mistake_as_the_plain_path_does() {
    // Eight directions over all tensors and per tensor, every one through the shared change of
    // its lowest layer (conv, batch norm or dense): the plain path's verdicts, all matches for
    // the engine's gradient, mismatches with a mistake planted in norm2's backward pass.
    let c = graph_common::demo_cnn();
    let (x, y) = (c.x.view(), c.y.view());
    let right = c.graph.gradient(&c.params, x, y, None).params;
    let r = agree_with("pump-cnn", &c, &right, 8);
    assert!(
        r.directions.iter().all(|d| d.status == Status::Match),
        "pump-cnn: {:?}",
        r.directions
    );
    let planted = c.graph.plant("norm2", "norm-scale-unnormalised").unwrap();
    let wrong = c.graph.gradient(&c.params, x, y, Some(&planted)).params;
    assert_ne!(wrong, right, "the planted mistake changes the gradient");
    let r = agree_with("pump-cnn, norm-scale-unnormalised", &c, &wrong, 8);
    assert!(
        r.directions.iter().any(|d| d.status == Status::Mismatch),
        "pump-cnn: a direction finds norm-scale-unnormalised: {:?}",
        r.directions
    );
}

#[test]
fn a_relu_dense_stack_gives_the_plain_paths_verdicts_on_any_thread_count() {
    use plumb_engine::{Activation, Loss};
    // The moved unit of a dense layer is given alone (its output is not built) and its kink
    // sides read there; the layer above updates by it (fan-in 16 and 12) or, at fan-in 6,
    // recomputes from the output built after all. Verdicts against whole passes, both ways.
    let relu = Activation::Relu;
    for (what, layers) in [
        ("10-16-12-3 relu", [(16, relu), (12, relu)]),
        ("10-6-16-3 relu", [(6, relu), (16, relu)]),
    ] {
        let layers = [layers[0], layers[1], (3, Activation::Softmax)];
        let g = graph_common::dense(10, &layers, Loss::CrossEntropy, 0.05);
        let mut c = graph_common::case(g, 7, 2);
        // Sample 0 of the first layer's unit 0 set 1e-9 above the kink: a step of any of the
        // unit's weights crosses it there (its retries, on both paths, are what is compared).
        let z = c.graph.forward(&c.params, c.x.view()).steps[0].out[[0, 0]];
        c.params[1].as_slice_mut().unwrap()[0] += 1e-9 - z;
        both_ways(what, &c, &named(&c.graph, 1), "bias-rows-shifted");
        // The workspaces a thread reuses carry nothing from one loss to the next.
        let right = c.gradient();
        let (one, three) = on_one_and_three_threads(what, &c, &right);
        assert_eq!(one.coords, three.coords, "{what}");
        let crossed = one.coords.iter().filter(|c| c.retried).count();
        assert!(crossed > 0, "{what}: a step crosses the kink");
        assert_eq!(one.directions, three.directions, "{what}");
    }
}

#[test]
fn a_dense_stack_through_the_response_gives_the_plain_paths_verdicts() {
    use plumb_engine::graph::{Moved, Response, Workspace};
    use plumb_engine::{Activation, Loss};
    // The first layer's entries go through the response of the two layers above it
    // (plumb_engine::graph::Response: L+1's activation in Taylor terms, used only within a
    // tenth of the loss's assumed round-off; a relu L+1 while no value changes side); the plain
    // path takes whole passes. Verdicts both ways (a mistake planted in the second layer's input
    // gradient: the first layer's gradient, where the response answers, is wrong), thread
    // counts.
    let (tanh, sigmoid) = (Activation::Tanh, Activation::Sigmoid);
    for (what, layers) in [
        ("10-16-12-3 tanh", [(16, tanh), (12, tanh)]),
        (
            "10-9-20-3 relu, sigmoid",
            [(9, Activation::Relu), (20, sigmoid)],
        ),
        (
            "10-12-8-3 sigmoid, identity",
            [(12, sigmoid), (8, Activation::Identity)],
        ),
        (
            "10-16-12-3 tanh, relu",
            [(16, tanh), (12, Activation::Relu)],
        ),
    ] {
        let layers = [layers[0], layers[1], (3, Activation::Softmax)];
        let kinked = layers[1].1 == Activation::Relu;
        let g = graph_common::dense(10, &layers, Loss::CrossEntropy, 0.05);
        let mut c = graph_common::case(g, 7, 4);
        if kinked {
            // Sample 0 of the second layer's unit 0 set 1e-9 above the kink: a step of many
            // first-layer entries crosses it there (the response declines; both paths retry).
            let z = c.graph.forward(&c.params, c.x.view()).steps[1].out[[0, 0]];
            c.params[3].as_slice_mut().unwrap()[0] += 1e-9 - z;
        }
        let c = c;
        let (x, y) = (c.x.view(), c.y.view());
        // The response answers at the check's default step, under the check's limit.
        let base = c.graph.forward(&c.params, x);
        let f0 = c.graph.loss_of(&c.params, &base, y);
        let gross = graph_loss_magnitude(&c.graph, &c.params, &base, &c.y);
        let limit = 0.1 * plumb_fd::loss_noise(f64::EPSILON, f0, gross);
        let r = Response::new(&c.graph, &base, y, 0, limit).expect("a response");
        let h = f64::EPSILON.cbrt() * c.params[0].as_slice().unwrap()[5].abs().max(1.0);
        let moved = Moved {
            tensor: 0,
            index: 5,
            delta: h,
        };
        let l2 = c.graph.l2_sum(&c.params);
        let ws = &mut Workspace::new();
        let answer = r.loss_in(ws, &c.graph, &c.params, x, &base, y, l2, &moved);
        assert!(answer.is_some(), "{what}: the default step responds");
        both_ways(what, &c, &named(&c.graph, 1), "bias-rows-shifted");
        let right = c.graph.gradient(&c.params, x, y, None).params;
        let (one, three) = on_one_and_three_threads(what, &c, &right);
        assert_eq!(one.coords, three.coords, "{what}");
        assert_eq!(one.directions, three.directions, "{what}");
        let crossed = one.coords.iter().filter(|c| c.retried).count();
        assert_eq!(crossed > 0, kinked, "{what}: {crossed} steps cross a kink");
        // The check took its first-layer losses through the response (the verdicts above are
        // the plain path's): at least the ±h pair of each first-layer entry, as many on any
        // thread count. Without the response every loss is a whole pass and the count is 0.
        let first: usize = c.graph.nodes()[0]
            .tensors()
            .map(|t| c.graph.tensors()[t].spec.shape.iter().product::<usize>())
            .sum();
        let responded = one.coverage.responded;
        assert!(
            responded >= 2 * first,
            "{what}: {responded} losses responded"
        );
        assert_eq!(responded, three.coverage.responded, "{what}");
    }
}

#[test]
fn a_network_without_a_response_counts_no_loss_through_one() {
    use plumb_engine::{Activation, Loss};
    // The response needs dense L, dense L+1 with a covered activation, and a dense softmax
    // output under cross-entropy (crates/engine/src/graph/response.rs). The same 10-16-12-3
    // tanh stack with a squared-error identity output, and a conv network, have none: every
    // loss is a whole pass and the count is 0; the cross-entropy twin counts some (both
    // directions of the count).
    let tanh = Activation::Tanh;
    let responded = |c: &Case| {
        let right = c.gradient();
        agree("count", c, &right).coverage.responded
    };
    let stack = |output: Activation, loss: Loss| {
        let layers = [(16, tanh), (12, tanh), (3, output)];
        graph_common::case(graph_common::dense(10, &layers, loss, 0.05), 7, 4)
    };
    let squared = responded(&stack(Activation::Identity, Loss::SquaredError));
    assert_eq!(squared, 0, "squared error");
    let twin = responded(&stack(Activation::Softmax, Loss::CrossEntropy));
    assert!(twin > 0, "the cross-entropy twin: {twin}");
    let conv = responded(&graph_common::case(graph_common::conv1d(), 6, 3));
    assert_eq!(conv, 0, "conv1d");
}

#[test]
fn a_directions_steps_share_their_change_of_z_in_f64_only() {
    // Where a direction's lowest moved layer is linear in its tensors (conv, dense, norms), its
    // steps start from z + t·z_v (Graph::forward_along), counted in `coverage.shared`; in f32
    // every step takes a pass (docs/engine.md, "A request of several steps"), and where the
    // lowest moved layer is recurrent no step can share. The f64 counts are at least the
    // ±h pair of each direction that settles on one step; the verdicts are the plain path's
    // (the tests above).
    let count = |c: &Case, precision: Precision| {
        let cfg = plumb_fd::CheckConfig {
            sample: Some(Sample::All),
            directions: Some(3),
            ..config(Method::Central, precision, 1)
        };
        let r = graph_common::run(c, &cfg);
        assert_eq!(
            graph_common::count(&r, Status::Mismatch),
            (0, 0),
            "{}",
            graph_common::worst(&r)
        );
        (r.coverage.shared, r.directions.len())
    };
    for (what, c) in [
        ("conv1d", graph_common::case(graph_common::conv1d(), 6, 3)),
        ("norms", graph_common::case(graph_common::norms(), 6, 3)),
    ] {
        let (shared, directions) = count(&c, Precision::F64);
        assert!(
            shared >= 2 * directions,
            "{what}: {shared} of {directions} directions' losses shared"
        );
        let (shared, _) = count(&c, Precision::F32);
        assert_eq!(shared, 0, "{what} in f32");
    }
    // A recurrent layer is not linear in its tensors: the directions over its tensors, and
    // over the whole network (whose lowest moved layer is the rnn), take a pass per step; only
    // those over the dense layer's tensors share, so fewer than three losses per direction.
    let rnn = graph_common::case(graph_common::rnn(), 6, 3);
    let (shared, directions) = count(&rnn, Precision::F64);
    assert!(
        shared > 0 && shared < 3 * directions,
        "rnn: {shared} of {directions} directions' losses shared"
    );
}
