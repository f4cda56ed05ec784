//! The low-rank math of one adapted matrix (Hu et al., 2021): for a frozen `W0 [out, in]`, an
//! adapter holds `A [r, in]` and `B [out, r]` and a scale `s = alpha / r`, and the adapted layer
//! computes `W0 x + s B (A x)`. [`LowRank`] keeps the factors in the layout the forward pass wants
//! (transposed, with `s` folded into B) so that applying them costs two small matmuls and nothing
//! else.

use candle_core::{DType, Result, Tensor};

/// One factor pair with its scale, ready to apply, merge and unmerge.
#[derive(Debug, Clone)]
pub struct LowRank {
    a: Tensor,
    b: Tensor,
    scale: f64,
    /// `A^T`, `[in, r]`, contiguous.
    a_t: Tensor,
    /// `(s B)^T`, `[r, out]`, contiguous.
    scaled_b_t: Tensor,
}

impl LowRank {
    /// Builds the pair from `A [r, in]`, `B [out, r]` and the scale `s = alpha / r`.
    pub fn new(a: Tensor, b: Tensor, scale: f64) -> Result<Self> {
        let a = a.to_dtype(DType::F32)?.contiguous()?;
        let b = b.to_dtype(DType::F32)?.contiguous()?;
        let (r, _) = a.dims2()?;
        let (_, rb) = b.dims2()?;
        if r != rb {
            candle_core::bail!("factor ranks differ: A has {r} rows, B has {rb} columns");
        }
        let a_t = a.t()?.contiguous()?;
        let scaled_b_t = (b.t()? * scale)?.contiguous()?;
        Ok(Self {
            a,
            b,
            scale,
            a_t,
            scaled_b_t,
        })
    }

    pub fn rank(&self) -> usize {
        self.a.dims()[0]
    }

    pub fn in_features(&self) -> usize {
        self.a.dims()[1]
    }

    pub fn out_features(&self) -> usize {
        self.b.dims()[0]
    }

    pub fn scale(&self) -> f64 {
        self.scale
    }

    pub fn a(&self) -> &Tensor {
        &self.a
    }

    pub fn b(&self) -> &Tensor {
        &self.b
    }

    /// Parameters held by the factors: `r * (in + out)`.
    pub fn parameters(&self) -> usize {
        self.rank() * (self.in_features() + self.out_features())
    }

    /// Bytes the resident factors take, counting both layouts kept.
    pub fn resident_bytes(&self) -> usize {
        2 * self.parameters() * std::mem::size_of::<f32>()
    }

    /// The low-rank term `s B (A x)` for rows `x [n, in]`, giving `[n, out]`.
    pub fn delta(&self, x: &Tensor) -> Result<Tensor> {
        x.matmul(&self.a_t)?.matmul(&self.scaled_b_t)
    }

    /// The full update `s B A`, `[out, in]`.
    pub fn update(&self) -> Result<Tensor> {
        self.b.matmul(&self.a)? * self.scale
    }

    /// `W0 + s B A`.
    pub fn merge(&self, w0: &Tensor) -> Result<Tensor> {
        w0.add(&self.update()?.to_dtype(w0.dtype())?)
    }

    /// `W - s B A`, the inverse of [`LowRank::merge`] up to rounding.
    pub fn unmerge(&self, w: &Tensor) -> Result<Tensor> {
        w.sub(&self.update()?.to_dtype(w.dtype())?)
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

    #[test]
    fn mismatched_ranks_are_refused() {
        let dev = Device::Cpu;
        let a = Tensor::zeros((4, 8), DType::F32, &dev).unwrap();
        let b = Tensor::zeros((8, 3), DType::F32, &dev).unwrap();
        assert!(LowRank::new(a, b, 1.0).is_err());
    }
}
