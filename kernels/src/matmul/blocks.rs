//! Inside one part of a product: its rows cut into register tiles, packed and given their
//! low-rank down products ([`Buffers::prepare`]), then the weight's panels walked in blocks
//! sized for the caches ([`run_panels`]), one micro-kernel call per tile and block.

use super::{BLOCK_K, BLOCK_ROWS, BUFFERS, PACK_PANELS, SHORT_K, SMALL_BLOCK_K, TILE_ROWS};
use crate::RowTerm;
use crate::micro::{Tile, tile_dispatch};
use crate::pack::rows::{ROW_PAD, pack_tile};
use crate::pack::{PANEL, PackedWeight};

/// The rows one [`panels_into`] call covers (`first..first + m` of the whole product) and the
/// low-rank terms that touch them.
pub(crate) struct Part<'a, 'b> {
    pub(crate) first: usize,
    pub(crate) terms: Vec<&'b RowTerm<'a>>,
}

impl<'a, 'b> Part<'a, 'b> {
    /// Keeps only the terms that overlap rows `first..first + m`, so each block looks at a few.
    pub(crate) fn new(first: usize, m: usize, terms: &'b [RowTerm<'a>]) -> Self {
        let terms = terms
            .iter()
            .filter(|t| t.rows.start < first + m && t.rows.end > first)
            .collect();
        Self { first, terms }
    }

    /// Rows from local row `i` that share one term (or none), at most `max`, and the index of
    /// that term in `terms`.
    fn run(&self, i: usize, max: usize) -> (usize, Option<usize>) {
        let g = self.first + i;
        let mut len = max;
        let mut here = None;
        for (at, t) in self.terms.iter().enumerate() {
            if t.rows.contains(&g) {
                len = len.min(t.rows.end - g);
                here = Some(at);
            } else if t.rows.start > g {
                len = len.min(t.rows.start - g);
            }
        }
        (len, here)
    }
}

/// One register tile's rows: local rows `i..i + r` and the index of their low-rank term in the
/// part's terms, if they have one.
#[derive(Debug, Clone, Copy)]
pub(crate) struct TileRows {
    i: usize,
    r: usize,
    term: Option<usize>,
}

impl TileRows {
    /// Where these rows lie once packed (inner dimension `k`): each row `k + ROW_PAD` floats on
    /// from the one before, the tile's `r * k` values together.
    fn packed(&self, k: usize) -> std::ops::Range<usize> {
        let start = self.i * (k + ROW_PAD);
        start..start + self.r * k
    }
}

/// The per-thread buffers behind [`Prepared`], and the few-rows path's output blocks.
#[derive(Default)]
pub(crate) struct Buffers {
    pub(crate) tiles: Vec<TileRows>,
    pub(crate) x: Vec<f32>,
    pub(crate) down: Vec<f32>,
    pub(crate) z: Vec<f32>,
    pub(crate) out: Vec<f32>,
}

/// The rows of one part, ready for the panels: cut into register tiles, packed, and with each
/// tile's low-rank down product done.
pub(crate) struct Prepared<'p, 'a, 'b> {
    pub(crate) part: &'p Part<'a, 'b>,
    pub(crate) tiles: &'p [TileRows],
    /// The rows packed tile by tile, inner-major: the tile of rows `i..i + r` at
    /// [`TileRows::packed`], its row `ii`'s input `q` at `start + q * r + ii`; or, with `lda`, the
    /// caller's rows as they are, `lda` apart (a product over few panels, where packing would cost more than it saves).
    pub(crate) x: &'p [f32],
    pub(crate) lda: Option<usize>,
    /// `s x A^T` for the tiles with a term, packed the same way: the tile at `i * z_stride`.
    pub(crate) z: &'p [f32],
    pub(crate) z_stride: usize,
    pub(crate) k: usize,
    pub(crate) m: usize,
}

impl Buffers {
    /// Cuts rows `0..m` of `x` (rows `lda` apart, `k` inputs each) into register tiles at the
    /// part's term boundaries, packs them if `pack`, and computes each tile's `s x A^T`.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn prepare<'p, 'a, 'b>(
        &'p mut self,
        x: &'p [f32],
        lda: usize,
        k: usize,
        m: usize,
        part: &'p Part<'a, 'b>,
        pack: bool,
        fast: bool,
    ) -> Prepared<'p, 'a, 'b> {
        assert!(
            m == 0 || (m - 1) * lda + k <= x.len(),
            "rows do not fit their slice"
        );
        self.tiles.clear();
        let mut i = 0;
        while i < m {
            let (r, term) = part.run(i, (m - i).min(TILE_ROWS));
            self.tiles.push(TileRows { i, r, term });
            i += r;
        }
        if pack {
            // Every value read is overwritten by the packing (the tiles cover rows 0..m).
            self.x.resize(m * (k + ROW_PAD), 0.0);
            for t in &self.tiles {
                let dst = &mut self.x[t.packed(k)];
                pack_tile(t.r, dst, &x[t.i * lda..], lda, k);
            }
        }
        let (xs, xlda): (&[f32], _) = if pack {
            (&self.x, None)
        } else {
            (x, Some(lda))
        };
        let tile_rows = |t: &TileRows| match xlda {
            None => &xs[t.packed(k)],
            Some(lda) => &xs[t.i * lda..],
        };
        // The down products, row-major into `down` (rank padded to whole panels), from the
        // packed rows through the kernel, then scaled and packed like the rows.
        let rank = part.terms.iter().map(|t| t.a.out).max().unwrap_or(0);
        let width = rank.div_ceil(PANEL) * PANEL;
        self.down.clear();
        self.z.clear();
        if rank > 0 {
            self.down.resize(m * width, 0.0);
            self.z.resize(m * rank, 0.0);
        }
        for t in self.tiles.iter().filter(|t| t.term.is_some()) {
            let term = part.terms[t.term.unwrap()];
            let r = term.a.out;
            for p in 0..r.div_ceil(PANEL) {
                let panel = &term.a.data[p * PANEL * k..(p + 1) * PANEL * k];
                let tile = Tile {
                    a: tile_rows(t),
                    lda: xlda,
                    kb: k,
                    b: panel,
                    next: panel,
                    low: None,
                    bias: None,
                    ldc: width,
                    cols: PANEL.min(r - p * PANEL),
                    acc: false,
                };
                tile_dispatch(t.r, &tile, &mut self.down[t.i * width + p * PANEL..], fast);
            }
            let dst = &mut self.z[t.i * rank..t.i * rank + r * t.r];
            for ii in 0..t.r {
                let row = &self.down[(t.i + ii) * width..(t.i + ii) * width + r];
                for (step, &v) in dst.chunks_exact_mut(t.r).zip(row) {
                    step[ii] = term.scale * v;
                }
            }
        }
        Prepared {
            part,
            tiles: &self.tiles,
            x: xs,
            lda: xlda,
            z: &self.z,
            z_stride: rank,
            k,
            m,
        }
    }
}

/// What one [`run_panels`] call computes: panels `panels` of the weight, onto the output or
/// not, with the bias (all of it, `[out]`) added as each tile is first stored.
#[derive(Clone)]
pub(crate) struct Run<'a> {
    pub(crate) panels: std::ops::Range<usize>,
    pub(crate) accumulate: bool,
    pub(crate) bias: Option<&'a [f32]>,
    pub(crate) fast: bool,
    /// Pack the rows first: when they run over at least [`PACK_PANELS`] panels.
    pub(crate) pack: bool,
}

impl<'a> Run<'a> {
    pub(crate) fn new(
        panels: std::ops::Range<usize>,
        accumulate: bool,
        bias: Option<&'a [f32]>,
        fast: bool,
    ) -> Self {
        let pack = panels.len() >= PACK_PANELS;
        Self {
            panels,
            accumulate,
            bias,
            fast,
            pack,
        }
    }
}

/// Panels `run.panels` of `w` for rows `0..m` of `x` (rows `lda` apart), into `out` (row stride
/// `stride`), whose column 0 is the first column of panel `run.panels.start`: the rows prepared
/// in this thread's buffers, then [`run_panels`].
#[allow(clippy::too_many_arguments)]
pub(crate) fn panels_into(
    out: &mut [f32],
    stride: usize,
    x: &[f32],
    lda: usize,
    m: usize,
    w: &PackedWeight,
    part: &Part<'_, '_>,
    run: &Run<'_>,
) {
    // Nothing in here waits on the pool, so the borrow cannot be taken twice.
    BUFFERS.with_borrow_mut(|bufs| {
        let prep = bufs.prepare(x, lda, w.inp, m, part, run.pack, run.fast);
        run_panels(out, stride, &prep, w, run);
    });
}

/// Panels `run.panels` of `w` for the prepared rows, into `out` (row stride `stride`, column 0
/// at panel `run.panels.start`). Columns past `w`'s last are not written. With the last inner
/// block of each tile, the tile's low-rank steps (if its rows have a term) run in the same
/// accumulators; with the first, the bias is added.
pub(crate) fn run_panels(
    out: &mut [f32],
    stride: usize,
    prep: &Prepared<'_, '_, '_>,
    w: &PackedWeight,
    run: &Run<'_>,
) {
    let (n, k, m) = (w.out, w.inp, prep.m);
    let (panels, accumulate, fast) = (run.panels.clone(), run.accumulate, run.fast);
    assert_eq!(k, prep.k, "rows prepared for another inner dimension");
    #[allow(clippy::too_many_arguments)]
    // One register tile: the rows of `t` against panel p's inner block k0..k0 + kb, with their
    // low-rank steps when this is the last block.
    let one = |t: &TileRows,
               p: usize,
               k0: usize,
               kb: usize,
               b: &[f32],
               next: &[f32],
               col: usize,
               acc: bool,
               out: &mut [f32]| {
        let low = t.term.filter(|_| k0 + kb == k).map(|at| {
            let term = prep.part.terms[at];
            let rank = term.b.inp;
            let z = &prep.z[t.i * prep.z_stride..t.i * prep.z_stride + rank * t.r];
            (
                z,
                &term.b.data[p * PANEL * rank..(p + 1) * PANEL * rank],
                rank,
            )
        });
        let a = match prep.lda {
            None => {
                let start = t.packed(k).start;
                &prep.x[start + k0 * t.r..start + (k0 + kb) * t.r]
            }
            Some(lda) => &prep.x[t.i * lda + k0..],
        };
        let cols = PANEL.min(n - p * PANEL);
        let tile = Tile {
            a,
            lda: prep.lda,
            kb,
            b,
            next,
            low,
            bias: run
                .bias
                .filter(|_| k0 == 0)
                .map(|bias| &bias[p * PANEL..p * PANEL + cols]),
            ldc: stride,
            cols,
            acc,
        };
        tile_dispatch(t.r, &tile, &mut out[t.i * stride + col..], fast);
    };
    let panel = |p: usize, k0: usize, kb: usize| {
        let start = p * PANEL * k + k0 * PANEL;
        &w.data[start..start + kb * PANEL]
    };
    if k <= SHORT_K {
        // A short inner dimension (merging a low-rank update, k = r; attention heads): the
        // output is most of the traffic, so each tile's rows go through every panel in turn and
        // the output is streamed once, tile by tile, front to back.
        for t in prep.tiles {
            for p in panels.clone() {
                let b = panel(p, 0, k);
                one(
                    t,
                    p,
                    0,
                    k,
                    b,
                    b,
                    (p - panels.start) * PANEL,
                    accumulate,
                    out,
                );
            }
        }
        return;
    }
    if m <= BLOCK_ROWS {
        // One row block: panel by panel, front to back through the packed weight in short
        // blocks, so memory is read as one sequential stream, spread evenly over the
        // arithmetic, and each block is fetched while the one before it computes. Up to three
        // rows the tile runs several streams over segments of a block; it reads best with the
        // whole panel as one block.
        let step = if m <= 3 { k } else { SMALL_BLOCK_K };
        for p in panels.clone() {
            let col = (p - panels.start) * PANEL;
            let mut k0 = 0;
            while k0 < k {
                let kb = step.min(k - k0);
                let b = panel(p, k0, kb);
                // With whole panels as blocks the next one is too far ahead to fetch early.
                let next = if kb == k {
                    b
                } else {
                    let start = (p * PANEL * k + (k0 + kb) * PANEL).min(w.data.len() - kb * PANEL);
                    &w.data[start..start + kb * PANEL]
                };
                for t in prep.tiles {
                    one(t, p, k0, kb, b, next, col, accumulate || k0 > 0, out);
                }
                k0 += kb;
            }
        }
        return;
    }
    let mut k0 = 0;
    while k0 < k {
        let kb = BLOCK_K.min(k - k0);
        for p in panels.clone() {
            let b = panel(p, k0, kb);
            let col = (p - panels.start) * PANEL;
            for t in prep.tiles {
                one(t, p, k0, kb, b, b, col, accumulate || k0 > 0, out);
            }
        }
        k0 += kb;
    }
}
