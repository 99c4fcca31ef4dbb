//! The layer graph's analytic backward pass against num-dual's forward-mode gradient through the
//! graph's own forward pass (an independent exact derivative), for every kind over random shapes,
//! strides, paddings, dilations and storage orders, every activation, both reductions and every
//! L2 divisor; the input gradient too. And f32's forward pass against f64's, and the kinds'
//! incremental hints against the full forward pass.

use crate::graph_common;

use graph_common::{dual_gradient, random_params, random_x, random_y, worst};
use ndarray::{Array2, ArrayD};
use num_dual::Dual64;
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, Flatten, GlobalAvgPool, Graph, GraphBuilder,
    GraphError, L2Divisor, LayerNorm, LayerScalar, LossConfig, Moved, Padding, Pool, PoolKind,
    Reduction, RmsNorm, Shape, Storage,
};
use plumb_engine::{Activation, Loss, Rng};

/// Both sides are exact up to rounding: 1e-10 relative, entries below 1e-8 of their tensor's
/// largest judged against that floor.
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-8;

const ACTIVATIONS: [Activation; 8] = [
    Activation::Identity,
    Activation::Sigmoid,
    Activation::Tanh,
    Activation::Relu,
    Activation::LeakyRelu { slope: 0.05 },
    Activation::Elu { alpha: 0.8 },
    Activation::Softplus,
    Activation::Gelu,
];

fn pick<T: Copy>(rng: &mut Rng, items: &[T]) -> T {
    items[rng.below(items.len())]
}

/// Random conventions: loss with a fitting output, reduction, λ, divisor, l2-on-bias.
fn conventions(rng: &mut Rng) -> (LossConfig, Activation) {
    let (loss, out) = match rng.below(3) {
        0 => (Loss::CrossEntropy, Activation::Softmax),
        1 => (Loss::CrossEntropy, Activation::Sigmoid),
        _ => (Loss::SquaredError, pick(rng, &ACTIVATIONS)),
    };
    let config = LossConfig {
        loss,
        reduction: pick(rng, &[Reduction::Mean, Reduction::Sum]),
        l2: pick(rng, &[0.0, 0.3]),
        l2_divisor: pick(
            rng,
            &[
                L2Divisor::TwoM,
                L2Divisor::Two,
                L2Divisor::M,
                L2Divisor::One,
            ],
        ),
        l2_on_bias: rng.below(2) == 0,
    };
    (config, out)
}

/// A dense head (flatten if needed, then a dense output layer) and the check.
fn finish_and_check(mut b: GraphBuilder, out: Activation, seed: u64, what: &str) {
    if !matches!(b.shape(), Shape::Flat(_)) {
        b.push(None, Activation::Identity, Flatten::new).unwrap();
    }
    let units = if out == Activation::Softmax { 3 } else { 2 };
    b.push(None, out, |s| Dense::new(units, s)).unwrap();
    let g = b.finish().unwrap();
    check(&g, seed, what);
}

fn check(g: &Graph, seed: u64, what: &str) {
    let mut rng = Rng::new(seed ^ 0x5eed);
    let m = 2 + rng.below(3);
    let params = random_params(g, &mut rng);
    let x = random_x(g, m, &mut rng);
    let y = random_y(g, m, &mut rng);
    let grad = g.gradient(&params, x.view(), y.view(), None);
    let dual = dual_gradient(g, &params, &x, &y);
    assert!(
        (grad.loss - dual.loss).abs() <= TOL * dual.loss.abs().max(1e-300),
        "{what} seed {seed}: loss {} vs num-dual {}",
        grad.loss,
        dual.loss
    );
    let (err, at) = worst(&grad, &dual, FLOOR);
    assert!(err <= TOL, "{what} seed {seed}: {err:e} at {at}\n{g:#?}");
}

fn conv_settings(rng: &mut Rng, dims: usize, stride_one: bool) -> ConvSettings {
    let k = [1 + rng.below(3), 1 + rng.below(4)];
    let mut s = if dims == 1 {
        ConvSettings::conv1d(1 + rng.below(3), k[1])
    } else {
        ConvSettings::conv2d(1 + rng.below(3), k)
    };
    s.stride = if stride_one {
        [1, 1]
    } else {
        [1 + rng.below(2), 1 + rng.below(3)]
    };
    s.dilation = [1 + rng.below(2), 1 + rng.below(2)];
    s.padding = if s.stride == [1, 1] && rng.below(2) == 0 {
        Padding::Same
    } else {
        Padding::Explicit([rng.below(2), rng.below(3)])
    };
    s.bias = rng.below(3) != 0;
    s
}

#[test]
fn conv1d_and_conv2d_over_random_settings() {
    for seed in 0..40u64 {
        let mut rng = Rng::new(seed);
        let dims = 1 + (seed % 2) as usize;
        let input = if dims == 1 {
            Shape::Signal {
                channels: 1 + rng.below(3),
                length: 8 + rng.below(6),
            }
        } else {
            Shape::Image {
                channels: 1 + rng.below(2),
                height: 6 + rng.below(3),
                width: 6 + rng.below(4),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        for _ in 0..1 + rng.below(2) {
            // Draw until the settings fit the shape (impossible ones are the error tests' job).
            let act = pick(&mut rng, &ACTIVATIONS);
            loop {
                let s = conv_settings(&mut rng, dims, false);
                if b.push(None, act, |sh| Conv::new(&s, sh)).is_ok() {
                    break;
                }
            }
        }
        finish_and_check(b, out, seed, &format!("conv{dims}d"));
    }
}

#[test]
fn pools_over_random_sizes_and_strides() {
    for seed in 0..40u64 {
        let mut rng = Rng::new(100 + seed);
        let dims = 1 + (seed % 2) as usize;
        let op = if seed % 4 < 2 {
            PoolKind::Max
        } else {
            PoolKind::Avg
        };
        let input = if dims == 1 {
            Shape::Signal {
                channels: 2,
                length: 9 + rng.below(5),
            }
        } else {
            Shape::Image {
                channels: 2,
                height: 5 + rng.below(3),
                width: 5 + rng.below(3),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let s = conv_settings(&mut rng, dims, true);
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Conv::new(&s, sh)).unwrap();
        let size = [1 + rng.below(2), 1 + rng.below(3)];
        let stride = if rng.below(2) == 0 {
            size
        } else {
            [1 + rng.below(2), 1 + rng.below(2)]
        };
        b.push(None, Activation::Identity, |sh| {
            Pool::new(op, dims, size, stride, sh)
        })
        .unwrap();
        if rng.below(2) == 0 {
            b.push(None, Activation::Identity, GlobalAvgPool::new)
                .unwrap();
        }
        finish_and_check(b, out, seed, &format!("{op:?} pool {dims}d"));
    }
}

#[test]
fn norms_over_flat_signal_image_and_sequence_inputs() {
    let inputs = [
        Shape::Flat(5),
        Shape::Signal {
            channels: 3,
            length: 6,
        },
        // Three channels, not two: a norm over two features outputs ±1 whatever x is (up to ε), and
        // its input gradient is all cancellation.
        Shape::Image {
            channels: 3,
            height: 3,
            width: 4,
        },
        Shape::Sequence { steps: 3, width: 4 },
    ];
    for seed in 0..36u64 {
        let mut rng = Rng::new(200 + seed);
        let input = inputs[(seed % 4) as usize];
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let act = pick(&mut rng, &ACTIVATIONS);
        let eps = pick(&mut rng, &[1e-5, 1e-3, 0.1]);
        match (seed / 4) % 3 {
            0 => b.push(None, act, |s| BatchNorm::new(eps, s)),
            1 => b.push(None, act, |s| LayerNorm::new(eps, s)),
            _ => b.push(None, act, |s| RmsNorm::new(eps, s)),
        }
        .unwrap();
        finish_and_check(b, out, seed, &format!("norm {} on {input}", (seed / 4) % 3));
    }
}

#[test]
fn residual_blocks_with_convolutions_and_norms() {
    for seed in 0..20u64 {
        let mut rng = Rng::new(300 + seed);
        let input = Shape::Signal {
            channels: 2,
            length: 7 + rng.below(4),
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let mut s = ConvSettings::conv1d(3, 3);
        s.padding = Padding::Same;
        b.push(Some("stem"), Activation::Relu, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
            .unwrap();
        let mut s2 = ConvSettings::conv1d(3, 2 + rng.below(3));
        s2.padding = Padding::Same;
        s2.dilation = [1, 1 + rng.below(2)];
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Conv::new(&s2, sh)).unwrap();
        b.push(None, Activation::Identity, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, pick(&mut rng, &ACTIVATIONS), |sh| {
            Add::new("stem", sh)
        })
        .unwrap();
        b.push(None, Activation::Identity, |sh| RmsNorm::new(1e-6, sh))
            .unwrap();
        b.push(None, Activation::Identity, GlobalAvgPool::new)
            .unwrap();
        finish_and_check(b, out, seed, "residual block");
    }
}

#[test]
fn dense_per_step_on_sequences_with_a_softmax_per_step() {
    for (seed, reduction) in [(1u64, Reduction::Mean), (2, Reduction::Sum)] {
        let config = LossConfig {
            reduction,
            ..LossConfig::cross_entropy()
        };
        let mut b = GraphBuilder::new(Shape::Sequence { steps: 4, width: 3 }, config);
        b.push(None, Activation::Tanh, |s| Dense::new(5, s))
            .unwrap();
        b.push(None, Activation::Softmax, |s| Dense::new(3, s))
            .unwrap();
        let g = b.finish().unwrap();
        assert_eq!(g.output(), Shape::Sequence { steps: 4, width: 3 });
        check(&g, seed, "sequence");
    }
}

/// The gradient of a tensor stored in another order is the canonical gradient in that order:
/// num-dual differentiates through the permutation of the file's tensor into the canonical one.
#[test]
fn storage_orders_map_gradients_like_values() {
    for (seed, dims, order) in [
        (1u64, 2, "hwio"),
        (2, 2, "ohwi"),
        (3, 2, "iohw"),
        (4, 1, "kio"),
        (5, 1, "oki"),
    ] {
        let mut rng = Rng::new(400 + seed);
        let input = if dims == 1 {
            Shape::Signal {
                channels: 2,
                length: 9,
            }
        } else {
            Shape::Image {
                channels: 2,
                height: 5,
                width: 6,
            }
        };
        let canonical = if dims == 1 { "oik" } else { "oihw" };
        let storage = Storage::parse(order, canonical).unwrap();
        let mut b = GraphBuilder::new(input, LossConfig::squared_error());
        let s = conv_settings(&mut rng, dims, false);
        b.push(None, Activation::Tanh, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        b.push(None, Activation::Identity, |sh| Dense::new(2, sh))
            .unwrap();
        let g = b.finish().unwrap();
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 3, &mut rng);
        let y = random_y(&g, 3, &mut rng);
        let grad = g.gradient(&params, x.view(), y.view(), None);
        let file_grad = storage.to_file(&grad.params[0]);
        // num-dual: perturb the file-order tensor, permute it to canonical, evaluate.
        let file = storage.to_file(&params[0]);
        let pd: Vec<ArrayD<Dual64>> = params.iter().map(|p| p.mapv(Dual64::from_re)).collect();
        let (xd, yd) = (x.mapv(Dual64::from_re), y.mapv(Dual64::from_re));
        let mut dual = file.mapv(|_| 0.0);
        for k in 0..file.len() {
            let mut fd = file.mapv(Dual64::from_re);
            fd.as_slice_mut().unwrap()[k].eps = 1.0;
            let mut q = pd.clone();
            q[0] = storage.to_canonical(&fd);
            dual.as_slice_mut().unwrap()[k] = g.loss(&q, xd.view(), yd.view()).eps;
        }
        assert_eq!(file_grad.shape(), dual.shape());
        let err = graph_common::max_relative(file_grad.iter(), dual.iter(), FLOOR);
        assert!(err <= TOL, "{order}: {err:e}");
    }
}

/// f32's forward pass against f64's: each output is a sum of at most a few hundred rounded terms
/// through a few layers, so agreement to 2e-5 of the output's scale is f32 precision
/// (ε = 1.2e-7, times the terms summed); a wrong f32 path would be off by far more.
#[test]
fn f32_forward_agrees_with_f64_to_single_precision() {
    for seed in 0..10u64 {
        let mut rng = Rng::new(500 + seed);
        let input = Shape::Signal {
            channels: 2,
            length: 12,
        };
        let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
        let mut s = ConvSettings::conv1d(4, 3);
        s.padding = Padding::Same;
        b.push(Some("c1"), Activation::Relu, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| {
            Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], sh)
        })
        .unwrap();
        b.push(None, Activation::Gelu, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, Activation::Identity, GlobalAvgPool::new)
            .unwrap();
        b.push(None, Activation::Softmax, |sh| Dense::new(3, sh))
            .unwrap();
        let g = b.finish().unwrap();
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 4, &mut rng);
        let p32: Vec<ArrayD<f32>> = params.iter().map(|p| p.mapv(|v| v as f32)).collect();
        let t64 = g.forward(&params, x.view());
        let t32 = g.forward(&p32, x.mapv(|v| v as f32).view());
        for (j, (a, b)) in t64.outputs.iter().zip(&t32.outputs).enumerate() {
            let scale = a.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            for (&u, &v) in a.iter().zip(b) {
                assert!(
                    (u - v as f64).abs() <= 2e-5 * scale.max(1.0),
                    "seed {seed} layer {j}: {u} vs {v}"
                );
            }
        }
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

/// The complex step (Squire & Trapp 1998): Im J(θ + ih·e_k)/h is dJ/dθ_k to rounding for a real-
/// analytic J, so the graph's complex path (every kind, ReLU and max-pool branching on the real
/// part) must reproduce the analytic gradient at every coordinate.
#[test]
fn complex_step_through_the_graph_agrees_with_the_backward_pass() {
    use num_complex::Complex64;
    let mut rng = Rng::new(77);
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 2,
            height: 5,
            width: 6,
        },
        LossConfig {
            l2: 0.2,
            ..LossConfig::cross_entropy()
        },
    );
    let mut c = ConvSettings::conv2d(3, [3, 2]);
    c.padding = Padding::Same;
    b.push(Some("c"), Activation::Relu, |s| Conv::new(&c, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 2, [2, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Tanh, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(None, Activation::Identity, GlobalAvgPool::new)
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    let g = b.finish().unwrap();
    let params = random_params(&g, &mut rng);
    let x = random_x(&g, 3, &mut rng);
    let y = random_y(&g, 3, &mut rng);
    let grad = g.gradient(&params, x.view(), y.view(), None);
    let h = 1e-30;
    let pc: Vec<ArrayD<Complex64>> = params
        .iter()
        .map(|p| p.mapv(|v| Complex64::new(v, 0.0)))
        .collect();
    let (xc, yc) = (
        x.mapv(|v| Complex64::new(v, 0.0)),
        y.mapv(|v| Complex64::new(v, 0.0)),
    );
    let scale = grad
        .params
        .iter()
        .flat_map(|t| t.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    for t in 0..params.len() {
        for k in 0..params[t].len() {
            let mut q = pc.clone();
            q[t].as_slice_mut().unwrap()[k].im = h;
            let d = g.loss(&q, xc.view(), yc.view()).im / h;
            let a = grad.params[t].as_slice().unwrap()[k];
            assert!(
                (d - a).abs() <= TOL * a.abs().max(d.abs()).max(FLOOR * scale),
                "{} [{k}]: complex step {d} vs {a}",
                g.tensors()[t].name
            );
        }
    }
}

/// The borders named one by one (the random tests reach them only by chance): "same" padding with
/// even kernels under dilation (the odd extra zero at the end), a stride larger than the kernel
/// (input positions no window reads), explicit padding wider than the kernel's reach, and pools
/// whose ragged tail is dropped or whose stride skips positions.
#[test]
fn conv_and_pool_borders() {
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
    let pools = [
        ("ragged tail", [2, 3], [2, 3]),
        ("stride > size", [1, 2], [3, 3]),
        ("overlapping", [3, 3], [2, 1]),
    ];
    for (seed, (what, size, stride)) in pools.into_iter().enumerate() {
        for op in [PoolKind::Max, PoolKind::Avg] {
            for (dims, input) in [
                (2, image),
                (
                    1,
                    Shape::Signal {
                        channels: 2,
                        length: 11,
                    },
                ),
            ] {
                let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
                b.push(None, Activation::Identity, |sh| {
                    Pool::new(op, dims, size, stride, sh)
                })
                .unwrap();
                finish_and_check(b, Activation::Softmax, 10 + seed as u64, what);
            }
        }
    }
}

/// The incremental hints ([`Graph::forward_moved`], [`Graph::loss_moved`]) against the full
/// forward pass at the moved parameters, entry by entry, in scalar S (ε its machine epsilon).
///
/// At the moved layer: a dense or conv layer's other units (channels) keep the base's values and
/// must equal the full pass bit for bit; the moved unit's values are the base's rounded sum plus
/// δ·a where the full pass sums again, so the two may differ by both sums' rounding. The bound
/// for a sum of n products and a bias (Higham, *Accuracy and Stability of Numerical Algorithms*,
/// 2nd ed., §3.1) is γ(n+1) · (Σ|w||a| + |b|), γ(k) = k·u / (1 − k·u), u = ε/2; with the update's
/// own rounding the test allows γ(n+1) · (S_base + S_moved) + u · (|δ|·max|a| + |z|), S being
/// the layer's forward pass over |W|, |b| and |a|. Kinds without a hint are recomputed with the
/// entry moved: the same arithmetic, so bit for bit. The loss: bit for bit where nothing differs
/// (no hint, no L2 term); otherwise within 64 · (n + 1) · ε · max(|J|, 1), n the largest fan-in —
/// the moved unit's rounding difference carried to the loss by the layers above (factors of
/// order 1 in these nets), and the L2 sum's one-entry update.
fn hints_agree<S: LayerScalar>(
    g: &Graph,
    params: &[ArrayD<f64>],
    x: &Array2<f64>,
    y: &Array2<f64>,
    eps: f64,
    what: &str,
) {
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let (x, y) = (x.mapv(S::from_f64), y.mapv(S::from_f64));
    let base = g.forward(&p, x.view());
    let l2 = g.l2_sum(&p);
    let n_max = g.tensors().iter().map(|t| t.spec.fan_in).max().unwrap_or(1) as f64;
    let u = eps / 2.0;
    let abs = |a: &ArrayD<S>| a.mapv(|v| S::from_f64(v.re().abs()));
    for (t, spec) in g.tensors().iter().enumerate() {
        let j = spec.layer;
        let node = &g.nodes()[j];
        let layer = S::layer(node.layer.as_ref());
        let own = node.tensors();
        let input = if j == 0 {
            x.clone()
        } else {
            base.outputs[j - 1].clone()
        };
        let input_abs = input.mapv(|v| S::from_f64(v.re().abs()));
        let a_max = input_abs.iter().fold(0.0f64, |m, v| m.max(v.re()));
        let n = spec.spec.fan_in as f64;
        let gamma = (n + 1.0) * u / (1.0 - (n + 1.0) * u);
        let size = p[t].len();
        // Every entry of small tensors, a spread of 12 of larger ones.
        let entries: Vec<usize> = if size <= 24 {
            (0..size).collect()
        } else {
            (0..12).map(|i| i * (size - 1) / 11).collect()
        };
        for k in entries {
            for d in [0.37, -1e-4] {
                let delta = S::from_f64(d);
                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[k] += delta;
                let full = g.forward(&q, x.view());
                let lf = g.loss_of(&q, &full, y.view());
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta,
                };
                let tail = g.forward_moved(&p, x.view(), &base, &moved);
                let li = g.loss_moved(&p, &tail, y.view(), l2, &moved);
                assert_eq!(tail.from, j, "{what}: tail of {}", spec.name);
                assert_eq!(tail.steps.len(), g.nodes().len() - j);
                let (zi, zf) = (&tail.steps[0].out, &full.steps[j].out);
                let at = |e: usize| format!("{what}: {}[{k}] δ {d}, entry {e}", spec.name);
                let hinted = matches!(node.layer.kind(), "dense" | "conv1d" | "conv2d");
                if hinted {
                    // The moved unit's columns: dense r at every step; conv channel o's positions.
                    let out = node.layer.output();
                    let shape = &g.tensors()[own.start].spec.shape;
                    let channels = shape[0];
                    let unit = if t == own.start {
                        k / shape[1..].iter().product::<usize>()
                    } else {
                        k
                    };
                    let per = out.size() / channels;
                    let dense = node.layer.kind() == "dense";
                    let in_unit = |c: usize| {
                        if dense {
                            c % channels == unit
                        } else {
                            c / per == unit
                        }
                    };
                    let own_abs: Vec<ArrayD<S>> = p[own.clone()].iter().map(abs).collect();
                    let mut q_abs = own_abs.clone();
                    q_abs[t - own.start] = abs(&q[t]);
                    let sb = layer.forward(&own_abs, input_abs.view(), None).out;
                    let sf = layer.forward(&q_abs, input_abs.view(), None).out;
                    for ((r, c), &v) in zi.indexed_iter() {
                        let (v, w) = (v.re(), zf[[r, c]].re());
                        if in_unit(c) {
                            let bound = gamma * (sb[[r, c]].re() + sf[[r, c]].re())
                                + u * (d.abs() * a_max + v.abs());
                            assert!((v - w).abs() <= bound, "{}: {v} vs {w}", at(c));
                        } else {
                            assert_eq!(v.to_bits(), w.to_bits(), "{}: other unit", at(c));
                        }
                    }
                } else {
                    for (e, (v, w)) in zi.iter().zip(zf).enumerate() {
                        assert_eq!(v.re().to_bits(), w.re().to_bits(), "{}", at(e));
                    }
                }
                let (li, lf) = (li.re(), lf.re());
                if !hinted && g.loss_config().l2 == 0.0 {
                    assert_eq!(
                        li.to_bits(),
                        lf.to_bits(),
                        "{what}: loss, {}[{k}]",
                        spec.name
                    );
                } else {
                    let tol = 64.0 * (n_max + 1.0) * eps * lf.abs().max(1.0);
                    assert!(
                        (li - lf).abs() <= tol,
                        "{what}: loss {li} vs {lf} ({:e} > {tol:e}), {}[{k}] δ {d}",
                        (li - lf).abs(),
                        spec.name
                    );
                }
            }
        }
    }
}

fn hints_agree_both(g: &Graph, seed: u64, what: &str) {
    let mut rng = Rng::new(seed ^ 0x1c4e);
    let m = 2 + rng.below(3);
    let params = random_params(g, &mut rng);
    let x = random_x(g, m, &mut rng);
    let y = random_y(g, m, &mut rng);
    hints_agree::<f64>(g, &params, &x, &y, f64::EPSILON, &format!("{what} f64"));
    hints_agree::<f32>(
        g,
        &params,
        &x,
        &y,
        f32::EPSILON as f64,
        &format!("{what} f32"),
    );
}

/// Convolutions over random shapes, strides, paddings ("same" included), dilations and biases,
/// with a batch norm (no hint) between some, a hidden dense layer and every convention.
#[test]
fn incremental_hints_agree_with_the_full_pass_on_convolutions() {
    for seed in 0..24u64 {
        let mut rng = Rng::new(900 + seed);
        let dims = 1 + (seed % 2) as usize;
        let input = if dims == 1 {
            Shape::Signal {
                channels: 1 + rng.below(3),
                length: 8 + rng.below(6),
            }
        } else {
            Shape::Image {
                channels: 1 + rng.below(2),
                height: 6 + rng.below(3),
                width: 6 + rng.below(4),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        for _ in 0..1 + rng.below(2) {
            let act = pick(&mut rng, &ACTIVATIONS);
            loop {
                let s = conv_settings(&mut rng, dims, false);
                if b.push(None, act, |sh| Conv::new(&s, sh)).is_ok() {
                    break;
                }
            }
            if rng.below(2) == 0 {
                b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
                    .unwrap();
            }
        }
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Dense::new(2 + rng.below(3), sh))
            .unwrap();
        let units = if out == Activation::Softmax { 3 } else { 2 };
        b.push(None, out, |sh| Dense::new(units, sh)).unwrap();
        let g = b.finish().unwrap();
        hints_agree_both(&g, seed, &format!("seed {seed} conv{dims}d"));
    }
}

/// Dense layers on flat inputs and per step on sequences (the hint's rows are samples × steps),
/// with a layer norm (no hint) and a residual add.
#[test]
fn incremental_hints_agree_with_the_full_pass_on_dense_layers() {
    for seed in 0..16u64 {
        let mut rng = Rng::new(950 + seed);
        let input = if seed % 2 == 0 {
            Shape::Flat(2 + rng.below(5))
        } else {
            Shape::Sequence {
                steps: 2 + rng.below(3),
                width: 2 + rng.below(3),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let width = 2 + rng.below(4);
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(Some("first"), act, |sh| Dense::new(width, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Dense::new(width, sh)).unwrap();
        b.push(None, Activation::Identity, |sh| Add::new("first", sh))
            .unwrap();
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        let units = if out == Activation::Softmax { 3 } else { 2 };
        b.push(None, out, |sh| Dense::new(units, sh)).unwrap();
        let g = b.finish().unwrap();
        hints_agree_both(&g, seed, &format!("seed {seed} dense on {input}"));
    }
}

/// A conv weight stored in another order: the file's entry k is the canonical entry the
/// permutation sends it to, and moving it through the hint gives the full pass's loss at the
/// file tensor moved and read back in canonical order.
#[test]
fn incremental_hints_follow_storage_orders() {
    for (seed, dims, order) in [
        (1u64, 2, "hwio"),
        (2, 2, "ohwi"),
        (3, 1, "kio"),
        (4, 1, "oki"),
    ] {
        let mut rng = Rng::new(990 + seed);
        let input = if dims == 1 {
            Shape::Signal {
                channels: 2,
                length: 9,
            }
        } else {
            Shape::Image {
                channels: 2,
                height: 5,
                width: 6,
            }
        };
        let canonical = if dims == 1 { "oik" } else { "oihw" };
        let storage = Storage::parse(order, canonical).unwrap();
        let mut b = GraphBuilder::new(input, LossConfig::squared_error());
        let s = conv_settings(&mut rng, dims, false);
        b.push(None, Activation::Tanh, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        b.push(None, Activation::Identity, |sh| Dense::new(2, sh))
            .unwrap();
        let g = b.finish().unwrap();
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 3, &mut rng);
        let y = random_y(&g, 3, &mut rng);
        let base = g.forward(&params, x.view());
        let file = storage.to_file(&params[0]);
        // Where each file entry lands in canonical order.
        let positions = storage.to_canonical(
            &ArrayD::from_shape_vec(file.raw_dim(), (0..file.len()).collect()).unwrap(),
        );
        for k in 0..file.len() {
            let canonical_k = positions.iter().position(|&f| f == k).unwrap();
            let mut moved_file = file.clone();
            moved_file.as_slice_mut().unwrap()[k] += 0.25;
            let mut q = params.clone();
            q[0] = storage.to_canonical(&moved_file);
            let lf = g.loss(&q, x.view(), y.view());
            let moved = Moved {
                tensor: 0,
                index: canonical_k,
                delta: 0.25,
            };
            let tail = g.forward_moved(&params, x.view(), &base, &moved);
            let li = g.loss_moved(&params, &tail, y.view(), g.l2_sum(&params), &moved);
            let n = g.tensors()[0].spec.fan_in as f64;
            let tol = 64.0 * (n + 1.0) * f64::EPSILON * lf.abs().max(1.0);
            assert!(
                (li - lf).abs() <= tol,
                "{order} file entry {k}: {li} vs {lf}"
            );
        }
    }
}
