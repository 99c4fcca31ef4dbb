//! The layer graph's forward + backward pass against the same math in NumPy, in one run (issue
//! 14: "engine at least as fast as NumPy"). Run through `benches/grad-numpy.sh`, which gives each
//! side one thread.
//!
//! Network 784-256-128-10 (relu, relu, softmax; cross-entropy, mean, L2 1e-4 over 2m), He-normal
//! weights (seed 1), synthetic batch (seed 1), at batch 256 and 8192, in f64 and f32. The weights
//! and batch go to NumPy (benches/grad_numpy.py) as raw little-endian files in the precision
//! timed, NumPy's gradient comes back the same way, and the bench asserts that both sides give
//! the same loss and every gradient entry within a tight tolerance of its tensor's largest: the
//! two sides compute the same function. Times are the fastest of several passes on each side.

use std::hint::black_box;
use std::io::Write;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Instant;

use ndarray::ArrayD;
use plumb_engine::graph::{Dense, Graph, GraphBuilder, LayerScalar, LossConfig, Shape};
use plumb_engine::{Activation, Batch, Init, Rng};

const SIZES: [usize; 4] = [784, 256, 128, 10];

fn network() -> Graph {
    let loss = LossConfig {
        l2: 1e-4,
        ..LossConfig::cross_entropy()
    };
    let mut b = GraphBuilder::new(Shape::Flat(SIZES[0]), loss);
    for (j, &units) in SIZES[1..].iter().enumerate() {
        let act = if j == SIZES.len() - 2 {
            Activation::Softmax
        } else {
            Activation::Relu
        };
        b.push(None, act, |s| Dense::new(units, s))
            .expect("a dense layer");
    }
    b.finish().expect("a valid network")
}

/// A scalar the two sides exchange as raw little-endian bytes.
trait Raw: LayerScalar {
    const NAME: &'static str;
    /// Relative tolerance of the loss and of a gradient entry against its tensor's largest.
    const TOLERANCE: f64;
    fn of(v: f64) -> Self;
    fn write(values: impl Iterator<Item = Self>, out: &mut Vec<u8>);
    fn read(bytes: &[u8]) -> Vec<f64>;
}

impl Raw for f64 {
    const NAME: &'static str = "float64";
    const TOLERANCE: f64 = 1e-12;
    fn of(v: f64) -> Self {
        v
    }
    fn write(values: impl Iterator<Item = Self>, out: &mut Vec<u8>) {
        values.for_each(|v| out.extend_from_slice(&v.to_le_bytes()));
    }
    fn read(bytes: &[u8]) -> Vec<f64> {
        bytes
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
            .collect()
    }
}

impl Raw for f32 {
    const NAME: &'static str = "float32";
    // Sums of up to 8,192 products in another order: a few hundred ulp of f32 at most.
    const TOLERANCE: f64 = 1e-4;
    fn of(v: f64) -> Self {
        v as f32
    }
    fn write(values: impl Iterator<Item = Self>, out: &mut Vec<u8>) {
        values.for_each(|v| out.extend_from_slice(&v.to_le_bytes()));
    }
    fn read(bytes: &[u8]) -> Vec<f64> {
        bytes
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes(c.try_into().unwrap()) as f64)
            .collect()
    }
}

fn write<S: Raw>(path: &Path, values: impl Iterator<Item = S>) {
    let mut out = Vec::new();
    S::write(values, &mut out);
    std::fs::write(path, out).expect("a scratch file");
}

/// Fastest of `repeat` calls, in milliseconds.
fn fastest<T>(repeat: usize, mut f: impl FnMut() -> T) -> f64 {
    (0..repeat)
        .map(|_| {
            let t = Instant::now();
            black_box(f());
            t.elapsed().as_secs_f64() * 1e3
        })
        .fold(f64::INFINITY, f64::min)
}

fn compare<S: Raw>(g: &Graph, m: usize, repeat: usize, dir: &Path) {
    let p64 = Init::HeNormal.graph_params(g, &mut Rng::new(1));
    let batch = Batch::graph_synthetic(g, m, 1);
    let p: Vec<ArrayD<S>> = p64.iter().map(|t| t.mapv(S::of)).collect();
    let (x, y) = batch.cast::<S>();
    for (t, values) in g.tensors().iter().zip(&p) {
        write(&dir.join(&t.name), values.iter().copied());
    }
    write(&dir.join("x"), x.iter().copied());
    write(&dir.join("y"), y.iter().copied());

    // What `plumb grad` computes without `--input-gradient`: the loss and the parameters'
    // gradient (NumPy's side forms no input gradient either).
    let (loss, grads) = g.parameter_gradient(&p, x.view(), y.view(), None);
    let plumb_ms = fastest(repeat, || {
        g.parameter_gradient(&p, x.view(), y.view(), None)
    });
    // The same with the input gradient formed too (what every caller got before
    // `parameter_gradient`).
    let with_input_ms = fastest(repeat, || g.gradient(&p, x.view(), y.view(), None));

    let job = serde_json::json!({
        "dir": dir,
        "dtype": S::NAME,
        "m": m,
        "sizes": SIZES,
        "tensors": g.tensors().iter().map(|t| &t.name).collect::<Vec<_>>(),
        "l2": g.loss_config().l2,
        "repeat": repeat,
    });
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../benches/grad_numpy.py");
    let mut child = Command::new("python3")
        .arg(script)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .expect("python3 with NumPy");
    child
        .stdin
        .take()
        .unwrap()
        .write_all(job.to_string().as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "the NumPy side failed");
    let theirs: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let numpy_ms = theirs["ms"].as_f64().unwrap();

    // The same function on both sides: the loss, and every gradient entry against its tensor's
    // largest (NumPy's sums run in another order).
    let (a, b) = (loss.re(), theirs["loss"].as_f64().unwrap());
    assert!(
        (a - b).abs() <= S::TOLERANCE * a.abs(),
        "{} batch {m}: loss {a} here, {b} in NumPy",
        S::NAME
    );
    // Every gradient entry against its tensor's largest; each side is also measured against
    // plumb's f64 gradient at the same (rounded) values. A ReLU unit whose z lies within f32's
    // rounding of 0 can take the other side in f32 than in f64 (a kink crossed, not an error):
    // the sides of plumb's f32 and f64 forward passes are counted, and where they differ the
    // gradients are not held to the tolerance (the loss still is).
    let wide: Vec<ArrayD<f64>> = p.iter().map(|t| t.mapv(|v| v.re())).collect();
    let (xw, yw) = (x.mapv(|v| v.re()), y.mapv(|v| v.re()));
    let (_, exact) = g.parameter_gradient(&wide, xw.view(), yw.view(), None);
    let sides = |b: &plumb_engine::graph::Branches| -> Vec<bool> {
        b.layers
            .iter()
            .flat_map(|l| l.sides.iter().copied())
            .collect()
    };
    let crossed = sides(&g.branches(&g.forward(&p, x.view())))
        .iter()
        .zip(sides(&g.branches(&g.forward(&wide, xw.view()))))
        .filter(|(a, b)| **a != *b)
        .count();
    for ((t, mine), exact) in g.tensors().iter().zip(&grads).zip(&exact) {
        let bytes = std::fs::read(dir.join(format!("{}.grad", t.name))).unwrap();
        let theirs = S::read(&bytes);
        let mine: Vec<f64> = mine.iter().map(|v| v.re()).collect();
        let exact: Vec<f64> = exact.iter().copied().collect();
        let scale = exact.iter().fold(0.0f64, |s, v| s.max(v.abs()));
        let apart = |a: &[f64], b: &[f64]| {
            a.iter()
                .zip(b)
                .map(|(u, v)| (u - v).abs())
                .fold(0.0, f64::max)
                / scale
        };
        let worst = apart(&mine, &theirs);
        eprintln!(
            "  {} batch {m} {}: plumb and NumPy {worst:.1e} apart; from f64: plumb {:.1e}, NumPy {:.1e} (of the largest entry); ReLU sides crossed in f32: {crossed}",
            S::NAME,
            t.name,
            apart(&mine, &exact),
            apart(&theirs, &exact),
        );
        assert!(
            worst <= S::TOLERANCE || crossed > 0,
            "{} batch {m}: {} differs by {worst:e} of its largest entry",
            S::NAME,
            t.name
        );
    }
    println!(
        "784-256-128-10 batch {m:>5} {:>7}: NumPy {numpy_ms:9.3} ms, plumb {plumb_ms:9.3} ms, NumPy/plumb {:.2}×; plumb with the input gradient {with_input_ms:9.3} ms, {:.2}× (fastest of {repeat}; loss {a:.9}; {})",
        S::NAME,
        numpy_ms / plumb_ms,
        numpy_ms / with_input_ms,
        theirs["blas"].as_str().unwrap_or("BLAS unknown"),
    );
}

fn main() {
    // As the `plumb` binary does (plumb_fd::keep_freed_memory): glibc would otherwise give freed
    // heap pages back to the kernel after every pass and fault them in again.
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt only sets two of the allocator's thresholds; no other thread runs yet.
    unsafe {
        libc::mallopt(libc::M_TRIM_THRESHOLD, 256 << 20);
        libc::mallopt(libc::M_MMAP_THRESHOLD, 32 << 20);
    }
    let g = network();
    let dir = std::env::temp_dir().join(format!("plumb-grad-numpy-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    for (m, repeat) in [(256, 30), (8192, 6)] {
        compare::<f64>(&g, m, repeat, &dir);
        compare::<f32>(&g, m, repeat, &dir);
    }
    std::fs::remove_dir_all(&dir).ok();
}
