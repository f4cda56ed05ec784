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
    match r {
        6 => rows::<6>(dst, x, lda, k),
        5 => rows::<5>(dst, x, lda, k),
        4 => rows::<4>(dst, x, lda, k),
        3 => rows::<3>(dst, x, lda, k),
        2 => rows::<2>(dst, x, lda, k),
        _ => rows::<1>(dst, x, lda, k),
    }
}
