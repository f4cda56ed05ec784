//! The AVX2+FMA f32 micro-kernel. With fewer than four rows the fused multiply-adds of one
//! accumulator would wait on each other (a chain as long as the inner dimension) and a single
//! stream through memory would leave bandwidth unused, so the block is cut into `S` segments (4
//! for one row, 2 for two or three) that run side by side, each with its own accumulators,
//! summed at the end.

use std::arch::x86_64::*;

use super::{Row, finish};
use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, super::ROWS);
    // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when the
    // CPU has AVX2, FMA and F16C; the tile was checked just above.
    unsafe { for_rows!(t.rows, rows, t, c) }
}

#[target_feature(enable = "avx2,fma,f16c")]
unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    // SAFETY: as the caller's.
    unsafe {
        match (R, t.next.is_some(), t.lda.is_none()) {
            (1, f, p) => variant::<R, 4>(t, c, f, p),
            (2 | 3, f, p) => variant::<R, 2>(t, c, f, p),
            (_, f, p) => variant::<R, 1>(t, c, f, p),
        }
    }
}

#[target_feature(enable = "avx2,fma,f16c")]
#[inline]
unsafe fn variant<const R: usize, const S: usize>(
    t: &Tile<'_>,
    c: &mut [f32],
    fetch: bool,
    packed: bool,
) {
    // SAFETY: as the caller's.
    unsafe {
        match (fetch, packed) {
            (true, true) => streams::<R, S, true, true>(t, c),
            (true, false) => streams::<R, S, true, false>(t, c),
            (false, true) => streams::<R, S, false, true>(t, c),
            (false, false) => streams::<R, S, false, false>(t, c),
        }
    }
}

#[target_feature(enable = "avx2,fma,f16c")]
unsafe fn streams<const R: usize, const S: usize, const FETCH: bool, const PACKED: bool>(
    t: &Tile<'_>,
    c: &mut [f32],
) {
    let Block::F32(b) = t.b else {
        unreachable!("the f32 kernel got another format")
    };
    let (pa, pb, kb) = (t.a.as_ptr(), b.as_ptr(), t.kb);
    let (pn, nlen) = t.next.unwrap_or((std::ptr::null(), 0));
    // Input q of row i is at pa[q * step + i * lda]: packed, or rows lda apart.
    let (step, lda) = if PACKED {
        (R, 1)
    } else {
        (1, t.lda.unwrap_or(0))
    };
    let mut lo = [[_mm256_setzero_ps(); R]; S];
    let mut hi = [[_mm256_setzero_ps(); R]; S];
    let seg = kb / S;
    for p in 0..seg {
        for s in 0..S {
            let q = p + s * seg;
            // SAFETY: q < S * seg <= kb, so the panel row q and the inputs q of every row are in
            // bounds (checked); a prefetch never faults.
            unsafe {
                if FETCH && q * PANEL * 4 < nlen {
                    _mm_prefetch::<_MM_HINT_T1>(pn.wrapping_add(q * PANEL * 4).cast());
                }
                let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
                let a = pa.add(q * step);
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*a.add(i * lda));
                    lo[s][i] = _mm256_fmadd_ps(x, b0, lo[s][i]);
                    hi[s][i] = _mm256_fmadd_ps(x, b1, hi[s][i]);
                }
            }
        }
    }
    for q in S * seg..kb {
        // SAFETY: q < kb: in bounds as above.
        unsafe {
            let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
            let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
            let a = pa.add(q * step);
            for i in 0..R {
                let x = _mm256_broadcast_ss(&*a.add(i * lda));
                lo[0][i] = _mm256_fmadd_ps(x, b0, lo[0][i]);
                hi[0][i] = _mm256_fmadd_ps(x, b1, hi[0][i]);
            }
        }
    }
    let mut sums: [Row; R] = [[_mm256_setzero_ps(); 2]; R];
    for i in 0..R {
        for s in 0..S {
            sums[i][0] = _mm256_add_ps(sums[i][0], lo[s][i]);
            sums[i][1] = _mm256_add_ps(sums[i][1], hi[s][i]);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, sums) }
}
