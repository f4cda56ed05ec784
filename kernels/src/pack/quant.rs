//! The exact rounding rules of the reduced-precision formats, written so that a Python
//! reference (numpy float32 arithmetic) reproduces them bit for bit:
//!
//! - **bf16**: the f32 value rounded to its top 16 bits, to nearest with ties to even (what
//!   `torch.Tensor.to(torch.bfloat16)` does); NaN stays NaN.
//! - **f16 scales**: IEEE binary16, to nearest with ties to even (`numpy.float16(x)`).
//! - **int8** (symmetric), per group of values `w` (one output row, or one run of inputs of
//!   one row): `amax = max |w|`, `s = amax / 127` (an f32 division), `q = clamp(rint(w / s),
//!   -127, 127)` where `w / s` is an f32 division and `rint` rounds half to even (`numpy.rint`);
//!   the value stands for `f32(q) * s`. A group of zeros has `s = 0` and `q = 0`.
//! - **int4, symmetric**: `s = amax / 7` (rounded to f16 first when the scales are f16, and
//!   every later step uses that rounded scale), `q = clamp(rint(w / s), -8, 7)`, stored as
//!   `q + 8` in 4 bits; the value stands for `f32((q + 8) - 8) * s`.
//! - **int4 with a zero point**: `lo = min(min w, 0)`, `hi = max(max w, 0)` (so zero is always
//!   exact), `s = (hi - lo) / 15` (rounded to f16 when the scales are f16), `z = clamp(rint(-lo
//!   / s), 0, 15)`, `q = clamp(rint(w / s) + z, 0, 15)`; the value stands for `f32(q - z) * s`.
//!   A group of zeros has `s = 0`, `z = 0`, `q = 0`.
//!
//! In every integer format the dequantised value is one f32 multiplication of an exact small
//! integer by the scale, the same on every path.

/// A value the quantisation cannot represent.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum QuantError {
    #[error("weight value {value} at row {row}, input {input} is not finite")]
    NotFinite {
        value: f32,
        row: usize,
        input: usize,
    },
    #[error("the scale {scale} of row {row}, inputs from {input}, does not fit an f16 scale")]
    ScaleOverflow {
        scale: f32,
        row: usize,
        input: usize,
    },
}

/// f32 to bf16 bits, to nearest with ties to even; NaN stays a (quiet) NaN.
pub fn bf16_from_f32(x: f32) -> u16 {
    let bits = x.to_bits();
    if x.is_nan() {
        return ((bits >> 16) as u16) | 0x40;
    }
    let round = 0x7fff + ((bits >> 16) & 1);
    (bits.wrapping_add(round) >> 16) as u16
}

/// bf16 bits to f32 (exact).
pub fn bf16_to_f32(b: u16) -> f32 {
    f32::from_bits((b as u32) << 16)
}

/// f32 to IEEE half-precision bits, to nearest with ties to even (overflow gives infinity,
/// tiny values become subnormal halves or zero).
pub fn f16_from_f32(x: f32) -> u16 {
    let bits = x.to_bits();
    let sign = ((bits >> 16) & 0x8000) as u16;
    let exp = ((bits >> 23) & 0xff) as i32;
    let man = bits & 0x7f_ffff;
    if exp == 0xff {
        return sign | 0x7c00 | if man != 0 { 0x200 } else { 0 };
    }
    let e = exp - 127 + 15;
    if e >= 0x1f {
        return sign | 0x7c00;
    }
    if e <= 0 {
        if e < -10 {
            return sign;
        }
        // Subnormal: the implicit bit joins the mantissa, shifted into place, rounded to even.
        let m = man | 0x80_0000;
        let shift = (14 - e) as u32;
        let half = 1u32 << (shift - 1);
        let rest = m & ((1 << shift) - 1);
        let mut h = m >> shift;
        if rest > half || (rest == half && h & 1 == 1) {
            h += 1;
        }
        return sign | h as u16;
    }
    let mut h = ((e as u32) << 10) | (man >> 13);
    let rest = man & 0x1fff;
    if rest > 0x1000 || (rest == 0x1000 && h & 1 == 1) {
        // A carry out of the mantissa steps the exponent, which is still the right value.
        h += 1;
    }
    sign | h as u16
}

/// IEEE half-precision bits to f32 (exact).
pub fn f16_to_f32(h: u16) -> f32 {
    let sign = ((h & 0x8000) as u32) << 16;
    let exp = ((h >> 10) & 0x1f) as u32;
    let man = (h & 0x3ff) as u32;
    let bits = match (exp, man) {
        (0, 0) => sign,
        (0, _) => {
            // Subnormal: man * 2^-24, exact in f32.
            let v = man as f32 * f32::from_bits(0x3380_0000);
            return if sign != 0 { -v } else { v };
        }
        (0x1f, _) => sign | 0x7f80_0000 | (man << 13),
        _ => sign | ((exp + 127 - 15) << 23) | (man << 13),
    };
    f32::from_bits(bits)
}

/// Rounds to the nearest integer, ties to even: `f32::round_ties_even` (numpy's `rint`), written
/// so that it compiles to two additions on any x86-64 (the baseline target has no rounding
/// instruction, and the library call costs more than the rest of the quantisation). Adding
/// 1.5 * 2^23 puts a value below 2^22 in magnitude where the spacing of f32 is 1, so the
/// addition itself rounds to nearest even, and the subtraction is exact. Larger values (never
/// met by the quantisers, whose quotients are at most 127) take the library call.
#[inline(always)]
fn rint(x: f32) -> f32 {
    const MAGIC: f32 = 12_582_912.0;
    if x.abs() < 4_194_304.0 {
        (x + MAGIC) - MAGIC
    } else {
        x.round_ties_even()
    }
}

/// How a checkpoint stores floating-point values: what a loader converts from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stored {
    F32,
    F16,
    Bf16,
}

impl Stored {
    /// Bytes per value.
    pub fn size(self) -> usize {
        match self {
            Stored::F32 => 4,
            Stored::F16 | Stored::Bf16 => 2,
        }
    }

    /// Little-endian stored values to f32 (exact in all three), as many as `out` holds.
    pub fn decode_le(self, bytes: &[u8], out: &mut [f32]) {
        assert!(bytes.len() >= out.len() * self.size(), "too few bytes");
        #[cfg(target_arch = "x86_64")]
        if avx2() {
            // SAFETY: the CPU has AVX2 and FMA (checked by avx2()).
            #[allow(unsafe_code)]
            unsafe {
                return decode_le_avx2(self, bytes, out);
            }
        }
        self.decode_le_body(bytes, out)
    }

    /// The loops of [`Stored::decode_le`], compiled for the baseline or (through
    /// `decode_le_avx2`) for AVX2, where they vectorise.
    #[inline(always)]
    fn decode_le_body(self, bytes: &[u8], out: &mut [f32]) {
        match self {
            Stored::F32 => {
                for (d, b) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *d = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
                }
            }
            Stored::Bf16 => {
                for (d, b) in out.iter_mut().zip(bytes.chunks_exact(2)) {
                    *d = bf16_to_f32(u16::from_le_bytes([b[0], b[1]]));
                }
            }
            Stored::F16 => {
                for (d, b) in out.iter_mut().zip(bytes.chunks_exact(2)) {
                    *d = f16_to_f32(u16::from_le_bytes([b[0], b[1]]));
                }
            }
        }
    }
}

/// Whether the load-time conversions run their AVX2 builds: the same operations (division,
/// rounding to nearest even, clamping, exact conversions), so the same values, only
/// vectorised; the baseline build calls the library's `rintf` once per value.
#[cfg(target_arch = "x86_64")]
fn avx2() -> bool {
    crate::dispatch::active() >= crate::Path::Avx2
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn decode_le_avx2(stored: Stored, bytes: &[u8], out: &mut [f32]) {
    stored.decode_le_body(bytes, out)
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn quantise_int8_avx2(w: &[f32], q: &mut [i8]) -> f32 {
    quantise_int8_body(w, q)
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn quantise_int4_avx2(
    w: &[f32],
    q: &mut [u8],
    zero_point: bool,
    f16: bool,
) -> Option<(f32, u16, u8)> {
    quantise_int4_body(w, q, zero_point, f16)
}

/// The largest magnitude (the values are finite: the packer refuses others first), with eight
/// running maxima so the loop vectorises; the same value as a plain fold.
#[inline(always)]
fn amax(w: &[f32]) -> f32 {
    let mut m = [0f32; 8];
    let mut chunks = w.chunks_exact(8);
    for c in &mut chunks {
        for (m, v) in m.iter_mut().zip(c) {
            let a = v.abs();
            *m = if a > *m { a } else { *m };
        }
    }
    let tail = chunks.remainder().iter().fold(0f32, |m, v| m.max(v.abs()));
    m.iter().fold(tail, |a, &b| a.max(b))
}

/// One group of int8 values: the scale and `q` (see the module doc).
pub fn quantise_int8(w: &[f32], q: &mut [i8]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    if avx2() {
        // SAFETY: the CPU has AVX2 and FMA (checked by avx2()).
        #[allow(unsafe_code)]
        unsafe {
            return quantise_int8_avx2(w, q);
        }
    }
    quantise_int8_body(w, q)
}

#[inline(always)]
fn quantise_int8_body(w: &[f32], q: &mut [i8]) -> f32 {
    let s = amax(w) / 127.0;
    if s == 0.0 {
        q.iter_mut().take(w.len()).for_each(|d| *d = 0);
        return s;
    }
    for (d, &v) in q.iter_mut().zip(w) {
        *d = rint(v / s).clamp(-127.0, 127.0) as i8;
    }
    s
}

/// The scale as stored: as it is in f32, or rounded to f16 (`None` when it overflows f16).
fn stored_scale(s: f32, f16: bool) -> Option<(f32, u16)> {
    if !f16 {
        return Some((s, 0));
    }
    let h = f16_from_f32(s);
    let back = f16_to_f32(h);
    back.is_finite().then_some((back, h))
}

/// One group of int4 values as unsigned 4-bit numbers (symmetric: `q + 8`): the scale as an
/// f32 (already rounded to f16 when `f16`), its f16 bits, and the zero point (8 when
/// symmetric). `None` when the scale overflows f16.
pub fn quantise_int4(
    w: &[f32],
    q: &mut [u8],
    zero_point: bool,
    f16: bool,
) -> Option<(f32, u16, u8)> {
    #[cfg(target_arch = "x86_64")]
    if avx2() {
        // SAFETY: the CPU has AVX2 and FMA (checked by avx2()).
        #[allow(unsafe_code)]
        unsafe {
            return quantise_int4_avx2(w, q, zero_point, f16);
        }
    }
    quantise_int4_body(w, q, zero_point, f16)
}

#[inline(always)]
fn quantise_int4_body(
    w: &[f32],
    q: &mut [u8],
    zero_point: bool,
    f16: bool,
) -> Option<(f32, u16, u8)> {
    if zero_point {
        let lo = w.iter().fold(0f32, |m, &v| m.min(v));
        let hi = w.iter().fold(0f32, |m, &v| m.max(v));
        let (s, h) = stored_scale((hi - lo) / 15.0, f16)?;
        if s == 0.0 {
            q.iter_mut().for_each(|d| *d = 0);
            return Some((s, h, 0));
        }
        let z = rint(-lo / s).clamp(0.0, 15.0);
        for (d, &v) in q.iter_mut().zip(w) {
            *d = (rint(v / s) + z).clamp(0.0, 15.0) as u8;
        }
        Some((s, h, z as u8))
    } else {
        let (s, h) = stored_scale(amax(w) / 7.0, f16)?;
        if s == 0.0 {
            q.iter_mut().take(w.len()).for_each(|d| *d = 8);
            return Some((s, h, 8));
        }
        for (d, &v) in q.iter_mut().zip(w) {
            *d = (rint(v / s).clamp(-8.0, 7.0) + 8.0) as u8;
        }
        Some((s, h, 8))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bf16_rounds_to_nearest_even_like_torch() {
        // 1 + 2^-8 is exactly between 1 and 1 + 2^-7: ties to the even one, 1.
        assert_eq!(bf16_to_f32(bf16_from_f32(1.0 + 1.0 / 256.0)), 1.0);
        // 1 + 3 * 2^-8 is between 1 + 2^-7 and 1 + 2^-6: ties to the even one, 1 + 2^-6.
        assert_eq!(
            bf16_to_f32(bf16_from_f32(1.0 + 3.0 / 256.0)),
            1.0 + 1.0 / 64.0
        );
        assert_eq!(bf16_to_f32(bf16_from_f32(-2.5)), -2.5);
        assert!(bf16_to_f32(bf16_from_f32(f32::NAN)).is_nan());
        assert_eq!(bf16_to_f32(bf16_from_f32(f32::INFINITY)), f32::INFINITY);
    }

    #[test]
    fn f16_round_trips_every_half_and_rounds_ties_to_even() {
        for h in 0..=u16::MAX {
            let x = f16_to_f32(h);
            if x.is_nan() {
                assert!(f16_to_f32(f16_from_f32(x)).is_nan());
            } else {
                assert_eq!(f16_from_f32(x), h, "half {h:#06x} = {x}");
            }
        }
        // 2049 is between the halves 2048 and 2050: ties to even, 2048; 2051 to 2052.
        assert_eq!(f16_to_f32(f16_from_f32(2049.0)), 2048.0);
        assert_eq!(f16_to_f32(f16_from_f32(2051.0)), 2052.0);
        assert_eq!(f16_to_f32(f16_from_f32(1e6)), f32::INFINITY);
        // The smallest subnormal half, 2^-24, and half of it rounding to zero (a tie, to even).
        assert_eq!(f16_to_f32(f16_from_f32(2f32.powi(-24))), 2f32.powi(-24));
        assert_eq!(f16_from_f32(2f32.powi(-25)), 0);
    }

    #[test]
    fn rint_rounds_half_to_even_like_the_library_function() {
        let mut x = 0x2545_f491u32;
        for i in 0..200_000 {
            x ^= x << 13;
            x ^= x >> 17;
            x ^= x << 5;
            // Halves and near-halves in every range the quantisers use, and far beyond it.
            let v = match i % 4 {
                0 => (x % 400) as f32 * 0.5 - 100.0,
                1 => f32::from_bits(x) % 1e3,
                2 => (x as f32 / u32::MAX as f32 - 0.5) * 300.0,
                _ => f32::from_bits(x & 0xcfff_ffff),
            };
            if v.is_finite() {
                assert_eq!(rint(v), v.round_ties_even(), "{v}");
            }
        }
    }

    #[test]
    fn int8_uses_amax_over_127_and_rounds_half_to_even() {
        // amax 127 gives s = 1: 2.5 rounds to 2, 3.5 to 4, -0.5 to -0.
        let w = [127.0, 2.5, 3.5, -0.5, -127.0];
        let mut q = [0i8; 5];
        let s = quantise_int8(&w, &mut q);
        assert_eq!(s, 1.0);
        assert_eq!(q, [127, 2, 4, 0, -127]);
        assert_eq!(quantise_int8(&[0.0; 3], &mut q[..3]), 0.0);
        assert_eq!(&q[..3], &[0, 0, 0]);
    }

    #[test]
    fn int4_symmetric_and_zero_point_groups_follow_the_documented_rule() {
        // Symmetric: amax 7 gives s = 1; 0.5 rounds to 0 (even), 1.5 to 2; stored + 8.
        let w = [7.0, 0.5, 1.5, -7.0];
        let mut q = [0u8; 4];
        let (s, _, z) = quantise_int4(&w, &mut q, false, false).unwrap();
        assert_eq!((s, z), (1.0, 8));
        assert_eq!(q, [15, 8, 10, 1]);
        // Zero point: lo -5, hi 10, s = 1, z = 5; 2.5 rounds to 2 (+5 = 7).
        let w = [-5.0, 10.0, 2.5, 0.0];
        let (s, _, z) = quantise_int4(&w, &mut q, true, false).unwrap();
        assert_eq!((s, z), (1.0, 5));
        assert_eq!(q, [0, 15, 7, 5]);
        // All positive: lo is 0, so zero is exact (z = 0).
        let (s, _, z) = quantise_int4(&[1.5, 3.0], &mut q[..2], true, false).unwrap();
        assert_eq!((s, z), (0.2, 0));
        assert_eq!(&q[..2], &[8, 15]);
        // f16 scales: the values are quantised against the rounded scale.
        let (s, h, _) = quantise_int4(&[0.1, -0.7], &mut q[..2], false, true).unwrap();
        assert_eq!(s, f16_to_f32(h));
        assert_eq!(s, f16_to_f32(f16_from_f32(0.7 / 7.0)));
        assert!(quantise_int4(&[1e6], &mut q[..1], false, true).is_none());
    }
}
