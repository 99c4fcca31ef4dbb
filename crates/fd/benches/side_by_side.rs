//! Side by side in one run: the full `--sample all` central check of a 784-128-64-10 network at
//! batch 32, on one thread and on all, against the naive check's per-coordinate cost measured on a
//! stratified sample (the naive check of all 109,386 parameters would take minutes).
//! Run: `cargo bench -p plumb-fd --bench side_by_side` (or `benches/side-by-side.sh`).

use std::time::Instant;

use plumb_engine::{Activation, Batch, Coord, Init, Loss, Network, Rng, Weights};
use plumb_fd::{CheckConfig, Method, Precision, Sample, Status, check, full_loss, select};

fn naive(net: &Network, w: &Weights<f64>, b: &Batch, c: Coord) -> f64 {
    let f = |d: f64| (full_loss(net, w, b.x.view(), b.y.view(), c, d), false);
    let h = Method::Central.default_step(*w.get(c), f64::EPSILON);
    Method::Central.estimate(&f, 0.0, h, 0.0, |h| h).value
}

fn main() {
    for (name, act, init) in [
        ("relu", Activation::Relu, Init::HeNormal),
        ("tanh", Activation::Tanh, Init::GlorotUniform),
    ] {
        let net = Network::new(
            784,
            &[(128, act), (64, act), (10, Activation::Softmax)],
            Loss::CrossEntropy,
            1e-4,
        )
        .unwrap();
        let w = init.weights(&net, &mut Rng::new(1));
        let batch = Batch::synthetic(&net, 32, 1);
        compare(name, &net, &w, &batch);
    }
}

fn compare(name: &str, net: &Network, w: &Weights<f64>, batch: &Batch) {
    let (net, w, batch) = (net, w, batch);
    let n = net.parameters();

    // Naive: per-coordinate time over a stratified sample, on one thread (it is a plain loop, and
    // the script sets MATMUL_NUM_THREADS=1 so its large products get no second thread either).
    // The fastest of three passes, so a busy moment counts against plumb, not for it.
    let sample = select(net, Sample::Total(500), 7).unwrap();
    let naive_per = (0..3)
        .map(|_| {
            let t = Instant::now();
            for &c in &sample {
                std::hint::black_box(naive(net, w, batch, c));
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
        let r = pool.install(|| check(net, w, batch, &cfg, &|_, _| {}).unwrap());
        (t.elapsed().as_secs_f64(), r)
    };
    let (t1, r1) = run(1);
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let (tn, rn) = run(threads);
    assert_eq!(
        r1.coords, rn.coords,
        "results independent of the thread count"
    );
    let mismatches = r1
        .coords
        .iter()
        .filter(|c| c.status == Status::Mismatch)
        .count();
    let unreliable = r1
        .coords
        .iter()
        .filter(|c| c.status == Status::Unreliable)
        .count();
    let ours_per = t1 / n as f64;

    println!();
    println!(
        "network 784-128-64-10 ({name}, {name}, softmax), batch 32, {n} parameters, central differences (4 evaluations each)"
    );
    println!(
        "naive, whole forward pass per evaluation : {:>9.1} µs per coordinate (best of 3 passes over {} sampled), ≈ {:.0} s for all",
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
    println!("mismatches: {mismatches}, unreliable (kinks): {unreliable} — a correct gradient");
}
