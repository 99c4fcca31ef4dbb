//! What the fd benches share: the 784-128-64-10 networks they time (on the layer graph, as every
//! `plumb check` runs), the naive loss they are compared with, and the fingerprint of a check's
//! results that a run before and after a change compares. Each bench uses part of it.
#![allow(dead_code)]

use ndarray::ArrayD;
use plumb_engine::graph::{Dense, Graph, GraphBuilder, LossConfig, Shape};
use plumb_engine::{Activation, Batch, Init, Rng};
use plumb_fd::{Method, Status};

/// A 784-128-64-10 network with `act` in both hidden layers (softmax output, cross-entropy, L2
/// 1e-4), weights drawn by `init` (seed 1) and a synthetic batch of 32 (seed 1): 109,386
/// parameters in six tensors (each layer's weight and bias).
pub fn graph(act: Activation, init: Init) -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let config = LossConfig {
        l2: 1e-4,
        ..LossConfig::cross_entropy()
    };
    let mut builder = GraphBuilder::new(Shape::Flat(784), config);
    for (units, act) in [(128, act), (64, act), (10, Activation::Softmax)] {
        builder.push(None, act, |s| Dense::new(units, s)).unwrap();
    }
    let g = builder.finish().unwrap();
    let p = init.graph_params(&g, &mut Rng::new(1));
    let batch = Batch::graph_synthetic(&g, 32, 1);
    (g, p, batch)
}

/// The tanh network (Glorot-uniform weights): what `check`, `precision` and `graph dense` time.
pub fn network() -> (Graph, Vec<ArrayD<f64>>, Batch) {
    graph(Activation::Tanh, Init::GlorotUniform)
}

/// The naive loss at entry `k` of tensor `t` moved by `delta`: the parameters copied, the entry
/// moved, a whole forward pass.
pub fn full_loss(g: &Graph, p: &[ArrayD<f64>], b: &Batch, (t, k): (usize, usize), d: f64) -> f64 {
    let mut q = p.to_vec();
    q[t].as_slice_mut().expect("standard layout")[k] += d;
    g.loss(&q, b.x.view(), b.y.view())
}

/// The naive central difference of one coordinate: four whole forward passes.
pub fn naive(g: &Graph, p: &[ArrayD<f64>], b: &Batch, c: (usize, usize)) -> f64 {
    let f = |d: f64| (full_loss(g, p, b, c, d), false);
    let theta = p[c.0].as_slice().expect("standard layout")[c.1];
    let h = Method::Central.default_step(theta, f64::EPSILON);
    Method::Central.estimate(&f, 0.0, h, 0.0, |h| h).value
}

/// The FNV-1a hash of the loss and every estimate's bits (numeric, then analytic), and the count
/// of each verdict: `results 0123…; N match, N unsettled, N unreliable, N mismatch`.
pub fn fingerprint(loss: f64, estimates: impl Iterator<Item = (f64, f64, Status)>) -> String {
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |x: f64| {
        for byte in x.to_bits().to_le_bytes() {
            hash = (hash ^ u64::from(byte)).wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    eat(loss);
    let mut counts = [0usize; 4];
    for (numeric, analytic, status) in estimates {
        eat(numeric);
        eat(analytic);
        counts[status as usize] += 1;
    }
    let counts: Vec<String> = [
        Status::Match,
        Status::Unsettled,
        Status::Unreliable,
        Status::Mismatch,
    ]
    .iter()
    .map(|s| format!("{} {}", counts[*s as usize], s.name()))
    .collect();
    format!("results {hash:016x}; {}", counts.join(", "))
}

/// The fingerprint of a graph check's results ([`fingerprint`]).
pub fn summary(r: &plumb_fd::GraphCheck) -> String {
    let coords = r.coords.iter().map(|c| (c.numeric, c.analytic, c.status));
    let directions = r
        .directions
        .iter()
        .map(|d| (d.numeric, d.analytic, d.status));
    fingerprint(r.loss, coords.chain(directions))
}
