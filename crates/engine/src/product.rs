//! The matrix products of the layers' passes, in one place. f64 and f32 go through the `gemm`
//! crate (faer's kernels, picked at run time for the processor: AVX-512, AVX2 with FMA, or
//! portable code), which measured about twice matrixmultiply's rate at the engine's sizes
//! (benches/README.md, "Matrix products"); complex and dual numbers keep ndarray's `dot`. One
//! thread: the finite-difference check runs its evaluations in parallel already, and a product's
//! bits must not depend on how many threads there are.

use std::any::TypeId;

use ndarray::{Array2, ArrayBase, ArrayView2, DataMut, Ix2};

use crate::Scalar;

/// a · b.
pub(crate) fn matmul<S: Scalar + 'static>(a: ArrayView2<S>, b: ArrayView2<S>) -> Array2<S> {
    // The zeros written out rather than `Array2::zeros`: the allocator hands large blocks over
    // untouched, and gemm reading c before writing it then faulted each page in twice (the
    // shared zero page, then a copy to write into): a third of `plumb grad`'s page faults at a
    // batch of 8,192. Written, each page faults once.
    let (m, n) = (a.nrows(), b.ncols());
    let mut zeros = Vec::with_capacity(m * n);
    zeros.resize(m * n, S::zero());
    let mut c = Array2::from_shape_vec((m, n), zeros).expect("m × n values");
    add_matmul(&mut c, a, b);
    c
}

/// c += a · b (c m × n, an array or a view of one): a bias placed in c first is added in the
/// same pass.
pub(crate) fn add_matmul<S: Scalar + 'static, D: DataMut<Elem = S>>(
    c: &mut ArrayBase<D, Ix2>,
    a: ArrayView2<S>,
    b: ArrayView2<S>,
) {
    let ((m, k), n) = (a.dim(), b.ncols());
    assert_eq!((k, c.dim()), (b.nrows(), (m, n)), "product shapes");
    let by_gemm =
        TypeId::of::<S>() == TypeId::of::<f64>() || TypeId::of::<S>() == TypeId::of::<f32>();
    if !by_gemm || !c.is_standard_layout() {
        ndarray::linalg::general_mat_mul(S::one(), &a, &b, S::one(), c);
        return;
    }
    if m == 0 || n == 0 || k == 0 {
        return;
    }
    // Off the pool's workers (the audit's probe pass, `plumb grad`'s batch), a product large
    // enough for gemm to split takes the pool's threads; on a worker (a check's losses, each
    // already a task) it stays on that thread. gemm splits the output's tiles, never a sum over
    // k (its blocks depend on the shapes alone), so the bits do not depend on the threads
    // (test `a_product_has_the_same_bits_on_any_number_of_threads`).
    let parallelism = match rayon::current_thread_index() {
        None => gemm::Parallelism::Rayon(0),
        Some(_) => gemm::Parallelism::None,
    };
    gemm_into(c, a, b, parallelism);
}

/// c += a · b by gemm, for f64 and f32 with c in standard layout and no dimension 0.
fn gemm_into<S: Scalar + 'static, D: DataMut<Elem = S>>(
    c: &mut ArrayBase<D, Ix2>,
    a: ArrayView2<S>,
    b: ArrayView2<S>,
    parallelism: gemm::Parallelism,
) {
    let ((m, k), n) = (a.dim(), b.ncols());
    let (sa, sb, sc) = (a.strides(), b.strides(), c.strides());
    let (c_cs, c_rs) = (sc[1], sc[0]);
    // SAFETY: S is f64 or f32 (checked above), which gemm supports; every pointer and stride
    // describes an array as ndarray holds it (a and b read, c of m × n in standard layout read
    // and written), and none aliases c, which is borrowed mutably.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            c_cs,
            c_rs,
            true,
            a.as_ptr(),
            sa[1],
            sa[0],
            b.as_ptr(),
            sb[1],
            sb[0],
            S::one(),
            S::one(),
            false,
            false,
            false,
            parallelism,
        );
    }
}

#[cfg(test)]
mod tests {
    use ndarray::Array2;

    use super::gemm_into;

    // What `add_matmul` relies on: gemm gives a product the same bits on four threads as on
    // one, in f64 and f32, at shapes far past its threading threshold and not multiples of its
    // tiles (an audit's probe pass is 10,000 × 784 · 784 × 1,024).
    #[test]
    fn a_product_has_the_same_bits_on_any_number_of_threads() {
        fn both<S: crate::Scalar + 'static>(of: impl Fn(f64) -> S) {
            let (m, k, n) = (1003, 517, 389);
            let a = Array2::from_shape_fn((m, k), |(i, j)| {
                of(((i * 7 + j * 13) % 101) as f64 / 37.0 - 1.3)
            });
            let b = Array2::from_shape_fn((k, n), |(i, j)| {
                of(((i * 11 + j * 3) % 97) as f64 / 29.0 - 1.7)
            });
            let mut one = Array2::from_elem((m, n), S::zero());
            let mut four = one.clone();
            gemm_into(&mut one, a.view(), b.view(), gemm::Parallelism::None);
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(4)
                .build()
                .unwrap();
            pool.install(|| gemm_into(&mut four, a.view(), b.view(), gemm::Parallelism::Rayon(4)));
            assert!(
                one.iter()
                    .zip(&four)
                    .all(|(x, y)| x.re().to_bits() == y.re().to_bits())
            );
            assert!(one.iter().any(|v| v.re() != 0.0));
        }
        both(|v| v);
        both(|v| v as f32);
    }
}
