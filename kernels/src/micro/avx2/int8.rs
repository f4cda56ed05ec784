//! The AVX2 int8 micro-kernel: 16 signed bytes per input widened to i32 and converted in
//! registers; the tile applies the group's scales (see `reduced_tile`).

use std::arch::x86_64::*;

use super::{Decode, Row, reduced_run};
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
            // SAFETY: all-zero bits are a valid __m256 (0.0 in every lane); `group` loads the
            // real scales before any use.
            s: unsafe { std::mem::zeroed() },
        },
        group,
    )
}

pub(super) struct Int8 {
    q: *const i8,
    scales: *const f32,
    /// The current group's 16 scales.
    s: Row,
}

impl Int8 {
    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn input(&self, q: usize) -> Row {
        // SAFETY: the block holds input q: 16 bytes (the caller's contract).
        let (b0, b1) = unsafe {
            (
                _mm_loadl_epi64(self.q.add(q * PANEL).cast()),
                _mm_loadl_epi64(self.q.add(q * PANEL + 8).cast()),
            )
        };
        [
            _mm256_cvtepi32_ps(_mm256_cvtepi8_epi32(b0)),
            _mm256_cvtepi32_ps(_mm256_cvtepi8_epi32(b1)),
        ]
    }
}

impl Decode for Int8 {
    const BYTES: usize = 16;

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn group(&mut self, g: usize) {
        // SAFETY: the block holds group g's 16 scales (the caller's contract).
        unsafe {
            self.s = [
                _mm256_loadu_ps(self.scales.add(g * PANEL)),
                _mm256_loadu_ps(self.scales.add(g * PANEL + 8)),
            ];
        }
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn pair(&self, j: usize) -> [Row; 2] {
        // SAFETY: the block holds inputs 2j and 2j + 1 (the caller's contract).
        unsafe { [self.input(2 * j), self.input(2 * j + 1)] }
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn first(&self, j: usize) -> Row {
        // SAFETY: the block holds input 2j (the caller's contract).
        unsafe { self.input(2 * j) }
    }
    #[inline(always)]
    unsafe fn scales(&self) -> Option<Row> {
        Some(self.s)
    }
}
