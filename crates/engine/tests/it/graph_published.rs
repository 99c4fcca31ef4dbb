//! Published facts about the layer kinds, and the typed errors for impossible shapes.

use ndarray::{Array1, Array2, ArrayD, IxDyn};
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, Flatten, GlobalAvgPool, GraphBuilder, GraphError,
    Layer, LayerNorm, LossConfig, Padding, Pool, PoolKind, Shape, ShapeError, output_size,
};
use plumb_engine::{Activation, Rng};

/// The number of window positions by enumeration: every start t (in padded coordinates) with the
/// dilated kernel inside the padded input, every stride-th one.
fn enumerate_windows(i: usize, k: usize, s: usize, p: usize, d: usize) -> usize {
    let padded = i + 2 * p;
    let extent = d * (k - 1) + 1;
    (0..padded)
        .step_by(s)
        .filter(|t| t + extent <= padded)
        .count()
}

/// Dumoulin & Visin, "A guide to convolution arithmetic for deep learning" (arXiv 1603.07285):
/// worked cases of its figures [memory: figure numbers and sizes recalled, not re-read], each
/// verified here a second way by enumerating the windows.
#[test]
fn output_sizes_follow_the_convolution_arithmetic() {
    // (input, kernel, stride, padding, dilation, output)
    let cases = [
        (4, 3, 1, 0, 1, 2), // no padding, unit strides
        (5, 4, 1, 2, 1, 6), // arbitrary padding, unit strides
        (5, 3, 1, 1, 1, 5), // half ("same") padding
        (5, 3, 1, 2, 1, 7), // full padding
        (5, 3, 2, 0, 1, 2), // no padding, strides 2
        (5, 3, 2, 1, 1, 3), // padding and strides
        (6, 3, 2, 1, 1, 3), // padding and strides, odd case: a ragged tail dropped
        (7, 3, 1, 0, 2, 3), // dilation 2
    ];
    for (i, k, s, p, d, o) in cases {
        assert_eq!(
            enumerate_windows(i, k, s, p, d),
            o,
            "enumeration of {i},{k},{s},{p},{d}"
        );
        assert_eq!(output_size(i, k, s, p, p, d), Some(o));
        // The same through a conv2d layer, both axes.
        let mut c = ConvSettings::conv2d(1, [k, k]);
        c.stride = [s, s];
        c.dilation = [d, d];
        c.padding = Padding::Explicit([p, p]);
        let input = Shape::Image {
            channels: 1,
            height: i,
            width: i,
        };
        let out = plumb_engine::graph::Kind::output(&Conv::new(&c, &input).unwrap());
        assert_eq!(
            out,
            Shape::Image {
                channels: 1,
                height: o,
                width: o
            }
        );
    }
    // And the formula against enumeration over a grid of settings.
    for i in 1..12 {
        for k in 1..6 {
            for s in 1..4 {
                for p in 0..3 {
                    for d in 1..3 {
                        let want = enumerate_windows(i, k, s, p, d);
                        let got = output_size(i, k, s, p, p, d).unwrap_or(0);
                        assert_eq!(got, want, "{i},{k},{s},{p},{d}");
                    }
                }
            }
        }
    }
}

/// "same" keeps the size at stride 1, an even kernel padding one more at the end (DESIGN §4.2).
#[test]
fn same_padding_keeps_the_size_and_pads_the_end_more_for_even_kernels() {
    for k in 1..7 {
        for d in 1..3 {
            let mut c = ConvSettings::conv1d(2, k);
            c.dilation = [1, d];
            c.padding = Padding::Same;
            let conv = Conv::new(
                &c,
                &Shape::Signal {
                    channels: 1,
                    length: 9,
                },
            )
            .unwrap();
            let out = plumb_engine::graph::Kind::output(&conv);
            assert_eq!(
                out,
                Shape::Signal {
                    channels: 2,
                    length: 9
                }
            );
            let [before, after] = conv.padding();
            let total = d * (k - 1);
            assert_eq!(
                (before[1], after[1]),
                (total / 2, total - total / 2),
                "k {k} d {d}"
            );
        }
    }
}

/// Ioffe & Szegedy 2015, Algorithm 1 (training mode): with scale 1 and shift 0 the output per
/// channel has mean 0 and biased variance σ²/(σ² + ε), σ² the batch's biased variance over
/// samples and positions — computed here from the raw values by a separate loop.
#[test]
fn batch_norm_normalises_with_the_biased_batch_variance() {
    let (m, c, l) = (5, 3, 7);
    let input = Shape::Signal {
        channels: c,
        length: l,
    };
    let mut rng = Rng::new(4);
    let x = Array2::from_shape_fn((m, c * l), |(_, j)| {
        2.0 + (j / l) as f64 + 1.5 * rng.normal()
    });
    for eps in [1e-5, 0.5] {
        let bn = BatchNorm::new(eps, &input).unwrap();
        let params = vec![
            ArrayD::from_elem(IxDyn(&[c]), 1.0),
            ArrayD::from_elem(IxDyn(&[c]), 0.0),
        ];
        let out = Layer::<f64>::forward(&bn, &params, x.view(), None).out;
        for ch in 0..c {
            let values = |a: &Array2<f64>| -> Array1<f64> {
                (0..m)
                    .flat_map(|i| (0..l).map(move |p| (i, ch * l + p)))
                    .map(|ix| a[ix])
                    .collect()
            };
            let raw = values(&x);
            let n = raw.len() as f64;
            let mean = raw.sum() / n;
            let var = raw.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
            let y = values(&out);
            let y_mean = y.sum() / n;
            let y_var = y.iter().map(|v| (v - y_mean).powi(2)).sum::<f64>() / n;
            assert!(y_mean.abs() < 1e-14, "mean {y_mean}");
            let want = var / (var + eps);
            assert!((y_var - want).abs() < 1e-13, "ε {eps}: {y_var} vs {want}");
        }
    }
}

/// Zero padding (Dumoulin & Visin, arXiv 1603.07285, §2: the input is extended with zeros) adds
/// no term where a tap falls in the padding: with an infinite weight, IEEE's ∞ · 0 is NaN, so a
/// loop that multiplies the padding through must skip it for such a weight. Worked by hand:
/// x = [1, 2, 3], w = [∞, 1, 1], padding 1: y0 = 1·1 + 1·2 = 3 (the ∞ tap reads the padding),
/// y1 = ∞·1 + 2 + 3 = ∞, y2 = ∞·2 + 3 = ∞ (the last tap reads the padding).
#[test]
fn a_tap_in_the_zero_padding_adds_nothing_even_for_an_infinite_weight() {
    let mut settings = ConvSettings::conv1d(1, 3);
    settings.padding = Padding::Explicit([0, 1]);
    settings.bias = false;
    let input = Shape::Signal {
        channels: 1,
        length: 3,
    };
    let conv = Conv::new(&settings, &input).unwrap();
    let w = ArrayD::from_shape_vec(IxDyn(&[1, 1, 3]), vec![f64::INFINITY, 1.0, 1.0]).unwrap();
    let x = Array2::from_shape_vec((1, 3), vec![1.0, 2.0, 3.0]).unwrap();
    let y = Layer::<f64>::forward(&conv, std::slice::from_ref(&w), x.view(), None).out;
    assert_eq!(y.row(0).to_vec(), vec![3.0, f64::INFINITY, f64::INFINITY]);
    // The same in f32.
    let w = w.mapv(|v| v as f32);
    let y = Layer::<f32>::forward(&conv, &[w], x.mapv(|v| v as f32).view(), None).out;
    assert_eq!(y.row(0).to_vec(), vec![3.0, f32::INFINITY, f32::INFINITY]);
    let w = ArrayD::from_shape_vec(IxDyn(&[1, 1, 3]), vec![1.0, 1.0, f64::NEG_INFINITY]).unwrap();
    let y = Layer::<f64>::forward(&conv, &[w], x.view(), None).out;
    // The infinite tap last: y0 = 1 + (−∞)·2, y1 = 1 + 2 + (−∞)·3, y2 = 2 + 3 (the −∞ tap
    // reads the padding).
    assert_eq!(
        y.row(0).to_vec(),
        vec![f64::NEG_INFINITY, f64::NEG_INFINITY, 5.0]
    );
}

/// Dumoulin & Visin (arXiv 1603.07285, §2, relationship 6: out = ⌊(i + 2p − k)/s⌋ + 1): a 4 × 4
/// input, kernel 1, stride and padding p gives ⌊(3 + 2p)/p⌋ + 1 = 3 outputs per axis for any
/// p ≥ 4, output (a, b) reading input (a·p − p, b·p − p): only the centre reads the input (its
/// first pixel), every other output reads the zero padding. Worked by hand with w = 2, bias 0.5,
/// x₀₀ = 3: the centre 2·3 + 0.5 = 6.5, the rest 0.5. At p = 4 the layer pads a copy of the
/// input; at p = 10⁶ a padded copy would be 4·10¹² values, so the layer must read the input tap
/// by tap — the same numbers, in time and memory of the input and the work, not the padding.
#[test]
fn a_vast_padding_with_a_large_stride_costs_what_the_outputs_read() {
    let input = Shape::Image {
        channels: 1,
        height: 4,
        width: 4,
    };
    let x = Array2::from_shape_vec((1, 16), (0..16).map(|k| 3.0 + k as f64).collect()).unwrap();
    let w = ArrayD::from_shape_vec(IxDyn(&[1, 1, 1, 1]), vec![2.0]).unwrap();
    let b = ArrayD::from_shape_vec(IxDyn(&[1]), vec![0.5]).unwrap();
    let mut expected = vec![0.5; 9];
    expected[4] = 6.5;
    for p in [4, 1_000_000] {
        let mut settings = ConvSettings::conv2d(1, [1, 1]);
        settings.stride = [p, p];
        settings.padding = Padding::Explicit([p, p]);
        let conv = Conv::new(&settings, &input).unwrap();
        let params = [w.clone(), b.clone()];
        let y = Layer::<f64>::forward(&conv, &params, x.view(), None).out;
        assert_eq!(y.row(0).to_vec(), expected, "padding {p}");
    }
}

/// He et al. 2015 ("Delving deep into rectifiers", §2.2): a convolution's fan-in is the input
/// channels times the kernel area; the bias, scales and shifts never decay under L2.
#[test]
fn conv_fan_in_is_in_channels_times_kernel_area() {
    let conv = Conv::new(
        &ConvSettings::conv2d(8, [3, 5]),
        &Shape::Image {
            channels: 4,
            height: 9,
            width: 9,
        },
    )
    .unwrap();
    let specs = plumb_engine::graph::Kind::params(&conv);
    assert_eq!(specs[0].shape, vec![8, 4, 3, 5]);
    assert_eq!(specs[0].fan_in, 4 * 3 * 5);
    assert_eq!(specs[0].fan_out, 8 * 3 * 5);
    assert!(specs[0].decays && !specs[1].decays);
    let conv1 = Conv::new(
        &ConvSettings::conv1d(6, 7),
        &Shape::Signal {
            channels: 3,
            length: 20,
        },
    )
    .unwrap();
    assert_eq!(plumb_engine::graph::Kind::params(&conv1)[0].fan_in, 3 * 7);
    let ln = LayerNorm::new(1e-5, &Shape::Flat(4)).unwrap();
    assert!(
        plumb_engine::graph::Kind::params(&ln)
            .iter()
            .all(|p| !p.decays)
    );
}

/// Max-pool ties go to the first maximum in row-major window order, and a tie is reported; the
/// branches of a perturbed evaluation show where it crossed a kink.
#[test]
fn max_pool_ties_take_the_first_maximum_and_are_reported() {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 1,
            length: 4,
        },
        LossConfig::squared_error(),
    );
    b.push(None, Activation::Relu, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    let g = b.finish().unwrap();
    let x = ndarray::array![[1.0, 1.0, -3.0, 2.0]];
    let y = ndarray::array![[0.0, 0.0]];
    let trace = g.forward(&[], x.view());
    assert_eq!(trace.steps[0].branches, vec![0, 3]);
    let branches = g.branches(&trace);
    assert_eq!(branches.ties(), 1);
    let grad = g.gradient(&[], x.view(), y.view(), None);
    // d(½ Σ a²)/dx goes to the first of the tied pair only.
    assert_eq!(grad.input.row(0).to_vec(), vec![1.0, 0.0, 0.0, 2.0]);
    // Nudging the second of the pair up moves the branch: a changed layer, layer 0.
    let nudged = ndarray::array![[1.0, 1.0 + 1e-9, -3.0, 2.0]];
    assert_eq!(
        g.branches(&g.forward(&[], nudged.view()))
            .changed(&branches),
        vec![0]
    );
    // A ReLU's side changes too when its input crosses 0.
    let mut b = GraphBuilder::new(Shape::Flat(2), LossConfig::squared_error());
    b.push(None, Activation::Relu, Flatten::new).unwrap();
    let g = b.finish().unwrap();
    let a = g.branches(&g.forward(&[], ndarray::array![[0.5, -1e-12]].view()));
    let c = g.branches(&g.forward(&[], ndarray::array![[0.5, 1e-12]].view()));
    assert_eq!(a.changed(&c), vec![0]);
}

/// The same rule on overlapping windows of three, worked by hand: a later equal value is a tie,
/// a later greater one takes the window and clears the tie. Channel 0 = [2, 1, 2, 3, 3]: windows
/// [2, 1, 2] → position 0, tied; [1, 2, 3] → 3; [2, 3, 3] → 3, tied. Channel 1 = [1, 1, 2, 0, 0]
/// (positions 5–9): [1, 1, 2] → 7, the early tie cleared; [1, 2, 0] → 7; [2, 0, 0] → 7.
#[test]
fn max_pool_windows_of_three_take_the_first_maximum_and_count_ties() {
    let input = Shape::Signal {
        channels: 2,
        length: 5,
    };
    let pool = Pool::new(PoolKind::Max, 1, [1, 3], [1, 1], &input).unwrap();
    let x = ndarray::array![[2.0, 1.0, 2.0, 3.0, 3.0, 1.0, 1.0, 2.0, 0.0, 0.0]];
    for step in [Layer::<f64>::forward(&pool, &[], x.view(), None), {
        let s = Layer::<f32>::forward(&pool, &[], x.mapv(|v| v as f32).view(), None);
        plumb_engine::graph::Step {
            out: s.out.mapv(f64::from),
            saved: Vec::new(),
            branches: s.branches,
            ties: s.ties,
        }
    }] {
        assert_eq!(step.branches, vec![0, 3, 3, 7, 7, 7]);
        assert_eq!(step.out.row(0).to_vec(), vec![2.0, 3.0, 3.0, 2.0, 2.0, 2.0]);
        assert_eq!(step.ties, 2);
    }
}

fn layer_error(e: Result<&mut GraphBuilder, GraphError>) -> ShapeError {
    match e {
        Err(GraphError::Layer { source, .. }) => source,
        other => panic!("expected a layer error, got {other:?}"),
    }
}

#[test]
fn impossible_shapes_are_typed_errors_that_say_what_would_fix_them() {
    let sig = Shape::Signal {
        channels: 2,
        length: 5,
    };
    let mut b = GraphBuilder::new(sig, LossConfig::squared_error());
    let mut c = ConvSettings::conv1d(2, 4);
    c.dilation = [1, 2];
    let e = layer_error(b.push(None, Activation::Identity, |s| Conv::new(&c, s)));
    assert_eq!(
        e,
        ShapeError::KernelTooLarge {
            axis: "length",
            kernel: 4,
            dilation: 2,
            extent: 7,
            padded: 5,
            need: 2
        }
    );
    assert!(e.to_string().contains("pad by at least 2 more"), "{e}");
    c.padding = Padding::Explicit([0, 1]);
    assert!(
        b.push(None, Activation::Identity, |s| Conv::new(&c, s))
            .is_ok()
    );

    let mut b = GraphBuilder::new(sig, LossConfig::squared_error());
    let mut c = ConvSettings::conv1d(2, 3);
    c.stride = [1, 2];
    c.padding = Padding::Same;
    assert_eq!(
        layer_error(b.push(None, Activation::Identity, |s| Conv::new(&c, s))),
        ShapeError::SameNeedsStride1 { stride: 2 }
    );
    assert!(matches!(
        layer_error(b.push(None, Activation::Identity, |s| Pool::new(
            PoolKind::Avg,
            1,
            [1, 6],
            [1, 6],
            s
        ))),
        ShapeError::WindowTooLarge {
            size: 6,
            found: 5,
            ..
        }
    ));
    assert!(matches!(
        layer_error(b.push(None, Activation::Identity, |s| Dense::new(3, s))),
        ShapeError::Input { kind: "dense", .. }
    ));
    assert!(matches!(
        layer_error(b.push(None, Activation::Identity, |s| Conv::new(
            &ConvSettings::conv2d(1, [1, 1]),
            s
        ))),
        ShapeError::Input { kind: "conv2d", .. }
    ));
    assert_eq!(
        layer_error(b.push(None, Activation::Identity, |s| BatchNorm::new(0.0, s))),
        ShapeError::Epsilon { value: 0.0 }
    );
    assert!(matches!(
        layer_error(b.push(None, Activation::Identity, |s| Conv::new(
            &ConvSettings::conv1d(0, 1),
            s
        ))),
        ShapeError::Zero { key: "channels" }
    ));
    assert!(matches!(
        layer_error(b.push(None, Activation::Identity, |s| GlobalAvgPool::new(
            &Shape::Flat(s.size())
        ))),
        ShapeError::Input { .. }
    ));

    // Taps: unknown, or of another shape; names: unique.
    let mut b = GraphBuilder::new(sig, LossConfig::squared_error());
    b.push(Some("a"), Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(3, 2), s)
    })
    .unwrap();
    assert!(matches!(
        b.push(None, Activation::Identity, |s| Add::new("later", s)),
        Err(GraphError::TapUnknown { layer: 2, .. })
    ));
    b.push(Some("b"), Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(3, 2), s)
    })
    .unwrap();
    let e = b
        .push(None, Activation::Identity, |s| Add::new("a", s))
        .unwrap_err();
    assert!(matches!(e, GraphError::TapShape { layer: 3, .. }), "{e}");
    assert!(matches!(
        b.push(Some("a"), Activation::Identity, Flatten::new),
        Err(GraphError::DuplicateName {
            layer: 3,
            first: 1,
            ..
        })
    ));

    // Whole-chain rules: softmax only last, only over [features] / [steps, width]; cross-entropy
    // needs probabilities.
    let mut b = GraphBuilder::new(sig, LossConfig::cross_entropy());
    b.push(None, Activation::Softmax, |s| {
        Conv::new(&ConvSettings::conv1d(3, 2), s)
    })
    .unwrap();
    assert!(matches!(
        b.finish(),
        Err(GraphError::SoftmaxShape { layer: 1, .. })
    ));
    let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig::cross_entropy());
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    assert!(matches!(
        b.finish(),
        Err(GraphError::SoftmaxHidden { layer: 1, .. })
    ));
    let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig::cross_entropy());
    b.push(None, Activation::Tanh, |s| Dense::new(3, s))
        .unwrap();
    assert!(matches!(
        b.finish(),
        Err(GraphError::LossNeedsProbabilities { .. })
    ));
    assert!(matches!(
        GraphBuilder::new(Shape::Flat(3), LossConfig::cross_entropy()).finish(),
        Err(GraphError::NoLayers)
    ));

    let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig::squared_error());
    assert!(matches!(
        b.push(None, Activation::LeakyRelu { slope: 1.5 }, |s| Dense::new(
            2, s
        )),
        Err(GraphError::ActivationParameter { layer: 1, .. })
    ));
    assert!(matches!(
        b.push(None, Activation::Elu { alpha: 0.0 }, |s| Dense::new(2, s)),
        Err(GraphError::ActivationParameter { layer: 1, .. })
    ));

    // Values that do not fit: named tensor, expected and found shapes; batch sizes.
    let mut b = GraphBuilder::new(Shape::Flat(3), LossConfig::squared_error());
    b.push(Some("d"), Activation::Tanh, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let w = ArrayD::<f64>::zeros(IxDyn(&[3, 2]));
    let bias = ArrayD::<f64>::zeros(IxDyn(&[2]));
    assert_eq!(
        g.check_params(&[w, bias.clone()]),
        Err(GraphError::TensorShape {
            name: "d.weight".into(),
            found: vec![3, 2],
            expected: vec![2, 3]
        })
    );
    assert!(matches!(
        g.check_params(&[bias]),
        Err(GraphError::TensorCount {
            found: 1,
            expected: 2
        })
    ));
    let x = Array2::<f64>::zeros((4, 3));
    assert!(
        g.check_batch(x.view(), Array2::<f64>::zeros((4, 2)).view())
            .is_ok()
    );
    assert!(
        g.check_batch(x.view(), Array2::<f64>::zeros((3, 2)).view())
            .is_err()
    );
    assert!(
        g.check_batch(x.view(), Array2::<f64>::zeros((4, 3)).view())
            .is_err()
    );
    let empty = Array2::<f64>::zeros((0, 3));
    assert!(
        g.check_batch(empty.view(), Array2::<f64>::zeros((0, 2)).view())
            .is_err()
    );
}
