//! Helpers for the layer-graph tests: random values, num-dual's gradient through the graph's
//! forward pass, and the relative comparison.

#![allow(dead_code)]

use ndarray::{Array2, ArrayD, IxDyn};
use num_dual::Dual64;
use plumb_engine::Rng;
use plumb_engine::graph::{Gradient, Graph};

/// Random parameters: weights scaled by 1/√fan-in, biases and shifts small, scales near 1.
pub fn random_params(g: &Graph, rng: &mut Rng) -> Vec<ArrayD<f64>> {
    use plumb_engine::graph::Role;
    g.tensors()
        .iter()
        .map(|t| {
            let sd = 1.0 / (t.spec.fan_in as f64).sqrt();
            ArrayD::from_shape_fn(IxDyn(&t.spec.shape), |_| match t.spec.role {
                Role::Scale => 1.0 + 0.3 * rng.normal(),
                Role::Bias | Role::Shift => 0.2 * rng.normal(),
                _ => sd * rng.normal(),
            })
        })
        .collect()
}

/// A batch of m samples of normal inputs.
pub fn random_x(g: &Graph, m: usize, rng: &mut Rng) -> Array2<f64> {
    Array2::from_shape_fn((m, g.input().size()), |_| rng.normal())
}

/// Targets fitting the loss: one-hot rows per output vector for cross-entropy with softmax, 0/1
/// for sigmoid, normals for squared error.
pub fn random_y(g: &Graph, m: usize, rng: &mut Rng) -> Array2<f64> {
    use plumb_engine::{Activation, Loss};
    let out = g.output();
    let last = g.nodes().last().unwrap().activation;
    let size = out.size();
    let width = *out.dims().last().unwrap();
    match (g.loss_config().loss, last) {
        (Loss::CrossEntropy, Activation::Softmax) => {
            let mut y = Array2::zeros((m, size));
            for i in 0..m {
                for r in 0..size / width {
                    y[[i, r * width + rng.below(width)]] = 1.0;
                }
            }
            y
        }
        (Loss::CrossEntropy, _) => {
            Array2::from_shape_fn((m, size), |_| (rng.uniform() < 0.5) as u8 as f64)
        }
        _ => Array2::from_shape_fn((m, size), |_| rng.normal()),
    }
}

/// dJ/dθ and dJ/dx by forward-mode automatic differentiation (num-dual): one forward pass per
/// parameter and per input value with that value's derivative part set to 1. Independent of the
/// graph's backward pass: it differentiates the forward pass and loss as written.
pub fn dual_gradient(
    g: &Graph,
    params: &[ArrayD<f64>],
    x: &Array2<f64>,
    y: &Array2<f64>,
) -> Gradient<f64> {
    let pd: Vec<ArrayD<Dual64>> = params.iter().map(|p| p.mapv(Dual64::from_re)).collect();
    let xd = x.mapv(Dual64::from_re);
    let yd = y.mapv(Dual64::from_re);
    let mut grads: Vec<ArrayD<f64>> = params.iter().map(|p| p.mapv(|_| 0.0)).collect();
    let mut loss = f64::NAN;
    for t in 0..params.len() {
        for k in 0..params[t].len() {
            let mut q = pd.clone();
            q[t].as_slice_mut().unwrap()[k].eps = 1.0;
            let j = g.loss(&q, xd.view(), yd.view());
            loss = j.re;
            grads[t].as_slice_mut().unwrap()[k] = j.eps;
        }
    }
    let mut input = x.mapv(|_| 0.0);
    for k in 0..x.len() {
        let mut xk = xd.clone();
        xk.as_slice_mut().unwrap()[k].eps = 1.0;
        let j = g.loss(&pd, xk.view(), yd.view());
        loss = j.re;
        input.as_slice_mut().unwrap()[k] = j.eps;
    }
    Gradient {
        loss,
        params: grads,
        input,
    }
}

/// The largest entry-wise relative difference |a − r| / max(|a|, |r|, floor · scale), scale the
/// largest |r| of the tensor, so that entries zero up to rounding in both do not dominate.
pub fn max_relative<'a>(
    got: impl IntoIterator<Item = &'a f64>,
    reference: impl IntoIterator<Item = &'a f64>,
    floor: f64,
) -> f64 {
    let r: Vec<f64> = reference.into_iter().copied().collect();
    let a: Vec<f64> = got.into_iter().copied().collect();
    assert_eq!(a.len(), r.len(), "same number of entries");
    let scale = r.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    a.iter()
        .zip(&r)
        .map(|(&a, &r)| {
            let den = a.abs().max(r.abs()).max(floor * scale);
            if den > 0.0 { (a - r).abs() / den } else { 0.0 }
        })
        .fold(0.0, f64::max)
}

/// The largest entry-wise |a − r| / max(|a|, |r|, floor): the floor given in absolute terms (a
/// tensor whose gradient is zero up to rounding — a conv bias under a batch norm — is judged
/// against the network's gradient scale, not its own).
pub fn max_relative_floored(got: &[f64], reference: &[f64], floor: f64) -> f64 {
    assert_eq!(got.len(), reference.len(), "same number of entries");
    got.iter()
        .zip(reference)
        .map(|(&a, &r)| {
            let den = a.abs().max(r.abs()).max(floor);
            if den > 0.0 { (a - r).abs() / den } else { 0.0 }
        })
        .fold(0.0, f64::max)
}

/// The worst relative difference over every tensor and the input gradient, and where it is.
pub fn worst(got: &Gradient<f64>, reference: &Gradient<f64>, floor: f64) -> (f64, String) {
    let mut worst = (0.0, String::new());
    for (t, (a, r)) in got.params.iter().zip(&reference.params).enumerate() {
        let e = max_relative(a.iter(), r.iter(), floor);
        if e > worst.0 {
            worst = (e, format!("tensor {t}"));
        }
    }
    let e = max_relative(got.input.iter(), reference.input.iter(), floor);
    if e > worst.0 {
        worst = (e, "input".into());
    }
    worst
}

/// The `cases` of a committed fixture file under fixtures/graph/ (written by its generator there).
pub fn fixture_cases(file: &str) -> Vec<serde_json::Value> {
    let path = format!("{}/../../fixtures/graph/{file}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let doc: serde_json::Value = serde_json::from_str(&text).expect("valid JSON");
    doc["cases"].as_array().expect("cases").clone()
}

pub fn usizes(v: &serde_json::Value) -> Vec<usize> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|n| n.as_u64().expect("integer") as usize)
        .collect()
}

pub fn floats(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|n| n.as_f64().expect("number"))
        .collect()
}

/// A tensor written as {"shape": [...], "values": [...]} in C order.
pub fn tensor(v: &serde_json::Value) -> ArrayD<f64> {
    ArrayD::from_shape_vec(IxDyn(&usizes(&v["shape"])), floats(&v["values"])).expect("shape")
}

/// An activation by the name a fixture gives it.
pub fn activation(name: &str) -> plumb_engine::Activation {
    use plumb_engine::Activation;
    match name {
        "identity" => Activation::Identity,
        "relu" => Activation::Relu,
        "tanh" => Activation::Tanh,
        "sigmoid" => Activation::Sigmoid,
        "gelu" => Activation::Gelu,
        "softmax" => Activation::Softmax,
        other => panic!("activation {other}"),
    }
}

/// The whole-batch gradient (`Graph::gradient`, `Graph::parameter_gradient`: a trace that keeps
/// no z where the activation's backward reads its output, freed layer by layer as the backward
/// goes down) against the backward pass over a kept forward pass (`Graph::backward`, what a
/// diagnosis's hooked passes read), bit for bit — the same arithmetic on the same values —
/// with no mistake and with each catalogued mistake of every layer planted (the hypotheses a
/// diagnosis runs through the whole-batch gradient), the input gradient asked for and not.
pub fn freed_trace_matches_kept(
    g: &Graph,
    params: &[ArrayD<f64>],
    x: &Array2<f64>,
    y: &Array2<f64>,
    what: &str,
) {
    let same = |a: &[ArrayD<f64>], b: &[ArrayD<f64>]| {
        a.len() == b.len()
            && a.iter().zip(b).all(|(a, b)| {
                a.shape() == b.shape()
                    && a.iter()
                        .zip(b.iter())
                        .all(|(u, v)| u.to_bits() == v.to_bits())
            })
    };
    let trace = g.forward(params, x.view());
    let loss = g.loss_of(params, &trace, y.view());
    let mut plants = vec![None];
    for node in g.nodes() {
        for code in node.layer.mistakes() {
            plants.push(Some((
                g.plant(&node.name, code).unwrap(),
                format!("{code} in {}", node.name),
            )));
        }
    }
    for plant in &plants {
        let (planted, named) = match plant {
            Some((p, named)) => (Some(p), named.as_str()),
            None => (None, "no mistake"),
        };
        let got = g.gradient(params, x.view(), y.view(), planted);
        assert_eq!(
            got.loss.to_bits(),
            loss.to_bits(),
            "{what}, {named}: the loss"
        );
        let (kept, input) = g.backward(params, x.view(), y.view(), &trace, planted, true);
        assert!(
            same(&got.params, &kept),
            "{what}, {named}: the parameter gradients differ between the freed and the kept trace"
        );
        let input = input.expect("asked for").into_dyn();
        assert!(
            same(&[got.input.into_dyn()], &[input]),
            "{what}, {named}: the input gradient differs between the freed and the kept trace"
        );
        let (_, without) = g.parameter_gradient(params, x.view(), y.view(), planted);
        let (kept, _) = g.backward(params, x.view(), y.view(), &trace, planted, false);
        assert!(
            same(&without, &kept),
            "{what}, {named}: without the input gradient, the parameter gradients differ"
        );
    }
}
