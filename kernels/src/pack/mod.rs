//! Weights packed once, in the order the micro-kernels read them, in one of the formats of
//! [`WeightFormat`] ([`quant`] holds the rounding rules); `rows` packs input rows per call.
//!
//! Every format uses the same panels: [`PANEL`] output rows side by side, input-major inside a
//! panel, so a micro-kernel reads a panel front to back as one stream and uses every value it
//! loads for a whole register tile of input rows:
//!
//! - `f32`: panel `p` at `p * 16 * in`, `w[q][c]` at `q * 16 + c`. The last panel is only as
//!   wide as the rows it holds (`out - 16 p`), so nothing is padded; the macro loop widens it
//!   to 16 in a per-thread buffer when it runs it.
//! - `bf16`: inputs in pairs, one `u32` per pair and column, `w[2j][c]` in the low half and
//!   `w[2j + 1][c]` in the high half (the order `vdpbf16ps` reads); `16 * ceil(in / 2)` words
//!   per panel.
//! - `int8`: `w[q][c]` at `q * 16 + c` (`16 * in` bytes per panel); 16 scales per panel and
//!   group, the group's scales together.
//! - `int4`: inputs in pairs, one byte per pair and column, input `2j` in the low nibble and
//!   `2j + 1` in the high one (`16 * ceil(in / 2)` bytes per panel); 16 scales (and 16 zero
//!   points, one byte each) per panel and group.
//!
//! The reduced formats pad their last panel to 16 rows with zeros (held, and counted in
//! [`PackedWeight::resident_bytes`]); an odd input count leaves the last pair's high half
//! zero, which no kernel reads.

mod build;
mod format;
mod lines;
pub mod quant;
pub(crate) mod rows;

pub use format::{FormatKind, Int8Scales, ScaleType, UnknownFormat, WeightFormat};
pub use quant::QuantError;

use lines::Lines;

/// Output rows per panel of a [`PackedWeight`]: one AVX-512 vector, two AVX2 ones.
pub const PANEL: usize = 16;

/// The values of a [`PackedWeight`], by format.
#[derive(Clone)]
pub(crate) enum Values {
    F32(Lines<f32>),
    Bf16(Lines<u32>),
    Int8 {
        q: Lines<i8>,
        scales: Lines<f32>,
    },
    Int4 {
        q: Lines<u8>,
        scales: Scales,
        /// Empty when symmetric.
        zeros: Lines<u8>,
    },
}

/// An int4 weight's scales as stored.
#[derive(Clone)]
pub(crate) enum Scales {
    F32(Lines<f32>),
    F16(Lines<u16>),
}

/// One block of one panel (inputs `k0..k0 + kb`, `k0` a multiple of the group), as a
/// micro-kernel reads it. Scales start at the block's first group.
#[derive(Clone, Copy)]
pub(crate) enum Block<'a> {
    /// `kb * 16` floats.
    F32(&'a [f32]),
    /// `ceil(kb / 2) * 16` pairs.
    Bf16(&'a [u32]),
    /// `kb * 16` values, 16 scales per group of `group` inputs.
    Int8 {
        q: &'a [i8],
        scales: &'a [f32],
        group: usize,
    },
    /// `ceil(kb / 2) * 16` nibble pairs, 16 scales and zero points (`None`: symmetric, 8) per
    /// group of `group` inputs.
    Int4 {
        q: &'a [u8],
        scales: ScaleSlice<'a>,
        zeros: Option<&'a [u8]>,
        group: usize,
    },
}

#[derive(Clone, Copy)]
pub(crate) enum ScaleSlice<'a> {
    F32(&'a [f32]),
    F16(&'a [u16]),
}

impl Block<'_> {
    /// The 16 values of the block's input `q`, as f32: the one definition of what each format
    /// stands for, which the portable kernel and [`PackedWeight::unpack`] use.
    pub(crate) fn decode(&self, q: usize, row: &mut [f32; PANEL]) {
        match *self {
            Block::F32(b) => row.copy_from_slice(&b[q * PANEL..(q + 1) * PANEL]),
            Block::Bf16(b) => {
                for (c, v) in row.iter_mut().enumerate() {
                    *v = quant::bf16_to_f32((b[q / 2 * PANEL + c] >> (16 * (q % 2))) as u16);
                }
            }
            Block::Int8 {
                q: d,
                scales,
                group,
            } => {
                let g = q / group * PANEL;
                for (c, v) in row.iter_mut().enumerate() {
                    *v = d[q * PANEL + c] as f32 * scales[g + c];
                }
            }
            Block::Int4 {
                q: d,
                scales,
                zeros,
                group,
            } => {
                let g = q / group * PANEL;
                for (c, v) in row.iter_mut().enumerate() {
                    let nib = ((d[q / 2 * PANEL + c] >> (4 * (q % 2))) & 15) as i32;
                    let z = zeros.map_or(8, |z| z[g + c] as i32);
                    let s = match scales {
                        ScaleSlice::F32(s) => s[g + c],
                        ScaleSlice::F16(s) => quant::f16_to_f32(s[g + c]),
                    };
                    *v = (nib - z) as f32 * s;
                }
            }
        }
    }

    /// Where the block's weight values start and how many bytes they span, for prefetching.
    pub(crate) fn bytes(&self) -> (*const u8, usize) {
        match *self {
            Block::F32(b) => (b.as_ptr().cast(), std::mem::size_of_val(b)),
            Block::Bf16(b) => (b.as_ptr().cast(), std::mem::size_of_val(b)),
            Block::Int8 { q, .. } => (q.as_ptr().cast(), q.len()),
            Block::Int4 { q, .. } => (q.as_ptr(), q.len()),
        }
    }
}

/// A weight `W [out, in]` stored for [`crate::packed_matmul`] in one of the [`WeightFormat`]s,
/// in panels (see the module doc). Packed once when the model loads (or when a merged variant
/// is built), so no call packs anything.
#[derive(Clone)]
pub struct PackedWeight {
    pub(crate) values: Values,
    pub(crate) format: WeightFormat,
    pub(crate) out: usize,
    pub(crate) inp: usize,
}

impl std::fmt::Debug for PackedWeight {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "PackedWeight {} [{} x {}]",
            self.format, self.out, self.inp
        )
    }
}

impl PackedWeight {
    /// Packs a row-major `w [out, inp]` as f32.
    pub fn pack(w: &[f32], out: usize, inp: usize) -> Self {
        assert!(w.len() >= out * inp, "weight does not fit its slice");
        let mut packed = Self::empty();
        packed.repack_strided(w, out, inp, inp, 1);
        packed
    }

    /// Packs a row-major `w [out, inp]` in `format`, quantising by the rules of [`quant`].
    /// Refuses a value an integer format cannot represent (not finite, or a scale past f16).
    pub fn pack_as(
        w: &[f32],
        out: usize,
        inp: usize,
        format: WeightFormat,
    ) -> Result<Self, QuantError> {
        assert!(w.len() >= out * inp, "weight does not fit its slice");
        if format == WeightFormat::F32 {
            return Ok(Self::pack(w, out, inp));
        }
        if format != WeightFormat::Bf16
            && let Some(at) = build::first_not_finite(&w[..out * inp])
        {
            // Checked here in row-major order, so the first offending value is the one named.
            return Err(QuantError::NotFinite {
                value: w[at],
                row: at / inp,
                input: at % inp,
            });
        }
        Self::pack_rows(out, inp, format, |j, row| {
            row.copy_from_slice(&w[j * inp..(j + 1) * inp])
        })
    }

    /// Packs `W [out, inp]` in `format` from a source of rows: `row(j, buf)` fills `buf`
    /// (`inp` values) with row `j`. Panels are packed in parallel across the thread pool, each
    /// task holding one row at a time, so a weight is converted from its stored form (a
    /// memory-mapped checkpoint's f16 or bf16 bytes, say) with no full f32 copy of it.
    /// Refuses what [`PackedWeight::pack_as`] refuses; which offending value is named when
    /// there are several is not fixed.
    pub fn pack_rows<F>(
        out: usize,
        inp: usize,
        format: WeightFormat,
        row: F,
    ) -> Result<Self, QuantError>
    where
        F: Fn(usize, &mut [f32]) + Sync,
    {
        let values = build::values(out, inp, format, &row)?;
        Ok(Self {
            values,
            format,
            out,
            inp,
        })
    }

    /// Repacks this buffer as f32 (reusing its memory when it is f32 already) with `W [out,
    /// inp]` read from a strided view: `W[j, kk] = src[j * row_stride + kk * col_stride]`; a
    /// transposed source is a view with `row_stride` 1.
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
        let mut data = match std::mem::replace(&mut self.values, Values::F32(Lines::new())) {
            Values::F32(d) if d.len() == out * inp => d,
            _ => Lines::zeroed(out * inp),
        };
        (self.out, self.inp, self.format) = (out, inp, WeightFormat::F32);
        for (p, panel) in data.chunks_mut(PANEL * inp.max(1)).enumerate() {
            let width = PANEL.min(out - p * PANEL);
            if row_stride == 1 {
                // A transposed source: the panel's values for one input feature are
                // consecutive in it.
                for kk in 0..inp {
                    let from = p * PANEL + kk * col_stride;
                    panel[kk * width..(kk + 1) * width].copy_from_slice(&src[from..from + width]);
                }
            } else {
                for c in 0..width {
                    let j = p * PANEL + c;
                    if col_stride == 1 {
                        let row = &src[j * row_stride..j * row_stride + inp];
                        for (kk, &v) in row.iter().enumerate() {
                            panel[kk * width + c] = v;
                        }
                    } else {
                        for kk in 0..inp {
                            panel[kk * width + c] = src[j * row_stride + kk * col_stride];
                        }
                    }
                }
            }
        }
        self.values = Values::F32(data);
    }

    /// An empty f32 weight, `[0, 0]`, to repack into.
    pub fn empty() -> Self {
        Self {
            values: Values::F32(Lines::new()),
            format: WeightFormat::F32,
            out: 0,
            inp: 0,
        }
    }

    /// The row-major `[out, inp]` matrix of the values this weight stands for (dequantised:
    /// exactly what every kernel multiplies by).
    pub fn unpack(&self) -> Vec<f32> {
        let (out, inp) = (self.out, self.inp);
        let mut w = vec![0f32; out * inp];
        // A panel holds its rows' values input by input; each block of `BLOCK` inputs is
        // decoded into a small tile first and written out row by row, a cache line of each row
        // at a time. Written straight out, every value went to another row, `inp` floats from
        // the last: 16 rows of a 2048-wide weight (8 KB apart) share one set of the L1 cache,
        // and unpacking a rank-16 factor took 113 us against 19 us this way (kernel-bench
        // shape, 2-vCPU Xeon).
        const BLOCK: usize = 16;
        let mut tile = [[0f32; PANEL]; BLOCK];
        for p in 0..out.div_ceil(PANEL) {
            let width = PANEL.min(out - p * PANEL);
            for q0 in (0..inp).step_by(BLOCK) {
                let n = BLOCK.min(inp - q0);
                for (qq, row) in tile.iter_mut().take(n).enumerate() {
                    self.decode(p, q0 + qq, row);
                }
                for c in 0..width {
                    let dst = &mut w[(p * PANEL + c) * inp + q0..][..n];
                    for (d, row) in dst.iter_mut().zip(&tile) {
                        *d = row[c];
                    }
                }
            }
        }
        w
    }

    /// Row `j` of the values this weight stands for, into `dst` (`inp` values): what
    /// [`PackedWeight::unpack`] gives for that row, read straight from the panel (a token
    /// embedding table held in a reduced format is looked up this way).
    pub fn row_into(&self, j: usize, dst: &mut [f32]) {
        let (out, inp) = (self.out, self.inp);
        assert!(
            j < out && dst.len() == inp,
            "row {j} of a [{out} x {inp}] weight"
        );
        let (p, c) = (j / PANEL, j % PANEL);
        let group = self.format.group(inp);
        let groups = inp.div_ceil(group);
        let pairs = inp.div_ceil(2);
        let sc = |g: usize| (p * groups + g) * PANEL + c;
        match &self.values {
            Values::F32(d) => {
                let width = self.panel_width(p);
                let panel = &d[p * PANEL * inp..];
                for (q, v) in dst.iter_mut().enumerate() {
                    *v = panel[q * width + c];
                }
            }
            Values::Bf16(d) => {
                for (q, v) in dst.iter_mut().enumerate() {
                    let word = d[(p * pairs + q / 2) * PANEL + c];
                    *v = quant::bf16_to_f32((word >> (16 * (q % 2))) as u16);
                }
            }
            Values::Int8 { q: d, scales } => {
                for (q, v) in dst.iter_mut().enumerate() {
                    *v = d[(p * inp + q) * PANEL + c] as f32 * scales[sc(q / group)];
                }
            }
            Values::Int4 {
                q: d,
                scales,
                zeros,
            } => {
                for (q, v) in dst.iter_mut().enumerate() {
                    let g = sc(q / group);
                    let nib = ((d[(p * pairs + q / 2) * PANEL + c] >> (4 * (q % 2))) & 15) as i32;
                    let z = if zeros.is_empty() { 8 } else { zeros[g] as i32 };
                    let s = match scales {
                        Scales::F32(s) => s[g],
                        Scales::F16(s) => quant::f16_to_f32(s[g]),
                    };
                    *v = (nib - z) as f32 * s;
                }
            }
        }
    }

    /// The 16 values of input `q` in panel `p` (zeros past the last row), as f32.
    pub(crate) fn decode(&self, p: usize, q: usize, row: &mut [f32; PANEL]) {
        if let Values::F32(d) = &self.values {
            let width = self.panel_width(p);
            let at = p * PANEL * self.inp + q * width;
            row.fill(0.0);
            row[..width].copy_from_slice(&d[at..at + width]);
            return;
        }
        let group = self.format.group(self.inp);
        let g0 = q / group * group;
        let len = group.min(self.inp - g0);
        self.block(p, g0, len).decode(q - g0, row);
    }

    /// Rows in panel `p`: 16, or fewer in an f32 weight's last panel.
    pub(crate) fn panel_width(&self, p: usize) -> usize {
        match self.values {
            Values::F32(_) => PANEL.min(self.out - p * PANEL),
            _ => PANEL,
        }
    }

    /// Inputs `k0..k0 + kb` of panel `p` (`k0` a multiple of the format's group, and even).
    pub(crate) fn block(&self, p: usize, k0: usize, kb: usize) -> Block<'_> {
        let (inp, pairs) = (self.inp, self.inp.div_ceil(2));
        let group = self.format.group(inp);
        let groups = inp.div_ceil(group);
        debug_assert!(k0.is_multiple_of(group) || group >= inp);
        let g0 = (p * groups + k0 / group) * PANEL;
        let g1 = (p * groups + (k0 + kb).div_ceil(group)) * PANEL;
        match &self.values {
            Values::F32(d) => {
                let width = self.panel_width(p);
                let start = p * PANEL * inp + k0 * width;
                Block::F32(&d[start..start + kb * width])
            }
            Values::Bf16(d) => {
                let start = (p * pairs + k0 / 2) * PANEL;
                Block::Bf16(&d[start..start + kb.div_ceil(2) * PANEL])
            }
            Values::Int8 { q, scales } => {
                let start = (p * inp + k0) * PANEL;
                Block::Int8 {
                    q: &q[start..start + kb * PANEL],
                    scales: &scales[g0..g1],
                    group,
                }
            }
            Values::Int4 { q, scales, zeros } => {
                let start = (p * pairs + k0 / 2) * PANEL;
                Block::Int4 {
                    q: &q[start..start + kb.div_ceil(2) * PANEL],
                    scales: match scales {
                        Scales::F32(s) => ScaleSlice::F32(&s[g0..g1]),
                        Scales::F16(s) => ScaleSlice::F16(&s[g0..g1]),
                    },
                    zeros: (!zeros.is_empty()).then(|| &zeros[g0..g1]),
                    group,
                }
            }
        }
    }

    /// Where the stored values start and how many bytes they span (scales aside).
    pub(crate) fn value_bytes(&self) -> (*const u8, usize) {
        match &self.values {
            Values::F32(d) => (d.as_ptr().cast(), d.len() * 4),
            Values::Bf16(d) => (d.as_ptr().cast(), d.len() * 4),
            Values::Int8 { q, .. } => (q.as_ptr().cast(), q.len()),
            Values::Int4 { q, .. } => (q.as_ptr(), q.len()),
        }
    }

    /// The f32 values, for code that reads an f32 weight's layout directly.
    pub(crate) fn f32_values(&self) -> &[f32] {
        match &self.values {
            Values::F32(d) => d,
            _ => panic!("a {} weight where an f32 one is needed", self.format),
        }
    }

    pub fn format(&self) -> WeightFormat {
        self.format
    }

    pub fn out_features(&self) -> usize {
        self.out
    }

    pub fn in_features(&self) -> usize {
        self.inp
    }

    /// Bytes held: values, scales and zero points, and the reduced formats' padding.
    pub fn resident_bytes(&self) -> usize {
        match &self.values {
            Values::F32(d) => d.len() * 4,
            Values::Bf16(d) => d.len() * 4,
            Values::Int8 { q, scales } => q.len() + scales.len() * 4,
            Values::Int4 { q, scales, zeros } => {
                q.len()
                    + zeros.len()
                    + match scales {
                        Scales::F32(s) => s.len() * 4,
                        Scales::F16(s) => s.len() * 2,
                    }
            }
        }
    }
}
