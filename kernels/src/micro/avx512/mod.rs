//! The AVX-512F micro-kernels: a tile's 16 columns are one 16-lane vector per row, up to 12 rows
//! (12 accumulators of the 32 registers, which leaves room for the decoded weights). [`f32`]
//! streams f32 panels; the reduced formats ([`bf16`], [`int8`], [`int4`]) each give a decoder
//! that turns a pair of inputs' stored values into f32 vectors in registers, and share one loop
//! ([`reduced_tile`]) that walks the block group by group. [`finish`] is every tile's end:
//! low-rank steps, bias, and a store masked to the tile's columns.
//!
//! Everything here is intrinsics on raw pointers: each `unsafe` block says what bounds it, and
//! the kernels are handed out only where the CPU has the features (`dispatch::micro_kernel`).
#![allow(unsafe_code)]
// Register tiles are indexed by row on purpose: with `R` a constant the loops unroll and the
// accumulators stay in registers.
#![allow(clippy::needless_range_loop)]

mod bf16;
mod f32;
mod int4;
mod int8;

use std::arch::x86_64::*;

use super::{Inputs, MicroKernel, Tile};
use crate::pack::PANEL;

/// Rows per register tile.
pub(super) const ROWS: usize = 12;

pub(crate) const F32: MicroKernel = MicroKernel {
    rows: ROWS,
    run: f32::run,
    inputs: Inputs::F32,
};
pub(crate) const BF16: MicroKernel = MicroKernel {
    rows: ROWS,
    run: bf16::run,
    inputs: Inputs::F32,
};
pub(crate) const INT8: MicroKernel = MicroKernel {
    rows: ROWS,
    run: int8::run,
    inputs: Inputs::F32,
};
pub(crate) const INT4: MicroKernel = MicroKernel {
    rows: ROWS,
    run: int4::run,
    inputs: Inputs::F32,
};

/// A reduced format's values, decoded in registers, read in pairs of inputs (bf16 and int4
/// store them so; int8 reads two inputs' rows at once).
pub(super) trait Decode {
    /// Bytes of stored values per input and 16 columns, for prefetching.
    const BYTES: usize;
    /// Loads the scales (and zero points) of group `g` of the block.
    ///
    /// # Safety
    /// The block holds group `g`; AVX-512F is present.
    unsafe fn group(&mut self, g: usize);
    /// The 16 values of inputs `2j` and `2j + 1` of the block.
    ///
    /// # Safety
    /// The block holds input `2j + 1`; [`Decode::group`] was called for its group.
    unsafe fn pair(&self, j: usize) -> [__m512; 2];
    /// The 16 values of input `2j` alone (the last input of an odd-length block).
    ///
    /// # Safety
    /// The block holds input `2j`; [`Decode::group`] was called for its group.
    unsafe fn first(&self, j: usize) -> __m512;
    /// The current group's 16 scales, when [`Decode::pair`] and [`Decode::first`] give values
    /// before them (see [`reduced_tile`] for where they are applied). `None` when the values
    /// are final (bf16).
    ///
    /// # Safety
    /// AVX-512F is present; [`Decode::group`] was called.
    unsafe fn scales(&self) -> Option<__m512>;
}

/// A reduced-format tile: the block walked group by group, inputs in pairs, then [`finish`].
/// With fewer than 8 rows (decode) the pair's two inputs go to separate accumulators, so more
/// multiply-add chains run side by side, and each group is summed unscaled and multiplied by
/// its scales once at its end ([`Decode::scales`]), which takes a multiply off every decoded
/// vector; with more rows each decoded vector is scaled once and serves every row.
///
/// # Safety
/// AVX-512F is present; `t.check` passed; `d` decodes `t.b`.
#[target_feature(enable = "avx512f,avx2,fma,f16c")]
#[inline]
pub(super) unsafe fn reduced_tile<D: Decode, const R: usize>(
    t: &Tile<'_>,
    c: &mut [f32],
    mut d: D,
    group: usize,
) {
    let split = R < 8;
    let mut acc = [[_mm512_setzero_ps(); R]; 2];
    let kb = t.kb;
    let mut q0 = 0;
    while q0 < kb {
        let end = (q0 + group).min(kb);
        // SAFETY: the group starting at q0 is in the block (the caller's check).
        let scales = unsafe {
            d.group(q0 / group);
            d.scales()
        };
        if let Some((next, len)) = t.next {
            let (from, to) = ((q0 * D::BYTES).min(len), (end * D::BYTES).min(len));
            for off in (from..to).step_by(64) {
                // A prefetch never faults; the address is computed without `add`.
                _mm_prefetch::<_MM_HINT_T1>(next.wrapping_add(off).cast());
            }
        }
        if split {
            // SAFETY: inputs q0..end are in the block and in `a` (the caller's check).
            let part = unsafe { split_sums::<D, R>(t, &d, q0, end) };
            for i in 0..R {
                acc[0][i] = match scales {
                    Some(s) => _mm512_fmadd_ps(part[i], s, acc[0][i]),
                    None => _mm512_add_ps(acc[0][i], part[i]),
                };
            }
        } else {
            // SAFETY: as above.
            unsafe { group_sums::<D, R>(t, &d, q0, end, scales, false, &mut acc) };
        }
        q0 = end;
    }
    if split {
        for i in 0..R {
            acc[0][i] = _mm512_add_ps(acc[0][i], acc[1][i]);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, acc[0]) }
}

/// Bytes ahead of the inputs being multiplied that [`split_sums`] fetches when the tile has
/// no next block to fetch (a whole panel as one block).
const FETCH_AHEAD: usize = 4096;

/// Inputs `q0..end` of one group, unscaled, for few rows: two pairs of inputs per step into
/// four sets of accumulators, so four multiply-add chains run side by side (with one row, a
/// chain per pair would wait on its own latency), summed at the end.
///
/// # Safety
/// As [`group_sums`].
#[target_feature(enable = "avx512f,avx2,fma,f16c")]
#[inline]
unsafe fn split_sums<D: Decode, const R: usize>(
    t: &Tile<'_>,
    d: &D,
    q0: usize,
    end: usize,
) -> [__m512; R] {
    let pa = t.a.as_ptr();
    let (step, lda) = match t.lda {
        None => (R, 1),
        Some(lda) => (1, lda),
    };
    let mut sums = [[_mm512_setzero_ps(); R]; 4];
    // A whole panel read as one block (decode) is one long stream: fetched ahead here, since
    // the hardware's prefetch alone ran it at half the read bandwidth. A long group is walked
    // as two streams at once (its two halves), which memory serves faster than one.
    let ahead = t.next.is_none().then(|| t.b.bytes());
    let half = ((end - q0) / 2) & !1;
    let mut q = q0;
    if half >= 64 {
        while q + 2 <= q0 + half {
            let r = q + half;
            if let Some((base, _)) = ahead {
                for at in [q * D::BYTES + FETCH_AHEAD, r * D::BYTES + FETCH_AHEAD] {
                    for off in (0..2 * D::BYTES).step_by(64) {
                        // A prefetch never faults; the address is computed without `add`.
                        _mm_prefetch::<_MM_HINT_T0>(base.wrapping_add(at + off).cast());
                    }
                }
            }
            // SAFETY: q + 1 < q0 + half and r + 1 < end: in the block, and inputs q, q + 1,
            // r, r + 1 of every row are in `a`.
            unsafe {
                let w = d.pair(q / 2);
                let v = d.pair(r / 2);
                for i in 0..R {
                    let x = |at: usize| _mm512_set1_ps(*pa.add(at * step + i * lda));
                    sums[0][i] = _mm512_fmadd_ps(x(q), w[0], sums[0][i]);
                    sums[1][i] = _mm512_fmadd_ps(x(q + 1), w[1], sums[1][i]);
                    sums[2][i] = _mm512_fmadd_ps(x(r), v[0], sums[2][i]);
                    sums[3][i] = _mm512_fmadd_ps(x(r + 1), v[1], sums[3][i]);
                }
            }
            q += 2;
        }
        q = q0 + 2 * half;
    }
    while q + 4 <= end {
        if let Some((base, _)) = ahead {
            let at = q * D::BYTES + FETCH_AHEAD;
            for off in (0..4 * D::BYTES).step_by(64) {
                // A prefetch never faults; the address is computed without `add`. Past the
                // block it fetches the next panel, which the macro loop reads next.
                _mm_prefetch::<_MM_HINT_T0>(base.wrapping_add(at + off).cast());
            }
        }
        // SAFETY: q + 3 < end: in the block, and inputs q..q + 4 of every row are in `a`.
        unsafe {
            let w = d.pair(q / 2);
            let v = d.pair(q / 2 + 1);
            for i in 0..R {
                let x = |o: usize| _mm512_set1_ps(*pa.add((q + o) * step + i * lda));
                sums[0][i] = _mm512_fmadd_ps(x(0), w[0], sums[0][i]);
                sums[1][i] = _mm512_fmadd_ps(x(1), w[1], sums[1][i]);
                sums[2][i] = _mm512_fmadd_ps(x(2), v[0], sums[2][i]);
                sums[3][i] = _mm512_fmadd_ps(x(3), v[1], sums[3][i]);
            }
        }
        q += 4;
    }
    let mut rest = [sums[0], sums[1]];
    // SAFETY: inputs q..end as the caller's.
    unsafe { group_sums::<D, R>(t, d, q, end, None, true, &mut rest) };
    let mut out = [_mm512_setzero_ps(); R];
    for i in 0..R {
        out[i] = _mm512_add_ps(
            _mm512_add_ps(rest[0][i], rest[1][i]),
            _mm512_add_ps(sums[2][i], sums[3][i]),
        );
    }
    out
}

/// Inputs `q0..end` of one group into `sums`: each decoded vector (times `scales`, when
/// given) times each row's input; a pair's second input into `sums[1]` when `split`.
///
/// # Safety
/// AVX-512F is present; inputs `q0..end` are in the block and in `t.a` for every row;
/// [`Decode::group`] was called for their group.
#[target_feature(enable = "avx512f,avx2,fma,f16c")]
#[inline]
#[allow(clippy::too_many_arguments)]
unsafe fn group_sums<D: Decode, const R: usize>(
    t: &Tile<'_>,
    d: &D,
    q0: usize,
    end: usize,
    scales: Option<__m512>,
    split: bool,
    sums: &mut [[__m512; R]; 2],
) {
    let pa = t.a.as_ptr();
    let (step, lda) = match t.lda {
        None => (R, 1),
        Some(lda) => (1, lda),
    };
    let scaled = |v: __m512| scales.map_or(v, |s| _mm512_mul_ps(v, s));
    let mut q = q0;
    while q + 2 <= end {
        // SAFETY: q + 1 < end: in the block, and inputs q, q + 1 of every row are in `a`.
        unsafe {
            let w = d.pair(q / 2);
            for (s, ws) in w.iter().enumerate() {
                let ws = scaled(*ws);
                let set = if split { s } else { 0 };
                for i in 0..R {
                    let x = _mm512_set1_ps(*pa.add((q + s) * step + i * lda));
                    sums[set][i] = _mm512_fmadd_ps(x, ws, sums[set][i]);
                }
            }
        }
        q += 2;
    }
    if q < end {
        // SAFETY: q < end, as above.
        unsafe {
            let w = scaled(d.first(q / 2));
            for i in 0..R {
                let x = _mm512_set1_ps(*pa.add(q * step + i * lda));
                sums[0][i] = _mm512_fmadd_ps(x, w, sums[0][i]);
            }
        }
    }
}

/// The end of every AVX-512 tile: the low-rank steps in the same accumulators, then the bias
/// and (with `acc`) what `c` holds added, and the tile's `cols` columns stored.
///
/// # Safety
/// AVX-512F is present; `t.check` passed.
#[target_feature(enable = "avx512f,avx2,fma,f16c")]
#[inline]
pub(super) unsafe fn finish<const R: usize>(t: &Tile<'_>, c: &mut [f32], mut sums: [__m512; R]) {
    if let Some((z, zb, rank)) = t.low {
        let (pz, pzb) = (z.as_ptr(), zb.as_ptr());
        for q in 0..rank {
            // SAFETY: q < rank: z holds rank * R values and zb rank * 16 (checked).
            unsafe {
                let b = _mm512_loadu_ps(pzb.add(q * PANEL));
                for (i, s) in sums.iter_mut().enumerate() {
                    *s = _mm512_fmadd_ps(_mm512_set1_ps(*pz.add(q * R + i)), b, *s);
                }
            }
        }
    }
    // Lanes past `cols` are neither read nor written.
    let mask: __mmask16 = if t.cols >= PANEL {
        0xffff
    } else {
        (1u16 << t.cols) - 1
    };
    if let Some(bias) = t.bias {
        // SAFETY: bias holds cols values (checked); masked lanes are not read.
        let b = unsafe { _mm512_maskz_loadu_ps(mask, bias.as_ptr()) };
        for s in sums.iter_mut() {
            *s = _mm512_add_ps(*s, b);
        }
    }
    let pc = c.as_mut_ptr();
    for (i, s) in sums.iter().enumerate() {
        // SAFETY: (R - 1) * ldc + cols <= c.len() (checked); masked lanes are not touched.
        unsafe {
            let d = pc.add(i * t.ldc);
            let mut v = *s;
            if t.acc {
                v = _mm512_add_ps(v, _mm512_maskz_loadu_ps(mask, d));
            }
            _mm512_mask_storeu_ps(d, mask, v);
        }
    }
}

/// Runs a reduced-format tile for the tile's row count, after the bounds check.
macro_rules! reduced_run {
    ($decoder:expr, $t:expr, $c:expr) => {{
        $t.check($c, super::ROWS);
        #[target_feature(enable = "avx512f,avx2,fma,f16c")]
        unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
            let (d, group) = $decoder(t);
            // SAFETY: the features are enabled here, the tile was checked, the decoder reads
            // the tile's block.
            unsafe { super::reduced_tile::<_, R>(t, c, d, group) }
        }
        // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when
        // the CPU has AVX-512F; the tile was checked just above.
        unsafe { for_rows!($t.rows, rows, $t, $c) }
    }};
}
pub(super) use reduced_run;
