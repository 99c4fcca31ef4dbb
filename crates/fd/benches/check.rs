//! The central-difference check of a 784-128-64-10 network (109,386 parameters) at batch 32 on the
//! layer graph: its incremental evaluation against a naive check that recomputes the whole forward
//! pass for every perturbation. Run: `cargo bench -p plumb-fd --bench check`; the side-by-side run
//! with the full check and thread scaling is `benches/side-by-side.sh` at the repository root.

mod common;

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_engine::graph::Moved;
use plumb_fd::{CheckConfig, Method, Precision, Sample, check_graph, graph_sample};
use std::hint::black_box;

use common::{naive, network};

fn bench(c: &mut Criterion) {
    plumb_fd::keep_freed_memory();
    let (g, p, batch) = network();
    let (x, y) = (batch.x.view(), batch.y.view());
    let coords = graph_sample(&g, Sample::Total(300), 1).unwrap();
    let mut group = c.benchmark_group("central check, 784-128-64-10, batch 32, 300 coordinates");
    group.sample_size(10);
    group.bench_function("naive (whole forward pass per evaluation)", |bch| {
        bch.iter(|| {
            for &co in &coords {
                black_box(naive(&g, &p, &batch, co));
            }
        })
    });
    let trace = g.forward(&p, x);
    let l2 = g.l2_sum(&p);
    group.bench_function("incremental, one thread", |bch| {
        bch.iter(|| {
            for &(t, k) in &coords {
                let f = |d: f64| {
                    let moved = Moved {
                        tensor: t,
                        index: k,
                        delta: d,
                    };
                    (g.moved_loss(&p, x, &trace, y, l2, &moved).0, false)
                };
                let theta = p[t].as_slice().unwrap()[k];
                let h = Method::Central.default_step(theta, f64::EPSILON);
                black_box(Method::Central.estimate(&f, 0.0, h, 0.0, |h| h).value);
            }
        })
    });
    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
    cfg.sample = Some(Sample::Total(300));
    cfg.directions = Some(0);
    group.bench_function("plumb check (parallel, with verdicts)", |bch| {
        bch.iter(|| black_box(check_graph(&g, &p, x, y, &cfg, &|_, _| {}).unwrap()))
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
