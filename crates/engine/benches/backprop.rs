//! Forward + backward pass of a 784-256-128-10 network at batch 256 (the size of a small image
//! classifier), in f64 and f32. Run: `cargo bench -p plumb-engine --bench backprop`.

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng};
use std::hint::black_box;

fn backprop(c: &mut Criterion) {
    let net = Network::new(
        784,
        &[
            (256, Activation::Relu),
            (128, Activation::Relu),
            (10, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        1e-4,
    )
    .unwrap();
    let w = Init::HeNormal.weights(&net, &mut Rng::new(1));
    let batch = Batch::synthetic(&net, 256, 1);
    let mut group = c.benchmark_group("784-256-128-10 batch 256");
    group.sample_size(30);
    group.bench_function("forward+backward f64", |b| {
        b.iter(|| black_box(net.gradient(&w, batch.x.view(), batch.y.view())))
    });
    let w32 = w.cast::<f32>();
    let (x32, y32) = batch.cast::<f32>();
    group.bench_function("forward+backward f32", |b| {
        b.iter(|| black_box(net.gradient(&w32, x32.view(), y32.view())))
    });
    group.bench_function("forward only f64", |b| {
        b.iter(|| black_box(net.loss_value(&w, batch.x.view(), batch.y.view())))
    });
    group.finish();
}

criterion_group!(benches, backprop);
criterion_main!(benches);
