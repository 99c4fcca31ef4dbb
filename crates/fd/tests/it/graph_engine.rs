//! What the graph check rests on: the incremental evaluation (from the moved layer up, and through
//! the kinds' hints for one entry) gives the whole forward pass's loss,
//! the result does not depend on the number of threads, shards cover the check exactly, and f32
//! says `inconclusive` where its round-off hides the gradient while f64 settles it.

use crate::graph_common;

use graph_common::*;
use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::Activation;
use plumb_engine::graph::{Dense, GraphBuilder, LossConfig, Reduction, Shape};
use plumb_fd::{Method, Precision, Sample, Settlement, Status, check_graph};

/// Recomputing from layer L over the base pass gives the same loss, to the bit, as a whole forward
/// pass of the moved parameters, for every layer of every kind (taps below L included).
#[test]
fn forward_from_equals_the_whole_forward_pass() {
    let mut kinds = kinds();
    kinds.push(("pools1d", pools1d));
    for (name, build) in kinds {
        let c = case(build(), 4, 21);
        let g = &c.graph;
        let base = g.forward(&c.params, c.x.view());
        for t in 0..c.params.len() {
            let mut moved = c.params.clone();
            let n = moved[t].len();
            moved[t].as_slice_mut().unwrap()[n / 2] += 0.01;
            let from = g.tensors()[t].layer;
            let tail = g.forward_from(&moved, c.x.view(), &base, from);
            let fast = g.loss_from(&moved, &tail, c.y.view());
            let full = g.loss(&moved, c.x.view(), c.y.view());
            assert_eq!(fast.to_bits(), full.to_bits(), "{name}, tensor {t}");
            let whole = g.branches(&g.forward(&moved, c.x.view()));
            assert_eq!(g.branches_from(&tail).layers[..], whole.layers[from..]);
        }
    }
}

/// One entry moved through the kinds' hints (what the check does for a coordinate) gives the
/// whole forward pass's loss within the tolerance stated at `Graph::forward_moved`'s test in
/// crates/engine/tests/graph_dual.rs (64 · (n + 1) · ε · max(|J|, 1), n the largest fan-in),
/// and the same branches, for every kind, every tensor, at its first, middle and last entry.
#[test]
fn forward_moved_equals_the_whole_forward_pass() {
    use plumb_engine::graph::Moved;
    let mut kinds = kinds();
    kinds.push(("pools1d", pools1d));
    for (name, build) in kinds {
        let c = case(build(), 4, 22);
        let g = &c.graph;
        let base = g.forward(&c.params, c.x.view());
        let l2 = g.l2_sum(&c.params);
        let n_max = g.tensors().iter().map(|t| t.spec.fan_in).max().unwrap() as f64;
        for t in 0..c.params.len() {
            let n = c.params[t].len();
            for k in [0, n / 2, n - 1] {
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta: 0.01,
                };
                let mut q = c.params.clone();
                q[t].as_slice_mut().unwrap()[k] += 0.01;
                let tail = g.forward_moved(&c.params, c.x.view(), &base, &moved);
                let fast = g.loss_moved(&c.params, &tail, c.y.view(), l2, &moved);
                let full = g.loss(&q, c.x.view(), c.y.view());
                let tol = 64.0 * (n_max + 1.0) * f64::EPSILON * full.abs().max(1.0);
                assert!(
                    (fast - full).abs() <= tol,
                    "{name}, tensor {t}[{k}]: {fast} vs {full}"
                );
                let whole = g.branches(&g.forward(&q, c.x.view()));
                let recomputed = g.branches_from(&tail).layers;
                let end = tail.from + recomputed.len();
                assert_eq!(recomputed[..], whole.layers[tail.from..end]);
                if tail.settled.is_some() {
                    // Stopped where the change died out: the layers above branch as the base.
                    assert_eq!(g.branches(&base).layers[end..], whole.layers[end..]);
                } else {
                    assert_eq!(end, g.nodes().len());
                }
            }
        }
    }
}

#[test]
fn the_thread_count_does_not_change_the_result() {
    for (name, build) in [kinds()[2], kinds()[5], kinds()[8]] {
        let c = case(build(), 5, 4);
        for method in [Method::Central, Method::ComplexStep] {
            let cfg = config(method, Precision::F32, 9);
            let on = |threads: usize| {
                rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap()
                    .install(|| run(&c, &cfg))
            };
            let (one, three) = (on(1), on(3));
            assert_eq!(one.coords, three.coords, "{name} {method}");
            assert_eq!(one.directions, three.directions, "{name} {method}");
        }
    }
}

#[test]
fn shards_cover_the_check_exactly() {
    let c = case(residual(), 5, 6);
    let cfg = config(Method::Central, Precision::F64, 3);
    let whole = run(&c, &cfg);
    let mut coords = Vec::new();
    let mut directions = 0;
    for k in 1..=3 {
        let mut part = cfg.clone();
        part.shard = Some((k, 3));
        let r = run(&c, &part);
        coords.extend(r.coords);
        directions += r.directions.len();
    }
    coords.sort_by_key(|c| (c.coord.tensor, c.coord.index));
    assert_eq!(coords, whole.coords);
    assert_eq!(directions, whole.directions.len());
}

/// A saturated sigmoid output (bias 12: σ′ ≈ 6e-6) under squared error against targets of 0: the
/// loss is ≈ 0.5 per output but the gradient ≈ 6e-6 of it. f32's round-off in J (≈ 1e-7 · 0.5)
/// over its step (≈ 5e-3) is then larger than a tenth of the gradient, so most coordinates
/// cannot be settled: the check is inconclusive, not a pass and not a fail. f64 settles all.
#[test]
fn f32_is_inconclusive_where_its_round_off_hides_the_gradient() {
    let mut b = GraphBuilder::new(
        Shape::Flat(3),
        LossConfig {
            reduction: Reduction::Sum,
            ..LossConfig::squared_error()
        },
    );
    b.push(None, Activation::Sigmoid, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let params = vec![
        ArrayD::from_shape_fn(IxDyn(&[2, 3]), |i| 0.1 * (i[0] as f64 - i[1] as f64)),
        ArrayD::from_elem(IxDyn(&[2]), 12.0),
    ];
    let x = Array2::from_shape_fn((8, 3), |(i, j)| ((i * 3 + j) as f64 * 0.7).sin());
    let y = Array2::zeros((8, 2));
    let settled = |precision: Precision| {
        let cfg = plumb_fd::CheckConfig {
            sample: Some(Sample::All),
            ..plumb_fd::CheckConfig::new(Method::Central, precision)
        };
        let r = check_graph(&g, &params, x.view(), y.view(), &cfg, &|_, _| {}).unwrap();
        assert_eq!(count(&r, Status::Mismatch), (0, 0), "{}", precision.name());
        Settlement::of(r.coords.iter().map(|c| c.status))
    };
    let f64s = settled(Precision::F64);
    assert_eq!(f64s.unsettled, 0);
    let f32s = settled(Precision::F32);
    assert!(!f32s.conclusive(), "f32: {f32s:?}");
}
