//! One attention head on the tile unit, for models whose weights are bf16: the queries, keys,
//! values and probabilities rounded to bf16 (as the projections round their inputs), the
//! scores and the context summed in f32 by `tdpbf16ps`, the softmax in f32 between them.
//!
//! A MiniLM head (64 tokens by 32 features) is 16 tile products for its scores and 16 for its
//! context, against about 8,000 cycles of AVX-512 fused multiply-adds: the AVX-512 loops of
//! `attend` took 15% of a bf16 MiniLM batch (`perf`, 2-vCPU Xeon with AMX). The tile unit
//! wants its second operand in pairs along the summed dimension, so the keys are laid out as
//! `K^T` in pairs of features (the bf16 key rows, read as 32-bit words, transposed in blocks of
//! 16 x 16) and the values in pairs of keys; the scores go through a `[t32, t32]` block in
//! f32, where the softmax runs row by row as on the other paths.
#![allow(unsafe_code)]

use std::arch::x86_64::*;

use super::attend::{Head, softmax_row};
use crate::matmul::amx::{Tiles, block, configure, release};

/// Rows (and columns) per tile; 32 bf16 values per 64-byte tile row.
const T: usize = 16;
const STEP: usize = 32;

/// Buffers one head on the tile unit reuses from call to call.
#[derive(Default)]
pub struct TileScratch {
    /// Queries in bf16, `[t32, dh32]`, zero-padded.
    q: Vec<u16>,
    /// Key tiles: per block of 16 keys and step of 32 features (a block's steps together),
    /// 16 x 16 words `(k[c][2p], k[c][2p + 1])` at `[p][c]`.
    k: Vec<u32>,
    /// Value tiles: per block of 16 features and step of 32 keys (a block's steps together),
    /// 16 x 16 words `(v[2p][c], v[2p + 1][c])` at `[p][c]`.
    v: Vec<u32>,
    /// Probabilities in bf16, `[t32, t32]`, zero-padded.
    p: Vec<u16>,
    /// Scores, `[t32, t32]`, and one 32 x 32 block for edges.
    s: Vec<f32>,
    row_bias: Vec<f32>,
}

/// `len` values of `buf` starting on a 64-byte line (tile rows read whole lines).
fn lines<U: Copy + Default>(buf: &mut Vec<U>, len: usize) -> &mut [U] {
    let slack = 64 / size_of::<U>();
    if buf.len() < len + slack {
        buf.resize(len + slack, U::default());
    }
    let at = buf.as_ptr().align_offset(64);
    &mut buf[at..at + len]
}

/// Sixteen f32 (`m` of them, zeros after) rounded to bf16, to nearest even.
#[target_feature(enable = "avx512f,avx512bf16,avx512vl")]
unsafe fn bf16x16(src: *const f32, m: __mmask16) -> __m256i {
    // SAFETY: the caller's contract: the lanes of `m` are readable.
    unsafe { std::mem::transmute(_mm512_cvtneps_pbh(_mm512_maskz_loadu_ps(m, src))) }
}

fn mask(n: usize) -> __mmask16 {
    if n >= 16 {
        !0
    } else {
        ((1u32 << n) - 1) as u16
    }
}

/// See [`super::attend_head_rounded`].
///
/// # Safety
/// The tile unit is granted to this process and the CPU has AVX-512-BF16; the slices hold the
/// rows `t`, `dh`, `ld` and `ldo` describe and the bias covers `t` keys (checked by the caller).
#[target_feature(enable = "avx512f,avx512bf16,avx512vl,avx512bw")]
pub(super) unsafe fn head(head: &Head<'_>, out: &mut [f32], ldo: usize, s: &mut TileScratch) {
    let Head {
        q, k, v, ld, t, dh, ..
    } = *head;
    // Tokens and features padded to blocks of 32 (two tiles): every product runs as blocks
    // of 2 x 2 sum tiles, so the tile unit has four independent sums in flight.
    let t32 = t.div_ceil(STEP) * STEP;
    let d32 = dh.div_ceil(STEP) * STEP;
    let (ks, vs) = (d32 / STEP, t32 / STEP);
    // Queries: rows of bf16, zero-padded.
    let qb = lines(&mut s.q, t32 * d32);
    qb.fill(0);
    for i in 0..t {
        for c in (0..dh).step_by(T) {
            // SAFETY: row i of q holds dh values from i * ld; the mask stops at dh.
            let h = unsafe { bf16x16(q.as_ptr().add(i * ld + c), mask(dh - c)) };
            // SAFETY: qb holds t32 rows of d32 >= c + 16.
            unsafe { _mm256_storeu_si256(qb.as_mut_ptr().add(i * d32 + c).cast(), h) };
        }
    }
    // Keys: tiles of 16 keys by a step of 32 features, a block's steps 1 KB apart. Each key
    // row in bf16, read as 32-bit words (pairs of features), is scattered down the tile's
    // column for that key, so a tile row holds one pair for 16 keys.
    let kt = lines(&mut s.k, t32 * d32 / 2);
    kt.fill(0);
    // SAFETY (the block): the lanes loaded stop at dh in row j of k; the scatter writes 16
    // words T apart from column c of a 16 x 16 tile inside kt.
    unsafe {
        let down = _mm512_mullo_epi32(
            _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15),
            _mm512_set1_epi32(T as i32),
        );
        for j in 0..t {
            let (blk, c) = (j / T, j % T);
            for st in 0..ks {
                let d = st * STEP;
                let src = k.as_ptr().add(j * ld + d);
                let lo = bf16x16(src, mask(dh - d));
                let hi = bf16x16(src.wrapping_add(T), mask(dh.saturating_sub(d + T)));
                let words = _mm512_inserti64x4::<1>(_mm512_castsi256_si512(lo), hi);
                let tile = kt.as_mut_ptr().add((blk * ks + st) * T * T + c);
                _mm512_i32scatter_epi32::<4>(tile.cast(), down, words);
            }
        }
    }
    // Values: tiles of a step of 32 keys by 16 features, a block's steps 1 KB apart; two key
    // rows' features side by side as pairs, one tile row per pair of keys.
    let vt = lines(&mut s.v, t32 * d32 / 2);
    vt.fill(0);
    for j in (0..t).step_by(2) {
        let (st, p) = (j / STEP, (j % STEP) / 2);
        for c in (0..dh).step_by(T) {
            let (blk, m) = (c / T, mask(dh - c));
            // SAFETY: rows j and j + 1 (when j + 1 < t) of v hold dh values from j * ld; the
            // mask stops at dh; the store is row p of a tile inside vt.
            unsafe {
                let lo = _mm512_cvtepu16_epi32(bf16x16(v.as_ptr().add(j * ld + c), m));
                let hi = if j + 1 < t {
                    _mm512_cvtepu16_epi32(bf16x16(v.as_ptr().add((j + 1) * ld + c), m))
                } else {
                    _mm512_setzero_si512()
                };
                let pair = _mm512_or_si512(lo, _mm512_slli_epi32::<16>(hi));
                let row = vt.as_mut_ptr().add((blk * vs + st) * T * T + p * T);
                _mm512_storeu_si512(row.cast(), pair);
            }
        }
    }
    // SAFETY: the caller's contract (tiles granted); configured per thread.
    unsafe { configure() };
    // Scores: each 32 x 32 block of `Q K^T` over the feature steps, into `[t32, t32]`.
    let sc = lines(&mut s.s, t32 * t32 + STEP * STEP);
    let (scores, edge) = sc.split_at_mut(t32 * t32);
    for bi in 0..t32 / STEP {
        for bj in 0..t32 / STEP {
            let into = Tiles {
                c: scores[bi * STEP * t32 + bj * STEP..].as_ptr(),
                ld: t32 * 4,
                down: T * t32,
            };
            // SAFETY: query rows bi*32.. + 32 (d32 bf16 each, `ks` steps) lie in qb; key
            // tiles 2 bj and 2 bj + 1 hold `ks` steps of 1 KB each in kt; the sums go to rows
            // bi*32.. + 32, columns bj*32.. + 32 of `scores`.
            unsafe {
                let a = qb.as_ptr().add(bi * STEP * d32);
                let b0 = kt.as_ptr().add(2 * bj * ks * T * T);
                let b1 = kt.as_ptr().add((2 * bj + 1) * ks * T * T);
                block(a, d32 * 2, b0, b1, ks, None, None, into);
            }
        }
    }
    // Probabilities: the softmax of each row's first t scores, in bf16, zeros after.
    let pb = lines(&mut s.p, t32 * t32);
    pb.fill(0);
    for i in 0..t {
        let row = &mut scores[i * t32..i * t32 + t];
        softmax_row(row, i, head, &mut s.row_bias);
        for c in (0..t).step_by(T) {
            // SAFETY: the mask stops at t, inside the row; pb holds t32 >= c + 16 per row.
            unsafe {
                let h = bf16x16(row.as_ptr().add(c), mask(t - c));
                _mm256_storeu_si256(pb.as_mut_ptr().add(i * t32 + c).cast(), h);
            }
        }
    }
    // Context: each 32 x 32 block of `P V` over the key steps, stored straight into the
    // head's columns when it lies inside them, through `edge` otherwise.
    for bi in 0..t32 / STEP {
        for bd in 0..d32 / STEP {
            let rows = STEP.min(t - bi * STEP);
            let cols = STEP.min(dh - bd * STEP);
            let whole = rows == STEP && cols == STEP;
            let into = if whole {
                Tiles {
                    c: out[bi * STEP * ldo + bd * STEP..].as_ptr(),
                    ld: ldo * 4,
                    down: T * ldo,
                }
            } else {
                Tiles {
                    c: edge.as_ptr(),
                    ld: STEP * 4,
                    down: T * STEP,
                }
            };
            // SAFETY: probability rows bi*32.. + 32 (t32 bf16 each, `vs` steps) lie in pb;
            // value tiles 2 bd and 2 bd + 1 hold `vs` steps in vt; a whole block's 32 rows of
            // 32 values lie in `out` (rows < t, columns < dh of the head, ldo apart), any
            // other goes to `edge` (32 x 32).
            unsafe {
                let a = pb.as_ptr().add(bi * STEP * t32);
                let b0 = vt.as_ptr().add(2 * bd * vs * T * T);
                let b1 = vt.as_ptr().add((2 * bd + 1) * vs * T * T);
                block(a, t32 * 2, b0, b1, vs, None, None, into);
            }
            if !whole {
                for r in 0..rows {
                    let dst = &mut out[(bi * STEP + r) * ldo + bd * STEP..][..cols];
                    dst.copy_from_slice(&edge[r * STEP..r * STEP + cols]);
                }
            }
        }
    }
    // SAFETY: as above.
    unsafe { release() };
}
