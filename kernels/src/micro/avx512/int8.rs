//! The AVX-512F int8 micro-kernel: 16 signed bytes per input widened to i32 and converted in
//! registers; the tile applies the group's scales (see `reduced_tile`).

use std::arch::x86_64::*;

use super::{Decode, reduced_run};
use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    reduced_run!(decoder, t, c)
}

fn decoder(t: &Tile<'_>) -> (Int8, usize) {
    let Block::Int8 { q, scales, group } = t.b else {
        unreachable!("the int8 kernel got another format")
    };
    (
        Int8 {
            q: q.as_ptr(),
            scales: scales.as_ptr(),
            // SAFETY: all-zero bits are a valid vector; `group` loads the scales before use.
            s: unsafe { std::mem::zeroed() },
        },
        group,
    )
}

pub(super) struct Int8 {
    q: *const i8,
    scales: *const f32,
    /// The current group's 16 scales.
    s: __m512,
}

impl Int8 {
    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn input(&self, q: usize) -> __m512 {
        // SAFETY: the block holds input q: 16 bytes (the caller's contract).
        let b = unsafe { _mm_loadu_si128(self.q.add(q * PANEL).cast()) };
        _mm512_cvtepi32_ps(_mm512_cvtepi8_epi32(b))
    }
}

impl Decode for Int8 {
    const BYTES: usize = 16;

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn group(&mut self, g: usize) {
        // SAFETY: the block holds group g's 16 scales (the caller's contract).
        self.s = unsafe { _mm512_loadu_ps(self.scales.add(g * PANEL)) };
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn pair(&self, j: usize) -> [__m512; 2] {
        // SAFETY: the block holds inputs 2j and 2j + 1 (the caller's contract).
        unsafe { [self.input(2 * j), self.input(2 * j + 1)] }
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn first(&self, j: usize) -> __m512 {
        // SAFETY: the block holds input 2j (the caller's contract).
        unsafe { self.input(2 * j) }
    }

    #[inline(always)]
    unsafe fn scales(&self) -> Option<__m512> {
        Some(self.s)
    }
}
