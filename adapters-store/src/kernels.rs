//! The one place switchyard calls the `gemm` crate's raw f32 kernel. It computes
//! `dst = (accumulate ? dst : 0) + scale * lhs * rhs` on strided views of plain slices, so callers
//! can run a matmul straight into an output buffer (no temporary, no extra pass), accumulate a
//! low-rank term onto a base output in place, or merge `s B A` into a weight in place. The kernel
//! picks AVX-512, AVX2+FMA or a scalar fallback at run time from what the CPU offers.
//!
//! Every call is bounds-checked here, so the `unsafe` call below cannot read or write outside
//! the slices it was given.

pub use gemm::Parallelism;

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

    /// Rows `start..start + len` of this view.
    pub fn rows_range(&self, start: usize, len: usize) -> Self {
        assert!(start + len <= self.rows, "row range outside the matrix");
        Self {
            data: &self.data[(start * self.row_stride).min(self.data.len())..],
            rows: len,
            ..*self
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

/// How many threads the kernel may use for a product of this size: one thread for small
/// products, where splitting costs more than it saves (at M = 1 on 384-wide layers one thread
/// is 2–4x faster than two, see shared/PERF-NOTES.md), all of them otherwise.
pub fn parallelism_for(m: usize, n: usize, k: usize) -> Parallelism {
    let flops = 2 * m * n * k;
    let threads = rayon_threads();
    if threads <= 1 || flops < 4_000_000 {
        Parallelism::None
    } else {
        Parallelism::Rayon(threads)
    }
}

fn rayon_threads() -> usize {
    static THREADS: std::sync::OnceLock<usize> = std::sync::OnceLock::new();
    *THREADS.get_or_init(|| {
        std::env::var("RAYON_NUM_THREADS")
            .ok()
            .and_then(|v| v.parse().ok())
            .filter(|&n: &usize| n > 0)
            .unwrap_or_else(|| {
                std::thread::available_parallelism()
                    .map(|n| n.get())
                    .unwrap_or(1)
            })
    })
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
            for row in dst.chunks_mut(dst_row_stride).take(m) {
                row[..n].fill(0.0);
            }
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

/// Up to this many rows, `x W^T` runs as dot products against each weight row (see
/// [`small_rows_matmul`]) instead of through gemm, which packs the whole weight first.
pub const SMALL_ROWS: usize = 16;

/// `y[m, n] = (accumulate ? y : 0) + x[m, k] W[n, k]^T` for few rows (decode steps): every weight
/// row is read from memory once and dotted with all `m` input rows while it sits in cache, so
/// the cost is one pass over the weights, the floor a memory-bound product can reach. Output
/// rows are split across the rayon pool. Uses AVX2+FMA when the CPU has them (checked at run
/// time), portable code otherwise; `SWITCHYARD_KERNELS=portable` forces the portable path.
pub fn small_rows_matmul(
    y: &mut [f32],
    x: &[f32],
    w: &[f32],
    m: usize,
    k: usize,
    n: usize,
    accumulate: bool,
) {
    use rayon::prelude::*;
    assert!(
        x.len() >= m * k && w.len() >= n * k && y.len() >= m * n,
        "a matrix does not fit its slice"
    );
    if m == 0 || n == 0 {
        return;
    }
    let fast = use_avx2();
    // Work on blocks of output columns (weight rows); each task writes its own columns of y.
    let block = 64.min(n).max(1);
    let blocks: Vec<usize> = (0..n).step_by(block).collect();
    let results: Vec<(usize, Vec<f32>)> = blocks
        .par_iter()
        .map(|&j0| {
            let j1 = (j0 + block).min(n);
            let mut out = vec![0f32; m * (j1 - j0)];
            for j in j0..j1 {
                let wr = &w[j * k..(j + 1) * k];
                for i in 0..m {
                    let xr = &x[i * k..(i + 1) * k];
                    out[i * (j1 - j0) + (j - j0)] = if fast {
                        dot_avx2(xr, wr)
                    } else {
                        dot_portable(xr, wr)
                    };
                }
            }
            (j0, out)
        })
        .collect();
    for (j0, out) in results {
        let width = out.len() / m;
        for i in 0..m {
            let dst = &mut y[i * n + j0..i * n + j0 + width];
            let src = &out[i * width..(i + 1) * width];
            if accumulate {
                dst.iter_mut().zip(src).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(src);
            }
        }
    }
}

fn use_avx2() -> bool {
    static FAST: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *FAST.get_or_init(|| {
        if std::env::var("SWITCHYARD_KERNELS").is_ok_and(|v| v == "portable") {
            return false;
        }
        #[cfg(target_arch = "x86_64")]
        {
            std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
}

/// A dot product with eight independent partial sums, which the compiler vectorises.
pub fn dot_portable(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0f32; 8];
    let chunks = a.len() / 8;
    for c in 0..chunks {
        for l in 0..8 {
            acc[l] += a[c * 8 + l] * b[c * 8 + l];
        }
    }
    let mut sum: f32 = acc.iter().sum();
    for i in chunks * 8..a.len().min(b.len()) {
        sum += a[i] * b[i];
    }
    sum
}

fn dot_avx2(a: &[f32], b: &[f32]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            dot_avx2_inner(a, b)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        dot_portable(a, b)
    }
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2_inner(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let chunks = n / 32;
    let mut s0 = _mm256_setzero_ps();
    let mut s1 = _mm256_setzero_ps();
    let mut s2 = _mm256_setzero_ps();
    let mut s3 = _mm256_setzero_ps();
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    for c in 0..chunks {
        let o = c * 32;
        // SAFETY: o + 32 <= n, and n is within both slices.
        unsafe {
            s0 = _mm256_fmadd_ps(_mm256_loadu_ps(pa.add(o)), _mm256_loadu_ps(pb.add(o)), s0);
            s1 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 8)),
                _mm256_loadu_ps(pb.add(o + 8)),
                s1,
            );
            s2 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 16)),
                _mm256_loadu_ps(pb.add(o + 16)),
                s2,
            );
            s3 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 24)),
                _mm256_loadu_ps(pb.add(o + 24)),
                s3,
            );
        }
    }
    let s = _mm256_add_ps(_mm256_add_ps(s0, s1), _mm256_add_ps(s2, s3));
    let mut lanes = [0f32; 8];
    // SAFETY: lanes has room for eight floats.
    unsafe { _mm256_storeu_ps(lanes.as_mut_ptr(), s) };
    let mut sum: f32 = lanes.iter().sum();
    for i in chunks * 32..n {
        sum += a[i] * b[i];
    }
    sum
}

/// Runs `f` on the f32 elements of a contiguous CPU tensor, without copying.
pub fn with_f32<R>(t: &candle_core::Tensor, f: impl FnOnce(&[f32]) -> R) -> candle_core::Result<R> {
    let (storage, layout) = t.storage_and_layout();
    let candle_core::Storage::Cpu(cpu) = &*storage else {
        candle_core::bail!("tensor is not in CPU memory");
    };
    let data = cpu.as_slice::<f32>()?;
    match layout.contiguous_offsets() {
        Some((start, end)) => Ok(f(&data[start..end])),
        None => candle_core::bail!("tensor is not contiguous"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn naive(a: &[f32], b: &[f32], m: usize, k: usize, n: usize) -> Vec<f32> {
        let mut out = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                out[i * n + j] = (0..k).map(|p| a[i * k + p] * b[p * n + j]).sum();
            }
        }
        out
    }

    fn values(n: usize, seed: u32) -> Vec<f32> {
        (0..n)
            .map(|i| (((i as u32).wrapping_mul(2654435761) ^ seed) % 1000) as f32 / 500.0 - 1.0)
            .collect()
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
    fn small_rows_kernel_matches_gemm_on_both_paths() {
        let (m, k, n) = (5, 300, 130);
        let x = values(m * k, 8);
        let w = values(n * k, 9);
        let mut want = vec![0.0; m * n];
        matmul_into(
            &mut want,
            n,
            MatRef::row_major(&x, m, k),
            MatRef::transposed(&w, k, n),
            false,
            1.0,
            Parallelism::None,
        );
        let mut got = vec![1.0; m * n];
        small_rows_matmul(&mut got, &x, &w, m, k, n, true);
        for (g, w) in got.iter().zip(&want) {
            assert!((g - (w + 1.0)).abs() < 1e-3, "{g} vs {}", w + 1.0);
        }
        // The portable fallback (what a CPU without AVX2 runs) agrees with the vector path.
        for i in 0..n {
            let (a, b) = (&x[..k], &w[i * k..(i + 1) * k]);
            assert!((dot_portable(a, b) - dot_avx2(a, b)).abs() < 1e-3);
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
