//! The sequence kinds (rnn, lstm, gru, attention, embedding): the analytic backward pass through
//! time against num-dual's gradient through the graph's own forward pass (≤ 1e-10 relative) over
//! random sizes, gate orders, both GRU variants, heads, causal masks and both outputs; each
//! catalogued mistake changes exactly the tensors it reaches; typed errors for impossible settings.

use crate::graph_common;

use std::collections::BTreeSet;

use graph_common::{dual_gradient, max_relative, random_params, random_x, random_y};
use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{
    Attention, Conv, ConvSettings, Dense, Embedding, Flatten, Graph, GraphBuilder, GraphError, Gru,
    L2Divisor, LayerNorm, LossConfig, Lstm, Reduction, Rnn, Shape, ShapeError,
};
use plumb_engine::{Activation, Loss, Rng};

/// Both sides are exact up to rounding: 1e-10 relative, entries below 1e-8 of their tensor's
/// largest judged against that floor (as in graph_dual.rs).
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-8;
/// A gradient is zero up to rounding below this fraction of the network's gradient scale (f64
/// rounding through a few layers is ~1e-16 of it).
const ZERO: f64 = 1e-13;

const CELL_ACTIVATIONS: [Activation; 5] = [
    Activation::Tanh,
    Activation::Sigmoid,
    Activation::Relu,
    Activation::Softplus,
    Activation::Identity,
];

fn pick<T: Copy>(rng: &mut Rng, items: &[T]) -> T {
    items[rng.below(items.len())]
}

/// A random permutation of `letters`.
fn order(rng: &mut Rng, letters: &str) -> String {
    let mut l: Vec<char> = letters.chars().collect();
    for k in (1..l.len()).rev() {
        l.swap(k, rng.below(k + 1));
    }
    l.into_iter().collect()
}

fn conventions(rng: &mut Rng) -> (LossConfig, Activation) {
    let (loss, out) = match rng.below(3) {
        0 => (Loss::CrossEntropy, Activation::Softmax),
        1 => (Loss::CrossEntropy, Activation::Sigmoid),
        _ => (
            Loss::SquaredError,
            pick(rng, &[Activation::Identity, Activation::Tanh]),
        ),
    };
    let config = LossConfig {
        loss,
        reduction: pick(rng, &[Reduction::Mean, Reduction::Sum]),
        l2: pick(rng, &[0.0, 0.3]),
        l2_divisor: pick(rng, &[L2Divisor::TwoM, L2Divisor::One]),
        l2_on_bias: rng.below(2) == 0,
    };
    (config, out)
}

fn sequence_input(rng: &mut Rng) -> Shape {
    let steps = 1 + rng.below(4);
    let width = 1 + rng.below(3);
    if rng.below(3) == 0 {
        // A conv1d-style [channels, length] signal, read as steps = length, width = channels.
        Shape::Signal {
            channels: width,
            length: steps,
        }
    } else {
        Shape::Sequence { steps, width }
    }
}

/// A dense head: per step on a sequence half the time (the loss then over samples and steps),
/// else flatten first.
fn head(b: &mut GraphBuilder, out: Activation, rng: &mut Rng) {
    let per_step = matches!(b.shape(), Shape::Sequence { .. }) && rng.below(2) == 0;
    if !matches!(b.shape(), Shape::Flat(_)) && !per_step {
        b.push(None, Activation::Identity, Flatten::new).unwrap();
    }
    let units = if out == Activation::Softmax { 3 } else { 2 };
    b.push(None, out, |s| Dense::new(units, s)).unwrap();
}

fn check_with(g: &Graph, x: &Array2<f64>, seed: u64, what: &str) {
    let mut rng = Rng::new(seed ^ 0xface);
    let params = random_params(g, &mut rng);
    let y = random_y(g, x.nrows(), &mut rng);
    let grad = g.gradient(&params, x.view(), y.view(), None);
    let dual = dual_gradient(g, &params, x, &y);
    graph_common::freed_trace_matches_kept(g, &params, x, &y, &format!("{what} seed {seed}"));
    assert!(
        (grad.loss - dual.loss).abs() <= TOL * dual.loss.abs().max(1e-300),
        "{what} seed {seed}: loss {} vs num-dual {}",
        grad.loss,
        dual.loss
    );
    // A tensor whose gradient is zero up to rounding (an attention key bias: a softmax ignores a
    // shift of its row) is checked as zero on both sides; every other one relative to itself.
    let scale = dual
        .params
        .iter()
        .flat_map(|t| t.iter())
        .chain(dual.input.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let largest = |t: &ArrayD<f64>| t.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    // And without the input gradient (the first layer then forms no dx): the same parameter
    // gradients against num-dual.
    let (_, without) = g.parameter_gradient(&params, x.view(), y.view(), None);
    for got in [&grad.params, &without] {
        for (t, (a, r)) in got.iter().zip(&dual.params).enumerate() {
            let name = &g.tensors()[t].name;
            if largest(r) <= ZERO * scale {
                assert!(
                    largest(a) <= ZERO * scale,
                    "{what} seed {seed}: {name} is not zero"
                );
                continue;
            }
            let err = max_relative(a.iter(), r.iter(), FLOOR);
            assert!(err <= TOL, "{what} seed {seed}: {err:e} at {name}\n{g:#?}");
        }
    }
    let err = max_relative(grad.input.iter(), dual.input.iter(), FLOOR);
    assert!(
        err <= TOL,
        "{what} seed {seed}: {err:e} at the input\n{g:#?}"
    );
}

fn check(g: &Graph, seed: u64, what: &str) {
    let mut rng = Rng::new(seed ^ 0xbeef);
    let m = 1 + rng.below(3);
    let x = random_x(g, m, &mut rng);
    check_with(g, &x, seed, what);
}

#[test]
fn rnn_over_random_sizes_activations_and_outputs() {
    for seed in 0..30u64 {
        let mut rng = Rng::new(1000 + seed);
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(sequence_input(&mut rng), config);
        let output = pick(&mut rng, &["last", "all"]);
        let act = pick(&mut rng, &CELL_ACTIVATIONS);
        let units = 1 + rng.below(3);
        b.push(Some("r"), Activation::Identity, |s| {
            Rnn::new(units, act, output, s)
        })
        .unwrap();
        head(&mut b, out, &mut rng);
        check(&b.finish().unwrap(), seed, &format!("rnn {act} {output}"));
    }
}

#[test]
fn lstm_over_random_sizes_gate_orders_and_outputs() {
    for seed in 0..30u64 {
        let mut rng = Rng::new(2000 + seed);
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(sequence_input(&mut rng), config);
        let gates = order(&mut rng, "ifgo");
        for _ in 0..1 + rng.below(2) {
            let output = pick(&mut rng, &["last", "all"]);
            let units = 1 + rng.below(3);
            if !matches!(b.shape(), Shape::Flat(_)) {
                b.push(None, Activation::Identity, |s| {
                    Lstm::new(units, &gates, output, s)
                })
                .unwrap();
            }
        }
        head(&mut b, out, &mut rng);
        check(&b.finish().unwrap(), seed, &format!("lstm {gates}"));
    }
}

#[test]
fn gru_over_random_sizes_gate_orders_both_resets_and_outputs() {
    for seed in 0..40u64 {
        let mut rng = Rng::new(3000 + seed);
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(sequence_input(&mut rng), config);
        let gates = order(&mut rng, "rzn");
        let reset = if seed % 2 == 0 { "after" } else { "before" };
        let output = pick(&mut rng, &["last", "all"]);
        let units = 1 + rng.below(3);
        b.push(None, Activation::Identity, |s| {
            Gru::new(units, &gates, reset, output, s)
        })
        .unwrap();
        head(&mut b, out, &mut rng);
        check(&b.finish().unwrap(), seed, &format!("gru {gates} {reset}"));
    }
}

#[test]
fn attention_over_random_widths_heads_and_masks() {
    for seed in 0..30u64 {
        let mut rng = Rng::new(4000 + seed);
        let (config, out) = conventions(&mut rng);
        let heads = 1 + rng.below(3);
        let width = heads * (1 + rng.below(3));
        let steps = 1 + rng.below(4);
        let input = if rng.below(3) == 0 {
            Shape::Signal {
                channels: width,
                length: steps,
            }
        } else {
            Shape::Sequence { steps, width }
        };
        let causal = seed % 2 == 0;
        let mut b = GraphBuilder::new(input, config);
        b.push(None, pick(&mut rng, &CELL_ACTIVATIONS), |s| {
            Attention::new(heads, causal, s)
        })
        .unwrap();
        if rng.below(2) == 0 {
            b.push(None, Activation::Identity, |s| LayerNorm::new(1e-5, s))
                .unwrap();
        }
        head(&mut b, out, &mut rng);
        check(
            &b.finish().unwrap(),
            seed,
            &format!("attention heads {heads} causal {causal}"),
        );
    }
}

/// Token ids drawn from the vocabulary (with repeats, so rows gather several occurrences).
fn tokens(g: &Graph, m: usize, rng: &mut Rng) -> Array2<f64> {
    let Shape::Tokens { steps, vocabulary } = g.input() else {
        panic!("a token input")
    };
    Array2::from_shape_fn((m, steps), |_| rng.below(vocabulary) as f64)
}

#[test]
fn embedding_then_recurrent_layers_over_random_vocabularies() {
    for seed in 0..20u64 {
        let mut rng = Rng::new(5000 + seed);
        let (config, out) = conventions(&mut rng);
        let input = Shape::Tokens {
            steps: 1 + rng.below(4),
            vocabulary: 1 + rng.below(5),
        };
        let mut b = GraphBuilder::new(input, config);
        let size = 2 * (1 + rng.below(2));
        b.push(Some("emb"), Activation::Identity, |s| {
            Embedding::new(size, s)
        })
        .unwrap();
        match seed % 3 {
            0 => b.push(None, Activation::Identity, |s| {
                Lstm::new(2, "ifgo", "all", s)
            }),
            1 => b.push(None, Activation::Identity, |s| Attention::new(2, true, s)),
            _ => b.push(None, Activation::Identity, |s| {
                Gru::new(2, "rzn", "after", "last", s)
            }),
        }
        .unwrap();
        head(&mut b, out, &mut rng);
        let g = b.finish().unwrap();
        let x = tokens(&g, 1 + rng.below(3), &mut rng);
        check_with(&g, &x, seed, "embedding");
        let params = random_params(&g, &mut rng);
        let y = random_y(&g, x.nrows(), &mut rng);
        let grad = g.gradient(&params, x.view(), y.view(), None);
        assert!(grad.input.iter().all(|&v| v == 0.0), "ids get no gradient");
    }
}

/// A conv1d's [channels, length] output feeds an lstm as steps = length, width = channels.
#[test]
fn a_conv1d_output_feeds_a_recurrent_layer_transposed() {
    for seed in 0..6u64 {
        let mut b = GraphBuilder::new(
            Shape::Signal {
                channels: 2,
                length: 5,
            },
            LossConfig::squared_error(),
        );
        b.push(None, Activation::Tanh, |s| {
            Conv::new(&ConvSettings::conv1d(3, 2), s)
        })
        .unwrap();
        b.push(None, Activation::Identity, |s| {
            Lstm::new(2, "ofig", "all", s)
        })
        .unwrap();
        assert_eq!(b.shape(), Shape::Sequence { steps: 4, width: 2 });
        b.push(None, Activation::Identity, |s| Dense::new(1, s))
            .unwrap();
        check(&b.finish().unwrap(), seed, "conv1d → lstm");
    }
}

/// The names of the tensors (and "input") whose gradient differs from the reference by more than
/// 1e-9 of the gradient's scale: far above rounding, far below any real change.
fn changed(
    g: &Graph,
    reference: &(Vec<ArrayD<f64>>, Array2<f64>),
    other: &(Vec<ArrayD<f64>>, Array2<f64>),
) -> BTreeSet<String> {
    let scale = reference
        .0
        .iter()
        .flat_map(|t| t.iter())
        .chain(reference.1.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let differs = |a: &[f64], b: &[f64]| a.iter().zip(b).any(|(x, y)| (x - y).abs() > 1e-9 * scale);
    let mut names = BTreeSet::new();
    for (t, (a, b)) in reference.0.iter().zip(&other.0).enumerate() {
        if differs(a.as_slice().unwrap(), b.as_slice().unwrap()) {
            names.insert(g.tensors()[t].name.clone());
        }
    }
    if differs(reference.1.as_slice().unwrap(), other.1.as_slice().unwrap()) {
        names.insert("input".into());
    }
    names
}

/// lstm (all, declared "fgio") → attention (causal, 2 heads) → gru (all, reset before) → rnn
/// (last) → dense softmax.
fn network(steps: usize) -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Sequence { steps, width: 3 },
        LossConfig {
            l2: 0.1,
            ..LossConfig::cross_entropy()
        },
    );
    b.push(Some("lstm"), Activation::Identity, |s| {
        Lstm::new(4, "fgio", "all", s)
    })
    .unwrap();
    b.push(Some("att"), Activation::Identity, |s| {
        Attention::new(2, true, s)
    })
    .unwrap();
    b.push(Some("gru"), Activation::Identity, |s| {
        Gru::new(3, "nrz", "before", "all", s)
    })
    .unwrap();
    b.push(Some("rnn"), Activation::Identity, |s| {
        Rnn::new(3, Activation::Tanh, "last", s)
    })
    .unwrap();
    b.push(Some("out"), Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

fn names(g: &Graph, layer: &str) -> Vec<String> {
    g.tensors()
        .iter()
        .filter(|t| t.name.starts_with(&format!("{layer}.")))
        .map(|t| t.name.clone())
        .collect()
}

fn set(parts: &[Vec<String>]) -> BTreeSet<String> {
    parts.iter().flatten().cloned().collect()
}

#[test]
fn each_sequence_mistake_changes_exactly_the_tensors_it_reaches() {
    let g = network(4);
    let (lstm, gru, rnn) = (names(&g, "lstm"), names(&g, "gru"), names(&g, "rnn"));
    let input = vec!["input".to_string()];
    let att =
        |which: &[&str]| -> Vec<String> { which.iter().map(|s| format!("att.{s}")).collect() };
    let below_att = [lstm.clone(), input.clone()].concat();
    // Every attention tensor but the key bias, whose gradient is zero whatever the gradient above.
    let all_att: Vec<String> = names(&g, "att")
        .into_iter()
        .filter(|n| n != "att.key.bias")
        .collect();
    let below_gru = [all_att.clone(), below_att.clone()].concat();
    let below_rnn = [gru.clone(), below_gru.clone()].concat();
    let expected: Vec<(&str, &str, BTreeSet<String>)> = vec![
        (
            "lstm",
            "time-truncated",
            set(&[lstm.clone(), input.clone()]),
        ),
        (
            "lstm",
            "state-gradient-dropped",
            set(&[lstm.clone(), input.clone()]),
        ),
        ("lstm", "time-overwritten", set(std::slice::from_ref(&lstm))),
        ("lstm", "gates-reordered", set(std::slice::from_ref(&lstm))),
        (
            "att",
            "attention-scale-missing",
            // The key bias's gradient is zero whatever the scale (a softmax ignores a shift of
            // its row), so it cannot change.
            set(&[
                att(&["query.weight", "query.bias", "key.weight"]),
                below_att.clone(),
            ]),
        ),
        (
            "att",
            "mask-ignored-in-backward",
            // The value bias's gradient is Σ dO whatever the weights (each row of P sums to 1).
            set(&[
                att(&["query.weight", "query.bias", "key.weight", "value.weight"]),
                below_att.clone(),
            ]),
        ),
        (
            "att",
            "softmax-jacobian-diagonal",
            set(&[
                att(&["query.weight", "query.bias", "key.weight", "key.bias"]),
                below_att.clone(),
            ]),
        ),
        (
            "gru",
            "time-truncated",
            set(&[gru.clone(), below_gru.clone()]),
        ),
        (
            "gru",
            "state-gradient-dropped",
            set(&[gru.clone(), below_gru.clone()]),
        ),
        ("gru", "time-overwritten", set(std::slice::from_ref(&gru))),
        ("gru", "gates-reordered", set(std::slice::from_ref(&gru))),
        (
            "rnn",
            "time-truncated",
            set(&[rnn.clone(), below_rnn.clone()]),
        ),
        (
            "rnn",
            "state-gradient-dropped",
            set(&[rnn.clone(), below_rnn.clone()]),
        ),
        ("rnn", "time-overwritten", set(std::slice::from_ref(&rnn))),
    ];
    for seed in 0..4u64 {
        let mut rng = Rng::new(6000 + seed);
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 3, &mut rng);
        let y = random_y(&g, 3, &mut rng);
        let base = g.gradient(&params, x.view(), y.view(), None);
        let reference = (base.params, base.input);
        for (layer, code, names) in &expected {
            let planted = g.plant(layer, code).unwrap();
            let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
            assert_eq!(
                got.loss, base.loss,
                "a mistake changes the backward pass only"
            );
            let got = (got.params, got.input);
            assert_eq!(
                &changed(&g, &reference, &got),
                names,
                "{code} in {layer}, seed {seed}"
            );
        }
    }
}

/// Where a mistake cannot show the gradient is the reference one: a single step has no time to
/// truncate, overwrite or carry a state through; an attention layer without a mask has none to
/// ignore; distinct tokens have no rows to overwrite.
#[test]
fn sequence_mistakes_are_invisible_where_they_cannot_show() {
    let g = network(1);
    let mut rng = Rng::new(11);
    let params = random_params(&g, &mut rng);
    let x = random_x(&g, 3, &mut rng);
    let y = random_y(&g, 3, &mut rng);
    let base = g.gradient(&params, x.view(), y.view(), None);
    for layer in ["lstm", "gru", "rnn"] {
        for code in [
            "time-truncated",
            "state-gradient-dropped",
            "time-overwritten",
        ] {
            let planted = g.plant(layer, code).unwrap();
            let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
            assert_eq!(got.params, base.params, "{code} in {layer}");
            assert_eq!(got.input, base.input, "{code} in {layer}");
        }
    }

    let mut b = GraphBuilder::new(
        Shape::Tokens {
            steps: 3,
            vocabulary: 6,
        },
        LossConfig::squared_error(),
    );
    b.push(Some("emb"), Activation::Identity, |s| Embedding::new(4, s))
        .unwrap();
    b.push(Some("att"), Activation::Identity, |s| {
        Attention::new(2, false, s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(1, s))
        .unwrap();
    let g = b.finish().unwrap();
    let params = random_params(&g, &mut rng);
    let distinct = ndarray::array![[0.0, 1.0, 2.0], [3.0, 4.0, 5.0]];
    let repeated = ndarray::array![[0.0, 1.0, 0.0], [3.0, 4.0, 5.0]];
    let y = random_y(&g, 2, &mut rng);
    for (x, visible) in [(&distinct, false), (&repeated, true)] {
        let base = g.gradient(&params, x.view(), y.view(), None);
        let planted = g.plant("emb", "embedding-rows-overwritten").unwrap();
        let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
        let got = (got.params, got.input);
        let expected: BTreeSet<String> = if visible {
            ["emb.table".to_string()].into()
        } else {
            BTreeSet::new()
        };
        assert_eq!(
            changed(&g, &(base.params.clone(), base.input.clone()), &got),
            expected
        );
        if visible {
            // Token 0 at steps 0 and 2 of sample 0: the row holds step 2's gradient alone.
            let d = &got.0[0];
            let full = &base.params[0];
            assert!((0..4).any(|k| (d[[0, k]] - full[[0, k]]).abs() > 1e-12));
            assert_eq!(
                d.slice(ndarray::s![1..6, ..]),
                full.slice(ndarray::s![1..6, ..])
            );
        }
        let planted = g.plant("att", "mask-ignored-in-backward").unwrap();
        let unmasked = g.gradient(&params, x.view(), y.view(), Some(&planted));
        assert_eq!(unmasked.params, base.params, "no mask to ignore");
    }
}

#[test]
fn impossible_sequence_settings_are_typed_errors() {
    let seq = Shape::Sequence { steps: 3, width: 6 };
    assert_eq!(
        Attention::new(4, false, &seq).unwrap_err(),
        ShapeError::Heads { width: 6, heads: 4 }
    );
    assert!(Attention::new(3, false, &seq).is_ok());
    for bad in ["iffo", "ifg", "ifgox", "ifgx", "IFGO", ""] {
        assert!(
            matches!(
                Lstm::new(2, bad, "last", &seq),
                Err(ShapeError::GateOrder { kind: "lstm", .. })
            ),
            "{bad}"
        );
    }
    for bad in ["rzz", "rz", "rzh"] {
        assert!(
            matches!(
                Gru::new(2, bad, "after", "last", &seq),
                Err(ShapeError::GateOrder { kind: "gru", .. })
            ),
            "{bad}"
        );
    }
    assert!(Lstm::new(2, "gofi", "last", &seq).is_ok());
    let e = Rnn::new(2, Activation::Tanh, "every", &seq).unwrap_err();
    assert!(matches!(e, ShapeError::Choice { key: "output", .. }));
    assert!(e.to_string().contains("\"every\""), "{e}");
    assert!(matches!(
        Gru::new(2, "rzn", "during", "last", &seq),
        Err(ShapeError::Choice { key: "reset", .. })
    ));
    assert!(matches!(
        Rnn::new(2, Activation::Softmax, "last", &seq),
        Err(ShapeError::Choice {
            key: "activation",
            ..
        })
    ));
    assert!(matches!(
        Rnn::new(0, Activation::Tanh, "last", &seq),
        Err(ShapeError::Zero { key: "units" })
    ));
    assert!(matches!(
        Lstm::new(2, "ifgo", "last", &Shape::Flat(4)),
        Err(ShapeError::Input { kind: "lstm", .. })
    ));
    assert!(matches!(
        Embedding::new(3, &seq),
        Err(ShapeError::Input {
            kind: "embedding",
            ..
        })
    ));
}

#[test]
fn token_ids_outside_the_vocabulary_are_named_by_sample_and_step() {
    let mut b = GraphBuilder::new(
        Shape::Tokens {
            steps: 3,
            vocabulary: 5,
        },
        LossConfig::squared_error(),
    );
    b.push(None, Activation::Identity, |s| Embedding::new(2, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Rnn::new(2, Activation::Tanh, "last", s)
    })
    .unwrap();
    let g = b.finish().unwrap();
    let y = Array2::<f64>::zeros((2, 2));
    assert!(
        g.check_batch(
            ndarray::array![[0.0, 4.0, 1.0], [2.0, 3.0, 0.0]].view(),
            y.view()
        )
        .is_ok()
    );
    for (bad, at) in [
        (5.0, "sample 1, step 2"),
        (-1.0, "sample 1, step 2"),
        (1.5, "sample 1, step 2"),
    ] {
        let x = ndarray::array![[0.0, 4.0, 1.0], [2.0, 3.0, bad]];
        let e = g.check_batch(x.view(), y.view()).unwrap_err();
        assert!(matches!(e, GraphError::Batch { .. }));
        assert!(e.to_string().contains(at), "{e}");
    }
    let empty = GraphBuilder::new(
        Shape::Tokens {
            steps: 3,
            vocabulary: 0,
        },
        LossConfig::squared_error(),
    );
    let mut empty = empty;
    empty
        .push(None, Activation::Identity, |s| Embedding::new(2, s))
        .unwrap();
    assert!(matches!(empty.finish(), Err(GraphError::EmptyInput { .. })));
}

/// A parameter is located by gate (in the declared order), unit and input; by projection and head.
#[test]
fn parameters_are_located_by_gate_head_and_unit() {
    use plumb_engine::graph::Kind;
    let seq = Shape::Sequence { steps: 2, width: 3 };
    let lstm = Lstm::new(2, "fgio", "last", &seq).unwrap();
    // input.weight is 8 × 3: row 5 is block 2 (declared letter i), unit 1; column 1.
    assert_eq!(lstm.locate(0, 5 * 3 + 1), "gate i, unit 1, input 1");
    assert_eq!(lstm.locate(1, 2 * 2), "gate g, unit 0, state 0");
    assert_eq!(lstm.locate(2, 7), "gate o, unit 1");
    let att = Attention::new(3, false, &Shape::Sequence { steps: 2, width: 6 }).unwrap();
    // key.weight row 4 is head 2 (two rows per head).
    assert_eq!(att.locate(2, 4 * 6 + 5), "key, head 2, out 4, in 5");
    // The output projection's column says the head.
    assert_eq!(att.locate(6, 3), "output, head 1, out 0, in 3");
    let rnn = Rnn::new(2, Activation::Tanh, "all", &seq).unwrap();
    assert_eq!(rnn.locate(0, 4), "unit 1, input 1");
}
