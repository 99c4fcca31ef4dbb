//! A dense layer above a moved entry ([`Graph::forward_moved`]): its input changed in one unit
//! (the moved layer's hint names it), so it adds that unit's change times the unit's column of
//! its weight to the base output instead of recomputing the product
//! ([`Layer::forward_units`](plumb_engine::graph::Layer::forward_units), a rank-one update), where
//! its fan-in is at least 8 units per changed one. Random dense stacks (every hidden activation,
//! relu among them; softmax, sigmoid and linear outputs; flat inputs and per-step layers on
//! sequences; weights drawn as the augmented matrix or transposed, as files store them), f64 and
//! f32.
//!
//! The bound at the updated layer (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd
//! ed., §3.1: a sum of n products and a bias is within γ(n+1) · (Σ|w||a| + |b|) of exact,
//! γ(k) = k·u / (1 − k·u), u = ε/2): the base's sum is within γ(n+1) · S_base of exact, the
//! update's product and addition round once each (u·|d·w|, twice for d's own subtraction, and
//! u·|z|), and the full pass it is compared with is within γ(n+1) · S_moved; S is the layer's
//! forward pass over |W|, |b| and |input|. Below 8 units per change the layer is recomputed:
//! bit for bit the full pass. Samples whose input unit did not move keep the base's bits.

use ndarray::{Array2, ArrayD, Ix2};
use plumb_engine::graph::{
    Dense, Graph, GraphBuilder, L2Divisor, LayerScalar, LossConfig, Moved, Reduction, Shape,
    Storage, Workspace,
};
use plumb_engine::{Activation, Loss, Rng};

use crate::common::HIDDEN;
use crate::graph_common::{random_x, random_y};

/// A random dense stack: 2–3 hidden layers 4 to 20 wide (one of them sometimes 3: the layer above
/// reads fewer than 8 units and recomputes), an output layer fitting a random loss.
fn stack(seed: u64, rng: &mut Rng) -> Graph {
    let input = if seed % 3 == 2 {
        Shape::Sequence {
            steps: 2 + rng.below(2),
            width: 4 + rng.below(9),
        }
    } else {
        Shape::Flat(4 + rng.below(20))
    };
    let (loss, out) = match seed % 3 {
        0 => (Loss::CrossEntropy, Activation::Softmax),
        1 => (Loss::SquaredError, HIDDEN[seed as usize % HIDDEN.len()]),
        _ => (Loss::CrossEntropy, Activation::Sigmoid),
    };
    let config = LossConfig {
        loss,
        reduction: [Reduction::Mean, Reduction::Sum][rng.below(2)],
        l2: [0.0, 0.3][rng.below(2)],
        l2_divisor: L2Divisor::TwoM,
        l2_on_bias: rng.below(2) == 0,
    };
    let mut b = GraphBuilder::new(input, config);
    let hidden = 2 + rng.below(2);
    let narrow = rng.below(hidden + 1);
    for l in 0..hidden {
        let units = if l == narrow { 3 } else { 4 + rng.below(17) };
        let act = HIDDEN[(seed as usize + l) % HIDDEN.len()];
        b.push(None, act, |s| Dense::new(units, s)).unwrap();
    }
    let units = if out == Activation::Softmax { 3 } else { 2 };
    b.push(None, out, |s| Dense::new(units, s)).unwrap();
    b.finish().unwrap()
}

/// Parameters drawn as a file holds them: the augmented matrix [b, W] (`Dense::split`), or W
/// transposed (`split-transposed`, storage `io` of `oi`) and b.
fn drawn(g: &Graph, seed: u64, rng: &mut Rng) -> Vec<ArrayD<f64>> {
    let mut params = Vec::new();
    for node in g.nodes() {
        let shape = &g.tensors()[node.tensors().start].spec.shape;
        let (units, fan_in) = (shape[0], shape[1]);
        let sd = 1.0 / (fan_in as f64).sqrt();
        if seed.is_multiple_of(2) {
            let aug = Array2::from_shape_fn((units, fan_in + 1), |(_, c)| {
                let spread = if c == 0 { 0.2 } else { sd };
                spread * rng.normal()
            });
            let (w, b) = Dense::split(&aug);
            params.extend([w.into_dyn(), b.into_dyn()]);
        } else {
            let file = Array2::from_shape_fn((fan_in, units), |_| sd * rng.normal());
            let io = Storage::parse("io", "oi").unwrap();
            let b = Array2::from_shape_fn((1, units), |_| 0.2 * rng.normal());
            params.push(io.to_canonical(&file.into_dyn()));
            params.push(b.into_shape_with_order(units).unwrap().into_dyn());
        }
    }
    g.check_params(&params).unwrap();
    params
}

fn abs<S: LayerScalar>(a: &ArrayD<S>) -> ArrayD<S> {
    a.mapv(|v| S::from_f64(v.re().abs()))
}

/// (layers updated, layers recomputed) over the entries moved.
fn units_agree<S: LayerScalar>(g: &Graph, seed: u64, eps: f64, what: &str) -> (usize, usize) {
    let mut rng = Rng::new(seed ^ 0x5eed);
    let m = 2 + rng.below(4);
    let params = drawn(g, seed, &mut rng);
    let (x, y) = (random_x(g, m, &mut rng), random_y(g, m, &mut rng));
    let p: Vec<ArrayD<S>> = params.iter().map(|t| t.mapv(S::from_f64)).collect();
    let (x, y) = (x.mapv(S::from_f64), y.mapv(S::from_f64));
    let base = g.forward(&p, x.view());
    let l2 = g.l2_sum(&p);
    let u = eps / 2.0;
    let gamma = |n: usize| (n + 1) as f64 * u / (1.0 - (n + 1) as f64 * u);
    let n_max = g.tensors().iter().map(|t| t.spec.fan_in).max().unwrap();
    let (mut updated, mut recomputed) = (0, 0);
    // One workspace for every loss below, as a check's thread reuses it.
    let mut ws = Workspace::new();
    for (t, spec) in g.tensors().iter().enumerate() {
        let j = spec.layer;
        let size = p[t].len();
        let entries: Vec<usize> = if size <= 16 {
            (0..size).collect()
        } else {
            (0..10).map(|i| i * (size - 1) / 9).collect()
        };
        for k in entries {
            for d in [0.37, -1e-3] {
                let delta = S::from_f64(d);
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta,
                };
                let at = format!("{what}: {}[{k}] δ {d}", spec.name);
                let tail = g.forward_moved(&p, x.view(), &base, &moved);
                let li = g.loss_moved(&p, &tail, y.view(), l2, &moved);
                // Leaving out an output softmax the loss does not read changes nothing.
                let (lm, _) = g.moved_loss(&p, x.view(), &base, y.view(), l2, &moved);
                assert_eq!(li.re().to_bits(), lm.re().to_bits(), "{at}: moved_loss");
                // In a reused workspace: the same bits, and the same kink verdict as the whole
                // tail's (the moved layer's changed unit alone where its output is not built).
                let lw = g.moved_loss_in(&mut ws, &p, x.view(), &base, y.view(), l2, &moved);
                assert_eq!(li.re().to_bits(), lw.re().to_bits(), "{at}: moved_loss_in");
                let lean = ws.tail().unwrap();
                assert_eq!(
                    g.tail_crossed(&base, lean),
                    g.tail_crossed(&base, &tail),
                    "{at}: crossed"
                );

                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[k] += delta;
                let lf = g.loss_of(&q, &g.forward(&q, x.view()), y.view()).re();
                let tol = 64.0 * (n_max + 1) as f64 * eps * lf.abs().max(1.0);
                let li = li.re();
                assert!(
                    (li - lf).abs() <= tol,
                    "{at}: loss {li} vs {lf} (tol {tol:e})"
                );

                // The layer above the moved one, against its full product on the same input.
                if j + 1 == g.nodes().len() || tail.steps.len() < 2 {
                    continue;
                }
                let above = &g.nodes()[j + 1];
                let own = &p[above.tensors()];
                let layer = S::layer(above.layer.as_ref());
                let (input, was) = (&tail.outputs[0], &base.outputs[j]);
                let reference = layer.forward(own, input.view(), None).out;
                let got = &tail.steps[1].out;
                let w = own[0].view().into_dimensionality::<Ix2>().unwrap();
                let fan_in = w.ncols();
                let unit = g.nodes()[j]
                    .layer
                    .moved_channel(t - g.nodes()[j].tensors().start, k);
                let unit = unit.expect("a dense hint names its unit");
                if fan_in < 8 {
                    let same = got.iter().zip(&reference).all(|(a, b)| a.same_bits(*b));
                    assert!(same, "{at}: fan-in {fan_in} is recomputed, bit for bit");
                    recomputed += 1;
                    continue;
                }
                updated += 1;
                let own_abs: Vec<ArrayD<S>> = own.iter().map(abs).collect();
                let magnitude = |a: &Array2<S>| {
                    let a = abs(&a.clone().into_dyn())
                        .into_dimensionality::<Ix2>()
                        .unwrap();
                    layer.forward(&own_abs, a.view(), None).out
                };
                let (sb, sm) = (magnitude(was), magnitude(input));
                // One row per sample and step: a unit per column.
                let per_row = |a: &Array2<S>, width: usize| {
                    a.clone()
                        .into_shape_with_order((a.len() / width, width))
                        .unwrap()
                };
                let units = w.nrows();
                let rows = |a: &Array2<S>| per_row(a, units);
                let (got, reference, sb, sm) = (rows(got), rows(&reference), rows(&sb), rows(&sm));
                let base_z = rows(&base.steps[j + 1].out);
                let (now, before) = (per_row(input, fan_in), per_row(was, fan_in));
                for i in 0..got.nrows() {
                    let (a1, a0) = (now[[i, unit]], before[[i, unit]]);
                    let dz = (a1 - a0).re().abs();
                    for o in 0..units {
                        let (v, r) = (got[[i, o]], reference[[i, o]]);
                        if a1.same_bits(a0) {
                            assert!(v.same_bits(base_z[[i, o]]), "{at}: row {i} did not move");
                            continue;
                        }
                        let bound = gamma(fan_in) * (sb[[i, o]].re() + sm[[i, o]].re())
                            + 3.0 * u * dz * w[[o, unit]].re().abs()
                            + 2.0 * u * v.re().abs();
                        let e = (v.re() - r.re()).abs();
                        assert!(e <= bound, "{at}: row {i} unit {o}: {e:e} > {bound:e}");
                    }
                }
            }
        }
    }
    (updated, recomputed)
}

#[test]
fn a_dense_layer_above_a_moved_entry_updates_by_the_unit_that_changed() {
    let (mut updated, mut recomputed) = (0, 0);
    for seed in 0..15u64 {
        let mut rng = Rng::new(4100 + seed);
        let g = stack(seed, &mut rng);
        for (u, r) in [
            units_agree::<f64>(&g, seed, f64::EPSILON, &format!("seed {seed} f64")),
            units_agree::<f32>(&g, seed, f32::EPSILON as f64, &format!("seed {seed} f32")),
        ] {
            updated += u;
            recomputed += r;
        }
    }
    // Both paths taken: updates, and layers of too small a fan-in recomputed.
    assert!(
        updated > 100 && recomputed > 10,
        "{updated} updated, {recomputed} recomputed"
    );
}
