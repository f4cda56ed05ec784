//! The low-rank math of one adapted matrix (Hu et al., 2021): for a frozen `W0 [out, in]`, an
//! adapter holds `A [r, in]` and `B [out, r]` and a scale `s = alpha / r`, and the adapted layer
//! computes `W0 x + s B (A x)`.
//!
//! The hot operations run through [`switchyard_kernels`] straight on the factors' memory: the
//! factors are held packed for the projection kernel (`A` as a weight `[r, in]`, `B` as a weight
//! `[out, r]`), so in a model the term is fused into the base product (see [`LowRank::term`]);
//! on its own it is two kernel calls accumulated onto an output in place (`z = x A^T` into one
//! `[rows, r]` scratch buffer, scaled, then `y += z B^T`), and merging adds `s B A` into a weight
//! in place. Nothing is transposed or copied per call.

use candle_core::{DType, Result, Tensor};

use switchyard_kernels::{PackedWeight, RowTerm, add_rank_update, packed_matmul};

use crate::tensors::{pack_tensor, unpack_tensor, with_f32};

/// One factor pair with its scale, ready to apply, merge and unmerge.
#[derive(Debug, Clone)]
pub struct LowRank {
    /// `A [r, in]`, packed (a last panel of fewer than 16 rows holds only those rows; the
    /// kernel widens it per call).
    a: PackedWeight,
    /// `B [out, r]`, packed.
    b: PackedWeight,
    scale: f64,
}

impl LowRank {
    /// Builds the pair from `A [r, in]`, `B [out, r]` and the scale `s = alpha / r`.
    pub fn new(a: Tensor, b: Tensor, scale: f64) -> Result<Self> {
        let (r, _) = a.dims2()?;
        let (_, rb) = b.dims2()?;
        if r != rb {
            candle_core::bail!("factor ranks differ: A has {r} rows, B has {rb} columns");
        }
        Ok(Self {
            a: pack_tensor(&a)?,
            b: pack_tensor(&b)?,
            scale,
        })
    }

    pub fn rank(&self) -> usize {
        self.a.out_features()
    }

    pub fn in_features(&self) -> usize {
        self.a.in_features()
    }

    pub fn out_features(&self) -> usize {
        self.b.out_features()
    }

    pub fn scale(&self) -> f64 {
        self.scale
    }

    /// `A [r, in]` as a new row-major tensor.
    pub fn a(&self) -> Result<Tensor> {
        unpack_tensor(&self.a)
    }

    /// `B [out, r]` as a new row-major tensor.
    pub fn b(&self) -> Result<Tensor> {
        unpack_tensor(&self.b)
    }

    /// Parameters held by the factors: `r * (in + out)`.
    pub fn parameters(&self) -> usize {
        self.rank() * (self.in_features() + self.out_features())
    }

    /// Bytes the resident factors take in their packed layout: exactly `r * (in + out)` f32
    /// values (packed f32 weights hold no padding).
    pub fn resident_bytes(&self) -> usize {
        self.a.resident_bytes() + self.b.resident_bytes()
    }

    /// Adds the low-rank term to an output in place: `y[rows, out] += s (x A^T) B^T` for
    /// `x [rows, in]` and `y [rows, out]` (both row-major). `scratch` is reused across calls to
    /// hold `s x A^T`.
    pub fn add_delta_into(
        &self,
        x: &[f32],
        rows: usize,
        y: &mut [f32],
        scratch: &mut Vec<f32>,
    ) -> Result<()> {
        let (r, inp, out) = (self.rank(), self.in_features(), self.out_features());
        if x.len() < rows * inp {
            candle_core::bail!(
                "activation holds {} values, expected {rows} x {inp}",
                x.len()
            );
        }
        if y.len() < rows * out {
            candle_core::bail!("output holds {} values, expected {rows} x {out}", y.len());
        }
        scratch.clear();
        scratch.resize(rows * r, 0.0);
        self.scaled_down(x, rows, scratch)?;
        packed_matmul(y, scratch, rows, &self.b, true);
        Ok(())
    }

    /// `z = s x A^T` for `x [rows, in]` into `z [rows, r]` (row-major).
    fn scaled_down(&self, x: &[f32], rows: usize, z: &mut [f32]) -> Result<()> {
        let (r, inp) = (self.rank(), self.in_features());
        if x.len() < rows * inp || z.len() < rows * r {
            candle_core::bail!(
                "activation holds {} values for {rows} x {inp}, scratch {} for {rows} x {r}",
                x.len(),
                z.len()
            );
        }
        let z = &mut z[..rows * r];
        packed_matmul(z, x, rows, &self.a, false);
        let s = self.scale as f32;
        z.iter_mut().for_each(|v| *v *= s);
        Ok(())
    }

    /// This pair as a term of the base product on rows `rows`, for
    /// [`switchyard_kernels::packed_matmul_with`] to fuse into the base product.
    pub fn term(&self, rows: std::ops::Range<usize>) -> RowTerm<'_> {
        RowTerm {
            rows,
            a: &self.a,
            b: &self.b,
            scale: self.scale as f32,
        }
    }

    /// The low-rank term `s B (A x)` for rows `x [n, in]`, giving `[n, out]`.
    pub fn delta(&self, x: &Tensor) -> Result<Tensor> {
        let x = x.to_dtype(DType::F32)?.contiguous()?;
        let (rows, _) = x.dims2()?;
        let out = self.out_features();
        let mut y = vec![0f32; rows * out];
        let mut scratch = Vec::new();
        with_f32(&x, |xs| self.add_delta_into(xs, rows, &mut y, &mut scratch))??;
        Tensor::from_vec(y, (rows, out), x.device())
    }

    /// Adds `sign * s B A` to a row-major `[out, in]` weight in place.
    fn accumulate_update(&self, w: &mut [f32], sign: f32) -> Result<()> {
        let (r, inp, out) = (self.rank(), self.in_features(), self.out_features());
        if w.len() != out * inp {
            candle_core::bail!("weight holds {} values, expected {out} x {inp}", w.len());
        }
        // W [out, in] += (sign s B) [out, r] times A [r, in], W read and written once, in
        // groups of rows across the threads (see switchyard_kernels::add_rank_update).
        let a = self.a.unpack();
        let mut b = self.b.unpack();
        let s = sign * self.scale as f32;
        b.iter_mut().for_each(|v| *v *= s);
        add_rank_update(w, out, inp, &b, &a, r);
        Ok(())
    }

    /// `W += s B A` in place, for a row-major `[out, in]` weight.
    pub fn merge_in_place(&self, w: &mut [f32]) -> Result<()> {
        self.accumulate_update(w, 1.0)
    }

    /// `W -= s B A` in place: the inverse of [`LowRank::merge_in_place`] up to rounding.
    pub fn unmerge_in_place(&self, w: &mut [f32]) -> Result<()> {
        self.accumulate_update(w, -1.0)
    }

    /// The full update `s B A`, `[out, in]`.
    pub fn update(&self) -> Result<Tensor> {
        let mut w = vec![0f32; self.out_features() * self.in_features()];
        self.merge_in_place(&mut w)?;
        Tensor::from_vec(
            w,
            (self.out_features(), self.in_features()),
            &candle_core::Device::Cpu,
        )
    }

    /// `W0 + s B A` held in `w0`'s own format: the base's values as it stands for them
    /// (dequantised), the update added in f32, and the sum packed again by the format's rules.
    /// For f32 that is the exact merge; for bf16 each merged value is rounded to bf16 once; for
    /// int8 and int4 every row the update touches (all of them, B being dense) gets fresh scales
    /// (and zero points) from its merged values and is quantised again, so a merged int weight
    /// equals `quantise(dequantise(W0) + s B A)`, within half a quantisation step of the exact
    /// merge per value.
    pub fn merged_packed(&self, w0: &PackedWeight) -> Result<PackedWeight> {
        let (out, inp) = (w0.out_features(), w0.in_features());
        if (out, inp) != (self.out_features(), self.in_features()) {
            candle_core::bail!(
                "weight is {out} x {inp}, the factors {} x {}",
                self.out_features(),
                self.in_features()
            );
        }
        let mut w = w0.unpack();
        self.accumulate_update(&mut w, 1.0)?;
        PackedWeight::pack_as(&w, out, inp, w0.format())
            .map_err(|e| candle_core::Error::Msg(format!("merged weight: {e}")))
    }

    /// `W0 + s B A` as a new tensor (one copy of `W0`, then an in-place merge).
    pub fn merge(&self, w0: &Tensor) -> Result<Tensor> {
        self.apply_to_copy(w0, 1.0)
    }

    /// `W - s B A` as a new tensor.
    pub fn unmerge(&self, w: &Tensor) -> Result<Tensor> {
        self.apply_to_copy(w, -1.0)
    }

    fn apply_to_copy(&self, w: &Tensor, sign: f32) -> Result<Tensor> {
        let dtype = w.dtype();
        let mut data = w.to_dtype(DType::F32)?.flatten_all()?.to_vec1::<f32>()?;
        self.accumulate_update(&mut data, sign)?;
        Tensor::from_vec(data, w.dims(), w.device())?.to_dtype(dtype)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    fn pair(r: usize, inp: usize, out: usize) -> LowRank {
        let dev = Device::Cpu;
        let a = Tensor::randn(0f32, 0.3, (r, inp), &dev).unwrap();
        let b = Tensor::randn(0f32, 0.3, (out, r), &dev).unwrap();
        LowRank::new(a, b, 2.0).unwrap()
    }

    fn max_abs_diff(a: &Tensor, b: &Tensor) -> f32 {
        (a - b)
            .unwrap()
            .abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap()
            .to_scalar::<f32>()
            .unwrap()
    }

    #[test]
    fn update_equals_scaled_b_times_a_computed_by_candle() {
        let lr = pair(4, 24, 40);
        let want = (lr.b().unwrap().matmul(&lr.a().unwrap()).unwrap() * 2.0).unwrap();
        assert!(max_abs_diff(&lr.update().unwrap(), &want) < 1e-5);
    }

    #[test]
    fn delta_equals_merged_weight_minus_base() {
        let lr = pair(4, 24, 40);
        let dev = Device::Cpu;
        let w0 = Tensor::randn(0f32, 1.0, (40, 24), &dev).unwrap();
        let x = Tensor::randn(0f32, 1.0, (5, 24), &dev).unwrap();
        let merged = lr.merge(&w0).unwrap();
        let via_merge = x.matmul(&merged.t().unwrap()).unwrap();
        let via_delta = (x.matmul(&w0.t().unwrap()).unwrap() + lr.delta(&x).unwrap()).unwrap();
        assert!(max_abs_diff(&via_merge, &via_delta) < 1e-4);
    }

    #[test]
    fn unmerge_of_merge_restores_the_base_weight() {
        let lr = pair(8, 64, 48);
        let w0 = Tensor::randn(0f32, 1.0, (48, 64), &Device::Cpu).unwrap();
        let back = lr.unmerge(&lr.merge(&w0).unwrap()).unwrap();
        assert!(max_abs_diff(&back, &w0) <= 1e-5);
    }

    /// Merging into a packed weight keeps its format, and the result is the exact merge rounded
    /// once by that format: bf16 within 2^-9 relative, int8 and int4 within half a step of the
    /// merged row's (or group's) new scale.
    #[test]
    fn merging_into_each_format_rounds_the_merged_values_once() {
        use switchyard_kernels::WeightFormat;
        let (r, inp, out) = (8, 64, 48);
        let lr = pair(r, inp, out);
        let w0: Vec<f32> = (0..out * inp)
            .map(|i| ((i * 37 % 101) as f32 / 101.0 - 0.5) * 0.4)
            .collect();
        for name in [
            "f32",
            "bf16",
            "int8",
            "int8-g32",
            "int4",
            "int4-g64-zero-f32",
        ] {
            let format = WeightFormat::parse(name).unwrap();
            let base = PackedWeight::pack_as(&w0, out, inp, format).unwrap();
            let merged = lr.merged_packed(&base).unwrap();
            assert_eq!(merged.format(), format);
            let mut exact = base.unpack();
            lr.merge_in_place(&mut exact).unwrap();
            let got = merged.unpack();
            let group = format.group(inp);
            for j in 0..out {
                for g0 in (0..inp).step_by(group) {
                    let vals = &exact[j * inp + g0..j * inp + g0 + group];
                    let amax = vals.iter().fold(0f32, |m, v| m.max(v.abs()));
                    let (lo, hi) = vals
                        .iter()
                        .fold((0f32, 0f32), |(a, b), &v| (a.min(v), b.max(v)));
                    for (q, &e) in vals.iter().enumerate() {
                        let g = got[j * inp + g0 + q];
                        let bound = match name {
                            "f32" => 0.0,
                            "bf16" => e.abs() * 2f32.powi(-8),
                            "int8" | "int8-g32" => amax / 127.0 * 0.5001,
                            "int4" => amax / 7.0 * 0.51,
                            _ => (hi - lo) / 15.0 * 0.5001,
                        };
                        assert!((g - e).abs() <= bound + 1e-7, "{name}: {g} vs {e}");
                    }
                }
            }
        }
    }

    /// A was padded to 16 rows, so rank 8 held 1.5x its bytes and rank 4 2.5x (issue 13).
    #[test]
    fn factors_below_rank_sixteen_hold_exactly_their_bytes() {
        for (r, inp, out) in [(4, 384, 384), (8, 384, 1536), (1, 64, 40), (20, 96, 33)] {
            let lr = pair(r, inp, out);
            assert_eq!(lr.resident_bytes(), r * (inp + out) * 4, "rank {r}");
            assert_eq!(lr.resident_bytes(), lr.parameters() * 4);
        }
    }

    #[test]
    fn mismatched_ranks_are_refused() {
        let dev = Device::Cpu;
        let a = Tensor::zeros((4, 8), DType::F32, &dev).unwrap();
        let b = Tensor::zeros((8, 3), DType::F32, &dev).unwrap();
        assert!(LowRank::new(a, b, 1.0).is_err());
    }
}
