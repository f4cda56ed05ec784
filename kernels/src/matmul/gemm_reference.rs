//! The `gemm` crate's f32 kernel on strided views of plain slices: the reference the packed
//! kernel's tests compare against (`dst = (accumulate ? dst : 0) + scale * lhs * rhs`).

pub use gemm::Parallelism;

use crate::threads::zero_rows;

/// A read-only strided view of a row-major-or-not matrix inside a slice.
#[derive(Debug, Clone, Copy)]
pub struct MatRef<'a> {
    pub data: &'a [f32],
    pub rows: usize,
    pub cols: usize,
    /// Elements between the starts of consecutive rows.
    pub row_stride: usize,
    /// Elements between consecutive columns of a row.
    pub col_stride: usize,
}

impl<'a> MatRef<'a> {
    /// A contiguous row-major `[rows, cols]` matrix.
    pub fn row_major(data: &'a [f32], rows: usize, cols: usize) -> Self {
        Self {
            data,
            rows,
            cols,
            row_stride: cols,
            col_stride: 1,
        }
    }

    /// The transpose of a contiguous row-major `[cols, rows]` matrix, viewed as `[rows, cols]`.
    pub fn transposed(data: &'a [f32], rows: usize, cols: usize) -> Self {
        Self {
            data,
            rows,
            cols,
            row_stride: 1,
            col_stride: rows,
        }
    }

    fn fits(&self) -> bool {
        if self.rows == 0 || self.cols == 0 {
            return true;
        }
        let last = (self.rows - 1) * self.row_stride + (self.cols - 1) * self.col_stride;
        last < self.data.len()
    }
}

/// `dst[m, n] (row stride dst_row_stride) = (accumulate ? dst : 0) + scale * lhs[m, k] * rhs[k, n]`.
///
/// Panics when a view does not fit its slice or the shapes disagree.
pub fn matmul_into(
    dst: &mut [f32],
    dst_row_stride: usize,
    lhs: MatRef<'_>,
    rhs: MatRef<'_>,
    accumulate: bool,
    scale: f32,
    parallelism: Parallelism,
) {
    let (m, k, n) = (lhs.rows, lhs.cols, rhs.cols);
    assert_eq!(rhs.rows, k, "inner dimensions differ");
    assert!(
        lhs.fits() && rhs.fits(),
        "a matrix view does not fit its slice"
    );
    assert!(dst_row_stride >= n, "destination rows overlap");
    if m == 0 || n == 0 {
        return;
    }
    assert!(
        (m - 1) * dst_row_stride + n <= dst.len(),
        "destination does not fit its slice"
    );
    if k == 0 {
        if !accumulate {
            zero_rows(dst, dst_row_stride, m, n);
        }
        return;
    }
    // SAFETY: the asserts above prove that every element the kernel reads (lhs, rhs) and writes
    // (dst) lies inside its slice; dst is borrowed mutably, so it aliases neither input.
    #[allow(unsafe_code)]
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst.as_mut_ptr(),
            1,
            dst_row_stride as isize,
            accumulate,
            lhs.data.as_ptr(),
            lhs.col_stride as isize,
            lhs.row_stride as isize,
            rhs.data.as_ptr(),
            rhs.col_stride as isize,
            rhs.row_stride as isize,
            1.0,
            scale,
            false,
            false,
            false,
            parallelism,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_values::values;

    fn naive(a: &[f32], b: &[f32], m: usize, k: usize, n: usize) -> Vec<f32> {
        let mut out = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                out[i * n + j] = (0..k).map(|p| a[i * k + p] * b[p * n + j]).sum();
            }
        }
        out
    }

    #[test]
    fn matches_a_naive_product_plain_and_accumulated() {
        let (m, k, n) = (7, 13, 5);
        let a = values(m * k, 1);
        let b = values(k * n, 2);
        let want = naive(&a, &b, m, k, n);
        let mut dst = vec![9.0; m * n];
        matmul_into(
            &mut dst,
            n,
            MatRef::row_major(&a, m, k),
            MatRef::row_major(&b, k, n),
            false,
            1.0,
            Parallelism::None,
        );
        for (g, w) in dst.iter().zip(&want) {
            assert!((g - w).abs() < 1e-5);
        }
        let start = values(m * n, 3);
        let mut acc = start.clone();
        matmul_into(
            &mut acc,
            n,
            MatRef::row_major(&a, m, k),
            MatRef::row_major(&b, k, n),
            true,
            0.5,
            Parallelism::None,
        );
        for i in 0..m * n {
            assert!((acc[i] - (start[i] + 0.5 * want[i])).abs() < 1e-5);
        }
    }

    #[test]
    fn transposed_rhs_reads_a_weight_stored_out_by_in() {
        // y = x W^T with W [n, k] row-major, the layout of every checkpoint's linear weight.
        let (m, k, n) = (3, 6, 4);
        let x = values(m * k, 4);
        let w = values(n * k, 5);
        let mut wt = vec![0.0; k * n];
        for j in 0..n {
            for p in 0..k {
                wt[p * n + j] = w[j * k + p];
            }
        }
        let want = naive(&x, &wt, m, k, n);
        let mut dst = vec![0.0; m * n];
        matmul_into(
            &mut dst,
            n,
            MatRef::row_major(&x, m, k),
            MatRef::transposed(&w, k, n),
            false,
            1.0,
            Parallelism::None,
        );
        for (g, w) in dst.iter().zip(&want) {
            assert!((g - w).abs() < 1e-5);
        }
    }

    #[test]
    #[should_panic(expected = "does not fit")]
    fn a_view_larger_than_its_slice_is_refused() {
        let a = vec![0.0; 5];
        let b = vec![0.0; 4];
        let mut dst = vec![0.0; 4];
        matmul_into(
            &mut dst,
            2,
            MatRef::row_major(&a, 2, 3),
            MatRef::row_major(&b, 3, 2),
            false,
            1.0,
            Parallelism::None,
        );
    }
}
