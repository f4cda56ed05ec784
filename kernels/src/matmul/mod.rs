//! The macro loop of the projection kernel: the public products ([`packed_matmul`],
//! [`packed_matmul_with`], [`packed_matmul_strided`]) split into row blocks and panel ranges
//! across the thread pool (`blocks` holds the cache blocking inside one part), each register
//! tile then handed to the micro-kernel the dispatch picked (`crate::micro`).

#[cfg(target_arch = "x86_64")]
pub(crate) mod amx;
mod blocks;
#[cfg(test)]
mod format_tests;
#[cfg(test)]
mod gemm_reference;
mod rank_update;
#[cfg(test)]
mod tests;

use crate::dispatch::{Path, active};
use crate::pack::{PANEL, PackedWeight, WeightFormat};
use crate::threads::{rayon_threads, zero_rows};
use blocks::{Buffers, Part, Run, panels_into, run_panels};
pub use rank_update::{add_rank_update, add_rank_update_on};

/// Inner-dimension block of the many-rows path: one panel's slice of it (384 x 16 floats,
/// 24 KB) stays in L1 while every row tile passes over it.
pub(crate) const BLOCK_K: usize = 384;
/// Inner-dimension block when the rows fit one row block: 128 x 16 floats (8 KB), the next one
/// fetched while this one computes.
pub(crate) const SMALL_BLOCK_K: usize = 128;
/// Inner dimensions up to this go tile by tile through every panel (see [`run_panels`]).
pub(crate) const SHORT_K: usize = 64;
/// Rows per task: 72 x 384 floats of input (108 KB, packed) stay in L2 while every panel passes.
pub(crate) const BLOCK_ROWS: usize = 72;
/// Rows are packed when they run over at least this many panels; over fewer (attention heads)
/// packing costs more than the sequential reads save.
pub(crate) const PACK_PANELS: usize = 8;

thread_local! {
    /// Per-thread buffers of the projection kernel (packed input rows, low-rank down products,
    /// the few-rows path's output blocks), reused so a call allocates nothing in steady state.
    static BUFFERS: std::cell::RefCell<Buffers> = std::cell::RefCell::new(Buffers::default());
}

/// Rows from which an f32 product goes to oneDNN when it is loaded: at 64 rows its AVX-512
/// matmul, reading our packed panels, ran 2.2x ours, at 16 rows (`dnnl_sgemm`) 0.45x
/// (`scripts/bench-onednn`, the AMX Xeon).
pub const LIBRARY_ROWS_F32: usize = 64;

/// The product on oneDNN (see [`crate::onednn`]) when it is loaded and takes this one: f32
/// weights whose packed panels are one of its layouts (inputs a multiple of 16, outputs of
/// 16), enough rows, a path with AVX-512 (what it was measured against), and a call from
/// outside the rayon pool. Then each low-rank term runs on our kernel: its down product from
/// its rows of `x`, its up product added to its rows of `y`. `false` when it did not run
/// (nothing written).
///
/// bf16 weights stay on our kernels: oneDNN reads our 16-wide bf16 panels (its `BA16a16b2a`)
/// at 0.6-1.0x our AMX kernel, and is faster only in the 64-wide layout it prefers, which
/// would mean a second copy of every weight or a new layout for every bf16 kernel.
#[cfg(target_arch = "x86_64")]
#[allow(clippy::too_many_arguments)]
fn library_product(
    path: Path,
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
    then: Option<RowsDone<'_>>,
) -> bool {
    let (n, k) = (w.out, w.inp);
    let fits = w.format == WeightFormat::F32
        && path >= Path::Avx512
        && m >= LIBRARY_ROWS_F32
        && k.is_multiple_of(16)
        && n.is_multiple_of(PANEL);
    if !fits || rayon::current_thread_index().is_some() {
        return false;
    }
    let Some(lib) = crate::onednn::get() else {
        return false;
    };
    let crate::pack::Values::F32(d) = &w.values else {
        return false;
    };
    let y = &mut y[..m * n];
    let weights = (d.as_ptr().cast(), d.len() * 4);
    let ran = lib.matmul(y, x.as_ptr(), m, k, n, weights, accumulate, bias);
    if ran.is_err() {
        return false;
    }
    library_terms(y, x, (m, k, n), terms, then);
    true
}

/// Rows per task of [`library_terms`]: enough that a task's two small products outweigh
/// handing it to the pool, few enough that one adapter's batch splits across the threads.
const TERM_ROWS: usize = 128;

/// After a library product: each term's `s (x A^T) B^T` added to its rows of `y` (the base
/// product already there), then `then` on the rows. One pass over the output in blocks of
/// [`TERM_ROWS`] rows spread over the pool: a block's terms (each down product into a small
/// buffer, its up product straight into the block's rows), then its hook, while the rows are
/// in cache. Blocks with neither are skipped.
#[cfg(target_arch = "x86_64")]
fn library_terms(
    y: &mut [f32],
    x: &[f32],
    (m, k, n): (usize, usize, usize),
    terms: &[RowTerm<'_>],
    then: Option<RowsDone<'_>>,
) {
    use rayon::prelude::*;
    if terms.is_empty() && then.is_none() {
        return;
    }
    let block = |(b, ys): (usize, &mut [f32])| {
        let (r0, r1) = (b * TERM_ROWS, (b * TERM_ROWS + ys.len() / n).min(m));
        let mut z = Vec::new();
        for t in terms {
            let (lo, hi) = (t.rows.start.max(r0), t.rows.end.min(r1));
            if lo >= hi {
                continue;
            }
            let r = t.a.out;
            z.clear();
            z.resize((hi - lo) * r, 0.0);
            packed_matmul_strided(&mut z, r, &x[lo * k..], k, hi - lo, t.a, false);
            z.iter_mut().for_each(|v| *v *= t.scale);
            let rows = &mut ys[(lo - r0) * n..(hi - r0) * n];
            packed_matmul_strided(rows, n, &z, r, hi - lo, t.b, true);
        }
        if let Some(then) = then {
            then(r0, ys);
        }
    };
    let busy = |(b, _): &(usize, &mut [f32])| {
        let (r0, r1) = (b * TERM_ROWS, ((b + 1) * TERM_ROWS).min(m));
        then.is_some() || terms.iter().any(|t| t.rows.start < r1 && t.rows.end > r0)
    };
    let y = &mut y[..m * n];
    if m > TERM_ROWS && rayon_threads() > 1 {
        y.par_chunks_mut(TERM_ROWS * n)
            .enumerate()
            .filter(busy)
            .for_each(block);
    } else {
        y.chunks_mut(TERM_ROWS * n)
            .enumerate()
            .filter(busy)
            .for_each(block);
    }
}

/// `y[m, out] = (accumulate ? y : 0) + x[m, in] W^T` with `W` packed (see [`PackedWeight`]): the
/// one product every projection runs, from a decode step's single row to a prefill of thousands.
///
/// Register tiles of up to 6 or 12 rows by 16 columns, by the micro-kernel the dispatch picks
/// for this CPU and the weight's format (see [`crate::dispatch`]). The input rows of each row
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
/// rows' down products `s x A^T` from the same rows the base product reads, while they are in
/// cache. A register tile whose rows all have one term runs the term's `r` extra steps through
/// `B` in the same accumulators as its base product; a tile of mixed rows (several adapters in
/// one batch) runs its base product once for all its rows and then each run of rows' `r`
/// steps onto the 16 columns it just stored, still in L1. A term costs its arithmetic and no
/// pass of its own over the input or the output. The terms' row ranges must not overlap.
/// A `bias [out]` is added to every row as the tiles are stored (no pass of its own either).
/// The factors are f32 whatever the weight's format.
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
    packed_matmul_on(active(), y, x, m, w, accumulate, bias, terms);
}

/// Work on finished rows of a product's output, called as `then(first_row, rows)` with
/// `rows` holding whole rows (`out` values each) once the base product, the bias and every
/// low-rank term are in them: an activation, or a residual add and a layer norm.
pub type RowsDone<'a> = &'a (dyn Fn(usize, &mut [f32]) + Sync);

/// [`packed_matmul_with`], then `then` on every row of the output exactly once, in blocks of
/// rows (any order, across the pool). Where a thread computes whole rows (a block of rows by
/// every panel: the many-rows split of every path), it runs `then` on them right after, while
/// they are in its cache, instead of in a pass of its own over the output (a bf16 MiniLM
/// layer's GELU and two layer norms this way: see DEVELOPERS.md).
#[allow(clippy::too_many_arguments)]
pub fn packed_matmul_then(
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
    then: RowsDone<'_>,
) {
    product(active(), y, x, m, w, accumulate, bias, terms, Some(then));
}

/// [`packed_matmul_then`] on a path chosen by the caller.
///
/// # Panics
/// When this CPU cannot run `path`.
#[allow(clippy::too_many_arguments)]
pub fn packed_matmul_then_on(
    path: Path,
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
    then: RowsDone<'_>,
) {
    product(path, y, x, m, w, accumulate, bias, terms, Some(then));
}

/// `then` over `y`'s `m` rows of `n` after a product that did not run it: blocks of 32 rows
/// across the pool when there are enough of them.
fn rows_done_after(y: &mut [f32], m: usize, n: usize, then: Option<RowsDone<'_>>) {
    use rayon::prelude::*;
    const ROWS: usize = 32;
    let Some(then) = then else { return };
    let y = &mut y[..m * n];
    if n == 0 {
        return;
    }
    if rayon_threads() > 1 && m > ROWS && m * n >= 1 << 15 {
        y.par_chunks_mut(ROWS * n)
            .enumerate()
            .for_each(|(i, rows)| then(i * ROWS, rows));
    } else {
        then(0, y);
    }
}

/// [`packed_matmul_with`] on a path chosen by the caller (tests and benchmarks compare the
/// paths side by side).
///
/// # Panics
/// When this CPU cannot run `path`.
#[allow(clippy::too_many_arguments)]
pub fn packed_matmul_on(
    path: Path,
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
) {
    product(path, y, x, m, w, accumulate, bias, terms, None);
}

#[allow(clippy::too_many_arguments)]
fn product(
    path: Path,
    y: &mut [f32],
    x: &[f32],
    m: usize,
    w: &PackedWeight,
    accumulate: bool,
    bias: Option<&[f32]>,
    terms: &[RowTerm<'_>],
    then: Option<RowsDone<'_>>,
) {
    use rayon::prelude::*;
    let (n, k) = (w.out, w.inp);
    for t in terms {
        assert!(
            t.rows.end <= m && t.a.inp == k && t.b.inp == t.a.out && t.b.out == n,
            "a low-rank term does not fit the product"
        );
        assert!(
            t.a.format == WeightFormat::F32 && t.b.format == WeightFormat::F32,
            "low-rank factors are f32"
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
        rows_done_after(y, m, n, then);
        return;
    }
    #[cfg(target_arch = "x86_64")]
    if library_product(path, y, x, m, w, accumulate, bias, terms, then) {
        return;
    }
    #[cfg(target_arch = "x86_64")]
    if path == Path::Amx && w.format == WeightFormat::Bf16 && m >= amx::MIN_ROWS {
        amx::matmul(y, x, m, w, accumulate, bias, terms, then);
        return;
    }
    let panels = n.div_ceil(PANEL);
    let threads = rayon_threads();
    let x = &x[..m * k];
    let y = &mut y[..m * n];
    let row_blocks = m.div_ceil(BLOCK_ROWS);
    let block = |i: usize, yb: &mut [f32]| {
        let rows = yb.len() / n;
        let part = Part::new(i * BLOCK_ROWS, rows, terms);
        let xb = &x[i * BLOCK_ROWS * k..];
        let run = Run::new(0..panels, accumulate, bias, path, w);
        panels_into(yb, n, xb, k, rows, w, &part, &run);
        if let Some(then) = then {
            then(i * BLOCK_ROWS, yb);
        }
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
    let all = Run::new(0..panels, false, bias, path, w);
    let prep = bufs.prepare(x, k, k, m, &part, &all);
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
    rows_done_after(y, m, n, then);
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
    let path = active();
    let mut i0 = 0;
    while i0 < m {
        let rows = BLOCK_ROWS.min(m - i0);
        let run = Run::new(0..panels, accumulate, None, path, w);
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
