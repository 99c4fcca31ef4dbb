//! The release audit of a 784-256-128-10 weight file on 1,000 probe samples.
//! Run: `cargo bench -p plumb-audit --bench audit`.

use std::path::Path;

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_audit::{Thresholds, audit};
use plumb_engine::{Batch, Init, Rng};
use plumb_formats::{Description, FileFormat, TensorFile, disassemble};

fn bench(c: &mut Criterion) {
    let text = "inputs = 784\nloss = \"cross-entropy\"\n[[layer]]\nunits = 256\nactivation = \"relu\"\n[[layer]]\nunits = 128\nactivation = \"relu\"\n[[layer]]\nunits = 10\nactivation = \"softmax\"\n";
    let desc = Description::parse(Path::new("mnist-like.toml"), text).unwrap();
    let w = Init::HeNormal.weights(&desc.network, &mut Rng::new(1));
    let file = TensorFile {
        format: FileFormat::Npz,
        tensors: disassemble(&desc, &w),
    };
    let batch = Batch::synthetic(&desc.network, 1000, 1);
    let t = Thresholds::default();
    let mut g = c.benchmark_group("audit 784-256-128-10, 1000 probe samples");
    g.sample_size(10);
    g.bench_function("audit", |b| {
        b.iter(|| audit(&desc, &file, &batch, Some(Init::HeNormal), &t, 1))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
