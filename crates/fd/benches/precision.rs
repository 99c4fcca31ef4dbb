//! The full `--sample all` central check of a 784-128-64-10 tanh network at batch 32 in f64 and in
//! f32, one thread, side by side in one run: the f32 check should cost no more than the f64 one.
//! Run: `MATMUL_NUM_THREADS=1 cargo bench -p plumb-fd --bench precision` (or
//! `benches/before-after.sh`, which runs it on an older commit as well).
//!
//! Each precision also prints a fingerprint of its results (the loss and every estimate, bit for
//! bit) and its verdicts, so that a run before and after a change shows what moved: f64's
//! fingerprint must not.

mod common;

use std::time::Instant;

use plumb_engine::Weights;
use plumb_fd::{CheckConfig, CheckResult, Method, Precision, Sample, check};

fn main() {
    let (net, w, batch) = common::network();
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

/// The fingerprint of a check's results (`common::fingerprint`) and the steps its coordinates kept.
fn summary(r: &CheckResult, w: &Weights<f64>) -> String {
    let coords = r.coords.iter().map(|c| (c.numeric, c.analytic, c.status));
    let directions = r
        .directions
        .iter()
        .map(|d| (d.numeric, d.analytic, d.status));
    format!(
        "{}; steps kept {}",
        common::fingerprint(r.loss, coords.chain(directions)),
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
