//! conv1d and conv2d: random settings, the borders named one by one, the error naming the layer,
//! and the incremental hint (one output channel recomputed).

use plumb_engine::graph::{
    BatchNorm, Conv, ConvSettings, Dense, Flatten, GraphBuilder, GraphError, LossConfig, Padding,
    Shape,
};
use plumb_engine::{Activation, Rng};

use super::hints::hints_agree_both;
use super::{ACTIVATIONS, conv_builder, finish_and_check, pick, push_output, push_random_conv};

#[test]
fn conv1d_and_conv2d_over_random_settings() {
    for seed in 0..40u64 {
        let mut rng = Rng::new(seed);
        let dims = 1 + (seed % 2) as usize;
        let (mut b, out) = conv_builder(&mut rng, dims);
        for _ in 0..1 + rng.below(2) {
            push_random_conv(&mut b, &mut rng, dims);
        }
        finish_and_check(b, out, seed, &format!("conv{dims}d"));
    }
}

/// The borders named one by one (the random tests reach them only by chance): "same" padding with
/// even kernels under dilation (the odd extra zero at the end), a stride larger than the kernel
/// (input positions no window reads), and explicit padding wider than the kernel's reach.
#[test]
fn conv_borders() {
    let image = Shape::Image {
        channels: 2,
        height: 7,
        width: 8,
    };
    let conv = |kernel: [usize; 2], stride, dilation, padding| ConvSettings {
        stride,
        dilation,
        padding,
        ..ConvSettings::conv2d(2, kernel)
    };
    let convs = [
        (
            "same, even kernel, dilated",
            conv([2, 4], [1, 1], [2, 3], Padding::Same),
        ),
        (
            "same, even kernel",
            conv([4, 2], [1, 1], [1, 1], Padding::Same),
        ),
        (
            "stride > kernel",
            conv([2, 1], [3, 4], [1, 1], Padding::Explicit([1, 2])),
        ),
        (
            "padding ≥ kernel",
            conv([2, 2], [2, 1], [1, 2], Padding::Explicit([3, 2])),
        ),
    ];
    for (seed, (what, s)) in convs.into_iter().enumerate() {
        for act in [Activation::Tanh, Activation::Softplus] {
            let mut b = GraphBuilder::new(image, LossConfig::squared_error());
            b.push(None, act, |sh| Conv::new(&s, sh)).unwrap();
            finish_and_check(b, Activation::Identity, seed as u64, what);
        }
    }
}

/// Taps that never reach the input (the direct loop skips them; im2col reads their zeros): a
/// one-column image under a wide kernel with wide padding, at stride 1 and 2.
#[test]
fn conv_taps_that_read_only_padding() {
    let image = Shape::Image {
        channels: 2,
        height: 3,
        width: 1,
    };
    for (seed, stride) in [[1, 1], [1, 2], [2, 2]].into_iter().enumerate() {
        let s = ConvSettings {
            stride,
            padding: Padding::Explicit([1, 3]),
            ..ConvSettings::conv2d(2, [2, 5])
        };
        let mut b = GraphBuilder::new(image, LossConfig::squared_error());
        b.push(None, Activation::Tanh, |sh| Conv::new(&s, sh))
            .unwrap();
        finish_and_check(
            b,
            Activation::Identity,
            50 + seed as u64,
            "padding-only taps",
        );
    }
}

#[test]
fn graph_errors_name_the_layer() {
    let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig::squared_error());
    let e = b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(2, 3), s)
    });
    assert!(matches!(e, Err(GraphError::Layer { layer: 1, .. })));
}

/// Convolutions over random shapes, strides, paddings ("same" included), dilations and biases,
/// with a batch norm (no hint) between some, a hidden dense layer and every convention.
#[test]
fn incremental_hints_agree_with_the_full_pass_on_convolutions() {
    for seed in 0..24u64 {
        let mut rng = Rng::new(900 + seed);
        let dims = 1 + (seed % 2) as usize;
        let (mut b, out) = conv_builder(&mut rng, dims);
        for _ in 0..1 + rng.below(2) {
            push_random_conv(&mut b, &mut rng, dims);
            if rng.below(2) == 0 {
                b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
                    .unwrap();
            }
        }
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Dense::new(2 + rng.below(3), sh))
            .unwrap();
        push_output(&mut b, out);
        let g = b.finish().unwrap();
        hints_agree_both(&g, seed, &format!("seed {seed} conv{dims}d"));
    }
}
