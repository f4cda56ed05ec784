//! The portable f32 micro-kernel: the reference every fast one is checked against.

use super::Tile;
use crate::pack::PANEL;

/// The portable tile: sixteen-wide rows of partial sums, which the compiler vectorises.
pub(super) fn packed_tile<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    let mut sums = [[0f32; PANEL]; R];
    // Input q of row i is at a[q * step + i * lda].
    let mut steps = |a: &[f32], step: usize, lda: usize, b: &[f32], kb: usize| {
        for p in 0..kb {
            let bv: &[f32; PANEL] = b[p * PANEL..(p + 1) * PANEL].try_into().unwrap();
            for (i, row) in sums.iter_mut().enumerate() {
                let av = a[p * step + i * lda];
                for (d, &bj) in row.iter_mut().zip(bv) {
                    *d += av * bj;
                }
            }
        }
    };
    match t.lda {
        None => steps(t.a, R, 1, t.b, t.kb),
        Some(lda) => steps(t.a, 1, lda, t.b, t.kb),
    }
    if let Some((z, zb, rank)) = t.low {
        steps(z, R, 1, zb, rank);
    }
    for (i, row) in sums.iter_mut().enumerate() {
        if let Some(bias) = t.bias {
            row.iter_mut().zip(bias).for_each(|(d, s)| *d += s);
        }
        let dst = &mut c[i * t.ldc..i * t.ldc + t.cols];
        if t.acc {
            dst.iter_mut().zip(row.iter()).for_each(|(d, s)| *d += s);
        } else {
            dst.copy_from_slice(&row[..t.cols]);
        }
    }
}
