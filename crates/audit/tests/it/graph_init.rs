//! The initialisation test on the layer graph against draws from the published distributions,
//! the formulas written out here as the outside source: He et al. 2015 (ICCV, arXiv 1502.01852),
//! normal with variance 2 / fan-in, where a convolution's fan-in is in-channels × kernel height ×
//! kernel width; Glorot & Bengio 2010 (AISTATS), uniform on ±√(6 / (fan-in + fan-out)).

use crate::graph_common;

use graph_common::probe;
use ndarray::{ArrayD, IxDyn};
use plumb_audit::{Audit, GraphWeights, KindThresholds, Thresholds, audit_graph, fitted_shapes};
use plumb_engine::graph::{
    Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, LossConfig, Lstm, Shape,
};
use plumb_engine::{Activation, Init, Rng};
use plumb_formats::DType;

/// conv2d 3 → 8 channels, kernel 3 × 3 (fan-in 27), relu; flatten; dense softmax.
fn conv_net() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 3,
            height: 7,
            width: 7,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv2d(8, [3, 3]), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// Weights drawn by `draw(shape, rng)` for each weight tensor; biases 0.
fn params(
    g: &Graph,
    seed: u64,
    mut draw: impl FnMut(&str, &[usize], &mut Rng) -> f64,
) -> Vec<ArrayD<f64>> {
    let mut rng = Rng::new(seed);
    g.tensors()
        .iter()
        .map(|t| {
            let s = &t.spec.shape;
            ArrayD::from_shape_fn(IxDyn(s), |_| {
                if t.spec.suffix.ends_with("bias") {
                    0.0
                } else {
                    draw(&t.name, s, &mut rng)
                }
            })
        })
        .collect()
}

fn claimed(g: &Graph, p: &[ArrayD<f64>], scheme: Init) -> Audit {
    let dtypes = vec![DType::F32; p.len()];
    let w = GraphWeights {
        graph: g,
        params: p,
        dtypes: &dtypes,
    };
    let batch = probe(g, 16, 1);
    let t = Thresholds::default();
    audit_graph(
        &w,
        fitted_shapes(&w),
        &batch,
        Some(scheme),
        &t,
        &KindThresholds::default(),
        1,
    )
    .unwrap()
}

fn mismatched(a: &Audit) -> Vec<String> {
    a.findings
        .iter()
        .filter(|f| f.code == "init-mismatch")
        .filter_map(|f| f.tensor.clone())
        .collect()
}

#[test]
fn he_normal_draws_with_the_convolution_fan_in_pass_and_in_channels_alone_fail() {
    let g = conv_net();
    assert_eq!(g.tensors()[0].spec.fan_in, 27, "He et al.: 3 × 3 × 3");
    // The dense layer reads 8 × 5 × 5 = 200 values.
    let he = |fan_in: f64| {
        move |_: &str, _: &[usize], rng: &mut Rng| (2.0 / fan_in).sqrt() * rng.normal()
    };
    // A genuine file fails the Holm-corrected test with probability at most 1% per audit: over
    // 40 seeds, 0.4 rejections are expected and 3 or more happen with probability under 1%.
    // (Seed 3's first 216 draws are such a rejection: D = 0.1407, p = 3.4e-4 by
    // scipy.stats.kstest too.)
    let mut rejected = 0;
    for seed in 0..40 {
        let right = params(&g, seed, |name, s, rng| {
            let fan_in = if name == "layer1.weight" { 27.0 } else { 200.0 };
            he(fan_in)(name, s, rng)
        });
        let a = claimed(&g, &right, Init::HeNormal);
        rejected += usize::from(!mismatched(&a).is_empty());
        assert_eq!(a.init[0].fan_in, 27);
        // The sample spread of 216 normal draws is off by about 1/√(2 · 216) ≈ 4.8% (one
        // standard error): 0.2 is four of them.
        assert!(
            (a.init[0].reference_ratio - 1.0).abs() < 0.2,
            "{:?}",
            a.init[0]
        );
        // Fan-in taken as the in-channels alone: σ = √(2/3), three times He's.
        let wrong = params(&g, seed, |name, s, rng| {
            let fan_in = if name == "layer1.weight" { 3.0 } else { 200.0 };
            he(fan_in)(name, s, rng)
        });
        let a = claimed(&g, &wrong, Init::HeNormal);
        assert!(
            mismatched(&a).contains(&"layer1.weight".to_string()),
            "seed {seed}"
        );
    }
    assert!(rejected <= 2, "{rejected} of 40 genuine files rejected");
}

// An lstm's input and recurrent weights are (4 · units) × fan-in: fan-in is the columns, fan-out
// the rows. Glorot-uniform draws with those fans pass the claim and fail a claim of He-normal
// (σ √(2/3) ≈ 0.816 against Glorot's √(2/(3 + 20)) ≈ 0.295 for the input weight).
#[test]
fn glorot_uniform_draws_for_recurrent_weights() {
    let mut b = GraphBuilder::new(
        Shape::Sequence { steps: 4, width: 3 },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Identity, |s| {
        Lstm::new(5, "ifgo", "last", s)
    })
    .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let glorot = |_: &str, s: &[usize], rng: &mut Rng| {
        let (fan_out, fan_in) = (s[0] as f64, s[1] as f64);
        let a = (6.0 / (fan_in + fan_out)).sqrt();
        rng.range(-a, a)
    };
    let mut rejected = 0;
    for seed in 0..40 {
        let p = params(&g, seed, glorot);
        let a = claimed(&g, &p, Init::GlorotUniform);
        rejected += usize::from(!mismatched(&a).is_empty());
        assert_eq!(a.init.len(), 3, "input, recurrent and dense weights");
        assert_eq!((a.init[0].fan_in, a.init[0].fan_out), (3, 20));
        let a = claimed(&g, &p, Init::HeNormal);
        assert!(
            mismatched(&a).contains(&"layer1.input.weight".to_string()),
            "seed {seed}: {:?}",
            a.init
        );
    }
    assert!(rejected <= 2, "{rejected} of 40 genuine files rejected");
}
