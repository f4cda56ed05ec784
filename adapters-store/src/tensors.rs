//! The bridge between candle tensors and the kernels' plain slices: packing a tensor for the
//! projection kernel, unpacking one back, and borrowing a tensor's f32 values without a copy.

use candle_core::{DType, Device, Result, Tensor};
use switchyard_kernels::PackedWeight;

/// Packs a 2-D tensor `[out, in]` (converted to f32) for the projection kernel.
pub fn pack_tensor(w: &Tensor) -> Result<PackedWeight> {
    let (out, inp) = w.dims2()?;
    let w = w.to_dtype(DType::F32)?.contiguous()?;
    with_f32(&w, |d| PackedWeight::pack(d, out, inp))
}

/// The packed weight as a new row-major `[out, in]` tensor.
pub fn unpack_tensor(w: &PackedWeight) -> Result<Tensor> {
    Tensor::from_vec(
        w.unpack(),
        (w.out_features(), w.in_features()),
        &Device::Cpu,
    )
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
