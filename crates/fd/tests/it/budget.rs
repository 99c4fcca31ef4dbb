//! The memory a check may take (docs/budget.md, issue 14's acceptance): the default check of a
//! 784-512-512-10 network, measured as the peak of live bytes by a counting allocator.
//!
//! The allocator counts every thread of the process, and the other tests of this binary run
//! beside this one; so the test runs itself again in a child process of this binary that runs it
//! alone (`PLUMB_FD_BUDGET_CHILD`, two rayon threads), where the check is all there is to count.

use std::alloc::{GlobalAlloc, Layout, System};
use std::process::Command;
use std::sync::atomic::{AtomicUsize, Ordering};

use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::{CheckConfig, Method, Precision, check_graph};

use crate::graph_common::dense;

struct Counting;

static LIVE: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        let p = unsafe { System.alloc(layout) };
        if !p.is_null() {
            let now = LIVE.fetch_add(layout.size(), Ordering::Relaxed) + layout.size();
            PEAK.fetch_max(now, Ordering::Relaxed);
        }
        p
    }
    unsafe fn dealloc(&self, p: *mut u8, layout: Layout) {
        unsafe { System.dealloc(p, layout) };
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
    }
}

#[global_allocator]
static ALLOCATOR: Counting = Counting;

const CHILD: &str = "PLUMB_FD_BUDGET_CHILD";
/// Threads of the measured check: each holds one direction and one pass at a time.
const THREADS: usize = 2;
/// Samples in the CLI's default synthetic batch.
const SAMPLES: usize = 32;

/// The check's memory budget for a network of `parameters` values and a batch pass of `pass`
/// values (samples × every layer's units, inputs included), as bytes of f64:
/// - kept for the whole check, 4 weight sets: the gradient checked, its pieces' magnitudes
///   (`gross`), the weights in the checked precision, and the result's copy of the gradient;
/// - per thread, 3 weight sets: a direction over every tensor drawn while it is checked, its
///   copy in the checked precision, and a moved layer (at most a weight set);
/// - the base pass (z and a of every layer) once, and per thread a pass's worth of
///   intermediate layers, plus 2 MiB per thread for the matrix product's packing buffers.
///
/// A check that drew every direction as a whole weight set (4 per part and 4 global ones, 28 for
/// three layers) would hold 28 weight sets at once, far above.
fn budget(parameters: usize, pass: usize) -> usize {
    let set = 8 * parameters;
    let pass = 8 * pass;
    4 * set + THREADS * 3 * set + 2 * pass + THREADS * (2 * pass + (2 << 20))
}

fn network() -> Graph {
    // The layers of benches/check-784-512-512-10.toml.
    dense(
        784,
        &[
            (512, Activation::Relu),
            (512, Activation::Relu),
            (10, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.0,
    )
}

/// The budget was counted for the dense check; the graph check (which every description's
/// `plumb check` runs) held 17.8 weight sets before a random direction went to it as the vector
/// it is rather than one 24-byte change per entry (three weight sets' worth per direction), and
/// is within the budget since (9.5 weight sets, 50.8 MB, on 2026-12-03; 8.7 and 46.5 MB since a
/// direction's loss copies only the layers it moves, one at a time, and the check's workspaces
/// are dropped after each request).
#[test]
fn the_default_check_of_784_512_512_10_stays_within_its_memory_budget() {
    if std::env::var_os(CHILD).is_some() {
        measure();
        return;
    }
    let me = std::env::current_exe().unwrap();
    let out = Command::new(me)
        .args([
            "budget::the_default_check_of_784_512_512_10_stays_within_its_memory_budget",
            "--exact",
            "--nocapture",
            "--test-threads=1",
        ])
        .env(CHILD, "1")
        .env("RAYON_NUM_THREADS", THREADS.to_string())
        .output()
        .unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "the measuring child failed:\n{text}");
    // The child ran the test (a filter that matched nothing would pass too).
    assert!(text.contains("peak of live bytes"), "{text}");
}

fn measure() {
    let net = network();
    let weights = Init::HeNormal.graph_params(&net, &mut Rng::new(0));
    let batch = Batch::graph_synthetic(&net, SAMPLES, 0);
    let (x, y) = (batch.x.view(), batch.y.view());
    let config = CheckConfig::new(Method::Central, Precision::F64);
    assert_eq!(rayon::current_num_threads(), THREADS);
    let start = LIVE.load(Ordering::Relaxed);
    PEAK.store(start, Ordering::Relaxed);
    let result = check_graph(&net, &weights, x, y, &config, &|_, _| {}).unwrap();
    let peak = PEAK.load(Ordering::Relaxed) - start;
    // The default check: 1,000 coordinates per layer and 4 directions per tensor and globally.
    assert_eq!(result.coords.len(), 3_000);
    assert_eq!(result.directions.len(), 4 * (1 + 2 * 3));
    let units: usize = 784
        + net
            .nodes()
            .iter()
            .map(|n| n.layer.output().size())
            .sum::<usize>();
    let allowed = budget(net.parameters(), SAMPLES * units);
    let set = 8 * net.parameters();
    println!(
        "peak of live bytes {peak} ({:.1} weight sets of {set} bytes); budget {allowed} ({:.1})",
        peak as f64 / set as f64,
        allowed as f64 / set as f64
    );
    assert!(
        peak <= allowed,
        "the check held {peak} bytes at its peak; its budget is {allowed}"
    );
    // Issue 14's acceptance: at most 100 MiB.
    assert!(peak <= 100 << 20, "{peak} bytes");
}
