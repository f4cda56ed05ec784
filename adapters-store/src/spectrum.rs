//! The singular values of an adapter's update `s B A` without forming the `[out, in]` matrix.
//!
//! With `G_A = A Aᵀ = V Λ Vᵀ` and `G_B = Bᵀ B` (both `r × r`), the squared singular values of
//! `B A` are the eigenvalues of the `r × r` symmetric matrix `C = Λ^½ Vᵀ G_B V Λ^½`: indeed
//! `(B A)(B A)ᵀ = (B V Λ^½)(B V Λ^½)ᵀ`, whose non-zero eigenvalues are those of
//! `(B V Λ^½)ᵀ (B V Λ^½) = C`. Two small symmetric eigenproblems (cyclic Jacobi, in f64) replace
//! an SVD of the big matrix. [`energy_rank`] then counts how many singular values carry a given
//! share of the energy `Σ σ²`.

use candle_core::{DType, Result, Tensor};

use crate::lowrank::LowRank;

/// Singular values of `s B A`, largest first (`rank` of them, some possibly zero).
pub fn singular_values(lr: &LowRank) -> Result<Vec<f64>> {
    let a = lr.a()?.to_dtype(DType::F64)?;
    let b = lr.b()?.to_dtype(DType::F64)?;
    let ga = gram(&a.matmul(&a.t()?)?)?;
    let gb = gram(&b.t()?.matmul(&b)?)?;
    Ok(singular_values_from_grams(&ga, &gb, lr.rank(), lr.scale()))
}

fn gram(t: &Tensor) -> Result<Vec<f64>> {
    t.flatten_all()?.to_vec1::<f64>()
}

/// The same from the two `r × r` Gram matrices (row-major) and the scale.
pub fn singular_values_from_grams(ga: &[f64], gb: &[f64], r: usize, scale: f64) -> Vec<f64> {
    let (lambda, v) = symmetric_eigen(ga.to_vec(), r);
    let root: Vec<f64> = lambda.iter().map(|l| l.max(0.0).sqrt()).collect();
    // W = V Λ^½, then C = Wᵀ G_B W.
    let mut w = vec![0.0; r * r];
    for i in 0..r {
        for j in 0..r {
            w[i * r + j] = v[i * r + j] * root[j];
        }
    }
    let mut gw = vec![0.0; r * r];
    for i in 0..r {
        for k in 0..r {
            let g = gb[i * r + k];
            for j in 0..r {
                gw[i * r + j] += g * w[k * r + j];
            }
        }
    }
    let mut c = vec![0.0; r * r];
    for i in 0..r {
        for k in 0..r {
            let wki = w[k * r + i];
            for j in 0..r {
                c[i * r + j] += wki * gw[k * r + j];
            }
        }
    }
    let (mut sigma2, _) = symmetric_eigen(c, r);
    sigma2.sort_by(|x, y| y.total_cmp(x));
    sigma2
        .into_iter()
        .map(|s2| s2.max(0.0).sqrt() * scale.abs())
        .collect()
}

/// How many of the singular values (largest first) it takes to reach `fraction` of the energy
/// `Σ σ²`; 0 for an all-zero update.
pub fn energy_rank(singular_values: &[f64], fraction: f64) -> usize {
    let total: f64 = singular_values.iter().map(|s| s * s).sum();
    if total <= 0.0 {
        return 0;
    }
    let mut sorted = singular_values.to_vec();
    sorted.sort_by(|x, y| y.total_cmp(x));
    let mut acc = 0.0;
    for (i, s) in sorted.iter().enumerate() {
        acc += s * s;
        // A hair of tolerance so that exactly 99% counts as reached despite rounding.
        if acc >= fraction * total * (1.0 - 1e-12) {
            return i + 1;
        }
    }
    sorted.len()
}

/// Eigenvalues and eigenvectors (columns of the row-major `n × n` result) of a symmetric matrix,
/// by cyclic Jacobi rotations.
fn symmetric_eigen(mut m: Vec<f64>, n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut v = vec![0.0; n * n];
    for i in 0..n {
        v[i * n + i] = 1.0;
    }
    let norm: f64 = m.iter().map(|x| x * x).sum::<f64>().sqrt();
    for _sweep in 0..100 {
        let off: f64 = (0..n)
            .flat_map(|i| (0..n).filter(move |&j| j != i).map(move |j| (i, j)))
            .map(|(i, j)| m[i * n + j] * m[i * n + j])
            .sum::<f64>()
            .sqrt();
        if off <= 1e-15 * norm.max(f64::MIN_POSITIVE) {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = m[p * n + q];
                if apq == 0.0 {
                    continue;
                }
                let theta = (m[q * n + q] - m[p * n + p]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let mkp = m[k * n + p];
                    let mkq = m[k * n + q];
                    m[k * n + p] = c * mkp - s * mkq;
                    m[k * n + q] = s * mkp + c * mkq;
                }
                for k in 0..n {
                    let mpk = m[p * n + k];
                    let mqk = m[q * n + k];
                    m[p * n + k] = c * mpk - s * mqk;
                    m[q * n + k] = s * mpk + c * mqk;
                }
                for k in 0..n {
                    let vkp = v[k * n + p];
                    let vkq = v[k * n + q];
                    v[k * n + p] = c * vkp - s * vkq;
                    v[k * n + q] = s * vkp + c * vkq;
                }
            }
        }
    }
    ((0..n).map(|i| m[i * n + i]).collect(), v)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    fn tensor(values: Vec<f32>, rows: usize, cols: usize) -> Tensor {
        Tensor::from_vec(values, (rows, cols), &Device::Cpu).unwrap()
    }

    /// A = rows a_i·e_i, B = columns b_i·e_i, so B A is diagonal with entries a_i·b_i and its
    /// singular values are |s·a_i·b_i| (worked by hand).
    #[test]
    fn diagonal_factors_give_the_products_as_singular_values() {
        let (r, inp, out) = (4, 6, 5);
        let a_diag = [3.0f32, -2.0, 1.0, 0.0];
        let b_diag = [1.0f32, 2.0, 0.5, 7.0];
        let mut a = vec![0f32; r * inp];
        let mut b = vec![0f32; out * r];
        for i in 0..r {
            a[i * inp + i] = a_diag[i];
            b[i * r + i] = b_diag[i];
        }
        let lr = LowRank::new(tensor(a, r, inp), tensor(b, out, r), 0.5).unwrap();
        let sv = singular_values(&lr).unwrap();
        let want = [2.0, 1.5, 0.25, 0.0]; // 0.5 × (4, 3, 0.5, 0)
        for (g, w) in sv.iter().zip(want) {
            assert!((g - w).abs() < 1e-9, "{sv:?}");
        }
        // Energy 4 + 2.25 + 0.0625 = 6.3125: the top two carry 99.0%, so 99% needs 2.
        assert_eq!(energy_rank(&sv, 0.99), 2);
        assert_eq!(energy_rank(&sv, 0.999), 3);
    }

    /// Against the eigenvalues of (BA)ᵀ(BA) formed explicitly (small enough to do directly).
    #[test]
    fn matches_the_explicit_matrix_for_random_factors() {
        let (r, inp, out) = (5, 9, 7);
        let a = Tensor::randn(0f32, 1.0, (r, inp), &Device::Cpu).unwrap();
        let b = Tensor::randn(0f32, 1.0, (out, r), &Device::Cpu).unwrap();
        let lr = LowRank::new(a, b, 2.0).unwrap();
        let m = lr.update().unwrap().to_dtype(DType::F64).unwrap();
        let mtm = gram(&m.t().unwrap().matmul(&m).unwrap()).unwrap();
        let (mut explicit, _) = symmetric_eigen(mtm, inp);
        explicit.sort_by(|x, y| y.total_cmp(x));
        let sv = singular_values(&lr).unwrap();
        for (i, s) in sv.iter().enumerate() {
            let e = explicit[i].max(0.0).sqrt();
            assert!((s - e).abs() < 1e-3 * e.max(1.0), "{i}: {s} vs {e}");
        }
    }

    #[test]
    fn a_zero_update_has_rank_zero() {
        assert_eq!(energy_rank(&[0.0, 0.0], 0.99), 0);
        assert_eq!(energy_rank(&[1.0, 0.0], 0.99), 1);
    }
}
