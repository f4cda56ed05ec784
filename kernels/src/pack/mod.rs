//! Weights packed once, in the order the micro-kernels read them.

/// Output columns per panel of a [`PackedWeight`]: two AVX2 vectors.
pub const PANEL: usize = 16;

/// A weight `W [out, in]` stored for [`crate::packed_matmul`]: in panels of [`PANEL`] output rows, and
/// inside a panel input-major, so the kernel reads each panel front to back as one stream (16
/// consecutive floats per input feature) and uses every value it loads for a whole row tile.
/// Packed once when the model loads (or when a merged variant is built), so no call packs
/// anything. The last panel is padded with zeros.
#[derive(Clone)]
pub struct PackedWeight {
    pub(crate) data: Vec<f32>,
    pub(crate) out: usize,
    pub(crate) inp: usize,
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

pub(crate) mod rows;
