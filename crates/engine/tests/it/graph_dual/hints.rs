//! The incremental hints checked against the full forward pass, in f64 and f32 (the tests are
//! with their kinds: conv.rs, dense.rs, storage.rs).

use ndarray::{Array2, ArrayD};
use plumb_engine::Rng;
use plumb_engine::graph::{Graph, LayerScalar, Moved};

use crate::graph_common::{random_params, random_x, random_y};

/// The incremental hints ([`Graph::forward_moved`], [`Graph::loss_moved`]) against the full
/// forward pass at the moved parameters, entry by entry, in scalar S (ε its machine epsilon).
///
/// At the moved layer: a dense layer's other units keep the base's values and must equal the
/// full pass bit for bit; the moved unit's values are the base's rounded sum plus δ·a where the
/// full pass sums again, so the two may differ by both sums' rounding; a conv layer's moved
/// out-channel likewise (the base's sum plus δ times the input under the moved tap), its
/// other channels bit for bit. The bound
/// for a sum of n products and a bias (Higham, *Accuracy and Stability of Numerical Algorithms*,
/// 2nd ed., §3.1) is γ(n+1) · (Σ|w||a| + |b|), γ(k) = k·u / (1 − k·u), u = ε/2; with the update's
/// own rounding the test allows γ(n+1) · (S_base + S_moved) + u · (|δ|·max|a| + |z|), S being
/// the layer's forward pass over |W|, |b| and |a|. Kinds without a hint are recomputed with the
/// entry moved: the same arithmetic, so bit for bit. The loss: bit for bit where nothing differs
/// (no hint, no L2 term, no conv above that may update by a changed in-channel); otherwise
/// within 64 · (n + 1) · ε · max(|J|, 1), n the largest fan-in — the moved unit's rounding
/// difference carried to the loss by the layers above (factors of order 1 in these nets), and
/// the L2 sum's one-entry update.
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
                match tail.settled {
                    None => assert_eq!(tail.steps.len(), g.nodes().len() - j),
                    // Stopped where the change died out: the last layer recomputed gives the
                    // base's output again, bit for bit.
                    Some(_) => {
                        let i = tail.outputs.len() - 1;
                        assert!(i + 1 < g.nodes().len() - j, "{what}: settled at the output");
                        let same = tail.outputs[i]
                            .iter()
                            .zip(&base.outputs[j + i])
                            .all(|(a, b)| a.same_bits(*b));
                        assert!(
                            same,
                            "{what}: settled at layer {} but not the base's",
                            j + i
                        );
                    }
                }
                let (zi, zf) = (&tail.steps[0].out, &full.steps[j].out);
                let at = |e: usize| format!("{what}: {}[{k}] δ {d}, entry {e}", spec.name);
                let kind = node.layer.kind();
                let hinted = matches!(kind, "dense" | "conv1d" | "conv2d");
                if hinted {
                    // The moved unit's columns: r at every step.
                    let shape = &g.tensors()[own.start].spec.shape;
                    let channels = shape[0];
                    let unit = if t == own.start {
                        k / shape[1..].iter().product::<usize>()
                    } else {
                        k
                    };
                    // Dense: unit r is every `channels`-th column; conv: out-channel o is the
                    // o-th run of positions.
                    let positions = zi.ncols() / channels;
                    let in_unit = |c: usize| match kind {
                        "dense" => c % channels == unit,
                        _ => c / positions == unit,
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
                // A conv above may update by the one in-channel that changed (graph_tails.rs).
                let conv_above = g.nodes()[j + 1..]
                    .iter()
                    .any(|n| n.layer.kind().starts_with("conv"));
                if !hinted && !conv_above && g.loss_config().l2 == 0.0 {
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

pub(super) fn hints_agree_both(g: &Graph, seed: u64, what: &str) {
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
