//! The AVX-512F f32 micro-kernel: one 16-lane accumulator per row, up to 12 rows, each step one
//! load of the panel's 16 values and one broadcast multiply-add per row. With fewer than 8 rows
//! the multiply-adds of one accumulator would wait on each other, so the block is cut into `S`
//! segments (4 for one row, 2 up to seven) that run side by side, each with its own
//! accumulators, summed at the end; with one to three rows that also runs several streams
//! through memory.

use std::arch::x86_64::*;

use super::finish;
use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, super::ROWS);
    // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when the
    // CPU has AVX-512F; the tile was checked just above.
    unsafe { for_rows!(t.rows, rows, t, c) }
}

#[target_feature(enable = "avx512f,avx2,fma,f16c")]
unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    // SAFETY: as the caller's.
    unsafe {
        match R {
            1 => variant::<R, 4>(t, c),
            2..=7 => variant::<R, 2>(t, c),
            _ => variant::<R, 1>(t, c),
        }
    }
}

#[target_feature(enable = "avx512f,avx2,fma,f16c")]
#[inline]
unsafe fn variant<const R: usize, const S: usize>(t: &Tile<'_>, c: &mut [f32]) {
    // SAFETY: as the caller's.
    unsafe {
        match (t.next.is_some(), t.lda.is_none()) {
            (true, true) => streams::<R, S, true, true>(t, c),
            (true, false) => streams::<R, S, true, false>(t, c),
            (false, true) => streams::<R, S, false, true>(t, c),
            (false, false) => streams::<R, S, false, false>(t, c),
        }
    }
}

#[target_feature(enable = "avx512f,avx2,fma,f16c")]
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
    let mut acc = [[_mm512_setzero_ps(); R]; S];
    let seg = kb / S;
    for p in 0..seg {
        for (s, acc) in acc.iter_mut().enumerate() {
            let q = p + s * seg;
            // SAFETY: q < S * seg <= kb, so the panel row q and the inputs q of every row are in
            // bounds (checked); a prefetch never faults.
            unsafe {
                if FETCH && q * PANEL * 4 < nlen {
                    _mm_prefetch::<_MM_HINT_T1>(pn.wrapping_add(q * PANEL * 4).cast());
                }
                let w = _mm512_loadu_ps(pb.add(q * PANEL));
                let a = pa.add(q * step);
                for (i, v) in acc.iter_mut().enumerate() {
                    *v = _mm512_fmadd_ps(_mm512_set1_ps(*a.add(i * lda)), w, *v);
                }
            }
        }
    }
    for q in S * seg..kb {
        // SAFETY: q < kb: in bounds as above.
        unsafe {
            let w = _mm512_loadu_ps(pb.add(q * PANEL));
            let a = pa.add(q * step);
            for (i, v) in acc[0].iter_mut().enumerate() {
                *v = _mm512_fmadd_ps(_mm512_set1_ps(*a.add(i * lda)), w, *v);
            }
        }
    }
    let mut sums = acc[0];
    for more in &acc[1..] {
        for (d, s) in sums.iter_mut().zip(more) {
            *d = _mm512_add_ps(*d, *s);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, sums) }
}
