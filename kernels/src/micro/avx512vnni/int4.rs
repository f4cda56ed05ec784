//! The AVX-512-VNNI int4 micro-kernel. A block stores, for each pair of inputs and each of its
//! 16 columns, one byte: input `2j` in the low nibble, `2j + 1` in the high one, as unsigned
//! values 0..=15 (the symmetric format's `q + 8`, or `q` beside a zero point `z`). Two pairs'
//! bytes, widened to one 32-bit lane per column (`w = b[2u] | b[2u + 1] << 8`), become the four
//! bytes `(w | w << 12) & 0x0f0f0f0f`: inputs `4u`, `4u + 2`, `4u + 1`, `4u + 3`, the order in
//! which the macro loop lays out each row's int8 quads. One `vpdpbusd` per row then adds the
//! four products to the column's 32-bit sum. Four pairs' 64 bytes are read at once and one
//! `vpermb` (AVX-512-VBMI) per two pairs gathers each column's two bytes into its lane: with
//! the shift and the masking, four instructions for 64 weights and one row, against eighteen on
//! `avx512`.
//!
//! The zero point (8 when symmetric) comes off each group's sum in the shared loop
//! (`quad_tile`).

use std::arch::x86_64::*;

use super::{QuadDecode, nibble_quads};
use crate::micro::Tile;
use crate::pack::{Block, PANEL, ScaleSlice};

/// The `vpermb` indices that gather, for lane c, byte `16 p + c` into byte 0 and byte
/// `16 (p + 1) + c` into byte 1 (bytes 2 and 3 are zeroed by the mask).
const fn pick(p: usize) -> [u8; 64] {
    let mut idx = [0u8; 64];
    let mut c = 0;
    while c < 16 {
        idx[4 * c] = (16 * p + c) as u8;
        idx[4 * c + 1] = (16 * (p + 1) + c) as u8;
        c += 1;
    }
    idx
}

const PICK_FIRST: [u8; 64] = pick(0);
const PICK_SECOND: [u8; 64] = pick(2);
/// The low two bytes of every lane.
const LOW_TWO: u64 = 0x3333_3333_3333_3333;

/// An int4 block, read a quad of inputs at a time.
pub(super) struct Int4<'a> {
    q: *const u8,
    scales: ScaleSlice<'a>,
    zeros: Option<&'a [u8]>,
    group: usize,
    first: __m512i,
    second: __m512i,
}

impl<'a> Int4<'a> {
    /// # Safety
    /// AVX-512F is present.
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn new(t: &Tile<'a>) -> Self {
        let Block::Int4 {
            q,
            scales,
            zeros,
            group,
        } = t.b
        else {
            unreachable!("the int4 kernel got another format")
        };
        // SAFETY: 64 bytes each, one vector.
        let (first, second) = unsafe {
            (
                _mm512_loadu_si512(PICK_FIRST.as_ptr().cast()),
                _mm512_loadu_si512(PICK_SECOND.as_ptr().cast()),
            )
        };
        Int4 {
            q: q.as_ptr(),
            scales,
            zeros,
            group,
            first,
            second,
        }
    }
}

impl QuadDecode for Int4<'_> {
    const QUAD_BYTES: usize = 2 * PANEL;

    fn weight_group(&self) -> usize {
        self.group
    }

    fn base(&self) -> *const u8 {
        self.q
    }

    #[target_feature(enable = "avx512f,avx2,fma,f16c")]
    #[inline]
    unsafe fn group(&self, gw: usize) -> (__m512, __m512) {
        // SAFETY: the block holds weight group gw's 16 scales and zero points (the caller's
        // contract).
        unsafe {
            let s = match self.scales {
                ScaleSlice::F32(s) => _mm512_loadu_ps(s.as_ptr().add(gw * PANEL)),
                ScaleSlice::F16(s) => {
                    _mm512_cvtph_ps(_mm256_loadu_si256(s.as_ptr().add(gw * PANEL).cast()))
                }
            };
            // Symmetric weights are stored plus 8.
            let z = match self.zeros {
                Some(z) => {
                    let z = _mm_loadu_si128(z.as_ptr().add(gw * PANEL).cast());
                    _mm512_cvtepi32_ps(_mm512_cvtepu8_epi32(z))
                }
                None => _mm512_set1_ps(8.0),
            };
            (s, z)
        }
    }

    #[target_feature(enable = "avx512vbmi,avx512bw,avx512f")]
    #[inline]
    unsafe fn two(&self, u: usize) -> [__m512i; 2] {
        // SAFETY: pairs 2u..2u + 4 of the block (64 bytes) are in it (the caller's contract).
        unsafe {
            let l = _mm512_loadu_si512(self.q.add(2 * u * PANEL).cast());
            [
                nibble_quads(_mm512_maskz_permutexvar_epi8(LOW_TWO, self.first, l)),
                nibble_quads(_mm512_maskz_permutexvar_epi8(LOW_TWO, self.second, l)),
            ]
        }
    }

    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn one(&self, u: usize, n: usize) -> __m512i {
        // SAFETY: pair 2u, and pair 2u + 1 when n > 2, are in the block (the caller's
        // contract: n of the quad's inputs are).
        unsafe {
            let d0 = _mm512_cvtepu8_epi32(_mm_loadu_si128(self.q.add(2 * u * PANEL).cast()));
            let w = if n > 2 {
                let d1 =
                    _mm512_cvtepu8_epi32(_mm_loadu_si128(self.q.add((2 * u + 1) * PANEL).cast()));
                _mm512_or_si512(d0, _mm512_slli_epi32::<8>(d1))
            } else {
                d0
            };
            nibble_quads(w)
        }
    }
}
