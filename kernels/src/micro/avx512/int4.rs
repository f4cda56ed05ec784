//! The AVX-512F int4 micro-kernel: each byte holds two inputs' 4-bit values (low nibble
//! first), widened to i32, less the group's zero point (8 when symmetric) and converted, in
//! registers; the tile applies the group's scales (see `reduced_tile`).

use std::arch::x86_64::*;

use super::{Decode, reduced_run};
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
    s: __m512,
    z: __m512i,
}

impl Int4 {
    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn value(&self, nibbles: __m512i) -> __m512 {
        _mm512_cvtepi32_ps(_mm512_sub_epi32(nibbles, self.z))
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn bytes(&self, j: usize) -> __m512i {
        // SAFETY: the block holds pair j: 16 bytes (the caller's contract).
        unsafe { _mm512_cvtepu8_epi32(_mm_loadu_si128(self.q.add(j * PANEL).cast())) }
    }
}

impl Decode for Int4 {
    const BYTES: usize = 8;

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn group(&mut self, g: usize) {
        // SAFETY: the block holds group g's 16 scales and zero points (the caller's contract).
        unsafe {
            self.s = if self.s16.is_null() {
                _mm512_loadu_ps(self.s32.add(g * PANEL))
            } else {
                _mm512_cvtph_ps(_mm256_loadu_si256(self.s16.add(g * PANEL).cast()))
            };
            self.z = if self.zeros.is_null() {
                _mm512_set1_epi32(8)
            } else {
                _mm512_cvtepu8_epi32(_mm_loadu_si128(self.zeros.add(g * PANEL).cast()))
            };
        }
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn pair(&self, j: usize) -> [__m512; 2] {
        // SAFETY: the block holds pair j (the caller's contract); the rest is registers.
        unsafe {
            let v = self.bytes(j);
            [
                self.value(_mm512_and_si512(v, _mm512_set1_epi32(15))),
                self.value(_mm512_srli_epi32::<4>(v)),
            ]
        }
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn first(&self, j: usize) -> __m512 {
        // SAFETY: as for `pair`.
        unsafe { self.value(_mm512_and_si512(self.bytes(j), _mm512_set1_epi32(15))) }
    }

    #[inline(always)]
    unsafe fn scales(&self) -> Option<__m512> {
        Some(self.s)
    }
}
