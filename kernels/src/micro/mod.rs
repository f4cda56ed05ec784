//! The micro-kernels: one register tile of rows against one block of a weight panel, nothing
//! else. [`Tile`] is the contract every micro-kernel implements; [`tile_dispatch`] picks the one
//! for the tile's row count and the path the dispatch chose.

#[cfg(target_arch = "x86_64")]
mod avx2;
mod portable;

use crate::pack::PANEL;

/// One register tile through the kernel for its row count.
#[inline]
pub(crate) fn tile_dispatch(r: usize, t: &Tile<'_>, c: &mut [f32], fast: bool) {
    match r {
        6 => packed_tile::<6>(t, c, fast),
        5 => packed_tile::<5>(t, c, fast),
        4 => packed_tile::<4>(t, c, fast),
        3 => packed_tile::<3>(t, c, fast),
        2 => packed_tile::<2>(t, c, fast),
        _ => packed_tile::<1>(t, c, fast),
    }
}

/// One register tile's inputs: `c[i, j] (+)= a[i, :kb] . b[:kb, j] (+ z[i, :] . zb[:, j])` for
/// `i < R`, `j < cols`. `a` is the tile's rows packed inner-major (`a[q * R + i]`), `b` a panel
/// block (`kb` x 16, input-major). `next` is the block the next tile will read: the kernel asks
/// for it one cache line per step, into L2 (which measured a few per cent faster at 16 rows than
/// into L1), so memory is read while the arithmetic runs instead of between tiles. `low` is a
/// low-rank term's steps, run in the same accumulators: `s x A^T` packed (`rank` steps), and the
/// term's panel of `B` (`rank` x 16).
pub(crate) struct Tile<'a> {
    pub(crate) a: &'a [f32],
    /// `None`: `a` is packed as above; `Some(lda)`: `a`'s rows are `lda` apart (`a[i * lda + q]`).
    pub(crate) lda: Option<usize>,
    pub(crate) kb: usize,
    pub(crate) b: &'a [f32],
    pub(crate) next: &'a [f32],
    pub(crate) low: Option<(&'a [f32], &'a [f32], usize)>,
    /// Added to every row of the tile (`cols` values).
    pub(crate) bias: Option<&'a [f32]>,
    pub(crate) ldc: usize,
    pub(crate) cols: usize,
    pub(crate) acc: bool,
}

#[inline]
fn packed_tile<const R: usize>(t: &Tile<'_>, c: &mut [f32], fast: bool) {
    assert!(
        t.lda.map_or(t.kb * R, |lda| (R - 1) * lda + t.kb) <= t.a.len()
            && t.lda.is_none_or(|lda| lda >= t.kb)
            && t.bias.is_none_or(|b| b.len() >= t.cols)
            && t.kb * PANEL <= t.b.len()
            && t.kb * PANEL <= t.next.len()
            && t.low
                .is_none_or(|(z, zb, rank)| rank * R <= z.len() && rank * PANEL <= zb.len())
            && (R - 1) * t.ldc + t.cols <= c.len()
            && t.cols <= PANEL,
        "tile outside its slices"
    );
    #[cfg(target_arch = "x86_64")]
    if fast {
        // SAFETY: `fast` is only true when `use_avx2` saw AVX2 and FMA on this CPU; the assert
        // above bounds every read of a, b, next and the low-rank slices and every write of c.
        #[allow(unsafe_code)]
        unsafe {
            match (t.lda.is_none(), std::ptr::eq(t.next.as_ptr(), t.b.as_ptr())) {
                (true, true) => avx2::packed_tile::<R, false, true>(t, c),
                (true, false) => avx2::packed_tile::<R, true, true>(t, c),
                (false, true) => avx2::packed_tile::<R, false, false>(t, c),
                (false, false) => avx2::packed_tile::<R, true, false>(t, c),
            }
        };
        return;
    }
    let _ = fast;
    portable::packed_tile::<R>(t, c);
}
