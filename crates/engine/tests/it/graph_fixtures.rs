//! The layer graph against fixtures/graph/cases.json, written by fixtures/graph/generate.py:
//! autograd through a plain NumPy forward pass (its convolutions checked against
//! scipy.signal.correlate / correlate2d before writing), and each catalogued mistake's gradient by
//! an independent NumPy formulation of it. Loss, every parameter gradient (in the file's storage
//! order where the case declares one) and the input gradient agree to 1e-10 relative.

use crate::graph_common;

use graph_common::{activation, fixture_cases, floats, max_relative_floored, tensor, usizes};
use ndarray::{Array2, ArrayD};
use plumb_engine::Loss;
use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, Dense, Flatten, GlobalAvgPool, Graph, GraphBuilder,
    L2Divisor, LayerNorm, LossConfig, Padding, Pool, PoolKind, Reduction, RmsNorm, Shape, Storage,
};
use serde_json::Value;

/// Relative agreement demanded; entries below FLOOR times the gradient's largest entry (a conv
/// bias under a batch norm has an exact gradient of 0, both sides hold rounding noise there) are
/// judged against that floor, i.e. to 1e-15 of the gradient's scale.
const TOL: f64 = 1e-10;
const FLOOR: f64 = 1e-5;

fn cases() -> Vec<Value> {
    fixture_cases("cases.json")
}

fn pair(v: &Value) -> [usize; 2] {
    let u = usizes(v);
    [u[0], u[1]]
}

/// The graph a case describes, and per tensor the storage order its file values are in.
fn graph(case: &Value) -> (Graph, Vec<Option<Storage>>) {
    let dims = usizes(&case["input"]);
    let input = match dims.len() {
        1 => Shape::Flat(dims[0]),
        2 => Shape::Signal {
            channels: dims[0],
            length: dims[1],
        },
        _ => Shape::Image {
            channels: dims[0],
            height: dims[1],
            width: dims[2],
        },
    };
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
        l2_on_bias: case["l2_on_bias"].as_bool().unwrap(),
    };
    let mut b = GraphBuilder::new(input, config);
    let mut storages = Vec::new();
    for layer in case["layers"].as_array().unwrap() {
        let kind = layer["kind"].as_str().unwrap();
        let name = layer["name"].as_str();
        let act = activation(layer["activation"].as_str().unwrap_or("identity"));
        let eps = layer["epsilon"].as_f64().unwrap_or(0.0);
        let pool = |op, dims| {
            let (size, stride) = (pair(&layer["size"]), pair(&layer["stride"]));
            move |s: &Shape| Pool::new(op, dims, size, stride, s)
        };
        match kind {
            "conv1d" | "conv2d" => {
                let dims = if kind == "conv1d" { 1 } else { 2 };
                let settings = ConvSettings {
                    dims,
                    channels: layer["channels"].as_u64().unwrap() as usize,
                    kernel: pair(&layer["kernel"]),
                    stride: pair(&layer["stride"]),
                    dilation: pair(&layer["dilation"]),
                    padding: match layer["padding"].as_str() {
                        Some(_) => Padding::Same,
                        None => Padding::Explicit(pair(&layer["padding"])),
                    },
                    bias: layer["bias"].as_bool().unwrap(),
                };
                b.push(name, act, |s| Conv::new(&settings, s)).unwrap();
                let canonical = if dims == 1 { "oik" } else { "oihw" };
                storages.push(
                    layer["storage"]
                        .as_str()
                        .map(|o| Storage::parse(o, canonical).unwrap()),
                );
                if settings.bias {
                    storages.push(None);
                }
                continue;
            }
            "max-pool1d" => b.push(name, act, pool(PoolKind::Max, 1)),
            "max-pool2d" => b.push(name, act, pool(PoolKind::Max, 2)),
            "avg-pool1d" => b.push(name, act, pool(PoolKind::Avg, 1)),
            "avg-pool2d" => b.push(name, act, pool(PoolKind::Avg, 2)),
            "global-avg-pool" => b.push(name, act, GlobalAvgPool::new),
            "flatten" => b.push(name, act, Flatten::new),
            "dense" => b.push(name, act, |s| {
                Dense::new(layer["units"].as_u64().unwrap() as usize, s)
            }),
            "batch-norm" => b.push(name, act, |s| BatchNorm::new(eps, s)),
            "layer-norm" => b.push(name, act, |s| LayerNorm::new(eps, s)),
            "rms-norm" => b.push(name, act, |s| RmsNorm::new(eps, s)),
            "add" => b.push(name, act, |s| Add::new(layer["from"].as_str().unwrap(), s)),
            other => panic!("kind {other}"),
        }
        .unwrap();
    }
    let g = b.finish().unwrap();
    storages.resize(g.tensors().len(), None);
    (g, storages)
}

/// The case's parameters in canonical order, and x, y as m × size matrices.
fn values(
    case: &Value,
    storages: &[Option<Storage>],
) -> (Vec<ArrayD<f64>>, Array2<f64>, Array2<f64>) {
    let params = case["params"]
        .as_array()
        .unwrap()
        .iter()
        .zip(storages)
        .map(|(p, s)| match s {
            Some(s) => s.to_canonical(&tensor(p)),
            None => tensor(p),
        })
        .collect();
    let flat = |v: &Value| {
        let t = tensor(v);
        let m = t.shape()[0];
        let n = t.len() / m;
        t.into_shape_with_order((m, n)).unwrap()
    };
    (params, flat(&case["x"]), flat(&case["y"]))
}

/// Compares an engine gradient (canonical order) with the fixture's (file order).
fn compare(
    what: &str,
    g: &Graph,
    storages: &[Option<Storage>],
    params: &[ArrayD<f64>],
    input: &Array2<f64>,
    grads: &Value,
    input_grad: &Value,
) {
    // The floor: FLOOR times the largest entry of the whole reference gradient.
    let all: Vec<f64> = grads
        .as_array()
        .unwrap()
        .iter()
        .flat_map(floats)
        .chain(floats(input_grad))
        .collect();
    let floor = FLOOR * all.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    for (t, (got, want)) in params.iter().zip(grads.as_array().unwrap()).enumerate() {
        let got = match &storages[t] {
            Some(s) => s.to_file(got),
            None => got.clone(),
        };
        let got: Vec<f64> = got.iter().copied().collect();
        let err = max_relative_floored(&got, &floats(want), floor);
        assert!(err <= TOL, "{what}: {} off by {err:e}", g.tensors()[t].name);
    }
    let got: Vec<f64> = input.iter().copied().collect();
    let err = max_relative_floored(&got, &floats(input_grad), floor);
    assert!(err <= TOL, "{what}: input gradient off by {err:e}");
}

#[test]
fn loss_and_gradients_match_autograd_through_numpy() {
    for case in cases() {
        let name = case["name"].as_str().unwrap();
        let (g, storages) = graph(&case);
        let (params, x, y) = values(&case, &storages);
        let grad = g.gradient(&params, x.view(), y.view(), None);
        // Source: fixtures/graph/generate.py (autograd; conv forward checked against scipy).
        let want = case["loss_value"].as_f64().unwrap();
        assert!(
            (grad.loss - want).abs() <= TOL * want.abs(),
            "{name}: loss {} vs {want}",
            grad.loss
        );
        compare(
            name,
            &g,
            &storages,
            &grad.params,
            &grad.input,
            &case["grads"],
            &case["input_grad"],
        );
    }
}

#[test]
fn each_mistake_reproduces_its_numpy_formulation() {
    let mut seen = std::collections::BTreeSet::new();
    for case in cases() {
        let name = case["name"].as_str().unwrap();
        let (g, storages) = graph(&case);
        let (params, x, y) = values(&case, &storages);
        for mistake in case["mistakes"].as_array().unwrap() {
            let (layer, code) = (
                mistake["layer"].as_str().unwrap(),
                mistake["code"].as_str().unwrap(),
            );
            let planted = g.plant(layer, code).unwrap();
            let grad = g.gradient(&params, x.view(), y.view(), Some(&planted));
            // Source: fixtures/graph/generate.py's gradient-stop formulation of the mistake.
            compare(
                &format!("{name}, {code} in {layer}"),
                &g,
                &storages,
                &grad.params,
                &grad.input,
                &mistake["grads"],
                &mistake["input_grad"],
            );
            seen.insert(code.to_string());
        }
    }
    // Every catalogued code of these kinds has a NumPy formulation in the fixtures.
    for code in [
        "overlap-overwritten",
        "kernel-flipped",
        "channels-swapped",
        "padding-offset",
        "pool-gradient-spread",
        "norm-statistics-constant",
        "norm-epsilon-misplaced",
        "norm-scale-unnormalised",
        "skip-gradient-dropped",
    ] {
        assert!(seen.contains(code), "{code} has no fixture");
    }
}
