//! Each catalogued mistake of the layer graph changes the gradients it should and no other
//! tensor (DESIGN §7: a hypothesis that leaves a tensor unchanged never names it), and leaves
//! everything unchanged where the mistake cannot show (windows that do not overlap, no padding).

use crate::graph_common;

use std::collections::BTreeSet;

use graph_common::{random_params, random_x, random_y};
use ndarray::{Array2, ArrayD};
use plumb_engine::Rng;
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, GraphError, LayerNorm,
    LossConfig, Padding, Pool, PoolKind, Shape,
};
use plumb_engine::{Activation, Loss};

/// The network: stem conv → conv c1 (overlapping windows, padding 1, no bias) → batch norm →
/// add (from stem) → layer norm → max-pool → flatten → dense softmax.
fn network() -> Graph {
    let config = LossConfig {
        l2: 0.1,
        ..LossConfig::cross_entropy()
    };
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 10,
        },
        config,
    );
    let mut stem = ConvSettings::conv1d(3, 3);
    stem.padding = Padding::Same;
    b.push(Some("stem"), Activation::Tanh, |s| Conv::new(&stem, s))
        .unwrap();
    let mut c1 = ConvSettings::conv1d(3, 3);
    c1.padding = Padding::Explicit([0, 1]);
    c1.bias = false;
    b.push(Some("c1"), Activation::Tanh, |s| Conv::new(&c1, s))
        .unwrap();
    b.push(Some("bn"), Activation::Identity, |s| {
        BatchNorm::new(1e-5, s)
    })
    .unwrap();
    b.push(Some("res"), Activation::Tanh, |s| Add::new("stem", s))
        .unwrap();
    b.push(Some("ln"), Activation::Identity, |s| {
        LayerNorm::new(1e-5, s)
    })
    .unwrap();
    b.push(Some("pool"), Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(Some("out"), Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// The names of the tensors (and "input") whose gradient differs from the reference by more than
/// 1e-9 of the gradient's scale: far above rounding (1e-16), far below any real change.
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
        if differs(
            &a.iter().copied().collect::<Vec<_>>(),
            &b.iter().copied().collect::<Vec<_>>(),
        ) {
            names.insert(g.tensors()[t].name.clone());
        }
    }
    if differs(reference.1.as_slice().unwrap(), other.1.as_slice().unwrap()) {
        names.insert("input".into());
    }
    names
}

fn set(names: &[&str]) -> BTreeSet<String> {
    names.iter().map(|s| s.to_string()).collect()
}

#[test]
fn each_mistake_changes_exactly_the_tensors_it_reaches() {
    let g = network();
    let stem_and_below = ["stem.weight", "stem.bias", "input"];
    let below_bn = ["c1.weight", "stem.weight", "stem.bias", "input"];
    let below_ln = [
        "bn.scale",
        "bn.shift",
        "c1.weight",
        "stem.weight",
        "stem.bias",
        "input",
    ];
    let below_pool = [
        "ln.scale",
        "ln.shift",
        "bn.scale",
        "bn.shift",
        "c1.weight",
        "stem.weight",
        "stem.bias",
        "input",
    ];
    let expected: &[(&str, &str, Vec<&str>)] = &[
        (
            "c1",
            "kernel-flipped",
            [&["c1.weight"][..], &stem_and_below].concat(),
        ),
        ("c1", "channels-swapped", vec!["c1.weight"]),
        ("c1", "overlap-overwritten", stem_and_below.to_vec()),
        ("c1", "padding-offset", stem_and_below.to_vec()),
        ("bn", "norm-statistics-constant", below_bn.to_vec()),
        ("bn", "norm-epsilon-misplaced", below_bn.to_vec()),
        ("bn", "norm-scale-unnormalised", vec!["bn.scale"]),
        // Only below the tapped layer: c1 and bn lie between the tap and the add.
        ("res", "skip-gradient-dropped", stem_and_below.to_vec()),
        ("ln", "norm-statistics-constant", below_ln.to_vec()),
        ("ln", "norm-epsilon-misplaced", below_ln.to_vec()),
        ("ln", "norm-scale-unnormalised", vec!["ln.scale"]),
        ("pool", "pool-gradient-spread", below_pool.to_vec()),
    ];
    for seed in 0..5u64 {
        let mut rng = Rng::new(700 + seed);
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 4, &mut rng);
        let y = random_y(&g, 4, &mut rng);
        let base = g.gradient(&params, x.view(), y.view(), None);
        let reference = (base.params, base.input);
        graph_common::freed_trace_matches_kept(&g, &params, &x, &y, &format!("seed {seed}"));
        for (layer, code, names) in expected {
            let planted = g.plant(layer, code).unwrap();
            let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
            assert_eq!(
                got.loss, base.loss,
                "a mistake changes the backward pass only"
            );
            let got = (got.params, got.input);
            assert_eq!(
                changed(&g, &reference, &got),
                set(names),
                "{code} in {layer}, seed {seed}"
            );
        }
    }
}

/// Where a mistake cannot show, the gradient is the reference one: windows that do not overlap
/// (stride ≥ kernel) make overwriting the same as summing; no padding makes every crop offset the
/// same; a size-1 max-pool window spreads to itself only.
#[test]
fn mistakes_are_invisible_where_they_cannot_show() {
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 2,
            height: 6,
            width: 6,
        },
        LossConfig::squared_error(),
    );
    let mut c = ConvSettings::conv2d(2, [2, 3]);
    c.stride = [2, 3];
    b.push(Some("c"), Activation::Tanh, |s| Conv::new(&c, s))
        .unwrap();
    b.push(Some("p"), Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 2, [1, 1], [1, 1], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let mut rng = Rng::new(9);
    let params = random_params(&g, &mut rng);
    let x = random_x(&g, 3, &mut rng);
    let y = random_y(&g, 3, &mut rng);
    let base = g.gradient(&params, x.view(), y.view(), None);
    for (layer, code) in [
        ("c", "overlap-overwritten"),
        ("c", "padding-offset"),
        ("p", "pool-gradient-spread"),
    ] {
        let planted = g.plant(layer, code).unwrap();
        let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
        assert_eq!(got.params, base.params, "{code}");
        assert_eq!(got.input, base.input, "{code}");
    }
}

#[test]
fn a_code_of_another_kind_is_refused() {
    let g = network();
    assert!(matches!(
        g.plant("bn", "kernel-flipped"),
        Err(GraphError::UnknownMistake {
            kind: "batch-norm",
            ..
        })
    ));
    assert!(matches!(
        g.plant("nowhere", "kernel-flipped"),
        Err(GraphError::UnknownLayer { .. })
    ));
    assert_eq!(g.loss_config().loss, Loss::CrossEntropy);
}
