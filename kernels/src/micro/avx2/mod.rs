//! The AVX2+FMA micro-kernels: a tile's 16 columns are two 8-lane vectors per row, up to 6 rows
//! (12 accumulators of the 16 registers). [`f32`] streams f32 panels; the reduced formats
//! ([`bf16`], [`int8`], [`int4`]) each give a decoder that turns a pair of inputs' stored values
//! into f32 vectors in registers, and share one loop ([`reduced_tile`]) that walks the block
//! group by group. [`finish`] is every tile's end: low-rank steps, bias, store.
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
const ROWS: usize = 6;

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

/// 16 f32 lanes as two AVX2 vectors.
type Row = [__m256; 2];

/// A reduced format's values, decoded in registers. Every format is read in pairs of inputs
/// (bf16 and int4 store them so; int8 reads two inputs' rows at once).
pub(super) trait Decode {
    /// Bytes of stored values per input and 16 columns, for prefetching.
    const BYTES: usize;
    /// Loads the scales (and zero points) of group `g` of the block.
    ///
    /// # Safety
    /// The block holds group `g`; AVX2, FMA and F16C are present.
    unsafe fn group(&mut self, g: usize);
    /// The 16 values of inputs `2j` and `2j + 1` of the block.
    ///
    /// # Safety
    /// The block holds input `2j + 1`; [`Decode::group`] was called for its group.
    unsafe fn pair(&self, j: usize) -> [Row; 2];
    /// The 16 values of input `2j` alone (the last input of an odd-length block).
    ///
    /// # Safety
    /// The block holds input `2j`; [`Decode::group`] was called for its group.
    unsafe fn first(&self, j: usize) -> Row;
    /// The current group's 16 scales, when [`Decode::pair`] and [`Decode::first`] give values
    /// before them (see [`reduced_tile`] for where they are applied). `None` when the values
    /// are final (bf16).
    ///
    /// # Safety
    /// AVX2 is present; [`Decode::group`] was called.
    unsafe fn scales(&self) -> Option<Row>;
}

/// A reduced-format tile: the block walked group by group, inputs in pairs, then [`finish`].
/// With fewer than 4 rows (decode) the pair's two inputs go to separate accumulators, so two
/// multiply-add chains run side by side, and each group is summed unscaled and multiplied by
/// its scales once at its end ([`Decode::scales`]), which takes a multiply off every decoded
/// vector; with more rows each decoded vector is scaled once and serves every row.
///
/// # Safety
/// AVX2, FMA and F16C are present; `t.check` passed; `d` decodes `t.b`.
#[target_feature(enable = "avx2,fma,f16c")]
#[inline]
pub(super) unsafe fn reduced_tile<D: Decode, const R: usize>(
    t: &Tile<'_>,
    c: &mut [f32],
    mut d: D,
    group: usize,
) {
    let split = R < 4;
    let zero = _mm256_setzero_ps();
    let mut acc: [[Row; R]; 2] = [[[zero; 2]; R]; 2];
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
            let mut part: [[Row; R]; 2] = [[[zero; 2]; R]; 2];
            // SAFETY: inputs q0..end are in the block and in `a` (the caller's check).
            unsafe { group_sums::<D, R>(t, &d, q0, end, None, true, &mut part) };
            for set in 0..2 {
                for i in 0..R {
                    for h in 0..2 {
                        acc[set][i][h] = match scales {
                            Some(s) => _mm256_fmadd_ps(part[set][i][h], s[h], acc[set][i][h]),
                            None => _mm256_add_ps(acc[set][i][h], part[set][i][h]),
                        };
                    }
                }
            }
        } else {
            // SAFETY: as above.
            unsafe { group_sums::<D, R>(t, &d, q0, end, scales, false, &mut acc) };
        }
        q0 = end;
    }
    if split {
        for i in 0..R {
            acc[0][i][0] = _mm256_add_ps(acc[0][i][0], acc[1][i][0]);
            acc[0][i][1] = _mm256_add_ps(acc[0][i][1], acc[1][i][1]);
        }
    }
    // SAFETY: as the caller's.
    unsafe { finish::<R>(t, c, acc[0]) }
}

/// Bytes ahead of the inputs being multiplied that [`group_sums`] fetches for few rows when
/// the tile has no next block to fetch (a whole panel as one block).
const FETCH_AHEAD: usize = 4096;

/// Inputs `q0..end` of one group into `sums`: each decoded vector (times `scales`, when
/// given) times each row's input; a pair's second input into `sums[1]` when `split`.
///
/// # Safety
/// AVX2, FMA and F16C are present; inputs `q0..end` are in the block and in `t.a` for every
/// row; [`Decode::group`] was called for their group.
#[target_feature(enable = "avx2,fma,f16c")]
#[inline]
#[allow(clippy::too_many_arguments)]
unsafe fn group_sums<D: Decode, const R: usize>(
    t: &Tile<'_>,
    d: &D,
    q0: usize,
    end: usize,
    scales: Option<Row>,
    split: bool,
    sums: &mut [[Row; R]; 2],
) {
    let pa = t.a.as_ptr();
    let (step, lda) = match t.lda {
        None => (R, 1),
        Some(lda) => (1, lda),
    };
    let scaled = |v: Row| {
        scales.map_or(v, |s| {
            [_mm256_mul_ps(v[0], s[0]), _mm256_mul_ps(v[1], s[1])]
        })
    };
    // A whole panel read as one block (decode) is one long stream: fetched ahead here, since
    // the hardware's prefetch alone leaves the few-rows tiles waiting on memory.
    let ahead = (split && t.next.is_none()).then(|| t.b.bytes().0);
    let mut q = q0;
    while q + 2 <= end {
        if let Some(base) = ahead {
            let at = q * D::BYTES + FETCH_AHEAD;
            for off in (0..2 * D::BYTES).step_by(64) {
                // A prefetch never faults; the address is computed without `add`. Past the
                // block it fetches the next panel, which the macro loop reads next.
                _mm_prefetch::<_MM_HINT_T0>(base.wrapping_add(at + off).cast());
            }
        }
        // SAFETY: q + 1 < end: in the block, and inputs q, q + 1 of every row are in `a`.
        unsafe {
            let w = d.pair(q / 2);
            for (s, ws) in w.iter().enumerate() {
                let ws = scaled(*ws);
                let set = if split { s } else { 0 };
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*pa.add((q + s) * step + i * lda));
                    sums[set][i][0] = _mm256_fmadd_ps(x, ws[0], sums[set][i][0]);
                    sums[set][i][1] = _mm256_fmadd_ps(x, ws[1], sums[set][i][1]);
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
                let x = _mm256_broadcast_ss(&*pa.add(q * step + i * lda));
                sums[0][i][0] = _mm256_fmadd_ps(x, w[0], sums[0][i][0]);
                sums[0][i][1] = _mm256_fmadd_ps(x, w[1], sums[0][i][1]);
            }
        }
    }
}

/// The end of every AVX2 tile: the low-rank steps in the same accumulators, then the bias and
/// (with `acc`) what `c` holds added, and the tile stored.
///
/// # Safety
/// AVX2 and FMA are present; `t.check` passed.
#[target_feature(enable = "avx2,fma,f16c")]
#[inline]
pub(super) unsafe fn finish<const R: usize>(t: &Tile<'_>, c: &mut [f32], mut sums: [Row; R]) {
    if let Some((z, zb, rank)) = t.low {
        let (pz, pzb) = (z.as_ptr(), zb.as_ptr());
        for q in 0..rank {
            // SAFETY: q < rank: z holds rank * R values and zb rank * 16 (checked).
            unsafe {
                let b0 = _mm256_loadu_ps(pzb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pzb.add(q * PANEL + 8));
                for (i, s) in sums.iter_mut().enumerate() {
                    let x = _mm256_broadcast_ss(&*pz.add(q * R + i));
                    s[0] = _mm256_fmadd_ps(x, b0, s[0]);
                    s[1] = _mm256_fmadd_ps(x, b1, s[1]);
                }
            }
        }
    }
    if t.cols < PANEL {
        let mut rows = [[0f32; PANEL]; R];
        for (row, s) in rows.iter_mut().zip(&sums) {
            // SAFETY: each row holds 16 floats.
            unsafe {
                _mm256_storeu_ps(row.as_mut_ptr(), s[0]);
                _mm256_storeu_ps(row.as_mut_ptr().add(8), s[1]);
            }
        }
        t.store_portable(&mut rows, c);
        return;
    }
    if let Some(bias) = t.bias {
        // SAFETY: bias holds cols = 16 values (checked).
        let (b0, b1) = unsafe {
            (
                _mm256_loadu_ps(bias.as_ptr()),
                _mm256_loadu_ps(bias.as_ptr().add(8)),
            )
        };
        for s in sums.iter_mut() {
            s[0] = _mm256_add_ps(s[0], b0);
            s[1] = _mm256_add_ps(s[1], b1);
        }
    }
    let pc = c.as_mut_ptr();
    for (i, s) in sums.iter().enumerate() {
        // SAFETY: (R - 1) * ldc + 16 <= c.len() (checked).
        unsafe {
            let d = pc.add(i * t.ldc);
            let (mut v0, mut v1) = (s[0], s[1]);
            if t.acc {
                v0 = _mm256_add_ps(v0, _mm256_loadu_ps(d));
                v1 = _mm256_add_ps(v1, _mm256_loadu_ps(d.add(8)));
            }
            _mm256_storeu_ps(d, v0);
            _mm256_storeu_ps(d.add(8), v1);
        }
    }
}

/// Runs a reduced-format tile for the tile's row count, after the bounds check.
macro_rules! reduced_run {
    ($decoder:expr, $t:expr, $c:expr) => {{
        $t.check($c, super::ROWS);
        #[target_feature(enable = "avx2,fma,f16c")]
        unsafe fn rows<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
            let (d, group) = $decoder(t);
            // SAFETY: the features are enabled here, the tile was checked, the decoder reads
            // the tile's block.
            unsafe { super::reduced_tile::<_, R>(t, c, d, group) }
        }
        // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when
        // the CPU has AVX2, FMA and F16C; the tile was checked just above.
        unsafe { for_rows!($t.rows, rows, $t, $c) }
    }};
}
pub(super) use reduced_run;
