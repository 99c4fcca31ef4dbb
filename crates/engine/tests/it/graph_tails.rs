//! The layers above a moved parameter ([`Graph::forward_moved`]): channel-wise layers (batch
//! norm, `add`, pools, global average pool and their activations) recompute only the channels
//! that changed, and must give exactly what recomputing the whole layer gives. The reference:
//! each layer of the tail recomputed whole on the tail's own input — bit for bit, in f64 and
//! f32 — except a conv or dense layer whose input changed in few channels, which updates its
//! base output by their change (`Layer::forward_units`): equal up to the rounding of its sums.

use crate::graph_common::{random_params, random_x};
use crate::graph_tail_kinks::kink_tests_agree;
use ndarray::ArrayD;
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, GlobalAvgPool, Graph, GraphBuilder, LayerNorm,
    LayerScalar, LossConfig, Moved, Padding, Pool, PoolKind, RmsNorm, Shape,
};
use plumb_engine::{Activation, Rng};

fn tails_agree<S: LayerScalar>(g: &Graph, seed: u64, what: &str) {
    let mut rng = Rng::new(seed);
    let params = random_params(g, &mut rng);
    let x = random_x(g, 3, &mut rng);
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let x = x.mapv(S::from_f64);
    let base = g.forward(&p, x.view());
    for (t, spec) in g.tensors().iter().enumerate() {
        let j = spec.layer;
        for k in 0..p[t].len() {
            for d in [0.37, -1e-3] {
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta: S::from_f64(d),
                };
                let tail = g.forward_moved(&p, x.view(), &base, &moved);
                let activation = g.nodes()[j].activation;
                if activation != Activation::Softmax {
                    let a = activation.apply(tail.steps[0].out.view());
                    let same = a.iter().zip(&tail.outputs[0]);
                    for (e, (u, v)) in same.enumerate() {
                        assert_eq!(
                            u.re().to_bits(),
                            v.re().to_bits(),
                            "{what}: {}[{k}] δ {d}: the moved layer's activation, entry {e}",
                            spec.name
                        );
                    }
                }
                // Each layer above against a whole pass of that layer on the tail's own input
                // and tap: bit for bit, but for a conv or dense layer whose input changed in
                // few channels, which adds their change alone (`Layer::forward_units`): within
                // the rounding of its sums (graph_units.rs holds the tight bound).
                let out_of = |i: usize| {
                    if i < j {
                        &base.outputs[i]
                    } else {
                        &tail.outputs[i - j]
                    }
                };
                for (i, step) in tail.steps.iter().enumerate().skip(1) {
                    let layer = j + i;
                    let node = &g.nodes()[layer];
                    let kind = node.layer.kind();
                    let skip = node.layer.tap().map(|n| out_of(g.layer(n).unwrap()).view());
                    let own = &p[node.tensors()];
                    let pass = S::layer(node.layer.as_ref());
                    let full = pass.forward(own, out_of(layer - 1).view(), skip).out;
                    let updates = matches!(kind, "conv1d" | "conv2d" | "dense");
                    let bound = if updates {
                        let abs: Vec<ArrayD<S>> = own
                            .iter()
                            .map(|t| t.mapv(|v| S::from_f64(v.re().abs())))
                            .collect();
                        let input = out_of(layer - 1).mapv(|v| S::from_f64(v.re().abs()));
                        let before = base.outputs[layer - 1].mapv(|v| S::from_f64(v.re().abs()));
                        let n = node.layer.params()[0].fan_in as f64 + 2.0;
                        let eps = S::epsilon();
                        let s = |x: &ndarray::Array2<S>| pass.forward(&abs, x.view(), None).out;
                        Some((s(&input), s(&before), 2.0 * n * eps))
                    } else {
                        None
                    };
                    for (e, (u, v)) in step.out.iter().zip(&full).enumerate() {
                        let at = || {
                            format!(
                                "{what}: {}[{k}] δ {d}: layer {layer} ({kind}), entry {e}",
                                spec.name
                            )
                        };
                        match &bound {
                            None => assert_eq!(u.re().to_bits(), v.re().to_bits(), "{}", at()),
                            Some((now, before, g)) => {
                                let b = g
                                    * (now.as_slice().unwrap()[e].re()
                                        + before.as_slice().unwrap()[e].re());
                                let off = (u.re() - v.re()).abs();
                                assert!(off <= b, "{}: {off:e} > {b:e}", at());
                            }
                        }
                    }
                    if node.activation != Activation::Softmax {
                        let a = node.activation.apply(step.out.view());
                        for (e, (u, v)) in a.iter().zip(&tail.outputs[i]).enumerate() {
                            assert_eq!(
                                u.re().to_bits(),
                                v.re().to_bits(),
                                "{what}: {}[{k}] δ {d}: layer {layer}'s activation, entry {e}",
                                spec.name
                            );
                        }
                    }
                }
            }
        }
    }
}

fn both(g: &Graph, seed: u64, what: &str) {
    tails_agree::<f64>(g, seed, &format!("{what} f64"));
    tails_agree::<f32>(g, seed, &format!("{what} f32"));
}

fn conv1d(channels: usize, kernel: usize, padding: Padding, bias: bool) -> ConvSettings {
    ConvSettings {
        padding,
        bias,
        ..ConvSettings::conv1d(channels, kernel)
    }
}

/// The demo's residual CNN (examples/pump-cnn.toml, smaller): conv, max-pool, a residual block
/// of two convolutions and two batch norms added back to the pool's output, a global average
/// pool and a softmax layer.
#[test]
fn channel_wise_layers_above_a_moved_entry_match_a_full_pass_in_a_residual_cnn() {
    both(&residual_cnn(), 7, "residual cnn");
}

fn residual_cnn() -> Graph {
    let input = Shape::Signal {
        channels: 1,
        length: 12,
    };
    let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
    let conv = conv1d(3, 3, Padding::Explicit([0, 1]), true);
    b.push(Some("conv1"), Activation::Tanh, |s| Conv::new(&conv, s))
        .unwrap();
    b.push(Some("pool1"), Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    let same = conv1d(3, 3, Padding::Same, false);
    b.push(None, Activation::Identity, |s| Conv::new(&same, s))
        .unwrap();
    b.push(None, Activation::Relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Conv::new(&same, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Relu, |s| Add::new("pool1", s))
        .unwrap();
    b.push(None, Activation::Identity, GlobalAvgPool::new)
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// The kink test over the channels a tail recomputed ([`Graph::tail_crossed`], which compares
/// a max-pool's choices and a ReLU's sides in the changed channels alone) against the
/// branches of a whole forward pass at the moved parameters ([`Graph::branches`], every value
/// of every layer): the same verdict for every entry of the residual CNN, at steps from 1e-6
/// to 3, through the check's path (`moved_loss_in`, one workspace) and `forward_moved`. Both
/// verdicts occur, so a test that missed crossings, or saw crossings that are not there, fails.
#[test]
fn the_kink_test_over_recomputed_channels_matches_a_whole_pass() {
    let (crossed, kept) = kink_tests_agree::<f64>(&residual_cnn(), 11, "residual cnn");
    assert!(crossed > 20 && kept > 20, "{crossed} crossed, {kept} kept");
}

/// Channel-wise and channel-mixing layers in other orders: a batch norm straight after the
/// input's dense layer (per feature), an `add` whose tap lies above the moved layer too, layer
/// and rms norms (they mix channels: recomputed whole), a conv2d feeding a batch norm with an
/// elu, and a tanh after a global average pool.
#[test]
fn channel_wise_layers_match_a_full_pass_in_other_orders() {
    let mut b = GraphBuilder::new(Shape::Flat(4), LossConfig::squared_error());
    b.push(Some("first"), Activation::Identity, |s| Dense::new(5, s))
        .unwrap();
    b.push(Some("bn"), Activation::Sigmoid, |s| BatchNorm::new(1e-3, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Add::new("first", s))
        .unwrap();
    b.push(None, Activation::Tanh, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    both(&b.finish().unwrap(), 11, "dense, batch norm, add over both");

    let image = Shape::Image {
        channels: 2,
        height: 5,
        width: 4,
    };
    let mut b = GraphBuilder::new(image, LossConfig::cross_entropy());
    let conv = ConvSettings {
        padding: Padding::Same,
        ..ConvSettings::conv2d(3, [2, 3])
    };
    b.push(Some("c1"), Activation::Identity, |s| Conv::new(&conv, s))
        .unwrap();
    b.push(None, Activation::Elu { alpha: 1.0 }, |s| {
        BatchNorm::new(1e-5, s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(None, Activation::Relu, |s| Add::new("c1", s))
        .unwrap();
    b.push(None, Activation::Tanh, GlobalAvgPool::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    both(
        &b.finish().unwrap(),
        13,
        "conv2d, batch norm, rms norm, add",
    );
}

/// A moved conv entry through the whole graph. The conv's hint adds δ times the input under the
/// moved tap to the base's channel (within rounding of a full pass: graph_dual/hints.rs); the
/// layers above (pools 1-D and 2-D, max and average, among them) recompute the changed channels
/// and must give what whole layers give over that same moved layer: the reference is
/// [`Graph::forward_along`] from the conv, its z the base's plus δ times the conv's pass with
/// the entry's unit tensor (that pass is the input under the tap, exactly: every other product
/// is ±0), every layer above a whole pass — bit for bit, in f64 and f32, up to a conv or dense
/// layer that updates by the changed channels (`Layer::forward_units`). The loss (no L2 term
/// here) is the reference's bit for bit where no layer updated, and within
/// 64·(n + 1)·ε·max(|J|, 1) of a full pass at the moved parameters ([`Graph::forward`]) always.
/// Returns how many tails updated.
fn whole_tails_agree<S: LayerScalar>(g: &Graph, seed: u64, what: &str) -> usize {
    let mut updated = 0;
    let mut rng = Rng::new(seed);
    let params = random_params(g, &mut rng);
    let x = random_x(g, 3, &mut rng);
    let y = crate::graph_common::random_y(g, 3, &mut rng);
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let (x, y) = (x.mapv(S::from_f64), y.mapv(S::from_f64));
    assert_eq!(
        g.loss_config().l2,
        0.0,
        "{what}: the loss compared bit for bit"
    );
    let base = g.forward(&p, x.view());
    let l2 = g.l2_sum(&p);
    let n = g.tensors().iter().map(|t| t.spec.fan_in).max().unwrap();
    for (t, spec) in g.tensors().iter().enumerate() {
        let j = spec.layer;
        if !g.nodes()[j].layer.kind().starts_with("conv") {
            continue;
        }
        for k in 0..p[t].len() {
            for d in [0.37, -1e-3] {
                let delta = S::from_f64(d);
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta,
                };
                let tail = g.forward_moved(&p, x.view(), &base, &moved);
                let mut unit: Vec<ArrayD<S>> = p[g.nodes()[j].tensors()]
                    .iter()
                    .map(|a| a.mapv(|_| S::zero()))
                    .collect();
                unit[t - g.nodes()[j].tensors().start]
                    .as_slice_mut()
                    .unwrap()[k] = S::one();
                let change = g.along_change(x.view(), &base, j, &unit).unwrap();
                let along =
                    g.forward_along(&p, x.view(), &base, j, &change, delta, &mut |_, _| None);
                // Bit for bit up to the first layer that updates by moved channels; from there
                // on the loss up to rounding (graph_units.rs).
                let mut departed = None;
                for (i, (got, want)) in tail.outputs.iter().zip(&along.outputs).enumerate() {
                    let layer = j + i;
                    let kind = g.nodes()[layer].layer.kind();
                    let (a, b) = (&tail.steps[i], &along.steps[i]);
                    // The reference keeps no z below the output where the output is z.
                    let z_kept = b.out.ncols() > 0;
                    let same = if z_kept {
                        a.out.iter().zip(&b.out).all(|(u, v)| u.same_bits(*v))
                    } else {
                        got.iter().zip(want).all(|(u, v)| u.same_bits(*v))
                    };
                    if !same && i > 0 && matches!(kind, "conv1d" | "conv2d" | "dense") {
                        departed = Some(layer);
                        break;
                    }
                    if z_kept {
                        for (e, (u, v)) in a.out.iter().zip(&b.out).enumerate() {
                            assert_eq!(
                                u.re().to_bits(),
                                v.re().to_bits(),
                                "{what}: {}[{k}] δ {d}: layer {layer} ({kind}) z, entry {e}",
                                spec.name
                            );
                        }
                    }
                    for (e, (u, v)) in got.iter().zip(want).enumerate() {
                        assert_eq!(
                            u.re().to_bits(),
                            v.re().to_bits(),
                            "{what}: {}[{k}] δ {d}: layer {layer} ({kind}), entry {e}",
                            spec.name
                        );
                    }
                    assert_eq!(a.branches, b.branches, "{what}: layer {layer} branches");
                    assert_eq!(a.ties, b.ties, "{what}: layer {layer} ties");
                }
                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[k] += delta;
                let li = g.loss_moved(&p, &tail, y.view(), l2, &moved).re();
                let la = g.loss_from(&q, &along, y.view()).re();
                let lf = g.loss(&q, x.view(), y.view()).re();
                let at = format!("{what}: loss, {}[{k}] δ {d}", spec.name);
                let tol = 64.0 * (n + 1) as f64 * S::epsilon() * lf.abs().max(1.0);
                assert!((li - lf).abs() <= tol, "{at}: {li} vs {lf} (a full pass)");
                match departed {
                    None => assert_eq!(li.to_bits(), la.to_bits(), "{at}"),
                    Some(_) => updated += 1,
                }
            }
        }
    }
    updated
}

/// Strides, dilations, explicit and "same" padding, with and without bias, under max and
/// average pools of both dimensionalities (overlapping windows and a ragged tail among them).
#[test]
fn a_moved_conv_entry_gives_whole_layers_bit_for_bit_through_pools() {
    // The second conv reads the first's three channels through a pool: a first-conv entry
    // changes one, and the second updates by it.
    let mut updated = 0;
    let signal = Shape::Signal {
        channels: 2,
        length: 17,
    };
    for (n, op) in [PoolKind::Max, PoolKind::Avg].into_iter().enumerate() {
        let mut b = GraphBuilder::new(signal, LossConfig::cross_entropy());
        let strided = ConvSettings {
            stride: [1, 2],
            dilation: [1, 2],
            padding: Padding::Explicit([0, 3]),
            ..ConvSettings::conv1d(3, 3)
        };
        b.push(Some("c1"), Activation::Relu, |s| Conv::new(&strided, s))
            .unwrap();
        b.push(None, Activation::Identity, |s| {
            Pool::new(op, 1, [1, 3], [1, 2], s)
        })
        .unwrap();
        let same = conv1d(2, 4, Padding::Same, false);
        b.push(None, Activation::Tanh, |s| Conv::new(&same, s))
            .unwrap();
        b.push(None, Activation::Identity, |s| {
            Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
        })
        .unwrap();
        b.push(None, Activation::Identity, GlobalAvgPool::new)
            .unwrap();
        b.push(None, Activation::Softmax, |s| Dense::new(3, s))
            .unwrap();
        let g = b.finish().unwrap();
        updated += whole_tails_agree::<f64>(&g, 21 + n as u64, &format!("conv1d {op:?} f64"));
        updated += whole_tails_agree::<f32>(&g, 21 + n as u64, &format!("conv1d {op:?} f32"));
    }
    let image = Shape::Image {
        channels: 2,
        height: 9,
        width: 8,
    };
    for (n, op) in [PoolKind::Max, PoolKind::Avg].into_iter().enumerate() {
        let mut b = GraphBuilder::new(image, LossConfig::squared_error());
        let strided = ConvSettings {
            stride: [2, 1],
            dilation: [1, 2],
            padding: Padding::Explicit([1, 2]),
            ..ConvSettings::conv2d(3, [3, 2])
        };
        b.push(Some("c1"), Activation::Identity, |s| Conv::new(&strided, s))
            .unwrap();
        b.push(None, Activation::Sigmoid, |s| {
            Pool::new(op, 2, [2, 2], [1, 2], s)
        })
        .unwrap();
        let same = ConvSettings {
            padding: Padding::Same,
            bias: false,
            ..ConvSettings::conv2d(2, [2, 3])
        };
        b.push(None, Activation::Identity, |s| Conv::new(&same, s))
            .unwrap();
        b.push(None, Activation::Relu, |s| {
            Pool::new(PoolKind::Avg, 2, [2, 3], [2, 2], s)
        })
        .unwrap();
        b.push(None, Activation::Identity, |s| {
            plumb_engine::graph::Flatten::new(s)
        })
        .unwrap();
        b.push(None, Activation::Identity, |s| Dense::new(2, s))
            .unwrap();
        let g = b.finish().unwrap();
        updated += whole_tails_agree::<f64>(&g, 31 + n as u64, &format!("conv2d {op:?} f64"));
        updated += whole_tails_agree::<f32>(&g, 31 + n as u64, &format!("conv2d {op:?} f32"));
    }
    assert!(updated > 0, "the update by moved channels taken");
}

/// Max-pool's channel-wise update where ties come and go: the input has tied windows in both
/// channels; changing channel 1 so that one of its ties breaks and another appears must give the
/// full pass's outputs, branches (first maximum in row-major order) and tie count, and keep
/// channel 0's.
#[test]
fn max_pool_updates_a_channel_with_its_ties_as_a_full_pass_does() {
    use plumb_engine::graph::Layer;
    let input = Shape::Image {
        channels: 2,
        height: 2,
        width: 4,
    };
    for dims in [1, 2] {
        let (pool, x) = if dims == 2 {
            let pool = Pool::new(PoolKind::Max, 2, [2, 2], [1, 2], &input).unwrap();
            // Channel 0: window (0, 0) tied (3 and 3); channel 1: window (0, 1) tied (5, 5).
            let x = ndarray::arr2(&[[
                3., 1., 0., 2., 3., 0., 1., 1., 0., 1., 5., 5., 2., 0., 4., 1.,
            ]]);
            (pool, x)
        } else {
            let signal = Shape::Signal {
                channels: 2,
                length: 8,
            };
            let pool = Pool::new(PoolKind::Max, 1, [1, 3], [1, 2], &signal).unwrap();
            let x = ndarray::arr2(&[[
                3., 3., 0., 2., 1., 0., 1., 1., 0., 1., 5., 5., 2., 0., 4., 1.,
            ]]);
            (pool, x)
        };
        let base = Layer::<f64>::forward(&pool, &[], x.view(), None);
        assert!(
            base.ties >= 2,
            "dims {dims}: the base has a tie in each channel"
        );
        // Channel 1 moves: its tie at 5, 5 breaks (4.5 against 5), and a new one appears (4
        // meets 4).
        let mut x2 = x.clone();
        x2[[0, 10]] = 4.5;
        x2[[0, 12]] = 4.0;
        x2[[0, 9]] = 4.0;
        let full = Layer::<f64>::forward(&pool, &[], x2.view(), None);
        let update = Layer::<f64>::forward_channels(&pool, &[], x2.view(), None, &base, &[1])
            .expect("max-pool is channel-wise");
        assert_eq!(update.out, full.out, "dims {dims}: outputs");
        assert_eq!(update.branches, full.branches, "dims {dims}: branches");
        assert_eq!(update.ties, full.ties, "dims {dims}: ties");
        assert_ne!(
            full.branches, base.branches,
            "dims {dims}: the argmax moved"
        );
        // A second change on top of the first, one more tie (4.5 meets 4.5): the count is
        // carried per channel.
        let mut x3 = x2.clone();
        x3[[0, 11]] = 4.5;
        let full3 = Layer::<f64>::forward(&pool, &[], x3.view(), None);
        let update3 = Layer::<f64>::forward_channels(&pool, &[], x3.view(), None, &update, &[1])
            .expect("max-pool is channel-wise");
        assert_eq!(
            update3.out, full3.out,
            "dims {dims}: outputs after two changes"
        );
        assert_eq!(update3.branches, full3.branches, "dims {dims}: branches");
        assert_eq!(
            update3.ties, full3.ties,
            "dims {dims}: ties after two changes"
        );
        assert_eq!(
            update3.ties,
            update.ties + 1,
            "dims {dims}: the new tie counted"
        );
    }
}

/// The cross-correlation's definition, written out here apart from the engine's loops: output
/// position (oy, ox) of out-channel o reads input (i, oy·sy + ky·dy − by, ox·sx + kx·dx − bx)
/// under tap (ky, kx), zero where that lies in the padding; "same" padding puts d(k − 1)/2
/// (rounded down) before and the rest after. Returns the value under the tap, `None` in the
/// padding, for sample input `xn` laid out channels × height × width.
#[allow(clippy::too_many_arguments)]
fn under_tap(
    xn: &[f64],
    [h, w]: [usize; 2],
    [i, ky, kx]: [usize; 3],
    [oy, ox]: [usize; 2],
    s: &ConvSettings,
    before: [usize; 2],
) -> Option<f64> {
    let iy = (oy * s.stride[0] + ky * s.dilation[0]).checked_sub(before[0])?;
    let ix = (ox * s.stride[1] + kx * s.dilation[1]).checked_sub(before[1])?;
    (iy < h && ix < w).then(|| xn[(i * h + iy) * w + ix])
}

/// A moved conv entry's out-channel (`forward_moved`, `moved_values`) is the base's z plus δ
/// times the input under the entry's tap, rounded once each (z + δ·x, IEEE 754), at every
/// position — the base's z itself where the tap falls in the padding — and the other channels
/// are the base's bit for bit; over conv1d and conv2d, strides 1–3, dilations 1–3, explicit
/// padding up to 4 (past the kernel, where the loops read the unpadded input tap by tap) and
/// "same" padding with even and odd kernels, f64 and f32. The reference is the definition
/// above, held to the engine's full pass first (within the rounding of its sums, Higham
/// §3.1), so that its reading of the layout and of the padding is the engine's.
#[test]
fn a_moved_conv_entry_adds_delta_times_the_input_under_its_tap() {
    fn run<S: LayerScalar>(seed: u64) -> usize {
        use plumb_engine::graph::{Kind, Layer};
        let mut rng = Rng::new(seed);
        let mut tried = 0;
        for _ in 0..150 {
            let dims = 1 + rng.below(2);
            let (h, w) = if dims == 1 {
                (1, 1 + rng.below(9))
            } else {
                (1 + rng.below(6), 1 + rng.below(7))
            };
            let c = 1 + rng.below(3);
            let k = [1 + rng.below(4), 1 + rng.below(4)];
            let mut s = if dims == 1 {
                ConvSettings::conv1d(1 + rng.below(3), k[1])
            } else {
                ConvSettings::conv2d(1 + rng.below(3), k)
            };
            s.stride = [1 + rng.below(3), 1 + rng.below(3)];
            s.dilation = [1 + rng.below(3), 1 + rng.below(3)];
            s.padding = if rng.below(3) == 0 {
                s.stride = [1, 1];
                Padding::Same
            } else {
                Padding::Explicit([rng.below(5), rng.below(5)])
            };
            s.bias = rng.below(3) != 0;
            if dims == 1 {
                s.kernel[0] = 1;
                s.stride[0] = 1;
                s.dilation[0] = 1;
                if let Padding::Explicit(p) = &mut s.padding {
                    p[0] = 0;
                }
            }
            let shape = if dims == 1 {
                Shape::Signal {
                    channels: c,
                    length: w,
                }
            } else {
                Shape::Image {
                    channels: c,
                    height: h,
                    width: w,
                }
            };
            let Ok(conv) = Conv::new(&s, &shape) else {
                continue; // no output position fits
            };
            tried += 1;
            let before = match s.padding {
                Padding::Explicit(p) => p,
                Padding::Same => [0, 1].map(|a| s.dilation[a] * (s.kernel[a] - 1) / 2),
            };
            let params: Vec<ArrayD<f64>> = Kind::params(&conv)
                .iter()
                .map(|p| ArrayD::from_shape_fn(p.shape.as_slice(), |_| rng.normal()))
                .collect();
            let m = 2;
            let x = ndarray::Array2::from_shape_fn((m, c * h * w), |_| rng.normal());
            // Exactly representable in f32, so both precisions read the same values.
            let params: Vec<ArrayD<f64>> = params
                .iter()
                .map(|t| t.mapv(|v| f64::from(v as f32)))
                .collect();
            let x = x.mapv(|v| f64::from(v as f32));
            let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
            let xs = x.mapv(S::from_f64);
            let base = Layer::<S>::forward(&conv, &p, xs.view(), None);
            let (o_count, taps) = (s.channels, s.kernel[0] * s.kernel[1]);
            let op = base.out.ncols() / o_count;
            // The output size from the definition: ⌊(n + pads − d(k − 1) − 1)/s⌋ + 1.
            let out_size = |a: usize, n: usize| {
                let pads = match s.padding {
                    Padding::Explicit(p) => 2 * p[a],
                    Padding::Same => s.dilation[a] * (s.kernel[a] - 1),
                };
                (n + pads - s.dilation[a] * (s.kernel[a] - 1) - 1) / s.stride[a] + 1
            };
            let (oh, ow) = (out_size(0, h), out_size(1, w));
            assert_eq!(op, oh * ow, "{s:?} on {shape:?}: output positions");
            // The definition against the engine's full pass.
            let wt = params[0].as_slice().unwrap();
            for n in 0..m {
                let xn = x.row(n).to_vec();
                for o in 0..o_count {
                    for (pos, (oy, ox)) in (0..oh)
                        .flat_map(|y| (0..ow).map(move |x| (y, x)))
                        .enumerate()
                    {
                        let (mut sum, mut size) = (0.0, 0.0);
                        for i in 0..c {
                            for ky in 0..s.kernel[0] {
                                for kx in 0..s.kernel[1] {
                                    let wv = wt[(o * c + i) * taps + ky * s.kernel[1] + kx];
                                    let a =
                                        under_tap(&xn, [h, w], [i, ky, kx], [oy, ox], &s, before)
                                            .unwrap_or(0.0);
                                    sum += wv * a;
                                    size += (wv * a).abs();
                                }
                            }
                        }
                        if s.bias {
                            sum += params[1][o];
                            size += params[1][o].abs();
                        }
                        let got = base.out[(n, o * op + pos)].re();
                        let tol = 2.0 * (c * taps + 2) as f64 * S::epsilon() * size;
                        assert!(
                            (got - sum).abs() <= tol,
                            "{s:?} on {shape:?}: full pass z[{n}, {o}, {pos}] {got} vs {sum}"
                        );
                    }
                }
            }
            // Every entry of every tensor, moved.
            for (t, tensor) in params.iter().enumerate() {
                for e in 0..tensor.len() {
                    for d in [0.375, -1.5e-3] {
                        let delta = S::from_f64(d);
                        let moved = Moved {
                            tensor: t,
                            index: e,
                            delta,
                        };
                        let step = Layer::<S>::forward_moved(&conv, &p, xs.view(), &base, &moved)
                            .expect("a conv entry has a hint");
                        let mut values = Vec::new();
                        assert!(Layer::<S>::moved_values(
                            &conv,
                            &p,
                            xs.view(),
                            &base,
                            &moved,
                            &mut values
                        ));
                        let (o, tap) = if t == 0 {
                            (e / (c * taps), Some(e % (c * taps)))
                        } else {
                            (e, None)
                        };
                        assert_eq!(values.len(), m * op, "{s:?}: moved values");
                        for n in 0..m {
                            let xn = x.row(n).to_vec();
                            for col in 0..o_count * op {
                                let (got, z) = (step.out[(n, col)], base.out[(n, col)]);
                                let at = format!(
                                    "{s:?} on {shape:?}: tensor {t} entry {e} δ {d}, sample {n}, value {col}"
                                );
                                if col / op != o {
                                    assert!(
                                        got.same_bits(z),
                                        "{at}: not the moved channel, not the base's"
                                    );
                                    continue;
                                }
                                let pos = col % op;
                                let want = match tap {
                                    None => z + delta,
                                    Some(r) => {
                                        let (i, ky, kx) =
                                            (r / taps, r % taps / s.kernel[1], r % s.kernel[1]);
                                        match under_tap(
                                            &xn,
                                            [h, w],
                                            [i, ky, kx],
                                            [pos / ow, pos % ow],
                                            &s,
                                            before,
                                        ) {
                                            Some(a) => z + delta * S::from_f64(a),
                                            None => z,
                                        }
                                    }
                                };
                                assert!(
                                    got.same_bits(want),
                                    "{at}: {got:?}, want {want:?} (base {z:?})"
                                );
                                assert!(
                                    values[n * op + pos].same_bits(want),
                                    "{at}: moved_values {:?}, want {want:?}",
                                    values[n * op + pos]
                                );
                            }
                        }
                    }
                }
            }
        }
        tried
    }
    let tried = run::<f64>(71) + run::<f32>(72);
    assert!(tried > 200, "{tried} layers built");
}
