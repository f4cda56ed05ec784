//! Rounding input rows to int8 groups with AVX-512 (the rule of
//! `pack::rows::quantise_group_int8`, which the tests hold this to bit for bit): per group of
//! 32, the largest magnitude, one division per value (`vdivps`, as exact as the scalar one),
//! rounding half to even (`vcvtps2dq` under the default rounding mode), and the quads' byte
//! order by one shuffle.

use std::arch::x86_64::*;

use crate::pack::rows::INPUT_GROUP;

/// Row `ii` of a tile of `r` rows (`k` inputs, `row.len() == k`) into the tile's quads, scales
/// and sums (the layout of `micro::Quads`).
///
/// # Safety
/// The CPU has AVX-512F, AVX-512BW and AVX2; the slices hold the tile's groups.
#[target_feature(enable = "avx512bw,avx512f,avx2")]
pub(crate) unsafe fn quantise_row(
    row: &[f32],
    r: usize,
    ii: usize,
    quads: &mut [u32],
    scales: &mut [f32],
    sums: &mut [i32],
) {
    let per = INPUT_GROUP / 4;
    // Within each four bytes: inputs 0, 2, 1, 3.
    let order = _mm256_setr_epi8(
        0, 2, 1, 3, 4, 6, 5, 7, 8, 10, 9, 11, 12, 14, 13, 15, 0, 2, 1, 3, 4, 6, 5, 7, 8, 10, 9, 11,
        12, 14, 13, 15,
    );
    for (g, chunk) in row.chunks(INPUT_GROUP).enumerate() {
        let n = chunk.len();
        let mask = |from: usize| -> __mmask16 {
            let m = n.saturating_sub(from).min(16);
            if m == 16 { 0xffff } else { (1u16 << m) - 1 }
        };
        let p = chunk.as_ptr();
        // SAFETY: masked lanes are not read; the others are in `chunk`.
        let (a, b) = unsafe {
            (
                _mm512_maskz_loadu_ps(mask(0), p),
                _mm512_maskz_loadu_ps(mask(16), p.wrapping_add(16)),
            )
        };
        // NaN where any value is not finite (v - v), zero otherwise.
        let bad = _mm512_reduce_add_ps(_mm512_add_ps(_mm512_sub_ps(a, a), _mm512_sub_ps(b, b)));
        let amax = _mm512_reduce_max_ps(_mm512_max_ps(_mm512_abs_ps(a), _mm512_abs_ps(b)));
        let (s, sum, bytes) = if bad.is_nan() {
            (f32::NAN, 0, _mm256_setzero_si256())
        } else if amax == 0.0 {
            (0.0, 0, _mm256_setzero_si256())
        } else {
            let s = amax / 127.0;
            let vs = _mm512_set1_ps(s);
            let clamp = |v: __m512| {
                let q = _mm512_cvtps_epi32(_mm512_div_ps(v, vs));
                _mm512_max_epi32(
                    _mm512_min_epi32(q, _mm512_set1_epi32(127)),
                    _mm512_set1_epi32(-127),
                )
            };
            let (qa, qb) = (clamp(a), clamp(b));
            let sum = _mm512_reduce_add_epi32(_mm512_add_epi32(qa, qb));
            let bytes = _mm256_set_m128i(_mm512_cvtepi32_epi8(qb), _mm512_cvtepi32_epi8(qa));
            (s, sum, _mm256_shuffle_epi8(bytes, order))
        };
        scales[g * r + ii] = s;
        sums[g * r + ii] = sum;
        let mut words = [0u32; INPUT_GROUP / 4];
        // SAFETY: 32 bytes into 32 bytes.
        unsafe { _mm256_storeu_si256(words.as_mut_ptr().cast(), bytes) };
        for (u, w) in words.iter().enumerate() {
            quads[(g * per + u) * r + ii] = *w;
        }
    }
}
