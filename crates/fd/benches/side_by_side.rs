//! Side by side in one run: the full `--sample all` central check of a 784-128-64-10 network at
//! batch 32 on the layer graph (`check_graph`, what `plumb check` runs), on one thread and on all,
//! against the naive check's per-coordinate cost measured on a stratified sample (the naive check
//! of all 109,386 parameters would take minutes).
//! Run: `cargo bench -p plumb-fd --bench side_by_side` (or `benches/side-by-side.sh`).

mod common;

use std::time::Instant;

use ndarray::ArrayD;
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init};
use plumb_fd::{CheckConfig, Method, Precision, Sample, Status, check_graph, graph_sample};

fn main() {
    plumb_fd::keep_freed_memory();
    for (name, act, init) in [
        ("relu", Activation::Relu, Init::HeNormal),
        ("tanh", Activation::Tanh, Init::GlorotUniform),
    ] {
        let (g, p, batch) = common::graph(act, init);
        compare(name, &g, &p, &batch);
    }
}

fn compare(name: &str, g: &Graph, p: &[ArrayD<f64>], batch: &Batch) {
    let n = g.parameters();

    // Naive: per-coordinate time over a stratified sample, on one thread (it is a plain loop, and
    // the script sets MATMUL_NUM_THREADS=1 so its large products get no second thread either).
    // The fastest of three passes, so a busy moment counts against plumb, not for it.
    let sample = graph_sample(g, Sample::Total(500), 7).unwrap();
    let naive_per = (0..3)
        .map(|_| {
            let t = Instant::now();
            for &c in &sample {
                std::hint::black_box(common::naive(g, p, batch, c));
            }
            t.elapsed().as_secs_f64() / sample.len() as f64
        })
        .fold(f64::INFINITY, f64::min);

    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
    cfg.sample = Some(Sample::All);
    cfg.directions = Some(4);
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        let t = Instant::now();
        let (x, y) = (batch.x.view(), batch.y.view());
        let r = pool.install(|| check_graph(g, p, x, y, &cfg, &|_, _| {}).unwrap());
        (t.elapsed().as_secs_f64(), r)
    };
    let (t1, r1) = run(1);
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let (tn, rn) = run(threads);
    assert_eq!(
        r1.coords, rn.coords,
        "results independent of the thread count"
    );
    let count = |s: Status| r1.coords.iter().filter(|c| c.status == s).count();
    let ours_per = t1 / n as f64;

    println!();
    println!(
        "network 784-128-64-10 ({name}, {name}, softmax), batch 32, {n} parameters, central differences (±h, and ±2h where ±h does not settle)"
    );
    println!(
        "naive, whole forward pass per evaluation : {:>9.1} µs per coordinate (4 losses; best of 3 passes over {} sampled), ≈ {:.0} s for all",
        naive_per * 1e6,
        sample.len(),
        naive_per * n as f64
    );
    println!(
        "plumb check --sample all, 1 thread        : {:>9.1} µs per coordinate, {t1:.2} s in all",
        ours_per * 1e6
    );
    println!(
        "plumb check --sample all, {threads} threads       : {:>9.1} µs per coordinate, {tn:.2} s in all",
        tn / n as f64 * 1e6
    );
    println!(
        "speed-up over naive (1 thread each)       : {:>9.1}×",
        naive_per / ours_per
    );
    println!(
        "scaling 1 → {threads} threads                  : {:>9.2}×",
        t1 / tn
    );
    println!(
        "mismatches: {}, unreliable (kinks): {} — a correct gradient; {}",
        count(Status::Mismatch),
        count(Status::Unreliable),
        common::summary(&r1)
    );
}
