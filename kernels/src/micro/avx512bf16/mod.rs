//! The AVX-512-BF16 micro-kernel, for bf16 weights: `vdpbf16ps` multiplies a pair of bf16
//! weights by a pair of bf16 inputs and adds both products to an f32 accumulator, so each
//! step handles two inputs for 16 columns in one instruction. The inputs are rounded to bf16 once
//! per row block by the macro loop (the kernel reads [`Tile::pairs`]), which is where this path
//! differs numerically from the others: each input carries bf16's 8-bit precision.
//!
//! Everything here is intrinsics on raw pointers: each `unsafe` block says what bounds it, and
//! the kernel is handed out only where the CPU has the features (`dispatch::micro_kernel`).
#![allow(unsafe_code)]
// Register tiles are indexed by row on purpose: with `R` a constant the loops unroll and the
// accumulators stay in registers.
#![allow(clippy::needless_range_loop)]

use std::arch::x86_64::*;

use super::avx512::{ROWS, finish};
use super::{Inputs, MicroKernel, Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(crate) const BF16: MicroKernel = MicroKernel {
    rows: ROWS,
    run,
    inputs: Inputs::Bf16Pairs,
};

fn run(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, ROWS);
    // The kernel reads the rows' bf16 pairs only (packed whether or not `a` is).
    assert!(
        t.kb.div_ceil(2) * t.rows <= t.pairs.len(),
        "tile outside its slices"
    );
    // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when the
    // CPU has AVX-512F and AVX-512-BF16; the tile was checked just above.
    unsafe { for_rows!(t.rows, rows, t, c) }
}

/// Bytes ahead that a few-rows tile fetches when it has no next block to fetch.
const FETCH_AHEAD: usize = 4096;

#[target_feature(enable = "avx512bf16,avx512f,avx2,fma,f16c")]
unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    let Block::Bf16(b) = t.b else {
        unreachable!("the bf16 kernel got another format")
    };
    let (pa, pb) = (t.pairs.as_ptr(), b.as_ptr());
    let (pn, nlen) = t.next.unwrap_or((std::ptr::null(), 0));
    // With fewer than 8 rows, even and odd pairs go to separate accumulators.
    let split = R < 8;
    let mut acc = [[_mm512_setzero_ps(); R]; 2];
    for j in 0..t.kb.div_ceil(2) {
        let set = if split { j % 2 } else { 0 };
        // SAFETY: pair j of the block (16 words) and of every row are in bounds (checked); a
        // prefetch never faults. An odd last input's pair has a zero high half in both the
        // weights and the rows, which adds nothing.
        unsafe {
            if j * PANEL * 4 < nlen {
                _mm_prefetch::<_MM_HINT_T1>(pn.wrapping_add(j * PANEL * 4).cast());
            } else if split && t.next.is_none() {
                // A whole panel read as one block (decode) is one long stream: fetched ahead,
                // past the block into the next panel, which the macro loop reads next.
                let at = pb.wrapping_add(j * PANEL + FETCH_AHEAD / 4);
                _mm_prefetch::<_MM_HINT_T0>(at.cast());
            }
            let w: __m512bh = std::mem::transmute(_mm512_loadu_si512(pb.add(j * PANEL).cast()));
            for i in 0..R {
                let x: __m512bh = std::mem::transmute(_mm512_set1_epi32(*pa.add(j * R + i) as i32));
                acc[set][i] = _mm512_dpbf16_ps(acc[set][i], x, w);
            }
        }
    }
    let mut sums = acc[0];
    if split {
        for (d, s) in sums.iter_mut().zip(&acc[1]) {
            *d = _mm512_add_ps(*d, *s);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, sums) }
}
