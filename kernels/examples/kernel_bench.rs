//! Projection-kernel benchmark (not a test): every kernel path this CPU runs, side by side in
//! one run, on the shapes the models run.
//!
//! 1. Limits measured in the same run: the multiply-add peak of AVX2 and of AVX-512 (twelve
//!    independent chains of fused multiply-adds per thread, on every thread of the pool at once),
//!    and the read bandwidth (every thread summing its part of a 512 MB buffer).
//! 2. f32 weights: for each shape, GFLOP/s of `packed_matmul_on` on each path, and each fast
//!    path's figure as a fraction of its own peak.
//! 3. Decode (one row) in every weight format on each path: the weight's resident bytes over the
//!    time per product, in GB/s, beside the read bandwidth. Decode cycles through enough weights
//!    (512 MB of each format) that they come from memory, as in a real step.
//!
//! 4. Merging a rank-16 update into a 2048 x 2048 f32 weight in place (`W += B A`): the
//!    rank-update kernel against the same update through the projection kernel (B's rows as its
//!    input, A^T as its weight, accumulating), ms per merge on each path.
//!
//! Our kernels alone: oneDNN, where it is loaded, is turned off here (`scripts/bench-onednn`
//! compares the two). Paths this CPU lacks are listed as not run. Run: `cargo run --release -p switchyard-kernels
//! --example kernel-bench` (add `-- --repeats N`, `-- --decode-mb N` to cycle N MB of decode
//! weights instead of 512, or `-- --only TEXT` for the rows whose
//! description holds TEXT). Every figure is the median of the repeats; the paths of one row
//! alternate within each repeat, so load on a shared machine hits them alike.

use std::time::Instant;

use rand::{Rng, SeedableRng};
use switchyard_kernels::{PackedWeight, Path, WeightFormat, add_rank_update_on, packed_matmul_on};

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

/// Multiply-add GFLOP/s of all pool threads together with `lanes`-wide vectors, if this CPU
/// has them.
fn fma_peak(lanes: usize) -> Option<f64> {
    #[cfg(target_arch = "x86_64")]
    {
        use rayon::prelude::*;
        let have = match lanes {
            8 => Path::Avx2.available(),
            _ => Path::Avx512.available(),
        };
        if !have {
            return None;
        }
        const STEPS: usize = 20_000_000;
        let threads = rayon::current_num_threads();
        let start = Instant::now();
        let sink: f32 = (0..threads)
            .into_par_iter()
            .map(|t| {
                // SAFETY: the features were detected just above.
                #[allow(unsafe_code)]
                unsafe {
                    if lanes == 8 {
                        peak::chains8(STEPS, t as f32)
                    } else {
                        peak::chains16(STEPS, t as f32)
                    }
                }
            })
            .sum();
        let secs = start.elapsed().as_secs_f64();
        std::hint::black_box(sink);
        // 12 chains x lanes x 2 flops per step.
        Some((threads * STEPS * 12 * lanes * 2) as f64 / secs / 1e9)
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = lanes;
        None
    }
}

#[cfg(target_arch = "x86_64")]
#[allow(unsafe_code)]
mod peak {
    use std::arch::x86_64::*;

    #[target_feature(enable = "avx2,fma")]
    pub unsafe fn chains8(steps: usize, seed: f32) -> f32 {
        let a = _mm256_set1_ps(0.999_9);
        let b = _mm256_set1_ps(1e-7 * seed);
        let mut acc = [_mm256_set1_ps(seed); 12];
        for _ in 0..steps {
            for v in acc.iter_mut() {
                *v = _mm256_fmadd_ps(*v, a, b);
            }
        }
        let mut out = [0f32; 8];
        let s = acc[1..].iter().fold(acc[0], |s, v| _mm256_add_ps(s, *v));
        // SAFETY: out holds 8 floats.
        unsafe { _mm256_storeu_ps(out.as_mut_ptr(), s) };
        out.iter().sum()
    }

    #[target_feature(enable = "avx512f")]
    pub unsafe fn chains16(steps: usize, seed: f32) -> f32 {
        let a = _mm512_set1_ps(0.999_9);
        let b = _mm512_set1_ps(1e-7 * seed);
        let mut acc = [_mm512_set1_ps(seed); 12];
        for _ in 0..steps {
            for v in acc.iter_mut() {
                *v = _mm512_fmadd_ps(*v, a, b);
            }
        }
        let s = acc[1..].iter().fold(acc[0], |s, v| _mm512_add_ps(s, *v));
        _mm512_reduce_add_ps(s)
    }
}

/// Read bandwidth in GB/s: every pool thread sums its share of `buf`.
fn read_bandwidth(buf: &[f32]) -> f64 {
    use rayon::prelude::*;
    let threads = rayon::current_num_threads();
    let start = Instant::now();
    let sum: f32 = buf
        .par_chunks(buf.len().div_ceil(threads))
        .map(|part| {
            // Sixteen partial sums, so the loop vectorises and is bound by memory only.
            let mut acc = [0f32; 16];
            for c in part.chunks_exact(16) {
                for (a, v) in acc.iter_mut().zip(c) {
                    *a += v;
                }
            }
            acc.iter().sum::<f32>()
        })
        .sum();
    std::hint::black_box(sum);
    std::mem::size_of_val(buf) as f64 / start.elapsed().as_secs_f64() / 1e9
}

/// The value after `name` on the command line, if it is there.
fn flag<'a>(args: &'a [String], name: &str) -> Option<&'a str> {
    let at = args.iter().position(|a| a == name)?;
    args.get(at + 1).map(String::as_str)
}

/// Seconds per product of `m` rows through `ws` in turn, on `path`: the median of `repeats`
/// timings of `calls` products each.
fn seconds_per_call(
    path: Path,
    ws: &[PackedWeight],
    x: &[f32],
    y: &mut [f32],
    m: usize,
    calls: usize,
) -> f64 {
    let start = Instant::now();
    for c in 0..calls {
        packed_matmul_on(path, y, x, m, &ws[c % ws.len()], false, None, &[]);
    }
    std::hint::black_box(&y);
    start.elapsed().as_secs_f64() / calls as f64
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let repeats = flag(&args, "--repeats")
        .and_then(|v| v.parse().ok())
        .unwrap_or(7usize);
    let only = flag(&args, "--only").unwrap_or_default();
    // The decode rows cycle through this many MB of weights: 512 reads them from memory, a
    // few MB from the caches (what the kernel's arithmetic allows).
    let decode_mb: usize = flag(&args, "--decode-mb").map_or(512, |v| {
        v.parse()
            .unwrap_or_else(|_| panic!("--decode-mb takes a whole number of MB, not {v:?}"))
    });
    // Our kernels alone: products oneDNN would take stay ours (scripts/bench-onednn compares).
    switchyard_kernels::onednn::set_enabled(false);
    let paths: Vec<Path> = Path::ALL.into_iter().filter(|p| p.available()).collect();
    println!(
        "kernel-bench: {} threads, median of {repeats}",
        rayon::current_num_threads()
    );
    for p in Path::ALL {
        match p.missing_feature() {
            None => println!("path {p}: runs here"),
            Some(f) => println!("path {p}: not run: {f} absent"),
        }
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let big: Vec<f32> = (0..128 << 20).map(|i| (i % 7) as f32).collect();
    let (mut p8, mut p16, mut bw) = (Vec::new(), Vec::new(), Vec::new());
    for _ in 0..repeats.min(5) {
        p8.extend(fma_peak(8));
        p16.extend(fma_peak(16));
        bw.push(read_bandwidth(&big));
    }
    drop(big);
    let peak = |path: Path| match path {
        Path::Avx2 => (!p8.is_empty()).then(|| median(p8.clone())),
        Path::Avx512 | Path::Avx512Vnni | Path::Avx512Bf16 | Path::Amx => {
            (!p16.is_empty()).then(|| median(p16.clone()))
        }
        Path::Portable => None,
    };
    let bandwidth = median(bw);
    println!(
        "limits: FMA peak avx2 {} GFLOP/s, avx512 {} GFLOP/s; read bandwidth {bandwidth:.1} GB/s",
        peak(Path::Avx2).map_or("-".into(), |p| format!("{p:.0}")),
        peak(Path::Avx512).map_or("-".into(), |p| format!("{p:.0}")),
    );

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
            weights: 32,
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
            weights: 32,
        },
    ];
    for format in [WeightFormat::F32, WeightFormat::Bf16] {
        println!(
            "\n{format} weights, GFLOP/s per path (fraction of that path's f32 FMA peak; bf16 on \
         avx512-bf16 and amx multiplies bf16 inputs, so it can pass 1)"
        );
        print!("{:<38} {:>4} {:>5} {:>5}", "shape", "m", "k", "n");
        for p in &paths {
            print!(" {:>20}", p.name());
        }
        println!();
        for shape in shapes.iter().filter(|s| s.what.contains(only)) {
            let x: Vec<f32> = (0..shape.m * shape.k)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect();
            let w: Vec<f32> = (0..shape.n * shape.k)
                .map(|_| rng.random_range(-0.1..0.1))
                .collect();
            let one = PackedWeight::pack_as(&w, shape.n, shape.k, format).unwrap();
            let ws = vec![one; shape.weights];
            let mut y = vec![0f32; shape.m * shape.n];
            let flops = 2.0 * (shape.m * shape.k * shape.n) as f64;
            // Enough calls per timing for about 50 ms of work at 50 GFLOP/s.
            let calls = ((2.5e9 / flops) as usize).max(shape.weights);
            let mut rates = vec![Vec::new(); paths.len()];
            for _ in 0..repeats {
                for (r, &path) in rates.iter_mut().zip(&paths) {
                    r.push(flops / seconds_per_call(path, &ws, &x, &mut y, shape.m, calls) / 1e9);
                }
            }
            print!(
                "{:<38} {:>4} {:>5} {:>5}",
                shape.what, shape.m, shape.k, shape.n
            );
            for (r, &path) in rates.into_iter().zip(&paths) {
                let rate = median(r);
                match peak(path) {
                    Some(p) => print!(" {:>12.1} ({:.2})", rate, rate / p),
                    None => print!(" {rate:>20.1}"),
                }
            }
            println!();
        }
    }

    if "merge".contains(only) || only.is_empty() {
        merge_section(&paths, repeats, &mut rng);
    }

    let formats = [
        "f32",
        "bf16",
        "int8",
        "int8-g64",
        "int4",
        "int4-g64",
        "int4-zero",
        "int4-g64-zero-f32",
    ];
    println!(
        "\ndecode, one row through a 2048 x 2048 weight, {decode_mb} MB of them cycled: GB/s of \
         resident bytes per path (fraction of the read bandwidth, {bandwidth:.1} GB/s)"
    );
    print!("{:<20} {:>9}", "format", "bytes");
    for p in &paths {
        print!(" {:>20}", p.name());
    }
    println!();
    let (k, n) = (2048, 2048);
    let w: Vec<f32> = (0..n * k).map(|_| rng.random_range(-0.1..0.1)).collect();
    let x: Vec<f32> = (0..k).map(|_| rng.random_range(-1.0..1.0)).collect();
    let mut y = vec![0f32; n];
    for name in formats
        .iter()
        .filter(|f| format!("decode {f}").contains(only))
    {
        let format = WeightFormat::parse(name).unwrap();
        let one = PackedWeight::pack_as(&w, n, k, format).unwrap();
        let bytes = one.resident_bytes();
        let ws = vec![one; ((decode_mb << 20) / bytes).max(1)];
        let mut rates = vec![Vec::new(); paths.len()];
        for _ in 0..repeats {
            for (r, &path) in rates.iter_mut().zip(&paths) {
                let secs = seconds_per_call(path, &ws, &x, &mut y, 1, (ws.len() * 2).max(200));
                r.push(bytes as f64 / secs / 1e9);
            }
        }
        print!("{name:<20} {:>9}", bytes);
        for r in rates {
            let rate = median(r);
            print!(" {:>12.1} ({:.2})", rate, rate / bandwidth);
        }
        println!();
    }
}

/// `W += B A` for a rank-16 update of a 2048 x 2048 weight, per path: the rank-update kernel
/// and the projection kernel doing the same update, alternating within each repeat.
fn merge_section(paths: &[Path], repeats: usize, rng: &mut rand_chacha::ChaCha8Rng) {
    let (out, inp, r) = (2048, 2048, 16);
    let a: Vec<f32> = (0..r * inp).map(|_| rng.random_range(-0.1..0.1)).collect();
    let b: Vec<f32> = (0..out * r).map(|_| rng.random_range(-0.1..0.1)).collect();
    let mut w: Vec<f32> = (0..out * inp)
        .map(|_| rng.random_range(-0.1..0.1))
        .collect();
    let mut a_t = PackedWeight::empty();
    a_t.repack_strided(&a, inp, r, 1, inp);
    let calls = 20;
    println!(
        "\nmerge rank {r} into {out} x {inp} in place, ms per merge (GFLOP/s): rank-update kernel \
         | projection kernel accumulating"
    );
    let flops = 2.0 * (out * inp * r) as f64;
    for &path in paths {
        let (mut own, mut via) = (Vec::new(), Vec::new());
        for _ in 0..repeats {
            let s = Instant::now();
            for _ in 0..calls {
                add_rank_update_on(path, &mut w, out, inp, &b, &a, r);
            }
            own.push(s.elapsed().as_secs_f64() / calls as f64);
            let s = Instant::now();
            for _ in 0..calls {
                packed_matmul_on(path, &mut w, &b, out, &a_t, true, None, &[]);
            }
            via.push(s.elapsed().as_secs_f64() / calls as f64);
        }
        std::hint::black_box(&w);
        let (o, v) = (median(own), median(via));
        println!(
            "{:<12} {:>8.3} ({:>5.0}) | {:>8.3} ({:>5.0})   {:.2}x",
            path.name(),
            o * 1e3,
            flops / o / 1e9,
            v * 1e3,
            flops / v / 1e9,
            v / o
        );
    }
}
