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
/// row is read from memory once and used for all `m` input rows while it sits in cache, so the
/// cost is one pass over the weights, the floor a memory-bound product can reach.
///
/// The inner loop is register-blocked: a tile of up to 4 input rows by 3 to 6 weight rows keeps
/// one vector accumulator per (row, weight row) pair, so each weight vector loaded is used for
/// every row of the tile and each input vector for every weight row. Output columns are split
/// across the rayon pool when the product is large enough to pay for it; the blocks go to one
/// reused scratch buffer, so a call allocates nothing in steady state. Uses AVX2+FMA when the CPU
/// has them (checked at run time), portable code otherwise; `SWITCHYARD_KERNELS=portable` forces
/// the portable path.
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
    let threads = rayon_threads();
    if threads <= 1 || m * n * k < (1 << 20) {
        rows_into(y, n, &x[..m * k], &w[..n * k], m, k, n, accumulate, fast);
        return;
    }
    // Blocks of output columns, a multiple of 12 wide (every tile width divides it), about four
    // per thread so a thread slowed by a neighbour does not hold the others up.
    let per = n.div_ceil(threads * 4).div_ceil(12) * 12;
    // Taken out of the thread-local, not borrowed: a rayon wait may run another call here.
    let mut scratch = ROWS_SCRATCH.with(|s| std::mem::take(&mut *s.borrow_mut()));
    scratch.clear();
    scratch.resize(m * n, 0.0);
    scratch
        .par_chunks_mut(per * m)
        .enumerate()
        .for_each(|(b, out)| {
            let j0 = b * per;
            let width = out.len() / m;
            rows_into(
                out,
                width,
                &x[..m * k],
                &w[j0 * k..(j0 + width) * k],
                m,
                k,
                width,
                false,
                fast,
            );
        });
    for (b, block) in scratch.chunks(per * m).enumerate() {
        let j0 = b * per;
        let width = block.len() / m;
        for i in 0..m {
            let dst = &mut y[i * n + j0..i * n + j0 + width];
            let src = &block[i * width..(i + 1) * width];
            if accumulate {
                dst.iter_mut().zip(src).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(src);
            }
        }
    }
    ROWS_SCRATCH.with(|s| *s.borrow_mut() = scratch);
}

thread_local! {
    static ROWS_SCRATCH: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// `out[i * stride + j] (+)= x[i, :] . w[j, :]` for `i < m`, `j < n`, tile by tile. The weight
/// rows go in blocks small enough to stay in L2 while every group of input rows passes over
/// them, so the weights come from memory once whatever `m` is.
#[allow(clippy::too_many_arguments)]
fn rows_into(
    out: &mut [f32],
    stride: usize,
    x: &[f32],
    w: &[f32],
    m: usize,
    k: usize,
    n: usize,
    accumulate: bool,
    fast: bool,
) {
    // About 192 KB of weights per block, a multiple of 6 rows (every tile width divides it).
    let block = ((192 * 1024) / (4 * k.max(1)) / 6 * 6).max(6);
    let mut j0 = 0;
    while j0 < n {
        let j1 = (j0 + block).min(n);
        let wb = &w[j0 * k..j1 * k];
        let mut i0 = 0;
        while i0 < m {
            let r = (m - i0).min(4);
            let xs = &x[i0 * k..(i0 + r) * k];
            let o = &mut out[i0 * stride + j0..];
            let width = j1 - j0;
            match r {
                4 => cols::<4, 3>(o, stride, xs, wb, k, width, accumulate, fast),
                3 => cols::<3, 3>(o, stride, xs, wb, k, width, accumulate, fast),
                2 => cols::<2, 3>(o, stride, xs, wb, k, width, accumulate, fast),
                _ => cols::<1, 6>(o, stride, xs, wb, k, width, accumulate, fast),
            }
            i0 += r;
        }
        j0 = j1;
    }
}

/// All output columns for `R` input rows, `C` weight rows at a time, then one at a time.
#[allow(clippy::too_many_arguments)]
fn cols<const R: usize, const C: usize>(
    out: &mut [f32],
    stride: usize,
    xs: &[f32],
    w: &[f32],
    k: usize,
    n: usize,
    accumulate: bool,
    fast: bool,
) {
    let mut store = |j: usize, t: &[f32], c: usize| {
        for ii in 0..R {
            let row = &mut out[ii * stride + j..ii * stride + j + c];
            let vals = &t[ii * c..(ii + 1) * c];
            if accumulate {
                row.iter_mut().zip(vals).for_each(|(d, s)| *d += s);
            } else {
                row.copy_from_slice(vals);
            }
        }
    };
    let mut j = 0;
    while j + C <= n {
        let t = tile::<R, C>(xs, &w[j * k..(j + C) * k], k, fast);
        store(j, t.as_flattened(), C);
        j += C;
    }
    while j < n {
        let t = tile::<R, 1>(xs, &w[j * k..(j + 1) * k], k, fast);
        store(j, t.as_flattened(), 1);
        j += 1;
    }
}

/// Dot products of `R` rows of `xs` with `C` rows of `ws` (rows `k` long): `[[x_i . w_j; C]; R]`.
fn tile<const R: usize, const C: usize>(
    xs: &[f32],
    ws: &[f32],
    k: usize,
    fast: bool,
) -> [[f32; C]; R] {
    assert!(
        xs.len() >= R * k && ws.len() >= C * k,
        "tile outside its slices"
    );
    #[cfg(target_arch = "x86_64")]
    if fast {
        // SAFETY: `fast` is only true when `use_avx2` saw AVX2 and FMA on this CPU; the slices
        // hold R and C rows of k values (asserted above).
        #[allow(unsafe_code)]
        return unsafe { tile_avx2::<R, C>(xs, ws, k) };
    }
    let _ = fast;
    tile_portable::<R, C>(xs, ws, k)
}

/// The portable tile: eight partial sums per pair, which the compiler vectorises.
fn tile_portable<const R: usize, const C: usize>(
    xs: &[f32],
    ws: &[f32],
    k: usize,
) -> [[f32; C]; R] {
    let mut acc = [[[0f32; 8]; C]; R];
    let chunks = k / 8;
    for c in 0..chunks {
        let o = c * 8;
        for (ii, acc_row) in acc.iter_mut().enumerate() {
            let xv = &xs[ii * k + o..ii * k + o + 8];
            for (jj, a) in acc_row.iter_mut().enumerate() {
                let wv = &ws[jj * k + o..jj * k + o + 8];
                for l in 0..8 {
                    a[l] += xv[l] * wv[l];
                }
            }
        }
    }
    let mut out = [[0f32; C]; R];
    for ii in 0..R {
        for jj in 0..C {
            let mut s: f32 = acc[ii][jj].iter().sum();
            for p in chunks * 8..k {
                s += xs[ii * k + p] * ws[jj * k + p];
            }
            out[ii][jj] = s;
        }
    }
    out
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn tile_avx2<const R: usize, const C: usize>(
    xs: &[f32],
    ws: &[f32],
    k: usize,
) -> [[f32; C]; R] {
    use std::arch::x86_64::*;
    assert!(xs.len() >= R * k && ws.len() >= C * k);
    let mut acc = [[_mm256_setzero_ps(); C]; R];
    let chunks = k / 8;
    let (px, pw) = (xs.as_ptr(), ws.as_ptr());
    for c in 0..chunks {
        let o = c * 8;
        let mut wv = [_mm256_setzero_ps(); C];
        for (jj, v) in wv.iter_mut().enumerate() {
            // SAFETY: jj < C and o + 8 <= k, so the eight floats lie inside ws.
            *v = unsafe { _mm256_loadu_ps(pw.add(jj * k + o)) };
        }
        for (ii, acc_row) in acc.iter_mut().enumerate() {
            // SAFETY: ii < R and o + 8 <= k, so the eight floats lie inside xs.
            let xv = unsafe { _mm256_loadu_ps(px.add(ii * k + o)) };
            for (a, v) in acc_row.iter_mut().zip(&wv) {
                *a = _mm256_fmadd_ps(xv, *v, *a);
            }
        }
    }
    let mut out = [[0f32; C]; R];
    for ii in 0..R {
        for jj in 0..C {
            let v = acc[ii][jj];
            let quad = _mm_add_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps(v, 1));
            let pair = _mm_add_ps(quad, _mm_movehl_ps(quad, quad));
            let one = _mm_add_ss(pair, _mm_shuffle_ps(pair, pair, 1));
            let mut s = _mm_cvtss_f32(one);
            for p in chunks * 8..k {
                s += xs[ii * k + p] * ws[jj * k + p];
            }
            out[ii][jj] = s;
        }
    }
    out
}

/// `a . b` over the shorter of the two, with the vector path when the CPU has it.
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    if use_avx2() {
        dot_avx2(a, b)
    } else {
        dot_portable(a, b)
    }
}

/// `y += alpha * x` over the shorter of the two (the compiler vectorises it).
pub fn axpy(y: &mut [f32], alpha: f32, x: &[f32]) {
    y.iter_mut().zip(x).for_each(|(d, s)| *d += alpha * s);
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

/// `erf(x)` in f32 by a rational approximation on [-4, 4] (outside it erf is ±1 to within
/// 2e-8): a polynomial over a polynomial, no branches and no calls, so a loop over a slice
/// vectorises. Agrees with the libm erf within a few 1e-7.
#[inline]
pub fn erf_fast(x: f32) -> f32 {
    let x = x.clamp(-4.0, 4.0);
    let x2 = x * x;
    let mut p = -2.726_142_3e-10_f32;
    p = p.mul_add(x2, 2.770_681_4e-8);
    p = p.mul_add(x2, -2.101_024e-6);
    p = p.mul_add(x2, -5.692_506_4e-5);
    p = p.mul_add(x2, -7.349_906_3e-4);
    p = p.mul_add(x2, -2.954_600_1e-3);
    p = p.mul_add(x2, -1.609_603_3e-2);
    let mut q = -1.456_607_2e-5_f32;
    q = q.mul_add(x2, -2.133_740_6e-4);
    q = q.mul_add(x2, -1.682_827e-3);
    q = q.mul_add(x2, -7.373_329e-3);
    q = q.mul_add(x2, -1.426_474e-2);
    x * p / q
}

/// The exact (erf) GELU in place: `x <- x/2 (1 + erf(x / sqrt 2))`.
pub fn gelu_erf_in_place(xs: &mut [f32]) {
    if use_avx2() {
        gelu_erf_dispatch(xs);
    } else {
        gelu_erf_portable(xs);
    }
}

#[inline]
fn gelu_erf_portable(xs: &mut [f32]) {
    for x in xs.iter_mut() {
        *x = 0.5 * *x * (1.0 + erf_fast(*x * std::f32::consts::FRAC_1_SQRT_2));
    }
}

fn gelu_erf_dispatch(xs: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            gelu_erf_avx2(xs)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    gelu_erf_portable(xs)
}

/// The same loop compiled for AVX2+FMA, so the compiler vectorises it eight wide with fused
/// multiply-adds.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn gelu_erf_avx2(xs: &mut [f32]) {
    gelu_erf_portable(xs)
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

    /// `x [m, k] W [n, k]^T` by a plain loop in f64.
    fn reference_rows(x: &[f32], w: &[f32], m: usize, k: usize, n: usize) -> Vec<f32> {
        let mut out = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                out[i * n + j] = (0..k)
                    .map(|p| x[i * k + p] as f64 * w[j * k + p] as f64)
                    .sum::<f64>() as f32;
            }
        }
        out
    }

    fn paths() -> Vec<bool> {
        let mut p = vec![false];
        if use_avx2() {
            p.push(true);
        }
        p
    }

    #[test]
    fn blocked_rows_kernel_matches_a_plain_loop_for_every_row_count_and_remainder() {
        for fast in paths() {
            for m in 1..=16 {
                for &(k, n) in &[(1, 1), (7, 5), (8, 3), (33, 13), (64, 12), (301, 37)] {
                    let x = values(m * k, 11 + m as u32);
                    let w = values(n * k, 12 + k as u32);
                    let want = reference_rows(&x, &w, m, k, n);
                    // Written into a wider buffer: the stride is honoured, the padding untouched.
                    let stride = n + 3;
                    let mut out = vec![7.0; m * stride];
                    rows_into(&mut out, stride, &x, &w, m, k, n, false, fast);
                    let mut acc = vec![1.0; m * stride];
                    rows_into(&mut acc, stride, &x, &w, m, k, n, true, fast);
                    for i in 0..m {
                        for j in 0..n {
                            let (g, a, e) =
                                (out[i * stride + j], acc[i * stride + j], want[i * n + j]);
                            let tol = 1e-4 * (1.0 + e.abs()) * (k as f32).sqrt();
                            assert!(
                                (g - e).abs() < tol,
                                "fast={fast} m={m} k={k} n={n}: {g} vs {e}"
                            );
                            assert!((a - 1.0 - e).abs() < tol, "accumulate, fast={fast} m={m}");
                        }
                        for j in n..stride {
                            assert_eq!(out[i * stride + j], 7.0);
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn small_rows_kernel_splits_large_products_across_threads_correctly() {
        // Large enough for the parallel path, with a last column block narrower than the others.
        for m in [1, 3, 4, 9, 16] {
            let (k, n) = (301, 1037);
            let x = values(m * k, 21);
            let w = values(n * k, 22);
            let want = reference_rows(&x, &w, m, k, n);
            let mut got = vec![2.0; m * n];
            small_rows_matmul(&mut got, &x, &w, m, k, n, true);
            for (g, e) in got.iter().zip(&want) {
                assert!(
                    (g - 2.0 - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "m={m}: {g} vs {e}"
                );
            }
            small_rows_matmul(&mut got, &x, &w, m, k, n, false);
            for (g, e) in got.iter().zip(&want) {
                assert!((g - e).abs() < 1e-3 * (1.0 + e.abs()), "m={m}: {g} vs {e}");
            }
        }
    }

    #[test]
    fn dot_and_axpy_match_plain_loops() {
        for len in [0, 1, 7, 8, 31, 32, 33, 128, 301] {
            let a = values(len, 31);
            let b = values(len, 32);
            let want: f32 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
            assert!((dot(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
            assert!((dot_portable(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
            let mut y = values(len, 33);
            let start = y.clone();
            axpy(&mut y, 0.5, &a);
            for i in 0..len {
                assert!((y[i] - (start[i] + 0.5 * a[i])).abs() < 1e-6);
            }
        }
    }

    /// erf by its Taylor series (converges well for |x| <= 4 in f64), a reference independent of
    /// any libm.
    fn erf_reference(x: f64) -> f64 {
        let mut term = x;
        let mut sum = x;
        for n in 1..200 {
            term *= -x * x / n as f64;
            sum += term / (2 * n + 1) as f64;
        }
        sum * 2.0 / std::f64::consts::PI.sqrt()
    }

    /// erfc(x) for x >= 3.5 by its asymptotic series (accurate to ~1e-10 there).
    fn erfc_tail(x: f64) -> f64 {
        let t = 1.0 / (2.0 * x * x);
        let series = 1.0 - t + 3.0 * t * t - 15.0 * t * t * t + 105.0 * t.powi(4);
        (-x * x).exp() / (x * std::f64::consts::PI.sqrt()) * series
    }

    /// The series loses digits to cancellation past 3.5, where the tail takes over.
    fn erf_any(x: f64) -> f64 {
        if x.abs() > 3.5 {
            x.signum() * (1.0 - erfc_tail(x.abs()))
        } else {
            erf_reference(x)
        }
    }

    #[test]
    fn fast_erf_and_gelu_agree_with_the_series_on_both_paths() {
        let mut worst = 0f64;
        for i in -6000..=6000 {
            let x = i as f64 / 1000.0;
            let want = erf_any(x);
            worst = worst.max((erf_fast(x as f32) as f64 - want).abs());
        }
        assert!(worst < 1e-6, "erf off by {worst}");
        // Odd lengths, so the vector loop's remainder runs too.
        let xs: Vec<f32> = (0..1003).map(|i| (i as f32 - 501.0) / 60.0).collect();
        let mut a = xs.clone();
        let mut b = xs.clone();
        gelu_erf_portable(&mut a);
        gelu_erf_in_place(&mut b);
        for ((x, a), b) in xs.iter().zip(&a).zip(&b) {
            let x64 = *x as f64;
            let want = 0.5 * x64 * (1.0 + erf_any(x64 / 2f64.sqrt()));
            assert!(
                (*a as f64 - want).abs() < 1e-5 * (1.0 + want.abs()),
                "gelu({x})"
            );
            assert!((a - b).abs() < 1e-6, "paths differ at {x}");
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
