//! Training a classification adapter on the encoder: low-rank factors on chosen projections plus
//! a head, fitted with candle's autograd and AdamW on a labelled JSONL file.
//!
//! - [`data`] reads the examples and makes the held-out split that training and evaluation share;
//! - [`encoder`] is a differentiable copy of the serving encoder with the base weights frozen;
//! - [`fit`] runs the epochs: cross-entropy on `softmax(W e + b)`, where `e` is the unit-length
//!   pooled embedding exactly as `/classify` computes it;
//! - [`measure`] scores examples through the serving path ([`crate::model::embedder::Embedder`] and
//!   [`crate::model::classify::scores`]), so accuracy is what users of `/classify` get.

pub mod data;
pub mod encoder;
pub mod fit;
pub mod measure;

use candle_core::{Device, Tensor};

/// Token ids `[b, t]` and mask `[b, t]` (1 for a real token) for a batch padded to its longest
/// sequence, as the serving embedder pads.
pub fn batch_tensors(ids: &[Vec<u32>]) -> candle_core::Result<(Tensor, Tensor)> {
    let b = ids.len();
    let t = crate::model::embedder::padded_len(ids);
    let mut flat_ids = vec![0u32; b * t];
    let mut flat_mask = vec![0u32; b * t];
    for (row, seq) in ids.iter().enumerate() {
        flat_ids[row * t..row * t + seq.len()].copy_from_slice(seq);
        flat_mask[row * t..row * t + seq.len()].fill(1);
    }
    Ok((
        Tensor::from_vec(flat_ids, (b, t), &Device::Cpu)?,
        Tensor::from_vec(flat_mask, (b, t), &Device::Cpu)?,
    ))
}

/// The head a training run starts from: `weight [labels, hidden]` and `bias [labels]` all zero,
/// so every label starts at probability `1 / labels` whatever the text (the head's counterpart
/// of `B = 0`: training starts from a model that knows nothing of the task). A random head would
/// not do as a baseline: the base model's embeddings of one label cluster, so a random
/// direction can favour one label by chance (a random head measured 0.57 on the urgency
/// held-out split, against a chance of 0.33). The factors' gradients are zero on the first step
/// (`B = 0` and `W = 0`); the head moves first, then `B`, then `A`.
pub fn initial_head(labels: usize, hidden: usize) -> (Vec<f32>, Vec<f32>) {
    (vec![0.0; labels * hidden], vec![0.0; labels])
}

/// Index of the largest value (the first on a tie).
pub fn argmax(values: &[f32]) -> usize {
    let mut best = 0;
    for (i, v) in values.iter().enumerate() {
        if *v > values[best] {
            best = i;
        }
    }
    best
}
