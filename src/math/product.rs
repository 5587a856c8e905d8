//! The one matrix product behind every reference computation, with a portable mode whose
//! summation order does not depend on the processor (golden vectors are computed in it).

use std::cell::Cell;

thread_local! {
    static PORTABLE: Cell<bool> = const { Cell::new(false) };
}

/// Runs `f` with portable arithmetic: matrix products inside the library use one fixed
/// summation order in plain loops instead of the CPU-dispatched SIMD kernels, so the
/// results are bit-identical on every x86_64 and aarch64 machine.
///
/// Golden vectors are computed this way; benchmarks and interactive checks use the
/// fast path. The flag is per thread and restored afterwards, even on early return.
pub fn with_portable_arithmetic<R>(f: impl FnOnce() -> R) -> R {
    struct Restore(bool);
    impl Drop for Restore {
        fn drop(&mut self) {
            PORTABLE.with(|p| p.set(self.0));
        }
    }
    let _restore = Restore(PORTABLE.with(|p| p.replace(true)));
    f()
}

/// Whether the current thread is inside [`with_portable_arithmetic`].
pub(crate) fn portable() -> bool {
    PORTABLE.with(|p| p.get())
}

/// `c = alpha · a · b + beta · c` on the fast path, or in plain loops (fixed order,
/// no fused multiply-add) under [`with_portable_arithmetic`].
pub(crate) fn gemm<A, B, C>(
    alpha: f64,
    a: &ndarray::ArrayBase<A, ndarray::Ix2>,
    b: &ndarray::ArrayBase<B, ndarray::Ix2>,
    beta: f64,
    c: &mut ndarray::ArrayBase<C, ndarray::Ix2>,
) where
    A: ndarray::Data<Elem = f64>,
    B: ndarray::Data<Elem = f64>,
    C: ndarray::DataMut<Elem = f64>,
{
    if !portable() {
        ndarray::linalg::general_mat_mul(alpha, a, b, beta, c);
        return;
    }
    let inner = a.ncols();
    for ((i, j), out) in c.indexed_iter_mut() {
        let mut sum = 0.0;
        for p in 0..inner {
            sum += a[[i, p]] * b[[p, j]];
        }
        *out = alpha * sum + if beta == 0.0 { 0.0 } else { beta * *out };
    }
}

/// `a · b` allocated, through [`gemm`].
pub(crate) fn matmul<A, B>(
    a: &ndarray::ArrayBase<A, ndarray::Ix2>,
    b: &ndarray::ArrayBase<B, ndarray::Ix2>,
) -> ndarray::Array2<f64>
where
    A: ndarray::Data<Elem = f64>,
    B: ndarray::Data<Elem = f64>,
{
    let mut c = ndarray::Array2::zeros((a.nrows(), b.ncols()));
    gemm(1.0, a, b, 0.0, &mut c);
    c
}
