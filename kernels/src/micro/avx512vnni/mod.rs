//! The AVX-512-VNNI micro-kernels: `vpdpbusd` multiplies four unsigned bytes by four signed
//! bytes in each of 16 lanes and adds the four products to the lane's 32-bit sum, 64
//! multiply-adds per instruction (an f32 fused multiply-add does 16). The weight side is an
//! int4 weight's stored values (0..=15), widened in registers ([`int4`]); the input side is
//! each row rounded to int8 in groups of 32 inputs by the macro loop (the kernel reads
//! [`Tile::quads`]), which is where this path differs numerically from the others.
//!
//! Everything here is intrinsics on raw pointers: each `unsafe` block says what bounds it, and
//! the kernel is handed out only where the CPU has the features (`dispatch::micro_kernel`).
#![allow(unsafe_code)]
// Register tiles are indexed by row on purpose: with `R` a constant the loops unroll and the
// accumulators stay in registers.
#![allow(clippy::needless_range_loop)]

mod int4;

use super::avx512::ROWS;
use super::{Inputs, MicroKernel, Tile, for_rows};
use crate::pack::rows::INPUT_GROUP;
use int4::rows as int4_rows;

/// int4 weights against int8 rows.
pub(crate) const INT4: MicroKernel = MicroKernel {
    rows: ROWS,
    run: run_int4,
    inputs: Inputs::Int8Groups,
};

fn run_int4(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, ROWS);
    // The kernel reads the rows' int8 groups only.
    let groups = t.kb.div_ceil(INPUT_GROUP);
    assert!(
        groups * INPUT_GROUP / 4 * t.rows <= t.quads.q.len()
            && groups * t.rows <= t.quads.scales.len()
            && groups * t.rows <= t.quads.sums.len(),
        "tile outside its slices"
    );
    // SAFETY: only reached through dispatch::micro_kernel, which hands this kernel out when the
    // CPU has AVX-512F, AVX-512BW, AVX-512-VBMI and AVX-512-VNNI; the tile was checked just
    // above.
    unsafe { for_rows!(t.rows, int4_rows, t, c) }
}
