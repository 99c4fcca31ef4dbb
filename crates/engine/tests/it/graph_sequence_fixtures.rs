//! The sequence kinds against fixtures/graph/sequence.json, written by
//! fixtures/graph/generate_sequence.py: autograd through a plain NumPy forward pass of the
//! published equations (LSTM with forget gate: Hochreiter & Schmidhuber 1997, Gers et al. 2000;
//! GRU: Cho et al. 2014, either reset; scaled dot-product attention: Vaswani et al. 2017; an rnn
//! and an embedding lookup), over drawn sizes, cell activations, gate orders, outputs, heads and
//! masks, with every catalogued mistake of these kinds formed independently there. In f64 the
//! loss, every parameter gradient and the input gradient agree to 1e-10 relative; in f32 to
//! single precision.

use crate::graph_common;

use graph_common::{activation, fixture_cases, floats, max_relative_floored, tensor, usizes};
use ndarray::{Array2, ArrayD};
use plumb_engine::Loss;
use plumb_engine::graph::{
    Attention, Dense, Embedding, Graph, GraphBuilder, Gru, L2Divisor, LossConfig, Lstm, Reduction,
    Rnn, Shape,
};
use serde_json::Value;

/// Relative agreement demanded; entries below FLOOR times the gradient's largest entry (an
/// attention key bias has an exact gradient of 0, both sides hold rounding noise there) are judged
/// against that floor.
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-5;
/// f32 against autograd's f64 (see `sequence_gradients_agree_with_autograd_in_f32`), and the
/// share of the whole gradient's largest entry below which a tensor is judged against that share:
/// an attention key bias's exact gradient is 0, and f32's rounding leaves about 1e-8 of the
/// gradient's scale there.
const F32_TOL: f64 = 2e-4;
const F32_FLOOR: f64 = 1e-3;

fn cases() -> Vec<Value> {
    fixture_cases("sequence.json")
}

fn matrix(v: &Value) -> Array2<f64> {
    tensor(v).into_dimensionality().expect("2-D")
}

fn graph(case: &Value) -> Graph {
    let dims = usizes(&case["input"]);
    let config = LossConfig {
        loss: match case["loss"].as_str().unwrap() {
            "cross-entropy" => Loss::CrossEntropy,
            _ => Loss::SquaredError,
        },
        reduction: match case["reduction"].as_str().unwrap() {
            "sum" => Reduction::Sum,
            _ => Reduction::Mean,
        },
        l2: case["l2"].as_f64().unwrap(),
        l2_divisor: match case["l2_divisor"].as_str().unwrap() {
            "2m" => L2Divisor::TwoM,
            "2" => L2Divisor::Two,
            "m" => L2Divisor::M,
            _ => L2Divisor::One,
        },
        l2_on_bias: false,
    };
    let input = if case["tokens"].as_bool().unwrap() {
        Shape::Tokens {
            steps: dims[0],
            vocabulary: dims[1],
        }
    } else {
        Shape::Sequence {
            steps: dims[0],
            width: dims[1],
        }
    };
    let mut b = GraphBuilder::new(input, config);
    for layer in case["layers"].as_array().unwrap() {
        let name = layer["name"].as_str();
        let act = activation(layer["activation"].as_str().unwrap_or("identity"));
        let units = layer["units"].as_u64().unwrap_or(0) as usize;
        let text = |key: &str| layer[key].as_str().unwrap().to_string();
        match layer["kind"].as_str().unwrap() {
            "embedding" => b.push(name, act, |s| {
                Embedding::new(layer["size"].as_u64().unwrap() as usize, s)
            }),
            "rnn" => b.push(name, act, |s| {
                Rnn::new(units, activation(&text("cell")), &text("output"), s)
            }),
            "lstm" => b.push(name, act, |s| {
                Lstm::new(units, &text("gate-order"), &text("output"), s)
            }),
            "gru" => b.push(name, act, |s| {
                Gru::new(
                    units,
                    &text("gate-order"),
                    &text("reset"),
                    &text("output"),
                    s,
                )
            }),
            "attention" => b.push(name, act, |s| {
                Attention::new(
                    layer["heads"].as_u64().unwrap() as usize,
                    layer["causal"].as_bool().unwrap(),
                    s,
                )
            }),
            "dense" => b.push(name, act, |s| Dense::new(units, s)),
            other => panic!("kind {other}"),
        }
        .unwrap();
    }
    b.finish().unwrap()
}

/// Per tensor (and the input gradient): the largest difference against `tol` times the tensor's
/// largest reference entry, floored at F32_FLOOR times the whole gradient's (f32's rounding is
/// relative to the values it sums, not to each entry).
fn compare_scaled(
    what: &str,
    got: &[ArrayD<f64>],
    input: &Array2<f64>,
    grads: &Value,
    input_grad: &Value,
    tol: f64,
) -> f64 {
    let mut reference: Vec<Vec<f64>> = grads.as_array().unwrap().iter().map(floats).collect();
    reference.push(floats(input_grad));
    let largest = |v: &[f64]| v.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    let scale = reference.iter().map(|r| largest(r)).fold(0.0f64, f64::max);
    let mut got: Vec<Vec<f64>> = got.iter().map(|g| g.iter().copied().collect()).collect();
    got.push(input.iter().copied().collect());
    assert_eq!(got.len(), reference.len(), "{what}: tensor count");
    let mut worst = 0.0f64;
    for (t, (g, r)) in got.iter().zip(&reference).enumerate() {
        let diff = g
            .iter()
            .zip(r)
            .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
        let err = diff / largest(r).max(F32_FLOOR * scale).max(f64::MIN_POSITIVE);
        assert!(
            err <= tol,
            "{what}: tensor {t} (last: the input) off by {err:e}"
        );
        worst = worst.max(err);
    }
    worst
}

fn compare(
    what: &str,
    got: &[ArrayD<f64>],
    input: &Array2<f64>,
    grads: &Value,
    input_grad: &Value,
) {
    let reference: Vec<Vec<f64>> = grads.as_array().unwrap().iter().map(floats).collect();
    let scale = reference
        .iter()
        .flatten()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    assert_eq!(got.len(), reference.len(), "{what}: tensor count");
    for (t, (g, r)) in got.iter().zip(&reference).enumerate() {
        let err = max_relative_floored(g.as_slice().unwrap(), r, FLOOR * scale);
        assert!(err <= TOL, "{what}: tensor {t} off by {err:e}");
    }
    let r = floats(input_grad);
    let scale = r.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let err = max_relative_floored(input.as_slice().unwrap(), &r, FLOOR * scale);
    assert!(err <= TOL, "{what}: input gradient off by {err:e}");
}

/// Every code of DESIGN §7's recurrent, attention and embedding rows, and every kind, appears.
#[test]
fn the_fixture_covers_every_sequence_kind_and_mistake() {
    let mut kinds = std::collections::BTreeSet::new();
    let mut codes = std::collections::BTreeSet::new();
    for case in cases() {
        for layer in case["layers"].as_array().unwrap() {
            kinds.insert(layer["kind"].as_str().unwrap().to_string());
        }
        for m in case["mistakes"].as_array().unwrap() {
            codes.insert(m["code"].as_str().unwrap().to_string());
        }
    }
    let want = |v: &[&str]| v.iter().map(|s| s.to_string()).collect();
    assert_eq!(
        kinds,
        want(&["attention", "dense", "embedding", "gru", "lstm", "rnn"])
    );
    assert_eq!(
        codes,
        want(&[
            "attention-scale-missing",
            "embedding-rows-overwritten",
            "gates-reordered",
            "mask-ignored-in-backward",
            "softmax-jacobian-diagonal",
            "state-gradient-dropped",
            "time-overwritten",
            "time-truncated",
        ])
    );
}

/// The engine in f32 at the fixture's values rounded to f32, against autograd's f64 gradient at
/// the unrounded ones: rounding the inputs moves the gradient by about ε₃₂ = 6e-8 of its scale
/// times the network's condition, and f32 arithmetic through a few steps adds a few hundred ε₃₂;
/// 2e-4 of each tensor's largest entry (floored at 1e-3 of the whole gradient's) holds that with
/// a margin (measured worst over every case and plant: 6.2e-5, printed with `--nocapture`).
#[test]
fn sequence_gradients_agree_with_autograd_in_f32() {
    let mut worst = 0.0f64;
    for case in &cases() {
        let name = case["name"].as_str().unwrap();
        let g = graph(case);
        let params: Vec<ArrayD<f32>> = case["params"]
            .as_array()
            .unwrap()
            .iter()
            .map(|p| tensor(p).mapv(|v| v as f32))
            .collect();
        let (x, y) = (
            matrix(&case["x"]).mapv(|v| v as f32),
            matrix(&case["y"]).mapv(|v| v as f32),
        );
        let wide = |t: &[ArrayD<f32>]| -> Vec<ArrayD<f64>> {
            t.iter().map(|a| a.mapv(f64::from)).collect()
        };
        let mut runs = vec![(None, &case["grads"], &case["input_grad"])];
        for m in case["mistakes"].as_array().unwrap() {
            let planted = g
                .plant(m["layer"].as_str().unwrap(), m["code"].as_str().unwrap())
                .unwrap();
            runs.push((Some(planted), &m["grads"], &m["input_grad"]));
        }
        for (planted, grads, input_grad) in runs {
            let got = g.gradient(&params, x.view(), y.view(), planted.as_ref());
            let what = format!("{name} f32 {:?}", planted.as_ref().map(|p| p.code()));
            worst = worst.max(compare_scaled(
                &what,
                &wide(&got.params),
                &got.input.mapv(f64::from),
                grads,
                input_grad,
                F32_TOL,
            ));
        }
    }
    eprintln!("f32 against autograd: worst {worst:e} of the tensor's scale");
}

#[test]
fn sequence_gradients_agree_with_autograd() {
    let cases = cases();
    assert_eq!(cases.len(), 16);
    for case in &cases {
        let name = case["name"].as_str().unwrap();
        let g = graph(case);
        let params: Vec<ArrayD<f64>> = case["params"]
            .as_array()
            .unwrap()
            .iter()
            .map(tensor)
            .collect();
        g.check_params(&params).unwrap();
        let (x, y) = (matrix(&case["x"]), matrix(&case["y"]));
        g.check_batch(x.view(), y.view()).unwrap();
        let grad = g.gradient(&params, x.view(), y.view(), None);
        let want = case["loss_value"].as_f64().unwrap();
        assert!(
            (grad.loss - want).abs() <= TOL * want.abs(),
            "{name}: loss {} vs {want}",
            grad.loss
        );
        compare(
            name,
            &grad.params,
            &grad.input,
            &case["grads"],
            &case["input_grad"],
        );
        for m in case["mistakes"].as_array().unwrap() {
            let (layer, code) = (m["layer"].as_str().unwrap(), m["code"].as_str().unwrap());
            let planted = g.plant(layer, code).unwrap();
            let got = g.gradient(&params, x.view(), y.view(), Some(&planted));
            compare(
                &format!("{name} {code}"),
                &got.params,
                &got.input,
                &m["grads"],
                &m["input_grad"],
            );
        }
    }
}
