//! The one place that decides which code path the kernels run on this CPU: detected once, at
//! first use, unless `SWITCHYARD_KERNELS` forces one.

/// True when the AVX2+FMA paths run: the CPU has both and `SWITCHYARD_KERNELS=portable` does not
/// force the portable code.
pub(crate) fn use_avx2() -> bool {
    static FAST: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *FAST.get_or_init(|| {
        if std::env::var("SWITCHYARD_KERNELS").is_ok_and(|v| v == "portable") {
            return false;
        }
        #[cfg(target_arch = "x86_64")]
        {
            std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
}
