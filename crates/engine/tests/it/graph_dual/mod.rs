//! The layer graph's analytic backward pass against num-dual's forward-mode gradient through the
//! graph's own forward pass (an independent exact derivative), for every kind over random shapes,
//! strides, paddings, dilations and storage orders, every activation, both reductions and every
//! L2 divisor; the input gradient too. And f32's forward pass against f64's, the complex step, and
//! the kinds' incremental hints against the full forward pass. One module per kind; this one
//! holds what they share: the random conventions and settings, the networks' heads and the check.

mod arithmetic;
mod conv;
mod dense;
mod hints;
mod norm;
mod pool;
mod residual;
mod storage;

use crate::graph_common;

use graph_common::{dual_gradient, max_relative, random_params, random_x, random_y, worst};
use plumb_engine::graph::{
    Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, L2Divisor, LossConfig, Padding,
    Reduction, Shape,
};
use plumb_engine::{Activation, Loss, Rng};

/// Both sides are exact up to rounding: 1e-10 relative, entries below 1e-8 of their tensor's
/// largest judged against that floor.
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-8;

/// Every element-wise activation (the dense tests' list).
use crate::common::HIDDEN as ACTIVATIONS;

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

/// The output layer: dense, 3 units under softmax (a class needs company), else 2.
fn push_output(b: &mut GraphBuilder, out: Activation) {
    let units = if out == Activation::Softmax { 3 } else { 2 };
    b.push(None, out, |s| Dense::new(units, s)).unwrap();
}

/// A dense head (flatten if needed, then a dense output layer) and the check.
fn finish_and_check(mut b: GraphBuilder, out: Activation, seed: u64, what: &str) {
    if !matches!(b.shape(), Shape::Flat(_)) {
        b.push(None, Activation::Identity, Flatten::new).unwrap();
    }
    push_output(&mut b, out);
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
    graph_common::freed_trace_matches_kept(g, &params, &x, &y, &format!("{what} seed {seed}"));
    // The backward pass over a kept forward pass (what the diagnosis runs) against the one that
    // frees the trace as it goes and keeps one array for an activation working from its output:
    // the same arithmetic, so the same bits as the gradient judged against num-dual above.
    let trace = g.forward(&params, x.view());
    let (kept, input) = g.backward(&params, x.view(), y.view(), &trace, None, true);
    for (t, (a, b)) in kept.iter().zip(&grad.params).enumerate() {
        assert!(
            a.iter()
                .zip(b.iter())
                .all(|(a, b)| a.to_bits() == b.to_bits()),
            "{what} seed {seed}: tensor {t} differs between the kept and the freed trace"
        );
    }
    let input = input.expect("asked for");
    assert!(
        input
            .iter()
            .zip(grad.input.iter())
            .all(|(a, b)| a.to_bits() == b.to_bits()),
        "{what} seed {seed}: the input gradient differs between the kept and the freed trace"
    );
    // Without the input gradient (the first layer then forms no dx): the same parameter
    // gradients against num-dual.
    let (loss, without) = g.parameter_gradient(&params, x.view(), y.view(), None);
    assert_eq!(loss.to_bits(), grad.loss.to_bits(), "{what} seed {seed}");
    for (t, (a, r)) in without.iter().zip(&dual.params).enumerate() {
        let err = max_relative(a.iter(), r.iter(), FLOOR);
        assert!(
            err <= TOL,
            "{what} seed {seed}: {err:e} at tensor {t} without the input gradient"
        );
    }
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

/// The start of a random convolutional net: a signal (`dims` 1) or image (2) input of random
/// size, random conventions; with the output activation they call for.
fn conv_builder(rng: &mut Rng, dims: usize) -> (GraphBuilder, Activation) {
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
    let (config, out) = conventions(rng);
    (GraphBuilder::new(input, config), out)
}

/// A convolution of random settings with a random activation, drawn until the settings fit the
/// shape (impossible ones are the error tests' job).
fn push_random_conv(b: &mut GraphBuilder, rng: &mut Rng, dims: usize) {
    let act = pick(rng, &ACTIVATIONS);
    loop {
        let s = conv_settings(rng, dims, false);
        if b.push(None, act, |sh| Conv::new(&s, sh)).is_ok() {
            break;
        }
    }
}
