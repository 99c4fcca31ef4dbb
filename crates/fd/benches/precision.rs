//! The full `--sample all` central check of a 784-128-64-10 tanh network at batch 32 in f64 and in
//! f32, one thread, side by side in one run: the f32 check should cost no more than the f64 one.
//! Run: `MATMUL_NUM_THREADS=1 cargo bench -p plumb-fd --bench precision` (or
//! `benches/before-after.sh`, which runs it on an older commit as well).
//!
//! Each precision also prints a fingerprint of its results (the loss and every estimate, bit for
//! bit) and its verdicts, so that a run before and after a change shows what moved: f64's
//! fingerprint must not.

use std::time::Instant;

use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng, Weights};
use plumb_fd::{CheckConfig, CheckResult, Method, Precision, Sample, Status, check};

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
    let run = |precision: Precision| {
        let mut cfg = CheckConfig::new(Method::Central, precision);
        cfg.sample = Some(Sample::All);
        cfg.directions = Some(4);
        let t = Instant::now();
        let r = pool.install(|| check(&net, &w, &batch, &cfg, &|_, _| {}).unwrap());
        (t.elapsed().as_secs_f64(), r)
    };
    // Alternating, the faster of two runs each, so that a busy moment of the shared machine
    // counts against both alike.
    let (mut f64_best, mut f32_best) = (f64::INFINITY, f64::INFINITY);
    let mut results = Vec::new();
    for _ in 0..2 {
        let (t, r64) = run(Precision::F64);
        f64_best = f64_best.min(t);
        let (t, r32) = run(Precision::F32);
        f32_best = f32_best.min(t);
        results = vec![r64, r32];
    }
    println!(
        "full central check, 784-128-64-10 tanh, batch 32, {} parameters, 1 thread (best of 2):",
        net.parameters()
    );
    println!("  f64: {f64_best:.2} s");
    println!("  f32: {f32_best:.2} s");
    println!("  f32 / f64: {:.2}", f32_best / f64_best);
    for r in &results {
        println!("  {}: {}", r.precision.name(), summary(r, &w));
    }
}

/// The FNV-1a hash of the loss and every estimate's bits, and the count of each verdict.
fn summary(r: &CheckResult, w: &Weights<f64>) -> String {
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |x: f64| {
        for byte in x.to_bits().to_le_bytes() {
            hash = (hash ^ u64::from(byte)).wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    eat(r.loss);
    for c in &r.coords {
        eat(c.numeric);
        eat(c.analytic);
    }
    for d in &r.directions {
        eat(d.numeric);
        eat(d.analytic);
    }
    let statuses = r.coords.iter().map(|c| c.status);
    let statuses = statuses.chain(r.directions.iter().map(|d| d.status));
    let mut counts = [0usize; 4];
    for s in statuses {
        counts[s as usize] += 1;
    }
    let names = [
        Status::Match,
        Status::Unsettled,
        Status::Unreliable,
        Status::Mismatch,
    ];
    let counts: Vec<String> = names
        .iter()
        .map(|s| format!("{} {}", counts[*s as usize], s.name()))
        .collect();
    format!(
        "results {hash:016x}; {}; steps kept {}",
        counts.join(", "),
        steps(r, w)
    )
}

/// How many coordinates kept each step of the ladder, as multiples of the default step h: the
/// same on any tree, so a run before and after a change shows where the estimates moved.
fn steps(r: &CheckResult, w: &Weights<f64>) -> String {
    let mut kept = std::collections::BTreeMap::<u64, usize>::new();
    for c in &r.coords {
        let h = Method::Central.default_step(*w.get(c.coord), r.precision.epsilon());
        let h = match r.precision {
            Precision::F64 => h,
            Precision::F32 => h as f32 as f64,
        };
        *kept.entry((c.step / h).round() as u64).or_default() += 1;
    }
    kept.iter()
        .map(|(k, n)| format!("{k}h {n}"))
        .collect::<Vec<_>>()
        .join(", ")
}
