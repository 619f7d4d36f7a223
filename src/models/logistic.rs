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

/// Class probabilities (n x classes, row-major) for raw rows standardised by `center` and
/// `scale`. Two classes take a column-wise pass with no copies of the design: the same
/// arithmetic as standardising, then `scores_flat` (each score is the intercept plus the
/// products summed in feature order from -0.0, as `Iterator::sum` sums).
pub fn probabilities_raw(
    x: &Matrix,
    center: &[f64],
    scale: &[f64],
    coef: &[Vec<f64>],
    classes: usize,
) -> Vec<f64> {
    probabilities_wide(x, center, scale, coef, classes)
}

widest!(
    probabilities_wide,
    fn(x: &Matrix, center: &[f64], scale: &[f64], coef: &[Vec<f64>], classes: usize) -> Vec<f64>,
    probabilities_body
);

#[inline(always)]
fn probabilities_body(
    x: &Matrix,
    center: &[f64],
    scale: &[f64],
    coef: &[Vec<f64>],
    classes: usize,
) -> Vec<f64> {
    if classes != 2 || coef.len() != 1 {
        return probabilities(&standardize(x, center, scale), coef, classes);
    }
    let c = &coef[0];
    let mut acc = vec![-0.0f64; x.rows];
    for (b, ab) in acc.chunks_mut(BLOCK).enumerate() {
        let (at, len) = (b * BLOCK, ab.len());
        for j in 0..x.cols {
            let (m, sc, w) = (center[j], scale[j], c[j + 1]);
            for (a, v) in ab.iter_mut().zip(&x.col(j)[at..at + len]) {
                *a += ((v - m) / sc) * w;
            }
        }
    }
    let scores: Vec<f64> = acc.iter().map(|a| c[0] + a).collect();
    probs_from_scores(&scores, x.rows, 1, classes)
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

// Fit by Newton's method. Returns the coefficients and whether it converged; `separable` is set
// when lambda = 0 and the weights run away (the classes can be split perfectly).
widest!(
    newton,
    fn(z: &Matrix, y: &[f64], classes: usize, lambda: f64, start: Option<Vec<Vec<f64>>>) -> Fit,
    newton_body
);

/// (coefficients, converged, separable)
type Fit = (Vec<Vec<f64>>, bool, bool);

#[inline(always)]
fn newton_body(
    z: &Matrix,
    y: &[f64],
    classes: usize,
    lambda: f64,
    start: Option<Vec<Vec<f64>>>,
) -> Fit {
    if classes == 2 {
        return newton_binary(z, y, lambda, start);
    }
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
                for (g, &xv) in grad[a * d..(a + 1) * d].iter_mut().zip(&xi) {
                    *g += r * xv;
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
                        for (hv, &xv) in h[row + from..row + d].iter_mut().zip(&xi[from..d]) {
                            *hv += wu * xv;
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
        match finish_step(coef, grad, h, f, lambda, n, |c| {
            objective(&xr, n, p, y, c, lambda, binary)
        }) {
            Next::Done(fit) => return fit,
            Next::Go(c, fc) => (coef, f) = (c, fc),
        }
    }
    (coef, false, lambda == 0.0)
}

/// Where a Newton iteration leaves the fit.
enum Next {
    Done(Fit),
    Go(Vec<Vec<f64>>, f64),
}

/// The end of a Newton iteration, shared by both forms: the penalty's gradient and Hessian
/// terms, the convergence test, the minimum-norm step, backtracking (halve until the objective
/// does not increase) and the stopping rules.
#[inline(always)]
fn finish_step(
    coef: Vec<Vec<f64>>,
    mut grad: Vec<f64>,
    mut h: Vec<f64>,
    f: f64,
    lambda: f64,
    n: usize,
    obj: impl Fn(&[Vec<f64>]) -> f64,
) -> Next {
    let (k, d) = (coef.len(), coef.first().map_or(0, Vec::len));
    let m = k * d;
    for a in 0..k {
        for j in 1..d {
            grad[a * d + j] += lambda * coef[a][j];
            h[(a * d + j) * m + a * d + j] += lambda;
        }
    }
    let gnorm = grad.iter().map(|g| g * g).sum::<f64>().sqrt();
    if gnorm <= TOL {
        return Next::Done((coef, true, false));
    }
    let hm = Matrix {
        rows: m,
        cols: m,
        data: h,
    };
    let neg: Vec<f64> = grad.iter().map(|g| -g).collect();
    let step = svd_solve_prep(&hm, &neg).solve(0.0);
    let mut t = 1.0;
    let mut next = None;
    for _ in 0..60 {
        let trial: Vec<Vec<f64>> = (0..k)
            .map(|a| (0..d).map(|u| coef[a][u] + t * step[a * d + u]).collect())
            .collect();
        let ft = obj(&trial);
        // Near the optimum the objective is flat to rounding: allow that much slack.
        if ft.is_finite() && ft <= f + 1e-13 * f.abs().max(1.0) {
            next = Some((trial, ft));
            break;
        }
        t *= 0.5;
    }
    let accepted = next.is_some();
    let (coef, f) = next.unwrap_or((coef, f));
    let big = coef
        .iter()
        .flat_map(|c| c[1..].iter())
        .fold(0.0f64, |a, w| a.max(w.abs()));
    if lambda == 0.0 && (big > 1e6 || f < 1e-12 * n as f64) {
        return Next::Done((coef, false, true));
    }
    if !accepted {
        // No decrease possible at this precision: as converged as floating point allows.
        return Next::Done((coef, gnorm <= 1e-6 * (1.0 + n as f64), false));
    }
    Next::Go(coef, f)
}

/// Rows per block of the binary Hessian.
const BLOCK: usize = 256;

/// Linear scores of the binary model, column by column over the standardised design.
#[inline(always)]
fn etas(z: &Matrix, c: &[f64]) -> Vec<f64> {
    let mut e = vec![c[0]; z.rows];
    // Block by block, so each block of scores stays in the cache while the columns pass.
    for (b, eb) in e.chunks_mut(BLOCK).enumerate() {
        let (at, len) = (b * BLOCK, eb.len());
        for (j, w) in c[1..].iter().enumerate() {
            for (ei, zi) in eb.iter_mut().zip(&z.col(j)[at..at + len]) {
                *ei += w * zi;
            }
        }
    }
    e
}

/// Summed log-loss of the binary model + (lambda/2) ||w||^2, with the linear scores and
/// exp(-|score|) per row, which the next Newton step reuses for its probabilities.
#[inline(always)]
fn objective_binary(z: &Matrix, y: &[f64], c: &[f64], lambda: f64) -> (f64, Vec<f64>, Vec<f64>) {
    let eta = etas(z, c);
    let ex: Vec<f64> = eta.iter().map(|e| (-e.abs()).exp()).collect();
    let loss: f64 = eta
        .iter()
        .zip(&ex)
        .zip(y)
        .map(|((&eta, &ex), &yi)| {
            // log(1 + exp(eta)) without overflow on either side.
            let softplus = if eta > 0.0 {
                eta + ex.ln_1p()
            } else {
                ex.ln_1p()
            };
            softplus - if yi as usize == 1 { eta } else { 0.0 }
        })
        .sum();
    (
        loss + 0.5 * lambda * c[1..].iter().map(|w| w * w).sum::<f64>(),
        eta,
        ex,
    )
}

widest!(
    objective_wide,
    fn(z: &Matrix, y: &[f64], c: &[f64], lambda: f64) -> (f64, Vec<f64>, Vec<f64>),
    objective_binary
);

/// Newton's method for two classes, column-oriented: the Hessian X'WX is accumulated block by
/// block as weighted dot products of the design's columns (fixed lanes, so the same bits on
/// any machine), the same iteration, line search and stopping rules as `newton`.
#[inline(always)]
fn newton_binary(z: &Matrix, y: &[f64], lambda: f64, start: Option<Vec<Vec<f64>>>) -> Fit {
    use super::gram::dot;
    let (n, p) = (z.rows, z.cols);
    let d = p + 1;
    let mut coef = start.unwrap_or_else(|| vec![vec![0.0; d]]);
    let (mut f, eta0, ex0) = objective_binary(z, y, &coef[0], lambda);
    // The scores and exp(-|score|) of the current point: from the line search that accepted it.
    let last = std::cell::RefCell::new((eta0, ex0));
    let mut wz = vec![0.0; d * BLOCK];
    for _ in 0..MAX_ITER {
        let prob: Vec<f64> = {
            let cur = last.borrow();
            cur.0
                .iter()
                .zip(&cur.1)
                .map(|(&e, &ex)| {
                    if e >= 0.0 {
                        1.0 / (1.0 + ex)
                    } else {
                        ex / (1.0 + ex)
                    }
                })
                .collect()
        };
        let r: Vec<f64> = prob
            .iter()
            .zip(y)
            .map(|(&pi, &yi)| pi - if yi as usize == 1 { 1.0 } else { 0.0 })
            .collect();
        let w: Vec<f64> = prob.iter().map(|&pi| pi * (1.0 - pi)).collect();
        let mut grad = vec![0.0; d];
        grad[0] = r.iter().sum();
        for j in 0..p {
            grad[j + 1] = dot(&r, z.col(j));
        }
        // Converged already: stop before building a Hessian (`finish_step` would stop too).
        let penalised: f64 = (0..d)
            .map(|j| {
                let g = if j == 0 {
                    grad[0]
                } else {
                    grad[j] + lambda * coef[0][j]
                };
                g * g
            })
            .sum();
        if penalised.sqrt() <= TOL {
            return (coef, true, false);
        }
        // Upper triangle of X'WX, the intercept as column 0.
        let mut h = vec![0.0; d * d];
        for b0 in (0..n).step_by(BLOCK) {
            let b1 = (b0 + BLOCK).min(n);
            let nb = b1 - b0;
            let wb = &w[b0..b1];
            wz[..nb].copy_from_slice(wb);
            for j in 0..p {
                let out = &mut wz[(j + 1) * BLOCK..(j + 1) * BLOCK + nb];
                for ((o, &wi), &zi) in out.iter_mut().zip(wb).zip(&z.col(j)[b0..b1]) {
                    *o = wi * zi;
                }
            }
            h[0] += wb.iter().sum::<f64>();
            for k in 0..p {
                h[k + 1] += wz[(k + 1) * BLOCK..(k + 1) * BLOCK + nb]
                    .iter()
                    .sum::<f64>();
            }
            for j in 0..p {
                let a = &wz[(j + 1) * BLOCK..(j + 1) * BLOCK + nb];
                for k in j..p {
                    h[(j + 1) * d + k + 1] += dot(a, &z.col(k)[b0..b1]);
                }
            }
        }
        for r in 0..d {
            for c in 0..r {
                h[r * d + c] = h[c * d + r];
            }
        }
        match finish_step(coef, grad, h, f, lambda, n, |c| {
            // Through the dispatcher: a closure is compiled without the caller's vector unit.
            let (v, eta, ex) = objective_wide(z, y, &c[0], lambda);
            *last.borrow_mut() = (eta, ex);
            v
        }) {
            Next::Done(fit) => return fit,
            Next::Go(c, fc) => (coef, f) = (c, fc),
        }
    }
    (coef, false, lambda == 0.0)
}

impl Logistic {
    fn check_classes(&self) -> Result<()> {
        if self.classes < 2 {
            return Err(Error::Input(
                "logistic needs a classification task with at least two classes".into(),
            ));
        }
        Ok(())
    }

    fn fit_one(
        &self,
        x: &Design,
        y: &[f64],
        lambda: f64,
        notes: &mut Notes,
        start: Option<Vec<Vec<f64>>>,
    ) -> Result<Fitted> {
        self.check_classes()?;
        let (center, scale) = mean_sd(&x.x);
        let z = standardize(&x.x, &center, &scale);
        self.fit_standardized(&z, center, scale, y, lambda, notes, start)
    }

    /// `fit_one` on an already standardised design (a grid standardises once).
    #[allow(clippy::too_many_arguments)]
    fn fit_standardized(
        &self,
        z: &Matrix,
        center: Vec<f64>,
        scale: Vec<f64>,
        y: &[f64],
        lambda: f64,
        notes: &mut Notes,
        start: Option<Vec<Vec<f64>>>,
    ) -> Result<Fitted> {
        let (coef, converged, separable) = newton(z, y, self.classes, lambda, start);
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
        self.check_classes()?;
        // One standardisation for the whole path: the same fitting rows every time.
        let (center, scale) = mean_sd(&x.x);
        let z = standardize(&x.x, &center, &scale);
        for g in order {
            let fitted = self.fit_standardized(
                &z,
                center.clone(),
                scale.clone(),
                y,
                lambda(&grid[g]),
                notes,
                start.take(),
            )?;
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
