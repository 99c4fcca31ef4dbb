//! The layer graph's speed, side by side in one run (figures in benches/README.md):
//!
//! - `cnn`: the full check of the demo CNN (examples/pump-cnn.toml) against a naive NumPy loop
//!   (the hand-written example's forward pass per perturbation, benches/graph_numpy.py), and the
//!   same check's perturbed losses with and without the kinds' incremental hints;
//! - `mlp`: the full check of a 784-128-64-10 tanh network against a naive NumPy loop (issue
//!   14's figure);
//! - `lstm`, `attention`: forward + backward (`Graph::gradient`) of examples/pump-lstm.toml and
//!   pump-attention.toml against the examples' hand-written NumPy passes;
//! - `sequence`: the full check of the demo sequence model (fixtures/nets/pump-sequence.toml)
//!   against a naive NumPy loop;
//! - `dense-plumb` (only when named): the graph's check of the 784-128-64-10 network at 3,000
//!   coordinates plus directions, with its fingerprint (the figure compared with the dense
//!   engine's check before it went, benches/README.md);
//! - `mlp-plumb` (only when named): plumb's side of `mlp` alone, the fastest of 3 full checks,
//!   with its fingerprint — for before/after runs of two builds;
//! - `cnn-plumb` (only when named): plumb's side of `cnn` alone, the fastest of 10 runs, with a
//!   fingerprint of the results and the count of each verdict — for before/after runs of two
//!   builds on a busy machine, where NumPy's time is not needed;
//! - `cnn-loop` (only when named): plumb's full check of the demo CNN 300 times and nothing
//!   else, for a profiler (`perf record -g … cnn-loop --bench`);
//! - `cnn-layers` (only when named): per tensor of the demo CNN, one entry's loss at ±h through
//!   the hints, and each layer's forward pass and activation alone.
//!
//! Each NumPy side gets the same values (JSON on stdin) and returns its loss, which must equal
//! plumb's: both sides compute the same function. One thread each (benches/graph.sh sets
//! RAYON_NUM_THREADS=1 and one BLAS thread). Run: `benches/graph.sh [section…]`, or
//! `cargo bench -p plumb-fd --bench graph -- [section…]`.

mod common;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

use ndarray::ArrayD;
use plumb_engine::graph::{Graph, Moved, Trace};
use plumb_engine::{Batch, Init, Rng};
use plumb_fd::{CheckConfig, Method, Precision, Sample, check_graph};
use plumb_formats::GraphDescription;
use serde_json::{Value, json};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn load() -> String {
    std::fs::read_to_string("/proc/loadavg").unwrap_or_default()
}

/// The fastest of `n` runs of `f`, in seconds, and its last result.
fn best<T>(n: usize, mut f: impl FnMut() -> T) -> (f64, T) {
    let mut out = None;
    let mut t = f64::INFINITY;
    for _ in 0..n {
        let s = Instant::now();
        let r = f();
        t = t.min(s.elapsed().as_secs_f64());
        out = Some(r);
    }
    (t, out.expect("n ≥ 1"))
}

/// Runs benches/graph_numpy.py on the graph's values.
fn numpy(model: &str, task: &str, g: &Graph, p: &[ArrayD<f64>], b: &Batch, extra: Value) -> Value {
    let x_shape: Vec<usize> = std::iter::once(b.x.nrows())
        .chain(g.input().dims())
        .collect();
    let y_shape: Vec<usize> = std::iter::once(b.y.nrows())
        .chain(g.output().dims())
        .collect();
    let tensors: Vec<Value> = g
        .tensors()
        .iter()
        .zip(p)
        .map(|(t, v)| json!({"name": t.name, "shape": t.spec.shape, "values": v.iter().collect::<Vec<_>>()}))
        .collect();
    let mut job = json!({
        "model": model, "task": task, "tensors": tensors,
        "x": b.x.iter().collect::<Vec<_>>(), "x_shape": x_shape,
        "y": b.y.iter().collect::<Vec<_>>(), "y_shape": y_shape,
    });
    job.as_object_mut()
        .unwrap()
        .extend(extra.as_object().unwrap().clone());
    let mut child = Command::new("python3")
        .arg(root().join("benches/graph_numpy.py"))
        .envs([
            ("OPENBLAS_NUM_THREADS", "1"),
            ("OMP_NUM_THREADS", "1"),
            ("MKL_NUM_THREADS", "1"),
        ])
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
    assert!(out.status.success(), "graph_numpy.py failed");
    serde_json::from_slice(&out.stdout).unwrap()
}

fn same_loss(what: &str, plumb: f64, numpy: f64) {
    let rel = (plumb - numpy).abs() / plumb.abs().max(1e-300);
    assert!(
        rel <= 1e-12,
        "{what}: plumb's loss {plumb} but NumPy's {numpy}"
    );
}

fn description(path: &str, m: usize) -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let d = GraphDescription::read(&root().join(path)).unwrap();
    let p = Init::GlorotUniform.graph_params(&d.graph, &mut Rng::new(1));
    let b = Batch::graph_synthetic(&d.graph, m, 1);
    (d.graph, p, b)
}

fn full_check(g: &Graph, p: &[ArrayD<f64>], b: &Batch) -> plumb_fd::GraphCheck {
    let cfg = CheckConfig {
        sample: Some(Sample::All),
        ..CheckConfig::new(Method::Central, Precision::F64)
    };
    check_graph(g, p, b.x.view(), b.y.view(), &cfg, &|_, _| {}).unwrap()
}

/// Every single-entry perturbation's loss at ±h, through the hints and by recomputing from the
/// entry's layer up (what the check did before the hints): seconds for each.
fn hints_against_layers(g: &Graph, p: &[ArrayD<f64>], b: &Batch) -> (f64, f64) {
    let (x, y) = (b.x.view(), b.y.view());
    let trace: Trace<f64> = g.forward(p, x);
    let l2 = g.l2_sum(p);
    let entries: Vec<(usize, usize, f64)> = p
        .iter()
        .enumerate()
        .flat_map(|(t, v)| v.iter().enumerate().map(move |(k, &w)| (t, k, w)))
        .collect();
    let (hinted, a) = best(10, || {
        let mut s = 0.0;
        for &(t, k, w) in &entries {
            for d in [1.0, -1.0] {
                let delta = d * Method::Central.default_step(w, f64::EPSILON);
                let moved = Moved {
                    tensor: t,
                    index: k,
                    delta,
                };
                let tail = g.forward_moved(p, x, &trace, &moved);
                s += g.loss_moved(p, &tail, y, l2, &moved);
            }
        }
        s
    });
    let (layers, c) = best(10, || {
        let mut s = 0.0;
        for &(t, k, w) in &entries {
            for d in [1.0, -1.0] {
                let delta = d * Method::Central.default_step(w, f64::EPSILON);
                let mut q = p.to_vec();
                q[t].as_slice_mut().unwrap()[k] += delta;
                let tail = g.forward_from(&q, x, &trace, g.tensors()[t].layer);
                s += g.loss_from(&q, &tail, y);
            }
        }
        s
    });
    assert!((a - c).abs() <= 1e-9 * a.abs(), "{a} vs {c}");
    (hinted, layers)
}

fn cnn() {
    let (g, p, b) = description("examples/pump-cnn.toml", 32);
    let (plumb, r) = best(3, || full_check(&g, &p, &b));
    let np = numpy(
        "cnn",
        "check",
        &g,
        &p,
        &b,
        json!({"repeat": 3, "directions": 4}),
    );
    same_loss("cnn", r.loss, np["loss"].as_f64().unwrap());
    let naive = np["seconds"].as_f64().unwrap();
    println!(
        "cnn  examples/pump-cnn.toml, {} parameters, batch 32: naive NumPy full central check {:.1} ms ({} losses), plumb {:.1} ms: {:.1}×",
        g.parameters(),
        naive * 1e3,
        np["evaluations"],
        plumb * 1e3,
        naive / plumb
    );
    println!(
        "cnn  settled at ±h alone (three losses, not four): {} of {} coordinates, {} of {} directions",
        r.coords.iter().filter(|c| c.one_step).count(),
        r.coords.len(),
        r.directions.iter().filter(|d| d.one_step).count(),
        r.directions.len()
    );
    let (hinted, layers) = hints_against_layers(&g, &p, &b);
    println!(
        "cnn  every entry at ±h: through the hints {:.2} ms, recomputing from the entry's layer {:.2} ms: {:.2}×",
        hinted * 1e3,
        layers * 1e3,
        layers / hinted
    );
}

fn cnn_plumb() {
    let (g, p, b) = description("examples/pump-cnn.toml", 32);
    let (plumb, r) = best(10, || full_check(&g, &p, &b));
    let (hinted, layers) = hints_against_layers(&g, &p, &b);
    println!(
        "cnn-plumb  full central check {:.2} ms (fastest of 10), every entry at ±h through the hints {:.2} ms, from the entry's layer {:.2} ms; {}",
        plumb * 1e3,
        hinted * 1e3,
        layers * 1e3,
        common::summary(&r)
    );
}

/// Per tensor of the demo CNN, the time of one entry's loss at ±h through the hints.
fn cnn_layers() {
    let (g, p, b) = description("examples/pump-cnn.toml", 32);
    let (x, y) = (b.x.view(), b.y.view());
    let trace: Trace<f64> = g.forward(&p, x);
    let l2 = g.l2_sum(&p);
    for (t, v) in p.iter().enumerate() {
        let (secs, _) = best(50, || {
            let mut s = 0.0;
            for (k, &w) in v.iter().enumerate() {
                for d in [1.0, -1.0] {
                    let delta = d * Method::Central.default_step(w, f64::EPSILON);
                    let moved = Moved {
                        tensor: t,
                        index: k,
                        delta,
                    };
                    s += g.moved_loss(&p, x, &trace, y, l2, &moved).0;
                }
            }
            s
        });
        println!(
            "cnn-layers  {:<14} {:>4} entries: {:.2} µs per loss",
            g.tensors()[t].name,
            v.len(),
            secs * 1e6 / (2 * v.len()) as f64
        );
    }
    let (secs, _) = best(50, || g.forward(&p, x));
    println!("cnn-layers  a whole forward pass: {:.2} µs", secs * 1e6);
    for (j, node) in g.nodes().iter().enumerate() {
        let input = if j == 0 {
            x
        } else {
            trace.outputs[j - 1].view()
        };
        let skip = node
            .layer
            .tap()
            .map(|t| trace.outputs[g.layer(t).unwrap()].view());
        let layer = <f64 as plumb_engine::graph::LayerScalar>::layer(node.layer.as_ref());
        let (secs, _) = best(200, || layer.forward(&p[node.tensors()], input, skip));
        let (act, _) = best(200, || node.activation.apply(trace.steps[j].out.view()));
        // The parameters' gradient alone: for a convolution, im2col and one product of the
        // forward product's size, what an im2col + GEMM forward pass would cost at least.
        let dout = trace.steps[j].out.view();
        let (back, _) = best(200, || {
            layer.backward(
                &p[node.tensors()],
                input,
                &trace.steps[j],
                dout,
                None,
                false,
            )
        });
        println!(
            "cnn-layers  {:<6} forward {:.2} µs, activation {:.2} µs, parameters' gradient {:.2} µs",
            node.name,
            secs * 1e6,
            act * 1e6,
            back * 1e6
        );
    }
}

/// The full check of the demo CNN over and over, for a profile of that alone.
fn cnn_loop() {
    let (g, p, b) = description("examples/pump-cnn.toml", 32);
    let (t, r) = best(300, || full_check(&g, &p, &b));
    println!(
        "cnn-loop  full central check {:.2} ms (fastest of 300); {}",
        t * 1e3,
        common::summary(&r)
    );
}

fn dense_graph(g: &Graph, p: &[ArrayD<f64>], b: &Batch, cfg: &CheckConfig) -> plumb_fd::GraphCheck {
    check_graph(g, p, b.x.view(), b.y.view(), cfg, &|_, _| {}).unwrap()
}

/// The graph's side of `dense` alone, the fastest of 5, with its fingerprint: for before/after
/// runs of two builds, and for after the dense engine is gone.
fn dense_plumb() {
    let (g, p, b) = common::network();
    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
    cfg.sample = Some(Sample::Total(3000));
    cfg.directions = Some(4);
    let (t, r) = best(5, || dense_graph(&g, &p, &b, &cfg));
    println!(
        "dense-plumb 784-128-64-10 tanh, batch 32, 3000 coordinates + directions: layer graph {:.1} ms (fastest of 5); {}",
        t * 1e3,
        common::summary(&r)
    );
}

/// Issue 14's figure: the full check of the 784-128-64-10 tanh network (every coordinate, 4
/// directions over all and 4 per tensor) against the naive NumPy loop (a whole forward pass per
/// loss, its time per loss measured on the first coordinates' 2,000 losses).
fn mlp() {
    let (g, p, b) = common::network();
    let (plumb, r) = best(1, || full_check(&g, &p, &b));
    let np = numpy(
        "mlp",
        "check",
        &g,
        &p,
        &b,
        json!({"repeat": 3, "directions": 4, "limit": 2000}),
    );
    same_loss("mlp", r.loss, np["loss"].as_f64().unwrap());
    let naive = np["seconds"].as_f64().unwrap();
    println!(
        "mlp 784-128-64-10 tanh, {} parameters, batch 32: naive NumPy full central check {:.1} s ({} losses, the time per loss measured on the first {}), plumb {:.2} s: {:.1}×; {}",
        g.parameters(),
        naive,
        np["evaluations"],
        np["measured"],
        plumb,
        naive / plumb,
        common::summary(&r)
    );
}

/// The plumb side of `mlp` alone, the fastest of 3, with its fingerprint.
fn mlp_plumb() {
    let (g, p, b) = common::network();
    let (t, r) = best(3, || full_check(&g, &p, &b));
    println!(
        "mlp-plumb 784-128-64-10 tanh, batch 32, full central check: {:.3} s (fastest of 3); {}",
        t,
        common::summary(&r)
    );
}

fn pass(model: &str, path: &str) {
    let (g, p, b) = description(path, 32);
    let inner = 20;
    let (plumb, grad) = best(5, || {
        let mut last = None;
        for _ in 0..inner {
            last = Some(g.gradient(&p, b.x.view(), b.y.view(), None));
        }
        last.unwrap()
    });
    let np = numpy(
        model,
        "gradient",
        &g,
        &p,
        &b,
        json!({"repeat": 5, "inner": inner}),
    );
    same_loss(model, grad.loss, np["loss"].as_f64().unwrap());
    // Against the largest entry of any tensor: an attention key bias's gradient is zero up to
    // rounding (docs/engine.md), so its own largest is no scale.
    let scale = grad
        .params
        .iter()
        .flat_map(|t| t.iter())
        .fold(1e-300f64, |m, v| m.max(v.abs()));
    for (t, gr) in g.tensors().iter().zip(&grad.params) {
        let theirs = np["gradient"][&t.name].as_array().unwrap();
        for (a, b) in gr.iter().zip(theirs) {
            let b = b.as_f64().unwrap();
            assert!(
                (a - b).abs() <= 1e-10 * scale,
                "{model} {}: {a} vs {b}",
                t.name
            );
        }
    }
    let naive = np["seconds"].as_f64().unwrap() / inner as f64;
    let ours = plumb / inner as f64;
    println!(
        "{model} {path}, {} parameters, batch 32: forward + backward, NumPy {:.3} ms, plumb {:.3} ms: {:.2}×",
        g.parameters(),
        naive * 1e3,
        ours * 1e3,
        naive / ours
    );
}

fn sequence() {
    let (g, p, b) = description("fixtures/nets/pump-sequence.toml", 16);
    let (plumb, r) = best(3, || full_check(&g, &p, &b));
    let np = numpy(
        "sequence",
        "check",
        &g,
        &p,
        &b,
        json!({"repeat": 1, "directions": 4, "limit": 400}),
    );
    same_loss("sequence", r.loss, np["loss"].as_f64().unwrap());
    let naive = np["seconds"].as_f64().unwrap();
    println!(
        "sequence fixtures/nets/pump-sequence.toml, {} parameters, batch 16: naive NumPy full central check {:.0} ms ({} losses, the time per loss measured on the first {}), plumb {:.0} ms: {:.1}×",
        g.parameters(),
        naive * 1e3,
        np["evaluations"],
        np["measured"],
        plumb * 1e3,
        naive / plumb
    );
}

fn main() {
    plumb_fd::keep_freed_memory();
    let asked: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let run = |s: &str| asked.is_empty() || asked.iter().any(|a| a == s);
    eprintln!("load average before: {}", load().trim());
    if run("cnn") {
        cnn();
    }
    if asked.iter().any(|a| a == "cnn-plumb") {
        cnn_plumb();
    }
    if asked.iter().any(|a| a == "cnn-layers") {
        cnn_layers();
    }
    if asked.iter().any(|a| a == "cnn-loop") {
        cnn_loop();
    }
    if asked.iter().any(|a| a == "dense-plumb") {
        dense_plumb();
    }
    if run("mlp") {
        mlp();
    }
    if asked.iter().any(|a| a == "mlp-plumb") {
        mlp_plumb();
    }
    if run("lstm") {
        pass("lstm", "examples/pump-lstm.toml");
    }
    if run("attention") {
        pass("attention", "examples/pump-attention.toml");
    }
    if run("sequence") {
        sequence();
    }
    eprintln!("load average after: {}", load().trim());
}
