//! Inside one part of a product: its rows cut into register tiles, packed and given their
//! low-rank down products ([`Buffers::prepare`]), then the weight's panels walked in blocks
//! sized for the caches ([`run_panels`]), one micro-kernel call per tile and block.

use std::borrow::Cow;

use super::{BLOCK_K, BLOCK_ROWS, BUFFERS, PACK_PANELS, SHORT_K, SMALL_BLOCK_K};
use crate::RowTerm;
use crate::dispatch::{Path, micro_kernel};
use crate::micro::{Inputs, MicroKernel, Quads, Tile};
use crate::pack::rows::{INPUT_GROUP, ROW_PAD, pack_tile, pack_tile_bf16, quantise_tile_int8};
use crate::pack::{Block, FormatKind, PANEL, PackedWeight};

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

/// One register tile's rows: local rows `i..i + r`. When one low-rank term covers all of
/// them, `term` is its index in the part's terms and its steps run in the tile's accumulators;
/// when the rows are mixed (several terms, or a term and rows with none), `split` is the range
/// of their [`TermRun`]s in [`Prepared::runs`], each added by a small product of its own once
/// the tile's base product is stored. Either way the base product reads the weight once for
/// all the tile's rows.
#[derive(Debug, Clone)]
pub(crate) struct TileRows {
    i: usize,
    r: usize,
    term: Option<usize>,
    split: std::ops::Range<usize>,
}

/// Local rows `i..i + r`, all in the term at `term` in the part's terms, inside one tile.
#[derive(Debug, Clone, Copy)]
pub(crate) struct TermRun {
    i: usize,
    r: usize,
    term: usize,
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
    pub(crate) runs: Vec<TermRun>,
    pub(crate) x: Vec<f32>,
    pub(crate) pairs: Vec<u32>,
    pub(crate) quads: Vec<u32>,
    pub(crate) quad_scales: Vec<f32>,
    pub(crate) quad_sums: Vec<i32>,
    pub(crate) down: Vec<f32>,
    pub(crate) z: Vec<f32>,
    pub(crate) wide: Vec<f32>,
    pub(crate) out: Vec<f32>,
}

/// The rows of one part, ready for the panels: cut into register tiles, packed, and with each
/// tile's low-rank down product done.
pub(crate) struct Prepared<'p, 'a, 'b> {
    pub(crate) part: &'p Part<'a, 'b>,
    pub(crate) tiles: &'p [TileRows],
    /// The runs of rows that share a term, tile by tile.
    pub(crate) runs: &'p [TermRun],
    /// The rows packed tile by tile, inner-major: the tile of rows `i..i + r` at
    /// [`TileRows::packed`], its row `ii`'s input `q` at `start + q * r + ii`; or, with `lda`, the
    /// caller's rows as they are, `lda` apart (a product over few panels, where packing would
    /// cost more than it saves).
    pub(crate) x: &'p [f32],
    pub(crate) lda: Option<usize>,
    /// For a kernel that reads bf16 rows: each tile's rows in bf16 pairs, the tile of rows
    /// `i..i + r` from `i * ceil(k / 2)`, pair `j` of its row `ii` at `j * r + ii`.
    pub(crate) pairs: &'p [u32],
    /// For a kernel that reads int8 rows: each tile's rows in groups (see `micro::Quads`), the
    /// tile of rows `i..i + r` from `i * groups * INPUT_GROUP / 4` (quads) and `i * groups`
    /// (scales and sums), `groups` = `ceil(k / INPUT_GROUP)`.
    pub(crate) quads: Quads<'p>,
    /// `s x A^T` for each term run, packed the same way as rows: the run at `i * z_stride`,
    /// row `ii`'s step `q` at `q * r + ii`.
    pub(crate) z: &'p [f32],
    pub(crate) z_stride: usize,
    pub(crate) k: usize,
    pub(crate) m: usize,
}

/// Panel `p` of an f32 weight as 16 columns: the panel itself, or a narrow last panel (an f32
/// weight holds only its real rows) widened with zeros.
fn wide_panel<'w>(w: &'w PackedWeight, p: usize, wide: &'w mut Vec<f32>) -> &'w [f32] {
    let k = w.inp;
    let width = w.panel_width(p);
    let data = &w.f32_values()[p * PANEL * k..p * PANEL * k + width * k];
    if width == PANEL {
        return data;
    }
    wide.clear();
    wide.resize(PANEL * k, 0.0);
    for (dst, src) in wide
        .chunks_exact_mut(PANEL)
        .zip(data.chunks_exact(width.max(1)))
    {
        dst[..width].copy_from_slice(src);
    }
    wide
}

impl Buffers {
    /// Cuts rows `0..m` of `x` (rows `lda` apart, `k` inputs each) into register tiles of the
    /// run's kernel's height and each tile into runs of rows that share a low-rank term; packs
    /// the rows as the kernel reads them (f32 if `run.pack`, or bf16 pairs, or int8 groups);
    /// and computes each run's `s x A^T` with the path's f32 kernel.
    pub(crate) fn prepare<'p, 'a, 'b>(
        &'p mut self,
        x: &'p [f32],
        lda: usize,
        k: usize,
        m: usize,
        part: &'p Part<'a, 'b>,
        run: &Run<'_>,
    ) -> Prepared<'p, 'a, 'b> {
        assert!(
            m == 0 || (m - 1) * lda + k <= x.len(),
            "rows do not fit their slice"
        );
        let down_kernel = micro_kernel(run.path, FormatKind::F32);
        assert_eq!(
            down_kernel.rows, run.kernel.rows,
            "a path's kernels share one tile height"
        );
        // Tiles of the kernel's height whatever the terms, so a batch of rows with many
        // adapters still reads each weight block once per tile, and the term runs in each.
        self.tiles.clear();
        self.runs.clear();
        let mut i = 0;
        while i < m {
            let r = (m - i).min(run.kernel.rows);
            let first = self.runs.len();
            let mut j = i;
            while j < i + r {
                let (len, term) = part.run(j, i + r - j);
                if let Some(term) = term {
                    self.runs.push(TermRun { i: j, r: len, term });
                }
                j += len;
            }
            let whole = self.runs.len() == first + 1 && self.runs[first].r == r;
            let (term, split) = if whole {
                (Some(self.runs[first].term), first..first)
            } else {
                (None, first..self.runs.len())
            };
            self.tiles.push(TileRows { i, r, term, split });
            i += r;
        }
        // A kernel that reads its rows rounded (bf16 pairs, int8 groups) never reads them as
        // f32 (the down products then read the caller's rows), so only an f32-row kernel packs.
        let pack = run.pack && run.kernel.inputs == Inputs::F32;
        if pack {
            // Every value read is overwritten by the packing (the tiles cover rows 0..m).
            self.x.resize(m * (k + ROW_PAD), 0.0);
            for t in &self.tiles {
                let dst = &mut self.x[t.packed(k)];
                pack_tile(t.r, dst, &x[t.i * lda..], lda, k);
            }
        }
        self.pairs.clear();
        self.quads.clear();
        self.quad_scales.clear();
        self.quad_sums.clear();
        if run.kernel.inputs == Inputs::Int8Groups {
            let groups = k.div_ceil(INPUT_GROUP);
            let per = groups * INPUT_GROUP / 4;
            self.quads.resize(m * per, 0);
            self.quad_scales.resize(m * groups, 0.0);
            self.quad_sums.resize(m * groups, 0);
            for t in &self.tiles {
                quantise_tile_int8(
                    t.r,
                    &mut self.quads[t.i * per..(t.i + t.r) * per],
                    &mut self.quad_scales[t.i * groups..(t.i + t.r) * groups],
                    &mut self.quad_sums[t.i * groups..(t.i + t.r) * groups],
                    &x[t.i * lda..],
                    lda,
                    k,
                );
            }
        }
        if run.kernel.inputs == Inputs::Bf16Pairs {
            let kp = k.div_ceil(2);
            self.pairs.resize(m * kp, 0);
            for t in &self.tiles {
                let dst = &mut self.pairs[t.i * kp..(t.i + t.r) * kp];
                pack_tile_bf16(t.r, dst, &x[t.i * lda..], lda, k);
            }
        }
        let (xs, xlda): (&[f32], _) = if pack {
            (&self.x, None)
        } else {
            (x, Some(lda))
        };
        // The down products, row-major into `down` (rank padded to whole panels), from the
        // caller's rows through the kernel (a panel or two: packing would not pay), then
        // scaled and packed like the rows.
        let rank = part.terms.iter().map(|t| t.a.out).max().unwrap_or(0);
        let width = rank.div_ceil(PANEL) * PANEL;
        self.down.clear();
        self.z.clear();
        if rank > 0 {
            self.down.resize(m * width, 0.0);
            self.z.resize(m * rank, 0.0);
        }
        for t in &self.runs {
            let term = part.terms[t.term];
            let r = term.a.out;
            for p in 0..r.div_ceil(PANEL) {
                let panel = wide_panel(term.a, p, &mut self.wide);
                let tile = Tile {
                    rows: t.r,
                    a: &x[t.i * lda..],
                    lda: Some(lda),
                    pairs: &[],
                    quads: Quads::default(),
                    kb: k,
                    b: Block::F32(panel),
                    next: None,
                    low: None,
                    bias: None,
                    ldc: width,
                    cols: PANEL.min(r - p * PANEL),
                    acc: false,
                };
                (down_kernel.run)(&tile, &mut self.down[t.i * width + p * PANEL..]);
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
            runs: &self.runs,
            x: xs,
            lda: xlda,
            pairs: &self.pairs,
            quads: Quads {
                q: &self.quads,
                scales: &self.quad_scales,
                sums: &self.quad_sums,
            },
            z: &self.z,
            z_stride: rank,
            k,
            m,
        }
    }
}

/// What one [`run_panels`] call computes: panels `panels` of the weight, onto the output or
/// not, with the bias (all of it, `[out]`) added as each tile is first stored, on `path` with
/// the micro-kernel it has for the weight's format.
#[derive(Clone)]
pub(crate) struct Run<'a> {
    pub(crate) panels: std::ops::Range<usize>,
    pub(crate) accumulate: bool,
    pub(crate) bias: Option<&'a [f32]>,
    pub(crate) path: Path,
    pub(crate) kernel: MicroKernel,
    /// Pack the rows first: when they run over at least [`PACK_PANELS`] panels.
    pub(crate) pack: bool,
}

impl<'a> Run<'a> {
    pub(crate) fn new(
        panels: std::ops::Range<usize>,
        accumulate: bool,
        bias: Option<&'a [f32]>,
        path: Path,
        w: &PackedWeight,
    ) -> Self {
        let pack = panels.len() >= PACK_PANELS;
        Self {
            panels,
            accumulate,
            bias,
            path,
            kernel: micro_kernel(path, w.format.kind()),
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
        let prep = bufs.prepare(x, lda, w.inp, m, part, run);
        run_panels(out, stride, &prep, w, run);
    });
}

thread_local! {
    /// A narrow last f32 panel widened to 16 columns, reused from call to call.
    static WIDE: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
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
    let (panels, accumulate, kernel) = (run.panels.clone(), run.accumulate, run.kernel);
    let low_kernel = micro_kernel(run.path, FormatKind::F32);
    assert_eq!(k, prep.k, "rows prepared for another inner dimension");
    if panels.is_empty() {
        return;
    }
    let last = n.div_ceil(PANEL) - 1;
    // Narrow last panels (f32 weights hold only their real rows), widened once per call: the
    // weight's, and each term's B.
    let mut wide = WIDE.with_borrow_mut(std::mem::take);
    let narrow = panels.contains(&last) && w.panel_width(last) < PANEL;
    if narrow {
        wide_panel(w, last, &mut wide);
    }
    let wide_b: Vec<Cow<'_, [f32]>> = prep
        .part
        .terms
        .iter()
        .map(|term| {
            if panels.contains(&last) && term.b.panel_width(last) < PANEL {
                let mut v = Vec::new();
                wide_panel(term.b, last, &mut v);
                Cow::Owned(v)
            } else {
                Cow::Borrowed(&[][..])
            }
        })
        .collect();
    let block = |p: usize, k0: usize, kb: usize| -> Block<'_> {
        if narrow && p == last {
            Block::F32(&wide[k0 * PANEL..(k0 + kb) * PANEL])
        } else {
            w.block(p, k0, kb)
        }
    };
    let (data, data_len) = w.value_bytes();
    let data_end = data.wrapping_add(data_len);
    // The bytes after a block, as far as the weight goes: what the next tile reads.
    let after = |b: &Block<'_>| -> Option<(*const u8, usize)> {
        let (start, len) = b.bytes();
        let next = start.wrapping_add(len);
        let left = (data_end as usize).saturating_sub(next as usize);
        (left > 0).then_some((next, len.min(left)))
    };
    #[allow(clippy::too_many_arguments)]
    // One register tile: the rows of `t` against panel p's inner block k0..k0 + kb, with their
    // low-rank steps when this is the last block.
    let one = |t: &TileRows,
               p: usize,
               k0: usize,
               kb: usize,
               b: Block<'_>,
               next: Option<(*const u8, usize)>,
               col: usize,
               acc: bool,
               out: &mut [f32]| {
        // Term `at`'s steps for rows `i..i + r`: their `s x A^T` and its panel p of `B`.
        let steps = |at: usize, i: usize, r: usize| {
            let term = prep.part.terms[at];
            let rank = term.b.inp;
            let z = &prep.z[i * prep.z_stride..i * prep.z_stride + rank * r];
            let zb = if p != last || wide_b[at].is_empty() {
                &term.b.f32_values()[p * PANEL * rank..(p + 1) * PANEL * rank]
            } else {
                &wide_b[at][..]
            };
            (z, zb, rank)
        };
        let low = t
            .term
            .filter(|_| k0 + kb == k)
            .map(|at| steps(at, t.i, t.r));
        let a = match prep.lda {
            None => {
                let start = t.packed(k).start;
                &prep.x[start + k0 * t.r..start + (k0 + kb) * t.r]
            }
            Some(lda) => &prep.x[t.i * lda + k0..],
        };
        let pairs = if prep.pairs.is_empty() {
            &[][..]
        } else {
            let start = t.i * k.div_ceil(2) + k0 / 2 * t.r;
            &prep.pairs[start..start + kb.div_ceil(2) * t.r]
        };
        let quads = if prep.quads.q.is_empty() {
            Quads::default()
        } else {
            assert_eq!(
                k0 % INPUT_GROUP,
                0,
                "an int8-row block starts inside a group"
            );
            let groups = k.div_ceil(INPUT_GROUP);
            let (g0, gb) = (k0 / INPUT_GROUP, kb.div_ceil(INPUT_GROUP));
            let per = INPUT_GROUP / 4;
            let q0 = t.i * groups * per + g0 * per * t.r;
            let s0 = t.i * groups + g0 * t.r;
            Quads {
                q: &prep.quads.q[q0..q0 + gb * per * t.r],
                scales: &prep.quads.scales[s0..s0 + gb * t.r],
                sums: &prep.quads.sums[s0..s0 + gb * t.r],
            }
        };
        let cols = PANEL.min(n - p * PANEL);
        let tile = Tile {
            rows: t.r,
            a,
            lda: prep.lda,
            pairs,
            quads,
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
        (kernel.run)(&tile, &mut out[t.i * stride + col..]);
        if k0 + kb < k {
            return;
        }
        // A mixed tile's terms, each a product of `rank` steps onto the stored rows (in cache).
        for run in &prep.runs[t.split.clone()] {
            let (z, zb, rank) = steps(run.term, run.i, run.r);
            let tile = Tile {
                rows: run.r,
                a: z,
                lda: None,
                pairs: &[],
                quads: Quads::default(),
                kb: rank,
                b: Block::F32(zb),
                next: None,
                low: None,
                bias: None,
                ldc: stride,
                cols,
                acc: true,
            };
            (low_kernel.run)(&tile, &mut out[run.i * stride + col..]);
        }
    };
    if k <= SHORT_K {
        // A short inner dimension (merging a low-rank update, k = r; attention heads): the
        // output is most of the traffic, so each tile's rows go through every panel in turn and
        // the output is streamed once, tile by tile, front to back.
        for t in prep.tiles {
            for p in panels.clone() {
                let col = (p - panels.start) * PANEL;
                one(t, p, 0, k, block(p, 0, k), None, col, accumulate, out);
            }
        }
    } else if m <= BLOCK_ROWS {
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
                let b = block(p, k0, kb);
                // With whole panels as blocks the next one is too far ahead to fetch early.
                let next = if kb == k { None } else { after(&b) };
                for t in prep.tiles {
                    one(t, p, k0, kb, b, next, col, accumulate || k0 > 0, out);
                }
                k0 += kb;
            }
        }
    } else {
        let mut k0 = 0;
        while k0 < k {
            let kb = BLOCK_K.min(k - k0);
            for p in panels.clone() {
                let b = block(p, k0, kb);
                let col = (p - panels.start) * PANEL;
                for t in prep.tiles {
                    one(t, p, k0, kb, b, None, col, accumulate || k0 > 0, out);
                }
            }
            k0 += kb;
        }
    }
    WIDE.with_borrow_mut(|w| *w = wide);
}
