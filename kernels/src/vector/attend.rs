//! One head of scaled dot-product attention over one sequence: `out = softmax(scale Q K^T +
//! bias) V`, for the encoders (every query sees every key; padding is masked through the bias).
//!
//! A head of an encoder is small (MiniLM: 64 tokens by 32 features), so the products are too
//! small for the projection kernel's packing and blocking to pay. Where the active path has
//! AVX-512F, the head runs on its own loops instead: the keys are transposed once into a
//! zero-padded `[dh, t]` block, four query rows at a time get their scores in registers
//! (16 lanes of keys per vector, `dh` fused multiply-adds each), the softmax runs on those four
//! rows while they are in L1 (the same [`softmax_rows_in_place`] as everywhere), and the four
//! output rows sum the value rows weighted by their probabilities, again in registers, written
//! straight into the head's columns of the output. On a bf16 MiniLM batch (`perf record`, the
//! AMX Xeon) attention through the projection kernel took about 13% of the time, the packing of
//! keys and values alone 2%.
//!
//! Elsewhere the head runs as before: keys and (transposed) values packed as weights for the
//! projection kernel, scores and context through it. Both sum each dot product in input order
//! with fused multiply-adds, and the tests hold both to a plain f64 loop.

use super::{softmax_rows_in_place, use_avx512};
use crate::PackedWeight;
use crate::matmul::packed_matmul_strided;

/// One attention head over a sequence of `t` tokens: rows `i` of `q`, `k` and `v` start at
/// `i * ld` and hold the head's `dh` features.
#[derive(Clone, Copy)]
pub struct Head<'a> {
    pub q: &'a [f32],
    pub k: &'a [f32],
    pub v: &'a [f32],
    pub ld: usize,
    pub t: usize,
    pub dh: usize,
    /// The scores' scale (`1 / sqrt(dh)` in the common attention).
    pub scale: f32,
    /// `[t]`: added to every query's score of that key (0 for a real token, a large negative
    /// number for padding).
    pub key_bias: &'a [f32],
    /// `[t, t]`: a bias per query and key (a relative position bias), added to `key_bias`.
    pub positions: Option<&'a [f32]>,
}

/// Buffers one head reuses from call to call (one per thread of work).
#[derive(Default)]
pub struct AttendScratch {
    scores: Vec<f32>,
    row_bias: Vec<f32>,
    keys_t: Vec<f32>,
    keys: Option<PackedWeight>,
    values: Option<PackedWeight>,
    #[cfg(target_arch = "x86_64")]
    tiles: super::attend_tiles::TileScratch,
}

/// `softmax(scale Q K^T + bias) V` for one head: row `i` of the result goes to
/// `out[i * ldo..]` (`dh` values); nothing else of `out` is written.
///
/// # Panics
/// When a slice is shorter than its rows need, or a bias does not cover `t` keys.
pub fn attend_head(head: &Head<'_>, out: &mut [f32], ldo: usize, scratch: &mut AttendScratch) {
    attend_head_with(use_avx512(), head, out, ldo, scratch);
}

/// [`attend_head`] for a model whose weights are bf16. Where the active path is `amx`, on the
/// tile unit: the queries, keys, values and probabilities are rounded to bf16 (as the bf16
/// projections round their inputs) and the scores and context summed in f32 (see
/// `attend_tiles`). Elsewhere exactly [`attend_head`].
pub fn attend_head_rounded(
    head: &Head<'_>,
    out: &mut [f32],
    ldo: usize,
    scratch: &mut AttendScratch,
) {
    #[cfg(target_arch = "x86_64")]
    if crate::dispatch::active() == crate::Path::Amx {
        attend_head_on_tiles(head, out, ldo, scratch);
        return;
    }
    attend_head(head, out, ldo, scratch);
}

/// [`attend_head_rounded`] on the tile unit, whatever the active path.
///
/// # Panics
/// Where the tile unit is not granted to this process, and as [`attend_head`].
#[cfg(target_arch = "x86_64")]
pub(crate) fn attend_head_on_tiles(
    head: &Head<'_>,
    out: &mut [f32],
    ldo: usize,
    scratch: &mut AttendScratch,
) {
    assert!(
        crate::matmul::amx::tiles_granted(),
        "the tile unit is not available to this process"
    );
    if !checked(head, out, ldo) {
        return;
    }
    // SAFETY: the tiles are granted (asserted above), which needs AMX-BF16, so the CPU has
    // AVX-512-BF16 too (the path's feature list); the slices were checked against the head.
    #[allow(unsafe_code)]
    unsafe {
        super::attend_tiles::head(head, out, ldo, &mut scratch.tiles)
    };
}

/// The slices checked against the head's sizes; `false` when it is empty (nothing to do).
///
/// # Panics
/// When a slice is shorter than its rows need, or a bias does not cover `t` keys.
fn checked(head: &Head<'_>, out: &[f32], ldo: usize) -> bool {
    let Head {
        q, k, v, ld, t, dh, ..
    } = *head;
    if t == 0 || dh == 0 {
        return false;
    }
    let rows = (t - 1) * ld + dh;
    assert!(
        ld >= dh && ldo >= dh && q.len() >= rows && k.len() >= rows && v.len() >= rows,
        "attention rows do not fit their slices"
    );
    assert!(
        out.len() >= (t - 1) * ldo + dh,
        "attention output does not fit its slice"
    );
    assert!(
        head.key_bias.len() >= t && head.positions.is_none_or(|p| p.len() >= t * t),
        "attention bias shorter than the sequence"
    );
    true
}

/// [`attend_head`] on the AVX-512 loops (`vector`, which the CPU must have) or through the
/// projection kernel.
pub(crate) fn attend_head_with(
    vector: bool,
    head: &Head<'_>,
    out: &mut [f32],
    ldo: usize,
    scratch: &mut AttendScratch,
) {
    if !checked(head, out, ldo) {
        return;
    }
    #[cfg(target_arch = "x86_64")]
    if vector {
        assert!(
            std::arch::is_x86_feature_detected!("avx512f"),
            "the AVX-512 attention loops need AVX-512F"
        );
        // SAFETY: AVX-512F is present (asserted above); the slices were checked against `t`,
        // `dh`, `ld` and `ldo` just above.
        #[allow(unsafe_code)]
        unsafe {
            avx512::head(head, out, ldo, scratch)
        };
        return;
    }
    let _ = vector;
    through_kernel(head, out, ldo, scratch);
}

/// The scores of query row `i` (`row`, `t` values) become probabilities: scale, bias, softmax.
pub(super) fn softmax_row(row: &mut [f32], i: usize, head: &Head<'_>, row_bias: &mut Vec<f32>) {
    let t = row.len();
    match head.positions {
        None => softmax_rows_in_place(row, t, head.scale, &head.key_bias[..t]),
        Some(p) => {
            row_bias.clear();
            row_bias.extend(
                p[i * t..(i + 1) * t]
                    .iter()
                    .zip(head.key_bias)
                    .map(|(p, k)| p + k),
            );
            softmax_rows_in_place(row, t, head.scale, row_bias);
        }
    }
}

/// The head through the projection kernel: keys as a `[t, dh]` weight, values transposed as a
/// `[dh, t]` weight.
fn through_kernel(head: &Head<'_>, out: &mut [f32], ldo: usize, scratch: &mut AttendScratch) {
    let Head {
        q, k, v, ld, t, dh, ..
    } = *head;
    let keys = scratch.keys.get_or_insert_with(PackedWeight::empty);
    keys.repack_strided(k, t, dh, ld, 1);
    let values = scratch.values.get_or_insert_with(PackedWeight::empty);
    values.repack_strided(v, dh, t, 1, ld);
    scratch.scores.resize(t * t, 0.0);
    packed_matmul_strided(&mut scratch.scores, t, q, ld, t, keys, false);
    for (i, row) in scratch.scores.chunks_mut(t).enumerate() {
        softmax_row(row, i, head, &mut scratch.row_bias);
    }
    packed_matmul_strided(out, ldo, &scratch.scores, t, t, values, false);
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
mod avx512 {
    use super::{AttendScratch, Head, softmax_row};
    use std::arch::x86_64::*;

    /// Query rows per block.
    const ROWS: usize = 4;
    /// Vectors of 16 columns (keys for the scores, features for the context) per row of a
    /// register block.
    const WIDE: usize = 4;

    /// See [`super::attend_head`].
    ///
    /// # Safety
    /// AVX-512F present; the slices hold the rows `t`, `dh`, `ld` and `ldo` describe and the
    /// bias covers `t` keys (checked by the caller).
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn head(
        head: &Head<'_>,
        out: &mut [f32],
        ldo: usize,
        scratch: &mut AttendScratch,
    ) {
        let Head {
            q, k, v, ld, t, dh, ..
        } = *head;
        // The keys transposed, `[dh, tp]`, zeros past `t` so that every score vector is whole.
        let tp = t.div_ceil(16) * 16;
        let kt = &mut scratch.keys_t;
        kt.resize(dh * tp, 0.0);
        // SAFETY: `k` holds t rows of dh, ld apart (the caller's contract); `kt` dh x tp.
        unsafe { transpose_keys(k, ld, t, dh, kt, tp) };
        scratch.scores.clear();
        scratch.scores.resize(ROWS * tp, 0.0);
        let mut i0 = 0;
        while i0 < t {
            let r = ROWS.min(t - i0);
            let qb = &q[i0 * ld..];
            // Scores: query rows times the transposed keys, all tp columns.
            // SAFETY (both calls): the query rows i0..i0 + r exist (`q` holds t rows of dh,
            // `ld` apart), `kt` holds dh x tp, `scores` ROWS x tp.
            unsafe {
                if r == ROWS {
                    product::<ROWS>(qb, ld, kt, tp, dh, tp, &mut scratch.scores, tp);
                } else {
                    for ii in 0..r {
                        let row = &mut scratch.scores[ii * tp..];
                        product::<1>(&qb[ii * ld..], ld, kt, tp, dh, tp, row, tp);
                    }
                }
            }
            for ii in 0..r {
                let row = &mut scratch.scores[ii * tp..ii * tp + t];
                softmax_row(row, i0 + ii, head, &mut scratch.row_bias);
            }
            let ob = &mut out[i0 * ldo..];
            // Context: probabilities times the value rows, dh columns.
            // SAFETY (both calls): the probabilities hold r rows of t (tp apart), `v` t rows of
            // dh (ld apart), `out` rows i0..i0 + r of dh (ldo apart).
            unsafe {
                if r == ROWS {
                    product::<ROWS>(&scratch.scores, tp, v, ld, t, dh, ob, ldo);
                } else {
                    for ii in 0..r {
                        let p = &scratch.scores[ii * tp..];
                        product::<1>(p, tp, v, ld, t, dh, &mut ob[ii * ldo..], ldo);
                    }
                }
            }
            i0 += r;
        }
    }

    /// `kt[d * tp + j] = k[j * ld + d]` for j < t and d < dh, and zeros in columns t..tp: one
    /// vector of 16 keys per feature, gathered (a scalar copy took a third of the head's time).
    ///
    /// # Safety
    /// AVX-512F present; `k` holds t rows of dh (ld apart), `kt` dh x tp, tp = t rounded up to
    /// 16, ld * 15 within `i32`.
    #[target_feature(enable = "avx512f")]
    unsafe fn transpose_keys(k: &[f32], ld: usize, t: usize, dh: usize, kt: &mut [f32], tp: usize) {
        let stride = i32::try_from(ld).expect("attention rows too far apart");
        let lanes = _mm512_mullo_epi32(
            _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15),
            _mm512_set1_epi32(stride),
        );
        let (k, kt) = (k.as_ptr(), kt.as_mut_ptr());
        let mut j0 = 0;
        while j0 < tp {
            let n = (t - j0).min(16);
            let mask: __mmask16 = if n == 16 { !0 } else { (1u16 << n) - 1 };
            for d in 0..dh {
                // SAFETY: the lanes read are keys j0..j0 + n < t of feature d < dh; the store
                // is columns j0..j0 + 16 <= tp of row d.
                unsafe {
                    let col = _mm512_mask_i32gather_ps::<4>(
                        _mm512_setzero_ps(),
                        mask,
                        lanes,
                        k.add(j0 * ld + d).cast(),
                    );
                    _mm512_storeu_ps(kt.add(d * tp + j0), col);
                }
            }
            j0 += 16;
        }
    }

    /// `c[ii, 0..width] = sum_kk a[ii * lda + kk] b[kk * ldb..][..width]` for `R` rows: the
    /// scores (a: query rows, b: the transposed keys) and the context (a: probabilities, b:
    /// value rows) alike, 64 columns at a time, the last vector masked to `width`.
    ///
    /// # Safety
    /// AVX-512F present; `a` holds R rows of `kdim` (lda apart), `b` kdim rows of `width`
    /// (ldb apart), `c` R rows of `width` (ldc apart).
    #[allow(clippy::too_many_arguments)]
    #[target_feature(enable = "avx512f")]
    unsafe fn product<const R: usize>(
        a: &[f32],
        lda: usize,
        b: &[f32],
        ldb: usize,
        kdim: usize,
        width: usize,
        c: &mut [f32],
        ldc: usize,
    ) {
        let (a, b, c) = (a.as_ptr(), b.as_ptr(), c.as_mut_ptr());
        let mut c0 = 0;
        while c0 < width {
            let vectors = (width - c0).div_ceil(16).min(WIDE);
            let left = width - c0 - 16 * (vectors - 1);
            let last: __mmask16 = if left >= 16 { !0 } else { (1u16 << left) - 1 };
            let (b, c) = (b.wrapping_add(c0), c.wrapping_add(c0));
            // SAFETY: the caller's contract; columns c0.. of the block, the last vector
            // masked to the row's end.
            unsafe {
                match vectors {
                    4 => tile::<R, 4>(a, lda, b, ldb, kdim, c, ldc, last),
                    3 => tile::<R, 3>(a, lda, b, ldb, kdim, c, ldc, last),
                    2 => tile::<R, 2>(a, lda, b, ldb, kdim, c, ldc, last),
                    _ => tile::<R, 1>(a, lda, b, ldb, kdim, c, ldc, last),
                }
            }
            c0 += 16 * vectors;
        }
    }

    /// [`product`] for `16 N` columns in registers (`R N` sums), the last vector masked by
    /// `last`.
    ///
    /// # Safety
    /// As [`product`], for the columns of this tile; masked lanes are not read or written.
    #[allow(clippy::too_many_arguments)]
    #[target_feature(enable = "avx512f")]
    unsafe fn tile<const R: usize, const N: usize>(
        a: *const f32,
        lda: usize,
        b: *const f32,
        ldb: usize,
        kdim: usize,
        c: *mut f32,
        ldc: usize,
        last: __mmask16,
    ) {
        let mask = |n: usize| if n + 1 == N { last } else { !0 };
        // SAFETY (whole block): the offsets stay within the rows the caller's contract names;
        // masked lanes are not read or written.
        unsafe {
            let mut acc = [[_mm512_setzero_ps(); N]; R];
            for kk in 0..kdim {
                let row = b.add(kk * ldb);
                let mut bv = [_mm512_setzero_ps(); N];
                for (n, x) in bv.iter_mut().enumerate() {
                    *x = _mm512_maskz_loadu_ps(mask(n), row.add(16 * n));
                }
                for (ii, sums) in acc.iter_mut().enumerate() {
                    let av = _mm512_set1_ps(*a.add(ii * lda + kk));
                    for (lane, &x) in sums.iter_mut().zip(&bv) {
                        *lane = _mm512_fmadd_ps(av, x, *lane);
                    }
                }
            }
            for (ii, sums) in acc.iter().enumerate() {
                for (n, lane) in sums.iter().enumerate() {
                    _mm512_mask_storeu_ps(c.add(ii * ldc + 16 * n), mask(n), *lane);
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_values::values;

    /// The head in f64 with an exact exp, the definition; and how far rounding the queries,
    /// keys, values and probabilities to bf16 (unit roundoff `u = 2^-9`) may move each output,
    /// to first order: a score moves by at most `e_ij = 2u scale sum_d |q_id k_jd|`, so each
    /// probability by at most `2 E_i p_ij` with `E_i = max_j e_ij`; the rounded probabilities
    /// and values add `u` each. Output `(i, c)` moves by at most `sum_j p_ij |v_jc| (2 E_i +
    /// 2u)`; 10% more covers the second order.
    fn reference(head: &Head<'_>) -> (Vec<f64>, Vec<f64>) {
        let Head {
            q,
            k,
            v,
            ld,
            t,
            dh,
            scale,
            key_bias,
            positions,
        } = *head;
        let u = 2f64.powi(-9);
        let mut out = vec![0f64; t * dh];
        let mut bound = vec![0f64; t * dh];
        for i in 0..t {
            let mut big = 0f64;
            let s: Vec<f64> = (0..t)
                .map(|j| {
                    let (mut dot, mut mag) = (0f64, 0f64);
                    for d in 0..dh {
                        let p = q[i * ld + d] as f64 * k[j * ld + d] as f64;
                        dot += p;
                        mag += p.abs();
                    }
                    big = big.max(2.0 * u * scale as f64 * mag);
                    let b = key_bias[j] as f64 + positions.map_or(0.0, |p| p[i * t + j] as f64);
                    dot * scale as f64 + b
                })
                .collect();
            let max = s.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            let e: Vec<f64> = s.iter().map(|x| (x - max).exp()).collect();
            let sum: f64 = e.iter().sum();
            for c in 0..dh {
                let (mut o, mut spread) = (0f64, 0f64);
                for j in 0..t {
                    let (p, vj) = (e[j] / sum, v[j * ld + c] as f64);
                    o += p * vj;
                    spread += p * vj.abs();
                }
                out[i * dh + c] = o;
                bound[i * dh + c] = 1.1 * spread * (2.0 * big + 2.0 * u);
            }
        }
        (out, bound)
    }

    /// The test heads, each with and without a per-query position bias: sequences shorter than
    /// a vector, of whole and partial register blocks and tiles, heads of 32 and 64 features
    /// and odd ones (masked last vectors, several column blocks and feature steps), a padded
    /// key. Three heads sit side by side in each row and `run` runs the middle one into rows
    /// wider than it; what it wrote outside the head's columns fails the test, and `check`
    /// gets a label, its `t x dh` output, the f64 definition's and the bf16 bound
    /// ([`reference`]).
    fn for_each_case(
        mut run: impl FnMut(&Head<'_>, &mut [f32], usize),
        mut check: impl FnMut(&str, &[f32], &[f64], &[f64]),
    ) {
        for &(t, dh) in &[
            (1, 32),
            (3, 7),
            (5, 32),
            (17, 64),
            (64, 32),
            (70, 20),
            (33, 80),
        ] {
            for positioned in [false, true] {
                let ld = 3 * dh + 1;
                let (q, k, v) = (
                    values(t * ld, 1 + t as u32),
                    values(t * ld, 2 + dh as u32),
                    values(t * ld, 3),
                );
                let mut keys: Vec<f32> = values(t, 4).iter().map(|x| x * 0.5).collect();
                if t > 2 {
                    keys[t - 1] = -10000.0; // a padded key
                }
                let positions: Vec<f32> = values(t * t, 5);
                let off = dh;
                let head = Head {
                    q: &q[off..],
                    k: &k[off..],
                    v: &v[off..],
                    ld,
                    t,
                    dh,
                    scale: 0.3,
                    key_bias: &keys,
                    positions: positioned.then_some(&positions[..]),
                };
                let ldo = ld + 3;
                let mut out = vec![f32::NAN; t * ldo];
                run(&head, &mut out[off..], ldo);
                let label = format!("t {t} dh {dh} positions {positioned}");
                let mut got = Vec::with_capacity(t * dh);
                for (i, row) in out.chunks(ldo).enumerate() {
                    for (c, &g) in row.iter().enumerate() {
                        if c < off || c >= off + dh {
                            assert!(g.is_nan(), "{label}: ({i}, {c}) was written");
                        } else {
                            got.push(g);
                        }
                    }
                }
                let (want, bound) = reference(&head);
                check(&label, &got, &want, &bound);
            }
        }
    }

    /// The tile-unit way (bf16 queries, keys, values and probabilities) against the f64
    /// definition, within what that rounding allows (see [`reference`]).
    #[test]
    #[cfg(target_arch = "x86_64")]
    fn one_head_on_the_tile_unit_matches_the_definition_within_bf16_rounding() {
        if !crate::matmul::amx::tiles_granted() {
            println!("attention head, tile unit: not run, this CPU or process lacks AMX-BF16");
            return;
        }
        let mut scratch = AttendScratch::default();
        let mut worst = 0f64;
        for_each_case(
            |head, out, ldo| attend_head_on_tiles(head, out, ldo, &mut scratch),
            |label, got, want, bound| {
                for (at, (&g, &w)) in got.iter().zip(want).enumerate() {
                    let d = (g as f64 - w).abs();
                    let tol = bound[at] + 1e-5;
                    worst = worst.max(d / tol);
                    assert!(
                        d < tol,
                        "tiles, {label}: output {at} {g} against {w} (tolerance {tol:.2e})"
                    );
                }
            },
        );
        println!(
            "attention head, tile unit: 14 cases agree with f64 within bf16 rounding (largest \
             difference {worst:.2} of its bound)"
        );
    }

    /// Both ways of running a head (the AVX-512 loops where this CPU has AVX-512F, and the
    /// projection kernel on the active path) agree with the f64 definition on every case of
    /// [`for_each_case`].
    #[test]
    fn one_head_matches_the_definition_both_ways() {
        let mut ways = vec![false];
        if std::arch::is_x86_feature_detected!("avx512f") {
            ways.push(true);
        } else {
            println!("attention head, AVX-512 loops: not run, this CPU lacks avx512f");
        }
        for vector in ways {
            let mut worst = 0f64;
            let mut scratch = AttendScratch::default();
            for_each_case(
                |head, out, ldo| attend_head_with(vector, head, out, ldo, &mut scratch),
                |label, got, want, _| {
                    for (at, (&g, &w)) in got.iter().zip(want).enumerate() {
                        let d = (g as f64 - w).abs();
                        worst = worst.max(d);
                        assert!(
                            d < 1e-5,
                            "vector {vector}, {label}: output {at} {g} against {w}"
                        );
                    }
                },
            );
            println!(
                "attention head, {}: 14 cases agree with f64 (largest difference {worst:.1e})",
                if vector {
                    "AVX-512 loops"
                } else {
                    "through the projection kernel"
                }
            );
        }
    }
}
