//! Projection-kernel benchmark (not a test): how close `packed_matmul` comes to this CPU's
//! multiply-add peak on the shapes the models run, side by side in one run.
//!
//! First a peak: twelve independent chains of 8-wide fused multiply-adds per thread, on every
//! thread of the pool at once (AVX2+FMA; skipped on a CPU without them). Then, for each shape,
//! `packed_matmul` on that many rows, its GFLOP/s and that as a fraction of the peak measured in
//! the same run, so a loaded machine moves both. Decode shapes cycle through enough weights
//! (128 MB) that they come from memory, as in a real step.
//!
//! Run: `cargo run --release -p switchyard-kernels --example kernel-bench` (add
//! `-- --repeats N`, or `-- --only TEXT` for the shapes whose description holds TEXT). Every
//! figure is the median of the repeats. Inputs are seeded random values, which is all the
//! kernel's speed depends on.

use std::time::Instant;

use rand::{Rng, SeedableRng};
use switchyard_kernels::{PackedWeight, packed_matmul};

/// A model shape: rows of input, inner (input) features, output features.
struct Shape {
    what: &'static str,
    m: usize,
    k: usize,
    n: usize,
    /// Distinct weights the timing cycles through (enough that they come from memory).
    weights: usize,
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Multiply-add GFLOP/s of all pool threads together; `None` without AVX2+FMA.
fn fma_peak() -> Option<f64> {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma") {
        use rayon::prelude::*;
        const STEPS: usize = 20_000_000;
        let threads = rayon::current_num_threads();
        let start = Instant::now();
        let sink: f32 = (0..threads)
            .into_par_iter()
            .map(|t| {
                // SAFETY: AVX2 and FMA were detected just above.
                #[allow(unsafe_code)]
                unsafe {
                    peak::chains(STEPS, t as f32)
                }
            })
            .sum();
        let secs = start.elapsed().as_secs_f64();
        std::hint::black_box(sink);
        // 12 chains x 8 lanes x 2 flops per step.
        return Some((threads * STEPS * 12 * 8 * 2) as f64 / secs / 1e9);
    }
    None
}

#[cfg(target_arch = "x86_64")]
mod peak {
    #[allow(unsafe_code)]
    #[target_feature(enable = "avx2,fma")]
    pub unsafe fn chains(steps: usize, seed: f32) -> f32 {
        use std::arch::x86_64::*;
        let a = _mm256_set1_ps(0.999_9);
        let b = _mm256_set1_ps(1e-7 * seed);
        let mut acc = [_mm256_set1_ps(seed); 12];
        for _ in 0..steps {
            for v in acc.iter_mut() {
                *v = _mm256_fmadd_ps(*v, a, b);
            }
        }
        let mut out = [0f32; 8];
        let mut s = acc[0];
        for v in &acc[1..] {
            s = _mm256_add_ps(s, *v);
        }
        // SAFETY: out holds 8 floats.
        unsafe { _mm256_storeu_ps(out.as_mut_ptr(), s) };
        out.iter().sum()
    }
}

/// The value after `name` on the command line, if it is there.
fn flag<'a>(args: &'a [String], name: &str) -> Option<&'a str> {
    let at = args.iter().position(|a| a == name)?;
    args.get(at + 1).map(String::as_str)
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let repeats = flag(&args, "--repeats")
        .and_then(|v| v.parse().ok())
        .unwrap_or(9usize);
    let shapes = [
        Shape {
            what: "encoder q/k/v/o, 32 x 64 tokens",
            m: 2048,
            k: 384,
            n: 384,
            weights: 1,
        },
        Shape {
            what: "encoder up",
            m: 2048,
            k: 384,
            n: 1536,
            weights: 1,
        },
        Shape {
            what: "encoder down",
            m: 2048,
            k: 1536,
            n: 384,
            weights: 1,
        },
        Shape {
            what: "encoder q, one 64-token sequence",
            m: 64,
            k: 384,
            n: 384,
            weights: 1,
        },
        Shape {
            what: "decoder 2048 x 2048, batch 16",
            m: 16,
            k: 2048,
            n: 2048,
            weights: 8,
        },
        Shape {
            what: "batch 16, 2048 x 512 weight in cache",
            m: 16,
            k: 2048,
            n: 512,
            weights: 1,
        },
        Shape {
            what: "decoder 2048 x 2048, batch 1",
            m: 1,
            k: 2048,
            n: 2048,
            weights: 8,
        },
    ];
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    // `--only TEXT`: just the shapes whose description holds TEXT.
    let only = flag(&args, "--only").unwrap_or_default();
    if !shapes.iter().any(|s| s.what.contains(only)) {
        let all: Vec<_> = shapes.iter().map(|s| s.what).collect();
        eprintln!("kernel-bench: no shape's description holds {only:?}; the shapes: {all:?}");
        std::process::exit(2);
    }
    println!(
        "kernel-bench: {} threads, median of {repeats}",
        rayon::current_num_threads()
    );
    let mut peaks = Vec::new();
    for shape in shapes.iter().filter(|s| s.what.contains(only)) {
        let x: Vec<f32> = (0..shape.m * shape.k)
            .map(|_| rng.random_range(-1.0..1.0))
            .collect();
        let ws: Vec<PackedWeight> = (0..shape.weights)
            .map(|_| {
                let w: Vec<f32> = (0..shape.n * shape.k)
                    .map(|_| rng.random_range(-0.1..0.1))
                    .collect();
                PackedWeight::pack(&w, shape.n, shape.k)
            })
            .collect();
        let mut y = vec![0f32; shape.m * shape.n];
        let flops = 2.0 * (shape.m * shape.k * shape.n) as f64;
        // Enough calls per timing for about 50 ms of work at 50 GFLOP/s.
        let calls = ((2.5e9 / flops) as usize).max(shape.weights);
        let mut rates = Vec::new();
        let mut peak = Vec::new();
        for _ in 0..repeats {
            if let Some(p) = fma_peak() {
                peak.push(p);
            }
            let start = Instant::now();
            for c in 0..calls {
                packed_matmul(&mut y, &x, shape.m, &ws[c % ws.len()], false);
            }
            rates.push(flops * calls as f64 / start.elapsed().as_secs_f64() / 1e9);
            std::hint::black_box(&y);
        }
        let rate = median(rates);
        let line = format!(
            "{:<36} m {:>4} k {:>4} n {:>4}: {rate:>6.1} GFLOP/s",
            shape.what, shape.m, shape.k, shape.n
        );
        if peak.is_empty() {
            println!("{line}");
        } else {
            let p = median(peak);
            peaks.push(p);
            println!("{line}, {:.2} of the peak ({p:.0})", rate / p);
        }
    }
}
