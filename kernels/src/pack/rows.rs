//! Input rows packed tile by tile, inner-major, so a register tile reads its rows as one
//! sequential stream.

/// Packed rows are this many floats longer than the inner dimension (one cache line), so that
/// with an inner dimension a multiple of 1024 the row tiles' blocks, read one after another over
/// the same weight block, do not all fall on the same L1 sets (seen +1-4% at 16 rows). The pad is
/// never written or read.
pub(crate) const ROW_PAD: usize = 16;

/// The first `r` rows of `x` (`lda` apart, `k` inputs each) packed inner-major into `dst`:
/// `dst[q * r + ii] = x[ii * lda + q]`.
pub(crate) fn pack_tile(r: usize, dst: &mut [f32], x: &[f32], lda: usize, k: usize) {
    fn rows<const R: usize>(dst: &mut [f32], x: &[f32], lda: usize, k: usize) {
        let rows: [&[f32]; R] = std::array::from_fn(|ii| &x[ii * lda..ii * lda + k]);
        for (q, step) in dst[..R * k].chunks_exact_mut(R).enumerate() {
            for ii in 0..R {
                step[ii] = rows[ii][q];
            }
        }
    }
    crate::micro::for_rows!(r, rows, dst, x, lda, k)
}

/// The bf16 pairs of the first `r` rows of `x` (`lda` apart, `k` inputs each), for a kernel
/// that reads its rows in bf16: `dst[j * r + ii]` holds inputs `2j` (low half) and `2j + 1`
/// (high half, zero past `k`) of row `ii`, each rounded to nearest even.
pub(crate) fn pack_tile_bf16(r: usize, dst: &mut [u32], x: &[f32], lda: usize, k: usize) {
    use super::quant::bf16_from_f32;
    for j in 0..k.div_ceil(2) {
        for ii in 0..r {
            let row = &x[ii * lda..ii * lda + k];
            let lo = bf16_from_f32(row[2 * j]) as u32;
            let hi = row.get(2 * j + 1).map_or(0, |&v| bf16_from_f32(v) as u32);
            dst[j * r + ii] = lo | hi << 16;
        }
    }
}

/// Inputs per group when a kernel reads its rows in int8 (see [`quantise_tile_int8`]).
pub const INPUT_GROUP: usize = 32;

/// One group's int8 rounding, the rule the Python reference repeats
/// (tests/reference/weight_formats.py, `int8_inputs`): `s = amax / 127` (f32), each value
/// `round_ties_even(x / s)` clamped to [-127, 127], all zero when the group is. Returns the
/// scale and the values' sum.
pub fn quantise_group_int8(x: &[f32], q: &mut [i8]) -> (f32, i32) {
    if x.iter().any(|v| !v.is_finite()) {
        // A NaN or infinite input makes the product's row non-finite on every path; here the
        // whole group is zero with a NaN scale, which carries that to the output.
        q.iter_mut().for_each(|v| *v = 0);
        return (f32::NAN, 0);
    }
    let amax = x.iter().fold(0f32, |m, v| m.max(v.abs()));
    if amax == 0.0 {
        q.iter_mut().for_each(|v| *v = 0);
        return (0.0, 0);
    }
    let s = amax / 127.0;
    let mut sum = 0;
    for (d, &v) in q.iter_mut().zip(x) {
        *d = (v / s).round_ties_even().clamp(-127.0, 127.0) as i8;
        sum += *d as i32;
    }
    (s, sum)
}

/// The first `r` rows of `x` (`lda` apart, `k` inputs each) rounded to int8 in groups of
/// [`INPUT_GROUP`], for a kernel that reads them so (the layout of `micro::Quads`): `quads` holds
/// `k.div_ceil(INPUT_GROUP) * INPUT_GROUP / 4 * r` words, `scales` and `sums`
/// `k.div_ceil(INPUT_GROUP) * r` values.
pub(crate) fn quantise_tile_int8(
    r: usize,
    quads: &mut [u32],
    scales: &mut [f32],
    sums: &mut [i32],
    x: &[f32],
    lda: usize,
    k: usize,
) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx512bw") {
        for ii in 0..r {
            // SAFETY: the CPU has AVX-512BW (and with it AVX-512F and AVX2); the slices hold
            // the tile's groups (the caller sized them by this function's doc).
            #[allow(unsafe_code)]
            unsafe {
                crate::micro::avx512vnni::rows::quantise_row(
                    &x[ii * lda..ii * lda + k],
                    r,
                    ii,
                    quads,
                    scales,
                    sums,
                );
            }
        }
        return;
    }
    quantise_tile_int8_portable(r, quads, scales, sums, x, lda, k);
}

/// [`quantise_tile_int8`] in plain Rust: the reference the vector version is held to.
pub(crate) fn quantise_tile_int8_portable(
    r: usize,
    quads: &mut [u32],
    scales: &mut [f32],
    sums: &mut [i32],
    x: &[f32],
    lda: usize,
    k: usize,
) {
    let mut q = [0i8; INPUT_GROUP];
    let per = INPUT_GROUP / 4;
    for ii in 0..r {
        let row = &x[ii * lda..ii * lda + k];
        for (g, chunk) in row.chunks(INPUT_GROUP).enumerate() {
            q.fill(0);
            let (s, sum) = quantise_group_int8(chunk, &mut q[..chunk.len()]);
            scales[g * r + ii] = s;
            sums[g * r + ii] = sum;
            for u in 0..per {
                let b = |o: usize| q[4 * u + o] as u8 as u32;
                quads[(g * per + u) * r + ii] = b(0) | b(2) << 8 | b(1) << 16 | b(3) << 24;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_values::values;

    #[test]
    fn the_vector_int8_rounding_of_rows_is_the_portable_one_bit_for_bit() {
        // Inner sizes with short last groups, a zero group, a non-finite group, values on
        // rounding ties; three rows, so the quads interleave.
        if !std::arch::is_x86_feature_detected!("avx512bw") {
            println!("vector int8 rounding: not run: avx512bw absent");
            return;
        }
        for k in [1usize, 5, 31, 32, 33, 64, 100, 384] {
            let r = 3;
            let mut x = values(r * k, k as u32);
            // Row 1's first group: largest magnitude 127/16, so the step is 1/16, and the rest
            // on whole and half steps (ties, which round to even).
            for (i, v) in x[k..k + k.min(32)].iter_mut().enumerate() {
                *v = if i == 0 {
                    127.0 / 16.0
                } else {
                    (i as f32 - 16.0) / 32.0
                };
            }
            if k >= 64 {
                x[2 * k + 32..2 * k + 64].fill(0.0);
                x[40] = f32::INFINITY;
            }
            let groups = k.div_ceil(INPUT_GROUP);
            let run = |vector: bool| {
                let mut quads = vec![0u32; r * groups * INPUT_GROUP / 4];
                let mut scales = vec![0f32; r * groups];
                let mut sums = vec![0i32; r * groups];
                if vector {
                    quantise_tile_int8(r, &mut quads, &mut scales, &mut sums, &x, k, k);
                } else {
                    quantise_tile_int8_portable(r, &mut quads, &mut scales, &mut sums, &x, k, k);
                }
                (
                    quads,
                    scales.iter().map(|s| s.to_bits()).collect::<Vec<_>>(),
                    sums,
                )
            };
            assert_eq!(run(true), run(false), "k = {k}");
        }
        println!("vector int8 rounding: ran, equal to the portable rounding");
    }
}
