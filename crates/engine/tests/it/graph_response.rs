//! The response of two dense layers above a moved entry ([`Response`], crates/engine/src/graph/
//! response.rs): the loss of a one-entry move of dense layer L through Taylor coefficients of
//! L+1's activation, used by the check only when its stated bound is far below the loss's
//! round-off.
//!
//! - The slopes σ⁽ᵏ⁾/k! it forms from an activation's value, against num-dual's third-order
//!   duals (`third_derivative`), and the largest |σ⁗| it assumes against num-dual's fourth
//!   derivative (a third-order dual over a first-order one) on a fine grid: an upper bound, and
//!   within 1% of the largest value seen (the figure is the maximum, not a guess).
//! - Its loss against a whole forward pass at the moved parameters (`Graph::loss`), over every
//!   entry of the first layer of random tanh, sigmoid and identity stacks at steps from the
//!   check's default to 0.3: within its stated bound plus the whole pass's rounding
//!   (64·(n + 1)·ε·max(|J|, 1), the allowance graph_units.rs takes for a dense update); at the
//!   larger steps the bound is what is tested, and it is not vacuous (dropping the cubic term's
//!   sign fails it at a step of 1e-3).
//! - The same in f32 at the f32 ladder's rungs (h to 32h), against f32 whole passes.
//! - With the check's limit, the default step goes through the response and a large one does
//!   not (the caller then takes the plain path).
//! - The limit is inclusive: a limit equal to a loss's returned bound answers, the next f64
//!   below it declines (the contract of `Response::loss_in`: its bound at most the limit).
//! - A kinked first layer: the response's side test against `Graph::tail_crossed` of the plain
//!   path's tail, every entry and step.
//! - No response where its coefficients would pass its memory budget.

use ndarray::ArrayD;
use num_dual::{Dual64, DualNum, third_derivative};
use plumb_engine::graph::{
    Graph, MOST_VALUES, Moved, Reduction, Response, Workspace, fourth_bound, slope_bounds, slopes,
};
use plumb_engine::{Activation, Loss, Rng};

use crate::common::dense_with;
use crate::graph_common::{random_params, random_x, random_y};

const ACTIVATIONS: [Activation; 3] = [Activation::Tanh, Activation::Sigmoid, Activation::Identity];

/// The activation as num-dual evaluates it (its own tanh and exp).
fn reference<D: DualNum<Primitive = f64>>(act: Activation, x: D) -> D {
    match act {
        Activation::Tanh => x.tanh(),
        Activation::Sigmoid => ((-x).exp() + D::from(1.0)).recip(),
        _ => x,
    }
}

#[test]
fn the_taylor_slopes_are_num_duals_derivatives_and_the_fourth_is_bounded() {
    for act in ACTIVATIONS {
        let mut fourth = 0.0f64;
        let mut most = [0.0f64; 3];
        for i in -8000..=8000 {
            let z = i as f64 * 1e-3;
            let got = slopes(act, act.value(z));
            let (_, d1, d2, d3) = third_derivative(|x| reference(act, x), Dual64::new(z, 1.0));
            let want = [d1.re, d2.re / 2.0, d3.re / 6.0];
            for k in 0..3 {
                assert!(
                    (got[k] - want[k]).abs() <= 1e-14,
                    "{act:?} at {z}: slope {} is {} against num-dual's {}",
                    k + 1,
                    got[k],
                    want[k]
                );
            }
            for k in 0..3 {
                most[k] = most[k].max(want[k].abs());
            }
            // σ‴ as a dual number: its derivative part is σ⁗.
            fourth = fourth.max(d3.eps.abs());
        }
        // The largest |σ⁽ᵏ⁾|/k! the round-off terms take: upper bounds, within 1% of num-dual's.
        let bounds = slope_bounds(act).unwrap();
        for k in 0..3 {
            assert!(
                most[k] <= bounds[k] && bounds[k] <= (most[k] * 1.01).max(0.0),
                "{act:?}: |σ⁽{}⁾|/{}! reaches {} against the bound {}",
                k + 1,
                k + 1,
                most[k],
                bounds[k]
            );
        }
        let bound = fourth_bound(act).unwrap();
        assert!(fourth <= bound, "{act:?}: |σ⁗| reaches {fourth} > {bound}");
        assert!(
            bound <= (fourth * 1.01).max(1e-300) || fourth == 0.0 && bound == 0.0,
            "{act:?}: the bound {bound} is far above the largest |σ⁗| seen, {fourth}"
        );
    }
    assert_eq!(fourth_bound(Activation::Relu), Some(0.0));
    assert_eq!(fourth_bound(Activation::Gelu), None);
}

/// A random stack inputs → first (activation `low`) → mid (`act`) → outputs, softmax and
/// cross-entropy, mean or sum, with or without L2.
fn stack(rng: &mut Rng, low: Activation, act: Activation) -> Graph {
    let inputs = 4 + rng.below(9);
    let first = 3 + rng.below(10);
    let mid = 4 + rng.below(17);
    let outputs = 2 + rng.below(4);
    let config = plumb_engine::graph::LossConfig {
        loss: Loss::CrossEntropy,
        reduction: if rng.below(2) == 0 {
            Reduction::Mean
        } else {
            Reduction::Sum
        },
        l2: [0.0, 0.05][rng.below(2)],
        ..plumb_engine::graph::LossConfig::cross_entropy()
    };
    let layers = [(first, low), (mid, act), (outputs, Activation::Softmax)];
    dense_with(inputs, &layers, config)
}

/// Every entry of layer 0 (weight, then bias).
fn entries(g: &Graph) -> Vec<(usize, usize)> {
    g.nodes()[0]
        .tensors()
        .flat_map(|t| (0..g.tensors()[t].spec.shape.iter().product()).map(move |i| (t, i)))
        .collect()
}

fn moved_params(p: &[ArrayD<f64>], m: &Moved<f64>) -> Vec<ArrayD<f64>> {
    let mut q = p.to_vec();
    q[m.tensor].as_slice_mut().unwrap()[m.index] += m.delta;
    q
}

#[test]
fn the_responses_loss_is_a_whole_pass_within_its_bound() {
    let mut rng = Rng::new(11);
    let mut seen = 0;
    // The largest |response − whole pass| / bound at the steps where the bound dominates.
    let mut tightest = 0.0f64;
    for seed in 0..24 {
        let act = ACTIVATIONS[seed % 3];
        let low = [Activation::Tanh, Activation::Sigmoid][seed / 3 % 2];
        let g = stack(&mut rng, low, act);
        let p = random_params(&g, &mut rng);
        let m = 3 + rng.below(5);
        let (x, y) = (random_x(&g, m, &mut rng), random_y(&g, m, &mut rng));
        let trace = g.forward(&p, x.view());
        let l2 = g.l2_sum(&p);
        let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY).expect("a response");
        assert!(Response::new(&g, &trace, y.view(), 1, f64::INFINITY).is_none());
        let mid = g.nodes()[1]
            .layer
            .input()
            .size()
            .max(g.nodes()[2].layer.input().size());
        let mut ws = Workspace::new();
        for (t, i) in entries(&g) {
            let theta = p[t].as_slice().unwrap()[i];
            let h = f64::EPSILON.cbrt() * theta.abs().max(1.0);
            for delta in [h, -h, 2.0 * h, 1e-3, -1e-2, 0.1, 0.3] {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                let whole = g.loss(&moved_params(&p, &moved), x.view(), y.view());
                let got = r
                    .loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
                    .expect("no limit");
                let rounding = 64.0 * (mid + 1) as f64 * f64::EPSILON * whole.abs().max(1.0);
                let apart = (got.loss - whole).abs();
                assert!(
                    apart <= got.bound + rounding,
                    "seed {seed} ({low:?}, {act:?}): entry ({t}, {i}) at {delta}: response {} \
                     against {whole}, apart {apart:e} beyond its bound {:e} + {rounding:e}",
                    got.loss,
                    got.bound
                );
                assert!(!got.crossed);
                if got.bound > 1e3 * rounding {
                    tightest = tightest.max(apart / got.bound);
                }
                seen += 1;
            }
        }
    }
    assert!(seen > 1000, "{seen} losses compared");
    // Not vacuous: somewhere the loss's true error comes within a hundredth of the bound (0.30
    // when written).
    assert!(
        tightest > 1e-2,
        "the bound is never approached: {tightest:e}"
    );
}

#[test]
fn with_the_checks_limit_small_steps_respond_and_large_steps_fall_back() {
    let mut rng = Rng::new(5);
    for seed in 0..6 {
        let g = stack(&mut rng, Activation::Tanh, ACTIVATIONS[seed % 3]);
        let p = random_params(&g, &mut rng);
        let (x, y) = (random_x(&g, 5, &mut rng), random_y(&g, 5, &mut rng));
        let trace = g.forward(&p, x.view());
        let j = g.loss_of(&p, &trace, y.view());
        // A tenth of the check's round-off per loss, 4ε·|J| (crates/fd/src/check.rs NOISE).
        let limit = 0.4 * f64::EPSILON * j.abs();
        let r = Response::new(&g, &trace, y.view(), 0, limit).unwrap();
        let l2 = g.l2_sum(&p);
        let mut ws = Workspace::new();
        for (t, i) in entries(&g) {
            let theta = p[t].as_slice().unwrap()[i];
            let h = f64::EPSILON.cbrt() * theta.abs().max(1.0);
            let at = |delta: f64, ws: &mut Workspace<f64>| {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                r.loss_in(ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
            };
            let small = at(h, &mut ws).expect("the default step responds");
            assert!(small.bound <= limit);
            let identity = g.nodes()[1].activation == Activation::Identity;
            // An identity layer has no truncation: its bound is round-off alone.
            if !identity {
                assert_eq!(at(0.3, &mut ws), None, "seed {seed}: ({t}, {i}) at 0.3");
            }
        }
    }
}

#[test]
fn a_limit_equal_to_the_bound_answers_and_the_next_f64_below_declines() {
    let mut rng = Rng::new(23);
    let mut tested = 0;
    for seed in 0..6 {
        let g = stack(&mut rng, Activation::Tanh, ACTIVATIONS[seed % 3]);
        let p = random_params(&g, &mut rng);
        let (x, y) = (random_x(&g, 4, &mut rng), random_y(&g, 4, &mut rng));
        let trace = g.forward(&p, x.view());
        let l2 = g.l2_sum(&p);
        let with = |limit: f64| Response::new(&g, &trace, y.view(), 0, limit).unwrap();
        let free = with(f64::INFINITY);
        let mut ws = Workspace::new();
        for (t, i) in entries(&g) {
            for delta in [1e-5, -3e-2] {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                let mut at = |r: &Response<f64>| {
                    r.loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
                };
                let bound = at(&free).expect("no limit").bound;
                assert!(
                    bound.is_finite() && bound > 0.0,
                    "seed {seed}: bound {bound:e}"
                );
                let equal = at(&with(bound)).expect("a limit equal to the bound answers");
                assert_eq!(equal.bound, bound);
                assert_eq!(
                    at(&with(bound.next_down())),
                    None,
                    "seed {seed}: ({t}, {i}) at {delta}: a limit just below {bound:e} answered"
                );
                tested += 1;
            }
        }
    }
    assert!(tested > 50, "{tested} entries tested");
}

#[test]
fn a_kinked_first_layer_reports_the_plain_paths_side_changes() {
    let mut rng = Rng::new(3);
    let mut crossings = 0;
    for seed in 0..8 {
        let low = [Activation::Relu, Activation::Elu { alpha: 1.0 }][seed % 2];
        let g = stack(&mut rng, low, Activation::Tanh);
        let p = random_params(&g, &mut rng);
        let (x, y) = (random_x(&g, 6, &mut rng), random_y(&g, 6, &mut rng));
        let trace = g.forward(&p, x.view());
        let l2 = g.l2_sum(&p);
        let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY).unwrap();
        let (mut ws, mut plain) = (Workspace::new(), Workspace::new());
        for (t, i) in entries(&g) {
            for delta in [1e-6, -0.05, 0.4, -1.5] {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                let got = r
                    .loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
                    .unwrap();
                g.moved_loss_in(&mut plain, &p, x.view(), &trace, y.view(), l2, &moved);
                let want = g.tail_crossed(&trace, plain.tail().unwrap());
                assert_eq!(
                    got.crossed, want,
                    "seed {seed} {low:?}: ({t}, {i}) at {delta}"
                );
                crossings += want as usize;
            }
        }
    }
    assert!(crossings > 10, "{crossings} steps cross a kink");
}

#[test]
fn a_response_past_its_memory_budget_is_not_built() {
    // 64 first-layer units, 8 tanh units above, 10 outputs: 3 · 64 · 10 = 1,920 coefficients and
    // 3 · 8 = 24 slopes per sample.
    let layers = [
        (64, Activation::Tanh),
        (8, Activation::Tanh),
        (10, Activation::Softmax),
    ];
    let g = dense_with(4, &layers, plumb_engine::graph::LossConfig::cross_entropy());
    let mut rng = Rng::new(2);
    let p = random_params(&g, &mut rng);
    for (m, built) in [(1000, true), (1200, false)] {
        assert_eq!(1944 * m <= MOST_VALUES, built);
        let (x, y) = (random_x(&g, m, &mut rng), random_y(&g, m, &mut rng));
        let trace = g.forward(&p, x.view());
        let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY);
        assert_eq!(r.is_some(), built, "batch {m}");
    }
}

#[test]
fn a_piecewise_linear_layer_above_responds_exactly_while_no_value_changes_side() {
    // relu and leaky relu at L+1: linear on each side of the kink, so the response's loss is a
    // whole pass's within its bound (round-off alone) wherever no value of L+1 changes side,
    // and the response declines (the plain path then runs) exactly where the plain path's
    // kink test sees a change of side.
    let mut rng = Rng::new(17);
    let (mut answered, mut declined, mut small) = (0, 0, 0);
    for seed in 0..24 {
        let act = [Activation::Relu, Activation::LeakyRelu { slope: 0.1 }][seed % 2];
        let low = [Activation::Tanh, Activation::Relu][seed / 2 % 2];
        let g = stack(&mut rng, low, act);
        let p = random_params(&g, &mut rng);
        let m = 3 + rng.below(5);
        let (x, y) = (random_x(&g, m, &mut rng), random_y(&g, m, &mut rng));
        let trace = g.forward(&p, x.view());
        let l2 = g.l2_sum(&p);
        let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY);
        // Below 8 units of L the plain path recomputes L+1's whole product, whose rounding near
        // the kink is not relative to the distance from it: no response there.
        if g.nodes()[0].layer.output().size() < 8 {
            assert!(
                r.is_none(),
                "seed {seed}: a response above a kink over < 8 units"
            );
            small += 1;
            continue;
        }
        let r = r.expect("a response");
        let mid = g.nodes()[1]
            .layer
            .input()
            .size()
            .max(g.nodes()[2].layer.input().size());
        let (mut ws, mut plain) = (Workspace::new(), Workspace::new());
        for (t, i) in entries(&g) {
            for delta in [1e-5, -1e-3, 0.05, -0.3, 1.0] {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                let got = r.loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved);
                g.moved_loss_in(&mut plain, &p, x.view(), &trace, y.view(), l2, &moved);
                // The plain path's kink test (L's sides and L+1's).
                let crossed = g.tail_crossed(&trace, plain.tail().unwrap());
                let at = format!("seed {seed} ({low:?}, {act:?}): ({t}, {i}) at {delta}");
                match got {
                    Some(a) => {
                        answered += 1;
                        assert_eq!(a.crossed, crossed, "{at}: the plain path's kink test");
                        let whole = g.loss(&moved_params(&p, &moved), x.view(), y.view());
                        let rounding =
                            64.0 * (mid + 1) as f64 * f64::EPSILON * whole.abs().max(1.0);
                        assert!(
                            (a.loss - whole).abs() <= a.bound + rounding,
                            "{at}: {} against {whole}",
                            a.loss
                        );
                    }
                    None => {
                        declined += 1;
                        assert!(crossed, "{at}: declined where no value changes side");
                    }
                }
            }
        }
    }
    assert!(
        answered > 100 && declined > 20 && small > 0,
        "{answered} answered, {declined} declined, {small} below 8 units"
    );
}

#[test]
fn units_with_few_entries_to_check_keep_the_plain_path() {
    let mut rng = Rng::new(23);
    let g = stack(&mut rng, Activation::Tanh, Activation::Tanh);
    let p = random_params(&g, &mut rng);
    let (x, y) = (random_x(&g, 4, &mut rng), random_y(&g, 4, &mut rng));
    let trace = g.forward(&p, x.view());
    let fan_in = g.tensors()[0].spec.shape[1];
    // Unit 0: two weights and its bias; unit 1: one weight.
    let entries = [(0, 0), (0, 1), (1, 0), (0, fan_in)];
    let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY)
        .unwrap()
        .for_entries(&g, &entries, 2);
    let l2 = g.l2_sum(&p);
    let mut ws = Workspace::new();
    let mut at = |tensor: usize, index: usize| {
        let moved = Moved {
            tensor,
            index,
            delta: 1e-5,
        };
        r.loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
            .is_some()
    };
    assert!(at(0, 2) && at(1, 0), "unit 0 has three entries");
    assert!(!at(0, fan_in) && !at(1, 1), "unit 1 has one");
}

#[test]
fn in_f32_the_responses_loss_is_a_whole_pass_within_its_bound() {
    // The f32 check takes the response too (its larger rungs fall back under its limit).
    let mut rng = Rng::new(29);
    let mut seen = 0;
    for seed in 0..9 {
        let g = stack(&mut rng, Activation::Tanh, ACTIVATIONS[seed % 3]);
        let p: Vec<ArrayD<f32>> = random_params(&g, &mut rng)
            .iter()
            .map(|t| t.mapv(|v| v as f32))
            .collect();
        let m = 3 + rng.below(5);
        let x = random_x(&g, m, &mut rng).mapv(|v| v as f32);
        let y = random_y(&g, m, &mut rng).mapv(|v| v as f32);
        let trace = g.forward(&p, x.view());
        let l2 = g.l2_sum(&p);
        let r = Response::new(&g, &trace, y.view(), 0, f64::INFINITY).unwrap();
        let mid = g.nodes()[1]
            .layer
            .input()
            .size()
            .max(g.nodes()[2].layer.input().size());
        let mut ws = Workspace::new();
        for (t, i) in entries(&g) {
            let h = f32::EPSILON.cbrt() * p[t].as_slice().unwrap()[i].abs().max(1.0);
            for delta in [h, -2.0 * h, 8.0 * h, 32.0 * h] {
                let moved = Moved {
                    tensor: t,
                    index: i,
                    delta,
                };
                let mut q = p.clone();
                q[t].as_slice_mut().unwrap()[i] += delta;
                let whole = g.loss(&q, x.view(), y.view());
                let got = r
                    .loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved)
                    .unwrap();
                let eps = f32::EPSILON as f64;
                let rounding = 64.0 * (mid + 1) as f64 * eps * (whole.abs() as f64).max(1.0);
                let apart = (got.loss as f64 - whole as f64).abs();
                assert!(
                    apart <= got.bound + rounding,
                    "seed {seed}: ({t}, {i}) at {delta}: apart {apart:e}, bound {:e}",
                    got.bound
                );
                seen += 1;
            }
        }
    }
    assert!(seen > 500, "{seen}");
}

#[test]
fn a_unit_whose_coefficients_leave_f32s_range_never_answers() {
    // Huge weights above tiny inputs in f32: the cubic coefficient Σ W·σ‴/6·w³ overflows f32
    // while the f64 bound, times the tiny change, stays under the limit. The response must
    // decline (the plain path then gives the loss), never answer inf or NaN.
    let mut rng = Rng::new(41);
    let config = plumb_engine::graph::LossConfig::cross_entropy();
    let g = dense_with(
        4,
        &[
            (8, Activation::Tanh),
            (16, Activation::Tanh),
            (3, Activation::Softmax),
        ],
        config,
    );
    let mut p: Vec<ArrayD<f32>> = random_params(&g, &mut rng)
        .iter()
        .map(|t| t.mapv(|v| v as f32))
        .collect();
    // Zero biases keep L+1's values off tanh's flat tails (where every slope is 0 in f32).
    for (t, spec) in g.tensors().iter().enumerate() {
        if spec.spec.suffix == "bias" {
            p[t].fill(0.0);
        } else if spec.layer > 0 {
            p[t].mapv_inplace(|v| v * 1e10);
        }
    }
    let m = 4;
    let x = random_x(&g, m, &mut rng).mapv(|v| v as f32 * 1e-12);
    let y = random_y(&g, m, &mut rng).mapv(|v| v as f32);
    let trace = g.forward(&p, x.view());
    let l2 = g.l2_sum(&p);
    // The reference: the plain f32 pass gives a finite loss here, so a non-finite answer would
    // be the response's own error.
    assert!(g.loss(&p, x.view(), y.view()).is_finite());
    let r = Response::new(&g, &trace, y.view(), 0, 1e3).expect("a response");
    let mut ws = Workspace::new();
    let mut declined = 0;
    for (t, i) in entries(&g) {
        let moved = Moved {
            tensor: t,
            index: i,
            delta: 1e-2f32,
        };
        let got = r.loss_in(&mut ws, &g, &p, x.view(), &trace, y.view(), l2, &moved);
        declined += got.is_none() as usize;
        if let Some(a) = got {
            assert!(
                a.loss.is_finite() && a.bound.is_finite(),
                "({t}, {i}): the response answered {} with bound {}",
                a.loss,
                a.bound
            );
        }
    }
    assert!(declined > 0, "no entry met an overflowed coefficient");
}
