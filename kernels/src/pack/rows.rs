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
