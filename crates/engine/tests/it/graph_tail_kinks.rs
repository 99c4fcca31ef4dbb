//! The kink test of a moved entry's tail ([`Graph::tail_crossed`]) where the tail lists the
//! channels it recomputed (`Tail::changed`), on the layers the residual CNN of graph_tails.rs
//! does not have: layer and rms norms (they mix the channels at each position, so a change in
//! one channel reaches every channel of their output), a batch norm over a dense layer's
//! features and over a sequence's, an `add` whose tap lies below the moved layer and one whose
//! tap lies above it, a max-pool after a layer norm, and a ReLU after global average pooling and
//! after the dense layer above it. The reference is a whole forward pass at the moved parameters
//! and its branches ([`Graph::branches`]: every max-pool choice and ReLU side of every layer),
//! in f64 and f32; both verdicts occur on every network.
//!
//! And the conv hint's values at output rows of 16 and more, where a full pass sums two
//! out-channels at a time in blocks of 16: the channels the entry does not move equal a full
//! pass at the moved parameters bit for bit (the property the tail's "the others are the
//! base's" and its early stop rest on), the moved one within the update's stated rounding.

use crate::graph_common::{random_params, random_x, random_y};
use ndarray::ArrayD;
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, GlobalAvgPool, Graph, GraphBuilder, Kind, Layer,
    LayerNorm, LayerScalar, LossConfig, Moved, Padding, Pool, PoolKind, RmsNorm, Shape, Workspace,
};
use plumb_engine::{Activation, Rng};

fn same(channels: usize) -> ConvSettings {
    ConvSettings {
        padding: Padding::Same,
        ..ConvSettings::conv1d(channels, 3)
    }
}

/// conv, layer norm and max-pool; conv, batch norm and an add from the pool (below the conv);
/// rms norm, max-pool, global average pool with a ReLU, dense, batch norm over its features.
fn mixed_cnn() -> Graph {
    let relu = Activation::Relu;
    let input = Shape::Signal {
        channels: 2,
        length: 12,
    };
    let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
    b.push(Some("c1"), relu, |s| Conv::new(&same(3), s))
        .unwrap();
    b.push(Some("ln"), relu, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("p"), Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(Some("c2"), Activation::Identity, |s| Conv::new(&same(3), s))
        .unwrap();
    b.push(Some("bn"), relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("add"), relu, |s| Add::new("p", s)).unwrap();
    b.push(Some("rms"), relu, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(Some("p2"), Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(Some("gap"), relu, GlobalAvgPool::new).unwrap();
    b.push(Some("d1"), relu, |s| Dense::new(4, s)).unwrap();
    b.push(Some("bn2"), relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("out"), Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// Dense, layer norm; dense, batch norm per feature, an add from the layer norm; rms norm.
fn dense_norms() -> Graph {
    let relu = Activation::Relu;
    let mut b = GraphBuilder::new(Shape::Flat(5), LossConfig::squared_error());
    b.push(Some("d0"), relu, |s| Dense::new(6, s)).unwrap();
    b.push(Some("ln"), relu, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("d1"), Activation::Identity, |s| Dense::new(6, s))
        .unwrap();
    b.push(Some("bn"), relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("add"), relu, |s| Add::new("ln", s)).unwrap();
    b.push(Some("rms"), relu, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(Some("out"), Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// A dense layer on every step of a sequence, a batch norm per feature over samples and steps,
/// a layer norm per step.
fn sequence_norms() -> Graph {
    let relu = Activation::Relu;
    let input = Shape::Sequence { steps: 3, width: 4 };
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    b.push(Some("d0"), relu, |s| Dense::new(5, s)).unwrap();
    b.push(Some("bn"), relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("ln"), relu, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(Some("out"), Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// For every entry and steps from 1e-6 to 3: the kink test of the check's tail
/// (`moved_loss_in`, one workspace) and of `forward_moved` against a whole pass's branches.
/// Returns how many steps crossed and how many did not. graph_tails.rs runs it on its
/// residual CNN.
pub(crate) fn kink_tests_agree<S: LayerScalar>(g: &Graph, seed: u64, what: &str) -> (usize, usize) {
    let mut rng = Rng::new(seed);
    let params = random_params(g, &mut rng);
    let (x, y) = (random_x(g, 4, &mut rng), random_y(g, 4, &mut rng));
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let (x, y) = (x.mapv(S::from_f64), y.mapv(S::from_f64));
    let base = g.forward(&p, x.view());
    let before = g.branches(&base);
    let l2 = g.l2_sum(&p);
    let mut ws = Workspace::new();
    let (mut crossed, mut kept) = (0, 0);
    for (t, spec) in g.tensors().iter().enumerate() {
        for k in 0..p[t].len() {
            for d in [1e-6, -1e-3, 0.05, -0.4, 3.0] {
                let delta = S::from_f64(d);
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta,
                };
                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[k] += delta;
                let layers = before.changed(&g.branches(&g.forward(&q, x.view())));
                let whole = !layers.is_empty();
                let at = format!(
                    "{what}: {}[{k}] δ {d}, whole pass changed {layers:?}",
                    spec.name
                );
                g.moved_loss_in(&mut ws, &p, x.view(), &base, y.view(), l2, &moved);
                assert_eq!(g.tail_crossed(&base, ws.tail().unwrap()), whole, "{at}");
                let tail = g.forward_moved(&p, x.view(), &base, &moved);
                assert_eq!(g.tail_crossed(&base, &tail), whole, "{at}: forward_moved");
                if whole {
                    crossed += 1;
                } else {
                    kept += 1;
                }
            }
        }
    }
    (crossed, kept)
}

#[test]
fn the_kink_test_over_recomputed_channels_matches_a_whole_pass_through_norms_adds_and_pools() {
    for (what, g) in [
        ("mixed cnn", mixed_cnn()),
        ("dense norms", dense_norms()),
        ("sequence norms", sequence_norms()),
    ] {
        for seed in [3, 4] {
            let what = format!("{what}, seed {seed}");
            let (c, k) = kink_tests_agree::<f64>(&g, seed, &format!("{what} f64"));
            assert!(c > 20 && k > 20, "{what} f64: {c} crossed, {k} kept");
            let (c, k) = kink_tests_agree::<f32>(&g, seed, &format!("{what} f32"));
            assert!(c > 20 && k > 20, "{what} f32: {c} crossed, {k} kept");
        }
    }
}

/// Every entry of a single conv layer moved by 0.37: the hint's step against a full pass at the
/// moved parameters — the other channels bit for bit (the base's, which the full pass sums
/// again in the same order), the moved channel (the base's sum plus δ times the input under
/// the tap) within both sums' rounding and the update's: γ(n+1)·(S_base + S_moved) +
/// u·(|δ|·max|x| + |z|), S the sum of |w||x| and |b| (Higham, *Accuracy and Stability of
/// Numerical Algorithms*, 2nd ed., §3.1; γ(k) = k·u/(1 − k·u), u = ε/2) — and the moved
/// channel's values alone (`moved_values`) the hint's bit for bit.
fn wide_conv_moves_agree<S: LayerScalar>(settings: &ConvSettings, input: Shape, what: &str) {
    let conv = Conv::new(settings, &input).unwrap();
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    b.push(None, Activation::Identity, |s| Conv::new(settings, s))
        .unwrap();
    let g = b.finish().unwrap();
    let mut rng = Rng::new(5);
    let params = random_params(&g, &mut rng);
    let x = random_x(&g, 3, &mut rng).mapv(S::from_f64);
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let base = Layer::<S>::forward(&conv, &p, x.view(), None);
    let size = conv.output().size();
    let op = size / settings.channels;
    assert!(op >= 16 && conv.output().dims()[conv.output().dims().len() - 1] >= 16);
    let abs = |a: &ArrayD<S>| a.mapv(|v| S::from_f64(v.re().abs()));
    let x_abs = x.mapv(|v| S::from_f64(v.re().abs()));
    let x_most = x.iter().fold(0.0f64, |m, v| m.max(v.re().abs()));
    let sums = |q: &[ArrayD<S>]| {
        let q: Vec<ArrayD<S>> = q.iter().map(abs).collect();
        Layer::<S>::forward(&conv, &q, x_abs.view(), None).out
    };
    let s_base = sums(&p);
    let n = p[0].len() / settings.channels;
    let u = S::epsilon() / 2.0;
    let gamma = (n + 1) as f64 * u / (1.0 - (n + 1) as f64 * u);
    for t in 0..p.len() {
        for k in 0..p[t].len() {
            let delta = S::from_f64(0.37);
            let moved = Moved {
                tensor: t,
                index: k,
                delta,
            };
            let mut q = p.clone();
            q[t].as_slice_mut().unwrap()[k] += delta;
            let full = Layer::<S>::forward(&conv, &q, x.view(), None).out;
            let s_moved = sums(&q);
            let hint = Layer::<S>::forward_moved(&conv, &p, x.view(), &base, &moved).unwrap();
            let c = conv.moved_channel(t, k).unwrap();
            for (e, (a, b)) in hint.out.iter().zip(&full).enumerate() {
                if (e % size) / op != c {
                    assert!(
                        a.same_bits(*b),
                        "{what}: {t}[{k}], value {e}: {a:?} against {b:?}"
                    );
                    continue;
                }
                let (i, col) = (e / size, e % size);
                let bound = gamma * (s_base[[i, col]].re() + s_moved[[i, col]].re())
                    + u * (0.37 * x_most + b.re().abs());
                assert!(
                    (a.re() - b.re()).abs() <= bound,
                    "{what}: {t}[{k}], moved value {e}: {a:?} against {b:?}, bound {bound:e}"
                );
            }
            let mut values = Vec::new();
            assert!(Layer::<S>::moved_values(
                &conv,
                &p,
                x.view(),
                &base,
                &moved,
                &mut values
            ));
            let hinted = hint.out.as_slice().unwrap();
            let want = (0..x.nrows()).flat_map(|i| &hinted[i * size + c * op..][..op]);
            assert_eq!(values.len(), x.nrows() * op, "{what}: {t}[{k}]");
            for (e, (a, b)) in values.iter().zip(want).enumerate() {
                assert!(a.same_bits(*b), "{what}: {t}[{k}], moved value {e}");
            }
        }
    }
}

#[test]
fn a_moved_conv_entry_agrees_with_a_full_pass_at_rows_of_sixteen_and_more() {
    let signal = Shape::Signal {
        channels: 3,
        length: 41,
    };
    // Five out-channels: two pairs and one alone in the full pass.
    let padded = ConvSettings {
        padding: Padding::Explicit([0, 2]),
        ..ConvSettings::conv1d(5, 5)
    };
    let unpadded = ConvSettings::conv1d(4, 3);
    let image = Shape::Image {
        channels: 2,
        height: 4,
        width: 37,
    };
    let dilated = ConvSettings {
        padding: Padding::Same,
        dilation: [1, 2],
        ..ConvSettings::conv2d(3, [2, 3])
    };
    for (what, s, input) in [
        ("padded conv1d", &padded, signal),
        ("unpadded conv1d", &unpadded, signal),
        ("dilated conv2d, same", &dilated, image),
    ] {
        wide_conv_moves_agree::<f64>(s, input, &format!("{what} f64"));
        wide_conv_moves_agree::<f32>(s, input, &format!("{what} f32"));
    }
}
