//! The release audit: of a 784-256-128-10 weight file on 1,000 probe samples, and of a
//! 784-1024-1024-10 file stored in f32 on 10,000 probe samples (issue 14's audit at scale), both
//! through `audit_graph_file` as `plumb audit` runs it.
//! Run: `cargo bench -p plumb-audit --bench audit`; `benches/audit-before-after.sh` runs the
//! same file against the audit of an older commit, side by side.

use std::path::Path;

use criterion::{Criterion, criterion_group, criterion_main};
use plumb_audit::{KindThresholds, Thresholds, audit_graph_file};
use plumb_engine::{Batch, Init, Rng};
use plumb_formats::{DType, FileFormat, GraphDescription, TensorFile};

/// A He-normal file of a ReLU network with the given hidden widths (augmented layout), in `dtype`
/// (values rounded to it), and a synthetic probe batch of `samples`.
fn case(hidden: &[usize], dtype: DType, samples: usize) -> (GraphDescription, TensorFile, Batch) {
    let desc = GraphDescription::parse(Path::new("mnist-like.toml"), &desc_text(hidden)).unwrap();
    let params = Init::HeNormal.graph_params(&desc.graph, &mut Rng::new(1));
    let mut tensors = desc.to_file(&params).unwrap();
    if dtype == DType::F32 {
        for t in &mut tensors {
            t.dtype = DType::F32;
            t.data.iter_mut().for_each(|v| *v = f64::from(*v as f32));
        }
    }
    let file = TensorFile {
        format: FileFormat::Npz,
        unread: Vec::new(),
        tensors,
    };
    let batch = Batch::graph_synthetic(&desc.graph, samples, 1);
    (desc, file, batch)
}

fn desc_text(hidden: &[usize]) -> String {
    let mut text = String::from("inputs = 784\nloss = \"cross-entropy\"\n");
    for h in hidden {
        text += &format!("[[layer]]\nunits = {h}\nactivation = \"relu\"\n");
    }
    text + "[[layer]]\nunits = 10\nactivation = \"softmax\"\n"
}

fn bench(c: &mut Criterion) {
    let t = Thresholds::default();
    let k = KindThresholds::default();
    let path = Path::new("w.npz");
    let run = |desc: &GraphDescription, file: &TensorFile, batch: &Batch| {
        audit_graph_file(desc, file, path, batch, Some(Init::HeNormal), &t, &k, 1).unwrap()
    };
    let (desc, file, batch) = case(&[256, 128], DType::F64, 1000);
    let mut g = c.benchmark_group("audit 784-256-128-10, 1000 probe samples");
    g.sample_size(10);
    g.bench_function("audit", |b| b.iter(|| run(&desc, &file, &batch)));
    g.finish();
    let (desc, file, batch) = case(&[1024, 1024], DType::F32, 10_000);
    let mut g = c.benchmark_group("audit 784-1024-1024-10 f32, 10000 probe samples");
    g.sample_size(10);
    g.bench_function("audit", |b| b.iter(|| run(&desc, &file, &batch)));
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
