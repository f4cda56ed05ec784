//! The AVX2 bf16 micro-kernel: each pair word holds two inputs' bf16 values, which become f32
//! by a shift (the low half) and a mask (the high half), in registers.

use std::arch::x86_64::*;

use super::{Decode, Row, reduced_run};
use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    reduced_run!(decoder, t, c)
}

fn decoder(t: &Tile<'_>) -> (Bf16, usize) {
    let Block::Bf16(b) = t.b else {
        unreachable!("the bf16 kernel got another format")
    };
    (Bf16 { b: b.as_ptr() }, usize::MAX)
}

pub(super) struct Bf16 {
    b: *const u32,
}

impl Decode for Bf16 {
    const BYTES: usize = 32;

    #[inline(always)]
    unsafe fn group(&mut self, _g: usize) {}

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn pair(&self, j: usize) -> [Row; 2] {
        // SAFETY: the block holds pair j: 16 words (the caller's contract).
        let (v0, v1) = unsafe {
            (
                _mm256_loadu_si256(self.b.add(j * PANEL).cast()),
                _mm256_loadu_si256(self.b.add(j * PANEL + 8).cast()),
            )
        };
        let high = _mm256_set1_epi32(0xffff_0000u32 as i32);
        [
            [
                _mm256_castsi256_ps(_mm256_slli_epi32::<16>(v0)),
                _mm256_castsi256_ps(_mm256_slli_epi32::<16>(v1)),
            ],
            [
                _mm256_castsi256_ps(_mm256_and_si256(v0, high)),
                _mm256_castsi256_ps(_mm256_and_si256(v1, high)),
            ],
        ]
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn first(&self, j: usize) -> Row {
        // SAFETY: as for `pair`.
        unsafe { self.pair(j)[0] }
    }
    #[inline(always)]
    unsafe fn scales(&self) -> Option<Row> {
        None
    }
}
