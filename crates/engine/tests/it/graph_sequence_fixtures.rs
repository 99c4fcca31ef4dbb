//! The sequence kinds against fixtures/graph/sequence.json, written by
//! fixtures/graph/generate_sequence.py: autograd through a plain NumPy forward pass of the
//! published equations (LSTM with forget gate, GRU with either reset, scaled dot-product
//! attention), and three mistakes formed independently there. Loss, every parameter gradient and
//! the input gradient agree to 1e-10 relative.

use crate::graph_common;

use graph_common::{activation, fixture_cases, floats, max_relative_floored, tensor, usizes};
use ndarray::{Array2, ArrayD};
use plumb_engine::Loss;
use plumb_engine::graph::{
    Attention, Dense, Graph, GraphBuilder, Gru, L2Divisor, LossConfig, Lstm, Reduction, Shape,
};
use serde_json::Value;

/// Relative agreement demanded; entries below FLOOR times the gradient's largest entry (an
/// attention key bias has an exact gradient of 0, both sides hold rounding noise there) are judged
/// against that floor.
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-5;

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
    let input = Shape::Sequence {
        steps: dims[0],
        width: dims[1],
    };
    let mut b = GraphBuilder::new(input, config);
    for layer in case["layers"].as_array().unwrap() {
        let name = layer["name"].as_str();
        let act = activation(layer["activation"].as_str().unwrap_or("identity"));
        let units = layer["units"].as_u64().unwrap_or(0) as usize;
        let text = |key: &str| layer[key].as_str().unwrap().to_string();
        match layer["kind"].as_str().unwrap() {
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

#[test]
fn sequence_gradients_agree_with_autograd() {
    let cases = cases();
    assert_eq!(cases.len(), 5);
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
