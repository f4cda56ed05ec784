//! The AVX-512-VNNI int8 micro-kernel. A block stores 16 signed bytes per input (one per
//! column), so four inputs' 64 bytes hold a quad for every column: one `vpermb` gathers column
//! c's four bytes into lane c in the quads' order (inputs `4u`, `4u + 2`, `4u + 1`, `4u + 3`),
//! and flipping each byte's top bit makes it the unsigned value plus 128 that `vpdpbusd` takes
//! (the shared loop takes `z = 128` off each group's sum). Two instructions for 64 weights and
//! one row, against twelve on `avx512`.

use std::arch::x86_64::*;

use super::QuadDecode;
use crate::micro::Tile;
use crate::pack::{Block, PANEL};

/// The `vpermb` indices that put bytes `c`, `32 + c`, `16 + c` and `48 + c` (inputs 0, 2, 1
/// and 3 of the quad, column c) into lane c.
const fn pick() -> [u8; 64] {
    let mut idx = [0u8; 64];
    let mut c = 0;
    while c < 16 {
        idx[4 * c] = c as u8;
        idx[4 * c + 1] = (32 + c) as u8;
        idx[4 * c + 2] = (16 + c) as u8;
        idx[4 * c + 3] = (48 + c) as u8;
        c += 1;
    }
    idx
}

const PICK: [u8; 64] = pick();

/// An int8 block, read a quad of inputs at a time.
pub(super) struct Int8<'a> {
    q: *const i8,
    scales: &'a [f32],
    group: usize,
    pick: __m512i,
}

impl<'a> Int8<'a> {
    /// # Safety
    /// AVX-512F is present.
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn new(t: &Tile<'a>) -> Self {
        let Block::Int8 { q, scales, group } = t.b else {
            unreachable!("the int8 kernel got another format")
        };
        Int8 {
            q: q.as_ptr(),
            scales,
            group,
            // SAFETY: 64 bytes, one vector.
            pick: unsafe { _mm512_loadu_si512(PICK.as_ptr().cast()) },
        }
    }

    /// Lane c's four bytes of `l` (quad u's 64 bytes), as unsigned values plus 128.
    #[target_feature(enable = "avx512vbmi,avx512bw,avx512f")]
    #[inline]
    fn gather(&self, l: __m512i) -> __m512i {
        _mm512_xor_si512(
            _mm512_permutexvar_epi8(self.pick, l),
            _mm512_set1_epi8(-128),
        )
    }
}

impl QuadDecode for Int8<'_> {
    const QUAD_BYTES: usize = 4 * PANEL;

    fn weight_group(&self) -> usize {
        self.group
    }

    fn base(&self) -> *const u8 {
        self.q.cast()
    }

    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn group(&self, gw: usize) -> (__m512, __m512) {
        // SAFETY: the block holds weight group gw's 16 scales (the caller's contract). The
        // offset is 128, the unsigned values' shift.
        unsafe {
            (
                _mm512_loadu_ps(self.scales.as_ptr().add(gw * PANEL)),
                _mm512_set1_ps(128.0),
            )
        }
    }

    #[target_feature(enable = "avx512vbmi,avx512bw,avx512f")]
    #[inline]
    unsafe fn two(&self, u: usize) -> [__m512i; 2] {
        // SAFETY: inputs 4u..4u + 8 (128 bytes) are in the block (the caller's contract).
        unsafe {
            [
                self.gather(_mm512_loadu_si512(self.q.add(4 * u * PANEL).cast())),
                self.gather(_mm512_loadu_si512(self.q.add((4 * u + 4) * PANEL).cast())),
            ]
        }
    }

    #[target_feature(enable = "avx512vbmi,avx512bw,avx512f")]
    #[inline]
    unsafe fn one(&self, u: usize, n: usize) -> __m512i {
        // Only the n inputs' bytes are read; the rest are zero (and the rows' inputs there too).
        let mask: __mmask64 = if n >= 4 {
            u64::MAX
        } else {
            (1u64 << (n * PANEL)) - 1
        };
        // SAFETY: inputs 4u..4u + n are in the block (the caller's contract); masked bytes are
        // not read.
        unsafe {
            self.gather(_mm512_maskz_loadu_epi8(
                mask,
                self.q.add(4 * u * PANEL).cast(),
            ))
        }
    }
}
