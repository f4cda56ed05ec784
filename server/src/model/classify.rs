//! Classification through a head carried by an adapter: `softmax(W e + b)` over the labels,
//! where `e` is the adapter's unit-length sentence embedding.

use switchyard_adapters::TaskHead;

/// Per-label probabilities for one embedding.
pub fn scores(embedding: &[f32], head: &TaskHead) -> candle_core::Result<Vec<f32>> {
    let w = head.weight.to_vec2::<f32>()?;
    let b = head.bias.to_vec1::<f32>()?;
    if w.first().is_some_and(|row| row.len() != embedding.len()) {
        candle_core::bail!(
            "head expects {} features, the embedding has {}",
            w[0].len(),
            embedding.len()
        );
    }
    let logits: Vec<f32> = w
        .iter()
        .zip(&b)
        .map(|(row, bias)| row.iter().zip(embedding).map(|(x, y)| x * y).sum::<f32>() + bias)
        .collect();
    Ok(softmax(&logits))
}

pub fn softmax(logits: &[f32]) -> Vec<f32> {
    let max = logits.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let exps: Vec<f32> = logits.iter().map(|l| (l - max).exp()).collect();
    let total: f32 = exps.iter().sum();
    exps.into_iter().map(|e| e / total).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn softmax_of_equal_logits_is_uniform_and_sums_to_one() {
        let p = softmax(&[2.0, 2.0, 2.0, 2.0]);
        assert!(p.iter().all(|x| (x - 0.25).abs() < 1e-7));
        let q = softmax(&[1.0, 3.0, -2.0]);
        assert!((q.iter().sum::<f32>() - 1.0).abs() < 1e-6);
        assert!(q[1] > q[0] && q[0] > q[2]);
    }
}
