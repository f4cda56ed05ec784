//! The micro-kernels: one register tile of input rows against one block of a weight panel, and
//! nothing else. [`Tile`] is the contract every micro-kernel implements; a [`MicroKernel`] is
//! what `dispatch::micro_kernel` hands the macro loop for a path and a weight format.
//!
//! One folder per instruction set (`portable/`, `avx2/`, `avx512/`, `avx512bf16/`), one file
//! in it per weight format; the folder's `mod.rs` holds what that instruction set's formats
//! share (the tile's low-rank steps, bias and store).

pub(crate) mod portable;

#[cfg(target_arch = "x86_64")]
pub(crate) mod avx2;
#[cfg(target_arch = "x86_64")]
pub(crate) mod avx512;
#[cfg(target_arch = "x86_64")]
pub(crate) mod avx512bf16;
#[cfg(target_arch = "x86_64")]
pub(crate) mod avx512vnni;

use crate::pack::{Block, PANEL, ScaleSlice};

/// A micro-kernel for one path and weight format: the most rows its register tile holds, and
/// the function that runs one tile (any row count up to `rows`).
#[derive(Clone, Copy)]
pub(crate) struct MicroKernel {
    pub rows: usize,
    pub run: fn(&Tile<'_>, &mut [f32]),
    /// How the kernel reads its rows' inputs.
    pub inputs: Inputs,
}

/// How a micro-kernel reads its input rows: as they are, or rounded to what its instructions
/// multiply (which is where a path differs numerically from the portable one).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Inputs {
    /// f32, as given.
    F32,
    /// Rounded to bf16, in pairs: relative error up to 2^-9 per input.
    Bf16Pairs,
    /// Rounded to int8 in groups of 32 inputs along the row, each group with its own scale
    /// (`amax / 127`): error up to half a step, the group's largest magnitude / 254, per
    /// input.
    Int8Groups,
}

/// One register tile's inputs: `c[i, j] (+)= a[i, :kb] . w[:kb, j] (+ z[i, :] . zb[:, j]) (+
/// bias[j])` for `i < rows`, `j < cols`.
pub(crate) struct Tile<'a> {
    /// Input rows in the tile.
    pub rows: usize,
    /// The tile's rows packed inner-major (`a[q * rows + i]`), or with `lda` rows `lda` apart
    /// (`a[i * lda + q]`).
    pub a: &'a [f32],
    pub lda: Option<usize>,
    /// With a kernel that reads bf16 rows: the rows' inputs rounded to bf16 in pairs, one
    /// `u32` per pair and row (`pairs[j * rows + i]` holds inputs `2j` and `2j + 1`).
    pub pairs: &'a [u32],
    /// With a kernel that reads int8 rows: the rows' inputs rounded to int8 in groups (see
    /// [`Quads`]); the block starts at a group boundary.
    pub quads: Quads<'a>,
    pub kb: usize,
    /// The weight block (see [`Block`]): 16 columns, whatever the tile's `cols`.
    pub b: Block<'a>,
    /// The block the next tile will read, as (start, bytes): the kernel asks for it into L2
    /// while it computes (prefetches never fault; `None` when there is nothing to fetch).
    pub next: Option<(*const u8, usize)>,
    /// A low-rank term's steps, run in the same accumulators after the block: `s x A^T` packed
    /// (`rank` steps, `z[q * rows + i]`) and the term's panel of `B` (`rank` x 16).
    pub low: Option<(&'a [f32], &'a [f32], usize)>,
    /// Added to every row of the tile (`cols` values).
    pub bias: Option<&'a [f32]>,
    pub ldc: usize,
    pub cols: usize,
    /// Add onto `c` instead of overwriting it.
    pub acc: bool,
}

/// A tile's rows rounded to int8 in groups of [`crate::pack::rows::INPUT_GROUP`] inputs (a
/// last short group padded with zeros): `q[u * rows + i]` holds row `i`'s inputs `4u`,
/// `4u + 2`, `4u + 1` and `4u + 3`, one signed byte each, lowest byte first (the order an int4
/// pair of pairs widens to); `scales[g * rows + i]` is group `g`'s scale and `sums[g * rows +
/// i]` the sum of its values.
#[derive(Clone, Copy, Default)]
pub(crate) struct Quads<'a> {
    pub q: &'a [u32],
    pub scales: &'a [f32],
    pub sums: &'a [i32],
}

impl Tile<'_> {
    /// Asserts that every read and write the tile describes lies inside its slices: what every
    /// micro-kernel's `unsafe` code relies on.
    pub(crate) fn check(&self, c: &[f32], max_rows: usize) {
        let (r, kb) = (self.rows, self.kb);
        let groups = |group: usize| kb.div_ceil(group.max(1)) * PANEL;
        let block_fits = match self.b {
            Block::F32(b) => kb * PANEL <= b.len(),
            Block::Bf16(b) => kb.div_ceil(2) * PANEL <= b.len(),
            Block::Int8 { q, scales, group } => {
                kb * PANEL <= q.len() && groups(group) <= scales.len()
            }
            Block::Int4 {
                q,
                scales,
                zeros,
                group,
            } => {
                let s = match scales {
                    ScaleSlice::F32(s) => s.len(),
                    ScaleSlice::F16(s) => s.len(),
                };
                kb.div_ceil(2) * PANEL <= q.len()
                    && groups(group) <= s
                    && zeros.is_none_or(|z| groups(group) <= z.len())
            }
        };
        assert!(
            (1..=max_rows).contains(&r)
                && block_fits
                && self.lda.map_or(kb * r, |lda| (r - 1) * lda + kb) <= self.a.len()
                && self.lda.is_none_or(|lda| lda >= kb)
                && self.bias.is_none_or(|b| b.len() >= self.cols)
                && self
                    .low
                    .is_none_or(|(z, zb, rank)| rank * r <= z.len() && rank * PANEL <= zb.len())
                && (r - 1) * self.ldc + self.cols <= c.len()
                && self.cols <= PANEL,
            "tile outside its slices"
        );
    }

    /// Adds the low-rank steps, the bias and (with `acc`) what `c` holds to the tile's sums,
    /// `sums[i]` the 16 columns of row `i`, and stores the first `cols` of them: the portable
    /// end of a tile.
    pub(crate) fn finish_portable(&self, sums: &mut [[f32; PANEL]], c: &mut [f32]) {
        if let Some((z, zb, rank)) = self.low {
            for q in 0..rank {
                let bv: &[f32; PANEL] = zb[q * PANEL..(q + 1) * PANEL].try_into().unwrap();
                for (i, row) in sums.iter_mut().enumerate() {
                    let av = z[q * self.rows + i];
                    for (d, &bj) in row.iter_mut().zip(bv) {
                        *d += av * bj;
                    }
                }
            }
        }
        self.store_portable(sums, c);
    }

    /// The bias and (with `acc`) what `c` holds added to the sums, and the first `cols` of
    /// each row stored: how the vector kernels store a tile narrower than a panel.
    pub(crate) fn store_portable(&self, sums: &mut [[f32; PANEL]], c: &mut [f32]) {
        for (i, row) in sums.iter_mut().enumerate() {
            if let Some(bias) = self.bias {
                row.iter_mut().zip(bias).for_each(|(d, s)| *d += s);
            }
            let dst = &mut c[i * self.ldc..i * self.ldc + self.cols];
            if self.acc {
                dst.iter_mut().zip(row.iter()).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(&row[..self.cols]);
            }
        }
    }
}

/// Runs `f::<R>` for the tile's row count, `R` up to 12.
macro_rules! for_rows {
    ($rows:expr, $f:ident, $($arg:expr),*) => {
        match $rows {
            12 => $f::<12>($($arg),*),
            11 => $f::<11>($($arg),*),
            10 => $f::<10>($($arg),*),
            9 => $f::<9>($($arg),*),
            8 => $f::<8>($($arg),*),
            7 => $f::<7>($($arg),*),
            6 => $f::<6>($($arg),*),
            5 => $f::<5>($($arg),*),
            4 => $f::<4>($($arg),*),
            3 => $f::<3>($($arg),*),
            2 => $f::<2>($($arg),*),
            _ => $f::<1>($($arg),*),
        }
    };
}
pub(crate) use for_rows;
