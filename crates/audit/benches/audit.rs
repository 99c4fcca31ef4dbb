//! The release audit: of a 784-256-128-10 weight file on 1,000 probe samples, and of a
//! 784-1024-1024-10 file stored in f32 on 10,000 probe samples (issue 14's audit at scale).
//! Run: `cargo bench -p plumb-audit --bench audit`; `benches/audit-before-after.sh` runs the
//! same file against the audit of an older commit, side by side.

use std::path::Path;

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_audit::{Thresholds, audit};
use plumb_engine::{Batch, Init, Rng};
use plumb_formats::{DType, Description, FileFormat, TensorFile, disassemble};

/// A He-normal file of a ReLU network with the given hidden widths, in `dtype` (values rounded to
/// it), and a synthetic probe batch of `samples`.
fn case(hidden: &[usize], dtype: DType, samples: usize) -> (Description, TensorFile, Batch) {
    let mut text = String::from("inputs = 784\nloss = \"cross-entropy\"\n");
    for h in hidden {
        text += &format!("[[layer]]\nunits = {h}\nactivation = \"relu\"\n");
    }
    text += "[[layer]]\nunits = 10\nactivation = \"softmax\"\n";
    let desc = Description::parse(Path::new("mnist-like.toml"), &text).unwrap();
    let w = Init::HeNormal.weights(&desc.network, &mut Rng::new(1));
    let mut tensors = disassemble(&desc, &w);
    if dtype == DType::F32 {
        for t in &mut tensors {
            t.dtype = DType::F32;
            t.data.iter_mut().for_each(|v| *v = f64::from(*v as f32));
        }
    }
    let file = TensorFile {
        format: FileFormat::Npz,
        tensors,
    };
    let batch = Batch::synthetic(&desc.network, samples, 1);
    (desc, file, batch)
}

fn bench(c: &mut Criterion) {
    let t = Thresholds::default();
    let (desc, file, batch) = case(&[256, 128], DType::F64, 1000);
    let mut g = c.benchmark_group("audit 784-256-128-10, 1000 probe samples");
    g.sample_size(10);
    g.bench_function("audit", |b| {
        b.iter(|| audit(&desc, &file, &batch, Some(Init::HeNormal), &t, 1))
    });
    g.finish();
    let (desc, file, batch) = case(&[1024, 1024], DType::F32, 10_000);
    let mut g = c.benchmark_group("audit 784-1024-1024-10 f32, 10000 probe samples");
    g.sample_size(10);
    g.bench_function("audit", |b| {
        b.iter(|| audit(&desc, &file, &batch, Some(Init::HeNormal), &t, 1))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
