//! `logistic` (`lambda`): minimise the summed log-loss + (lambda/2) ||w||^2 on standardised
//! features, intercepts unpenalised. Two classes: one weight vector for the positive class.
//! Three or more: multinomial (softmax), one weight vector per class, all penalised (the
//! intercepts are then fixed up to a common shift, which the minimum-norm Newton step leaves
//! at the smallest norm; probabilities do not depend on it). Newton's method with a
//! backtracking line search, until the gradient's Euclidean norm is at most 1e-10 or (two
//! classes) the Newton step estimated from the last Hessian moves no coefficient by more than
//! 1e-10 x (1 + the largest |coefficient|).
//!
//! Two classes, for speed without changing what is computed: the passes over the rows (loss,
//! gradient and Hessian weights in one pass; the Hessian in another) run in fixed jobs of
//! `CHUNK` rows added in job order, so lent cores (`par`) change no bit; along a penalty path
//! each fit starts one tangent step away from the previous solution.

use super::elementary::{exp_nonpositive, log1p_unit};
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
            // p = 1 / (1 + exp(-eta)), computed without overflow on either side, with the
            // same exp as the fitting passes (`elementary`).
            let eta = row[0];
            let ex = exp_nonpositive(-eta.abs());
            let p = if eta >= 0.0 {
                1.0 / (1.0 + ex)
            } else {
                ex / (1.0 + ex)
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
    fn(
        z: &Matrix,
        y: &[f64],
        classes: usize,
        lambda: f64,
        start: Option<Vec<Vec<f64>>>,
        prior: Option<Vec<f64>>,
    ) -> (Fit, Option<Vec<f64>>),
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
    prior: Option<Vec<f64>>,
) -> (Fit, Option<Vec<f64>>) {
    if classes == 2 {
        return newton_binary(z, y, lambda, start, prior);
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
            Next::Done(fit) => return (fit, None),
            Next::Go(c, fc) => (coef, f) = (c, fc),
        }
    }
    ((coef, false, lambda == 0.0), None)
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

/// Sum in the fixed accumulator lanes of `gram::dot` (the same bits on every machine).
#[inline(always)]
fn lane_sum(a: &[f64]) -> f64 {
    const LANES: usize = 8;
    let mut acc = [0.0f64; LANES];
    let chunks = a.chunks_exact(LANES);
    let rest = chunks.remainder();
    for x in chunks {
        for l in 0..LANES {
            acc[l] += x[l];
        }
    }
    for (l, x) in rest.iter().enumerate() {
        acc[l] += x;
    }
    acc.iter().sum()
}

/// Rows per block of the binary Hessian.
const BLOCK: usize = 256;

/// Rows per job of the binary passes (a multiple of BLOCK). Fixed, so the partial sums, added
/// in job order, do not depend on how many threads share the jobs.
const CHUNK: usize = 4096;

/// The row ranges of the jobs.
fn chunk_ranges(n: usize) -> Vec<(usize, usize)> {
    (0..n.div_ceil(CHUNK))
        .map(|c| (c * CHUNK, ((c + 1) * CHUNK).min(n)))
        .collect()
}

/// One pass of the binary model over rows lo..hi at coefficients `c`: the summed log-loss,
/// the gradient's part (sum of r, then r . z_j per column, r = probability - label) and the
/// Hessian weights p (1 - p), so a Newton step reads the design once for all three.
#[inline(always)]
fn eval_part_body(
    z: &Matrix,
    y: &[f64],
    c: &[f64],
    lo: usize,
    hi: usize,
) -> (f64, Vec<f64>, Vec<f64>) {
    use super::gram::dot;
    let mut eta = vec![c[0]; hi - lo];
    // Block by block, so each block of scores stays in the cache while the columns pass.
    for (b, eb) in eta.chunks_mut(BLOCK).enumerate() {
        let (at, len) = (lo + b * BLOCK, eb.len());
        for (j, w) in c[1..].iter().enumerate() {
            for (ei, zi) in eb.iter_mut().zip(&z.col(j)[at..at + len]) {
                *ei += w * zi;
            }
        }
    }
    let len = hi - lo;
    let (mut r, mut w, mut term) = (vec![0.0; len], vec![0.0; len], vec![0.0; len]);
    // Row by row with no running sum, so the loop vectorises; the loss is summed after.
    for k in 0..len {
        let (e, positive) = (eta[k], y[lo + k] as usize == 1);
        // exp and log1p in plain arithmetic (`elementary`).
        let ex = exp_nonpositive(-e.abs());
        // log(1 + exp(eta)) without overflow on either side.
        let lp = log1p_unit(ex);
        let softplus = if e > 0.0 { e + lp } else { lp };
        term[k] = softplus - if positive { e } else { 0.0 };
        let prob = if e >= 0.0 {
            1.0 / (1.0 + ex)
        } else {
            ex / (1.0 + ex)
        };
        r[k] = prob - if positive { 1.0 } else { 0.0 };
        w[k] = prob * (1.0 - prob);
    }
    let loss = lane_sum(&term);
    let mut g = vec![lane_sum(&r); z.cols + 1];
    for j in 0..z.cols {
        g[j + 1] = dot(&r, &z.col(j)[lo..hi]);
    }
    (loss, g, w)
}

widest!(
    eval_part,
    fn(z: &Matrix, y: &[f64], c: &[f64], lo: usize, hi: usize) -> (f64, Vec<f64>, Vec<f64>),
    eval_part_body
);

/// Summed log-loss of the binary model + (lambda/2) ||w||^2, with the unpenalised gradient and
/// the Hessian weights at `c` (which the next Newton step uses when `c` is accepted). The rows
/// are cut into jobs (`CHUNK`) whose sums are added in job order.
fn objective_binary(z: &Matrix, y: &[f64], c: &[f64], lambda: f64) -> (f64, Vec<f64>, Vec<f64>) {
    let ranges = chunk_ranges(z.rows);
    let parts = crate::par::chunks(ranges.len(), |k| {
        let (lo, hi) = ranges[k];
        eval_part(z, y, c, lo, hi)
    });
    let mut loss = -0.0;
    let mut grad = vec![0.0; c.len()];
    let mut w = Vec::with_capacity(z.rows);
    for (l, g, wk) in parts {
        loss += l;
        grad.iter_mut().zip(g).for_each(|(a, b)| *a += b);
        w.extend(wk);
    }
    (
        loss + 0.5 * lambda * c[1..].iter().map(|w| w * w).sum::<f64>(),
        grad,
        w,
    )
}

/// The upper triangle of X'WX (intercept as column 0) from rows lo..hi, block by block as
/// weighted dot products of the design's columns (fixed lanes, so the same bits on any
/// machine).
#[inline(always)]
fn hess_part_body(z: &Matrix, w: &[f64], lo: usize, hi: usize) -> Vec<f64> {
    use super::gram::dot;
    let p = z.cols;
    let d = p + 1;
    let mut h = vec![0.0; d * d];
    let mut wz = vec![0.0; d * BLOCK];
    for b0 in (lo..hi).step_by(BLOCK) {
        let b1 = (b0 + BLOCK).min(hi);
        let nb = b1 - b0;
        let wb = &w[b0..b1];
        wz[..nb].copy_from_slice(wb);
        for j in 0..p {
            let out = &mut wz[(j + 1) * BLOCK..(j + 1) * BLOCK + nb];
            for ((o, &wi), &zi) in out.iter_mut().zip(wb).zip(&z.col(j)[b0..b1]) {
                *o = wi * zi;
            }
        }
        // Sums in fixed lanes (a plain running sum would be one long chain of additions).
        h[0] += lane_sum(wb);
        for k in 0..p {
            h[k + 1] += lane_sum(&wz[(k + 1) * BLOCK..(k + 1) * BLOCK + nb]);
        }
        for j in 0..p {
            let a = &wz[(j + 1) * BLOCK..(j + 1) * BLOCK + nb];
            for k in j..p {
                h[(j + 1) * d + k + 1] += dot(a, &z.col(k)[b0..b1]);
            }
        }
    }
    h
}

widest!(
    hess_part,
    fn(z: &Matrix, w: &[f64], lo: usize, hi: usize) -> Vec<f64>,
    hess_part_body
);

/// Add the jobs' partial sums in job order.
fn add_parts(parts: Vec<Vec<f64>>, len: usize) -> Vec<f64> {
    let mut out = vec![0.0; len];
    for part in parts {
        out.iter_mut().zip(part).for_each(|(o, v)| *o += v);
    }
    out
}

/// Newton's method for two classes, column-oriented: the gradient, the Hessian X'WX (see
/// `hess_part`) and the objective are summed over fixed jobs of rows, shared with any lent
/// cores (`par::chunks`); the same iteration, line search and stopping rules as `newton`.
#[inline(always)]
fn newton_binary(
    z: &Matrix,
    y: &[f64],
    lambda: f64,
    start: Option<Vec<Vec<f64>>>,
    prior: Option<Vec<f64>>,
) -> (Fit, Option<Vec<f64>>) {
    let (n, p) = (z.rows, z.cols);
    let d = p + 1;
    // A cold start from the intercept-only solution, log-odds of the positive share.
    let mut coef = start.unwrap_or_else(|| {
        let mut c = vec![vec![0.0; d]];
        let share = lane_sum(y) / n.max(1) as f64;
        if share > 0.0 && share < 1.0 {
            c[0][0] = (share / (1.0 - share)).ln();
        }
        c
    });
    let (mut f, grad0, w0) = objective_binary(z, y, &coef[0], lambda);
    // The gradient and Hessian weights of the current point: from the line search that
    // accepted it (the last point evaluated whenever the iteration goes on).
    let last = std::cell::RefCell::new((grad0, w0));
    // X'WX of the last Newton step (unpenalised; at first the caller's, from the previous fit
    // of a penalty path): for the convergence test and the next start along the path.
    let mut hessian = prior;
    let ranges = chunk_ranges(n);
    for _ in 0..MAX_ITER {
        let (grad, w) = last.replace((Vec::new(), Vec::new()));
        // Converged already: stop before building a Hessian (`finish_step` would stop too).
        let penalised: Vec<f64> = (0..d)
            .map(|j| {
                if j == 0 {
                    grad[0]
                } else {
                    grad[j] + lambda * coef[0][j]
                }
            })
            .collect();
        let gnorm = penalised.iter().map(|g| g * g).sum::<f64>().sqrt();
        if gnorm <= TOL
            || hessian
                .as_ref()
                .is_some_and(|h| step_is_small(h, &penalised, &coef[0], lambda))
        {
            return ((coef, true, false), hessian);
        }
        // Upper triangle of X'WX, the intercept as column 0.
        let mut h = add_parts(
            crate::par::chunks(ranges.len(), |k| hess_part(z, &w, ranges[k].0, ranges[k].1)),
            d * d,
        );
        for r in 0..d {
            for c in 0..r {
                h[r * d + c] = h[c * d + r];
            }
        }
        hessian = Some(h.clone());
        match finish_step(coef, grad, h, f, lambda, n, |c| {
            // The passes go through the dispatcher: a closure is compiled without the caller's
            // vector unit.
            let (v, grad, w) = objective_binary(z, y, &c[0], lambda);
            *last.borrow_mut() = (grad, w);
            v
        }) {
            Next::Done(fit) => return (fit, hessian),
            Next::Go(c, fc) => (coef, f) = (c, fc),
        }
    }
    ((coef, false, lambda == 0.0), hessian)
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
        self.fit_standardized(&z, center, scale, y, lambda, notes, start, None)
            .map(|(f, _)| f)
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
        prior: Option<Vec<f64>>,
    ) -> Result<(Fitted, Option<Vec<f64>>)> {
        let ((coef, converged, separable), hessian) =
            newton(z, y, self.classes, lambda, start, prior);
        if separable {
            note(notes, "logistic with lambda = 0: the classes are (almost) perfectly separable, so the weights grow without bound; the fit was stopped. Set lambda > 0".to_string());
        } else if !converged {
            note(
                notes,
                format!(
                    "logistic with lambda = {lambda}: Newton's method stopped before converging (gradient norm 1e-10, or a step below 1e-10 relative)"
                ),
            );
        }
        Ok((
            Fitted::Logistic {
                center,
                scale,
                coef,
                classes: self.classes,
            },
            hessian,
        ))
    }
}

/// Relative size of the Newton step below which a fit counts as converged (see `step_is_small`).
const STEP_TOL: f64 = 1e-10;

/// Whether the Newton step from `beta`, estimated with a recent X'WX (`hessian`, unpenalised)
/// and the penalised gradient `grad`, moves no coefficient by more than STEP_TOL x (1 + the
/// largest |coefficient|): the solution is then known to about that accuracy, on any number of
/// rows (an absolute gradient tolerance grows harder to meet as rows are added, since the
/// gradient is a sum over them).
fn step_is_small(hessian: &[f64], grad: &[f64], beta: &[f64], lambda: f64) -> bool {
    let d = beta.len();
    let mut h = hessian.to_vec();
    for j in 1..d {
        h[j * d + j] += lambda;
    }
    let hm = Matrix {
        rows: d,
        cols: d,
        data: h,
    };
    let step = svd_solve_prep(&hm, grad).solve(0.0);
    let scale = 1.0 + beta.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    step.iter()
        .all(|s| s.is_finite() && s.abs() <= STEP_TOL * scale)
}

/// The next start along a penalty path: the solution at `from` moved by the path's tangent,
/// beta + (from - to) (X'WX + from P)^-1 P beta, P the identity on the weights (not the
/// intercept): the stationarity condition grad L(beta) + lambda P beta = 0, differentiated in
/// lambda. A first-order step: Newton's method then starts nearer the new solution. Falls back
/// to the old solution when the step is not finite.
fn path_start(beta: &[f64], hessian: &[f64], from: f64, to: f64) -> Vec<f64> {
    let d = beta.len();
    let mut h = hessian.to_vec();
    let mut rhs = vec![0.0; d];
    for j in 1..d {
        h[j * d + j] += to;
        rhs[j] = (from - to) * beta[j];
    }
    let hm = Matrix {
        rows: d,
        cols: d,
        data: h,
    };
    let step = svd_solve_prep(&hm, &rhs).solve(0.0);
    let next: Vec<f64> = beta.iter().zip(&step).map(|(b, s)| b + s).collect();
    if next.iter().all(|v| v.is_finite()) {
        next
    } else {
        beta.to_vec()
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
        let mut previous: Option<(f64, Vec<f64>)> = None;
        self.check_classes()?;
        // One standardisation for the whole path: the same fitting rows every time.
        let (center, scale) = mean_sd(&x.x);
        let z = standardize(&x.x, &center, &scale);
        for g in order {
            let l = lambda(&grid[g]);
            // Two classes: step along the path from the previous solution, and hand its
            // Hessian on for the convergence test.
            let (begin, prior) = match (start.take(), previous.take()) {
                (Some(c), Some((from, h))) if self.classes == 2 => {
                    let c: Vec<Vec<f64>> = c;
                    (Some(vec![path_start(&c[0], &h, from, l)]), Some(h))
                }
                (c, _) => (c, None),
            };
            let (fitted, hessian) = self.fit_standardized(
                &z,
                center.clone(),
                scale.clone(),
                y,
                l,
                notes,
                begin,
                prior,
            )?;
            if let Fitted::Logistic { coef, .. } = &fitted {
                start = Some(coef.clone());
            }
            previous = hessian.map(|h| (l, h));
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::ParamValue;

    /// 20,000 rows (five jobs of `CHUNK`), three correlated features, labels from a noisy
    /// logistic rule (a fixed generator).
    fn data() -> (Design, Vec<f64>) {
        let n = 20_000;
        let mut rng = crate::testgen::Lcg(5);
        let mut next = || rng.unit();
        let mut cols: Vec<Vec<f64>> = (0..3).map(|_| Vec::with_capacity(n)).collect();
        let mut y = Vec::with_capacity(n);
        for _ in 0..n {
            let a = next() * 4.0 - 2.0;
            let b = 0.6 * a + next();
            let c = next() * 10.0;
            let eta = 1.5 * a - 2.0 * b + 0.1 * c - 0.3;
            y.push(f64::from(next() < 1.0 / (1.0 + (-eta).exp())));
            cols[0].push(a);
            cols[1].push(b);
            cols[2].push(c);
        }
        let x = Matrix::from_cols(n, &cols);
        let names = vec!["a".into(), "b".into(), "c".into()];
        (Design { x, names }, y)
    }

    fn grid(lambdas: &[f64]) -> Vec<Params> {
        lambdas
            .iter()
            .map(|&l| vec![("lambda".to_string(), ParamValue::Float(l))])
            .collect()
    }

    /// The passes' sums run over fixed jobs of rows, so lent cores change no bit.
    #[test]
    fn lent_cores_change_no_bit() {
        let (x, y) = data();
        let m = Logistic { classes: 2 };
        let g = grid(&[100.0, 1.0, 0.01]);
        let fit = |cores: usize| {
            crate::par::lend(cores, || {
                m.fit_predict_grid(&x, &y, &g, &[&x.x], &mut Notes::new())
                    .unwrap()
            })
        };
        let one = fit(0);
        for cores in [1, 3] {
            assert_eq!(fit(cores), one);
        }
    }

    /// Along a penalty path (a step along the path's tangent, then Newton's method until the
    /// estimated step is below 1e-10 relative), each fit reaches the optimum a cold start
    /// reaches on its own, to 1e-9 in every probability.
    #[test]
    fn a_penalty_path_reaches_each_cold_start_optimum() {
        let (x, y) = data();
        let m = Logistic { classes: 2 };
        let lambdas = [1000.0, 30.0, 1.0, 0.03, 0.001];
        let path = m
            .fit_predict_grid(&x, &y, &grid(&lambdas), &[&x.x], &mut Notes::new())
            .unwrap();
        for (g, &l) in lambdas.iter().enumerate() {
            let mut notes = Notes::new();
            let cold = m.fit_one(&x, &y, l, &mut notes, None).unwrap();
            assert!(notes.is_empty(), "{notes:?}");
            let want = cold.predict(&x.x);
            let worst = path[g][0]
                .iter()
                .zip(&want)
                .fold(0.0f64, |a, (p, q)| a.max((p - q).abs()));
            assert!(worst <= 1e-9, "lambda {l}: {worst:e}");
        }
    }
}
