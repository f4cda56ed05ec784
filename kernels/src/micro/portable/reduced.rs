//! The portable micro-kernel of the reduced formats (bf16, int8, int4): each input's 16 values
//! decoded to f32 by `Block::decode`, the format's one definition, then the f32 sums.

use crate::micro::{Tile, for_rows};
use crate::pack::PANEL;

pub(super) fn run(t: &Tile<'_>, c: &mut [f32]) {
    t.check(c, super::ROWS);
    for_rows!(t.rows, tile, t, c)
}

fn tile<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
    let mut sums = [[0f32; PANEL]; R];
    let (step, lda) = match t.lda {
        None => (R, 1),
        Some(lda) => (1, lda),
    };
    let mut w = [0f32; PANEL];
    for p in 0..t.kb {
        t.b.decode(p, &mut w);
        for (i, row) in sums.iter_mut().enumerate() {
            let av = t.a[p * step + i * lda];
            for (d, &bj) in row.iter_mut().zip(&w) {
                *d += av * bj;
            }
        }
    }
    t.finish_portable(&mut sums, c);
}
