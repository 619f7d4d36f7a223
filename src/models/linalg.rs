//! Dense column-major matrices and the least-squares kernels the linear families share:
//! Householder QR, a one-sided Jacobi SVD of the small triangular factor, and ridge or
//! minimum-norm solves from that SVD (any number of penalties from one decomposition).

use serde::{Deserialize, Serialize};

/// A dense matrix stored column by column.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Matrix {
    pub rows: usize,
    pub cols: usize,
    pub data: Vec<f64>,
}

impl Matrix {
    pub fn zeros(rows: usize, cols: usize) -> Matrix {
        Matrix {
            rows,
            cols,
            data: vec![0.0; rows * cols],
        }
    }
    pub fn col(&self, j: usize) -> &[f64] {
        &self.data[j * self.rows..(j + 1) * self.rows]
    }
    pub fn col_mut(&mut self, j: usize) -> &mut [f64] {
        &mut self.data[j * self.rows..(j + 1) * self.rows]
    }
    pub fn get(&self, i: usize, j: usize) -> f64 {
        self.data[j * self.rows + i]
    }
    /// Columns from slices.
    pub fn from_cols(rows: usize, cols: &[Vec<f64>]) -> Matrix {
        let mut data = Vec::with_capacity(rows * cols.len());
        for c in cols {
            data.extend_from_slice(c);
        }
        Matrix {
            rows,
            cols: cols.len(),
            data,
        }
    }
}

/// Column means and population standard deviations (ddof 0); a zero sd becomes 1.
pub fn mean_sd(x: &Matrix) -> (Vec<f64>, Vec<f64>) {
    let n = x.rows as f64;
    let mut means = Vec::with_capacity(x.cols);
    let mut sds = Vec::with_capacity(x.cols);
    for j in 0..x.cols {
        let c = x.col(j);
        let mut m = c.iter().sum::<f64>() / n;
        if !m.is_finite() {
            // The sum overflowed (values near the largest f64); the mean itself is in range.
            m = c.iter().map(|v| v / n).sum::<f64>();
        }
        // Two-pass variance: exact enough for the reference checks, no cancellation.
        let v = c.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n;
        let mut sd = v.sqrt();
        if !sd.is_finite() {
            // Deviations near 1e154 and beyond square past the largest f64: divide by the
            // largest first (only here, so ordinary columns keep their bits).
            let big = c.iter().fold(0.0f64, |b, v| b.max((v - m).abs()));
            if big.is_finite() {
                sd = big * (c.iter().map(|v| ((v - m) / big).powi(2)).sum::<f64>() / n).sqrt();
            }
        }
        means.push(m);
        sds.push(if sd > 0.0 && sd.is_finite() { sd } else { 1.0 });
    }
    (means, sds)
}

/// `(x - mean) / scale`, column by column.
pub fn standardize(x: &Matrix, mean: &[f64], scale: &[f64]) -> Matrix {
    let mut out = x.clone();
    for j in 0..x.cols {
        for v in out.col_mut(j) {
            *v = (*v - mean[j]) / scale[j];
        }
    }
    out
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Thin SVD of a tall matrix A = U diag(s) V^T, kept in the form the solvers need:
/// `s`, the columns of V, and U^T z for the right-hand side z.
#[derive(Debug, Clone)]
pub struct Svd {
    pub s: Vec<f64>,
    /// p x p, column i is the i-th right singular vector.
    pub v: Matrix,
    /// U^T y for the right-hand side given at decomposition time.
    pub uty: Vec<f64>,
    /// max(rows, cols) of A, for the rank tolerance.
    pub dim: usize,
}

/// Decompose A (n x p) with right-hand side y: Householder QR when n >= p (so the Jacobi sweeps
/// run on the p x p factor only), then one-sided Jacobi on the result.
pub fn svd_solve_prep(a: &Matrix, y: &[f64]) -> Svd {
    svd_solve_owned(a.clone(), y)
}

/// As `svd_solve_prep`, overwriting `a` instead of copying it (large designs: one copy less).
pub fn svd_solve_owned(a: Matrix, y: &[f64]) -> Svd {
    let (n, p) = (a.rows, a.cols);
    let dim = n.max(p);
    if n >= p && p > 0 {
        let (r, qty) = householder_qr(a, y);
        let (s, v, uty) = jacobi(r, &qty[..p]);
        Svd { s, v, uty, dim }
    } else {
        let (s, v, uty) = jacobi(a, y);
        Svd { s, v, uty, dim }
    }
}

/// Householder QR: returns the p x p factor R and Q^T y (length n).
fn householder_qr(mut a: Matrix, y: &[f64]) -> (Matrix, Vec<f64>) {
    let (n, p) = (a.rows, a.cols);
    let mut y = y.to_vec();
    for j in 0..p {
        let norm = {
            let c = &a.col(j)[j..];
            let big = c.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            if big == 0.0 {
                0.0
            } else {
                big * c.iter().map(|v| (v / big) * (v / big)).sum::<f64>().sqrt()
            }
        };
        if norm == 0.0 {
            continue;
        }
        let x0 = a.get(j, j);
        let alpha = if x0 > 0.0 { -norm } else { norm };
        let mut v: Vec<f64> = a.col(j)[j..].to_vec();
        v[0] -= alpha;
        let vv = dot(&v, &v);
        if vv == 0.0 {
            continue;
        }
        for k in j + 1..p {
            let c = &mut a.col_mut(k)[j..];
            let f = 2.0 * dot(&v, c) / vv;
            for (ci, vi) in c.iter_mut().zip(&v) {
                *ci -= f * vi;
            }
        }
        let f = 2.0 * dot(&v, &y[j..]) / vv;
        for (yi, vi) in y[j..].iter_mut().zip(&v) {
            *yi -= f * vi;
        }
        let c = a.col_mut(j);
        c[j] = alpha;
        for ci in &mut c[j + 1..] {
            *ci = 0.0;
        }
    }
    let mut r = Matrix::zeros(p, p);
    for j in 0..p {
        for i in 0..=j.min(n - 1) {
            r.data[j * p + i] = a.get(i, j);
        }
    }
    (r, y)
}

/// One-sided Jacobi SVD (Hestenes 1958; Demmel & Veselic 1992 for its accuracy): rotate column
/// pairs of A until all are orthogonal; the column norms are the singular values.
fn jacobi(mut a: Matrix, z: &[f64]) -> (Vec<f64>, Matrix, Vec<f64>) {
    let p = a.cols;
    let m = a.rows;
    let mut v = Matrix::zeros(p, p);
    for i in 0..p {
        v.data[i * p + i] = 1.0;
    }
    for _sweep in 0..100 {
        let mut rotated = false;
        for i in 0..p {
            for j in i + 1..p {
                let alpha = dot(a.col(i), a.col(i));
                let beta = dot(a.col(j), a.col(j));
                let gamma = dot(a.col(i), a.col(j));
                if gamma == 0.0 || gamma.abs() <= f64::EPSILON * (alpha * beta).sqrt() {
                    continue;
                }
                rotated = true;
                let zeta = (beta - alpha) / (2.0 * gamma);
                let t = zeta.signum() / (zeta.abs() + (1.0 + zeta * zeta).sqrt());
                let c = 1.0 / (1.0 + t * t).sqrt();
                let s = c * t;
                for r in 0..m {
                    let (x, y) = (a.data[i * m + r], a.data[j * m + r]);
                    a.data[i * m + r] = c * x - s * y;
                    a.data[j * m + r] = s * x + c * y;
                }
                for r in 0..p {
                    let (x, y) = (v.data[i * p + r], v.data[j * p + r]);
                    v.data[i * p + r] = c * x - s * y;
                    v.data[j * p + r] = s * x + c * y;
                }
            }
        }
        if !rotated {
            break;
        }
    }
    let mut s = Vec::with_capacity(p);
    let mut uty = Vec::with_capacity(p);
    for i in 0..p {
        let sigma = dot(a.col(i), a.col(i)).sqrt();
        s.push(sigma);
        uty.push(if sigma > 0.0 {
            dot(a.col(i), z) / sigma
        } else {
            0.0
        });
    }
    (s, v, uty)
}

impl Svd {
    /// Singular values above max(n, p) * eps * largest count as rank (numpy's lstsq default).
    pub fn rank_tol(&self) -> f64 {
        let smax = self.s.iter().fold(0.0f64, |m, v| m.max(*v));
        smax * self.dim as f64 * f64::EPSILON
    }

    pub fn rank(&self) -> usize {
        let tol = self.rank_tol();
        self.s.iter().filter(|&&s| s > tol).count()
    }

    /// argmin ||y - A x||^2 + lambda ||x||^2; with lambda = 0 the minimum-norm least-squares
    /// solution (singular values under the tolerance are dropped).
    pub fn solve(&self, lambda: f64) -> Vec<f64> {
        let p = self.v.cols;
        let tol = self.rank_tol();
        let mut x = vec![0.0; p];
        for i in 0..p {
            let s = self.s[i];
            if lambda == 0.0 && s <= tol {
                continue;
            }
            let f = s * self.uty[i] / (s * s + lambda);
            if f == 0.0 || !f.is_finite() {
                continue;
            }
            for (r, xr) in x.iter_mut().enumerate() {
                *xr += f * self.v.data[i * p + r];
            }
        }
        x
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn solves_an_exact_system() {
        // y = 1*x0 + 2*x1, exactly.
        let a = Matrix::from_cols(4, &[vec![1.0, 2.0, 3.0, 4.0], vec![1.0, -1.0, 2.0, 0.5]]);
        let y = [3.0, 0.0, 7.0, 5.0];
        let svd = svd_solve_prep(&a, &y);
        let x = svd.solve(0.0);
        assert!(
            (x[0] - 1.0).abs() < 1e-14 && (x[1] - 2.0).abs() < 1e-14,
            "{x:?}"
        );
        assert_eq!(svd.rank(), 2);
    }

    #[test]
    fn duplicated_column_gives_minimum_norm() {
        // Columns equal: any split of the weight fits; minimum norm splits it evenly.
        let c = vec![1.0, 2.0, 3.0];
        let a = Matrix::from_cols(3, &[c.clone(), c]);
        let svd = svd_solve_prep(&a, &[2.0, 4.0, 6.0]);
        assert_eq!(svd.rank(), 1);
        let x = svd.solve(0.0);
        assert!(
            (x[0] - 1.0).abs() < 1e-14 && (x[1] - 1.0).abs() < 1e-14,
            "{x:?}"
        );
    }

    #[test]
    fn ridge_matches_closed_form_in_one_dimension() {
        // x = (a.y) / (a.a + lambda)
        let a = Matrix::from_cols(3, &[vec![1.0, 2.0, 2.0]]);
        let y = [1.0, 1.0, 3.0];
        let x = svd_solve_prep(&a, &y).solve(1.0);
        assert!((x[0] - 9.0 / 10.0).abs() < 1e-15);
    }

    #[test]
    fn wide_matrix_is_handled() {
        let a = Matrix::from_cols(1, &[vec![2.0], vec![2.0]]);
        let x = svd_solve_prep(&a, &[4.0]).solve(0.0);
        assert!(
            (x[0] - 1.0).abs() < 1e-14 && (x[1] - 1.0).abs() < 1e-14,
            "{x:?}"
        );
    }
}
