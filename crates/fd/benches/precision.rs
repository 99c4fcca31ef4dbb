//! The full `--sample all` central check of a 784-128-64-10 tanh network at batch 32 on the layer
//! graph, in f64 and in f32, one thread, side by side in one run: the f32 check should cost no
//! more than the f64 one. Run: `MATMUL_NUM_THREADS=1 cargo bench -p plumb-fd --bench precision`
//! (or `benches/before-after.sh`, which runs it on an older commit as well).
//!
//! Each precision also prints a fingerprint of its results (the loss and every estimate, bit for
//! bit) and its verdicts, so that a run before and after a change shows what moved.

mod common;

use std::time::Instant;

use ndarray::ArrayD;
use plumb_fd::{CheckConfig, GraphCheck, Method, Precision, Sample, check_graph};

fn main() {
    plumb_fd::keep_freed_memory();
    let (g, p, batch) = common::network();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let run = |precision: Precision| {
        let mut cfg = CheckConfig::new(Method::Central, precision);
        cfg.sample = Some(Sample::All);
        cfg.directions = Some(4);
        let (x, y) = (batch.x.view(), batch.y.view());
        let t = Instant::now();
        let r = pool.install(|| check_graph(&g, &p, x, y, &cfg, &|_, _| {}).unwrap());
        (t.elapsed().as_secs_f64(), r)
    };
    // Alternating, the faster of two runs each, so that a busy moment of the shared machine
    // counts against both alike.
    let (mut f64_best, mut f32_best) = (f64::INFINITY, f64::INFINITY);
    let mut results = Vec::new();
    // `PRECISION_ONLY=f32` (or `f64`): that precision alone, four times, for a profiler.
    if let Ok(only) = std::env::var("PRECISION_ONLY") {
        let precision = if only == "f32" {
            Precision::F32
        } else {
            Precision::F64
        };
        for _ in 0..4 {
            let (t, _) = run(precision);
            println!("{}: {t:.3} s", precision.name());
        }
        return;
    }
    for _ in 0..2 {
        let (t, r64) = run(Precision::F64);
        f64_best = f64_best.min(t);
        let (t, r32) = run(Precision::F32);
        f32_best = f32_best.min(t);
        results = vec![r64, r32];
    }
    println!(
        "full central check, 784-128-64-10 tanh, batch 32, {} parameters, 1 thread (best of 2):",
        g.parameters()
    );
    println!("  f64: {f64_best:.2} s");
    println!("  f32: {f32_best:.2} s");
    println!("  f32 / f64: {:.2}", f32_best / f64_best);
    for r in &results {
        println!(
            "  {}: {}; steps kept {}; settled on one step {}; directions on one step {} of {}",
            r.precision.name(),
            common::summary(r),
            steps(r, &p),
            r.coords.iter().filter(|c| c.one_step).count(),
            r.directions.iter().filter(|d| d.one_step).count(),
            r.directions.len()
        );
    }
}

/// How many coordinates kept each step of the ladder, as multiples of the default step h: the
/// same on any tree, so a run before and after a change shows where the estimates moved.
fn steps(r: &GraphCheck, p: &[ArrayD<f64>]) -> String {
    let mut kept = std::collections::BTreeMap::<u64, usize>::new();
    let wide = r.coords.iter().filter(|c| c.wide).count();
    for c in r.coords.iter().filter(|c| !c.wide) {
        let theta = p[c.coord.tensor].as_slice().unwrap()[c.coord.index];
        let h = Method::Central.default_step(theta, r.precision.epsilon());
        let h = match r.precision {
            Precision::F64 => h,
            Precision::F32 => h as f32 as f64,
        };
        *kept.entry((c.step / h).round() as u64).or_default() += 1;
    }
    let mut out: Vec<String> = kept.iter().map(|(k, n)| format!("{k}h {n}")).collect();
    if wide > 0 {
        out.push(format!("on f64 losses at f64's step {wide}"));
    }
    out.join(", ")
}
