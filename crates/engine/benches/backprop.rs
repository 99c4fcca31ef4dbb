//! Forward + backward pass of a 784-256-128-10 network on the layer graph at batch 256 (the size
//! of a small image classifier), in f64 and f32. Run: `cargo bench -p plumb-engine --bench
//! backprop`. `benches/grad-numpy.sh` times the same pass against NumPy in one run.

use criterion::{Criterion, criterion_group, criterion_main};
use ndarray::ArrayD;
use plumb_engine::graph::{Dense, Graph, GraphBuilder, LossConfig, Shape};
use plumb_engine::{Activation, Batch, Init, Rng};
use std::hint::black_box;

/// 784-256-128-10, relu, relu, softmax; cross-entropy, mean, L2 1e-4 over 2m.
fn network() -> Graph {
    let loss = LossConfig {
        l2: 1e-4,
        ..LossConfig::cross_entropy()
    };
    let mut b = GraphBuilder::new(Shape::Flat(784), loss);
    for (units, act) in [
        (256, Activation::Relu),
        (128, Activation::Relu),
        (10, Activation::Softmax),
    ] {
        b.push(None, act, |s| Dense::new(units, s))
            .expect("a dense layer");
    }
    b.finish().expect("a valid network")
}

fn backprop(c: &mut Criterion) {
    let g = network();
    let p = Init::HeNormal.graph_params(&g, &mut Rng::new(1));
    let batch = Batch::graph_synthetic(&g, 256, 1);
    let (x, y) = (batch.x.view(), batch.y.view());
    let p32: Vec<ArrayD<f32>> = p.iter().map(|t| t.mapv(|v| v as f32)).collect();
    let (x32, y32) = batch.cast::<f32>();
    let mut group = c.benchmark_group("784-256-128-10 batch 256");
    group.sample_size(30);
    group.bench_function("forward+backward f64", |b| {
        b.iter(|| black_box(g.gradient(&p, x, y, None)))
    });
    group.bench_function("forward+backward f64, no input gradient", |b| {
        b.iter(|| black_box(g.parameter_gradient(&p, x, y, None)))
    });
    group.bench_function("forward+backward f32", |b| {
        b.iter(|| black_box(g.gradient(&p32, x32.view(), y32.view(), None)))
    });
    group.bench_function("forward only f64", |b| {
        b.iter(|| black_box(g.loss(&p, x, y)))
    });
    group.finish();
}

criterion_group!(benches, backprop);
criterion_main!(benches);
