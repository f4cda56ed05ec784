//! switchyard's own CPU kernels on plain slices: the packed projection kernel every model
//! projection runs through ([`PackedWeight`], [`packed_matmul`], [`packed_matmul_with`] with fused
//! low-rank terms and bias, [`packed_matmul_strided`] for attention heads), and the vectorised
//! pieces around it (dot, axpy, softmax, GELU, residual add with layer norm). Each has an AVX2+FMA
//! path, picked at run time, and a portable one (`SWITCHYARD_KERNELS=portable` forces it).
//!
//! Every `unsafe` block is preceded by the asserts that bound what it reads and writes.

#[cfg(test)]
mod gemm_reference;
#[cfg(test)]
use gemm_reference::{MatRef, Parallelism, matmul_into};

fn rayon_threads() -> usize {
    static THREADS: std::sync::OnceLock<usize> = std::sync::OnceLock::new();
    *THREADS.get_or_init(|| {
        std::env::var("RAYON_NUM_THREADS")
            .ok()
            .and_then(|v| v.parse().ok())
            .filter(|&n: &usize| n > 0)
            .unwrap_or_else(|| {
                std::thread::available_parallelism()
                    .map(|n| n.get())
                    .unwrap_or(1)
            })
    })
}

/// The first `n` values of each of `m` rows `stride` apart set to zero: a product with an empty
/// inner dimension.
fn zero_rows(y: &mut [f32], stride: usize, m: usize, n: usize) {
    for row in y.chunks_mut(stride).take(m) {
        row[..n].fill(0.0);
    }
}

thread_local! {
    /// Per-thread buffers of the projection kernel (packed input rows, low-rank down products,
    /// the few-rows path's output blocks), reused so a call allocates nothing in steady state.
    static BUFFERS: std::cell::RefCell<Buffers> = std::cell::RefCell::new(Buffers::default());
}

/// Output columns per panel of a [`PackedWeight`]: two AVX2 vectors.
pub const PANEL: usize = 16;
/// Input rows per register tile: 6 rows x 2 vectors is 12 accumulators, which with the two
/// weight vectors and one broadcast fills the 16 AVX2 registers.
const TILE_ROWS: usize = 6;
/// Inner-dimension block of the many-rows path: one panel's slice of it (384 x 16 floats,
/// 24 KB) stays in L1 while every row tile passes over it.
const BLOCK_K: usize = 384;
/// Inner-dimension block when the rows fit one row block: 128 x 16 floats (8 KB), the next one
/// fetched while this one computes.
const SMALL_BLOCK_K: usize = 128;
/// Inner dimensions up to this go tile by tile through every panel (see [`run_panels`]).
const SHORT_K: usize = 64;
/// Rows per task: 72 x 384 floats of input (108 KB, packed) stay in L2 while every panel passes.
const BLOCK_ROWS: usize = 72;
/// Packed rows are this many floats longer than the inner dimension (one cache line), so that
/// with an inner dimension a multiple of 1024 the row tiles' blocks, read one after another over
/// the same weight block, do not all fall on the same L1 sets (seen +1-4% at 16 rows). The pad is
/// never written or read.
const ROW_PAD: usize = 16;

/// Rows are packed when they run over at least this many panels; over fewer (attention heads)
/// packing costs more than the sequential reads save.
const PACK_PANELS: usize = 8;

/// A weight `W [out, in]` stored for [`packed_matmul`]: in panels of [`PANEL`] output rows, and
/// inside a panel input-major, so the kernel reads each panel front to back as one stream (16
/// consecutive floats per input feature) and uses every value it loads for a whole row tile.
/// Packed once when the model loads (or when a merged variant is built), so no call packs
/// anything. The last panel is padded with zeros.
#[derive(Clone)]
pub struct PackedWeight {
    data: Vec<f32>,
    out: usize,
    inp: usize,
}

impl std::fmt::Debug for PackedWeight {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "PackedWeight [{} x {}]", self.out, self.inp)
    }
}

impl PackedWeight {
    /// Packs a row-major `w [out, inp]`.
    pub fn pack(w: &[f32], out: usize, inp: usize) -> Self {
        assert!(w.len() >= out * inp, "weight does not fit its slice");
        let mut packed = Self::empty();
        packed.repack_strided(w, out, inp, inp, 1);
        packed
    }

    /// Packs a contiguous f32 CPU tensor `[out, inp]`.
    pub fn from_tensor(w: &candle_core::Tensor) -> candle_core::Result<Self> {
        let (out, inp) = w.dims2()?;
        let w = w.to_dtype(candle_core::DType::F32)?.contiguous()?;
        with_f32(&w, |d| Self::pack(d, out, inp))
    }

    /// Repacks this buffer (reusing its memory) with `W [out, inp]` read from a strided view:
    /// `W[j, kk] = src[j * row_stride + kk * col_stride]`; a transposed source is a view with
    /// `row_stride` 1.
    pub fn repack_strided(
        &mut self,
        src: &[f32],
        out: usize,
        inp: usize,
        row_stride: usize,
        col_stride: usize,
    ) {
        if out > 0 && inp > 0 {
            let last = (out - 1) * row_stride + (inp - 1) * col_stride;
            assert!(last < src.len(), "weight view does not fit its slice");
        }
        let panels = out.div_ceil(PANEL);
        self.data.clear();
        self.data.resize(panels * PANEL * inp, 0.0);
        (self.out, self.inp) = (out, inp);
        for (p, panel) in self
            .data
            .chunks_mut(PANEL * inp.max(1))
            .enumerate()
            .take(panels)
        {
            let width = PANEL.min(out - p * PANEL);
            if row_stride == 1 {
                // A transposed source: the panel's 16 values for one input feature are
                // consecutive in it.
                for kk in 0..inp {
                    let from = p * PANEL + kk * col_stride;
                    panel[kk * PANEL..kk * PANEL + width].copy_from_slice(&src[from..from + width]);
                }
            } else {
                for c in 0..width {
                    let j = p * PANEL + c;
                    if col_stride == 1 {
                        let row = &src[j * row_stride..j * row_stride + inp];
                        for (kk, &v) in row.iter().enumerate() {
                            panel[kk * PANEL + c] = v;
                        }
                    } else {
                        for kk in 0..inp {
                            panel[kk * PANEL + c] = src[j * row_stride + kk * col_stride];
                        }
                    }
                }
            }
        }
    }

    /// An empty weight, `[0, 0]`, to repack into.
    pub fn empty() -> Self {
        Self {
            data: Vec::new(),
            out: 0,
            inp: 0,
        }
    }

    /// The row-major `[out, inp]` matrix again.
    pub fn unpack(&self) -> Vec<f32> {
        let (out, inp) = (self.out, self.inp);
        let mut w = vec![0f32; out * inp];
        for (p, panel) in self.data.chunks(PANEL * inp.max(1)).enumerate() {
            for c in 0..PANEL.min(out.saturating_sub(p * PANEL)) {
                let row = &mut w[(p * PANEL + c) * inp..(p * PANEL + c + 1) * inp];
                for (kk, v) in row.iter_mut().enumerate() {
                    *v = panel[kk * PANEL + c];
                }
            }
        }
        w
    }

    /// The row-major matrix as a tensor `[out, inp]`.
    pub fn to_tensor(&self) -> candle_core::Result<candle_core::Tensor> {
        candle_core::Tensor::from_vec(
            self.unpack(),
            (self.out, self.inp),
            &candle_core::Device::Cpu,
        )
    }

    pub fn out_features(&self) -> usize {
        self.out
    }

    pub fn in_features(&self) -> usize {
        self.inp
    }

    /// Bytes held, padding included.
    pub fn resident_bytes(&self) -> usize {
        self.data.len() * 4
    }
}

/// `y[m, out] = (accumulate ? y : 0) + x[m, in] W^T` with `W` packed (see [`PackedWeight`]): the
/// one product every projection runs, from a decode step's single row to a prefill of thousands.
///
/// Register tiles of up to 6 rows by 16 columns (12 vector accumulators, AVX2+FMA when the CPU
/// has them, portable code that the compiler vectorises otherwise). The input rows of each row
/// block (72 rows) are first packed tile by tile, inner-major, so a tile reads its rows as one
/// sequential stream; the block then stays in L2 while every panel passes over it, in inner
/// blocks that stay in L1 while every row tile passes. Work is split across the rayon pool by
/// row blocks when there are enough of them, by panels otherwise (few rows: decode), so the
/// weights are read from memory once per call whatever the row count. Allocates nothing in
/// steady state.
pub fn packed_matmul(y: &mut [f32], x: &[f32], m: usize, w: &PackedWeight, accumulate: bool) {
    packed_matmul_with(y, x, m, w, accumulate, None, &[]);
}

/// A low-rank term the kernel adds to some rows of its output: rows `rows` (of the call's `m`)
/// get `s (x A^T) B^T`, with `A [r, in]` and `B [out, r]` packed and `s` the term's scale.
#[derive(Debug, Clone)]
pub struct RowTerm<'a> {
    pub rows: std::ops::Range<usize>,
    pub a: &'a PackedWeight,
    pub b: &'a PackedWeight,
    pub scale: f32,
}

/// [`packed_matmul`] plus low-rank terms on runs of rows, fused: each row block computes its
/// rows' down products `s x A^T` from the same packed rows the base product reads, while they
/// are in cache, and each register tile of a term's rows runs the term's `r` extra steps
/// through `B` in the same accumulators as its base product. A term costs its arithmetic and
/// no pass of its own over the input or the output. The terms' row ranges must not overlap.
/// A `bias [out]` is added to every row as the tiles are stored (no pass of its own either).
#[allow(clippy::too_many_arguments)]
pub fn packed_matmul_with(
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
) {
    use rayon::prelude::*;
    let (n, k) = (w.out, w.inp);
    for t in terms {
        assert!(
            t.rows.end <= m && t.a.inp == k && t.b.inp == t.a.out && t.b.out == n,
            "a low-rank term does not fit the product"
        );
    }
    assert!(
        x.len() >= m * k && y.len() >= m * n,
        "a matrix does not fit its slice"
    );
    assert!(
        bias.is_none_or(|b| b.len() == n),
        "the bias does not fit the product"
    );
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        // No input features: the base product and every term's down product are zero.
        for row in y[..m * n].chunks_mut(n) {
            match (accumulate, bias) {
                (true, Some(b)) => row.iter_mut().zip(b).for_each(|(d, s)| *d += s),
                (false, Some(b)) => row.copy_from_slice(b),
                (false, None) => row.fill(0.0),
                (true, None) => {}
            }
        }
        return;
    }
    let fast = use_avx2();
    let panels = n.div_ceil(PANEL);
    let threads = rayon_threads();
    let x = &x[..m * k];
    let y = &mut y[..m * n];
    let row_blocks = m.div_ceil(BLOCK_ROWS);
    let block = |i: usize, yb: &mut [f32]| {
        let rows = yb.len() / n;
        let part = Part::new(i * BLOCK_ROWS, rows, terms);
        let xb = &x[i * BLOCK_ROWS * k..];
        let run = Run::new(0..panels, accumulate, bias, fast);
        panels_into(yb, n, xb, k, rows, w, &part, &run);
    };
    if threads <= 1 || m * n * k < (1 << 20) {
        for (i, yb) in y.chunks_mut(BLOCK_ROWS * n).enumerate() {
            block(i, yb);
        }
        return;
    }
    if row_blocks >= 2 * threads {
        y.par_chunks_mut(BLOCK_ROWS * n)
            .enumerate()
            .for_each(|(i, yb)| block(i, yb));
        return;
    }
    // Few rows: the rows are packed (and the terms' down products computed) once, here; the
    // panels are split, about four blocks per thread, each computed into its own part of one
    // reused buffer and then copied (or added) into place. The buffers are taken out of the
    // thread-local while the pool runs: a rayon wait here may run another call's work.
    let mut bufs = BUFFERS.with_borrow_mut(std::mem::take);
    let mut scratch = std::mem::take(&mut bufs.out);
    let per = panels.div_ceil(threads * 4).max(1);
    scratch.clear();
    scratch.resize(m * panels * PANEL, 0.0);
    let part = Part::new(0, m, terms);
    let all = Run::new(0..panels, false, bias, fast);
    let prep = bufs.prepare(x, k, k, m, &part, all.pack, fast);
    scratch
        .par_chunks_mut(per * PANEL * m)
        .enumerate()
        .for_each(|(b, out)| {
            let p0 = b * per;
            let width = out.len() / m;
            let p1 = p0 + width / PANEL;
            let run = Run {
                panels: p0..p1,
                ..all.clone()
            };
            run_panels(out, width, &prep, w, &run);
        });
    for (b, block) in scratch.chunks(per * PANEL * m).enumerate() {
        let j0 = b * per * PANEL;
        let width = block.len() / m;
        let valid = width.min(n - j0.min(n));
        for i in 0..m {
            let dst = &mut y[i * n + j0..i * n + j0 + valid];
            let src = &block[i * width..i * width + valid];
            if accumulate {
                dst.iter_mut().zip(src).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(src);
            }
        }
    }
    bufs.out = scratch;
    BUFFERS.with_borrow_mut(|b| *b = bufs);
}

/// [`packed_matmul`] on strided rows, on the calling thread: `y[i * y_stride + j] (+)=
/// x[i * x_stride + :] . W[j, :]` for `i < m`. For small products inside work that is already
/// parallel (attention, per sequence and head).
pub fn packed_matmul_strided(
    y: &mut [f32],
    y_stride: usize,
    x: &[f32],
    x_stride: usize,
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
) {
    let (n, k) = (w.out, w.inp);
    if m == 0 || n == 0 {
        return;
    }
    assert!(
        x_stride >= k && y_stride >= n,
        "rows of a strided matrix overlap"
    );
    assert!(
        (m - 1) * x_stride + k <= x.len() && (m - 1) * y_stride + n <= y.len(),
        "a matrix does not fit its slice"
    );
    if k == 0 {
        if !accumulate {
            zero_rows(y, y_stride, m, n);
        }
        return;
    }
    let panels = n.div_ceil(PANEL);
    let fast = use_avx2();
    let mut i0 = 0;
    while i0 < m {
        let rows = BLOCK_ROWS.min(m - i0);
        let run = Run::new(0..panels, accumulate, None, fast);
        panels_into(
            &mut y[i0 * y_stride..],
            y_stride,
            &x[i0 * x_stride..],
            x_stride,
            rows,
            w,
            &Part::new(0, rows, &[]),
            &run,
        );
        i0 += rows;
    }
}

/// The rows one [`panels_into`] call covers (`first..first + m` of the whole product) and the
/// low-rank terms that touch them.
struct Part<'a, 'b> {
    first: usize,
    terms: Vec<&'b RowTerm<'a>>,
}

impl<'a, 'b> Part<'a, 'b> {
    /// Keeps only the terms that overlap rows `first..first + m`, so each block looks at a few.
    fn new(first: usize, m: usize, terms: &'b [RowTerm<'a>]) -> Self {
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
struct TileRows {
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
struct Buffers {
    tiles: Vec<TileRows>,
    x: Vec<f32>,
    down: Vec<f32>,
    z: Vec<f32>,
    out: Vec<f32>,
}

/// The rows of one part, ready for the panels: cut into register tiles, packed, and with each
/// tile's low-rank down product done.
struct Prepared<'p, 'a, 'b> {
    part: &'p Part<'a, 'b>,
    tiles: &'p [TileRows],
    /// The rows packed tile by tile, inner-major: the tile of rows `i..i + r` at
    /// [`TileRows::packed`], its row `ii`'s input `q` at `start + q * r + ii`; or, with `lda`, the
    /// caller's rows as they are, `lda` apart (a product over few panels, where packing would cost more than it saves).
    x: &'p [f32],
    lda: Option<usize>,
    /// `s x A^T` for the tiles with a term, packed the same way: the tile at `i * z_stride`.
    z: &'p [f32],
    z_stride: usize,
    k: usize,
    m: usize,
}

impl Buffers {
    /// Cuts rows `0..m` of `x` (rows `lda` apart, `k` inputs each) into register tiles at the
    /// part's term boundaries, packs them if `pack`, and computes each tile's `s x A^T`.
    #[allow(clippy::too_many_arguments)]
    fn prepare<'p, 'a, 'b>(
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

/// One register tile through the kernel for its row count.
#[inline]
fn tile_dispatch(r: usize, t: &Tile<'_>, c: &mut [f32], fast: bool) {
    match r {
        6 => packed_tile::<6>(t, c, fast),
        5 => packed_tile::<5>(t, c, fast),
        4 => packed_tile::<4>(t, c, fast),
        3 => packed_tile::<3>(t, c, fast),
        2 => packed_tile::<2>(t, c, fast),
        _ => packed_tile::<1>(t, c, fast),
    }
}

/// What one [`run_panels`] call computes: panels `panels` of the weight, onto the output or
/// not, with the bias (all of it, `[out]`) added as each tile is first stored.
#[derive(Clone)]
struct Run<'a> {
    panels: std::ops::Range<usize>,
    accumulate: bool,
    bias: Option<&'a [f32]>,
    fast: bool,
    /// Pack the rows first: when they run over at least [`PACK_PANELS`] panels.
    pack: bool,
}

impl<'a> Run<'a> {
    fn new(
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
fn panels_into(
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

/// The first `r` rows of `x` (`lda` apart, `k` inputs each) packed inner-major into `dst`:
/// `dst[q * r + ii] = x[ii * lda + q]`.
fn pack_tile(r: usize, dst: &mut [f32], x: &[f32], lda: usize, k: usize) {
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

/// Panels `run.panels` of `w` for the prepared rows, into `out` (row stride `stride`, column 0
/// at panel `run.panels.start`). Columns past `w`'s last are not written. With the last inner
/// block of each tile, the tile's low-rank steps (if its rows have a term) run in the same
/// accumulators; with the first, the bias is added.
fn run_panels(
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

/// One register tile's inputs: `c[i, j] (+)= a[i, :kb] . b[:kb, j] (+ z[i, :] . zb[:, j])` for
/// `i < R`, `j < cols`. `a` is the tile's rows packed inner-major (`a[q * R + i]`), `b` a panel
/// block (`kb` x 16, input-major). `next` is the block the next tile will read: the kernel asks
/// for it one cache line per step, into L2 (which measured a few per cent faster at 16 rows than
/// into L1), so memory is read while the arithmetic runs instead of between tiles. `low` is a
/// low-rank term's steps, run in the same accumulators: `s x A^T` packed (`rank` steps), and the
/// term's panel of `B` (`rank` x 16).
struct Tile<'a> {
    a: &'a [f32],
    /// `None`: `a` is packed as above; `Some(lda)`: `a`'s rows are `lda` apart (`a[i * lda + q]`).
    lda: Option<usize>,
    kb: usize,
    b: &'a [f32],
    next: &'a [f32],
    low: Option<(&'a [f32], &'a [f32], usize)>,
    /// Added to every row of the tile (`cols` values).
    bias: Option<&'a [f32]>,
    ldc: usize,
    cols: usize,
    acc: bool,
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
                (true, true) => packed_tile_avx2::<R, false, true>(t, c),
                (true, false) => packed_tile_avx2::<R, true, true>(t, c),
                (false, true) => packed_tile_avx2::<R, false, false>(t, c),
                (false, false) => packed_tile_avx2::<R, true, false>(t, c),
            }
        };
        return;
    }
    let _ = fast;
    packed_tile_portable::<R>(t, c);
}

/// The portable tile: sixteen-wide rows of partial sums, which the compiler vectorises.
fn packed_tile_portable<const R: usize>(t: &Tile<'_>, c: &mut [f32]) {
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

/// The AVX2+FMA tile. With fewer than four rows the fused multiply-adds of one accumulator would
/// wait on each other (a chain as long as the inner dimension) and a single stream through
/// memory would leave bandwidth unused, so the block is cut into `S` segments (4 for one row, 2
/// for two or three) that run side by side, each with its own accumulators, summed at the end.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn packed_tile_avx2<const R: usize, const FETCH: bool, const PACKED: bool>(
    t: &Tile<'_>,
    c: &mut [f32],
) {
    match R {
        1 => unsafe { packed_tile_avx2_streams::<R, 4, FETCH, PACKED>(t, c) },
        2 | 3 => unsafe { packed_tile_avx2_streams::<R, 2, FETCH, PACKED>(t, c) },
        _ => unsafe { packed_tile_avx2_streams::<R, 1, FETCH, PACKED>(t, c) },
    }
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn packed_tile_avx2_streams<
    const R: usize,
    const S: usize,
    const FETCH: bool,
    const PACKED: bool,
>(
    t: &Tile<'_>,
    c: &mut [f32],
) {
    use std::arch::x86_64::*;
    let (pa, pb, pn, kb) = (t.a.as_ptr(), t.b.as_ptr(), t.next.as_ptr(), t.kb);
    // Input q of row i is at pa[q * step + i * lda]: packed, or rows lda apart.
    let (step, lda) = if PACKED {
        (R, 1)
    } else {
        (1, t.lda.unwrap_or(0))
    };
    let mut lo = [[_mm256_setzero_ps(); R]; S];
    let mut hi = [[_mm256_setzero_ps(); R]; S];
    let seg = kb / S;
    for p in 0..seg {
        for s in 0..S {
            let q = p + s * seg;
            // SAFETY: q < S * seg <= kb, so the panel row q, the row q of next and the inputs
            // q of every row are in bounds (asserted by the caller).
            unsafe {
                if FETCH {
                    _mm_prefetch::<_MM_HINT_T1>(pn.add(q * PANEL) as *const i8);
                }
                let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
                let a = pa.add(q * step);
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*a.add(i * lda));
                    lo[s][i] = _mm256_fmadd_ps(x, b0, lo[s][i]);
                    hi[s][i] = _mm256_fmadd_ps(x, b1, hi[s][i]);
                }
            }
        }
    }
    for q in S * seg..kb {
        // SAFETY: q < kb: in bounds as above.
        unsafe {
            let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
            let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
            let a = pa.add(q * step);
            for i in 0..R {
                let x = _mm256_broadcast_ss(&*a.add(i * lda));
                lo[0][i] = _mm256_fmadd_ps(x, b0, lo[0][i]);
                hi[0][i] = _mm256_fmadd_ps(x, b1, hi[0][i]);
            }
        }
    }
    if let Some((z, zb, rank)) = t.low {
        let (pz, pzb) = (z.as_ptr(), zb.as_ptr());
        for q in 0..rank {
            // SAFETY: q < rank: z holds rank * R values and zb rank * 16 (asserted by the
            // caller).
            unsafe {
                let b0 = _mm256_loadu_ps(pzb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pzb.add(q * PANEL + 8));
                let a = pz.add(q * R);
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*a.add(i));
                    lo[0][i] = _mm256_fmadd_ps(x, b0, lo[0][i]);
                    hi[0][i] = _mm256_fmadd_ps(x, b1, hi[0][i]);
                }
            }
        }
    }
    for s in 1..S {
        for i in 0..R {
            lo[0][i] = _mm256_add_ps(lo[0][i], lo[s][i]);
            hi[0][i] = _mm256_add_ps(hi[0][i], hi[s][i]);
        }
    }
    let (mut lo, mut hi) = (lo[0], hi[0]);
    let (ldc, cols) = (t.ldc, t.cols);
    let pc = c.as_mut_ptr();
    if let (Some(bias), true) = (t.bias, cols == PANEL) {
        // SAFETY: bias holds cols = 16 values (asserted by the caller).
        let (b0, b1) = unsafe {
            (
                _mm256_loadu_ps(bias.as_ptr()),
                _mm256_loadu_ps(bias.as_ptr().add(8)),
            )
        };
        for i in 0..R {
            lo[i] = _mm256_add_ps(lo[i], b0);
            hi[i] = _mm256_add_ps(hi[i], b1);
        }
    }
    if cols == PANEL {
        for i in 0..R {
            // SAFETY: (R - 1) * ldc + 16 <= c.len() (asserted by the caller).
            unsafe {
                let d = pc.add(i * ldc);
                let (mut v0, mut v1) = (lo[i], hi[i]);
                if t.acc {
                    v0 = _mm256_add_ps(v0, _mm256_loadu_ps(d));
                    v1 = _mm256_add_ps(v1, _mm256_loadu_ps(d.add(8)));
                }
                _mm256_storeu_ps(d, v0);
                _mm256_storeu_ps(d.add(8), v1);
            }
        }
    } else {
        let mut tmp = [0f32; PANEL];
        for i in 0..R {
            // SAFETY: tmp holds 16 floats.
            unsafe {
                _mm256_storeu_ps(tmp.as_mut_ptr(), lo[i]);
                _mm256_storeu_ps(tmp.as_mut_ptr().add(8), hi[i]);
            }
            if let Some(bias) = t.bias {
                tmp.iter_mut().zip(bias).for_each(|(d, s)| *d += s);
            }
            let dst = &mut c[i * ldc..i * ldc + cols];
            if t.acc {
                dst.iter_mut().zip(&tmp).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(&tmp[..cols]);
            }
        }
    }
}

/// `a . b` over the shorter of the two, with the vector path when the CPU has it.
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    if use_avx2() {
        dot_avx2(a, b)
    } else {
        dot_portable(a, b)
    }
}

/// `y += alpha * x` over the shorter of the two (the compiler vectorises it).
pub fn axpy(y: &mut [f32], alpha: f32, x: &[f32]) {
    y.iter_mut().zip(x).for_each(|(d, s)| *d += alpha * s);
}

fn use_avx2() -> bool {
    static FAST: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *FAST.get_or_init(|| {
        if std::env::var("SWITCHYARD_KERNELS").is_ok_and(|v| v == "portable") {
            return false;
        }
        #[cfg(target_arch = "x86_64")]
        {
            std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
}

/// A dot product with eight independent partial sums, which the compiler vectorises.
pub fn dot_portable(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0f32; 8];
    let chunks = a.len() / 8;
    for c in 0..chunks {
        for l in 0..8 {
            acc[l] += a[c * 8 + l] * b[c * 8 + l];
        }
    }
    let mut sum: f32 = acc.iter().sum();
    for i in chunks * 8..a.len().min(b.len()) {
        sum += a[i] * b[i];
    }
    sum
}

fn dot_avx2(a: &[f32], b: &[f32]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            dot_avx2_inner(a, b)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        dot_portable(a, b)
    }
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2_inner(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let chunks = n / 32;
    let mut s0 = _mm256_setzero_ps();
    let mut s1 = _mm256_setzero_ps();
    let mut s2 = _mm256_setzero_ps();
    let mut s3 = _mm256_setzero_ps();
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    for c in 0..chunks {
        let o = c * 32;
        // SAFETY: o + 32 <= n, and n is within both slices.
        unsafe {
            s0 = _mm256_fmadd_ps(_mm256_loadu_ps(pa.add(o)), _mm256_loadu_ps(pb.add(o)), s0);
            s1 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 8)),
                _mm256_loadu_ps(pb.add(o + 8)),
                s1,
            );
            s2 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 16)),
                _mm256_loadu_ps(pb.add(o + 16)),
                s2,
            );
            s3 = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(o + 24)),
                _mm256_loadu_ps(pb.add(o + 24)),
                s3,
            );
        }
    }
    let s = _mm256_add_ps(_mm256_add_ps(s0, s1), _mm256_add_ps(s2, s3));
    let mut lanes = [0f32; 8];
    // SAFETY: lanes has room for eight floats.
    unsafe { _mm256_storeu_ps(lanes.as_mut_ptr(), s) };
    let mut sum: f32 = lanes.iter().sum();
    for i in chunks * 32..n {
        sum += a[i] * b[i];
    }
    sum
}

/// `erf(x)` in f32 by a rational approximation on [-4, 4] (outside it erf is ±1 to within
/// 2e-8): a polynomial over a polynomial, no branches and no calls, so a loop over a slice
/// vectorises. Agrees with the libm erf within a few 1e-7.
#[inline]
pub fn erf_fast(x: f32) -> f32 {
    let x = x.clamp(-4.0, 4.0);
    let x2 = x * x;
    let mut p = -2.726_142_3e-10_f32;
    p = p.mul_add(x2, 2.770_681_4e-8);
    p = p.mul_add(x2, -2.101_024e-6);
    p = p.mul_add(x2, -5.692_506_4e-5);
    p = p.mul_add(x2, -7.349_906_3e-4);
    p = p.mul_add(x2, -2.954_600_1e-3);
    p = p.mul_add(x2, -1.609_603_3e-2);
    let mut q = -1.456_607_2e-5_f32;
    q = q.mul_add(x2, -2.133_740_6e-4);
    q = q.mul_add(x2, -1.682_827e-3);
    q = q.mul_add(x2, -7.373_329e-3);
    q = q.mul_add(x2, -1.426_474e-2);
    x * p / q
}

/// `e^x` in f32 without a call or a branch, so a loop over a slice vectorises: `x = n ln 2 + r`
/// with `|r| <= ln 2 / 2`, a degree-6 Taylor polynomial for `e^r` (truncation below 2e-7
/// relative), and `2^n` built in the exponent bits. Inputs are clamped to [-87, 88], where f32
/// stays normal, so a masked score of -1e9 gives 1.6e-38 rather than 0.
#[inline]
pub fn exp_fast(x: f32) -> f32 {
    const LN2_HI: f32 = 0.693_145_75;
    const LN2_LO: f32 = 1.428_606_8e-6;
    let x = x.clamp(-87.0, 88.0);
    let n = (x * std::f32::consts::LOG2_E + 0.5).floor();
    let r = (-n).mul_add(LN2_LO, (-n).mul_add(LN2_HI, x));
    let mut p = 1.0 / 720.0f32;
    p = p.mul_add(r, 1.0 / 120.0);
    p = p.mul_add(r, 1.0 / 24.0);
    p = p.mul_add(r, 1.0 / 6.0);
    p = p.mul_add(r, 0.5);
    p = p.mul_add(r, 1.0);
    p = p.mul_add(r, 1.0);
    p * f32::from_bits((((n as i32) + 127) as u32) << 23)
}

/// Each row of `scores` (rows `width` long) becomes `softmax(scale * row + bias)`, in place.
pub fn softmax_rows_in_place(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    if use_avx2() {
        softmax_dispatch(scores, width, scale, bias);
    } else {
        softmax_portable(scores, width, scale, bias);
    }
}

#[inline]
fn softmax_portable(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    assert!(bias.len() >= width, "bias shorter than a row");
    for row in scores.chunks_mut(width.max(1)) {
        let mut max = f32::NEG_INFINITY;
        for (s, &b) in row.iter_mut().zip(bias) {
            *s = s.mul_add(scale, b);
            max = max.max(*s);
        }
        let mut sum = 0f32;
        for s in row.iter_mut() {
            *s = exp_fast(*s - max);
            sum += *s;
        }
        let inv = 1.0 / sum;
        row.iter_mut().for_each(|s| *s *= inv);
    }
}

fn softmax_dispatch(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            softmax_avx2(scores, width, scale, bias)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    softmax_portable(scores, width, scale, bias)
}

/// The softmax rows eight lanes at a time: the same steps as [`exp_fast`] in AVX2+FMA
/// intrinsics (the scalar code's clamp, floor and conversion keep the compiler from vectorising
/// it), with the remainder of a row on the scalar path.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn softmax_avx2(scores: &mut [f32], width: usize, scale: f32, bias: &[f32]) {
    use std::arch::x86_64::*;
    assert!(bias.len() >= width, "bias shorter than a row");
    let exp8 = |x: __m256| -> __m256 {
        let x = _mm256_min_ps(
            _mm256_max_ps(x, _mm256_set1_ps(-87.0)),
            _mm256_set1_ps(88.0),
        );
        let n = _mm256_floor_ps(_mm256_fmadd_ps(
            x,
            _mm256_set1_ps(std::f32::consts::LOG2_E),
            _mm256_set1_ps(0.5),
        ));
        let r = _mm256_fnmadd_ps(n, _mm256_set1_ps(0.693_145_75), x);
        let r = _mm256_fnmadd_ps(n, _mm256_set1_ps(1.428_606_8e-6), r);
        let mut p = _mm256_set1_ps(1.0 / 720.0);
        for c in [1.0 / 120.0, 1.0 / 24.0, 1.0 / 6.0, 0.5, 1.0, 1.0] {
            p = _mm256_fmadd_ps(p, r, _mm256_set1_ps(c));
        }
        let bits = _mm256_slli_epi32::<23>(_mm256_add_epi32(
            _mm256_cvtps_epi32(n),
            _mm256_set1_epi32(127),
        ));
        _mm256_mul_ps(p, _mm256_castsi256_ps(bits))
    };
    let sum8 = |v: __m256| -> f32 {
        let quad = _mm_add_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps::<1>(v));
        let pair = _mm_add_ps(quad, _mm_movehl_ps(quad, quad));
        _mm_cvtss_f32(_mm_add_ss(pair, _mm_shuffle_ps::<1>(pair, pair)))
    };
    let max8 = |v: __m256| -> f32 {
        let quad = _mm_max_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps::<1>(v));
        let pair = _mm_max_ps(quad, _mm_movehl_ps(quad, quad));
        _mm_cvtss_f32(_mm_max_ss(pair, _mm_shuffle_ps::<1>(pair, pair)))
    };
    let sc = _mm256_set1_ps(scale);
    for row in scores.chunks_mut(width.max(1)) {
        // A short last row (scores not a whole number of rows) is handled like any other.
        let vec_end = row.len() / 8 * 8;
        let (pr, pb) = (row.as_mut_ptr(), bias.as_ptr());
        let mut vmax = _mm256_set1_ps(f32::NEG_INFINITY);
        let mut j = 0;
        while j < vec_end {
            // SAFETY: j + 8 <= row.len() <= width <= bias.len().
            unsafe {
                let v = _mm256_fmadd_ps(_mm256_loadu_ps(pr.add(j)), sc, _mm256_loadu_ps(pb.add(j)));
                _mm256_storeu_ps(pr.add(j), v);
                vmax = _mm256_max_ps(vmax, v);
            }
            j += 8;
        }
        let mut max = max8(vmax);
        for jj in vec_end..row.len() {
            row[jj] = row[jj].mul_add(scale, bias[jj]);
            max = max.max(row[jj]);
        }
        let vm = _mm256_set1_ps(max);
        let mut vsum = _mm256_setzero_ps();
        let mut j = 0;
        while j < vec_end {
            // SAFETY: as above.
            unsafe {
                let e = exp8(_mm256_sub_ps(_mm256_loadu_ps(pr.add(j)), vm));
                _mm256_storeu_ps(pr.add(j), e);
                vsum = _mm256_add_ps(vsum, e);
            }
            j += 8;
        }
        let mut sum = sum8(vsum);
        for v in row[vec_end..].iter_mut() {
            *v = exp_fast(*v - max);
            sum += *v;
        }
        let inv = _mm256_set1_ps(1.0 / sum);
        let mut j = 0;
        while j < vec_end {
            // SAFETY: as above.
            unsafe { _mm256_storeu_ps(pr.add(j), _mm256_mul_ps(_mm256_loadu_ps(pr.add(j)), inv)) };
            j += 8;
        }
        let inv = 1.0 / sum;
        row[vec_end..].iter_mut().for_each(|v| *v *= inv);
    }
}

/// `x <- LayerNorm(x + residual)` row by row in place (rows `gamma.len()` long): mean and
/// variance over the row, then `(v - mean) / sqrt(var + eps) * gamma + beta`. The residual add,
/// the statistics and the scaling run on the row while it is in L1; rows go across the rayon
/// pool when there are many.
pub fn add_layer_norm_in_place(
    x: &mut [f32],
    residual: &[f32],
    gamma: &[f32],
    beta: &[f32],
    eps: f32,
) {
    use rayon::prelude::*;
    let width = gamma.len();
    assert!(
        width > 0
            && beta.len() == width
            && residual.len() == x.len()
            && x.len().is_multiple_of(width),
        "layer norm shapes disagree"
    );
    let fast = use_avx2();
    let rows = |xs: &mut [f32], rs: &[f32]| {
        if fast {
            norm_rows_dispatch(xs, rs, gamma, beta, eps);
        } else {
            norm_rows(xs, rs, gamma, beta, eps);
        }
    };
    if x.len() < 1 << 16 || rayon_threads() <= 1 {
        rows(x, residual);
    } else {
        let per = 64 * width;
        x.par_chunks_mut(per)
            .zip(residual.par_chunks(per))
            .for_each(|(xs, rs)| rows(xs, rs));
    }
}

#[inline(always)]
fn norm_rows(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    let width = gamma.len();
    for (row, res) in x.chunks_mut(width).zip(residual.chunks(width)) {
        // Eight partial sums, so the loop vectorises without reordering one sum.
        let mut acc = [0f32; 8];
        for (i, (v, r)) in row.iter_mut().zip(res).enumerate() {
            *v += r;
            acc[i % 8] += *v;
        }
        let mean = acc.iter().sum::<f32>() / width as f32;
        let mut sq = [0f32; 8];
        for (i, v) in row.iter().enumerate() {
            let d = v - mean;
            sq[i % 8] += d * d;
        }
        let inv = 1.0 / (sq.iter().sum::<f32>() / width as f32 + eps).sqrt();
        for ((v, g), b) in row.iter_mut().zip(gamma).zip(beta) {
            *v = (*v - mean) * inv * g + b;
        }
    }
}

fn norm_rows_dispatch(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            norm_rows_avx2(x, residual, gamma, beta, eps)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    norm_rows(x, residual, gamma, beta, eps)
}

/// The same loops compiled for AVX2+FMA.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn norm_rows_avx2(x: &mut [f32], residual: &[f32], gamma: &[f32], beta: &[f32], eps: f32) {
    norm_rows(x, residual, gamma, beta, eps)
}

/// The exact (erf) GELU in place: `x <- x/2 (1 + erf(x / sqrt 2))`.
pub fn gelu_erf_in_place(xs: &mut [f32]) {
    use rayon::prelude::*;
    let fast = use_avx2();
    let run = |xs: &mut [f32]| {
        if fast {
            gelu_erf_dispatch(xs);
        } else {
            gelu_erf_portable(xs);
        }
    };
    // A batch's activations (millions of values) are split across the pool: on one thread
    // they would leave the others idle for a few milliseconds per layer.
    if xs.len() < 1 << 16 || rayon_threads() <= 1 {
        run(xs);
    } else {
        xs.par_chunks_mut(1 << 14).for_each(run);
    }
}

#[inline(always)]
fn gelu_erf_portable(xs: &mut [f32]) {
    for x in xs.iter_mut() {
        *x = 0.5 * *x * (1.0 + erf_fast(*x * std::f32::consts::FRAC_1_SQRT_2));
    }
}

fn gelu_erf_dispatch(xs: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    {
        // SAFETY: only reached when `use_avx2` saw AVX2 and FMA on this CPU.
        #[allow(unsafe_code)]
        unsafe {
            gelu_erf_avx2(xs)
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    gelu_erf_portable(xs)
}

/// The same loop compiled for AVX2+FMA, so the compiler vectorises it eight wide with fused
/// multiply-adds.
#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn gelu_erf_avx2(xs: &mut [f32]) {
    gelu_erf_portable(xs)
}

/// Runs `f` on the f32 elements of a contiguous CPU tensor, without copying.
pub fn with_f32<R>(t: &candle_core::Tensor, f: impl FnOnce(&[f32]) -> R) -> candle_core::Result<R> {
    let (storage, layout) = t.storage_and_layout();
    let candle_core::Storage::Cpu(cpu) = &*storage else {
        candle_core::bail!("tensor is not in CPU memory");
    };
    let data = cpu.as_slice::<f32>()?;
    match layout.contiguous_offsets() {
        Some((start, end)) => Ok(f(&data[start..end])),
        None => candle_core::bail!("tensor is not contiguous"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    pub(super) fn values(n: usize, seed: u32) -> Vec<f32> {
        (0..n)
            .map(|i| (((i as u32).wrapping_mul(2654435761) ^ seed) % 1000) as f32 / 500.0 - 1.0)
            .collect()
    }

    /// `x [m, k] W [n, k]^T` by a plain loop in f64.
    fn reference_rows(x: &[f32], w: &[f32], m: usize, k: usize, n: usize) -> Vec<f32> {
        let mut out = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                out[i * n + j] = (0..k)
                    .map(|p| x[i * k + p] as f64 * w[j * k + p] as f64)
                    .sum::<f64>() as f32;
            }
        }
        out
    }

    fn paths() -> Vec<bool> {
        let mut p = vec![false];
        if use_avx2() {
            p.push(true);
        }
        p
    }

    /// `packed_matmul` with the kernel path and the input layout chosen, single-threaded: what
    /// the threaded paths run on each part.
    fn packed_on_path(
        y: &mut [f32],
        x: &[f32],
        w: &PackedWeight,
        acc: bool,
        fast: bool,
        pack: bool,
    ) {
        let panels = w.out.div_ceil(PANEL);
        for (yb, xb) in y
            .chunks_mut(BLOCK_ROWS * w.out)
            .zip(x.chunks(BLOCK_ROWS * w.inp))
        {
            let rows = xb.len() / w.inp;
            let run = Run {
                pack,
                ..Run::new(0..panels, acc, None, fast)
            };
            let part = Part::new(0, rows, &[]);
            panels_into(yb, w.out, xb, w.inp, rows, w, &part, &run);
        }
    }

    #[test]
    fn packing_round_trips_and_pads_the_last_panel_with_zeros() {
        for &(out, inp) in &[(1, 1), (16, 3), (17, 5), (40, 33), (3, 0)] {
            let w = values(out * inp, 40 + out as u32);
            let p = PackedWeight::pack(&w, out, inp);
            assert_eq!(p.unpack(), w, "{out} x {inp}");
            assert_eq!(p.resident_bytes(), out.div_ceil(PANEL) * PANEL * inp * 4);
            assert_eq!((p.out_features(), p.in_features()), (out, inp));
        }
    }

    #[test]
    fn packed_kernel_matches_a_plain_loop_for_every_row_count_and_remainder_on_both_paths() {
        // Row counts through one tile and past it (6 rows a tile, 72 a row block), output
        // widths inside a panel, at a panel and past it, inner lengths shorter than a block,
        // at several blocks and with remainders after the stream segments.
        for (fast, pack) in paths().into_iter().flat_map(|f| [(f, false), (f, true)]) {
            for m in (1..=20).chain([71, 72, 73, 150]) {
                for &(k, n) in &[
                    (1, 1),
                    (7, 5),
                    (8, 16),
                    (33, 17),
                    (130, 40),
                    (301, 37),
                    (800, 33),
                ] {
                    let x = values(m * k, 11 + m as u32);
                    let w = values(n * k, 12 + k as u32);
                    let packed = PackedWeight::pack(&w, n, k);
                    let want = reference_rows(&x, &w, m, k, n);
                    let mut out = vec![7.0; m * n];
                    packed_on_path(&mut out, &x, &packed, false, fast, pack);
                    let mut acc = vec![1.0; m * n];
                    packed_on_path(&mut acc, &x, &packed, true, fast, pack);
                    for i in 0..m * n {
                        let e = want[i];
                        let tol = 1e-4 * (1.0 + e.abs()) * (k as f32).sqrt();
                        assert!(
                            (out[i] - e).abs() < tol,
                            "fast={fast} pack={pack} m={m} k={k} n={n} at {i}: {} vs {e}",
                            out[i]
                        );
                        assert!(
                            (acc[i] - 1.0 - e).abs() < tol,
                            "accumulate, fast={fast} pack={pack} m={m}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn packed_kernel_splits_large_products_across_threads_correctly() {
        // Few rows (the panels are split, with a last block narrower than the others) and many
        // rows (row blocks), both above the size where the pool is used.
        for m in [1, 3, 4, 9, 16, 150, 300] {
            let (k, n) = (301, 1037);
            let x = values(m * k, 21);
            let w = values(n * k, 22);
            let packed = PackedWeight::pack(&w, n, k);
            let want = reference_rows(&x, &w, m, k, n);
            let mut got = vec![2.0; m * n];
            packed_matmul(&mut got, &x, m, &packed, true);
            for (g, e) in got.iter().zip(&want) {
                assert!(
                    (g - 2.0 - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "m={m}: {g} vs {e}"
                );
            }
            packed_matmul(&mut got, &x, m, &packed, false);
            for (g, e) in got.iter().zip(&want) {
                assert!((g - e).abs() < 1e-3 * (1.0 + e.abs()), "m={m}: {g} vs {e}");
            }
        }
    }

    #[test]
    fn fused_low_rank_terms_add_to_their_rows_only_on_every_path() {
        // Runs that start and end inside register tiles, a run with no term between them, terms
        // of different ranks in one call (one of them wider than a panel), on the
        // single-threaded, row-block and split-panel paths, and a short inner dimension.
        for &(m, k, n) in &[
            (20, 33, 40),
            (150, 301, 37),
            (9, 301, 1037),
            (300, 384, 64),
            (40, 24, 50),
        ] {
            let x = values(m * k, 81);
            let w = values(n * k, 82);
            let cut = (m * 2 / 3).max(7);
            let runs = [1..4, 7..cut, (cut + 1).min(m)..m];
            let ranks = [5, 20, 8];
            let scales = [2.0, 0.5, -1.5];
            let factors: Vec<(Vec<f32>, Vec<f32>)> = ranks
                .iter()
                .enumerate()
                .map(|(i, &r)| (values(r * k, 90 + i as u32), values(n * r, 95 + i as u32)))
                .collect();
            let packed: Vec<(PackedWeight, PackedWeight)> = factors
                .iter()
                .zip(ranks)
                .map(|((a, b), r)| (PackedWeight::pack(a, r, k), PackedWeight::pack(b, n, r)))
                .collect();
            let terms: Vec<RowTerm<'_>> = runs
                .iter()
                .zip(&packed)
                .zip(scales)
                .map(|((run, (a, b)), scale)| RowTerm {
                    rows: run.clone(),
                    a,
                    b,
                    scale,
                })
                .collect();
            let bias = values(n, 99);
            let mut want = reference_rows(&x, &w, m, k, n);
            for (i, v) in want.iter_mut().enumerate() {
                *v += bias[i % n];
            }
            for ((run, (a, b)), (&r, s)) in runs.iter().zip(&factors).zip(ranks.iter().zip(scales))
            {
                let z = reference_rows(&x[run.start * k..run.end * k], a, run.len(), k, r);
                let delta = reference_rows(&z, b, run.len(), r, n);
                for (i, row) in run.clone().enumerate() {
                    for j in 0..n {
                        want[row * n + j] += s * delta[i * n + j];
                    }
                }
            }
            let mut got = vec![3.0; m * n];
            let packed = PackedWeight::pack(&w, n, k);
            packed_matmul_with(&mut got, &x, m, &packed, false, Some(&bias), &terms);
            for (i, (g, e)) in got.iter().zip(&want).enumerate() {
                assert!(
                    (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "{m}x{k}x{n} at row {}: {g} vs {e}",
                    i / n
                );
            }
            // Accumulating onto what is there adds the same.
            let mut acc = vec![1.0; m * n];
            packed_matmul_with(&mut acc, &x, m, &packed, true, Some(&bias), &terms);
            for (g, e) in acc.iter().zip(&want) {
                assert!(
                    (g - 1.0 - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "accumulate: {g} vs {e}"
                );
            }
        }
    }

    #[test]
    fn fused_terms_and_bias_match_on_every_kernel_path_and_input_layout() {
        // One row block, prepared and run on each kernel path and layout by hand.
        let (m, k, n, r) = (50, 200, 70, 12);
        let x = values(m * k, 61);
        let w = PackedWeight::pack(&values(n * k, 62), n, k);
        let a = PackedWeight::pack(&values(r * k, 63), r, k);
        let b = PackedWeight::pack(&values(n * r, 64), n, r);
        let bias = values(n, 65);
        let terms = [RowTerm {
            rows: 5..41,
            a: &a,
            b: &b,
            scale: 0.75,
        }];
        let mut want = vec![0.0; m * n];
        packed_matmul_with(&mut want, &x, m, &w, false, Some(&bias), &terms);
        for fast in paths() {
            for pack in [false, true] {
                let mut y = vec![0.0; m * n];
                let part = Part::new(0, m, &terms);
                let run = Run {
                    pack,
                    ..Run::new(0..n.div_ceil(PANEL), false, Some(&bias), fast)
                };
                panels_into(&mut y, n, &x, k, m, &w, &part, &run);
                for (g, e) in y.iter().zip(&want) {
                    assert!(
                        (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                        "fast={fast} pack={pack}: {g} vs {e}"
                    );
                }
            }
        }
    }

    #[test]
    fn packed_kernel_agrees_with_gemm_on_model_shapes() {
        // The encoder's projection shapes at a batch's row count, against the gemm crate.
        for &(m, k, n) in &[(200, 384, 384), (130, 384, 1536), (64, 1536, 384)] {
            let x = values(m * k, 51);
            let w = values(n * k, 52);
            let mut want = vec![0.0; m * n];
            matmul_into(
                &mut want,
                n,
                MatRef::row_major(&x, m, k),
                MatRef::transposed(&w, k, n),
                false,
                1.0,
                Parallelism::None,
            );
            let mut got = vec![0.0; m * n];
            packed_matmul(&mut got, &x, m, &PackedWeight::pack(&w, n, k), false);
            for (g, e) in got.iter().zip(&want) {
                assert!(
                    (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "{m}x{k}x{n}: {g} vs {e}"
                );
            }
        }
    }

    #[test]
    fn dot_and_axpy_match_plain_loops() {
        for len in [0, 1, 7, 8, 31, 32, 33, 128, 301] {
            let a = values(len, 31);
            let b = values(len, 32);
            let want: f32 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
            assert!((dot(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
            assert!((dot_portable(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
            let mut y = values(len, 33);
            let start = y.clone();
            axpy(&mut y, 0.5, &a);
            for i in 0..len {
                assert!((y[i] - (start[i] + 0.5 * a[i])).abs() < 1e-6);
            }
        }
    }

    /// erf by its Taylor series (converges well for |x| <= 4 in f64), a reference independent of
    /// any libm.
    fn erf_reference(x: f64) -> f64 {
        let mut term = x;
        let mut sum = x;
        for n in 1..200 {
            term *= -x * x / n as f64;
            sum += term / (2 * n + 1) as f64;
        }
        sum * 2.0 / std::f64::consts::PI.sqrt()
    }

    /// erfc(x) for x >= 3.5 by its asymptotic series (accurate to ~1e-10 there).
    fn erfc_tail(x: f64) -> f64 {
        let t = 1.0 / (2.0 * x * x);
        let series = 1.0 - t + 3.0 * t * t - 15.0 * t * t * t + 105.0 * t.powi(4);
        (-x * x).exp() / (x * std::f64::consts::PI.sqrt()) * series
    }

    /// The series loses digits to cancellation past 3.5, where the tail takes over.
    fn erf_any(x: f64) -> f64 {
        if x.abs() > 3.5 {
            x.signum() * (1.0 - erfc_tail(x.abs()))
        } else {
            erf_reference(x)
        }
    }

    #[test]
    fn fast_erf_and_gelu_agree_with_the_series_on_both_paths() {
        let mut worst = 0f64;
        for i in -6000..=6000 {
            let x = i as f64 / 1000.0;
            let want = erf_any(x);
            worst = worst.max((erf_fast(x as f32) as f64 - want).abs());
        }
        assert!(worst < 1e-6, "erf off by {worst}");
        // Odd lengths, so the vector loop's remainder runs too.
        let xs: Vec<f32> = (0..1003).map(|i| (i as f32 - 501.0) / 60.0).collect();
        let mut a = xs.clone();
        let mut b = xs.clone();
        gelu_erf_portable(&mut a);
        gelu_erf_in_place(&mut b);
        for ((x, a), b) in xs.iter().zip(&a).zip(&b) {
            let x64 = *x as f64;
            let want = 0.5 * x64 * (1.0 + erf_any(x64 / 2f64.sqrt()));
            assert!(
                (*a as f64 - want).abs() < 1e-5 * (1.0 + want.abs()),
                "gelu({x})"
            );
            assert!((a - b).abs() < 1e-6, "paths differ at {x}");
        }
    }

    #[test]
    fn fast_exp_and_softmax_agree_with_f64_on_both_paths() {
        let mut worst = 0f64;
        for i in -87_000..=88_000 {
            let x = (i as f64 / 1000.0) as f32;
            let want = (x as f64).exp();
            worst = worst.max((exp_fast(x) as f64 - want).abs() / want);
        }
        assert!(worst < 5e-7, "exp off by {worst} relative");
        assert!(exp_fast(-1e9) < 1e-37 && exp_fast(-1e9) >= 0.0);
        // Rows of 37 scores with a masked key (bias -1e9), scale 0.25.
        let width = 37;
        let raw = values(width * 5, 61);
        let mut bias = vec![0.0; width];
        bias[3] = -1e9;
        for fast in paths() {
            let mut got = raw.clone();
            if fast {
                softmax_dispatch(&mut got, width, 0.25, &bias);
            } else {
                softmax_portable(&mut got, width, 0.25, &bias);
            }
            for (row, src) in got.chunks(width).zip(raw.chunks(width)) {
                let z: Vec<f64> = src
                    .iter()
                    .zip(&bias)
                    .map(|(&s, &b)| s as f64 * 0.25 + b as f64)
                    .collect();
                let max = z.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                let sum: f64 = z.iter().map(|v| (v - max).exp()).sum();
                for (g, v) in row.iter().zip(&z) {
                    let want = (v - max).exp() / sum;
                    assert!(
                        (*g as f64 - want).abs() < 1e-6,
                        "fast={fast}: {g} vs {want}"
                    );
                }
                assert!(row[3] < 1e-30);
            }
        }
    }

    #[test]
    fn strided_packing_and_products_read_and_write_only_their_views() {
        // A [t, h] buffer holding several heads side by side: head 1's columns as a [t, dh]
        // weight, and transposed as a [dh, t] one.
        let (t, h, dh, hd) = (9, 12, 4, 1);
        let buf = values(t * h, 71);
        let mut keys = PackedWeight::empty();
        keys.repack_strided(&buf[hd * dh..], t, dh, h, 1);
        let mut trans = PackedWeight::empty();
        trans.repack_strided(&buf[hd * dh..], dh, t, 1, h);
        for j in 0..t {
            for kk in 0..dh {
                let v = buf[j * h + hd * dh + kk];
                assert_eq!(keys.unpack()[j * dh + kk], v);
                assert_eq!(trans.unpack()[kk * t + j], v);
            }
        }
        // Q_h K_h^T from the strided query columns, written into a strided output's columns.
        let q = values(t * h, 72);
        let mut out = vec![5.0; t * 20];
        packed_matmul_strided(&mut out[3..], 20, &q[hd * dh..], h, t, &keys, false);
        for i in 0..t {
            for j in 0..20 {
                let got = out[i * 20 + j];
                if (3..3 + t).contains(&j) {
                    let want: f32 = (0..dh)
                        .map(|kk| q[i * h + hd * dh + kk] * buf[(j - 3) * h + hd * dh + kk])
                        .sum();
                    assert!((got - want).abs() < 1e-5, "{i},{j}: {got} vs {want}");
                } else {
                    assert_eq!(got, 5.0, "{i},{j} outside the view was written");
                }
            }
        }
    }

    #[test]
    fn residual_layer_norm_matches_an_f64_loop_on_both_paths() {
        let width = 37;
        let rows = 2000; // enough for the threaded path
        let x = values(width * rows, 101);
        let res = values(width * rows, 102);
        let gamma = values(width, 103);
        let beta = values(width, 104);
        let mut want = vec![0f32; x.len()];
        for r in 0..rows {
            let v: Vec<f64> = (0..width)
                .map(|j| x[r * width + j] as f64 + res[r * width + j] as f64)
                .collect();
            let mean = v.iter().sum::<f64>() / width as f64;
            let var = v.iter().map(|a| (a - mean) * (a - mean)).sum::<f64>() / width as f64;
            for j in 0..width {
                want[r * width + j] = ((v[j] - mean) / (var + 1e-12).sqrt() * gamma[j] as f64
                    + beta[j] as f64) as f32;
            }
        }
        let mut got = x.clone();
        add_layer_norm_in_place(&mut got, &res, &gamma, &beta, 1e-12);
        let mut portable = x.clone();
        norm_rows(&mut portable, &res, &gamma, &beta, 1e-12);
        for ((g, p), w) in got.iter().zip(&portable).zip(&want) {
            assert!((g - w).abs() < 1e-4, "{g} vs {w}");
            assert!((p - w).abs() < 1e-4, "portable {p} vs {w}");
        }
    }
}
