//! The AVX-512-VNNI int4 micro-kernel. A block stores, for each pair of inputs and each of its
//! 16 columns, one byte: input `2j` in the low nibble, `2j + 1` in the high one, as unsigned
//! values 0..=15 (the symmetric format's `q + 8`, or `q` beside a zero point `z`). Two pairs'
//! bytes, widened to one 32-bit lane per column (`w = b[2u] | b[2u + 1] << 8`), become the four
//! bytes `(w | w << 12) & 0x0f0f0f0f`: inputs `4u`, `4u + 2`, `4u + 1`, `4u + 3`, the order in
//! which the macro loop lays out each row's int8 quads. One `vpdpbusd` per row then adds the
//! four products to the column's 32-bit sum. Four pairs' 64 bytes are read at once and one
//! `vpermb` (AVX-512-VBMI) per two pairs gathers each column's two bytes into its lane: with
//! the shift and the masking, four instructions for 64 weights and one row, against eighteen on
//! `avx512`.
//!
//! Each group of 32 inputs ends in f32: its sum less `z` times the sum of the row's int8 values
//! (the zero point, 8 when symmetric) is exact as an integer, then scaled by the column's scale
//! times the row's group scale and added to the row's total.

use std::arch::x86_64::*;

use super::super::avx512::finish;
use crate::micro::Tile;
use crate::pack::rows::INPUT_GROUP;
use crate::pack::{Block, PANEL, ScaleSlice};

/// Bytes ahead that a whole-panel tile (decode) fetches.
const FETCH_AHEAD: usize = 4096;

/// Double pairs (four inputs) per group of inputs.
const QUADS: usize = INPUT_GROUP / 4;

/// The `vpermb` indices that gather, for lane c, byte `16 p + c` into byte 0 and byte
/// `16 (p + 1) + c` into byte 1 (bytes 2 and 3 are zeroed by the mask).
const fn pick(p: usize) -> [u8; 64] {
    let mut idx = [0u8; 64];
    let mut c = 0;
    while c < 16 {
        idx[4 * c] = (16 * p + c) as u8;
        idx[4 * c + 1] = (16 * (p + 1) + c) as u8;
        c += 1;
    }
    idx
}

const PICK_FIRST: [u8; 64] = pick(0);
const PICK_SECOND: [u8; 64] = pick(2);

/// One tile of `R` rows.
///
/// # Safety
/// The CPU has AVX-512F, AVX-512BW, AVX-512-VBMI and AVX-512-VNNI; `t.check` passed and `t.quads` holds the
/// tile's groups (checked by the caller).
#[target_feature(enable = "avx512vnni,avx512vbmi,avx512bw,avx512f,avx2,fma,f16c")]
pub(super) unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    let Block::Int4 {
        q,
        scales,
        zeros,
        group,
    } = t.b
    else {
        unreachable!("the int4 kernel got another format")
    };
    // With few rows, each row's sums rotate over several chains (four with up to three rows,
    // two with up to seven), so that one chain's latency does not hold up the next step.
    let sets = if R < 4 {
        4
    } else if R < 8 {
        2
    } else {
        1
    };
    let (pq, pn) = (q.as_ptr(), t.next.map_or(std::ptr::null(), |n| n.0));
    let nlen = t.next.map_or(0, |n| n.1);
    let (px, ps, psum) = (
        t.quads.q.as_ptr(),
        t.quads.scales.as_ptr(),
        t.quads.sums.as_ptr(),
    );
    let pairs = t.kb.div_ceil(2);
    let mask = _mm512_set1_epi32(0x0f0f_0f0f);
    // (w | w << 12) & mask: lane bytes (b0, b1) become (lo0, lo1, hi0, hi1).
    let nibbles =
        |w: __m512i| _mm512_ternarylogic_epi32::<0xa8>(w, _mm512_slli_epi32::<12>(w), mask);
    // Byte picks that put pair 0's and pair 1's byte of column c (of four pairs' 64 bytes) in
    // the low two bytes of lane c, and pair 2's and pair 3's; the high two bytes are zeroed.
    // SAFETY: 64 bytes each, one vector.
    let (first, second) = unsafe {
        (
            _mm512_loadu_si512(PICK_FIRST.as_ptr().cast()),
            _mm512_loadu_si512(PICK_SECOND.as_ptr().cast()),
        )
    };
    const LOW_TWO: u64 = 0x3333_3333_3333_3333;
    // Double pairs u and u + 1 of the block (pairs 2u..2u + 4, all in it) as 16 lanes of 4
    // bytes each.
    let decode_two = |u: usize| -> [__m512i; 2] {
        // SAFETY: pairs 2u..2u + 4 of the block (64 bytes) are in bounds (the caller's check
        // against `pairs`).
        unsafe {
            let l = _mm512_loadu_si512(pq.add(2 * u * PANEL).cast());
            [
                nibbles(_mm512_maskz_permutexvar_epi8(LOW_TWO, first, l)),
                nibbles(_mm512_maskz_permutexvar_epi8(LOW_TWO, second, l)),
            ]
        }
    };
    // Double pair u alone (pairs 2u and, when `both`, 2u + 1): at a block's short end.
    let decode = |u: usize, both: bool| -> __m512i {
        // SAFETY: pair 2u (and 2u + 1 when `both`) of the block is in bounds (the callers'
        // checks below against `pairs`).
        unsafe {
            let d0 = _mm512_cvtepu8_epi32(_mm_loadu_si128(pq.add(2 * u * PANEL).cast()));
            let w = if both {
                let d1 = _mm512_cvtepu8_epi32(_mm_loadu_si128(pq.add((2 * u + 1) * PANEL).cast()));
                _mm512_or_si512(d0, _mm512_slli_epi32::<8>(d1))
            } else {
                d0
            };
            nibbles(w)
        }
    };
    // Row i's quad u, in all 16 lanes.
    let input = |u: usize, i: usize| -> __m512i {
        // SAFETY: the tile's quads cover every double pair of the block (checked by the caller).
        unsafe { _mm512_set1_epi32(*px.add(u * R + i) as i32) }
    };
    let mut total = [_mm512_setzero_ps(); R];
    let (mut sw, mut zf) = (_mm512_setzero_ps(), _mm512_set1_ps(8.0));
    let groups = t.kb.div_ceil(INPUT_GROUP);
    for g in 0..groups {
        let k0 = g * INPUT_GROUP;
        if k0.is_multiple_of(group) {
            let gw = k0 / group;
            // SAFETY: the block holds weight group gw's 16 scales and zero points (`t.check`).
            unsafe {
                sw = match scales {
                    ScaleSlice::F32(s) => _mm512_loadu_ps(s.as_ptr().add(gw * PANEL)),
                    ScaleSlice::F16(s) => {
                        _mm512_cvtph_ps(_mm256_loadu_si256(s.as_ptr().add(gw * PANEL).cast()))
                    }
                };
                if let Some(z) = zeros {
                    let z = _mm_loadu_si128(z.as_ptr().add(gw * PANEL).cast());
                    zf = _mm512_cvtepi32_ps(_mm512_cvtepu8_epi32(z));
                }
            }
        }
        // The group's bytes: 16 pairs of 16 bytes, four cache lines.
        let at = g * QUADS * 2 * PANEL;
        for line in 0..4 {
            let off = at + line * 64;
            // A prefetch never faults; its address is computed without `add`.
            if off < nlen {
                _mm_prefetch::<_MM_HINT_T1>(pn.wrapping_add(off).cast());
            } else if sets > 1 && t.next.is_none() {
                // A whole panel read as one block (decode) is one long stream: fetched ahead,
                // past the block into the next panel, which the macro loop reads next.
                _mm_prefetch::<_MM_HINT_T0>(pq.wrapping_add(off + FETCH_AHEAD).cast());
            }
        }
        let mut acc = [[_mm512_setzero_si512(); R]; 4];
        let u0 = g * QUADS;
        if 2 * (u0 + QUADS) <= pairs {
            // A whole group: unrolled, so each step's chain is fixed.
            for du in (0..QUADS).step_by(2) {
                let v = decode_two(u0 + du);
                for (h, vh) in v.iter().enumerate() {
                    let set = (du + h) % sets;
                    for i in 0..R {
                        acc[set][i] = _mm512_dpbusd_epi32(acc[set][i], *vh, input(u0 + du + h, i));
                    }
                }
            }
        } else {
            // The block's last, short group: the double pairs it has, the last maybe half.
            let mut u = u0;
            while 2 * u < pairs {
                let v = decode(u, 2 * u + 1 < pairs);
                for i in 0..R {
                    acc[0][i] = _mm512_dpbusd_epi32(acc[0][i], v, input(u, i));
                }
                u += 1;
            }
        }
        for i in 0..R {
            let sum = match sets {
                1 => acc[0][i],
                2 => _mm512_add_epi32(acc[0][i], acc[1][i]),
                _ => _mm512_add_epi32(
                    _mm512_add_epi32(acc[0][i], acc[1][i]),
                    _mm512_add_epi32(acc[2][i], acc[3][i]),
                ),
            };
            // SAFETY: group g of every row has its scale and sum (checked by the caller).
            let (sx, qsum) = unsafe { (*ps.add(g * R + i), *psum.add(g * R + i)) };
            // sum - z * (sum of the row's values): exact in f32 (|.| < 2^17).
            let exact = _mm512_fnmadd_ps(zf, _mm512_set1_ps(qsum as f32), _mm512_cvtepi32_ps(sum));
            total[i] = _mm512_fmadd_ps(exact, _mm512_mul_ps(sw, _mm512_set1_ps(sx)), total[i]);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, total) }
}
