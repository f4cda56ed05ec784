//! The AMX path for bf16 weights: Intel's tile registers multiply a 16-row by 32-input tile of
//! bf16 rows by a 32-input by 16-column tile of bf16 weights into 16 x 16 f32 sums in one
//! instruction (`tdpbf16ps`), about sixteen times the work of one AVX-512-BF16 instruction.
//!
//! The packed bf16 panel is already in the layout the instruction reads for its second operand
//! (each 64-byte row of a weight tile holds the pairs of two inputs for 16 columns, see
//! [`crate::pack`]), so a weight tile is 16 pair rows of a panel, read in place. The input rows
//! are rounded to bf16 row-major, padded with zeros to whole tiles: by each task for its own
//! block of 32 rows, just before it uses them, when the work is split by blocks of rows (5-10%
//! off a bf16 MiniLM batch against rounding every row up front, which wrote and read the rows
//! through L2 once more), or once per call otherwise. Each task computes blocks of 32 rows by 2
//! panels in four sum tiles (2 input tiles and 2 weight tiles per 32 inputs) and adds the bias
//! and what the output held as it stores them. A
//! product's low-rank terms stay f32: each term's down product `s x A^T` is computed first, on
//! the AVX-512 path, and each block adds its rows' `z B^T` for its two panels right after
//! storing them, while they are in cache.
//!
//! Rust has no stable AMX intrinsics: the tile instructions are inline assembly, and the tile
//! registers are touched by nothing else in the process (the compiler never allocates them), so
//! their contents live from one `asm!` block to the next within a task. Linux hands the tile
//! state to a process only after it asks (`arch_prctl(ARCH_REQ_XCOMP_PERM)`), which
//! [`tiles_granted`] does once; without that grant the path is not available.
#![allow(unsafe_code)]

use std::arch::asm;
use std::arch::x86_64::*;

use super::{RowTerm, RowsDone, packed_matmul_strided, rows_done_after};
use crate::pack::quant::bf16_from_f32;
use crate::pack::{Block, PANEL, PackedWeight};
use crate::threads::rayon_threads;

/// Rows per tile (the most a tile register holds).
const TILE_ROWS: usize = 16;
/// Inputs per step: one 64-byte tile row of bf16.
const STEP: usize = 32;
/// Rows per block: two input tiles.
const BLOCK: usize = 2 * TILE_ROWS;
/// Fewer rows than this go to the AVX-512-BF16 micro-kernel: a tile of mostly padding
/// multiplies zeros, and with few rows the product is bound by reading the weights anyway.
pub(crate) const MIN_ROWS: usize = 8;

/// Whether this CPU has the tile instructions for bf16 (CPUID leaf 7: AMX-BF16 and AMX-TILE).
pub(crate) fn cpu_has_amx_bf16() -> bool {
    let leaf = __cpuid_count(7, 0);
    leaf.edx & (1 << 22) != 0 && leaf.edx & (1 << 24) != 0
}

/// Whether the operating system saves the tile state (XCR0 bits 17 and 18) and gave this
/// process leave to use it: asked once, on first call.
pub(crate) fn tiles_granted() -> bool {
    static GRANTED: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *GRANTED.get_or_init(|| cpu_has_amx_bf16() && os_saves_tiles() && ask_for_tiles())
}

fn os_saves_tiles() -> bool {
    if __cpuid(1).ecx & (1 << 27) == 0 {
        return false;
    }
    // SAFETY: OSXSAVE (checked just above) says XGETBV may run.
    unsafe { xcr0() & (3 << 17) == 3 << 17 }
}

#[target_feature(enable = "xsave")]
unsafe fn xcr0() -> u64 {
    // SAFETY: the caller's contract.
    unsafe { _xgetbv(0) }
}

#[cfg(target_os = "linux")]
fn ask_for_tiles() -> bool {
    const SYS_ARCH_PRCTL: usize = 158;
    const ARCH_REQ_XCOMP_PERM: usize = 0x1023;
    const XFEATURE_XTILEDATA: usize = 18;
    let ret: isize;
    // SAFETY: arch_prctl(ARCH_REQ_XCOMP_PERM, XTILEDATA) only changes which register state
    // the kernel saves for this process; the syscall clobbers rcx and r11, declared.
    unsafe {
        asm!(
            "syscall",
            inlateout("rax") SYS_ARCH_PRCTL as isize => ret,
            in("rdi") ARCH_REQ_XCOMP_PERM,
            in("rsi") XFEATURE_XTILEDATA,
            lateout("rcx") _,
            lateout("r11") _,
            options(nostack)
        );
    }
    ret == 0
}

#[cfg(not(target_os = "linux"))]
fn ask_for_tiles() -> bool {
    false
}

/// The tile configuration every task loads: palette 1, tiles 0-7 each 16 rows of 64 bytes
/// (0-3 the sums, 4-5 the input rows, 6-7 the weights).
#[repr(C, align(64))]
struct TileConfig {
    palette: u8,
    start_row: u8,
    reserved: [u8; 14],
    colsb: [u16; 16],
    rows: [u8; 16],
}

const CONFIG: TileConfig = {
    let mut c = TileConfig {
        palette: 1,
        start_row: 0,
        reserved: [0; 14],
        colsb: [0; 16],
        rows: [0; 16],
    };
    let mut t = 0;
    while t < 8 {
        c.colsb[t] = 64;
        c.rows[t] = TILE_ROWS as u8;
        t += 1;
    }
    c
};

/// Loads [`CONFIG`] into this thread's tile unit.
///
/// # Safety
/// The CPU has AMX and the process was granted the tile state ([`tiles_granted`]).
#[target_feature(enable = "avx512f")]
pub(crate) unsafe fn configure() {
    // SAFETY: CONFIG is 64 readable bytes, aligned; the caller's contract covers the rest.
    unsafe { asm!("ldtilecfg [{0}]", in(reg) &CONFIG, options(nostack, readonly)) }
}

/// Frees this thread's tile state, so that the kernel does not save it at every switch.
///
/// # Safety
/// As [`configure`].
pub(crate) unsafe fn release() {
    // SAFETY: the caller's contract.
    unsafe { asm!("tilerelease", options(nostack, nomem)) }
}

/// Four sum tiles at `c` (rows `ld` bytes apart): rows 0-15 and 16-31 (`down` elements on) of
/// columns 0-15 and 16-31.
#[derive(Clone, Copy)]
pub(crate) struct Tiles {
    pub(crate) c: *const f32,
    pub(crate) ld: usize,
    pub(crate) down: usize,
}

impl Tiles {
    fn at(&self, t: usize) -> *const f32 {
        self.c
            .wrapping_add(if t >= 2 { self.down } else { 0 })
            .wrapping_add(if t % 2 == 1 { PANEL } else { 0 })
    }
}

/// The 32 x 32 block `out` = `init` (zeros when `None`) + rows `a0` and `a0 + 16 lda` (bf16,
/// `lda` bytes apart) times panels `b0` and `b1` (pair rows 64 bytes apart), over `steps`
/// steps of 32 inputs; the last step's weights from `tail` (two 1 KB tiles) when given.
///
/// # Safety
/// The tiles are configured ([`configure`]); `a0` holds 32 rows of `steps * 64` bytes, `lda`
/// apart; `b0` and `b1` hold `steps` (or, with a tail, `steps - 1`) tiles of 1 KB; `init` and
/// `out` describe 16-row tiles of 64 bytes that can be read (and, for `out`, written).
#[allow(clippy::too_many_arguments)]
pub(crate) unsafe fn block(
    a0: *const u16,
    lda: usize,
    b0: *const u32,
    b1: *const u32,
    steps: usize,
    tail: Option<&[u32; 2 * 16 * PANEL]>,
    init: Option<Tiles>,
    out: Tiles,
) {
    // SAFETY: every address below lies in the regions the caller's contract names; the tile
    // registers hold nothing the compiler relies on.
    unsafe {
        match init {
            None => asm!(
                "tilezero tmm0",
                "tilezero tmm1",
                "tilezero tmm2",
                "tilezero tmm3",
                options(nostack, nomem)
            ),
            Some(t) => asm!(
                "tileloadd tmm0, [{c0} + {ld}*1]",
                "tileloadd tmm1, [{c1} + {ld}*1]",
                "tileloadd tmm2, [{c2} + {ld}*1]",
                "tileloadd tmm3, [{c3} + {ld}*1]",
                c0 = in(reg) t.at(0),
                c1 = in(reg) t.at(1),
                c2 = in(reg) t.at(2),
                c3 = in(reg) t.at(3),
                ld = in(reg) t.ld,
                options(nostack, readonly)
            ),
        }
        let a1 = a0.byte_add(TILE_ROWS * lda);
        for s in 0..steps {
            let (w0, w1) = match tail {
                Some(t) if s + 1 == steps => (t.as_ptr(), t.as_ptr().add(16 * PANEL)),
                _ => (b0.add(s * 16 * PANEL), b1.add(s * 16 * PANEL)),
            };
            asm!(
                "tileloadd tmm4, [{a0} + {lda}*1]",
                "tileloadd tmm5, [{a1} + {lda}*1]",
                "tileloadd tmm6, [{w0} + {ldb}*1]",
                "tileloadd tmm7, [{w1} + {ldb}*1]",
                "tdpbf16ps tmm0, tmm4, tmm6",
                "tdpbf16ps tmm1, tmm4, tmm7",
                "tdpbf16ps tmm2, tmm5, tmm6",
                "tdpbf16ps tmm3, tmm5, tmm7",
                a0 = in(reg) a0.byte_add(s * 64),
                a1 = in(reg) a1.byte_add(s * 64),
                w0 = in(reg) w0,
                w1 = in(reg) w1,
                lda = in(reg) lda,
                ldb = in(reg) 64usize,
                options(nostack, readonly)
            );
        }
        asm!(
            "tilestored [{c0} + {ld}*1], tmm0",
            "tilestored [{c1} + {ld}*1], tmm1",
            "tilestored [{c2} + {ld}*1], tmm2",
            "tilestored [{c3} + {ld}*1], tmm3",
            c0 = in(reg) out.at(0),
            c1 = in(reg) out.at(1),
            c2 = in(reg) out.at(2),
            c3 = in(reg) out.at(3),
            ld = in(reg) out.ld,
            options(nostack)
        );
    }
}

/// Rows `x[m, k]` rounded to bf16 (to nearest even) into `dst`, row `i` at `i * ld`, zeros
/// from `k` to `ld` and in the rows from `m` to `dst.len() / ld`.
///
/// Across the rayon pool when `spread` and there are enough of them; a task that rounds its own
/// block passes `false` (it already is one of the pool's tasks).
fn rows_to_bf16(dst: &mut [u16], ld: usize, x: &[f32], m: usize, k: usize, spread: bool) {
    use rayon::prelude::*;
    let convert = |(i, row): (usize, &mut [u16])| {
        if i >= m {
            row.fill(0);
            return;
        }
        let src = &x[i * k..(i + 1) * k];
        let whole = k / 16 * 16;
        // SAFETY: the path is only chosen where the CPU has AVX-512-BF16 (it needs AMX-BF16,
        // which implies it, and the feature list checks it).
        unsafe { convert16s(&mut row[..whole], &src[..whole]) };
        for (d, &v) in row[whole..k].iter_mut().zip(&src[whole..]) {
            *d = bf16_from_f32(v);
        }
        row[k..].fill(0);
    };
    if spread && m * k >= 1 << 16 && rayon_threads() > 1 {
        dst.par_chunks_mut(ld).enumerate().for_each(convert);
    } else {
        dst.chunks_mut(ld).enumerate().for_each(convert);
    }
}

#[target_feature(enable = "avx512f,avx512bf16,avx512vl")]
unsafe fn convert16s(dst: &mut [u16], src: &[f32]) {
    for (d, s) in dst.chunks_exact_mut(16).zip(src.chunks_exact(16)) {
        // SAFETY: both chunks hold 16 values.
        unsafe {
            let v = _mm512_loadu_ps(s.as_ptr());
            let h: __m256i = std::mem::transmute(_mm512_cvtneps_pbh(v));
            _mm256_storeu_si256(d.as_mut_ptr().cast(), h);
        }
    }
}

/// `y[i, c] += z_i . b[:, c]` for `rows` rows (`ldy` apart from `y`) and the `width <= 16`
/// columns of one panel of `B` (`b[q * width + c]`), each row's `r` down-product values `z_i`
/// in `z`: one masked 16-wide fused multiply-add per value, four rows at a time sharing each
/// panel row. One call covers a term's rows of a block (it was one call per row and panel, with
/// one chain of additions: 5% of a bf16 MiniLM batch with eight mixed adapters, whose cost over
/// base went from 1.11-1.19x to 1.05-1.08x in alternating scratch runs).
///
/// # Safety
/// The CPU has AVX-512F; `y` points at `rows` rows of `width` writable values, `ldy` apart,
/// that nothing else touches meanwhile; `z` holds `rows * r` values and `b` `r * width`.
#[target_feature(enable = "avx512f")]
unsafe fn add_up_rows(
    y: *mut f32,
    ldy: usize,
    rows: usize,
    z: &[f32],
    r: usize,
    b: &[f32],
    width: usize,
) {
    assert!(
        width <= PANEL && z.len() >= rows * r && b.len() >= r * width,
        "up product shapes disagree"
    );
    let mask: __mmask16 = if width >= 16 { !0 } else { (1u16 << width) - 1 };
    /// Rows i0..i0 + R: R independent sums, each panel row loaded once for all of them.
    ///
    /// # Safety
    /// As [`add_up_rows`], with i0 + R <= rows.
    #[allow(clippy::too_many_arguments)]
    #[target_feature(enable = "avx512f")]
    unsafe fn group<const R: usize>(
        y: *mut f32,
        ldy: usize,
        i0: usize,
        z: *const f32,
        r: usize,
        b: *const f32,
        width: usize,
        mask: __mmask16,
    ) {
        // SAFETY: rows i0..i0 + R of `y` and `z`, and b's r rows (the caller's contract);
        // masked lanes are not touched.
        unsafe {
            let mut acc = [_mm512_setzero_ps(); R];
            for q in 0..r {
                let bq = _mm512_maskz_loadu_ps(mask, b.add(q * width));
                for (ii, a) in acc.iter_mut().enumerate() {
                    *a = _mm512_fmadd_ps(_mm512_set1_ps(*z.add((i0 + ii) * r + q)), bq, *a);
                }
            }
            for (ii, a) in acc.iter().enumerate() {
                let d = y.add((i0 + ii) * ldy);
                _mm512_mask_storeu_ps(d, mask, _mm512_add_ps(_mm512_maskz_loadu_ps(mask, d), *a));
            }
        }
    }
    let (zp, bp) = (z.as_ptr(), b.as_ptr());
    let mut i = 0;
    // Eight rows at a time: eight independent chains of additions keep both FMA units busy
    // (four left half of them idle: 4.9% of a bf16 MiniLM batch with eight mixed adapters).
    while i + 8 <= rows {
        // SAFETY: rows i..i + 8 <= rows: the caller's contract and the assertion above.
        unsafe { group::<8>(y, ldy, i, zp, r, bp, width, mask) };
        i += 8;
    }
    while i + 4 <= rows {
        // SAFETY: rows i..i + 4 <= rows, as above.
        unsafe { group::<4>(y, ldy, i, zp, r, bp, width, mask) };
        i += 4;
    }
    while i < rows {
        // SAFETY: row i < rows, as above.
        unsafe { group::<1>(y, ldy, i, zp, r, bp, width, mask) };
        i += 1;
    }
}

/// The output, shared by the tasks: each writes its own rows and columns.
#[derive(Clone, Copy)]
struct Out(*mut f32);

impl Out {
    /// Element `at` of the output, for a task to write its own elements through.
    fn at(&self, at: usize) -> *mut f32 {
        self.0.wrapping_add(at)
    }

    /// `len` elements from element `at`.
    ///
    /// # Safety
    /// They lie in the output and no other task writes them.
    #[allow(clippy::mut_from_ref)]
    unsafe fn slice(&self, at: usize, len: usize) -> &mut [f32] {
        // SAFETY: the caller's contract.
        unsafe { std::slice::from_raw_parts_mut(self.0.add(at), len) }
    }
}
// SAFETY: tasks write disjoint elements (their rows of their panels) and nothing reads them
// until every task has finished.
unsafe impl Send for Out {}
unsafe impl Sync for Out {}

/// `len` values of `buf` that start on a 64-byte line (`buf` grown to hold them): a tile row
/// of input that straddles two lines costs two reads (see `crate::pack::lines`).
fn on_lines(buf: &mut Vec<u16>, len: usize) -> &mut [u16] {
    const SLACK: usize = 64 / size_of::<u16>();
    if buf.len() < len + SLACK {
        buf.resize(len + SLACK, 0);
    }
    let at = buf.as_ptr().align_offset(64);
    &mut buf[at..at + len]
}

/// A task's 32 x 32 block of sums and its copy of two panels' last weight tiles, each on a
/// 64-byte line (tile rows are read and written as whole lines).
#[repr(C, align(64))]
struct TaskTiles {
    c: [f32; BLOCK * 2 * PANEL],
    tail: [u32; 2 * 16 * PANEL],
}

impl TaskTiles {
    fn new() -> Self {
        Self {
            c: [0.0; BLOCK * 2 * PANEL],
            tail: [0; 2 * 16 * PANEL],
        }
    }
}

thread_local! {
    /// One block's rows in bf16 and its rows of the terms' down products.
    static BLOCK_ROWS: std::cell::RefCell<(Vec<u16>, Vec<f32>)> =
        const { std::cell::RefCell::new((Vec::new(), Vec::new())) };
    /// The rows in bf16 and the terms' down products, reused from call to call.
    static SCRATCH: std::cell::RefCell<(Vec<u16>, Vec<f32>)> =
        const { std::cell::RefCell::new((Vec::new(), Vec::new())) };
}

/// [`super::packed_matmul_with`] for a bf16 weight on the tile unit: see the module comment.
/// The arguments were checked as `packed_matmul_on` checks them.
///
/// # Panics
/// When [`crate::Path::Amx`] cannot run here or `w` is not bf16.
#[allow(clippy::too_many_arguments)]
pub(crate) fn matmul(
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
    assert!(
        // The tile grant is asked once and kept (the full feature list is not read per call).
        tiles_granted() && w.format == crate::WeightFormat::Bf16,
        "the AMX path runs bf16 weights where the CPU has it"
    );
    let (n, k) = (w.out, w.inp);
    let steps = k.div_ceil(STEP);
    let ld = steps * STEP;
    let blocks = m.div_ceil(BLOCK);
    let panels = n.div_ceil(PANEL);
    let pairs = panels.div_ceil(2);
    let (mut abuf, mut down) = SCRATCH.with_borrow_mut(std::mem::take);
    let threads = rayon_threads();
    // Split by blocks of rows (each task one block, every panel): each task rounds its own 32
    // rows to bf16 just before it multiplies them, while they fit in L1. Otherwise (few rows,
    // split by panels, or one thread) every row is rounded once up front, here.
    let by_blocks = threads > 1 && m * n * k >= (1 << 20) && blocks >= 2 * threads;
    let rows: &[u16] = if by_blocks {
        &[]
    } else {
        let rows = on_lines(&mut abuf, blocks * BLOCK * ld);
        rows_to_bf16(rows, ld, x, m, k, true);
        rows
    };
    // Each panel's tiles; the last step's weights copied into zeros when the panel's pair
    // rows do not fill it (the tile would otherwise read the next panel, or past the end).
    let full = k.div_ceil(2) / 16;
    let words = |p: usize| -> &[u32] {
        let Block::Bf16(b) = w.block(p, 0, k) else {
            unreachable!("the AMX path got another format")
        };
        b
    };
    let panel = |p: usize| words(p).as_ptr();
    let tail_of = |p: usize, dst: &mut [u32]| {
        let rest = &words(p)[full * 16 * PANEL..];
        dst.fill(0);
        dst[..rest.len()].copy_from_slice(rest);
    };
    // Each term's down product `s x A^T` for its rows, in f32 on the AVX-512 path, one after
    // another in `down`; the blocks add `z B^T` to their rows as they store them. Split by
    // blocks of rows, each task computes its own rows' down products instead, from the f32
    // rows it has just read for rounding (see `by_blocks` below).
    let total: usize = if by_blocks {
        0
    } else {
        terms.iter().map(|t| t.rows.len() * t.a.out).sum()
    };
    down.clear();
    down.resize(total, 0.0);
    let mut slices = Vec::with_capacity(terms.len());
    let mut rest = &mut down[..];
    for t in terms {
        let len = if by_blocks { 0 } else { t.rows.len() * t.a.out };
        let (z, tail) = rest.split_at_mut(len);
        slices.push(z);
        rest = tail;
    }
    let down_product = |(t, z): (&RowTerm<'_>, &mut &mut [f32])| {
        if by_blocks {
            return;
        }
        let xs = &x[t.rows.start * k..t.rows.end * k];
        packed_matmul_strided(z, t.a.out, xs, k, t.rows.len(), t.a, false);
        z.iter_mut().for_each(|v| *v *= t.scale);
    };
    // Across the pool when there are several terms with enough work between them (a mixed
    // batch: one term per sequence); one small term runs on this thread, where handing it to
    // the pool would cost more than it computes.
    if terms.len() > 1 && total * k >= 1 << 20 && threads > 1 {
        terms
            .par_iter()
            .zip(slices.par_iter_mut())
            .for_each(down_product);
    } else {
        terms.iter().zip(slices.iter_mut()).for_each(down_product);
    }
    let out = Out(y.as_mut_ptr());
    // Each term's down products, read-only from here on, with the first row they hold.
    let zs: Vec<(usize, &[f32])> = terms
        .iter()
        .zip(slices)
        .map(|(t, z)| (t.rows.start, &*z))
        .collect();
    // The low-rank terms' up products for rows r0..r0 + rows and panels p0..=p1, added to y;
    // `zs` holds each term's down products from its first row given.
    let add_terms = |r0: usize, rows: usize, p0: usize, p1: usize, zs: &[(usize, &[f32])]| {
        for (t, &(first, zt)) in terms.iter().zip(zs) {
            let (lo, hi) = (t.rows.start.max(r0), t.rows.end.min(r0 + rows));
            if lo >= hi {
                continue;
            }
            let r = t.a.out;
            let z = &zt[(lo - first) * r..(hi - first) * r];
            for p in p0..=p1 {
                let (j0, width) = (p * PANEL, t.b.panel_width(p));
                let b = &t.b.f32_values()[p * PANEL * r..][..width * r];
                // SAFETY: Path::Amx (checked above) includes AVX-512F; rows lo..hi < m and
                // columns j0..j0 + width <= n are this task's own elements of y (see Out),
                // n apart.
                unsafe { add_up_rows(out.at(lo * n + j0), n, hi - lo, z, r, b, width) };
            }
        }
    };
    // One block of 32 rows by the panel pair `pp`: computed, then stored with the bias and
    // what the output held.
    // `a0`: the block's 32 rows in bf16, `ld` apart.
    let base = |rb: usize,
                pp: usize,
                a0: *const u16,
                c: &mut [f32; BLOCK * 2 * PANEL],
                tail: &mut [u32; 2 * 16 * PANEL]| {
        let p0 = 2 * pp;
        let p1 = (p0 + 1).min(panels - 1);
        let has_tail = full < steps;
        if has_tail {
            tail_of(p0, &mut tail[..16 * PANEL]);
            tail_of(p1, &mut tail[16 * PANEL..]);
        }
        let rows = BLOCK.min(m - rb * BLOCK);
        let tail = has_tail.then_some(&*tail);
        // A whole block (32 rows, two full panels) goes straight into y, starting from the
        // bias (a tile row read 16 times: stride 0) or from what y holds; any other block goes
        // through `c`.
        if rows == BLOCK && p1 == p0 + 1 && (p1 + 1) * PANEL <= n && !(accumulate && bias.is_some())
        {
            let j0 = p0 * PANEL;
            let y0 = out.0.wrapping_add(rb * BLOCK * n + j0);
            let into = Tiles {
                c: y0,
                ld: n * 4,
                down: TILE_ROWS * n,
            };
            let init = match (accumulate, bias) {
                (true, _) => Some(into),
                (false, Some(b)) => Some(Tiles {
                    c: b[j0..].as_ptr(),
                    ld: 0,
                    down: 0,
                }),
                (false, None) => None,
            };
            // SAFETY: the rows of block rb are in `a` (padded to whole blocks), each panel
            // holds `full` whole tiles and the tail the rest; rows rb * 32.. + 32 <= m and
            // columns j0..j0 + 32 <= n are this task's own elements of y (see Out); the bias
            // holds columns j0..j0 + 32.
            unsafe { block(a0, ld * 2, panel(p0), panel(p1), steps, tail, init, into) };
            return;
        }
        let scratch = Tiles {
            c: c.as_ptr(),
            ld: 2 * PANEL * 4,
            down: TILE_ROWS * 2 * PANEL,
        };
        // SAFETY: as above, with `c` 32 x 32.
        unsafe { block(a0, ld * 2, panel(p0), panel(p1), steps, tail, None, scratch) };
        for q in 0..(p1 - p0 + 1) {
            let j0 = (p0 + q) * PANEL;
            let cols = PANEL.min(n - j0);
            for i in 0..rows {
                let src = &c[i * 2 * PANEL + q * PANEL..][..cols];
                // SAFETY: row rb * 32 + i < m and columns j0..j0 + cols < n: this task's own
                // elements of y (see Out).
                let dst = unsafe { out.slice((rb * BLOCK + i) * n + j0, cols) };
                match (accumulate, bias.map(|b| &b[j0..j0 + cols])) {
                    (false, None) => dst.copy_from_slice(src),
                    (false, Some(b)) => {
                        for ((d, &s), &b) in dst.iter_mut().zip(src).zip(b) {
                            *d = s + b;
                        }
                    }
                    (true, None) => dst.iter_mut().zip(src).for_each(|(d, &s)| *d += s),
                    (true, Some(b)) => {
                        for ((d, &s), &b) in dst.iter_mut().zip(src).zip(b) {
                            *d += s + b;
                        }
                    }
                }
            }
        }
    };
    let one = |rb: usize,
               pp: usize,
               a0: *const u16,
               c: &mut [f32; BLOCK * 2 * PANEL],
               tail: &mut [u32; 2 * 16 * PANEL],
               zs: &[(usize, &[f32])]| {
        base(rb, pp, a0, c, tail);
        if !terms.is_empty() {
            let rows = BLOCK.min(m - rb * BLOCK);
            add_terms(rb * BLOCK, rows, 2 * pp, (2 * pp + 1).min(panels - 1), zs);
        }
    };
    let task = |range_rb: std::ops::Range<usize>, range_pp: std::ops::Range<usize>| {
        let mut s = TaskTiles::new();
        // SAFETY: the caller's contract (tiles granted); the configuration is per thread.
        unsafe { configure() };
        for rb in range_rb {
            let a0 = rows.as_ptr().wrapping_add(rb * BLOCK * ld);
            for pp in range_pp.clone() {
                one(rb, pp, a0, &mut s.c, &mut s.tail, &zs);
            }
        }
        // SAFETY: as above.
        unsafe { release() };
    };
    if by_blocks {
        (0..blocks).into_par_iter().for_each(|rb| {
            BLOCK_ROWS.with_borrow_mut(|(buf, zbuf)| {
                let rows = on_lines(buf, BLOCK * ld);
                let (r0, r1) = (rb * BLOCK, ((rb + 1) * BLOCK).min(m));
                rows_to_bf16(rows, ld, &x[r0 * k..r1 * k], r1 - r0, k, false);
                // The block's own rows of each term's down product, from the f32 rows just
                // read (in cache), one term after another in `zbuf`.
                let span = |t: &RowTerm<'_>| (t.rows.start.max(r0), t.rows.end.min(r1));
                let need: usize = terms
                    .iter()
                    .map(|t| {
                        let (lo, hi) = span(t);
                        hi.saturating_sub(lo) * t.a.out
                    })
                    .sum();
                zbuf.clear();
                zbuf.resize(need, 0.0);
                let mut local = Vec::with_capacity(terms.len());
                let mut rest = &mut zbuf[..];
                for t in terms {
                    let (lo, hi) = span(t);
                    let len = hi.saturating_sub(lo) * t.a.out;
                    let (z, tail) = rest.split_at_mut(len);
                    if len > 0 {
                        packed_matmul_strided(
                            z,
                            t.a.out,
                            &x[lo * k..hi * k],
                            k,
                            hi - lo,
                            t.a,
                            false,
                        );
                        z.iter_mut().for_each(|v| *v *= t.scale);
                    }
                    local.push((lo, &*z));
                    rest = tail;
                }
                let mut s = TaskTiles::new();
                // SAFETY: the caller's contract (tiles granted); the configuration is per
                // thread.
                unsafe { configure() };
                for pp in 0..pairs {
                    one(rb, pp, rows.as_ptr(), &mut s.c, &mut s.tail, &local);
                }
                // SAFETY: as above.
                unsafe { release() };
                if let Some(then) = then {
                    // SAFETY: rows r0..r1 of y, every column: this task's own (see Out), and
                    // finished.
                    then(r0, unsafe { out.slice(r0 * n, (r1 - r0) * n) });
                }
            })
        });
    } else if threads <= 1 || m * n * k < (1 << 25) {
        task(0..blocks, 0..pairs);
    } else {
        let per = pairs.div_ceil(threads * 4).max(1);
        (0..pairs.div_ceil(per)).into_par_iter().for_each(|b| {
            task(0..blocks, b * per..((b + 1) * per).min(pairs));
        });
    }
    SCRATCH.with_borrow_mut(|s| *s = (abuf, down));
    if !by_blocks {
        rows_done_after(y, m, n, then);
    }
}
