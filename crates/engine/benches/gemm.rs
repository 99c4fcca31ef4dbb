//! Matrix products at the engine's sizes, one thread: ndarray's `dot` (matrixmultiply) against
//! the `gemm` crate, f64 and f32. Run: `MATMUL_NUM_THREADS=1 cargo bench -p plumb-engine --bench
//! gemm`. Each shape is m × k · k × n as the dense layer's passes form it (forward x·Wᵀ, the
//! weight gradient dᵀ·x with the batch as the inner size, the input gradient d·W); before the
//! timings, the worst error of each against the f64 product of the same values is printed.

use criterion::{BenchmarkId, Criterion, criterion_group, criterion_main};
use ndarray::{Array2, ArrayView2, LinalgScalar};
use plumb_engine::Rng;
use std::hint::black_box;

/// `a · b` through the gemm crate, one thread, whatever the views' strides.
fn gemm_dot<T: LinalgScalar>(a: ArrayView2<T>, b: ArrayView2<T>) -> Array2<T> {
    let (m, k) = a.dim();
    let n = b.ncols();
    let mut c = Array2::<T>::zeros((m, n));
    let (sa, sb) = (a.strides(), b.strides());
    // SAFETY: the pointers and strides describe the three arrays as ndarray holds them; c is
    // m × n standard layout and not read (read_dst false).
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            1,
            n as isize,
            false,
            a.as_ptr(),
            sa[1],
            sa[0],
            b.as_ptr(),
            sb[1],
            sb[0],
            T::zero(),
            T::one(),
            false,
            false,
            false,
            gemm::Parallelism::None,
        );
    }
    c
}

/// (label, m, k, n, lhs transposed) for a batch of `m` samples.
fn shapes(m: usize) -> Vec<(String, usize, usize, usize, bool)> {
    vec![
        (format!("x·Wᵀ {m}×784·784×256"), m, 784, 256, false),
        (format!("x·Wᵀ {m}×128·128×10"), m, 128, 10, false),
        (format!("dᵀ·x 256×{m}·{m}×784"), 256, m, 784, true),
        (format!("d·W {m}×256·256×784"), m, 256, 784, false),
        (format!("x·Wᵀ {m}×1024·1024×1024"), m, 1024, 1024, false),
    ]
}

fn operands(m: usize, k: usize, n: usize, lhs_t: bool) -> (Array2<f64>, Array2<f64>) {
    let mut rng = Rng::new(7);
    let a = if lhs_t {
        // Stored k × m, used transposed (the weight gradient's dᵀ).
        Array2::from_shape_fn((k, m), |_| rng.normal())
    } else {
        Array2::from_shape_fn((m, k), |_| rng.normal())
    };
    let b = Array2::from_shape_fn((k, n), |_| rng.normal());
    (a, b)
}

fn lhs<T>(a: &Array2<T>, t: bool) -> ArrayView2<'_, T> {
    if t { a.t() } else { a.view() }
}

fn accuracy() {
    for m in [256, 8192] {
        for (label, m, k, n, t) in shapes(m) {
            let (a, b) = operands(m, k, n, t);
            let (a32, b32) = (a.mapv(|v| v as f32), b.mapv(|v| v as f32));
            let exact32 = lhs(&a32.mapv(f64::from), t).dot(&b32.mapv(f64::from));
            let scale32 = exact32.iter().fold(0.0f64, |s, v| s.max(v.abs()));
            let off32 = |c: Array2<f32>| {
                c.iter()
                    .zip(&exact32)
                    .map(|(&u, &v)| (u as f64 - v).abs())
                    .fold(0.0, f64::max)
                    / scale32
            };
            println!(
                "{label}: f32 worst error of the largest: matrixmultiply {:.1e}, gemm {:.1e}",
                off32(lhs(&a32, t).dot(&b32)),
                off32(gemm_dot(lhs(&a32, t), b32.view())),
            );
        }
    }
}

fn products(c: &mut Criterion) {
    accuracy();
    for m in [32, 256, 8192] {
        let mut group = c.benchmark_group(format!("batch {m}"));
        group.sample_size(10);
        group.warm_up_time(std::time::Duration::from_millis(300));
        group.measurement_time(std::time::Duration::from_secs(1));
        for (label, m, k, n, t) in shapes(m) {
            let (a, b) = operands(m, k, n, t);
            let (a32, b32) = (a.mapv(|v| v as f32), b.mapv(|v| v as f32));
            group.bench_function(BenchmarkId::new("f64 matrixmultiply", &label), |bn| {
                bn.iter(|| black_box(lhs(&a, t).dot(&b)))
            });
            group.bench_function(BenchmarkId::new("f64 gemm", &label), |bn| {
                bn.iter(|| black_box(gemm_dot(lhs(&a, t), b.view())))
            });
            group.bench_function(BenchmarkId::new("f32 matrixmultiply", &label), |bn| {
                bn.iter(|| black_box(lhs(&a32, t).dot(&b32)))
            });
            group.bench_function(BenchmarkId::new("f32 gemm", &label), |bn| {
                bn.iter(|| black_box(gemm_dot(lhs(&a32, t), b32.view())))
            });
        }
        group.finish();
    }
}

criterion_group!(benches, products);
criterion_main!(benches);
