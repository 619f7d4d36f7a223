//! `logistic` (`lambda`): minimise the summed log-loss + (lambda/2) ||w||^2 on standardised
//! features, intercepts unpenalised. Two classes: one weight vector for the positive class.
//! Three or more: multinomial (softmax), one weight vector per class, all penalised (the
//! intercepts are then fixed up to a common shift, which the minimum-norm Newton step leaves
//! at the smallest norm; probabilities do not depend on it). Newton's method with a
//! backtracking line search, until the gradient's Euclidean norm is at most 1e-10.

use super::encode::{Notes, note};
use super::linalg::{Matrix, mean_sd, standardize, svd_solve_prep};
use super::{Design, Fitted, Model, Params, param};
use crate::error::{Error, Result};

pub struct Logistic {
    pub classes: usize,
}

const TOL: f64 = 1e-10;
const MAX_ITER: usize = 100;

fn lambda(p: &Params) -> f64 {
    param(p, "lambda").map_or(0.0, |v| v.as_f64())
}

/// Log-sum-exp of a row, stably.
fn lse(v: &[f64]) -> f64 {
    let m = v.iter().fold(f64::NEG_INFINITY, |a, b| a.max(*b));
    m + v.iter().map(|x| (x - m).exp()).sum::<f64>().ln()
}

/// Row-major copy of the standardised design, so each row's features are contiguous.
fn rows_of(z: &Matrix) -> Vec<f64> {
    let (n, p) = (z.rows, z.cols);
    let mut out = vec![0.0; n * p];
    for j in 0..p {
        for (i, v) in z.col(j).iter().enumerate() {
            out[i * p + j] = *v;
        }
    }
    out
}

/// Linear scores, n x k row-major: intercept + row . weights for each coefficient row.
fn scores_flat(xr: &[f64], n: usize, p: usize, coef: &[Vec<f64>]) -> Vec<f64> {
    let k = coef.len();
    let mut out = vec![0.0; n * k];
    for i in 0..n {
        let row = &xr[i * p..(i + 1) * p];
        for (a, c) in coef.iter().enumerate() {
            out[i * k + a] = c[0] + row.iter().zip(&c[1..]).map(|(x, w)| x * w).sum::<f64>();
        }
    }
    out
}

/// Probabilities (n x classes) from flat scores.
fn probs_from_scores(s: &[f64], n: usize, k: usize, classes: usize) -> Vec<f64> {
    let mut out = Vec::with_capacity(n * classes);
    for i in 0..n {
        let row = &s[i * k..(i + 1) * k];
        if classes == 2 {
            // p = 1 / (1 + exp(-eta)), computed without overflow on either side.
            let eta = row[0];
            let p = if eta >= 0.0 {
                1.0 / (1.0 + (-eta).exp())
            } else {
                eta.exp() / (1.0 + eta.exp())
            };
            out.push(1.0 - p);
            out.push(p);
        } else {
            let l = lse(row);
            out.extend(row.iter().map(|v| (v - l).exp()));
        }
    }
    out
}

/// Class probabilities (n x classes, row-major) for standardised rows.
pub fn probabilities(z: &Matrix, coef: &[Vec<f64>], classes: usize) -> Vec<f64> {
    let xr = rows_of(z);
    probs_from_scores(
        &scores_flat(&xr, z.rows, z.cols, coef),
        z.rows,
        coef.len(),
        classes,
    )
}

/// The objective: summed log-loss + (lambda/2) sum of squared weights (not intercepts).
fn objective(
    xr: &[f64],
    n: usize,
    p: usize,
    y: &[f64],
    coef: &[Vec<f64>],
    lambda: f64,
    binary: bool,
) -> f64 {
    let k = coef.len();
    let s = scores_flat(xr, n, p, coef);
    let mut loss = 0.0;
    for i in 0..n {
        let row = &s[i * k..(i + 1) * k];
        let c = y[i] as usize;
        loss += if binary {
            // log(1 + exp(eta)) - y eta
            let eta = row[0];
            let softplus = if eta > 0.0 {
                eta + (-eta).exp().ln_1p()
            } else {
                eta.exp().ln_1p()
            };
            softplus - if c == 1 { eta } else { 0.0 }
        } else {
            lse(row) - row[c]
        };
    }
    let pen: f64 = coef
        .iter()
        .map(|c| c[1..].iter().map(|w| w * w).sum::<f64>())
        .sum();
    loss + 0.5 * lambda * pen
}

/// Fit by Newton's method. Returns the coefficients and whether it converged; `separable` is set
/// when lambda = 0 and the weights run away (the classes can be split perfectly).
fn newton(
    z: &Matrix,
    y: &[f64],
    classes: usize,
    lambda: f64,
    start: Option<Vec<Vec<f64>>>,
) -> (Vec<Vec<f64>>, bool, bool) {
    let (n, p) = (z.rows, z.cols);
    let xr = rows_of(z);
    let binary = classes == 2;
    let k = if binary { 1 } else { classes };
    let d = p + 1;
    let mut coef = start.unwrap_or_else(|| vec![vec![0.0; d]; k]);
    let mut f = objective(&xr, n, p, y, &coef, lambda, binary);
    let cls = |a: usize| if binary { 1 } else { a };
    let m = k * d;
    for _ in 0..MAX_ITER {
        let probs = probs_from_scores(&scores_flat(&xr, n, p, &coef), n, k, classes);
        let pr = |i: usize, a: usize| probs[i * classes + cls(a)];
        // Gradient and Hessian in one pass over the rows. Hessian, (k d) x (k d):
        // sum_i x_i x_i^T P_a (delta_ab - P_b), plus lambda on the weights; only the upper
        // triangle is accumulated, then mirrored.
        let mut grad = vec![0.0; m];
        let mut h = vec![0.0; m * m];
        let mut xi = vec![0.0; d];
        for i in 0..n {
            xi[0] = 1.0;
            xi[1..].copy_from_slice(&xr[i * p..(i + 1) * p]);
            for a in 0..k {
                let r = pr(i, a) - if y[i] as usize == cls(a) { 1.0 } else { 0.0 };
                for u in 0..d {
                    grad[a * d + u] += r * xi[u];
                }
                for b in a..k {
                    let w = if binary {
                        pr(i, 0) * (1.0 - pr(i, 0))
                    } else {
                        pr(i, a) * (if a == b { 1.0 } else { 0.0 } - pr(i, b))
                    };
                    if w == 0.0 {
                        continue;
                    }
                    for u in 0..d {
                        let wu = w * xi[u];
                        let row = (a * d + u) * m + b * d;
                        let from = if a == b { u } else { 0 };
                        for v in from..d {
                            h[row + v] += wu * xi[v];
                        }
                    }
                }
            }
        }
        for r in 0..m {
            for c in 0..r {
                h[r * m + c] = h[c * m + r];
            }
        }
        for a in 0..k {
            for j in 1..d {
                grad[a * d + j] += lambda * coef[a][j];
                h[(a * d + j) * m + a * d + j] += lambda;
            }
        }
        let gnorm = grad.iter().map(|g| g * g).sum::<f64>().sqrt();
        if gnorm <= TOL {
            return (coef, true, false);
        }
        let hm = Matrix {
            rows: m,
            cols: m,
            data: h,
        };
        let neg: Vec<f64> = grad.iter().map(|g| -g).collect();
        let step = svd_solve_prep(&hm, &neg).solve(0.0);
        // Backtracking: halve until the objective does not increase.
        let mut t = 1.0;
        let mut accepted = false;
        for _ in 0..60 {
            let trial: Vec<Vec<f64>> = (0..k)
                .map(|a| (0..d).map(|u| coef[a][u] + t * step[a * d + u]).collect())
                .collect();
            let ft = objective(&xr, n, p, y, &trial, lambda, binary);
            // Near the optimum the objective is flat to rounding: allow that much slack.
            if ft.is_finite() && ft <= f + 1e-13 * f.abs().max(1.0) {
                coef = trial;
                f = ft;
                accepted = true;
                break;
            }
            t *= 0.5;
        }
        let big = coef
            .iter()
            .flat_map(|c| c[1..].iter())
            .fold(0.0f64, |a, w| a.max(w.abs()));
        if lambda == 0.0 && (big > 1e6 || f < 1e-12 * n as f64) {
            return (coef, false, true);
        }
        if !accepted {
            // No decrease possible at this precision: as converged as floating point allows.
            return (coef, gnorm <= 1e-6 * (1.0 + n as f64), false);
        }
    }
    (coef, false, lambda == 0.0)
}

impl Logistic {
    fn fit_one(
        &self,
        x: &Design,
        y: &[f64],
        lambda: f64,
        notes: &mut Notes,
        start: Option<Vec<Vec<f64>>>,
    ) -> Result<Fitted> {
        if self.classes < 2 {
            return Err(Error::Input(
                "logistic needs a classification task with at least two classes".into(),
            ));
        }
        let (center, scale) = mean_sd(&x.x);
        let z = standardize(&x.x, &center, &scale);
        let (coef, converged, separable) = newton(&z, y, self.classes, lambda, start);
        if separable {
            note(notes, "logistic with lambda = 0: the classes are (almost) perfectly separable, so the weights grow without bound; the fit was stopped. Set lambda > 0".to_string());
        } else if !converged {
            note(
                notes,
                format!(
                    "logistic with lambda = {lambda}: Newton's method stopped before the gradient norm reached 1e-10"
                ),
            );
        }
        Ok(Fitted::Logistic {
            center,
            scale,
            coef,
            classes: self.classes,
        })
    }
}

impl Model for Logistic {
    fn fit(&self, x: &Design, y: &[f64], params: &Params, notes: &mut Notes) -> Result<Fitted> {
        self.fit_one(x, y, lambda(params), notes, None)
    }
    /// The grid along a decreasing penalty path, each fit starting from the previous one's
    /// solution (warm starts: fewer Newton steps, the same optimum).
    fn fit_predict_grid(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        notes: &mut Notes,
    ) -> Result<Vec<Vec<Vec<f64>>>> {
        let mut order: Vec<usize> = (0..grid.len()).collect();
        order.sort_by(|&a, &b| {
            lambda(&grid[b])
                .total_cmp(&lambda(&grid[a]))
                .then(a.cmp(&b))
        });
        let mut out = vec![Vec::new(); grid.len()];
        let mut start = None;
        for g in order {
            let fitted = self.fit_one(x, y, lambda(&grid[g]), notes, start.take())?;
            if let Fitted::Logistic { coef, .. } = &fitted {
                start = Some(coef.clone());
            }
            out[g] = targets.iter().map(|t| fitted.predict(t)).collect();
        }
        Ok(out)
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, params: &Params) -> f64 {
        -lambda(params)
    }
}
