//! The projection kernel against plain loops and the gemm crate, on every path.

use super::blocks::{Part, Run, panels_into};
use super::gemm_reference::{MatRef, Parallelism, matmul_into};
use super::*;
use crate::test_values::{reference_rows, values};

/// The paths this CPU runs, each named on stdout; the others named as not run.
pub(crate) fn paths() -> Vec<Path> {
    Path::ALL
        .into_iter()
        .filter(|p| match p.missing_feature() {
            None => {
                println!("path {p}: ran");
                true
            }
            Some(f) => {
                println!("path {p}: not run: {f} absent");
                false
            }
        })
        .collect()
}

/// `packed_matmul` with the kernel path and the input layout chosen, single-threaded: what
/// the threaded paths run on each part.
fn packed_on_path(y: &mut [f32], x: &[f32], w: &PackedWeight, acc: bool, path: Path, pack: bool) {
    let panels = w.out.div_ceil(PANEL);
    for (yb, xb) in y
        .chunks_mut(BLOCK_ROWS * w.out)
        .zip(x.chunks(BLOCK_ROWS * w.inp))
    {
        let rows = xb.len() / w.inp;
        let run = Run {
            pack,
            ..Run::new(0..panels, acc, None, path, w)
        };
        let part = Part::new(0, rows, &[]);
        panels_into(yb, w.out, xb, w.inp, rows, w, &part, &run);
    }
}
#[test]
fn packing_round_trips_and_holds_no_padding() {
    for &(out, inp) in &[(1, 1), (16, 3), (17, 5), (40, 33), (3, 0), (8, 384)] {
        let w = values(out * inp, 40 + out as u32);
        let p = PackedWeight::pack(&w, out, inp);
        assert_eq!(p.unpack(), w, "{out} x {inp}");
        assert_eq!(p.resident_bytes(), out * inp * 4);
        assert_eq!((p.out_features(), p.in_features()), (out, inp));
    }
}

#[test]
fn packed_kernel_matches_a_plain_loop_for_every_row_count_and_remainder_on_both_paths() {
    // Row counts through one tile and past it (6 rows a tile, 72 a row block), output
    // widths inside a panel, at a panel and past it, inner lengths shorter than a block,
    // at several blocks and with remainders after the stream segments.
    for (path, pack) in paths().into_iter().flat_map(|f| [(f, false), (f, true)]) {
        for m in (1..=20).chain([71, 72, 73, 150]) {
            for &(k, n) in &[
                (1, 1),
                (7, 5),
                (8, 16),
                (33, 17),
                (130, 40),
                (301, 37),
                (800, 33),
            ] {
                let x = values(m * k, 11 + m as u32);
                let w = values(n * k, 12 + k as u32);
                let packed = PackedWeight::pack(&w, n, k);
                let want = reference_rows(&x, &w, m, k, n);
                let mut out = vec![7.0; m * n];
                packed_on_path(&mut out, &x, &packed, false, path, pack);
                let mut acc = vec![1.0; m * n];
                packed_on_path(&mut acc, &x, &packed, true, path, pack);
                for i in 0..m * n {
                    let e = want[i];
                    let tol = 1e-4 * (1.0 + e.abs()) * (k as f32).sqrt();
                    assert!(
                        (out[i] - e).abs() < tol,
                        "path={path} pack={pack} m={m} k={k} n={n} at {i}: {} vs {e}",
                        out[i]
                    );
                    assert!(
                        (acc[i] - 1.0 - e).abs() < tol,
                        "accumulate, path={path} pack={pack} m={m}"
                    );
                }
            }
        }
    }
}

#[test]
fn packed_kernel_splits_large_products_across_threads_correctly() {
    // Few rows (the panels are split, with a last block narrower than the others) and many
    // rows (row blocks), both above the size where the pool is used.
    for m in [1, 3, 4, 9, 16, 150, 300] {
        let (k, n) = (301, 1037);
        let x = values(m * k, 21);
        let w = values(n * k, 22);
        let packed = PackedWeight::pack(&w, n, k);
        let want = reference_rows(&x, &w, m, k, n);
        let mut got = vec![2.0; m * n];
        packed_matmul(&mut got, &x, m, &packed, true);
        for (g, e) in got.iter().zip(&want) {
            assert!(
                (g - 2.0 - e).abs() < 1e-3 * (1.0 + e.abs()),
                "m={m}: {g} vs {e}"
            );
        }
        packed_matmul(&mut got, &x, m, &packed, false);
        for (g, e) in got.iter().zip(&want) {
            assert!((g - e).abs() < 1e-3 * (1.0 + e.abs()), "m={m}: {g} vs {e}");
        }
    }
}

#[test]
fn fused_low_rank_terms_add_to_their_rows_only_on_every_path() {
    // Runs that start and end inside register tiles, a run with no term between them, terms
    // of different ranks in one call (one of them wider than a panel), on the
    // single-threaded, row-block and split-panel paths, and a short inner dimension.
    for &(m, k, n) in &[
        (20, 33, 40),
        (150, 301, 37),
        (9, 301, 1037),
        (300, 384, 64),
        (40, 24, 50),
    ] {
        let x = values(m * k, 81);
        let w = values(n * k, 82);
        let cut = (m * 2 / 3).max(7);
        let runs = [1..4, 7..cut, (cut + 1).min(m)..m];
        let ranks = [5, 20, 8];
        let scales = [2.0, 0.5, -1.5];
        let factors: Vec<(Vec<f32>, Vec<f32>)> = ranks
            .iter()
            .enumerate()
            .map(|(i, &r)| (values(r * k, 90 + i as u32), values(n * r, 95 + i as u32)))
            .collect();
        let packed: Vec<(PackedWeight, PackedWeight)> = factors
            .iter()
            .zip(ranks)
            .map(|((a, b), r)| (PackedWeight::pack(a, r, k), PackedWeight::pack(b, n, r)))
            .collect();
        let terms: Vec<RowTerm<'_>> = runs
            .iter()
            .zip(&packed)
            .zip(scales)
            .map(|((run, (a, b)), scale)| RowTerm {
                rows: run.clone(),
                a,
                b,
                scale,
            })
            .collect();
        let bias = values(n, 99);
        let mut want = reference_rows(&x, &w, m, k, n);
        for (i, v) in want.iter_mut().enumerate() {
            *v += bias[i % n];
        }
        for ((run, (a, b)), (&r, s)) in runs.iter().zip(&factors).zip(ranks.iter().zip(scales)) {
            let z = reference_rows(&x[run.start * k..run.end * k], a, run.len(), k, r);
            let delta = reference_rows(&z, b, run.len(), r, n);
            for (i, row) in run.clone().enumerate() {
                for j in 0..n {
                    want[row * n + j] += s * delta[i * n + j];
                }
            }
        }
        let mut got = vec![3.0; m * n];
        let packed = PackedWeight::pack(&w, n, k);
        packed_matmul_with(&mut got, &x, m, &packed, false, Some(&bias), &terms);
        for (i, (g, e)) in got.iter().zip(&want).enumerate() {
            assert!(
                (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                "{m}x{k}x{n} at row {}: {g} vs {e}",
                i / n
            );
        }
        // Accumulating onto what is there adds the same.
        let mut acc = vec![1.0; m * n];
        packed_matmul_with(&mut acc, &x, m, &packed, true, Some(&bias), &terms);
        for (g, e) in acc.iter().zip(&want) {
            assert!(
                (g - 1.0 - e).abs() < 1e-3 * (1.0 + e.abs()),
                "accumulate: {g} vs {e}"
            );
        }
    }
}

#[test]
fn a_tile_of_rows_on_different_adapters_adds_each_rows_own_term_on_every_path() {
    // A decode batch: every row on its own adapter (adjacent one-row runs, so every tile is
    // mixed), then runs of two and three rows with a row of no adapter between, and a tile that
    // one term covers whole next to mixed ones. Each against plain loops, on every path (f32
    // weights: no path rounds the rows), one row block split across panels and threads (over
    // 2^20 multiply-adds, where the machine has two threads or more).
    let (k, n) = (256, 600);
    let shapes: [&[std::ops::Range<usize>]; 3] = [
        &[0..1, 1..2, 2..3, 3..4, 4..5, 5..6, 6..7, 7..8],
        &[0..2, 3..6, 6..8, 8..9],
        &[0..12, 12..13, 14..20],
    ];
    for runs in shapes {
        let m = runs.last().map_or(0, |r| r.end) + 1;
        let x = values(m * k, 71);
        let w = values(n * k, 72);
        let factors: Vec<(Vec<f32>, Vec<f32>, usize)> = (0..runs.len())
            .map(|i| {
                let r = [16, 8, 4][i % 3];
                (
                    values(r * k, 73 + i as u32),
                    values(n * r, 83 + i as u32),
                    r,
                )
            })
            .collect();
        let packed: Vec<(PackedWeight, PackedWeight)> = factors
            .iter()
            .map(|(a, b, r)| (PackedWeight::pack(a, *r, k), PackedWeight::pack(b, n, *r)))
            .collect();
        let terms: Vec<RowTerm<'_>> = runs
            .iter()
            .zip(&packed)
            .enumerate()
            .map(|(i, (rows, (a, b)))| RowTerm {
                rows: rows.clone(),
                a,
                b,
                scale: 0.5 + i as f32 * 0.25,
            })
            .collect();
        let mut want = reference_rows(&x, &w, m, k, n);
        for (i, (rows, (a, b, r))) in runs.iter().zip(&factors).enumerate() {
            let z = reference_rows(&x[rows.start * k..rows.end * k], a, rows.len(), k, *r);
            let delta = reference_rows(&z, b, rows.len(), *r, n);
            for (ii, row) in rows.clone().enumerate() {
                for j in 0..n {
                    want[row * n + j] += (0.5 + i as f32 * 0.25) * delta[ii * n + j];
                }
            }
        }
        let packed_w = PackedWeight::pack(&w, n, k);
        for path in paths() {
            let mut got = vec![f32::NAN; m * n];
            packed_matmul_on(path, &mut got, &x, m, &packed_w, false, None, &terms);
            for (i, (g, e)) in got.iter().zip(&want).enumerate() {
                assert!(
                    (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "{path}, runs {runs:?}, row {} column {}: {g} vs {e}",
                    i / n,
                    i % n
                );
            }
        }
    }
}

#[test]
fn fused_terms_and_bias_match_on_every_kernel_path_and_input_layout() {
    // One row block, prepared and run on each kernel path and layout by hand.
    let (m, k, n, r) = (50, 200, 70, 12);
    let x = values(m * k, 61);
    let w = PackedWeight::pack(&values(n * k, 62), n, k);
    let a = PackedWeight::pack(&values(r * k, 63), r, k);
    let b = PackedWeight::pack(&values(n * r, 64), n, r);
    let bias = values(n, 65);
    let terms = [RowTerm {
        rows: 5..41,
        a: &a,
        b: &b,
        scale: 0.75,
    }];
    let mut want = vec![0.0; m * n];
    packed_matmul_with(&mut want, &x, m, &w, false, Some(&bias), &terms);
    for path in paths() {
        for pack in [false, true] {
            let mut y = vec![0.0; m * n];
            let part = Part::new(0, m, &terms);
            let run = Run {
                pack,
                ..Run::new(0..n.div_ceil(PANEL), false, Some(&bias), path, &w)
            };
            panels_into(&mut y, n, &x, k, m, &w, &part, &run);
            for (g, e) in y.iter().zip(&want) {
                assert!(
                    (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                    "path={path} pack={pack}: {g} vs {e}"
                );
            }
        }
    }
}

#[test]
fn packed_kernel_agrees_with_gemm_on_model_shapes() {
    // The encoder's projection shapes at a batch's row count, against the gemm crate.
    for &(m, k, n) in &[(200, 384, 384), (130, 384, 1536), (64, 1536, 384)] {
        let x = values(m * k, 51);
        let w = values(n * k, 52);
        let mut want = vec![0.0; m * n];
        matmul_into(
            &mut want,
            n,
            MatRef::row_major(&x, m, k),
            MatRef::transposed(&w, k, n),
            false,
            1.0,
            Parallelism::None,
        );
        let mut got = vec![0.0; m * n];
        packed_matmul(&mut got, &x, m, &PackedWeight::pack(&w, n, k), false);
        for (g, e) in got.iter().zip(&want) {
            assert!(
                (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                "{m}x{k}x{n}: {g} vs {e}"
            );
        }
    }
}
#[test]
fn strided_packing_and_products_read_and_write_only_their_views() {
    // A [t, h] buffer holding several heads side by side: head 1's columns as a [t, dh]
    // weight, and transposed as a [dh, t] one.
    let (t, h, dh, hd) = (9, 12, 4, 1);
    let buf = values(t * h, 71);
    let mut keys = PackedWeight::empty();
    keys.repack_strided(&buf[hd * dh..], t, dh, h, 1);
    let mut trans = PackedWeight::empty();
    trans.repack_strided(&buf[hd * dh..], dh, t, 1, h);
    for j in 0..t {
        for kk in 0..dh {
            let v = buf[j * h + hd * dh + kk];
            assert_eq!(keys.unpack()[j * dh + kk], v);
            assert_eq!(trans.unpack()[kk * t + j], v);
        }
    }
    // Q_h K_h^T from the strided query columns, written into a strided output's columns.
    let q = values(t * h, 72);
    let mut out = vec![5.0; t * 20];
    packed_matmul_strided(&mut out[3..], 20, &q[hd * dh..], h, t, &keys, false);
    for i in 0..t {
        for j in 0..20 {
            let got = out[i * 20 + j];
            if (3..3 + t).contains(&j) {
                let want: f32 = (0..dh)
                    .map(|kk| q[i * h + hd * dh + kk] * buf[(j - 3) * h + hd * dh + kk])
                    .sum();
                assert!((got - want).abs() < 1e-5, "{i},{j}: {got} vs {want}");
            } else {
                assert_eq!(got, 5.0, "{i},{j} outside the view was written");
            }
        }
    }
}

/// oneDNN's product (where it is loaded and this CPU has AVX-512) against the portable path,
/// with what the models pass it: a bias, accumulation, and two low-rank terms on runs of rows.
/// Printed as not run where oneDNN is absent or off.
#[test]
fn onednn_products_with_bias_accumulation_and_terms_match_the_portable_path() {
    let path = Path::best();
    if !crate::onednn::takes(path, WeightFormat::F32) {
        println!(
            "oneDNN product: not run on path {path}: {}",
            crate::onednn::status()
        );
        return;
    }
    let (m, k, n, r) = (2 * LIBRARY_ROWS_F32 + 3, 384, 160, 8);
    let x = values(m * k, 71);
    let w = PackedWeight::pack(&values(n * k, 72), n, k);
    let (a1, b1) = (
        PackedWeight::pack(&values(r * k, 73), r, k),
        PackedWeight::pack(&values(n * r, 74), n, r),
    );
    let (a2, b2) = (
        PackedWeight::pack(&values(2 * r * k, 75), 2 * r, k),
        PackedWeight::pack(&values(n * 2 * r, 76), n, 2 * r),
    );
    let terms = [
        RowTerm {
            rows: 3..70,
            a: &a1,
            b: &b1,
            scale: 0.5,
        },
        RowTerm {
            rows: 90..m,
            a: &a2,
            b: &b2,
            scale: -1.25,
        },
    ];
    let bias = values(n, 77);
    let start = values(m * n, 78);
    for (accumulate, bias) in [
        (false, None),
        (false, Some(&bias[..])),
        (true, Some(&bias[..])),
    ] {
        let mut want = start.clone();
        packed_matmul_on(
            Path::Portable,
            &mut want,
            &x,
            m,
            &w,
            accumulate,
            bias,
            &terms,
        );
        let mut got = start.clone();
        packed_matmul_on(path, &mut got, &x, m, &w, accumulate, bias, &terms);
        for (i, (g, e)) in got.iter().zip(&want).enumerate() {
            assert!(
                (g - e).abs() < 1e-3 * (1.0 + e.abs()),
                "accumulate={accumulate} bias={}: element {i}: {g} vs {e}",
                bias.is_some()
            );
        }
    }
    println!(
        "oneDNN product: ran on path {path}, {}",
        crate::onednn::status()
    );
}
