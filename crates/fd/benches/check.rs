//! The central-difference check of a 784-128-64-10 network (109,386 parameters) at batch 32:
//! plumb's incremental evaluation against a naive check that recomputes the whole forward pass for
//! every perturbation. Run: `cargo bench -p plumb-fd --bench check`; the side-by-side run with the
//! full check and thread scaling is `benches/side-by-side.sh` at the repository root.

mod common;

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_engine::{Batch, Coord, Network, Weights};
use plumb_fd::{Base, CheckConfig, Method, Precision, Sample, check, full_loss, select};
use std::hint::black_box;

use common::network;

/// The naive central difference of one coordinate: four whole forward passes.
fn naive(net: &Network, w: &Weights<f64>, b: &Batch, c: Coord) -> f64 {
    let f = |d: f64| (full_loss(net, w, b.x.view(), b.y.view(), c, d), false);
    let h = Method::Central.default_step(*w.get(c), f64::EPSILON);
    Method::Central.estimate(&f, 0.0, h, 0.0, |h| h).value
}

fn bench(c: &mut Criterion) {
    let (net, w, batch) = network();
    let coords = select(&net, Sample::Total(300), 1).unwrap();
    let mut group = c.benchmark_group("central check, 784-128-64-10, batch 32, 300 coordinates");
    group.sample_size(10);
    group.bench_function("naive (whole forward pass per evaluation)", |bch| {
        bch.iter(|| {
            for &co in &coords {
                black_box(naive(&net, &w, &batch, co));
            }
        })
    });
    let base = Base::new(&net, &w, batch.x.view(), &batch.y);
    group.bench_function("incremental, one thread", |bch| {
        bch.iter(|| {
            for &co in &coords {
                let f = |d: f64| base.perturbed(co, d);
                let h = Method::Central.default_step(*w.get(co), f64::EPSILON);
                black_box(Method::Central.estimate(&f, 0.0, h, 0.0, |h| h).value);
            }
        })
    });
    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
    cfg.sample = Some(Sample::Total(300));
    cfg.directions = Some(0);
    group.bench_function("plumb check (parallel, with verdicts)", |bch| {
        bch.iter(|| black_box(check(&net, &w, &batch, &cfg, &|_, _| {}).unwrap()))
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
