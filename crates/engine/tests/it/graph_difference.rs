//! The difference form of one-entry losses in f32 (`plumb_engine::graph::Difference`): each
//! activation's change against the same change computed in f64 from the C library's tanh, exp,
//! expm1 and log1p (Rust's f64 functions call libm) at the same f32 inputs, and each loss
//! change's bound against the change of the f64 engine's loss at the same f32-rounded
//! parameters and step (whose own round-off, ~1e-16·|J|, is far below the bounds checked).

use ndarray::ArrayD;
use plumb_engine::graph::{
    Dense, Difference, Graph, GraphBuilder, LossConfig, Moved, Shape, Workspace,
};
use plumb_engine::{Activation, Batch, Init, Loss, Reduction, Rng};

/// The f64 reference of g(z + d) − g(z) from libm at f32 arguments, with d and z exact.
fn reference(act: Activation, z: f32, d: f32) -> f64 {
    let (z, d) = (z as f64, d as f64);
    // The engine in f32 holds an activation's parameter rounded to f32: so does the reference.
    let act = match act {
        Activation::LeakyRelu { slope } => Activation::LeakyRelu {
            slope: slope as f32 as f64,
        },
        Activation::Elu { alpha } => Activation::Elu {
            alpha: alpha as f32 as f64,
        },
        other => other,
    };
    let sig = |v: f64| 1.0 / (1.0 + (-v).exp());
    let g = |v: f64| match act {
        Activation::Tanh => v.tanh(),
        Activation::Sigmoid => sig(v),
        Activation::Softplus => v.max(0.0) + (-v.abs()).exp().ln_1p(),
        Activation::Elu { alpha } if v <= 0.0 => alpha * v.exp_m1(),
        Activation::LeakyRelu { slope } if v <= 0.0 => slope * v,
        Activation::Relu if v <= 0.0 => 0.0,
        _ => v,
    };
    // Closed forms of the change in f64 where g's values cancel (their f64 round-off ~1e-16
    // would otherwise swamp a change of 1e-12): the identities the engine uses, in f64.
    match act {
        Activation::Tanh => {
            let (t, td) = (z.tanh(), d.tanh());
            td / (z.cosh() * z.cosh()) / (1.0 + t * td)
        }
        Activation::Sigmoid => sig(z + d) * sig(-z) * -(-d).exp_m1(),
        Activation::Softplus => (sig(z) * d.exp_m1()).ln_1p(),
        Activation::Elu { alpha } if z <= 0.0 && z + d <= 0.0 => alpha * z.exp() * d.exp_m1(),
        _ => g(z + d) - g(z),
    }
}

/// Units of rounding (u = 2⁻²⁴) between the f32 change and its f64 reference, relative to the
/// change.
fn ulps_off(act: Activation, z: f32, d: f32, given: bool) -> Option<f64> {
    let a = act.value(z);
    let ours = if given {
        // The slope formed in f64 and rounded once, as the check gives it.
        let slope = (z as f64).cosh().powi(-2) as f32;
        act.change_from(z, a, slope, d)? as f64
    } else {
        act.change(z, a, d)? as f64
    };
    let want = reference(act, z, d);
    if want == 0.0 {
        return Some(if ours == 0.0 { 0.0 } else { f64::INFINITY });
    }
    Some((ours - want).abs() / want.abs() / (f32::EPSILON as f64 / 2.0))
}

// Each change within its stated relative error (`change_ulps`) of libm's in f64, over a grid of
// z from −30 to 30 (large |z| included: tanh's 1 − t² falls to 1e-26 there), d from ±1e-7 to ±2
// — and the largest seen is reported.
#[test]
fn each_change_is_within_its_ulps_of_libm() {
    let zs: Vec<f32> = (-300..=300).map(|k| k as f32 * 0.1).collect();
    let mut ds = Vec::new();
    for e in -7..=0 {
        for m in [1.0f32, 2.0, 5.0] {
            ds.push(m * 10f32.powi(e));
            ds.push(-m * 10f32.powi(e));
        }
    }
    for act in [
        Activation::Tanh,
        Activation::Sigmoid,
        Activation::Softplus,
        Activation::Elu { alpha: 1.5 },
        Activation::LeakyRelu { slope: 0.1 },
        Activation::Relu,
        Activation::Identity,
    ] {
        let stated = act.change_ulps().expect("a difference form");
        let (mut worst, mut answered) = (0.0f64, 0usize);
        for &z in &zs {
            for &d in &ds {
                for off in [
                    ulps_off(act, z, d, false),
                    ulps_off(act, z, d, act == Activation::Tanh),
                ]
                .into_iter()
                .flatten()
                {
                    answered += 1;
                    assert!(
                        off <= stated,
                        "{act}: z = {z}, d = {d}: {off:.1} ulp off (stated {stated})"
                    );
                    worst = worst.max(off);
                }
            }
        }
        assert!(
            answered > zs.len() * ds.len() / 2,
            "{act}: {answered} answered"
        );
        eprintln!("{act}: largest {worst:.2} u of the change (stated {stated})");
    }
    // Without a difference form: gelu, and a change across a kink.
    assert!(Activation::Gelu.change(0.5f32, 0.4, 1e-3).is_none());
    assert!(Activation::Relu.change(1e-3f32, 1e-3, -2e-3).is_none());
}

/// A dense network of the given widths and hidden activation, loss and reduction, with L2 λ,
/// weights drawn by `init` times `scale`, and a synthetic batch of `samples`.
#[allow(clippy::too_many_arguments)]
fn network(
    widths: &[usize],
    act: Activation,
    loss: Loss,
    reduction: Reduction,
    l2: f64,
    scale: f64,
    samples: usize,
    seed: u64,
) -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let config = LossConfig {
        loss,
        reduction,
        l2,
        ..LossConfig::cross_entropy()
    };
    let output = match loss {
        Loss::CrossEntropy => Activation::Softmax,
        Loss::SquaredError => Activation::Identity,
    };
    let mut builder = GraphBuilder::new(Shape::Flat(widths[0]), config);
    for (i, &units) in widths[1..].iter().enumerate() {
        let a = if i + 2 == widths.len() { output } else { act };
        builder.push(None, a, |s| Dense::new(units, s)).unwrap();
    }
    let g = builder.finish().unwrap();
    let init = match act {
        Activation::Relu => Init::HeNormal,
        _ => Init::GlorotUniform,
    };
    let p: Vec<ArrayD<f64>> = init
        .graph_params(&g, &mut Rng::new(seed))
        .into_iter()
        .map(|t| t.mapv(|v| ((v * scale) as f32) as f64))
        .collect();
    let mut batch = Batch::graph_synthetic(&g, samples, seed);
    batch.x.mapv_inplace(|v| (v as f32) as f64);
    batch.y.mapv_inplace(|v| (v as f32) as f64);
    (g, p, batch)
}

/// Over `count` coordinates of every tensor at the f32 central step and twice it, both signs:
/// the largest |dJ_f32 − dJ_ref| / bound, and how many losses had a difference form.
fn worst_ratio(
    g: &Graph,
    p: &[ArrayD<f64>],
    b: &Batch,
    count: usize,
    respond: bool,
) -> (f64, usize, usize) {
    let p32: Vec<ArrayD<f32>> = p.iter().map(|t| t.mapv(|v| v as f32)).collect();
    let (x32, y32) = (b.x.mapv(|v| v as f32), b.y.mapv(|v| v as f32));
    let wide = g.forward(p, b.x.view());
    let mut diff =
        Difference::<f32>::new(g, &wide, x32.view(), b.y.view()).expect("a difference form");
    let mut rng = Rng::new(7);
    let mut picked = Vec::new();
    for (t, spec) in g.tensors().iter().enumerate() {
        let size: usize = spec.spec.shape.iter().product();
        for _ in 0..count {
            picked.push((t, rng.below(size)));
        }
    }
    if respond {
        diff.respond(g, y32.view(), &picked, 1);
    }
    let j0 = g.loss(p, b.x.view(), b.y.view());
    let (mut worst, mut answered, mut asked) = (0.0f64, 0usize, 0usize);
    for &(t, k) in &picked {
        let theta = p[t].as_slice().unwrap()[k];
        let h = (f32::EPSILON as f64).cbrt() * theta.abs().max(1.0);
        for d in [h, -h, 2.0 * h] {
            let d = d as f32;
            asked += 1;
            let moved = Moved {
                tensor: t,
                index: k,
                delta: d,
            };
            let ws = &mut Workspace::default();
            let Some(c) = diff.loss_change(ws, g, &p32, x32.view(), y32.view(), &moved) else {
                continue;
            };
            answered += 1;
            let mut q = p.to_vec();
            q[t].as_slice_mut().unwrap()[k] += d as f64;
            let j1 = g.loss(&q, b.x.view(), b.y.view());
            let want = j1 - j0;
            // The reference's own round-off: a few ε of each f64 loss (a loss of 1e4 has an
            // ulp of 2e-12, as large as some bounds here).
            let wide = 8.0 * f64::EPSILON * (j0.abs() + j1.abs());
            let off = (c.change as f64 - want).abs();
            assert!(
                off <= c.bound + wide,
                "({t}, {k}) at {d:e}: change {:e}, f64 {want:e}, off {off:e} > bound {:e}",
                c.change,
                c.bound
            );
            worst = worst.max(off / (c.bound + wide));
        }
    }
    (worst, answered, asked)
}

/// The networks both bound tests run: every covered activation, both losses, both reductions,
/// L2 on and off, Glorot weights and weights 4× larger (activation, loss, reduction, λ, scale).
fn cases() -> [(Activation, Loss, Reduction, f64, f64); 10] {
    [
        (
            Activation::Tanh,
            Loss::CrossEntropy,
            Reduction::Mean,
            1e-4,
            1.0,
        ),
        (
            Activation::Tanh,
            Loss::CrossEntropy,
            Reduction::Sum,
            0.0,
            4.0,
        ),
        (
            Activation::Sigmoid,
            Loss::CrossEntropy,
            Reduction::Mean,
            1e-3,
            1.0,
        ),
        (
            Activation::Sigmoid,
            Loss::SquaredError,
            Reduction::Sum,
            0.0,
            4.0,
        ),
        (
            Activation::Relu,
            Loss::CrossEntropy,
            Reduction::Mean,
            1e-4,
            1.0,
        ),
        (
            Activation::Relu,
            Loss::SquaredError,
            Reduction::Mean,
            0.0,
            4.0,
        ),
        (
            Activation::Softplus,
            Loss::CrossEntropy,
            Reduction::Sum,
            1e-4,
            1.0,
        ),
        (
            Activation::Softplus,
            Loss::SquaredError,
            Reduction::Mean,
            1e-3,
            4.0,
        ),
        (
            Activation::Tanh,
            Loss::SquaredError,
            Reduction::Mean,
            1e-4,
            1.0,
        ),
        (
            Activation::Elu { alpha: 1.0 },
            Loss::CrossEntropy,
            Reduction::Mean,
            0.0,
            1.0,
        ),
    ]
}

// The bound holds over thousands of coordinates on networks of every covered activation, both
// losses, both reductions, L2 on and off, Glorot weights and weights 4× larger, through the
// response (two dense layers above) and without it, at a batch of 16 and at 13 (the softmax's
// samples go in blocks of 8: 13 leaves a block partly filled).
#[test]
fn each_loss_change_is_within_its_bound() {
    let mut largest = 0.0f64;
    let cases = cases();
    for (i, &(act, loss, reduction, l2, scale)) in cases.iter().enumerate() {
        for (widths, respond, samples) in [
            (&[20usize, 16, 12, 5][..], true, 16),
            (&[12, 10, 8, 6, 4][..], false, 16),
            (&[20, 16, 12, 5][..], true, 13),
        ] {
            let seed = 3 + i as u64;
            let (g, p, b) = network(widths, act, loss, reduction, l2, scale, samples, seed);
            let (worst, answered, asked) = worst_ratio(&g, &p, &b, 60, respond);
            assert!(
                answered * 2 > asked,
                "{act} {loss:?}: {answered} of {asked} losses had a difference form"
            );
            eprintln!(
                "{act} {loss:?} {reduction:?} l2 {l2} ×{scale} {widths:?} batch {samples}: largest ratio {worst:.3}, {answered}/{asked}"
            );
            largest = largest.max(worst);
        }
    }
    eprintln!("largest |dJ_f32 − dJ_ref| / bound over every case: {largest:.3}");
}

/// Over `count` random unit directions (one over every tensor, then one per tensor, each
/// drawn from a normal and scaled to norm 1) at the f32 central step along them and twice it,
/// both signs: the largest |dJ_f32 − dJ_ref| / bound of `Difference::along_change`, and how
/// many steps had a difference form. The reference is the f64 loss at the f32 parameters
/// moved by d times v rounded to f32 (the step the form takes).
fn worst_direction_ratio(
    g: &Graph,
    p: &[ArrayD<f64>],
    b: &Batch,
    count: usize,
    seed: u64,
) -> (f64, usize, usize) {
    let p32: Vec<ArrayD<f32>> = p.iter().map(|t| t.mapv(|v| v as f32)).collect();
    let (x32, y32) = (b.x.mapv(|v| v as f32), b.y.mapv(|v| v as f32));
    let wide = g.forward(p, b.x.view());
    let diff = Difference::<f32>::new(g, &wide, x32.view(), b.y.view()).expect("a difference form");
    let sizes: Vec<usize> = g
        .tensors()
        .iter()
        .map(|t| t.spec.shape.iter().product())
        .collect();
    let mut rng = Rng::new(seed);
    let j0 = g.loss(p, b.x.view(), b.y.view());
    let (mut worst, mut answered, mut asked) = (0.0f64, 0usize, 0usize);
    for r in 0..count {
        for scope in std::iter::once(None).chain((0..sizes.len()).map(Some)) {
            let mut v: Vec<Vec<f64>> = sizes
                .iter()
                .enumerate()
                .map(|(t, &n)| {
                    if scope.is_none_or(|s| s == t) {
                        (0..n).map(|_| rng.normal()).collect()
                    } else {
                        Vec::new()
                    }
                })
                .collect();
            let norm = v.iter().flatten().map(|w| w * w).sum::<f64>().sqrt();
            v.iter_mut().flatten().for_each(|w| *w /= norm);
            let Some(along) = diff.along(g, &p32, x32.view(), &v) else {
                panic!("direction {r} over {scope:?}: no difference form");
            };
            let theta = p
                .iter()
                .enumerate()
                .filter(|(t, _)| scope.is_none_or(|s| s == *t))
                .flat_map(|(_, t)| t.iter())
                .fold(0.0f64, |m, w| m.max(w.abs()));
            let h = (f32::EPSILON as f64).cbrt() * theta.max(1.0);
            for d in [h, -h, 2.0 * h] {
                let d = d as f32;
                asked += 1;
                let Some(c) = diff.along_change(g, &p32, y32.view(), &along, d) else {
                    continue;
                };
                answered += 1;
                let q: Vec<ArrayD<f64>> = p
                    .iter()
                    .zip(&v)
                    .map(|(t, vt)| {
                        let mut t = t.clone();
                        for (w, &s) in t.iter_mut().zip(vt) {
                            *w += d as f64 * ((s as f32) as f64);
                        }
                        t
                    })
                    .collect();
                let j1 = g.loss(&q, b.x.view(), b.y.view());
                let want = j1 - j0;
                let wide = 8.0 * f64::EPSILON * (j0.abs() + j1.abs());
                let off = (c.change - want).abs();
                assert!(
                    off <= c.bound + wide,
                    "direction {r} over {scope:?} at {d:e}: change {:e}, f64 {want:e}, off {off:e} > bound {:e}",
                    c.change,
                    c.bound
                );
                worst = worst.max(off / (c.bound + wide));
            }
        }
    }
    (worst, answered, asked)
}

// The direction form's bound holds over random directions, over every tensor and over each
// one alone, on networks of every covered activation, both losses, both reductions, L2 on and
// off, Glorot weights and weights 4× larger (the same cases as the one-entry form's).
#[test]
fn each_direction_change_is_within_its_bound() {
    let cases = cases();
    let mut largest = 0.0f64;
    for (i, &(act, loss, reduction, l2, scale)) in cases.iter().enumerate() {
        for widths in [&[20usize, 16, 12, 5][..], &[12, 10, 8, 6, 4][..]] {
            let (g, p, b) = network(widths, act, loss, reduction, l2, scale, 16, 3 + i as u64);
            let (worst, answered, asked) = worst_direction_ratio(&g, &p, &b, 6, 11 + i as u64);
            // A direction over a relu layer moves many units at once: some steps cross a kink
            // and have no form, but most do not.
            assert!(
                answered * 2 > asked,
                "{act} {loss:?}: {answered} of {asked} steps had a difference form"
            );
            eprintln!(
                "{act} {loss:?} {reduction:?} l2 {l2} ×{scale} {widths:?}: largest ratio {worst:.3}, {answered}/{asked}"
            );
            largest = largest.max(worst);
        }
    }
    eprintln!("largest |dJ_f32 − dJ_ref| / bound along directions: {largest:.3}");
}
