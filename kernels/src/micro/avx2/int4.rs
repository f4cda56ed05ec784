//! The AVX2 int4 micro-kernel: each byte holds two inputs' 4-bit values (low nibble first),
//! widened to i32, less the group's zero point (8 when symmetric) and converted in registers;
//! the tile applies the group's scales (see `reduced_tile`).

use std::arch::x86_64::*;

use super::{Decode, Row, reduced_run};
use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL, ScaleSlice};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    reduced_run!(decoder, t, c)
}

fn decoder(t: &Tile<'_>) -> (Int4, usize) {
    let Block::Int4 {
        q,
        scales,
        zeros,
        group,
    } = t.b
    else {
        unreachable!("the int4 kernel got another format")
    };
    let (s32, s16) = match scales {
        ScaleSlice::F32(s) => (s.as_ptr(), std::ptr::null()),
        ScaleSlice::F16(s) => (std::ptr::null(), s.as_ptr()),
    };
    (
        Int4 {
            q: q.as_ptr(),
            s32,
            s16,
            zeros: zeros.map_or(std::ptr::null(), <[u8]>::as_ptr),
            // SAFETY: all-zero bits are valid vectors; `group` loads the real ones before use.
            s: unsafe { std::mem::zeroed() },
            z: unsafe { std::mem::zeroed() },
        },
        group,
    )
}

pub(super) struct Int4 {
    q: *const u8,
    /// The scales, f32 or f16 (the other null).
    s32: *const f32,
    s16: *const u16,
    /// Null when symmetric.
    zeros: *const u8,
    /// The current group's scales and zero points.
    s: Row,
    z: [__m256i; 2],
}

impl Int4 {
    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn nibbles(&self, v: [__m256i; 2]) -> Row {
        [
            _mm256_cvtepi32_ps(_mm256_sub_epi32(v[0], self.z[0])),
            _mm256_cvtepi32_ps(_mm256_sub_epi32(v[1], self.z[1])),
        ]
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn bytes(&self, j: usize) -> [__m256i; 2] {
        // SAFETY: the block holds pair j: 16 bytes (the caller's contract).
        unsafe {
            [
                _mm256_cvtepu8_epi32(_mm_loadl_epi64(self.q.add(j * PANEL).cast())),
                _mm256_cvtepu8_epi32(_mm_loadl_epi64(self.q.add(j * PANEL + 8).cast())),
            ]
        }
    }
}

impl Decode for Int4 {
    const BYTES: usize = 8;

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn group(&mut self, g: usize) {
        // SAFETY: the block holds group g's 16 scales and zero points (the caller's contract).
        unsafe {
            self.s = if self.s16.is_null() {
                [
                    _mm256_loadu_ps(self.s32.add(g * PANEL)),
                    _mm256_loadu_ps(self.s32.add(g * PANEL + 8)),
                ]
            } else {
                [
                    _mm256_cvtph_ps(_mm_loadu_si128(self.s16.add(g * PANEL).cast())),
                    _mm256_cvtph_ps(_mm_loadu_si128(self.s16.add(g * PANEL + 8).cast())),
                ]
            };
            self.z = if self.zeros.is_null() {
                [_mm256_set1_epi32(8); 2]
            } else {
                [
                    _mm256_cvtepu8_epi32(_mm_loadl_epi64(self.zeros.add(g * PANEL).cast())),
                    _mm256_cvtepu8_epi32(_mm_loadl_epi64(self.zeros.add(g * PANEL + 8).cast())),
                ]
            };
        }
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn pair(&self, j: usize) -> [Row; 2] {
        // SAFETY: the block holds pair j (the caller's contract).
        let v = unsafe { self.bytes(j) };
        let low = _mm256_set1_epi32(15);
        // SAFETY: register arithmetic only.
        unsafe {
            [
                self.nibbles([_mm256_and_si256(v[0], low), _mm256_and_si256(v[1], low)]),
                self.nibbles([_mm256_srli_epi32::<4>(v[0]), _mm256_srli_epi32::<4>(v[1])]),
            ]
        }
    }

    #[target_feature(enable = "avx2,fma,f16c")]
    #[inline]
    unsafe fn first(&self, j: usize) -> Row {
        // SAFETY: the block holds pair j (the caller's contract).
        let v = unsafe { self.bytes(j) };
        let low = _mm256_set1_epi32(15);
        // SAFETY: register arithmetic only.
        unsafe { self.nibbles([_mm256_and_si256(v[0], low), _mm256_and_si256(v[1], low)]) }
    }
    #[inline(always)]
    unsafe fn scales(&self) -> Option<Row> {
        Some(self.s)
    }
}
