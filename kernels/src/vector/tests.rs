//! The vector pieces against f64 loops and series, on both paths.

use super::*;
use crate::test_values::values;

/// `first`, then the vector bodies this CPU can run ("avx2", "avx512"), whatever the active
/// path; the others printed as not run for `what`.
fn vector_bodies(first: &[&'static str], what: &str) -> Vec<&'static str> {
    let mut bodies = first.to_vec();
    for (body, feature) in [
        ("avx2", use_avx2()),
        ("avx512", is_x86_feature_detected!("avx512f")),
    ] {
        if feature {
            bodies.push(body);
        } else {
            println!("{what} {body}: not run, this CPU (or the forced path) lacks it");
        }
    }
    bodies
}

#[test]
fn dot_and_axpy_match_plain_loops() {
    for len in [0, 1, 7, 8, 31, 32, 33, 128, 301] {
        let a = values(len, 31);
        let b = values(len, 32);
        let want: f32 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        assert!((dot(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
        assert!((dot_portable(&a, &b) - want).abs() < 1e-4 * (1.0 + len as f32));
        let mut y = values(len, 33);
        let start = y.clone();
        axpy(&mut y, 0.5, &a);
        for i in 0..len {
            assert!((y[i] - (start[i] + 0.5 * a[i])).abs() < 1e-6);
        }
    }
}

/// erf by its Taylor series (converges well for |x| <= 4 in f64), a reference independent of
/// any libm.
fn erf_reference(x: f64) -> f64 {
    let mut term = x;
    let mut sum = x;
    for n in 1..200 {
        term *= -x * x / n as f64;
        sum += term / (2 * n + 1) as f64;
    }
    sum * 2.0 / std::f64::consts::PI.sqrt()
}

/// erfc(x) for x >= 3.5 by its asymptotic series (accurate to ~1e-10 there).
fn erfc_tail(x: f64) -> f64 {
    let t = 1.0 / (2.0 * x * x);
    let series = 1.0 - t + 3.0 * t * t - 15.0 * t * t * t + 105.0 * t.powi(4);
    (-x * x).exp() / (x * std::f64::consts::PI.sqrt()) * series
}

/// The series loses digits to cancellation past 3.5, where the tail takes over.
fn erf_any(x: f64) -> f64 {
    if x.abs() > 3.5 {
        x.signum() * (1.0 - erfc_tail(x.abs()))
    } else {
        erf_reference(x)
    }
}

#[test]
fn fast_erf_and_gelu_agree_with_the_series_on_both_paths() {
    let mut worst = 0f64;
    for i in -6000..=6000 {
        let x = i as f64 / 1000.0;
        let want = erf_any(x);
        worst = worst.max((erf_fast(x as f32) as f64 - want).abs());
    }
    assert!(worst < 1e-6, "erf off by {worst}");
    // Odd lengths, so the vector loop's remainder runs too.
    let xs: Vec<f32> = (0..1003).map(|i| (i as f32 - 501.0) / 60.0).collect();
    let mut a = xs.clone();
    gelu_erf_portable(&mut a);
    for (x, a) in xs.iter().zip(&a) {
        let x64 = *x as f64;
        let want = 0.5 * x64 * (1.0 + erf_any(x64 / 2f64.sqrt()));
        assert!(
            (*a as f64 - want).abs() < 1e-5 * (1.0 + want.abs()),
            "gelu({x})"
        );
    }
    // The active path and each vector body by name, against the portable loop.
    let bodies = vector_bodies(&["active path"], "gelu");
    for body in bodies {
        let mut b = xs.clone();
        #[allow(unsafe_code)]
        match body {
            // SAFETY (both): the CPU has the body's features (checked above).
            "avx2" => unsafe { gelu_erf_avx2(&mut b) },
            "avx512" => unsafe { gelu_erf_avx512(&mut b) },
            _ => gelu_erf_in_place(&mut b),
        }
        for ((x, a), b) in xs.iter().zip(&a).zip(&b) {
            assert!(
                (a - b).abs() < 1e-6,
                "{body} differs from the portable loop at {x}"
            );
        }
        println!(
            "gelu {body}: {} values agree with the portable loop",
            xs.len()
        );
    }
}

#[test]
fn fast_exp_and_softmax_agree_with_f64_on_both_paths() {
    let mut worst = 0f64;
    for i in -87_000..=88_000 {
        let x = (i as f64 / 1000.0) as f32;
        let want = (x as f64).exp();
        worst = worst.max((exp_fast(x) as f64 - want).abs() / want);
    }
    assert!(worst < 5e-7, "exp off by {worst} relative");
    assert!(exp_fast(-1e9) < 1e-37 && exp_fast(-1e9) >= 0.0);
    // Rows of 37 scores with a masked key (bias -1e9), scale 0.25.
    let width = 37;
    let raw = values(width * 5, 61);
    let mut bias = vec![0.0; width];
    bias[3] = -1e9;
    // The portable body, the AVX2 one and the AVX-512 one where the CPU has them (named by
    // the body, whatever the active path).
    let bodies = vector_bodies(&["portable"], "softmax");
    for fast in bodies {
        let mut got = raw.clone();
        #[allow(unsafe_code)]
        match fast {
            // SAFETY (both): the CPU has the body's features (checked above).
            "avx2" => unsafe { softmax_avx2(&mut got, width, 0.25, &bias) },
            "avx512" => unsafe { softmax_avx512(&mut got, width, 0.25, &bias) },
            _ => softmax_portable(&mut got, width, 0.25, &bias),
        }
        for (row, src) in got.chunks(width).zip(raw.chunks(width)) {
            let z: Vec<f64> = src
                .iter()
                .zip(&bias)
                .map(|(&s, &b)| s as f64 * 0.25 + b as f64)
                .collect();
            let max = z.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            let sum: f64 = z.iter().map(|v| (v - max).exp()).sum();
            for (g, v) in row.iter().zip(&z) {
                let want = (v - max).exp() / sum;
                assert!(
                    (*g as f64 - want).abs() < 1e-6,
                    "fast={fast}: {g} vs {want}"
                );
            }
            assert!(row[3] < 1e-30);
        }
        println!("softmax {fast}: 5 rows of {width} agree with f64");
    }
}
#[test]
fn residual_layer_norm_matches_an_f64_loop_on_every_body() {
    // Widths with a remainder after the 16-wide vectors (37), none (384, MiniLM's hidden size)
    // and shorter than one vector (5); rows enough for the threaded path at width 37.
    for (width, rows) in [(37, 2000), (384, 40), (5, 9)] {
        let x = values(width * rows, 101);
        let res = values(width * rows, 102);
        let gamma = values(width, 103);
        let beta = values(width, 104);
        let mut want = vec![0f32; x.len()];
        for r in 0..rows {
            let v: Vec<f64> = (0..width)
                .map(|j| x[r * width + j] as f64 + res[r * width + j] as f64)
                .collect();
            let mean = v.iter().sum::<f64>() / width as f64;
            let var = v.iter().map(|a| (a - mean) * (a - mean)).sum::<f64>() / width as f64;
            for j in 0..width {
                want[r * width + j] = ((v[j] - mean) / (var + 1e-12).sqrt() * gamma[j] as f64
                    + beta[j] as f64) as f32;
            }
        }
        let bodies = vector_bodies(&["active path", "portable"], "layer norm");
        for body in bodies {
            let mut got = x.clone();
            #[allow(unsafe_code)]
            match body {
                "active path" => add_layer_norm_in_place(&mut got, &res, &gamma, &beta, 1e-12),
                // SAFETY (both): the CPU has the body's features (checked above).
                "avx2" => unsafe { norm_rows_avx2(&mut got, &res, &gamma, &beta, 1e-12) },
                "avx512" => unsafe { norm_rows_avx512(&mut got, &res, &gamma, &beta, 1e-12) },
                _ => norm_rows(&mut got, &res, &gamma, &beta, 1e-12),
            }
            for (i, (g, w)) in got.iter().zip(&want).enumerate() {
                assert!(
                    (g - w).abs() < 1e-4,
                    "{body}, width {width}, row {} column {}: {g} vs {w}",
                    i / width,
                    i % width
                );
            }
            println!("layer norm {body}: {rows} rows of {width} agree with f64");
        }
    }
}
