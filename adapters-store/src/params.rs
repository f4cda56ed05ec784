//! Parameter counting for capacity planning: what an adapter holds against a full update of the
//! same matrices.

/// Factor parameters of one adapted `[out, in]` matrix at rank `r`: `r * (in + out)`.
pub fn factor_parameters(rank: usize, in_features: usize, out_features: usize) -> usize {
    rank * (in_features + out_features)
}

/// Parameters of a full update of the same matrix: `in * out`.
pub fn full_update_parameters(in_features: usize, out_features: usize) -> usize {
    in_features * out_features
}

/// Trainable parameters of an adapter of rank `rank` on `targets_per_layer` matrices of shape
/// `[out, in]` in each of `layers` layers.
pub fn trainable_parameters(
    rank: usize,
    layers: usize,
    shapes_per_layer: &[(usize, usize)],
) -> usize {
    layers
        * shapes_per_layer
            .iter()
            .map(|&(out, inp)| factor_parameters(rank, inp, out))
            .sum::<usize>()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hu et al., 2021 (LoRA), Section 7.1 / Table 5: on GPT-3 175B (d_model = 12288, 96 layers),
    /// every configuration under the same 18M-parameter budget holds 18,874,368 trainable
    /// parameters: r = 8 on Wq alone, r = 4 on Wq and Wv, r = 2 on Wq, Wk, Wv and Wo.
    #[test]
    fn gpt3_budget_from_the_lora_paper() {
        let d = 12288;
        let sq = (d, d);
        assert_eq!(trainable_parameters(8, 96, &[sq]), 18_874_368);
        assert_eq!(trainable_parameters(4, 96, &[sq, sq]), 18_874_368);
        assert_eq!(trainable_parameters(2, 96, &[sq, sq, sq, sq]), 18_874_368);
    }

    /// Textbook case (common practice, no source): a 100x100 matrix at r = 5.
    #[test]
    fn hundred_by_hundred_at_rank_five() {
        assert_eq!(factor_parameters(5, 100, 100), 1_000);
        assert_eq!(full_update_parameters(100, 100), 10_000);
    }
}
