//! The vector pieces around the projection kernel, on plain slices: dot and axpy (the decoder's
//! attention), softmax rows, the exact GELU, and the residual add with its layer norm. Each has a
//! portable body and an AVX2+FMA one (the layer norm and the GELU also an AVX-512F one), chosen
//! by [`crate::dispatch`]. `attend.rs`: one encoder attention head.

mod attend;
#[cfg(target_arch = "x86_64")]
mod attend_tiles;
#[cfg(test)]
mod tests;

pub use attend::{AttendScratch, Head, attend_head, attend_head_rounded};

use crate::dispatch::active;

fn use_avx2() -> bool {
    active().avx2()
}

/// Whether the active path has AVX-512F (the layer norm and the GELU then run sixteen wide).
fn use_avx512() -> bool {
    active() >= crate::Path::Avx512
}
use crate::threads::rayon_threads;

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

/// `ln 2` split in two for [`exp_fast`] and the vector softmax bodies: `LN2_HI` has its low
/// bits clear, so `n LN2_HI` is exact for the `n` that occur.
const LN2_HI: f32 = 0.693_145_75;
const LN2_LO: f32 = 1.428_606_8e-6;
/// The Taylor coefficients of `e^r` after the leading `1/720`, highest degree first, as
/// [`exp_fast`] applies them; the vector softmax bodies apply the same list.
const EXP_TAYLOR: [f32; 6] = [1.0 / 120.0, 1.0 / 24.0, 1.0 / 6.0, 0.5, 1.0, 1.0];

/// `e^x` in f32 without a call or a branch, so a loop over a slice vectorises: `x = n ln 2 + r`
/// with `|r| <= ln 2 / 2`, a degree-6 Taylor polynomial for `e^r` (truncation below 2e-7
/// relative), and `2^n` built in the exponent bits. Inputs are clamped to [-87, 88], where f32
/// stays normal, so a masked score of -1e9 gives 1.6e-38 rather than 0.
#[inline]
pub fn exp_fast(x: f32) -> f32 {
    let x = x.clamp(-87.0, 88.0);
    let n = (x * std::f32::consts::LOG2_E + 0.5).floor();
    let r = (-n).mul_add(LN2_LO, (-n).mul_add(LN2_HI, x));
    let mut p = 1.0 / 720.0f32;
    for c in EXP_TAYLOR {
        p = p.mul_add(r, c);
    }
    p * f32::from_bits((((n as i32) + 127) as u32) << 23)
}

/// Each row of `scores` (rows `width` long) becomes `softmax(scale * row + bias)`, in place.
pub fn softmax_rows_in_place(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    if use_avx2() {
        softmax_dispatch(scores, width, scale, bias);
    } else {
        softmax_portable(scores, width, scale, bias);
    }
}

#[inline]
fn softmax_portable(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    assert!(bias.len() >= width, "bias shorter than a row");
    for row in scores.chunks_mut(width.max(1)) {
        let mut max = f32::NEG_INFINITY;
        for (s, &b) in row.iter_mut().zip(bias) {
            *s = s.mul_add(scale, b);
            max = max.max(*s);
        }
        let mut sum = 0f32;
        for s in row.iter_mut() {
            *s = exp_fast(*s - max);
            sum += *s;
        }
        let inv = 1.0 / sum;
        row.iter_mut().for_each(|s| *s *= inv);
    }
}

fn softmax_dispatch(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    {
        #[allow(unsafe_code)]
        if use_avx512() {
            // SAFETY: the active path has AVX-512F, so this CPU does.
            unsafe { softmax_avx512(scores, width, scale, bias) }
        } else {
            // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
            unsafe { softmax_avx2(scores, width, scale, bias) }
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    softmax_portable(scores, width, scale, bias)
}

/// The softmax rows eight lanes at a time: the same steps as [`exp_fast`] in AVX2+FMA
/// intrinsics (the scalar code's clamp, floor and conversion keep the compiler from vectorising
/// it), with the remainder of a row on the scalar path.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn softmax_avx2(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    use std::arch::x86_64::*;
    assert!(bias.len() >= width, "bias shorter than a row");
    let exp8 = |x: __m256| -> __m256 {
        let x = _mm256_min_ps(
            _mm256_max_ps(x, _mm256_set1_ps(-87.0)),
            _mm256_set1_ps(88.0),
        );
        let n = _mm256_floor_ps(_mm256_fmadd_ps(
            x,
            _mm256_set1_ps(std::f32::consts::LOG2_E),
            _mm256_set1_ps(0.5),
        ));
        let r = _mm256_fnmadd_ps(n, _mm256_set1_ps(LN2_HI), x);
        let r = _mm256_fnmadd_ps(n, _mm256_set1_ps(LN2_LO), r);
        let mut p = _mm256_set1_ps(1.0 / 720.0);
        for c in EXP_TAYLOR {
            p = _mm256_fmadd_ps(p, r, _mm256_set1_ps(c));
        }
        let bits = _mm256_slli_epi32::<23>(_mm256_add_epi32(
            _mm256_cvtps_epi32(n),
            _mm256_set1_epi32(127),
        ));
        _mm256_mul_ps(p, _mm256_castsi256_ps(bits))
    };
    let sum8 = |v: __m256| -> f32 {
        let quad = _mm_add_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps::<1>(v));
        let pair = _mm_add_ps(quad, _mm_movehl_ps(quad, quad));
        _mm_cvtss_f32(_mm_add_ss(pair, _mm_shuffle_ps::<1>(pair, pair)))
    };
    let max8 = |v: __m256| -> f32 {
        let quad = _mm_max_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps::<1>(v));
        let pair = _mm_max_ps(quad, _mm_movehl_ps(quad, quad));
        _mm_cvtss_f32(_mm_max_ss(pair, _mm_shuffle_ps::<1>(pair, pair)))
    };
    let sc = _mm256_set1_ps(scale);
    for row in scores.chunks_mut(width.max(1)) {
        // A short last row (scores not a whole number of rows) is handled like any other.
        let vec_end = row.len() / 8 * 8;
        let (pr, pb) = (row.as_mut_ptr(), bias.as_ptr());
        let mut vmax = _mm256_set1_ps(f32::NEG_INFINITY);
        let mut j = 0;
        while j < vec_end {
            // SAFETY: j + 8 <= row.len() <= width <= bias.len().
            unsafe {
                let v = _mm256_fmadd_ps(_mm256_loadu_ps(pr.add(j)), sc, _mm256_loadu_ps(pb.add(j)));
                _mm256_storeu_ps(pr.add(j), v);
                vmax = _mm256_max_ps(vmax, v);
            }
            j += 8;
        }
        let mut max = max8(vmax);
        for jj in vec_end..row.len() {
            row[jj] = row[jj].mul_add(scale, bias[jj]);
            max = max.max(row[jj]);
        }
        let vm = _mm256_set1_ps(max);
        let mut vsum = _mm256_setzero_ps();
        let mut j = 0;
        while j < vec_end {
            // SAFETY: as above.
            unsafe {
                let e = exp8(_mm256_sub_ps(_mm256_loadu_ps(pr.add(j)), vm));
                _mm256_storeu_ps(pr.add(j), e);
                vsum = _mm256_add_ps(vsum, e);
            }
            j += 8;
        }
        let mut sum = sum8(vsum);
        for v in row[vec_end..].iter_mut() {
            *v = exp_fast(*v - max);
            sum += *v;
        }
        let inv = _mm256_set1_ps(1.0 / sum);
        let mut j = 0;
        while j < vec_end {
            // SAFETY: as above.
            unsafe { _mm256_storeu_ps(pr.add(j), _mm256_mul_ps(_mm256_loadu_ps(pr.add(j)), inv)) };
            j += 8;
        }
        let inv = 1.0 / sum;
        row[vec_end..].iter_mut().for_each(|v| *v *= inv);
    }
}

/// The softmax rows sixteen lanes at a time, the same steps as [`softmax_avx2`] (and
/// [`exp_fast`]); a row's last values go through a masked vector. The sums and the maximum
/// reduce sixteen lanes instead of eight, so a row's sum may differ from the AVX2 one in its
/// last bit. On a bf16 MiniLM batch the AVX2 softmax took 4.6% of the time.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx512f")]
unsafe fn softmax_avx512(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    use std::arch::x86_64::*;
    assert!(bias.len() >= width, "bias shorter than a row");
    let exp16 = |x: __m512| -> __m512 {
        let x = _mm512_min_ps(
            _mm512_max_ps(x, _mm512_set1_ps(-87.0)),
            _mm512_set1_ps(88.0),
        );
        // Rounded toward minus infinity, exceptions suppressed: floor.
        let n = _mm512_roundscale_ps::<0x09>(_mm512_fmadd_ps(
            x,
            _mm512_set1_ps(std::f32::consts::LOG2_E),
            _mm512_set1_ps(0.5),
        ));
        let r = _mm512_fnmadd_ps(n, _mm512_set1_ps(LN2_HI), x);
        let r = _mm512_fnmadd_ps(n, _mm512_set1_ps(LN2_LO), r);
        let mut p = _mm512_set1_ps(1.0 / 720.0);
        for c in EXP_TAYLOR {
            p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(c));
        }
        let bits = _mm512_slli_epi32::<23>(_mm512_add_epi32(
            _mm512_cvtps_epi32(n),
            _mm512_set1_epi32(127),
        ));
        _mm512_mul_ps(p, _mm512_castsi512_ps(bits))
    };
    let sc = _mm512_set1_ps(scale);
    for row in scores.chunks_mut(width.max(1)) {
        // A short last row (scores not a whole number of rows) is handled like any other.
        let len = row.len();
        let (pr, pb) = (row.as_mut_ptr(), bias.as_ptr());
        let mask = |j: usize| -> __mmask16 {
            let left = len - j;
            if left >= 16 { !0 } else { (1u16 << left) - 1 }
        };
        let mut vmax = _mm512_set1_ps(f32::NEG_INFINITY);
        let mut j = 0;
        while j < len {
            let m = mask(j);
            // SAFETY: the lanes of `m` are values j.. < len <= width <= bias.len().
            unsafe {
                let v = _mm512_fmadd_ps(
                    _mm512_maskz_loadu_ps(m, pr.add(j)),
                    sc,
                    _mm512_maskz_loadu_ps(m, pb.add(j)),
                );
                _mm512_mask_storeu_ps(pr.add(j), m, v);
                vmax = _mm512_mask_max_ps(vmax, m, vmax, v);
            }
            j += 16;
        }
        let vm = _mm512_set1_ps(_mm512_reduce_max_ps(vmax));
        let mut vsum = _mm512_setzero_ps();
        let mut j = 0;
        while j < len {
            let m = mask(j);
            // SAFETY: as above.
            unsafe {
                let e = exp16(_mm512_sub_ps(_mm512_maskz_loadu_ps(m, pr.add(j)), vm));
                _mm512_mask_storeu_ps(pr.add(j), m, e);
                vsum = _mm512_mask_add_ps(vsum, m, vsum, e);
            }
            j += 16;
        }
        let inv = _mm512_set1_ps(1.0 / _mm512_reduce_add_ps(vsum));
        let mut j = 0;
        while j < len {
            let m = mask(j);
            // SAFETY: as above.
            unsafe {
                let v = _mm512_maskz_loadu_ps(m, pr.add(j));
                _mm512_mask_storeu_ps(pr.add(j), m, _mm512_mul_ps(v, inv));
            }
            j += 16;
        }
    }
}

/// Asks for every cache line of `xs` to be brought into L2 (a hint: nothing is read into
/// registers, nothing waits). For a block about to be read in a pattern the hardware
/// prefetchers do not follow: an attention head reads two lines of each of its sequence's rows,
/// a row apart, and on a bf16 MiniLM batch most of a head's time went to waiting for them.
pub fn prefetch_to_l2(xs: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    for line in xs.chunks(16) {
        // SAFETY: a prefetch of an address inside the slice; it reads nothing architecturally.
        #[allow(unsafe_code)]
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T1 }>(
                line.as_ptr().cast(),
            )
        };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = xs;
}

/// `x <- LayerNorm(x + residual)` row by row in place (rows `gamma.len()` long): mean and
/// variance over the row, then `(v - mean) / sqrt(var + eps) * gamma + beta`. The residual add,
/// the statistics and the scaling run on the row while it is in L1; rows go across the rayon
/// pool when there are many.
pub fn add_layer_norm_in_place(
    x: &mut [f32],
    residual: &[f32],
    gamma: &[f32],
    beta: &[f32],
    eps: f32,
) {
    use rayon::prelude::*;
    let width = gamma.len();
    assert!(
        width > 0
            && beta.len() == width
            && residual.len() == x.len()
            && x.len().is_multiple_of(width),
        "layer norm shapes disagree"
    );
    let fast = use_avx2();
    let rows = |xs: &mut [f32], rs: &[f32]| {
        if fast {
            norm_rows_dispatch(xs, rs, gamma, beta, eps);
        } else {
            norm_rows(xs, rs, gamma, beta, eps);
        }
    };
    if x.len() < 1 << 16 || rayon_threads() <= 1 {
        rows(x, residual);
    } else {
        let per = 64 * width;
        x.par_chunks_mut(per)
            .zip(residual.par_chunks(per))
            .for_each(|(xs, rs)| rows(xs, rs));
    }
}

#[inline(always)]
fn norm_rows(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    norm_rows_lanes::<8>(x, residual, gamma, beta, eps)
}

/// The layer norm rows with `L` partial sums, so the loops vectorise `L` wide without
/// reordering one sum.
#[inline(always)]
fn norm_rows_lanes<const L: usize>(
    x: &mut [f32],
    residual: &[f32],
    gamma: &[f32],
    beta: &[f32],
    eps: f32,
) {
    let width = gamma.len();
    for (row, res) in x.chunks_mut(width).zip(residual.chunks(width)) {
        let mut acc = [0f32; L];
        let (whole, rest) = row.split_at_mut(width / L * L);
        let (res_whole, res_rest) = res.split_at(width / L * L);
        for (vs, rs) in whole.chunks_exact_mut(L).zip(res_whole.chunks_exact(L)) {
            for l in 0..L {
                vs[l] += rs[l];
                acc[l] += vs[l];
            }
        }
        for (l, (v, r)) in rest.iter_mut().zip(res_rest).enumerate() {
            *v += r;
            acc[l] += *v;
        }
        let mean = acc.iter().sum::<f32>() / width as f32;
        let mut sq = [0f32; L];
        for vs in row.chunks(L) {
            for (l, v) in vs.iter().enumerate() {
                let d = v - mean;
                sq[l] += d * d;
            }
        }
        let inv = 1.0 / (sq.iter().sum::<f32>() / width as f32 + eps).sqrt();
        for ((v, g), b) in row.iter_mut().zip(gamma).zip(beta) {
            *v = (*v - mean) * inv * g + b;
        }
    }
}

fn norm_rows_dispatch(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        if use_avx512() {
            // SAFETY: the active path has AVX-512F, so this CPU does.
            unsafe { norm_rows_avx512(x, residual, gamma, beta, eps) }
        } else {
            // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
            unsafe { norm_rows_avx2(x, residual, gamma, beta, eps) }
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    norm_rows(x, residual, gamma, beta, eps)
}

/// The same loops compiled for AVX2+FMA.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn norm_rows_avx2(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    norm_rows(x, residual, gamma, beta, eps)
}

/// The same three passes over each row in AVX-512F registers: the residual added and the sum
/// taken in four partial sums, the squared deviations in four more, then the scaling as one
/// fused multiply-add per 16 values (`(v - mean) * (inv gamma) + beta`). The last values of a
/// row that is not a multiple of 16 go through masked loads and stores. Written out rather than
/// left to the compiler, which kept the generic loops at about two cycles per value: 7% of a
/// bf16 MiniLM batch (`perf`, 2-vCPU Xeon).
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn norm_rows_avx512(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    use std::arch::x86_64::*;
    let width = gamma.len();
    let whole = width / 16;
    let rest = width % 16;
    let last: __mmask16 = ((1u32 << rest) - 1) as u16;
    let (pg, pb) = (gamma.as_ptr(), beta.as_ptr());
    let zero = _mm512_setzero_ps();
    for (row, res) in x.chunks_exact_mut(width).zip(residual.chunks_exact(width)) {
        let (pr, pq) = (row.as_mut_ptr(), res.as_ptr());
        // SAFETY: every access below is at j * 16 + lane < width (whole vectors for j < whole,
        // masked lanes below `rest` for the last), in this row, its residual row, gamma and
        // beta, each `width` long.
        unsafe {
            let mut s = [zero; 4];
            for j in 0..whole {
                let at = j * 16;
                let v = _mm512_add_ps(_mm512_loadu_ps(pr.add(at)), _mm512_loadu_ps(pq.add(at)));
                _mm512_storeu_ps(pr.add(at), v);
                s[j % 4] = _mm512_add_ps(s[j % 4], v);
            }
            if rest > 0 {
                let at = whole * 16;
                let v = _mm512_add_ps(
                    _mm512_maskz_loadu_ps(last, pr.add(at)),
                    _mm512_maskz_loadu_ps(last, pq.add(at)),
                );
                _mm512_mask_storeu_ps(pr.add(at), last, v);
                s[3] = _mm512_add_ps(s[3], v);
            }
            let sum = _mm512_add_ps(_mm512_add_ps(s[0], s[1]), _mm512_add_ps(s[2], s[3]));
            let mean = _mm512_reduce_add_ps(sum) / width as f32;
            let vm = _mm512_set1_ps(mean);
            let mut q = [zero; 4];
            for j in 0..whole {
                let d = _mm512_sub_ps(_mm512_loadu_ps(pr.add(j * 16)), vm);
                q[j % 4] = _mm512_fmadd_ps(d, d, q[j % 4]);
            }
            if rest > 0 {
                let d =
                    _mm512_maskz_sub_ps(last, _mm512_maskz_loadu_ps(last, pr.add(whole * 16)), vm);
                q[3] = _mm512_fmadd_ps(d, d, q[3]);
            }
            let sq = _mm512_add_ps(_mm512_add_ps(q[0], q[1]), _mm512_add_ps(q[2], q[3]));
            let inv = 1.0 / (_mm512_reduce_add_ps(sq) / width as f32 + eps).sqrt();
            let vi = _mm512_set1_ps(inv);
            for j in 0..whole {
                let at = j * 16;
                let g = _mm512_mul_ps(_mm512_loadu_ps(pg.add(at)), vi);
                let d = _mm512_sub_ps(_mm512_loadu_ps(pr.add(at)), vm);
                _mm512_storeu_ps(
                    pr.add(at),
                    _mm512_fmadd_ps(d, g, _mm512_loadu_ps(pb.add(at))),
                );
            }
            if rest > 0 {
                let at = whole * 16;
                let g = _mm512_mul_ps(_mm512_maskz_loadu_ps(last, pg.add(at)), vi);
                let d = _mm512_sub_ps(_mm512_maskz_loadu_ps(last, pr.add(at)), vm);
                let b = _mm512_maskz_loadu_ps(last, pb.add(at));
                _mm512_mask_storeu_ps(pr.add(at), last, _mm512_fmadd_ps(d, g, b));
            }
        }
    }
}

/// The exact (erf) GELU in place: `x <- x/2 (1 + erf(x / sqrt 2))`.
pub fn gelu_erf_in_place(xs: &mut [f32]) {
    use rayon::prelude::*;
    let fast = use_avx2();
    let run = |xs: &mut [f32]| {
        if fast {
            gelu_erf_dispatch(xs);
        } else {
            gelu_erf_portable(xs);
        }
    };
    // A batch's activations (millions of values) are split across the pool: on one thread
    // they would leave the others idle for a few milliseconds per layer.
    if xs.len() < 1 << 16 || rayon_threads() <= 1 {
        run(xs);
    } else {
        xs.par_chunks_mut(1 << 14).for_each(run);
    }
}

#[inline(always)]
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
        if use_avx512() {
            // SAFETY: the active path has AVX-512F, so this CPU does.
            unsafe { gelu_erf_avx512(xs) }
        } else {
            // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
            unsafe { gelu_erf_avx2(xs) }
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

/// The same polynomials sixteen wide in AVX-512F registers, with the division of
/// [`erf_fast`] as a reciprocal estimate (14 bits) and one Newton step (about 28 bits), so
/// within a unit in the last place of the portable loop's quotient. The compiled portable loop
/// spent most of its time in the division: about one cycle per value, 6% of a bf16 MiniLM
/// batch (`perf`, 2-vCPU Xeon).
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn gelu_erf_avx512(xs: &mut [f32]) {
    use std::arch::x86_64::*;
    const P: [f32; 7] = [
        -2.726_142_3e-10,
        2.770_681_4e-8,
        -2.101_024e-6,
        -5.692_506_4e-5,
        -7.349_906_3e-4,
        -2.954_600_1e-3,
        -1.609_603_3e-2,
    ];
    const Q: [f32; 5] = [
        -1.456_607_2e-5,
        -2.133_740_6e-4,
        -1.682_827e-3,
        -7.373_329e-3,
        -1.426_474e-2,
    ];
    let gelu = |x: __m512| -> __m512 {
        let u = _mm512_mul_ps(x, _mm512_set1_ps(std::f32::consts::FRAC_1_SQRT_2));
        let u = _mm512_min_ps(_mm512_max_ps(u, _mm512_set1_ps(-4.0)), _mm512_set1_ps(4.0));
        let u2 = _mm512_mul_ps(u, u);
        let mut p = _mm512_set1_ps(P[0]);
        for c in &P[1..] {
            p = _mm512_fmadd_ps(p, u2, _mm512_set1_ps(*c));
        }
        let mut q = _mm512_set1_ps(Q[0]);
        for c in &Q[1..] {
            q = _mm512_fmadd_ps(q, u2, _mm512_set1_ps(*c));
        }
        let r = _mm512_rcp14_ps(q);
        let r = _mm512_mul_ps(r, _mm512_fnmadd_ps(q, r, _mm512_set1_ps(2.0)));
        let erf = _mm512_mul_ps(_mm512_mul_ps(u, p), r);
        let half = _mm512_mul_ps(x, _mm512_set1_ps(0.5));
        _mm512_fmadd_ps(half, erf, half)
    };
    let n = xs.len();
    let p = xs.as_mut_ptr();
    let mut j = 0;
    while j < n {
        let left = n - j;
        let m: __mmask16 = if left >= 16 { !0 } else { (1u16 << left) - 1 };
        // SAFETY: the lanes of `m` are values j.. < n of `xs`.
        unsafe {
            let v = gelu(_mm512_maskz_loadu_ps(m, p.add(j)));
            _mm512_mask_storeu_ps(p.add(j), m, v);
        }
        j += 16;
    }
}
