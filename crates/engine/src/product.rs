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
            gemm::Parallelism::None,
        );
    }
}
