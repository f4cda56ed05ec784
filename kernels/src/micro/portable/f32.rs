//! The portable f32 micro-kernel: sixteen-wide rows of partial sums.

use crate::micro::{Tile, for_rows};
use crate::pack::{Block, PANEL};

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, super::ROWS);
    for_rows!(t.rows, tile, t, c)
}

fn tile<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    let Block::F32(b) = t.b else {
        unreachable!("the f32 kernel got another format")
    };
    let mut sums = [[0f32; PANEL]; R];
    // Input q of row i is at a[q * step + i * lda].
    let (step, lda) = match t.lda {
        None => (R, 1),
        Some(lda) => (1, lda),
    };
    for p in 0..t.kb {
        let bv: &[f32; PANEL] = b[p * PANEL..(p + 1) * PANEL].try_into().unwrap();
        for (i, row) in sums.iter_mut().enumerate() {
            let av = t.a[p * step + i * lda];
            for (d, &bj) in row.iter_mut().zip(bv) {
                *d += av * bj;
            }
        }
    }
    t.finish_portable(&mut sums, c);
}
