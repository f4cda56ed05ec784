//! The size of the thread pool the kernels split work across, and small helpers shared by the
//! macro loops.

pub(crate) fn rayon_threads() -> usize {
    static THREADS: std::sync::OnceLock<usize> = std::sync::OnceLock::new();
    *THREADS.get_or_init(|| {
        std::env::var("RAYON_NUM_THREADS")
            .ok()
            .and_then(|v| v.parse().ok())
            .filter(|&n: &usize| n > 0)
            .unwrap_or_else(|| {
                std::thread::available_parallelism()
                    .map(|n| n.get())
                    .unwrap_or(1)
            })
    })
}

/// The first `n` values of each of `m` rows `stride` apart set to zero: a product with an empty
/// inner dimension.
pub(crate) fn zero_rows(y: &mut [f32], stride: usize, m: usize, n: usize) {
    for row in y.chunks_mut(stride).take(m) {
        row[..n].fill(0.0);
    }
}
