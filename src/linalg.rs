//! Dense matrix products over flat row-major buffers, through the `gemm` crate.
//!
//! Every product in the flow's hot path goes through [`matmul`], which checks
//! the strided views against their buffers before handing raw pointers to
//! `gemm`, so callers stay in safe code.

use gemm::Parallelism;
use std::cell::Cell;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

/// Nanoseconds spent inside [`matmul`], summed over all threads; `bench`
/// reads it to split a step into its products and everything else.
static PRODUCT_NANOS: AtomicU64 = AtomicU64::new(0);

/// Time spent in matrix products so far, summed over all threads.
pub fn time_in_products() -> Duration {
    Duration::from_nanos(PRODUCT_NANOS.load(Ordering::Relaxed))
}

thread_local! {
    static IN_GEMM: Cell<bool> = const { Cell::new(false) };
}

/// Whether this thread is inside a `gemm` call. It lets a counting
/// allocator (in the tests) tell `gemm`'s own packing buffers, which it
/// allocates in every call, from allocations of this crate.
pub fn inside_gemm() -> bool {
    IN_GEMM.with(Cell::get)
}

/// A strided read-only view of a matrix inside a flat buffer.
#[derive(Clone, Copy)]
pub struct View<'a, T> {
    pub data: &'a [T],
    pub rows: usize,
    pub cols: usize,
    /// Distance between consecutive rows, in elements.
    pub row_stride: usize,
    /// Distance between consecutive columns, in elements.
    pub col_stride: usize,
}

impl<'a, T> View<'a, T> {
    /// A row-major matrix whose rows are `row_stride` apart (>= cols).
    pub fn rows(data: &'a [T], rows: usize, cols: usize, row_stride: usize) -> Self {
        View { data, rows, cols, row_stride, col_stride: 1 }
    }

    /// The transpose of a contiguous row-major `rows x cols` matrix.
    pub fn transposed(data: &'a [T], rows: usize, cols: usize) -> Self {
        View { data, rows: cols, cols: rows, row_stride: 1, col_stride: cols }
    }

    fn check(&self) {
        if self.rows > 0 && self.cols > 0 {
            let last = (self.rows - 1) * self.row_stride + (self.cols - 1) * self.col_stride;
            assert!(last < self.data.len(), "matrix view exceeds its buffer");
        }
    }
}

/// `dst = (accumulate ? dst : 0) + a * b`, where `dst` is a contiguous
/// row-major `a.rows x b.cols` block whose rows are `dst_stride` apart.
pub fn matmul<T: Copy + 'static + From<f32>>(
    dst: &mut [T],
    dst_stride: usize,
    accumulate: bool,
    a: View<'_, T>,
    b: View<'_, T>,
) {
    assert_eq!(a.cols, b.rows, "inner dimensions differ");
    let (m, n, k) = (a.rows, b.cols, a.cols);
    if m == 0 || n == 0 {
        return;
    }
    assert!((m - 1) * dst_stride + n <= dst.len(), "destination too small");
    a.check();
    b.check();
    if k == 0 {
        if !accumulate {
            for r in 0..m {
                dst[r * dst_stride..r * dst_stride + n].fill(T::from(0.0));
            }
        }
        return;
    }
    // SAFETY: every index the kernel touches lies inside the checked views and
    // the checked destination block; `dst` does not alias `a` or `b` because it
    // is borrowed mutably.
    IN_GEMM.with(|f| f.set(true));
    let start = Instant::now();
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst.as_mut_ptr(),
            1,
            dst_stride as isize,
            accumulate,
            a.data.as_ptr(),
            a.col_stride as isize,
            a.row_stride as isize,
            b.data.as_ptr(),
            b.col_stride as isize,
            b.row_stride as isize,
            T::from(1.0),
            T::from(1.0),
            false,
            false,
            false,
            Parallelism::None,
        );
    }
    PRODUCT_NANOS.fetch_add(start.elapsed().as_nanos() as u64, Ordering::Relaxed);
    IN_GEMM.with(|f| f.set(false));
}

#[cfg(test)]
mod tests {
    use super::*;

    fn naive(a: &[f64], b: &[f64], m: usize, k: usize, n: usize) -> Vec<f64> {
        let mut c = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                c[i * n + j] = (0..k).map(|p| a[i * k + p] * b[p * n + j]).sum();
            }
        }
        c
    }

    #[test]
    fn matches_triple_loop_with_transposes_and_strides() {
        let (m, k, n) = (5, 7, 3);
        let a: Vec<f64> = (0..m * k).map(|i| (i as f64 * 0.37).sin()).collect();
        let b: Vec<f64> = (0..k * n).map(|i| (i as f64 * 0.11).cos()).collect();
        let want = naive(&a, &b, m, k, n);
        let mut c = vec![0.0; m * n];
        matmul(&mut c, n, false, View::rows(&a, m, k, k), View::rows(&b, k, n, n));
        for (x, y) in c.iter().zip(&want) {
            assert!((x - y).abs() < 1e-12);
        }
        // (b^T)^T through a transposed view of a stored transpose.
        let mut bt = vec![0.0; n * k];
        for p in 0..k {
            for j in 0..n {
                bt[j * k + p] = b[p * n + j];
            }
        }
        let mut c2 = vec![1.0; m * n];
        matmul(&mut c2, n, true, View::rows(&a, m, k, k), View::transposed(&bt, n, k));
        for (x, y) in c2.iter().zip(&want) {
            assert!((x - (y + 1.0)).abs() < 1e-12);
        }
    }
}

/// ln(sum exp(v)), computed stably.
pub fn log_sum_exp(v: &[f64]) -> f64 {
    let top = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if top == f64::NEG_INFINITY {
        return top;
    }
    top + v.iter().map(|x| (x - top).exp()).sum::<f64>().ln()
}
