//! A direction's shared change of z in f32 (`Graph::along_change`, `Graph::forward_along`: the
//! lowest moved layer's z taken as z(θ) + t·z_v instead of a pass at θ + t·v), against whole
//! passes: the loss at each step, and the difference of the ±t pair an estimate divides, within
//! the round-off the check assumes per loss ([`loss_noise`]) of a whole f64 pass at the same
//! parameters. Steps from the central difference's default h to 64h (the f32 ladder's reach),
//! one direction over all tensors and one per layer over its tensors alone, so that each
//! kind that shares its change — conv, dense, batch, layer and rms norm — is the lowest moved
//! layer of some direction; networks with an L2 term (on biases too, in `norms`), whose change
//! is summed over the moved entries as the check sums it (crates/fd/src/graph_check.rs,
//! `perturbed_along`). graph_fast.rs holds the f64 side against the plain path's verdicts.

use ndarray::{Array2, ArrayD};
use plumb_engine::Rng;
use plumb_engine::graph::{Graph, Moving, Trace};
use plumb_fd::{Method, graph_loss_magnitude, loss_noise};

use crate::graph_common::{self, Case};

/// Unit directions from `seed`: one over every tensor, then one per layer with tensors.
fn directions(g: &Graph, seed: u64) -> Vec<Vec<Vec<f64>>> {
    let mut rng = Rng::new(seed);
    let mut scopes = vec![None];
    scopes.extend(
        (0..g.nodes().len())
            .filter(|&j| !g.nodes()[j].tensors().is_empty())
            .map(Some),
    );
    scopes
        .into_iter()
        .map(|scope| {
            let v: Vec<Vec<f64>> = g
                .tensors()
                .iter()
                .map(|spec| {
                    let on = scope.is_none_or(|j| spec.layer == j);
                    let n = spec.spec.shape.iter().product::<usize>();
                    (0..n)
                        .map(|_| if on { rng.normal() } else { 0.0 })
                        .collect()
                })
                .collect();
            let norm = v.iter().flatten().map(|w| w * w).sum::<f64>().sqrt();
            v.into_iter()
                .map(|t| t.into_iter().map(|w| w / norm).collect())
                .collect()
        })
        .collect()
}

/// A case in f32 (its parameters and batch rounded to f32), the same values in f64 (exact), the
/// f32 base pass, and the round-off the check assumes per f32 loss there ([`loss_noise`]).
struct F32Base {
    p: Vec<ArrayD<f32>>,
    p64: Vec<ArrayD<f64>>,
    x: Array2<f32>,
    y: Array2<f32>,
    x64: Array2<f64>,
    y64: Array2<f64>,
    base: Trace<f32>,
    eps: f64,
    noise: f64,
    l2: f32,
}

impl F32Base {
    fn of(c: &Case) -> F32Base {
        let g = &c.graph;
        let p: Vec<ArrayD<f32>> = c.params.iter().map(|t| t.mapv(|v| v as f32)).collect();
        let p64: Vec<ArrayD<f64>> = p.iter().map(|t| t.mapv(f64::from)).collect();
        let (x, y) = (c.x.mapv(|v| v as f32), c.y.mapv(|v| v as f32));
        let (x64, y64) = (x.mapv(f64::from), y.mapv(f64::from));
        let base = g.forward(&p, x.view());
        let base64 = g.forward(&p64, x64.view());
        let f0 = f64::from(g.loss_of(&p, &base, y.view()));
        let eps = f64::from(f32::EPSILON);
        let noise = loss_noise(eps, f0, graph_loss_magnitude(g, &p64, &base64, &y64));
        let l2 = g.l2_sum(&p);
        F32Base {
            p,
            p64,
            x,
            y,
            x64,
            y64,
            base,
            eps,
            noise,
            l2,
        }
    }
}

/// The largest error of the shared change's losses and of their ±t differences, in units of
/// the assumed per-loss round-off, and the kinds that were a direction's lowest moved layer.
fn worst_errors(what: &str, c: &Case, seed: u64) -> (f64, f64, Vec<&'static str>) {
    let g = &c.graph;
    let F32Base {
        p,
        p64,
        x,
        y,
        x64,
        y64,
        base,
        eps,
        noise,
        l2,
    } = F32Base::of(c);
    let theta = p64.iter().flatten().fold(0.0f64, |m, v| m.max(v.abs()));
    let h = Method::Central.default_step(theta, eps);
    let (mut per_loss, mut per_difference, mut kinds) = (0.0f64, 0.0f64, Vec::new());
    for v in directions(g, seed) {
        let moves = |t: usize| v[t].iter().any(|w| *w != 0.0);
        let from = g.tensors()[(0..v.len()).find(|&t| moves(t)).unwrap()].layer;
        let node = &g.nodes()[from];
        let vt: Vec<ArrayD<f32>> = node
            .tensors()
            .map(|t| {
                let mut a = p[t].mapv(|_| 0.0f32);
                for (s, &w) in a.iter_mut().zip(&v[t]) {
                    *s = w as f32;
                }
                a
            })
            .collect();
        let change = g
            .along_change(x.view(), &base, from, &vt)
            .unwrap_or_else(|| panic!("{what}: {} shares its change", node.layer.kind()));
        kinds.push(node.layer.kind());
        // The loss at step t through the shared change (the moved layers above as the check
        // moves them, the L2 term's change summed over the moved entries), and a whole f64
        // pass at the same parameters: θ in f32, plus t·v.
        let at = |t: f64| -> (f64, f64) {
            let mut l2_change = 0.0f32;
            let mut moving = |j: usize, own: &[ArrayD<f32>]| -> Option<Vec<ArrayD<f32>>> {
                let tensors = g.nodes()[j].tensors();
                if !tensors.clone().any(moves) {
                    return None;
                }
                let mut copy = own.to_vec();
                for (t_, q) in tensors.zip(copy.iter_mut()) {
                    for (value, &w) in q.as_slice_mut().unwrap().iter_mut().zip(&v[t_]) {
                        if w != 0.0 {
                            let was = *value;
                            *value += (t * w) as f32;
                            if g.decays(t_) {
                                l2_change += (*value - was) * (*value + was);
                            }
                        }
                    }
                }
                Some(copy)
            };
            let moving: &mut Moving<'_, f32> = &mut moving;
            let tail = g.forward_along(&p, x.view(), &base, from, &change, t as f32, moving);
            let shared = f64::from(g.loss_from_sum(&tail, y.view(), l2 + l2_change));
            let mut q = p64.clone();
            for (qt, vt) in q.iter_mut().zip(&v) {
                for (value, &w) in qt.iter_mut().zip(vt) {
                    *value += t * w;
                }
            }
            (shared, g.loss(&q, x64.view(), y64.view()))
        };
        for k in [1.0, 2.0, 8.0, 64.0] {
            let ((sp, ep), (sm, em)) = (at(k * h), at(-k * h));
            per_loss = per_loss.max((sp - ep).abs().max((sm - em).abs()) / noise);
            per_difference = per_difference.max(((sp - sm) - (ep - em)).abs() / noise);
        }
    }
    (per_loss, per_difference, kinds)
}

#[test]
fn a_directions_shared_change_in_f32_errs_within_the_checks_round_off() {
    let cases = [
        ("pump-cnn", graph_common::demo_cnn()),
        ("norms", graph_common::case(graph_common::norms(), 6, 3)),
        (
            "batch-norm",
            graph_common::case(graph_common::batch_norm(), 6, 3),
        ),
        ("conv2d", graph_common::case(graph_common::conv2d(), 6, 5)),
    ];
    let mut kinds = Vec::new();
    for (what, c) in &cases {
        for seed in 0..3 {
            let (per_loss, per_difference, seen) = worst_errors(what, c, seed);
            // Each loss within the round-off assumed for it; a difference of two within two.
            assert!(
                per_loss <= 1.0,
                "{what}, seed {seed}: a loss off by {per_loss} noises"
            );
            assert!(
                per_difference <= 2.0,
                "{what}, seed {seed}: a difference off by {per_difference} noises"
            );
            kinds.extend(seen);
        }
    }
    for kind in [
        "conv1d",
        "conv2d",
        "dense",
        "batch-norm",
        "layer-norm",
        "rms-norm",
    ] {
        assert!(
            kinds.contains(&kind),
            "{kind} is some direction's lowest moved layer"
        );
    }
}

/// The largest error, in units of the assumed per-loss round-off, of a moved conv entry's loss
/// in f32 through the incremental hint (`Graph::moved_loss`: the moved out-channel taken as the
/// base's z plus δ times the input under the entry's tap) and of a whole f32 pass at the moved
/// parameters, both against a whole f64 pass at the same parameters (θ in f32 plus δ, exact in
/// f64); and the largest error of a ±δ pair's difference through the hint.
fn moved_conv_errors(c: &Case) -> (f64, f64, f64, usize) {
    use plumb_engine::graph::Moved;
    let g = &c.graph;
    let F32Base {
        p,
        p64,
        x,
        y,
        x64,
        y64,
        base,
        eps,
        noise,
        l2,
    } = F32Base::of(c);
    let (mut hinted, mut whole, mut pair, mut entries) = (0.0f64, 0.0f64, 0.0f64, 0);
    for (t, spec) in g.tensors().iter().enumerate() {
        if !g.nodes()[spec.layer].layer.kind().starts_with("conv") {
            continue;
        }
        for k in 0..p[t].len() {
            entries += 1;
            let theta = f64::from(p[t].as_slice().unwrap()[k]);
            let h = Method::Central.default_step(theta, eps);
            let at = |d: f32| -> (f64, f64, f64) {
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta: d,
                };
                let (li, _) = g.moved_loss(&p, x.view(), &base, y.view(), l2, &moved);
                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[k] += d;
                let lw = g.loss(&q, x.view(), y.view());
                let mut q64 = p64.clone();
                q64[t].as_slice_mut().unwrap()[k] += f64::from(d);
                (
                    f64::from(li),
                    f64::from(lw),
                    g.loss(&q64, x64.view(), y64.view()),
                )
            };
            for s in [1.0, 2.0, 8.0, 64.0] {
                let d = (s * h) as f32;
                let ((ip, wp, ep), (im, wm, em)) = (at(d), at(-d));
                hinted = hinted.max((ip - ep).abs().max((im - em).abs()) / noise);
                whole = whole.max((wp - ep).abs().max((wm - em).abs()) / noise);
                pair = pair.max(((ip - im) - (ep - em)).abs() / noise);
            }
        }
    }
    (hinted, whole, pair, entries)
}

/// A moved conv entry's loss in f32 through the incremental hint errs within the round-off the
/// check assumes per loss ([`loss_noise`]) of a whole f64 pass at the same parameters, and a
/// ±δ pair's difference within two, on the demo CNN (conv1d, residual block) and a conv2d
/// network, steps from the central difference's default h to 64h.
#[test]
fn a_moved_conv_entry_in_f32_errs_within_the_checks_round_off() {
    for (what, c) in [
        ("pump-cnn", graph_common::demo_cnn()),
        ("conv1d", graph_common::case(graph_common::conv1d(), 6, 5)),
        ("conv2d", graph_common::case(graph_common::conv2d(), 6, 5)),
    ] {
        let (hinted, whole, pair, entries) = moved_conv_errors(&c);
        eprintln!(
            "{what}: {entries} entries, hinted {hinted:.3}, whole f32 pass {whole:.3}, pairs {pair:.3} noises"
        );
        assert!(entries > 0, "{what}: conv entries moved");
        assert!(hinted <= 1.0, "{what}: a loss off by {hinted} noises");
        assert!(pair <= 2.0, "{what}: a difference off by {pair} noises");
    }
}
