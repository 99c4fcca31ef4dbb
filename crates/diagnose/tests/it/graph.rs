//! The diagnosis on the layer graph against gradients computed apart from plumb: autograd through
//! plain NumPy forward passes with each mistake planted by gradient stops, primitives or its
//! definition (fixtures/graph/generate.py, generate_sequence.py, generate_diagnosis.py). Every
//! code is named on the tensors its mistake reaches, in the layer it sits in, in float64 and in
//! float32 (the values cast); right gradients are named nowhere, under every convention.

use crate::graph_cases;

use std::collections::BTreeSet;

use graph_cases::{Case, Grad, all_cases};
use ndarray::{Array2, ArrayD};
use plumb_diagnose::{INPUT, TensorJudgement, Tolerances, judge_graph};
use plumb_engine::graph::{Graph, L2Divisor, LossConfig, Reduction};

fn cast(a: &ArrayD<f64>, single: bool) -> ArrayD<f64> {
    if single {
        a.mapv(|v| v as f32 as f64)
    } else {
        a.clone()
    }
}

fn judged(case: &Case, g: &Graph, grad: &Grad, single: bool) -> Vec<TensorJudgement> {
    let outside: Vec<Option<ArrayD<f64>>> =
        grad.params.iter().map(|p| Some(cast(p, single))).collect();
    let input: Option<Array2<f64>> = grad.input.as_ref().map(|i| {
        cast(&i.clone().into_dyn(), single)
            .into_dimensionality()
            .unwrap()
    });
    judge_graph(
        g,
        &case.params,
        case.x.view(),
        case.y.view(),
        &outside,
        input.as_ref().map(|i| i.view()),
        &|_| Tolerances::for_precision(single),
    )
    .expect("the fixture fits its graph")
}

fn precision(single: bool) -> &'static str {
    if single { "f32" } else { "f64" }
}

/// The right gradient, as autograd has it, is named nowhere, in f64 and f32.
#[test]
fn right_gradients_are_named_nowhere() {
    for case in all_cases() {
        let g = case.graph();
        for single in [false, true] {
            for j in judged(&case, &g, &case.reference, single) {
                assert!(
                    j.matches && j.diagnosis.is_none(),
                    "{} ({}): {} judged wrong: {:?}",
                    case.name,
                    precision(single),
                    j.name,
                    j.diagnosis
                );
            }
        }
    }
}

/// Checks that every wrong tensor of a planted mistake's gradient is named for it (or for a
/// hypothesis the gradient cannot tell from it, which must list it alike), in `layer` when one
/// is given; returns whether the code was the one named on some tensor.
fn named_for(what: &str, judgements: &[TensorJudgement], code: &str, layer: Option<usize>) -> bool {
    let mut named = false;
    for j in judgements.iter().filter(|j| !j.matches) {
        let d = j
            .diagnosis
            .as_ref()
            .unwrap_or_else(|| panic!("{what}: {} wrong without a diagnosis", j.name));
        if d.code == code {
            named = true;
            if layer.is_some() {
                assert_eq!(d.layer, layer, "{what}: {} named in another layer", j.name);
            }
        } else {
            eprintln!("{what}: {} named {}, {code} alike", j.name, d.code);
            assert!(
                d.alike.iter().any(|(c, _)| *c == code),
                "{what}: {} named {} ({}), residual {:e}; runners-up {:?}",
                j.name,
                d.code,
                d.label,
                d.residual,
                d.runners_up
            );
        }
    }
    named
}

/// A mistake judged right everywhere must leave the gradient as it is (its hypothesis cannot
/// show here: squared error's delta through an identity output is cross-entropy's), or, in
/// float32, change it by less than float32's agreement tolerance resolves.
fn cannot_show(what: &str, reference: &Grad, planted: &Grad, single: bool) {
    let limit = if single {
        Tolerances::for_precision(true).agreement
    } else {
        1e-12
    };
    let d = departs(reference, planted);
    assert!(
        d < limit,
        "{what}: a gradient departing by {d:e} judged right"
    );
    eprintln!("{what}: departs by {d:e}, judged right");
}

/// The largest entry-wise difference between two gradients, relative to the first's scale.
fn departs(a: &Grad, b: &Grad) -> f64 {
    let scale = a
        .params
        .iter()
        .flat_map(|t| t.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let mut worst = 0.0f64;
    for (p, q) in a.params.iter().zip(&b.params) {
        for (u, v) in p.iter().zip(q.iter()) {
            worst = worst.max((u - v).abs() / scale);
        }
    }
    if let (Some(p), Some(q)) = (&a.input, &b.input) {
        for (u, v) in p.iter().zip(q.iter()) {
            worst = worst.max((u - v).abs() / scale);
        }
    }
    worst
}

/// Each kind's own mistakes (conv, pool, norm, add, recurrent, attention, embedding, dense's
/// `bias-rows-shifted`), planted in one layer by NumPy, are named for that layer on every tensor
/// they reach; one that cannot show (the mask ignored in an open attention) names nothing.
#[test]
fn each_kinds_mistake_is_named_in_its_layer() {
    let mut named: [BTreeSet<String>; 2] = Default::default();
    for case in all_cases() {
        let g = case.graph();
        for p in &case.kinds {
            let layer = p.layer.as_deref().expect("a layer name");
            let at = g.layer(layer).unwrap();
            for single in [false, true] {
                let what = format!(
                    "{}: {} in {layer} ({})",
                    case.name,
                    p.code,
                    precision(single)
                );
                let judgements = judged(&case, &g, &p.grad, single);
                if judgements.iter().all(|j| j.matches) {
                    cannot_show(&what, &case.reference, &p.grad, single);
                    continue;
                }
                if named_for(&what, &judgements, &p.code, Some(at)) {
                    named[single as usize].insert(p.code.clone());
                }
                // Where the tensor is worst, in the layer's terms: the gate or the head.
                for j in judgements.iter().filter(|j| !j.matches && j.name != INPUT) {
                    let kind = g.nodes()
                        [g.tensors().iter().find(|t| t.name == j.name).unwrap().layer]
                        .layer
                        .kind();
                    let place = j.place.as_deref().unwrap_or("");
                    if kind == "lstm" || kind == "gru" {
                        assert!(place.contains("gate "), "{what}: {} at {place}", j.name);
                    }
                    if kind == "attention" {
                        assert!(place.contains("head "), "{what}: {} at {place}", j.name);
                    }
                }
            }
        }
    }
    let every = [
        "kernel-flipped",
        "channels-swapped",
        "overlap-overwritten",
        "padding-offset",
        "pool-gradient-spread",
        "norm-statistics-constant",
        "norm-epsilon-misplaced",
        "norm-scale-unnormalised",
        "skip-gradient-dropped",
        "time-truncated",
        "state-gradient-dropped",
        "time-overwritten",
        "gates-reordered",
        "attention-scale-missing",
        "mask-ignored-in-backward",
        "softmax-jacobian-diagonal",
        "embedding-rows-overwritten",
        "bias-rows-shifted",
    ];
    for (single, set) in named.iter().enumerate() {
        for code in every {
            assert!(
                set.contains(code),
                "{code} is never the code named in {}",
                precision(single == 1)
            );
        }
    }
}

/// The mistakes any network can make, planted by NumPy in conv, norm, residual, recurrent,
/// attention and embedding networks, are named (the activation ones in their layer).
#[test]
fn any_kind_mistakes_are_named() {
    let mut named: [BTreeSet<String>; 2] = Default::default();
    for case in all_cases() {
        let g = case.graph();
        for p in &case.any {
            for single in [false, true] {
                let what = format!(
                    "{}: {} {} ({})",
                    case.name,
                    p.code,
                    p.label,
                    precision(single)
                );
                let judgements = judged(&case, &g, &p.grad, single);
                if judgements.iter().all(|j| j.matches) {
                    cannot_show(&what, &case.reference, &p.grad, single);
                    continue;
                }
                if named_for(&what, &judgements, &p.code, p.at) {
                    named[single as usize].insert(p.code.clone());
                }
            }
        }
    }
    for (single, set) in named.iter().enumerate() {
        for code in [
            "missing-batch-mean",
            "double-batch-mean",
            "bias-regularized",
            "regularization-missing",
            "regularization-unscaled",
            "activation-derivative-missing",
            "derivative-at-output",
            "output-delta-mismatch",
            "partial-batch",
        ] {
            assert!(
                set.contains(code),
                "{code} is never the code named in {}",
                precision(single == 1)
            );
        }
    }
}

fn every_convention(base: LossConfig) -> Vec<LossConfig> {
    let mut out = Vec::new();
    for reduction in Reduction::ALL {
        for l2_divisor in L2Divisor::ALL {
            for l2_on_bias in [false, true] {
                out.push(LossConfig {
                    reduction,
                    l2_divisor,
                    l2_on_bias,
                    // λ > 0 everywhere, so that the divisor and the biases' decay show.
                    l2: base.l2.max(0.05),
                    ..base
                });
            }
        }
    }
    out
}

/// Under every declared convention (reduction, L2 divisor, biases' decay) on every fixture
/// network, the gradient written under that convention passes — computed in float64 and in
/// float32 arithmetic — and one written under a convention one key apart is named for that key.
/// (The gradients here are the engine's, which the engine's own tests hold to autograd's on these
/// networks to 1e-10.)
#[test]
fn conventions_are_judged_as_declared() {
    for case in all_cases() {
        let conventions = every_convention(case.config());
        for declared in &conventions {
            let g = case.graph_with(*declared);
            let with_input = case.reference.input.is_some();
            let grad = |config: &LossConfig| {
                let gc = case.graph_with(*config);
                let r = gc.gradient(&case.params, case.x.view(), case.y.view(), None);
                Grad {
                    params: r.params,
                    input: with_input.then_some(r.input),
                }
            };
            let own = grad(declared);
            let what = format!("{}: {declared:?}", case.name);
            for j in judged(&case, &g, &own, false) {
                assert!(j.matches, "{what}: its own gradient, {}", j.name);
            }
            // The same gradient computed in float32 arithmetic.
            let p32: Vec<ArrayD<f32>> = case.params.iter().map(|p| p.mapv(|v| v as f32)).collect();
            let r32 = g.gradient(
                &p32,
                case.x.mapv(|v| v as f32).view(),
                case.y.mapv(|v| v as f32).view(),
                None,
            );
            let own32 = Grad {
                params: r32.params.iter().map(|t| t.mapv(f64::from)).collect(),
                input: with_input.then(|| r32.input.mapv(f64::from)),
            };
            for j in judged(&case, &g, &own32, true) {
                assert!(j.matches, "{what}: computed in f32, {}", j.name);
            }
            for other in &conventions {
                let differs = [
                    declared.reduction != other.reduction,
                    declared.l2_divisor != other.l2_divisor,
                    declared.l2_on_bias != other.l2_on_bias,
                ];
                if differs.iter().filter(|d| **d).count() != 1 {
                    continue;
                }
                let want = if differs[0] {
                    match declared.reduction {
                        Reduction::Mean => "missing-batch-mean",
                        Reduction::Sum => "double-batch-mean",
                    }
                } else if differs[1] {
                    "regularization-unscaled"
                } else {
                    "bias-regularized"
                };
                let what = format!("{what}, written {other:?}");
                let judgements = judged(&case, &g, &grad(other), false);
                let m = case.x.nrows();
                if declared.l2_factor(m) == other.l2_factor(m) && differs[1] {
                    // "2" and "m" at m = 2: the same term.
                    assert!(judgements.iter().all(|j| j.matches), "{what}");
                    continue;
                }
                assert!(judgements.iter().any(|j| !j.matches), "{what}: not seen");
                assert!(named_for(&what, &judgements, want, None), "{what}");
            }
        }
    }
}

/// The codes read off the gradient itself, on the fixtures' reference gradients: the sign, a
/// constant factor down to what the precision resolves, a transposition, two tensors exchanged,
/// a bias gradient left out or absent.
#[test]
fn codes_of_the_gradient_itself() {
    for case in all_cases() {
        let g = case.graph();
        let r = &case.reference;
        let with = |f: &dyn Fn(&mut Grad)| {
            let mut u = r.clone();
            f(&mut u);
            u
        };
        let what =
            |code: &str, single: bool| format!("{}: {code} ({})", case.name, precision(single));
        for single in [false, true] {
            let flipped = with(&|u| {
                u.params.iter_mut().for_each(|t| t.mapv_inplace(|v| -v));
                if let Some(i) = u.input.as_mut() {
                    i.mapv_inplace(|v| -v);
                }
            });
            let j = judged(&case, &g, &flipped, single);
            assert!(named_for(
                &what("sign-flipped", single),
                &j,
                "sign-flipped",
                None
            ));
            let scaled = with(&|u| {
                u.params
                    .iter_mut()
                    .for_each(|t| t.mapv_inplace(|v| 1.7 * v))
            });
            let j = judged(&case, &g, &scaled, single);
            assert!(named_for(
                &what("constant-factor", single),
                &j,
                "constant-factor",
                None
            ));
            for d in j.iter().filter_map(|j| j.diagnosis.as_ref()) {
                assert!((d.factor.unwrap() - 1.7).abs() < 1e-6, "{d:?}");
            }
            // The smallest factor told apart: 1.001 in float64; in float32 it is within the
            // agreement tolerance (1e-3) and passes, as 1 + 1e-9 does in float64.
            let barely = with(&|u| {
                u.params
                    .iter_mut()
                    .for_each(|t| t.mapv_inplace(|v| 1.001 * v));
            });
            let j = judged(&case, &g, &barely, single);
            if single {
                assert!(j.iter().all(|j| j.matches), "{}", what("1.001", single));
            } else {
                assert!(named_for(
                    &what("1.001", single),
                    &j,
                    "constant-factor",
                    None
                ));
            }
            let agrees = with(&|u| {
                u.params
                    .iter_mut()
                    .for_each(|t| t.mapv_inplace(|v| (1.0 + 1e-9) * v));
            });
            assert!(judged(&case, &g, &agrees, single).iter().all(|j| j.matches));
        }
        // A square matrix transposed, and two tensors of one shape exchanged.
        let tensors = g.tensors();
        if let Some(t) = (0..tensors.len()).find(|&t| {
            let s = &tensors[t].spec.shape;
            s.len() == 2 && s[0] == s[1] && r.params[t].t() != r.params[t]
        }) {
            let u = with(&|u| u.params[t] = r.params[t].t().to_owned());
            let j = judged(&case, &g, &u, false);
            assert!(named_for(
                &what("transposed", false),
                &j,
                "transposed",
                None
            ));
        }
        // Two tensors of one shape whose gradients differ (a gru with the reset before the
        // product has equal input and recurrent bias gradients: exchanging them shows nothing).
        let differ = |a: usize, b: usize| {
            let diff = (&r.params[a] - &r.params[b])
                .iter()
                .fold(0f64, |m, v| m.max(v.abs()));
            let scale = r.params[a].iter().fold(0f64, |m, v| m.max(v.abs()));
            diff > 1e-6 * scale
        };
        let pair = (0..tensors.len()).find_map(|a| {
            (a + 1..tensors.len())
                .find(|&b| tensors[a].spec.shape == tensors[b].spec.shape && differ(a, b))
                .map(|b| (a, b))
        });
        if let Some((a, b)) = pair {
            let u = with(&|u| u.params.swap(a, b));
            let j = judged(&case, &g, &u, false);
            assert!(named_for(
                &what("layers-swapped", false),
                &j,
                "layers-swapped",
                None
            ));
        }
        // A bias gradient zero, or absent from the outside gradient.
        if let Some(t) = tensors
            .iter()
            .position(|t| t.spec.role == plumb_engine::graph::Role::Bias)
        {
            let zero = with(&|u| u.params[t].fill(0.0));
            let j = judged(&case, &g, &zero, false);
            if !j[t].matches {
                assert!(named_for(
                    &what("bias zero", false),
                    &j,
                    "bias-gradient-missing",
                    None
                ));
            }
            let outside: Vec<Option<ArrayD<f64>>> = r
                .params
                .iter()
                .enumerate()
                .map(|(k, p)| (k != t).then(|| p.clone()))
                .collect();
            let j = judge_graph(
                &g,
                &case.params,
                case.x.view(),
                case.y.view(),
                &outside,
                None,
                &|_| Tolerances::for_precision(false),
            )
            .unwrap();
            assert_eq!(
                j[t].diagnosis.as_ref().unwrap().code,
                "bias-gradient-missing"
            );
        }
    }
}
