//! Values and references shared by the kernels' unit tests.

/// Seeded values in [-1, 1), the same on every machine.
pub(crate) fn values(n: usize, seed: u32) -> Vec<f32> {
    (0..n)
        .map(|i| (((i as u32).wrapping_mul(2654435761) ^ seed) % 1000) as f32 / 500.0 - 1.0)
        .collect()
}

/// `x [m, k] W [n, k]^T` by a plain loop in f64.
pub(crate) fn reference_rows(x: &[f32], w: &[f32], m: usize, k: usize, n: usize) -> Vec<f32> {
    let mut out = vec![0.0; m * n];
    for i in 0..m {
        for j in 0..n {
            out[i * n + j] = (0..k)
                .map(|p| x[i * k + p] as f64 * w[j * k + p] as f64)
                .sum::<f64>() as f32;
        }
    }
    out
}
