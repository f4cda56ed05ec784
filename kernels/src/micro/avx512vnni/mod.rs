//! The AVX-512-VNNI micro-kernels: `vpdpbusd` multiplies four unsigned bytes by four signed
//! bytes in each of 16 lanes and adds the four products to the lane's 32-bit sum, 64
//! multiply-adds per instruction (an f32 fused multiply-add does 16). The weight side is the
//! stored values as unsigned bytes with an offset `z`: an int4 weight's nibbles (0..=15, `z`
//! its zero point or 8; [`int4`]), an int8 weight's values plus 128 ([`int8`]), gathered into
//! quads of four inputs per column in registers; the input side is each row rounded to int8 in
//! groups of 32 inputs by the macro loop (the kernel reads [`Tile::quads`]), which is where this
//! path differs numerically from the others. [`quad_tile`] is the loop they share.
//!
//! Everything here is intrinsics on raw pointers: each `unsafe` block says what bounds it, and
//! the kernel is handed out only where the CPU has the features (`dispatch::micro_kernel`).
#![allow(unsafe_code)]
// Register tiles are indexed by row on purpose: with `R` a constant the loops unroll and the
// accumulators stay in registers.
#![allow(clippy::needless_range_loop)]

mod int4;
mod int8;
pub(crate) mod rows;

use std::arch::x86_64::*;

use super::avx512::{ROWS, finish};
use super::{Inputs, MicroKernel, Tile, for_rows};
use crate::pack::PANEL;
use crate::pack::rows::INPUT_GROUP;

/// int4 weights against int8 rows.
pub(crate) const INT4: MicroKernel = MicroKernel {
    rows: ROWS,
    run: run_int4,
    inputs: Inputs::Int8Groups,
};

/// int8 weights against int8 rows.
pub(crate) const INT8: MicroKernel = MicroKernel {
    rows: ROWS,
    run: run_int8,
    inputs: Inputs::Int8Groups,
};

#[target_feature(enable = "avx512vnni,avx512vbmi,avx512bw,avx512f,avx2,fma,f16c")]
unsafe fn int4_rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    // SAFETY: the caller's contract (the features, the checked tile).
    unsafe { quad_tile::<_, R>(t, c, int4::Int4::new(t)) }
}

#[target_feature(enable = "avx512vnni,avx512vbmi,avx512bw,avx512f,avx2,fma,f16c")]
unsafe fn int8_rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    // SAFETY: the caller's contract (the features, the checked tile).
    unsafe { quad_tile::<_, R>(t, c, int8::Int8::new(t)) }
}

fn run_int4(t: &Tile<'_>, c: &mut [f32]) {
    check(t, c);
    // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when the
    // CPU has AVX-512F, AVX-512BW, AVX-512-VBMI and AVX-512-VNNI; the tile was checked just
    // above.
    unsafe { for_rows!(t.rows, int4_rows, t, c) }
}

fn run_int8(t: &Tile<'_>, c: &mut [f32]) {
    check(t, c);
    // SAFETY: as for `run_int4`.
    unsafe { for_rows!(t.rows, int8_rows, t, c) }
}

/// Checks the tile, and that it has its rows' int8 groups (all the kernels read of its rows).
fn check(t: &Tile<'_>, c: &[f32]) {
    t.check(c, ROWS);
    let groups = t.kb.div_ceil(INPUT_GROUP);
    assert!(
        groups * INPUT_GROUP / 4 * t.rows <= t.quads.q.len()
            && groups * t.rows <= t.quads.scales.len()
            && groups * t.rows <= t.quads.sums.len(),
        "tile outside its slices"
    );
}

/// Bytes ahead that a whole-panel tile (decode) fetches. One row through 2048 x 2048 and
/// 8192 x 2048 weights cycled from memory (a scratch run on the AMX Xeon, 2026-12-05) read
/// int4 at 15.5-17.1 GB/s with 1 KB against 12.7-15.0 with 4 KB, and int8 at 17.1-22.4
/// against 16.6-19.5; 512 B and 2 KB fell between, and 8 KB was slower still.
const FETCH_AHEAD: usize = 1024;

/// Quads (four inputs) per group of inputs.
const QUADS: usize = INPUT_GROUP / 4;

/// `(w | w << 12) & 0x0f0f0f0f`: lane bytes `(b0, b1)` become `(lo0, lo1, hi0, hi1)`, their
/// nibbles.
#[target_feature(enable = "avx512f")]
#[inline]
fn nibble_quads(w: __m512i) -> __m512i {
    _mm512_ternarylogic_epi32::<0xa8>(
        w,
        _mm512_slli_epi32::<12>(w),
        _mm512_set1_epi32(0x0f0f_0f0f),
    )
}

/// A weight format read a quad of inputs at a time: per column, the four inputs' values as
/// unsigned bytes in the quads' order (inputs `4u`, `4u + 2`, `4u + 1`, `4u + 3`), standing for
/// `s (v - z)`.
pub(super) trait QuadDecode {
    /// Stored bytes per quad and 16 columns.
    const QUAD_BYTES: usize;
    /// Inputs per group of the weight's scales.
    fn weight_group(&self) -> usize;
    /// The block's first stored byte.
    fn base(&self) -> *const u8;
    /// Weight group `gw`'s 16 scales and 16 offsets `z` (as f32).
    ///
    /// # Safety
    /// The block holds group `gw`; AVX-512F is present.
    unsafe fn group(&self, gw: usize) -> (__m512, __m512);
    /// Quads `u` and `u + 1`, both whole in the block.
    ///
    /// # Safety
    /// The block holds inputs `4u..4u + 8`; the CPU has the path's features.
    unsafe fn two(&self, u: usize) -> [__m512i; 2];
    /// Quad `u`, of which the block holds the first `n` inputs (1 to 4; the rest read as
    /// anything, which the rows' zero inputs cancel).
    ///
    /// # Safety
    /// The block holds inputs `4u..4u + n`; the CPU has the path's features.
    unsafe fn one(&self, u: usize, n: usize) -> __m512i;
}

/// A tile of `R` rows against a block read in quads: each group of 32 inputs summed in 32-bit
/// integers by `vpdpbusd`, then in f32 `(sum - z * (sum of the row's values)) * s * s_row`
/// (the first part exact: below 2^24) onto the row's total, and [`finish`].
///
/// # Safety
/// The CPU has AVX-512F, AVX-512BW, AVX-512-VBMI and AVX-512-VNNI; [`check`] passed; `d`
/// reads `t.b`.
#[target_feature(enable = "avx512vnni,avx512vbmi,avx512bw,avx512f,avx2,fma,f16c")]
#[inline]
unsafe fn quad_tile<D: QuadDecode, const R: usize>(t: &Tile<'_>, c: &mut [f32], d: D) {
    // With few rows, each row's sums rotate over several chains (four with up to three rows,
    // two with up to seven), so that one chain's latency does not hold up the next step.
    let sets = if R < 4 {
        4
    } else if R < 8 {
        2
    } else {
        1
    };
    let kb = t.kb;
    let (pq, pn) = (d.base(), t.next.map_or(std::ptr::null(), |n| n.0));
    let nlen = t.next.map_or(0, |n| n.1);
    let (px, ps, psum) = (
        t.quads.q.as_ptr(),
        t.quads.scales.as_ptr(),
        t.quads.sums.as_ptr(),
    );
    // Row i's quad u, in all 16 lanes.
    let input = |u: usize, i: usize| -> __m512i {
        // SAFETY: the tile's quads cover every quad of the block (`check`).
        unsafe { _mm512_set1_epi32(*px.add(u * R + i) as i32) }
    };
    let group = d.weight_group();
    let mut total = [_mm512_setzero_ps(); R];
    let groups = kb.div_ceil(INPUT_GROUP);
    // A whole int8 panel read as one block (decode) is walked as two streams, its two halves a
    // group (512 bytes) at a time in turn, which memory serves faster than one (measured: 0.92
    // of the read bandwidth against 0.80 by kernel-bench; int4's 256-byte groups measured no
    // better so, and stay one stream).
    let streams = t.next.is_none() && sets > 1 && groups >= 8 && D::QUAD_BYTES >= 4 * PANEL;
    let half = groups.div_ceil(2);
    let mut loaded = usize::MAX;
    let (mut sw, mut zf) = (_mm512_setzero_ps(), _mm512_setzero_ps());
    for step in 0..groups {
        let g = match (streams, step % 2) {
            (false, _) => step,
            (true, 0) => step / 2,
            (true, _) => half + step / 2,
        };
        let k0 = g * INPUT_GROUP;
        if k0 / group != loaded {
            loaded = k0 / group;
            // SAFETY: the block holds the weight group that input k0 lies in.
            (sw, zf) = unsafe { d.group(loaded) };
        }
        let at = g * QUADS * D::QUAD_BYTES;
        for off in (at..at + QUADS * D::QUAD_BYTES).step_by(64) {
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
        if 4 * (u0 + QUADS) <= kb {
            // A whole group: unrolled, so each step's chain is fixed.
            for du in (0..QUADS).step_by(2) {
                // SAFETY: inputs 4(u0 + du)..+8 are in the block (a whole group is).
                let v = unsafe { d.two(u0 + du) };
                for (h, vh) in v.iter().enumerate() {
                    let set = (du + h) % sets;
                    for i in 0..R {
                        acc[set][i] = _mm512_dpbusd_epi32(acc[set][i], *vh, input(u0 + du + h, i));
                    }
                }
            }
        } else {
            // The block's last, short group: the quads it has, the last maybe short.
            let mut u = u0;
            while 4 * u < kb {
                // SAFETY: inputs 4u..min(4u + 4, kb) are in the block.
                let v = unsafe { d.one(u, (kb - 4 * u).min(4)) };
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
            // SAFETY: group g of every row has its scale and sum (`check`).
            let (sx, qsum) = unsafe { (*ps.add(g * R + i), *psum.add(g * R + i)) };
            let exact = _mm512_fnmadd_ps(zf, _mm512_set1_ps(qsum as f32), _mm512_cvtepi32_ps(sum));
            total[i] = _mm512_fmadd_ps(exact, _mm512_mul_ps(sw, _mm512_set1_ps(sx)), total[i]);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, total) }
}
