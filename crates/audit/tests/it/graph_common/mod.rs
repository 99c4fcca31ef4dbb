//! Helpers for the graph audit's tests: healthy parameters, a probe batch, one audit run.

#![allow(dead_code)]

use ndarray::{Array2, ArrayD, IxDyn};
use plumb_audit::{Audit, GraphWeights, KindThresholds, Thresholds, audit_graph, fitted_shapes};
use plumb_engine::graph::Graph;
use plumb_engine::{Batch, Rng};
use plumb_formats::DType;
use plumb_report::Severity;

/// He-normal draws for weights (σ = √(2 / fan-in), He et al. 2015), 0.1 for biases, 1 and 0 for
/// norm scales and shifts.
pub fn healthy(g: &Graph, seed: u64) -> Vec<ArrayD<f64>> {
    let mut rng = Rng::new(seed);
    g.tensors()
        .iter()
        .map(|t| {
            let s = &t.spec;
            let sd = (2.0 / s.fan_in as f64).sqrt();
            ArrayD::from_shape_fn(IxDyn(&s.shape), |_| match t.spec.suffix {
                "bias" => 0.1,
                "scale" => 1.0,
                "shift" => 0.0,
                _ => sd * rng.normal(),
            })
        })
        .collect()
}

/// m samples of standard normal inputs and one-hot targets of `classes`.
pub fn probe(g: &Graph, m: usize, seed: u64) -> Batch {
    let mut rng = Rng::new(seed);
    let n = g.input().size();
    let c = g.output().size();
    let x = Array2::from_shape_fn((m, n), |_| rng.normal());
    let y = Array2::from_shape_fn((m, c), |(i, j)| f64::from(u8::from(i % c == j)));
    Batch { x, y }
}

pub fn run(g: &Graph, params: &[ArrayD<f64>], batch: &Batch) -> Audit {
    let dtypes = vec![DType::F64; params.len()];
    let w = GraphWeights {
        graph: g,
        params,
        dtypes: &dtypes,
    };
    audit_graph(
        &w,
        fitted_shapes(&w),
        batch,
        None,
        &Thresholds::default(),
        &KindThresholds::default(),
        7,
    )
    .expect("the weights and batch fit")
}

/// The codes of the warnings and errors (notes such as a zero bias left aside).
pub fn alarms(a: &Audit) -> Vec<String> {
    a.findings
        .iter()
        .filter(|f| f.severity > Severity::Note)
        .map(|f| f.code.clone())
        .collect()
}

pub fn has(a: &Audit, code: &str) -> bool {
    a.findings.iter().any(|f| f.code == code)
}
