//! The full `--sample all` central check of a 784-128-64-10 tanh network at batch 32 in f64 and in
//! f32, one thread, side by side in one run: the f32 check should cost no more than the f64 one.
//! Run: `MATMUL_NUM_THREADS=1 cargo bench -p plumb-fd --bench precision` (or
//! `benches/before-after.sh`, which runs it against an older commit as well).

use std::time::Instant;

use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng};
use plumb_fd::{CheckConfig, Method, Precision, Sample, check};

fn main() {
    let net = Network::new(
        784,
        &[
            (128, Activation::Tanh),
            (64, Activation::Tanh),
            (10, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        1e-4,
    )
    .unwrap();
    let w = Init::GlorotUniform.weights(&net, &mut Rng::new(1));
    let batch = Batch::synthetic(&net, 32, 1);
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let time = |precision: Precision| {
        let mut cfg = CheckConfig::new(Method::Central, precision);
        cfg.sample = Some(Sample::All);
        cfg.directions = Some(4);
        let t = Instant::now();
        let r = pool.install(|| check(&net, &w, &batch, &cfg, &|_, _| {}).unwrap());
        std::hint::black_box(r);
        t.elapsed().as_secs_f64()
    };
    // Alternating, the faster of two runs each, so that a busy moment of the shared machine
    // counts against both alike.
    let (mut f64_best, mut f32_best) = (f64::INFINITY, f64::INFINITY);
    for _ in 0..2 {
        f64_best = f64_best.min(time(Precision::F64));
        f32_best = f32_best.min(time(Precision::F32));
    }
    println!(
        "full central check, 784-128-64-10 tanh, batch 32, {} parameters, 1 thread (best of 2):",
        net.parameters()
    );
    println!("  f64: {f64_best:.2} s");
    println!("  f32: {f32_best:.2} s");
    println!("  f32 / f64: {:.2}", f32_best / f64_best);
}
