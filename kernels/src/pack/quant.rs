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

/// 1.5 * 2^23: added to and taken off a value below 2^22 in magnitude, it rounds the value to
/// an integer, ties to even (see [`rint`]).
const RINT_MAGIC: f32 = 12_582_912.0;

/// Rounds to the nearest integer, ties to even: `f32::round_ties_even` (numpy's `rint`), written
/// so that it compiles to two additions on any x86-64 (the baseline target has no rounding
/// instruction, and the library call costs more than the rest of the quantisation). Adding
/// 1.5 * 2^23 puts a value below 2^22 in magnitude where the spacing of f32 is 1, so the
/// addition itself rounds to nearest even, and the subtraction is exact. Larger values (never
/// met by the quantisers, whose quotients are at most 127) take the library call.
#[inline(always)]
fn rint(x: f32) -> f32 {
    if x.abs() < 4_194_304.0 {
        (x + RINT_MAGIC) - RINT_MAGIC
    } else {
        x.round_ties_even()
    }
}

/// `rint(x).clamp(lo, hi)` for integer bounds of magnitude below 2^22, computed as
/// `rint(x.clamp(lo, hi))`: rounding to an integer never decreases and keeps integers, so
/// clamping to integers first gives the same value, and the clamped value always takes the
/// short path of [`rint`], which lets the quantisers' loops vectorise without a branch. A NaN
/// `x` (the packer refuses those first) would give `lo` here.
#[inline(always)]
fn rint_clamped(x: f32, lo: f32, hi: f32) -> f32 {
    let c = x.max(lo).min(hi);
    (c + RINT_MAGIC) - RINT_MAGIC
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
    quantise_int8_body(w, q, true)
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma,f16c")]
unsafe fn quantise_int4_avx2(
    w: &[f32],
    q: &mut [u8],
    zero_point: bool,
    f16: bool,
) -> Option<(f32, u16, u8)> {
    quantise_int4_body(w, q, zero_point, f16, true)
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
    quantise_int8_body(w, q, false)
}

/// `q[i] = rint_clamped(w[i] / s, lo, hi) + add` as a byte (an int8 value's two's complement),
/// for the first `w.len()` of `q`: eight at a time with AVX2 when `vector` (the caller runs
/// with AVX2), else one at a time; the same operations either way, so the same bytes.
#[inline(always)]
fn round_to_bytes(w: &[f32], q: &mut [u8], s: f32, (lo, hi): (f32, f32), add: f32, vector: bool) {
    let q = &mut q[..w.len()];
    let mut done = 0;
    #[cfg(target_arch = "x86_64")]
    if vector {
        // SAFETY: `vector` is only set by the AVX2 builds; both slices hold `w.len()` values.
        #[allow(unsafe_code)]
        unsafe {
            done = round_to_bytes_avx2(w, q, s, (lo, hi), add);
        }
    }
    let _ = vector;
    for (d, &v) in q[done..].iter_mut().zip(&w[done..]) {
        *d = (rint_clamped(v / s, lo, hi) + add) as i32 as u8;
    }
}

/// The whole eights of [`round_to_bytes`]; returns how many values it did.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn round_to_bytes_avx2(
    w: &[f32],
    q: &mut [u8],
    s: f32,
    (lo, hi): (f32, f32),
    add: f32,
) -> usize {
    use std::arch::x86_64::*;
    let n = w.len().min(q.len()) / 8 * 8;
    let (vs, vlo, vhi, vadd) = (
        _mm256_set1_ps(s),
        _mm256_set1_ps(lo),
        _mm256_set1_ps(hi),
        _mm256_set1_ps(add),
    );
    let magic = _mm256_set1_ps(RINT_MAGIC);
    for i in (0..n).step_by(8) {
        // SAFETY: values i..i + 8 of both slices exist (i + 8 <= n).
        unsafe {
            let x = _mm256_div_ps(_mm256_loadu_ps(w.as_ptr().add(i)), vs);
            // maxps and minps return their second operand for a NaN, as `f32::max` and
            // `f32::min` return the number.
            let c = _mm256_min_ps(_mm256_max_ps(x, vlo), vhi);
            let r = _mm256_add_ps(_mm256_sub_ps(_mm256_add_ps(c, magic), magic), vadd);
            // Whole numbers within -127..=127 or 0..=15: exact as 32-bit integers, then
            // narrowed without saturating anything; each 128-bit half's four bytes low.
            let v = _mm256_cvttps_epi32(r);
            let v16 = _mm256_packs_epi32(v, v);
            let v8 = _mm256_packs_epi16(v16, v16);
            let lo4 = _mm256_cvtsi256_si32(v8) as u32 as u64;
            let hi4 = _mm256_extract_epi32::<4>(v8) as u32 as u64;
            q.as_mut_ptr()
                .add(i)
                .cast::<u64>()
                .write_unaligned(lo4 | hi4 << 32);
        }
    }
    n
}

#[inline(always)]
fn quantise_int8_body(w: &[f32], q: &mut [i8], vector: bool) -> f32 {
    let s = amax(w) / 127.0;
    if s == 0.0 {
        q.iter_mut().take(w.len()).for_each(|d| *d = 0);
        return s;
    }
    let bytes = q.as_mut_ptr().cast::<u8>();
    // SAFETY: i8 and u8 have one layout; the slice is the same memory, borrowed once.
    #[allow(unsafe_code)]
    let bytes = unsafe { std::slice::from_raw_parts_mut(bytes, q.len()) };
    round_to_bytes(w, bytes, s, (-127.0, 127.0), 0.0, vector);
    s
}

/// The scale as stored: as it is in f32, or rounded to f16 (`None` when it overflows f16);
/// with `vector` (the caller runs with F16C) by the F16C instructions, which round the same
/// way (to nearest, ties to even, subnormals kept).
#[inline(always)]
fn stored_scale(s: f32, f16: bool, vector: bool) -> Option<(f32, u16)> {
    if !f16 {
        return Some((s, 0));
    }
    #[cfg(target_arch = "x86_64")]
    if vector {
        // SAFETY: `vector` is only set by the AVX2 builds, which the path with F16C runs.
        #[allow(unsafe_code)]
        let (h, back) = unsafe { f16_round_trip_f16c(s) };
        return back.is_finite().then_some((back, h));
    }
    let _ = vector;
    let h = f16_from_f32(s);
    let back = f16_to_f32(h);
    back.is_finite().then_some((back, h))
}

/// `s` rounded to f16 (nearest, ties to even) and back, by F16C.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "f16c")]
unsafe fn f16_round_trip_f16c(s: f32) -> (u16, f32) {
    use std::arch::x86_64::*;
    let h = _mm_cvtps_ph::<_MM_FROUND_TO_NEAREST_INT>(_mm_set_ss(s));
    (
        _mm_extract_epi16::<0>(h) as u16,
        _mm_cvtss_f32(_mm_cvtph_ps(h)),
    )
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
    quantise_int4_body(w, q, zero_point, f16, false)
}

#[inline(always)]
fn quantise_int4_body(
    w: &[f32],
    q: &mut [u8],
    zero_point: bool,
    f16: bool,
    vector: bool,
) -> Option<(f32, u16, u8)> {
    if zero_point {
        let lo = w.iter().fold(0f32, |m, &v| m.min(v));
        let hi = w.iter().fold(0f32, |m, &v| m.max(v));
        let (s, h) = stored_scale((hi - lo) / 15.0, f16, vector)?;
        if s == 0.0 {
            q.iter_mut().for_each(|d| *d = 0);
            return Some((s, h, 0));
        }
        let z = rint(-lo / s).clamp(0.0, 15.0);
        // `(rint(v / s) + z)` clamped to 0..=15, with the clamp first (see `rint_clamped`).
        round_to_bytes(w, q, s, (-z, 15.0 - z), z, vector);
        Some((s, h, z as u8))
    } else {
        let (s, h) = stored_scale(amax(w) / 7.0, f16, vector)?;
        if s == 0.0 {
            q.iter_mut().take(w.len()).for_each(|d| *d = 8);
            return Some((s, h, 8));
        }
        round_to_bytes(w, q, s, (-8.0, 7.0), 8.0, vector);
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

    /// Whether this CPU runs the loader's AVX2 builds (F16C with them); says so when not.
    fn vector_builds_run() -> bool {
        #[cfg(target_arch = "x86_64")]
        if avx2() {
            return true;
        }
        eprintln!("this CPU lacks AVX2 or F16C: the vector build was not run, only the baseline");
        false
    }

    #[test]
    fn the_vector_scale_rounding_to_f16_is_the_portable_one() {
        if !vector_builds_run() {
            return;
        }
        let mut x = 0x9e37_79b9u32;
        for i in 0..400_000u32 {
            x ^= x << 13;
            x ^= x >> 17;
            x ^= x << 5;
            // Positive scales from below the smallest subnormal half to past the largest
            // half, and every f16 value and midpoint exactly.
            let v = match i % 3 {
                0 => f32::from_bits(0x3000_0000 + x % 0x1900_0000),
                1 => f16_to_f32((x % 0x7c00) as u16),
                _ => (f16_to_f32((x % 0x7bff) as u16) + f16_to_f32((x % 0x7bff) as u16 + 1)) / 2.0,
            };
            assert_eq!(
                stored_scale(v, true, true),
                stored_scale(v, true, false),
                "{v:e}"
            );
        }
    }

    #[test]
    fn the_vector_rounding_to_bytes_is_the_portable_one() {
        if !vector_builds_run() {
            return;
        }
        let mut x = 0x2545_f491u32;
        let mut next = || {
            x ^= x << 13;
            x ^= x >> 17;
            x ^= x << 5;
            x
        };
        for len in [1, 7, 8, 9, 31, 32, 33, 64] {
            for _ in 0..500 {
                // Values around the scale's multiples, halves among them (ties), and some far
                // past the bounds.
                let w: Vec<f32> = (0..len)
                    .map(|_| {
                        (next() % 81) as f32 * 0.25 - 10.0
                            + if next() % 5 == 0 { 300.0 } else { 0.0 }
                    })
                    .collect();
                let s = [0.5f32, 1.0, 1.5, 0.37][next() as usize % 4];
                for (bounds, add) in [
                    ((-8.0, 7.0), 8.0),
                    ((-3.0, 12.0), 3.0),
                    ((-127.0, 127.0), 0.0),
                ] {
                    let (mut a, mut b) = (vec![0u8; len], vec![0u8; len]);
                    round_to_bytes(&w, &mut a, s, bounds, add, true);
                    round_to_bytes(&w, &mut b, s, bounds, add, false);
                    assert_eq!(a, b, "{w:?} / {s} in {bounds:?} + {add}");
                }
            }
        }
    }

    #[test]
    fn rint_and_the_clamped_rint_round_half_to_even_like_the_library_function() {
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
                // The quantisers' clamped rounding: the same integer as rounding, then
                // clamping (the int4 symmetric, int4 zero-point z = 3, and int8 bounds).
                for (lo, hi) in [(-8.0, 7.0), (-3.0, 12.0), (-127.0, 127.0)] {
                    let want = v.round_ties_even().clamp(lo, hi);
                    assert_eq!(rint_clamped(v, lo, hi), want, "{v} in {lo}..={hi}");
                }
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
