//! The full check of a small 1-D CNN on the layer graph (every coordinate and 4 directions per
//! tensor and over all, central differences in f64) — the figure `benches/graph-cnn.sh` sets
//! beside a naive NumPy loop computing the same central differences (benches/graph_cnn.py).
//!
//! Network (the same in the script): input [1, 64], batch 32; conv1d 4 channels, kernel 5, relu;
//! max-pool 2; conv1d 8 channels, kernel 3, relu; max-pool 2; flatten; dense 3, softmax;
//! cross-entropy. 467 parameters in 6 tensors.

use criterion::{Criterion, criterion_group, criterion_main};
use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::Activation;
use plumb_engine::Rng;
use plumb_engine::graph::{
    Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, LossConfig, Pool, PoolKind, Shape,
};
use plumb_fd::{CheckConfig, Method, Precision, Sample, check_graph};
use std::hint::black_box;

pub fn cnn() -> (Graph, Vec<ArrayD<f64>>, Array2<f64>, Array2<f64>) {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 1,
            length: 64,
        },
        LossConfig::cross_entropy(),
    );
    let pool = |s: &Shape| Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s);
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(4, 5), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, pool).unwrap();
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(8, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, pool).unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    let g = b.finish().unwrap();
    let mut rng = Rng::new(1);
    let params = g
        .tensors()
        .iter()
        .map(|t| {
            let sd = (2.0 / t.spec.fan_in as f64).sqrt();
            ArrayD::from_shape_fn(IxDyn(&t.spec.shape), |_| sd * rng.normal())
        })
        .collect();
    let x = Array2::from_shape_fn((32, 64), |_| rng.normal());
    let y = Array2::from_shape_fn((32, 3), |(i, k)| f64::from(u8::from(i % 3 == k)));
    (g, params, x, y)
}

fn bench(c: &mut Criterion) {
    let (g, params, x, y) = cnn();
    assert_eq!(g.parameters(), 467);
    let cfg = CheckConfig {
        sample: Some(Sample::All),
        ..CheckConfig::new(Method::Central, Precision::F64)
    };
    let mut group = c.benchmark_group("graph check, 1-D CNN, 467 parameters, batch 32");
    group.sample_size(10);
    group.bench_function("plumb full central check", |bch| {
        bch.iter(|| {
            black_box(check_graph(&g, &params, x.view(), y.view(), &cfg, &|_, _| {}).unwrap())
        })
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
