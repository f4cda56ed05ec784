//! Every weight format on every path this CPU runs, against the portable path on the same
//! inputs, and the portable path against an f64 product of the dequantised weight.
//!
//! Tolerances are derived, not tuned. Each output is a sum of `k` products plus `r` low-rank
//! steps plus a bias; any order of f32 additions of `n` terms is within `n * eps * M` of the
//! exact sum, where `M` is the sum of the terms' magnitudes (`eps` = 2^-24; the standard bound
//! `gamma_n` to first order), and the dequantised weight is the same f32 value on every path
//! (one rounding, `f32(q - z) * s`, the same formula everywhere). Two paths therefore differ by at
//! most `2 (k + r + 2) eps M`, and the portable path is within `(k + r + 2) eps M` of the exact
//! sum. The `s x A^T` down product rounds once more per step, which the `+ 2` covers. The
//! avx512-bf16 and amx paths also round each input to bf16 (relative error up to 2^-9) for a
//! bf16 weight, so they get `2^-9 M_base` more; from avx512-vnni up an int8 or int4 weight
//! multiplies inputs rounded to int8 in groups of 32 (error up to `amax / 254` per input, `amax`
//! the group's largest magnitude), so those get `sum amax |w| / 254` more.

use super::*;
use crate::micro::Inputs;
use crate::pack::rows::INPUT_GROUP;
use crate::test_values::values;

const EPS: f64 = f32::EPSILON as f64 / 2.0;

/// The formats the tests cover: every family, per-row and grouped int8, int4 with and without a
/// zero point, with both kinds of scales.
fn formats() -> Vec<WeightFormat> {
    [
        "f32",
        "bf16",
        "int8",
        "int8-g32",
        "int8-g128",
        "int4",
        "int4-g64",
        "int4-zero",
        "int4-g64-zero-f32",
        "int4-f32",
    ]
    .map(|n| WeightFormat::parse(n).unwrap())
    .to_vec()
}

/// One product's inputs: rows, a weight, a bias and low-rank terms on runs of rows.
struct Case {
    m: usize,
    k: usize,
    n: usize,
    x: Vec<f32>,
    w: Vec<f32>,
    bias: Vec<f32>,
    runs: Vec<std::ops::Range<usize>>,
    factors: Vec<(PackedWeight, PackedWeight, f32)>,
}

impl Case {
    /// Rows `m`, inputs `k`, outputs `n`; with `terms`, three adapters of ranks 5, 16 and 20 on
    /// runs of rows that start and end inside register tiles, with rows of no adapter between.
    fn new(m: usize, k: usize, n: usize, terms: bool, seed: u32) -> Self {
        let x = values(m * k, seed);
        // Weights of a model's scale, with a few large ones so groups differ in scale.
        let w: Vec<f32> = values(n * k, seed + 1)
            .iter()
            .enumerate()
            .map(|(i, v)| if i % 97 == 0 { v * 0.5 } else { v * 0.05 })
            .collect();
        let bias = values(n, seed + 2);
        let (mut runs, mut factors) = (Vec::new(), Vec::new());
        if terms {
            let cuts = [0, 1, m / 3 + 1, m / 3 + 2, m];
            for (i, (&r, scale)) in [5usize, 16, 20].iter().zip([2.0, 0.5, -1.5]).enumerate() {
                let rows = cuts[i + 1].min(m)..cuts[i + 2].min(m);
                if rows.is_empty() {
                    continue;
                }
                let a = PackedWeight::pack(&values(r * k, seed + 10 + i as u32), r, k);
                let b: Vec<f32> = values(n * r, seed + 20 + i as u32)
                    .iter()
                    .map(|v| v * 0.1)
                    .collect();
                runs.push(rows);
                factors.push((a, PackedWeight::pack(&b, n, r), scale));
            }
        }
        Self {
            m,
            k,
            n,
            x,
            w,
            bias,
            runs,
            factors,
        }
    }

    fn terms(&self) -> Vec<RowTerm<'_>> {
        self.runs
            .iter()
            .zip(&self.factors)
            .map(|(rows, (a, b, scale))| RowTerm {
                rows: rows.clone(),
                a,
                b,
                scale: *scale,
            })
            .collect()
    }

    fn run(&self, path: Path, w: &PackedWeight) -> Vec<f32> {
        let mut y = vec![f32::NAN; self.m * self.n];
        let terms = self.terms();
        packed_matmul_on(
            path,
            &mut y,
            &self.x,
            self.m,
            w,
            false,
            Some(&self.bias),
            &terms,
        );
        y
    }

    /// The exact result for the weight as packed (dequantised), in f64; the magnitudes `M` of
    /// its base part and of the whole; and `sum_q amax(q) |w[q]|` (`amax(q)` the largest
    /// magnitude in input q's group of [`INPUT_GROUP`]), which bounds what rounding the inputs
    /// to int8 in groups changes.
    fn reference(&self, w: &PackedWeight) -> [Vec<f64>; 4] {
        let (m, k, n) = (self.m, self.k, self.n);
        let wd = w.unpack();
        let mut exact = vec![0f64; m * n];
        let mut base = vec![0f64; m * n];
        let mut whole = vec![0f64; m * n];
        let mut spread = vec![0f64; m * n];
        for i in 0..m {
            let row = &self.x[i * k..(i + 1) * k];
            let amax: Vec<f64> = (0..k)
                .map(|q| {
                    let g = q / INPUT_GROUP * INPUT_GROUP;
                    let group = &row[g..(g + INPUT_GROUP).min(k)];
                    group.iter().fold(0f64, |a, v| a.max(v.abs() as f64))
                })
                .collect();
            for j in 0..n {
                let (mut s, mut mag) = (self.bias[j] as f64, (self.bias[j] as f64).abs());
                let mut sp = 0f64;
                for q in 0..k {
                    let p = row[q] as f64 * wd[j * k + q] as f64;
                    s += p;
                    mag += p.abs();
                    sp += amax[q] * (wd[j * k + q] as f64).abs();
                }
                exact[i * n + j] = s;
                base[i * n + j] = mag;
                whole[i * n + j] = mag;
                spread[i * n + j] = sp;
            }
        }
        for (rows, (a, b, scale)) in self.runs.iter().zip(&self.factors) {
            let (ad, bd, r) = (a.unpack(), b.unpack(), a.out_features());
            for i in rows.clone() {
                for l in 0..r {
                    let (mut z, mut zmag) = (0f64, 0f64);
                    for q in 0..k {
                        let p = self.x[i * k + q] as f64 * ad[l * k + q] as f64;
                        z += p;
                        zmag += p.abs();
                    }
                    for j in 0..n {
                        let bj = bd[j * r + l] as f64 * *scale as f64;
                        exact[i * n + j] += z * bj;
                        whole[i * n + j] += zmag * bj.abs();
                    }
                }
            }
        }
        [exact, base, whole, spread]
    }
}

/// What rounding its inputs lets a path's base product move: 2^-9 of each product's magnitude
/// for bf16 inputs; half a step, `amax / 254`, of each input times its weight's magnitude for
/// int8 groups (with 1% for the division that finds each value's step). `base` and `spread` as
/// [`Case::reference`] gives them.
fn input_rounding(path: Path, format: WeightFormat, base: f64, spread: f64) -> f64 {
    match path.inputs(format) {
        Inputs::F32 => 0.0,
        Inputs::Bf16Pairs => 2f64.powi(-9) * base,
        Inputs::Int8Groups => spread / 254.0 * 1.01,
    }
}

fn check_case(case: &Case, label: &str) {
    let paths = super::tests::paths();
    let max_rank = case
        .factors
        .iter()
        .map(|(a, _, _)| a.out_features())
        .max()
        .unwrap_or(0);
    let steps = (case.k + max_rank + 2) as f64;
    for format in formats() {
        let w = PackedWeight::pack_as(&case.w, case.n, case.k, format).unwrap();
        let [exact, base, whole, spread] = case.reference(&w);
        let portable = case.run(Path::Portable, &w);
        for (i, (&g, &e)) in portable.iter().zip(&exact).enumerate() {
            let tol = steps * EPS * whole[i] + 1e-30;
            assert!(
                (g as f64 - e).abs() <= tol,
                "{label} {format} portable at row {} column {}: {g} vs exact {e} (tolerance {tol:e})",
                i / case.n,
                i % case.n
            );
        }
        for &path in paths.iter().filter(|&&p| p != Path::Portable) {
            let got = case.run(path, &w);
            for (i, (&g, &p)) in got.iter().zip(&portable).enumerate() {
                let tol = 2.0 * steps * EPS * whole[i]
                    + input_rounding(path, format, base[i], spread[i])
                    + 1e-30;
                assert!(
                    (g as f64 - p as f64).abs() <= tol,
                    "{label} {format} {path} at row {} column {}: {g} vs portable {p} \
                     (tolerance {tol:e})",
                    i / case.n,
                    i % case.n
                );
            }
        }
    }
}

#[test]
fn every_path_agrees_with_the_portable_path_for_every_format_at_decode_sizes() {
    // One to three rows (the streams of the few-rows tiles), with and without adapters, inner
    // sizes with an odd last input and a short last group, outputs with a narrow last panel.
    for &(m, k, n) in &[(1, 300, 40), (2, 257, 33), (3, 129, 16), (1, 1024, 1040)] {
        check_case(&Case::new(m, k, n, false, 1), &format!("{m}x{k}x{n}"));
        check_case(
            &Case::new(m, k, n, true, 2),
            &format!("{m}x{k}x{n} with terms"),
        );
    }
}

#[test]
fn every_path_agrees_with_the_portable_path_for_every_format_with_many_rows() {
    // Full tiles and remainders of both tile heights (6 and 12), one row block and several
    // (72 rows each; the pool splits them), a short inner dimension, odd sizes everywhere;
    // the last two with terms enough work that the amx path splits their down products too;
    // the last a long input (1000: 32 steps of the tile unit, the last short) on the amx path's
    // split by blocks of rows, with a short last block and an odd last panel.
    for &(m, k, n) in &[
        (13, 64, 48),
        (37, 33, 17),
        (150, 384, 37),
        (300, 200, 64),
        (300, 384, 64),
        (130, 1000, 70),
    ] {
        check_case(&Case::new(m, k, n, false, 3), &format!("{m}x{k}x{n}"));
        check_case(
            &Case::new(m, k, n, true, 4),
            &format!("{m}x{k}x{n} mixed adapters"),
        );
    }
}

#[test]
fn work_on_finished_rows_runs_once_per_row_after_everything_else_on_every_path() {
    // `packed_matmul_then_on` must give what the product gives with the hook applied
    // afterwards: every row handed over exactly once, whole, with its bias and low-rank terms
    // already in it. Few rows (the panel split), a block's worth and several (the row-block
    // splits, the amx path's split by blocks of 32 with a short last one), no inputs at all.
    use std::sync::atomic::{AtomicU32, Ordering};
    let paths = super::tests::paths();
    for &(m, k, n, terms) in &[
        (3, 129, 40, true),
        (150, 384, 37, true),
        (300, 384, 64, true),
        (70, 0, 20, false),
    ] {
        let case = Case::new(m, k, n, terms, 5);
        for format in ["f32", "bf16", "int8", "int4"] {
            let format = WeightFormat::parse(format).unwrap();
            let w = PackedWeight::pack_as(&case.w, n, k, format).unwrap();
            for &path in &paths {
                let plain = case.run(path, &w);
                let seen: Vec<AtomicU32> = (0..m).map(|_| AtomicU32::new(0)).collect();
                let hook = |r0: usize, rows: &mut [f32]| {
                    assert!(rows.len().is_multiple_of(n), "a partial row");
                    for (i, row) in rows.chunks_mut(n).enumerate() {
                        seen[r0 + i].fetch_add(1, Ordering::Relaxed);
                        for (j, v) in row.iter_mut().enumerate() {
                            *v = *v * 2.0 + (r0 + i) as f32 - j as f32 * 0.5;
                        }
                    }
                };
                let mut y = vec![f32::NAN; m * n];
                let t = case.terms();
                packed_matmul_then_on(
                    path,
                    &mut y,
                    &case.x,
                    m,
                    &w,
                    false,
                    Some(&case.bias),
                    &t,
                    &hook,
                );
                for (i, s) in seen.iter().enumerate() {
                    let times = s.load(Ordering::Relaxed);
                    assert_eq!(
                        times, 1,
                        "{m}x{k}x{n} {format} {path}: row {i} seen {times} times"
                    );
                }
                for (at, (&g, &p)) in y.iter().zip(&plain).enumerate() {
                    let want = p * 2.0 + (at / n) as f32 - (at % n) as f32 * 0.5;
                    assert!(
                        g == want,
                        "{m}x{k}x{n} {format} {path} at row {} column {}: {g} vs {want}",
                        at / n,
                        at % n
                    );
                }
            }
        }
    }
}

#[test]
fn quantised_values_follow_the_documented_rules_exactly() {
    // An independent transcription of the rules in pack/quant.rs, in f32 as numpy would do
    // them, against what the packed weight stands for.
    let (out, inp) = (19, 100);
    let w: Vec<f32> = values(out * inp, 77)
        .iter()
        .map(|v| v * 0.3 + 0.05)
        .collect();
    let rint = |v: f32| v.round_ties_even();
    for format in formats() {
        let got = PackedWeight::pack_as(&w, out, inp, format)
            .unwrap()
            .unpack();
        let group = format.group(inp);
        for j in 0..out {
            for g0 in (0..inp).step_by(group) {
                let vals = &w[j * inp + g0..j * inp + (g0 + group).min(inp)];
                let amax = vals.iter().fold(0f32, |m, v| m.max(v.abs()));
                let want: Vec<f32> = match format {
                    WeightFormat::F32 => vals.to_vec(),
                    WeightFormat::Bf16 => vals
                        .iter()
                        .map(|&v| {
                            crate::pack::quant::bf16_to_f32(crate::pack::quant::bf16_from_f32(v))
                        })
                        .collect(),
                    WeightFormat::Int8 { .. } => {
                        let s = amax / 127.0;
                        vals.iter()
                            .map(|&v| rint(v / s).clamp(-127.0, 127.0) * s)
                            .collect()
                    }
                    WeightFormat::Int4 {
                        zero_point, scale, ..
                    } => {
                        let round = |s: f32| match scale {
                            crate::pack::ScaleType::F32 => s,
                            crate::pack::ScaleType::F16 => {
                                crate::pack::quant::f16_to_f32(crate::pack::quant::f16_from_f32(s))
                            }
                        };
                        if zero_point {
                            let lo = vals.iter().fold(0f32, |m, &v| m.min(v));
                            let hi = vals.iter().fold(0f32, |m, &v| m.max(v));
                            let s = round((hi - lo) / 15.0);
                            let z = rint(-lo / s).clamp(0.0, 15.0);
                            vals.iter()
                                .map(|&v| ((rint(v / s) + z).clamp(0.0, 15.0) - z) * s)
                                .collect()
                        } else {
                            let s = round(amax / 7.0);
                            vals.iter()
                                .map(|&v| rint(v / s).clamp(-8.0, 7.0) * s)
                                .collect()
                        }
                    }
                };
                let have = &got[j * inp + g0..j * inp + g0 + vals.len()];
                assert_eq!(have, &want[..], "{format}, row {j}, group at {g0}");
            }
        }
    }
}

#[test]
fn quantisation_error_stays_within_half_a_step() {
    // |w - dequantised| <= s / 2 for the integer formats (a value never clamps: the scale
    // comes from the group's range), and relative 2^-9 for bf16.
    let (out, inp) = (33, 160);
    let w: Vec<f32> = values(out * inp, 5).iter().map(|v| v * 0.2).collect();
    for format in formats() {
        let packed = PackedWeight::pack_as(&w, out, inp, format).unwrap();
        let back = packed.unpack();
        let group = format.group(inp);
        for j in 0..out {
            for g0 in (0..inp).step_by(group) {
                let r = j * inp + g0..j * inp + (g0 + group).min(inp);
                let amax = w[r.clone()].iter().fold(0f32, |m, v| m.max(v.abs()));
                let (lo, hi) = w[r.clone()]
                    .iter()
                    .fold((0f32, 0f32), |(a, b), &v| (a.min(v), b.max(v)));
                let step = match format {
                    WeightFormat::Int8 { .. } => amax / 127.0,
                    WeightFormat::Int4 {
                        zero_point: false, ..
                    } => amax / 7.0,
                    WeightFormat::Int4 { .. } => (hi - lo) / 15.0,
                    _ => 0.0,
                };
                for i in r {
                    let err = (w[i] - back[i]).abs();
                    let bound = match format {
                        WeightFormat::F32 => 0.0,
                        WeightFormat::Bf16 => w[i].abs() * 2f32.powi(-8),
                        // Half a step, the scale's own f16 rounding (2^-11 relative, times up
                        // to 15 steps) and the f32 product's.
                        _ => step * (0.5 + 16.0 * 2f32.powi(-11)) + 1e-6,
                    };
                    assert!(
                        err <= bound,
                        "{format}: {} -> {} (bound {bound})",
                        w[i],
                        back[i]
                    );
                }
            }
        }
    }
}

#[test]
fn values_an_integer_format_cannot_hold_are_refused_with_their_place() {
    let mut w = values(40, 9);
    w[21] = f32::NAN;
    let err = PackedWeight::pack_as(&w, 4, 10, WeightFormat::parse("int8").unwrap())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("row 2, input 1") && err.contains("NaN"),
        "{err}"
    );
    let big = vec![1e9f32; 64];
    let err = PackedWeight::pack_as(&big, 1, 64, WeightFormat::parse("int4").unwrap())
        .unwrap_err()
        .to_string();
    assert!(err.contains("f16"), "{err}");
    // f32 scales hold it.
    assert!(PackedWeight::pack_as(&big, 1, 64, WeightFormat::parse("int4-f32").unwrap()).is_ok());
}

#[test]
fn reduced_formats_hold_the_bytes_their_layout_says() {
    let (out, inp) = (40, 100);
    let w = values(out * inp, 3);
    let bytes = |name: &str| {
        PackedWeight::pack_as(&w, out, inp, WeightFormat::parse(name).unwrap())
            .unwrap()
            .resident_bytes()
    };
    // Three panels of 16 rows (the last padded); 50 input pairs.
    assert_eq!(bytes("f32"), out * inp * 4);
    assert_eq!(bytes("bf16"), 48 * 50 * 4);
    assert_eq!(bytes("int8"), 48 * 100 + 48 * 4);
    assert_eq!(bytes("int8-g32"), 48 * 100 + 48 * 4 * 4);
    // int4 g32: 4 groups; f16 scales; zero points one byte each.
    assert_eq!(bytes("int4"), 48 * 50 + 48 * 4 * 2);
    assert_eq!(bytes("int4-zero"), 48 * 50 + 48 * 4 * 3);
    assert_eq!(bytes("int4-g64-zero-f32"), 48 * 50 + 48 * 2 * 5);
}

/// The loader packs from a source of rows (a checkpoint's own dtype) and looks embedding rows
/// up one at a time: both must give exactly what packing a whole f32 matrix gives.
#[test]
fn packing_from_rows_and_reading_one_row_match_the_whole_matrix_in_every_format() {
    for (out, inp) in [(37, 70), (16, 64), (5, 33), (130, 128)] {
        let w: Vec<f32> = values(out * inp, 77)
            .iter()
            .enumerate()
            .map(|(i, v)| if i % 89 == 0 { v * 0.7 } else { v * 0.03 })
            .collect();
        for format in formats() {
            let whole = PackedWeight::pack_as(&w, out, inp, format).unwrap();
            let rows = PackedWeight::pack_rows(out, inp, format, |j, buf| {
                buf.copy_from_slice(&w[j * inp..(j + 1) * inp])
            })
            .unwrap();
            assert_eq!(rows.resident_bytes(), whole.resident_bytes(), "{format}");
            let unpacked = whole.unpack();
            assert_eq!(rows.unpack(), unpacked, "{format} {out}x{inp}");
            let mut row = vec![0f32; inp];
            for j in 0..out {
                rows.row_into(j, &mut row);
                assert_eq!(row, unpacked[j * inp..(j + 1) * inp], "{format} row {j}");
            }
        }
    }
    let bad = PackedWeight::pack_rows(3, 4, WeightFormat::parse("int8").unwrap(), |j, buf| {
        buf.fill(if j == 2 { f32::NAN } else { 1.0 })
    });
    assert!(matches!(
        bad,
        Err(crate::QuantError::NotFinite { row: 2, .. })
    ));
}

#[test]
fn every_path_adds_onto_the_output_with_and_without_a_bias_for_every_format() {
    // The ways a product starts (zeros, the bias, what the output holds, both), for whole
    // blocks of rows and panels and for narrow ones: the amx path stores whole blocks straight
    // into the output and the rest through a buffer. Portable is the reference; the bound is
    // the base product's magnitude times the bf16 input rounding plus f32 summation, and a few
    // ulps of what was added.
    let paths = super::tests::paths();
    for &(m, k, n) in &[(64, 96, 64), (45, 70, 40)] {
        let x = values(m * k, 31);
        let w: Vec<f32> = values(n * k, 32).iter().map(|v| v * 0.1).collect();
        let bias = values(n, 33);
        let start = values(m * n, 34);
        for format in formats() {
            let packed = PackedWeight::pack_as(&w, n, k, format).unwrap();
            let wd = packed.unpack();
            for accumulate in [false, true] {
                for b in [None, Some(&bias[..])] {
                    let run = |path: Path| {
                        let mut y = if accumulate {
                            start.clone()
                        } else {
                            vec![f32::NAN; m * n]
                        };
                        packed_matmul_on(path, &mut y, &x, m, &packed, accumulate, b, &[]);
                        y
                    };
                    let portable = run(Path::Portable);
                    for &path in &paths {
                        let got = run(path);
                        for i in 0..m {
                            for j in 0..n {
                                let base: f64 = (0..k)
                                    .map(|q| (x[i * k + q] as f64 * wd[j * k + q] as f64).abs())
                                    .sum();
                                let row = &x[i * k..(i + 1) * k];
                                let spread: f64 = (0..k)
                                    .map(|q| {
                                        let g = q / INPUT_GROUP * INPUT_GROUP;
                                        let amax = row[g..(g + INPUT_GROUP).min(k)]
                                            .iter()
                                            .fold(0f64, |a, v| a.max(v.abs() as f64));
                                        amax * (wd[j * k + q] as f64).abs()
                                    })
                                    .sum();
                                let added = b.map_or(0.0, |b| b[j].abs() as f64)
                                    + if accumulate {
                                        start[i * n + j].abs() as f64
                                    } else {
                                        0.0
                                    };
                                let tol = 2.0 * (k + 2) as f64 * EPS * base
                                    + input_rounding(path, format, base, spread)
                                    + 4.0 * EPS * added
                                    + 1e-30;
                                let (g, p) = (got[i * n + j], portable[i * n + j]);
                                assert!(
                                    (g as f64 - p as f64).abs() <= tol,
                                    "{m}x{k}x{n} {format} {path} accumulate {accumulate} bias {}: \
                                     row {i} column {j}: {g} vs portable {p} (tolerance {tol:e})",
                                    b.is_some()
                                );
                            }
                        }
                    }
                }
            }
        }
    }
}
