//! The layers above a moved parameter ([`Graph::forward_moved`]): channel-wise layers (batch
//! norm, `add`, global average pool and their activations) recompute only the channels that
//! changed, and must give exactly what recomputing the whole layer gives. The reference: the
//! moved layer's own step as the hint made it, then a full pass of every layer above it
//! ([`Graph::forward_from`]) — the two must agree bit for bit, in f64 and f32.

use crate::graph_common::{random_params, random_x};
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
                // The moved layer as the hint left it, everything above recomputed in full.
                let mut reference = base.clone();
                reference.steps[j] = tail.steps[0].clone();
                reference.outputs[j] = tail.outputs[0].clone();
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
                if j + 1 == g.nodes().len() {
                    continue;
                }
                let full = g.forward_from(&p, x.view(), &reference, j + 1);
                for (i, (got, want)) in tail.outputs[1..].iter().zip(&full.outputs).enumerate() {
                    let layer = j + 1 + i;
                    let kind = g.nodes()[layer].layer.kind();
                    for (e, (u, v)) in got.iter().zip(want).enumerate() {
                        assert_eq!(
                            u.re().to_bits(),
                            v.re().to_bits(),
                            "{what}: {}[{k}] δ {d}: layer {layer} ({kind}), entry {e}",
                            spec.name
                        );
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
    both(&b.finish().unwrap(), 7, "residual cnn");
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
